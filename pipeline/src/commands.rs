//! The subcommands of `spikeyard`, callable from tests without a process.

use crate::config::PipelineConfig;
use crate::hash_memo::{data_hash, HashSource};
use crate::plan::{build_plan, hash_recording, Plan, STAGES_FOLDER};
use crate::runner::{execute, follow_output, ProgressMode, RunRecord};
use crate::simulate::{write_recording, Scenario, SimulatedRecording};
use crate::truth::{score_detection, DetectionScore, Truth};
use anyhow::Context;
use arrow_array::{Float64Array, Int32Array, Int64Array};
use spikeyard_contract::request::PROGRESS_PREFIX;
use spikeyard_contract::table::{column, read_table};
use spikeyard_contract::Recording;
use std::path::Path;

/// Plan a run (validating recording and config first); a dry run writes
/// nothing, not even the remembered hash ([`crate::hash_memo`]).
///
/// # Errors
/// The recording or config is refused, or a stage cannot be found.
pub fn plan_run(
    recording: &Path,
    out: &Path,
    config: Option<&Path>,
    dry_run: bool,
    mode: ProgressMode,
) -> anyhow::Result<Plan> {
    let recording = Recording::open(recording)?;
    let config = PipelineConfig::load(config)?;
    eprintln!(
        "recording {}: {} channels, {:.1} s at {} Hz ({})",
        recording.description_path.display(),
        recording.n_channels,
        recording.duration_s(),
        recording.sample_rate_hz,
        recording.dtype.name()
    );
    let data = &recording.data_path;
    let cannot_hash = || format!("{}: cannot read to hash it", data.display());
    // Hashed on a thread of its own, its progress shown like a stage's.
    let (lines, received) = std::sync::mpsc::channel();
    let memo_folder = out.join(STAGES_FOLDER);
    let (hashed, _) = std::thread::scope(|scope| {
        let hashing = scope.spawn(|| {
            data_hash(data, &memo_folder, !dry_run, move |done, total| {
                let _ = lines.send(format!("{PROGRESS_PREFIX} {done} {total} bytes"));
            })
        });
        (hashing.join(), follow_output("hashing", received, mode, std::time::Instant::now()))
    });
    let (data_hash, source) =
        hashed.map_err(|_| anyhow::anyhow!("the hashing thread panicked"))?.with_context(cannot_hash)?;
    if source == HashSource::Remembered {
        eprintln!("recording data unchanged since its hash was taken (same file, size and times): not hashed again");
    }
    let hash = hash_recording(&recording, &data_hash).with_context(cannot_hash)?;
    build_plan(&config, &recording, &hash, out)
}

/// `spikeyard run`: plan, then run what is not cached.
///
/// # Errors
/// As [`plan_run`] and [`execute`].
pub fn run(
    recording: &Path,
    out: &Path,
    config: Option<&Path>,
    dry_run: bool,
    mode: ProgressMode,
) -> anyhow::Result<Option<RunRecord>> {
    let plan = plan_run(recording, out, config, dry_run, mode)?;
    eprint!("{}", plan.describe());
    if dry_run {
        return Ok(None);
    }
    let record = execute(&plan, mode)?;
    eprintln!("results in {}: {}", out.display(), record.published.join(", "));
    Ok(Some(record))
}

/// `spikeyard simulate`.
///
/// # Errors
/// Unknown scenario, or writing fails.
pub fn simulate(
    out: &Path,
    scenario: &str,
    duration_s: f64,
    seed: u64,
) -> anyhow::Result<(Scenario, SimulatedRecording)> {
    let scenario = Scenario::named(scenario, duration_s, seed).with_context(|| {
        format!("unknown scenario \"{scenario}\"; known: {}", crate::simulate::SCENARIOS.join(", "))
    })?;
    anyhow::ensure!(
        duration_s.is_finite() && duration_s >= 1.0,
        "--duration-s is {duration_s}, but it must be at least 1"
    );
    let written = write_recording(&scenario, out)?;
    eprintln!(
        "simulated \"{}\": {} electrodes, {:.0} s at {} Hz, {} units, {} spikes -> {}",
        scenario.name,
        scenario.electrodes.len(),
        scenario.duration_s,
        scenario.sample_rate_hz,
        scenario.units.len(),
        written.spikes.len(),
        written.description.display()
    );
    Ok((scenario, written))
}

