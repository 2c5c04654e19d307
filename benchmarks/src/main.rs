//! `spikeyard-bench`: whole-pipeline throughput on a simulated recording,
//! reported as samples per second and as ratios to reading the file once in
//! the same run (the physical floor), so that figures from different
//! machines compare. Never run by `cargo test`.
//!
//! Input setup (simulation) is outside the timing. The pipeline runs
//! `--runs` times (each into an emptied results folder); the tables give each
//! step's median and its range over the runs, since a shared machine's
//! timings vary by tens of percent from run to run.

use anyhow::Context;
use clap::Parser;
use spikeyard::runner::{ProgressMode, RunRecord};
use spikeyard::simulate::{write_recording, Axon, Scenario, UnitSpec};
use spikeyard_contract::{Electrode, Recording};
use std::path::PathBuf;
use std::time::{Duration, Instant};

/// Time read + filter + detect on a simulated probe-like recording.
#[derive(Parser)]
struct Args {
    /// Folder for the recording and results (reused: the recording is
    /// simulated only when missing).
    #[arg(long, default_value = "target/bench-work")]
    work: PathBuf,
    #[arg(long, default_value_t = 384)]
    channels: usize,
    #[arg(long, default_value_t = 30000.0)]
    sample_rate_hz: f64,
    #[arg(long, default_value_t = 60.0)]
    duration_s: f64,
    /// Skip the numpy/scipy/scikit-learn reference pipeline
    /// (`benchmarks/reference/pipeline.py`), which otherwise runs on the
    /// same file when python3 has those packages.
    #[arg(long)]
    no_reference: bool,
    /// Electrode layout: "probe" (four staggered columns, 16 × 20 µm) or
    /// "grid" (a square dense array at 17.5 µm pitch, e.g. 1024 = 32 × 32,
    /// with axons crossing it).
    #[arg(long, default_value = "probe")]
    layout: String,
    /// How many times the pipeline runs; figures are medians over them.
    #[arg(long, default_value_t = 3, value_parser = clap::value_parser!(u32).range(1..))]
    runs: u32,
}

/// Median and range of a step's wall times over the runs.
#[derive(Clone, Copy)]
struct Spread {
    median: f64,
    low: f64,
    high: f64,
}

impl Spread {
    fn of(mut seconds: Vec<f64>) -> Spread {
        seconds.sort_by(f64::total_cmp);
        let n = seconds.len();
        let median = if n % 2 == 1 { seconds[n / 2] } else { 0.5 * (seconds[n / 2 - 1] + seconds[n / 2]) };
        Spread { median, low: seconds[0], high: seconds[n - 1] }
    }
}

/// A probe-like layout (two staggered columns per shank row, 20 µm apart)
/// or a square dense grid at 17.5 µm whose every fourth unit has a straight
/// axon across the array.
fn bench_scenario(layout: &str, n_channels: usize, sample_rate_hz: f64, duration_s: f64) -> anyhow::Result<Scenario> {
    let side = (n_channels as f64).sqrt().round() as usize;
    let (electrodes, width_um, height_um): (Vec<Electrode>, f64, f64) = match layout {
        "probe" => (
            (0..n_channels)
                .map(|channel| Electrode {
                    channel,
                    x_um: (channel % 4) as f64 * 16.0 + if (channel / 4) % 2 == 1 { 8.0 } else { 0.0 },
                    y_um: (channel / 4) as f64 * 20.0,
                    label: None,
                    group: None,
                })
                .collect(),
            48.0,
            (n_channels / 4) as f64 * 20.0,
        ),
        "grid" => {
            anyhow::ensure!(
                side * side == n_channels,
                "--layout grid needs a square --channels (e.g. 1024), not {n_channels}"
            );
            (spikeyard::simulate::grid(side, side, 17.5), (side - 1) as f64 * 17.5, (side - 1) as f64 * 17.5)
        }
        other => anyhow::bail!("--layout is \"{other}\"; known: probe, grid"),
    };
    let n_units = n_channels / 8;
    let units = (0..n_units)
        .map(|i| {
            let (x_um, y_um) = if layout == "grid" {
                (
                    width_um * ((i * 7 % n_units) as f64 + 0.5) / n_units as f64,
                    height_um * (i as f64 + 0.5) / n_units as f64,
                )
            } else {
                (5.0 + (i * 13 % 48) as f64, height_um * (i as f64 + 0.5) / n_units as f64)
            };
            UnitSpec {
                x_um,
                y_um,
                z_um: 15.0 + (i % 5) as f64 * 5.0,
                peak_uv: 50.0 + (i * 37 % 100) as f64,
                rate_hz: 2.0 + (i % 7) as f64,
                burst_probability: 0.05,
                trough_ms: 0.12,
                axon: (layout == "grid" && i % 4 == 0)
                    .then(|| Axon::straight((x_um, y_um), (width_um - x_um, y_um), 0.3 + (i % 9) as f64 * 0.2, 25.0)),
            }
        })
        .collect();
    Ok(Scenario {
        name: format!("bench-{layout}-{n_channels}ch"),
        sample_rate_hz,
        duration_s,
        electrodes,
        units,
        white_noise_uv: 6.0,
        dead_channels: vec![],
        noisy_channels: vec![],
        network_burst_rate_hz: 0.0,
        seed: 42,
    })
}

