//! `spikeyard-quality`: how well the sort holds on the simulator's
//! scenarios, over several seeds: for each recording, the share of
//! simulated neurons with template SNR ≥ 5 that a sorted unit matches at
//! accuracy ≥ 0.8, every sorted unit counted (false units, units merging two
//! or more neurons, the false units' share of sorted spikes), and the
//! conduction velocity's error on the simulated axons. Never run by
//! `cargo test`; our own simulator, so a check of consistency, not an
//! outside reference.

use anyhow::Context;
use arrow_array::{Float64Array, Int32Array};
use clap::Parser;
use spikeyard::runner::ProgressMode;
use spikeyard_contract::table::{column, read_table};
use std::path::{Path, PathBuf};

#[derive(Parser)]
struct Args {
    /// Folder for the simulated recordings and their results (both rewritten).
    #[arg(long, default_value = "target/quality-work")]
    work: PathBuf,
    /// Seeds 1..=this for every scenario.
    #[arg(long, default_value_t = 3, value_parser = clap::value_parser!(u64).range(1..))]
    seeds: u64,
    /// Scenarios, comma-separated.
    #[arg(long, default_value = "sparse-grid,culture,dense-axons,dense-culture")]
    scenarios: String,
    /// Recording length of the sparse scenarios, s (dense-culture's 1024
    /// electrodes get a third of it).
    #[arg(long, default_value_t = 60.0)]
    duration_s: f64,
}

/// One recording's scores.
struct Score {
    strong: usize,
    strong_found: usize,
    units: usize,
    false_units: usize,
    merging: usize,
    false_spike_share: f64,
    /// Relative errors of the first branch's velocity, per simulated axon found.
    velocity_errors: Vec<f64>,
    axons: usize,
    seconds: f64,
}

fn score(work: &Path, scenario_name: &str, seed: u64, duration_s: f64) -> anyhow::Result<Score> {
    let recording_dir = work.join(format!("{scenario_name}-{seed}"));
    let results = work.join(format!("{scenario_name}-{seed}-results"));
    let scenario = spikeyard::simulate::Scenario::named(scenario_name, duration_s, seed)
        .with_context(|| format!("unknown scenario {scenario_name}"))?;
    let simulated = spikeyard::simulate::write_recording(&scenario, &recording_dir)?;
    if results.exists() {
        std::fs::remove_dir_all(&results).with_context(|| format!("{}: cannot empty", results.display()))?;
    }
    let started = std::time::Instant::now();
    spikeyard::commands::run(&simulated.description, &results, None, false, ProgressMode::for_stderr())?;
    let seconds = started.elapsed().as_secs_f64();
    let detection = spikeyard::commands::score_run(&results, &scenario, &simulated)?;
    let comparison = spikeyard::commands::compare(&results, &simulated.truth_spikes, 0.5, None)?;
    let strong: Vec<usize> = detection.units.iter().filter(|u| u.amplitude_sigma >= 5.0).map(|u| u.unit).collect();
    let strong_found = strong.iter().filter(|&&u| comparison.truth[u].accuracy() >= 0.8).count();
    let counts = comparison.unit_counts();
    let velocities = first_branch_velocities(&results.join("propagation.parquet"))?;
    let mut velocity_errors = Vec::new();
    let mut axons = 0;
    for m in &comparison.truth {
        let Some(axon) = scenario.units[m.truth_unit as usize].axon.as_ref() else { continue };
        axons += 1;
        let measured = m
            .sorted_unit
            .filter(|_| m.accuracy() >= 0.8)
            .and_then(|u| velocities.iter().find(|(id, _)| *id as i64 == u).map(|v| v.1));
        if let Some(v) = measured {
            velocity_errors.push((v - axon.velocity_m_per_s).abs() / axon.velocity_m_per_s);
        }
    }
    Ok(Score {
        strong: strong.len(),
        strong_found,
        units: counts.units,
        false_units: counts.false_units,
        merging: counts.merging,
        false_spike_share: counts.false_spike_share,
        velocity_errors,
        axons,
        seconds,
    })
}

/// (unit, velocity) of every unit's branch 0.
fn first_branch_velocities(path: &Path) -> anyhow::Result<Vec<(i32, f64)>> {
    let mut rows = Vec::new();
    for batch in read_table(path)? {
        let units: &Int32Array = column(path, &batch, "unit_id")?;
        let branches: &Int32Array = column(path, &batch, "branch")?;
        let velocity: &Float64Array = column(path, &batch, "velocity_m_per_s")?;
        rows.extend(
            (0..batch.num_rows()).filter(|&i| branches.value(i) == 0).map(|i| (units.value(i), velocity.value(i))),
        );
    }
    Ok(rows)
}

fn main() -> anyhow::Result<()> {
    let args = Args::parse();
    std::fs::create_dir_all(&args.work).with_context(|| format!("{}: cannot create", args.work.display()))?;
    println!("| scenario | seed | neurons ≥ 5 σ found at ≥ 0.8 | sorted units | false units | merging units | spikes in false units | axons timed | velocity error (mean) | run s |");
    println!("|---|---|---|---|---|---|---|---|---|---|");
    for name in args.scenarios.split(',').map(str::trim) {
        let duration_s = if name == "dense-culture" { args.duration_s / 3.0 } else { args.duration_s };
        let mut total = (0usize, 0usize, 0usize, 0usize);
        for seed in 1..=args.seeds {
            let s = score(&args.work, name, seed, duration_s)?;
            let error = if s.velocity_errors.is_empty() {
                "–".to_string()
            } else {
                format!("{:.1} %", 100.0 * s.velocity_errors.iter().sum::<f64>() / s.velocity_errors.len() as f64)
            };
            println!(
                "| {name} | {seed} | {} of {} | {} | {} | {} | {:.1} % | {} of {} | {error} | {:.1} |",
                s.strong_found,
                s.strong,
                s.units,
                s.false_units,
                s.merging,
                100.0 * s.false_spike_share,
                s.velocity_errors.len(),
                s.axons,
                s.seconds
            );
            total.0 += s.strong_found;
            total.1 += s.strong;
            total.2 += s.false_units;
            total.3 += s.merging;
        }
        eprintln!(
            "{name}: {} of {} neurons at ≥ 5 σ found at ≥ 0.8 over {} seeds; {} false units, {} merging units",
            total.0, total.1, args.seeds, total.2, total.3
        );
    }
    Ok(())
}