/// Events as (sample, channel), in table order.
pub type EventList = Vec<(u64, usize)>;

/// Read `events.parquet` as (sample, channel), and `channel_noise.parquet` as σ per channel.
///
/// # Errors
/// The tables are missing or lack the columns.
pub fn read_events_and_noise(results: &Path) -> anyhow::Result<(EventList, Vec<f64>)> {
    let events_path = results.join("events.parquet");
    let mut events = Vec::new();
    for batch in read_table(&events_path)? {
        let samples: &Int64Array = column(&events_path, &batch, "sample")?;
        let channels: &Int32Array = column(&events_path, &batch, "channel")?;
        events.extend(samples.values().iter().zip(channels.values()).map(|(&s, &c)| (s as u64, c as usize)));
    }
    let noise_path = results.join("channel_noise.parquet");
    let mut noise = Vec::new();
    for batch in read_table(&noise_path)? {
        let values: &Float64Array = column(&noise_path, &batch, "noise_uv")?;
        noise.extend(values.values().iter().copied());
    }
    Ok((events, noise))
}

/// Score a finished run's detections against the simulation it ran on,
/// with the default filter's band to express amplitudes in σ.
///
/// # Errors
/// The result tables cannot be read.
pub fn score_run(
    results: &Path,
    scenario: &Scenario,
    simulated: &SimulatedRecording,
) -> anyhow::Result<DetectionScore> {
    let (events, noise) = read_events_and_noise(results)?;
    let valid =
        spikeyard_filter::params::FilterParams::default().check(scenario.sample_rate_hz).map_err(anyhow::Error::msg)?;
    let engine = spikeyard_filter::kernel::FilterEngine::new(&valid, scenario.sample_rate_hz);
    let window_frames = (0.5e-3 * scenario.sample_rate_hz).round() as u64;
    let truth = Truth { spikes: &simulated.spikes, templates: &simulated.templates, electrodes: &scenario.electrodes };
    Ok(score_detection(&events, &truth, &noise, &engine, window_frames, 100.0))
}