fn read_once(recording: &Recording) -> anyhow::Result<Duration> {
    let started = Instant::now();
    let mut frames = Vec::new();
    let mut checksum = 0.0f64;
    for chunk in recording.chunks((recording.sample_rate_hz as usize).max(1), 0) {
        recording.read_frames(chunk.core_start, chunk.core_end, &mut frames)?;
        checksum += frames[0] as f64;
    }
    std::hint::black_box(checksum);
    Ok(started.elapsed())
}

fn main() -> anyhow::Result<()> {
    let args = Args::parse();
    let scenario = bench_scenario(&args.layout, args.channels, args.sample_rate_hz, args.duration_s)?;
    let recording_dir = args.work.join(&scenario.name).join(format!("{}s", args.duration_s));
    let description = recording_dir.join("recording.toml");
    if !description.exists() {
        eprintln!("simulating {} ({} s) into {} ...", scenario.name, args.duration_s, recording_dir.display());
        write_recording(&scenario, &recording_dir)?;
        // Start again in a fresh process, which finds the recording: the
        // allocator keeps the simulation's memory (83 MiB after simulating
        // the probe, 60 s or 480 s alike), and a stage, started in this
        // process's memory, would report it as its own peak whenever its
        // own is smaller.
        #[cfg(unix)]
        {
            use std::os::unix::process::CommandExt;
            let error = std::process::Command::new(std::env::current_exe()?).args(std::env::args_os().skip(1)).exec();
            return Err(error).context("restarting the benchmark after the simulation");
        }
    }
    let recording = Recording::open(&description)?;
    let samples = recording.n_frames as f64 * recording.n_channels as f64;
    // Warm the page cache the same way for both measurements.
    read_once(&recording)?;
    let read = read_once(&recording)?.as_secs_f64();
    let out = args.work.join("results");
    let mut runs: Vec<(RunRecord, f64)> = Vec::new();
    for run in 1..=args.runs {
        eprintln!("run {run} of {}", args.runs);
        let _ = std::fs::remove_dir_all(&out);
        let started = Instant::now();
        let record = spikeyard::commands::run(&description, &out, None, false, ProgressMode::for_stderr())?
            .context("a benchmark run is never a dry run")?;
        runs.push((record, started.elapsed().as_secs_f64()));
    }
    let stage_names: Vec<String> = runs[0].0.stages.iter().map(|s| s.name.clone()).collect();
    let stage = |name: &str| -> (Spread, u64) {
        let of_run = |(record, _): &(RunRecord, f64)| record.stages.iter().find(|s| s.name == name).cloned();
        let stages: Vec<_> = runs.iter().filter_map(of_run).collect();
        let peak = stages.iter().map(|s| s.peak_rss_bytes).max().unwrap_or(0);
        (Spread::of(stages.iter().map(|s| s.wall_seconds).collect()), peak)
    };
    let total = Spread::of(runs.iter().map(|(_, seconds)| *seconds).collect());

    let duration = recording.duration_s();
    println!(
        "\n## spikeyard benchmark: {} ({} channels, {} Hz, {:.0} s, i16)\n",
        scenario.name, recording.n_channels, recording.sample_rate_hz, duration
    );
    println!("machine: {} cores, {}", std::thread::available_parallelism().map_or(0, |n| n.get()), cpu_model());
    println!("runs: {} (wall s: median, and lowest to highest)", args.runs);
    println!("\n| step | wall s | range s | Msamples/s | x real time | ratio to reading once |");
    println!("|---|---|---|---|---|---|");
    let row = |name: &str, spread: Spread| {
        let seconds = spread.median;
        println!(
            "| {name} | {seconds:.2} | {:.2}–{:.2} | {:.1} | {:.1} | {:.2} |",
            spread.low,
            spread.high,
            samples / seconds / 1e6,
            duration / seconds,
            seconds / read
        );
    };
    row("read file once (reference)", Spread { median: read, low: read, high: read });
    for name in &stage_names {
        let (spread, peak) = stage(name);
        row(&format!("stage {name} (peak RSS {:.0} MiB)", peak as f64 / (1 << 20) as f64), spread);
    }
    row("whole run (hashing, planning, all stages)", total);
    let total = total.median;

    if args.no_reference {
        return Ok(());
    }
    let truth = recording_dir.join("truth_spikes.parquet");
    let ours = spikeyard::commands::compare(&out, &truth, 0.5, None)?;
    match reference(&description, &args.work.join("reference")) {
        Err(why) => println!("\nreference pipeline skipped: {why}"),
        Ok((timings, trains, wall)) => {
            println!("\n### side by side with the numpy/scipy/scikit-learn reference (benchmarks/reference)\n");
            println!("| step | spikeyard s | reference s | reference ÷ spikeyard |");
            println!("|---|---|---|---|");
            let mut sums = (0.0, 0.0);
            for name in ["filter", "detect", "features", "cluster"] {
                let mine = if stage_names.iter().any(|s| s == name) { stage(name).0.median } else { f64::NAN };
                let theirs = timings.get(name).copied().unwrap_or(f64::NAN);
                sums = (sums.0 + mine, sums.1 + theirs);
                println!("| {name} | {mine:.2} | {theirs:.2} | {:.1} |", theirs / mine);
            }
            println!("| filter to cluster | {:.2} | {:.2} | {:.1} |", sums.0, sums.1, sums.1 / sums.0);
            println!(
                "| whole run (spikeyard: all stages; reference: whole script) | {total:.2} | {wall:.2} | {:.1} |",
                wall / total
            );
            let window = (0.5e-3 * recording.sample_rate_hz).round() as i64;
            let theirs = spikeyard::compare::compare(&spikeyard::compare::read_trains(&truth)?, &trains, window);
            let agreement = spikeyard::compare::compare(
                &spikeyard::compare::read_trains(&out.join("spikes.parquet"))?,
                &trains,
                window,
            );
            let summary = |c: &spikeyard::compare::Comparison| {
                let found = c.truth.iter().filter(|m| m.accuracy() >= 0.8).count();
                let mean = c.truth.iter().map(|m| m.accuracy()).sum::<f64>() / c.truth.len().max(1) as f64;
                format!("{found} of {} at accuracy ≥ 0.8, mean accuracy {mean:.3}", c.truth.len())
            };
            println!("\nsimulated units found: spikeyard {}; reference {}", summary(&ours), summary(&theirs));
            println!("spikeyard's units (every one) found again in the reference's sorting: {}", summary(&agreement));
        }
    }
    Ok(())
}