/// `spikeyard demo`: simulate, run the default pipeline, print a summary.
///
/// # Errors
/// Any step fails.
pub fn demo(out: &Path, scenario: &str, duration_s: f64, mode: ProgressMode) -> anyhow::Result<()> {
    let recording_dir = out.join("recording");
    let results_dir = out.join("results");
    let (scenario, simulated) = simulate(&recording_dir, scenario, duration_s, 1)?;
    let record = run(&simulated.description, &results_dir, None, false, mode)?.context("the demo does not dry-run")?;
    let score = score_run(&results_dir, &scenario, &simulated)?;
    println!(
        "\nspikeyard demo: scenario \"{}\", {} electrodes, {:.0} s",
        scenario.name,
        scenario.electrodes.len(),
        scenario.duration_s
    );
    println!("  recording:    {}", simulated.description.display());
    println!("  ground truth: {}, {}", simulated.truth_units.display(), simulated.truth_spikes.display());
    println!("  results:      {}", results_dir.display());
    for stage in &record.stages {
        let figures: Vec<String> = stage.summary.iter().map(|(k, v)| format!("{k}={v}")).collect();
        println!(
            "  stage {:<8} {:>6.1} s  {:>5.0} MiB  {}",
            stage.name,
            stage.wall_seconds,
            stage.peak_rss_bytes as f64 / (1 << 20) as f64,
            figures.join(" ")
        );
    }
    println!("\n  detection against the simulated truth (±0.5 ms, within 100 µm of the unit's main electrode):");
    println!("  {:>4} {:>8} {:>13} {:>7} {:>7} {:>7}", "unit", "channel", "amplitude σ", "spikes", "found", "recall");
    for unit in &score.units {
        println!(
            "  {:>4} {:>8} {:>13.1} {:>7} {:>7} {:>7.3}",
            unit.unit,
            unit.channel,
            unit.amplitude_sigma,
            unit.n_truth,
            unit.n_found,
            unit.recall()
        );
    }
    let strong: Vec<_> = score.units.iter().filter(|u| u.amplitude_sigma >= 5.0).collect();
    let strong_recall = strong.iter().map(|u| u.n_found).sum::<usize>() as f64
        / strong.iter().map(|u| u.n_truth).sum::<usize>().max(1) as f64;
    println!(
        "  recall of units at ≥ 5 σ: {strong_recall:.3}; precision of all {} events: {:.3}",
        score.n_events,
        score.precision()
    );
    print!("\n{}", describe_units(&results_dir.join("units.parquet"))?);
    let comparison = compare(&results_dir, &simulated.truth_spikes, 0.5, None)?;
    println!(
        "\n  sorting against the simulated truth (±0.5 ms, one to one; {}):",
        results_dir.join("comparison.parquet").display()
    );
    for line in comparison.describe().lines() {
        println!("  {line}");
    }
    let good = comparison.truth.iter().filter(|m| m.accuracy() >= 0.8).count();
    let strong_good =
        strong.iter().filter(|u| comparison.truth.get(u.unit).is_some_and(|m| m.accuracy() >= 0.8)).count();
    let counts = comparison.unit_counts();
    println!(
        "  {good} of {} simulated units found at accuracy ≥ 0.8 ({strong_good} of the {} at ≥ 5 σ); every one of the {} sorted units counted: {} false (matching no simulated unit at ≥ 0.5, {:.1} % of sorted spikes), {} merging two or more simulated units",
        comparison.truth.len(),
        strong.len(),
        counts.units,
        counts.false_units,
        100.0 * counts.false_spike_share,
        counts.merging
    );
    print!("{}", describe_propagation(&results_dir.join("propagation.parquet"), &comparison, &scenario)?);
    println!("\n  Research software: check results before drawing any conclusion. Not a medical device.");
    Ok(())
}

/// `spikeyard stages`: each built-in stage and the executable that would run.
pub fn list_stages() -> String {
    let mut text = String::new();
    for stage in crate::stages::BUILTIN_STAGES {
        let place = match crate::stages::find_stage_executable(stage.name, None, Path::new(".")) {
            Ok(path) => path.display().to_string(),
            Err(e) => format!("not found ({e})"),
        };
        text.push_str(&format!("{:<8} {}\n         {}\n", stage.name, stage.about, place));
    }
    text
}

/// The exit code for an error: bad input (2) or failure (1).
pub fn exit_code(error: &anyhow::Error) -> u8 {
    let bad_input = error.chain().any(|cause| {
        cause.is::<spikeyard_contract::RecordingError>()
            || cause.is::<crate::config::ConfigError>()
            || cause.is::<crate::stages::StageNotFound>()
            || cause.downcast_ref::<crate::runner::StageFailed>().is_some_and(|f| f.bad_input)
    });
    if bad_input {
        crate::EXIT_BAD_INPUT
    } else {
        crate::EXIT_FAILED
    }
}

/// The sample rate a spikes table implies (sample ÷ time_s of a row with time > 0).
fn implied_sample_rate(path: &Path) -> anyhow::Result<f64> {
    for batch in read_table(path)? {
        let samples: &Int64Array = column(path, &batch, "sample")?;
        let times: &Float64Array = column(path, &batch, "time_s")?;
        if let Some(i) = (0..batch.num_rows()).find(|&i| times.value(i) > 0.0) {
            return Ok(samples.value(i) as f64 / times.value(i));
        }
    }
    anyhow::bail!("{}: no spike with time_s > 0 to infer the sample rate from", path.display())
}

/// `spikeyard compare`: score `sorting` (a spikes table, or a results
/// folder holding spikes.parquet) against `truth` (a spikes table with
/// unit_id, sample, time_s), write the table to `out` and return it.
///
/// # Errors
/// Tables missing or malformed.
pub fn compare(
    sorting: &Path,
    truth: &Path,
    window_ms: f64,
    out: Option<&Path>,
) -> anyhow::Result<crate::compare::Comparison> {
    let sorting = if sorting.is_dir() { sorting.join("spikes.parquet") } else { sorting.to_path_buf() };
    anyhow::ensure!(
        window_ms.is_finite() && window_ms > 0.0,
        "--window-ms is {window_ms}, but it must be greater than 0"
    );
    let sample_rate_hz = implied_sample_rate(truth)?;
    let window = (window_ms * 1e-3 * sample_rate_hz).round() as i64;
    let comparison =
        crate::compare::compare(&crate::compare::read_trains(truth)?, &crate::compare::read_trains(&sorting)?, window);
    let out = out.map_or_else(|| sorting.with_file_name("comparison.parquet"), Path::to_path_buf);
    spikeyard_contract::table::write_table(
        &out,
        &comparison.to_batch(),
        &[(spikeyard_contract::table::META_WRITER, format!("spikeyard compare {}", env!("CARGO_PKG_VERSION")))],
    )?;
    Ok(comparison)
}

/// Each unit's label (`single`, `multi` or `noise`) in a measured units table.
///
/// # Errors
/// The table is missing or lacks the columns.
pub fn read_unit_labels(path: &Path) -> anyhow::Result<Vec<(i64, String)>> {
    let mut labels = Vec::new();
    for batch in read_table(path)? {
        let ids: &Int32Array = column(path, &batch, "unit_id")?;
        let names: &arrow_array::StringArray = column(path, &batch, "label")?;
        labels.extend(ids.values().iter().zip(names.iter()).map(|(&u, l)| (u as i64, l.unwrap_or("").to_string())));
    }
    Ok(labels)
}

/// What `spikeyard check` found in a recording.
#[derive(Debug, Clone)]
pub struct CheckReport {
    pub text: String,
    pub clipped_fraction: f64,
    pub non_finite: u64,
    pub dead_channels: Vec<usize>,
    pub noisy_channels: Vec<usize>,
}