/// Run the reference pipeline on the recording: its per-step seconds, its
/// spike trains, and its whole wall time. Err says why it could not run.
fn reference(
    description: &std::path::Path,
    work: &std::path::Path,
) -> Result<(std::collections::BTreeMap<String, f64>, spikeyard::compare::Trains, f64), String> {
    let script = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("reference/pipeline.py");
    let check = std::process::Command::new("python3").args(["-c", "import numpy, scipy, sklearn"]).output();
    match check {
        Err(e) => return Err(format!("python3 not found ({e})")),
        Ok(o) if !o.status.success() => {
            return Err(format!(
                "python3 lacks numpy, scipy or scikit-learn ({}); pip install numpy scipy scikit-learn",
                String::from_utf8_lossy(&o.stderr).lines().last().unwrap_or("")
            ))
        }
        Ok(_) => {}
    }
    eprintln!("running the reference pipeline ({}) ...", script.display());
    let started = Instant::now();
    let status = std::process::Command::new("python3")
        .arg(&script)
        .arg(description)
        .arg(work)
        .status()
        .map_err(|e| format!("cannot start python3: {e}"))?;
    let wall = started.elapsed().as_secs_f64();
    if !status.success() {
        return Err(format!("{} failed ({status})", script.display()));
    }
    let timings: std::collections::BTreeMap<String, f64> = std::fs::read_to_string(work.join("timings.json"))
        .ok()
        .and_then(|t| serde_json::from_str(&t).ok())
        .ok_or("timings.json missing or unreadable")?;
    let text = std::fs::read_to_string(work.join("spikes.csv")).map_err(|e| format!("spikes.csv: {e}"))?;
    let mut trains = spikeyard::compare::Trains::new();
    for line in text.lines().skip(1) {
        let mut parts = line.split(',').map(|p| p.trim().parse::<i64>());
        if let (Some(Ok(unit)), Some(Ok(sample))) = (parts.next(), parts.next()) {
            trains.entry(unit).or_default().push(sample);
        }
    }
    for train in trains.values_mut() {
        train.sort_unstable();
    }
    Ok((timings, trains, wall))
}

fn cpu_model() -> String {
    std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|text| {
            text.lines()
                .find(|l| l.starts_with("model name"))
                .map(|l| l.split(':').nth(1).unwrap_or("").trim().to_string())
        })
        .unwrap_or_else(|| "unknown CPU".into())
}