/// `spikeyard check`: validate a recording without running the pipeline,
/// read it once, and describe it.
///
/// # Errors
/// The description is refused (as by `spikeyard run`) or reading fails.
pub fn check(description: &Path) -> anyhow::Result<CheckReport> {
    let mut recording = Recording::open(description)?;
    let electrodes = &recording.electrodes;
    let extent = |f: fn(&spikeyard_contract::Electrode) -> f64| {
        electrodes.iter().map(f).fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| (lo.min(v), hi.max(v)))
    };
    let ((x0, x1), (y0, y1)) = (extent(|e| e.x_um), extent(|e| e.y_um));
    let mut nearest: Vec<f32> = electrodes
        .iter()
        .filter_map(|a| {
            electrodes
                .iter()
                .filter(|b| b.channel != a.channel)
                .map(|b| (a.x_um - b.x_um).hypot(a.y_um - b.y_um))
                .min_by(f64::total_cmp)
        })
        .map(|d| d as f32)
        .collect();
    let pitch = spikeyard_contract::noise::median_in_place(&mut nearest);

    // One pass over the stored numbers: range used, clipping, non-finite values.
    let (type_min, type_max) = match recording.dtype {
        spikeyard_contract::Dtype::I16 => (i16::MIN as f64, i16::MAX as f64),
        spikeyard_contract::Dtype::U16 => (0.0, u16::MAX as f64),
        spikeyard_contract::Dtype::I32 => (i32::MIN as f64, i32::MAX as f64),
        _ => (f64::NEG_INFINITY, f64::INFINITY),
    };
    let (mut low, mut high, mut clipped, mut non_finite) = (f64::INFINITY, f64::NEG_INFINITY, 0u64, 0u64);
    let mut stored = Vec::new();
    for chunk in recording.chunks(recording.sample_rate_hz.max(1.0) as usize, 0) {
        recording.read_stored(chunk.core_start, chunk.core_end, &mut stored)?;
        for &v in &stored {
            if !v.is_finite() {
                non_finite += 1;
                continue;
            }
            low = low.min(v);
            high = high.max(v);
            clipped += u64::from(v <= type_min || v >= type_max);
        }
    }
    let total = recording.n_frames as f64 * recording.n_channels as f64;
    let clipped_fraction = clipped as f64 / total;

    // Channel QC as the default filter stage measures it.
    recording.non_finite = spikeyard_contract::recording::NonFinite::Zero;
    let params = spikeyard_filter::params::FilterParams::default()
        .check(recording.sample_rate_hz)
        .map_err(anyhow::Error::msg)?;
    let engine = spikeyard_filter::kernel::FilterEngine::new(&params, recording.sample_rate_hz);
    let qc = spikeyard_filter::measure_qc(&engine, &recording, &params)?;
    use spikeyard_filter::qc::ChannelStatus;
    let with_status = |status: ChannelStatus| -> Vec<usize> {
        (0..recording.n_channels).filter(|&c| qc.status[c] == status).collect()
    };
    let (dead_channels, noisy_channels) = (with_status(ChannelStatus::Dead), with_status(ChannelStatus::Noisy));
    let mut noise: Vec<f32> = qc.noise_mad_uv.iter().map(|&v| v as f32).collect();
    let median_noise = spikeyard_contract::noise::median_in_place(&mut noise);

    let mut text = String::new();
    text.push_str(&format!("recording   {}\n", recording.description_path.display()));
    text.push_str(&format!(
        "data        {} ({}, {})\n",
        recording.data_path.display(),
        recording.dtype.name(),
        recording.layout.name()
    ));
    text.push_str(&format!(
        "duration    {:.3} s = {} frames at {} Hz\n",
        recording.duration_s(),
        recording.n_frames,
        recording.sample_rate_hz
    ));
    text.push_str(&format!("channels    {}\n", recording.n_channels));
    text.push_str(&format!(
        "geometry    x {x0}..{x1} µm, y {y0}..{y1} µm, median nearest-electrode pitch {pitch:.1} µm\n"
    ));
    text.push_str(&format!(
        "stored      values {low}..{high} ({:.1} .. {:.1} µV); dtype range {type_min}..{type_max}\n",
        (low - recording.offset) * recording.microvolts_per_unit,
        (high - recording.offset) * recording.microvolts_per_unit
    ));
    text.push_str(&format!(
        "clipped     {clipped} samples at the dtype's limits ({:.4} %)\n",
        100.0 * clipped_fraction
    ));
    if non_finite > 0 {
        text.push_str(&format!(
            "non-finite  {non_finite} NaN or infinite samples (refused unless filter.non_finite = \"zero\")\n"
        ));
    }
    text.push_str(&format!(
        "noise       median {median_noise:.2} µV (MAD, band-passed {}–{} Hz)\n",
        params.low_hz, params.high_hz
    ));
    text.push_str(&format!("dead        {} channel(s) {:?}\n", dead_channels.len(), dead_channels));
    text.push_str(&format!("noisy       {} channel(s) {:?}\n", noisy_channels.len(), noisy_channels));
    Ok(CheckReport { text, clipped_fraction, non_finite, dead_channels, noisy_channels })
}

/// The units table as printed by the demo: one line per unit, with its label.
///
/// # Errors
/// The table is missing or lacks the columns.
pub fn describe_units(path: &Path) -> anyhow::Result<String> {
    let mut text = format!(
        "  sorted units ({}):\n  {:>4} {:>6} {:>7} {:>7} {:>8} {:>6} {:>8} {:>8} {:>8}\n",
        path.display(),
        "unit",
        "label",
        "channel",
        "spikes",
        "rate Hz",
        "SNR",
        "contam.",
        "presence",
        "L-ratio"
    );
    for batch in read_table(path)? {
        let ids: &Int32Array = column(path, &batch, "unit_id")?;
        let channels: &Int32Array = column(path, &batch, "channel")?;
        let counts: &Int64Array = column(path, &batch, "n_spikes")?;
        let labels: &arrow_array::StringArray = column(path, &batch, "label")?;
        let f = |name: &str| column::<Float64Array>(path, &batch, name).cloned();
        let (rate, snr, contamination, presence, l_ratio) =
            (f("firing_rate_hz")?, f("snr")?, f("contamination")?, f("presence_ratio")?, f("l_ratio")?);
        for i in 0..batch.num_rows() {
            use arrow_array::Array;
            let l = if l_ratio.is_valid(i) { format!("{:.4}", l_ratio.value(i)) } else { "-".into() };
            text.push_str(&format!(
                "  {:>4} {:>6} {:>7} {:>7} {:>8.2} {:>6.1} {:>8.3} {:>8.2} {:>8}\n",
                ids.value(i),
                labels.value(i),
                channels.value(i),
                counts.value(i),
                rate.value(i),
                snr.value(i),
                contamination.value(i),
                presence.value(i),
                l
            ));
        }
    }
    Ok(text)
}

/// Measured conduction velocities, next to the simulated ones where a
/// simulated unit with an axon was sorted.
///
/// # Errors
/// The table is missing or lacks the columns.
pub fn describe_propagation(
    path: &Path,
    comparison: &crate::compare::Comparison,
    scenario: &Scenario,
) -> anyhow::Result<String> {
    let mut text = format!("\n  conduction velocity ({}):\n", path.display());
    text.push_str(&format!(
        "  {:>4} {:>6} {:>10} {:>19} {:>10} {:>9} {:>6} {:>14}\n",
        "unit", "branch", "v m/s", "95 % interval", "electrodes", "path µm", "r²", "simulated m/s"
    ));
    for batch in read_table(path)? {
        let units: &Int32Array = column(path, &batch, "unit_id")?;
        let branches: &Int32Array = column(path, &batch, "branch")?;
        let counts: &Int32Array = column(path, &batch, "n_electrodes")?;
        let f = |name: &str| column::<Float64Array>(path, &batch, name).cloned();
        let (velocity, low, high, length, r2) =
            (f("velocity_m_per_s")?, f("ci_low")?, f("ci_high")?, f("path_length_um")?, f("r_squared")?);
        for i in 0..batch.num_rows() {
            let unit = units.value(i) as i64;
            let simulated = comparison
                .truth
                .iter()
                .find(|m| m.sorted_unit == Some(unit) && m.accuracy() >= 0.5)
                .and_then(|m| scenario.units.get(m.truth_unit as usize))
                .and_then(|u| u.axon.as_ref())
                .map_or("-".to_string(), |a| format!("{:.2}", a.velocity_m_per_s));
            text.push_str(&format!(
                "  {:>4} {:>6} {:>10.3} {:>8.3} .. {:>7.3} {:>10} {:>9.0} {:>6.2} {:>14}\n",
                unit,
                branches.value(i),
                velocity.value(i),
                low.value(i),
                high.value(i),
                counts.value(i),
                length.value(i),
                r2.value(i),
                simulated
            ));
        }
    }
    Ok(text)
}
