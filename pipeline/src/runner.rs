//! Running a plan: each stage is a child process that writes into a
//! temporary folder; only a stage that exits 0 and wrote something gets a
//! manifest and is renamed into place. Tables are published into the
//! output folder, and `run.json` is written, only when every stage is done.

use crate::plan::{Manifest, OutputFile, Plan, Step, MANIFEST_FILE, STAGES_FOLDER};
use anyhow::Context;
use spikeyard_contract::hash::hash_file;
use spikeyard_contract::request::{parse_progress_line, StageReport, CONTRACT_VERSION, REPORT_FILE};
use spikeyard_contract::StageRequest;
use std::collections::{BTreeMap, VecDeque};
use std::io::BufRead;
use std::path::{Path, PathBuf};
use std::process::{Command, ExitStatus, Stdio};
use std::time::{Duration, Instant};

/// The run record written last into the output folder.
pub const RUN_FILE: &str = "run.json";
/// How many of a failed stage's last output lines are shown.
const TAIL_LINES: usize = 20;

/// How progress is shown.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ProgressMode {
    /// indicatif bars (a terminal).
    Bar,
    /// Plain log lines every `interval` (a log file, a batch job).
    Log { interval: Duration },
}

impl ProgressMode {
    /// Bars on a terminal, log lines every 10 s elsewhere.
    pub fn for_stderr() -> Self {
        use std::io::IsTerminal;
        if std::io::stderr().is_terminal() {
            ProgressMode::Bar
        } else {
            ProgressMode::Log { interval: Duration::from_secs(10) }
        }
    }
}

/// A stage that failed: everything needed to understand and re-run it.
#[derive(Debug, thiserror::Error)]
#[error("stage {stage} {status}\n  command: {command}\n  last lines of its output:\n{tail}")]
pub struct StageFailed {
    pub stage: String,
    pub command: String,
    pub status: String,
    pub tail: String,
    /// The stage refused its input (exit code 2).
    pub bad_input: bool,
}

/// What happened to one stage.
#[derive(Debug, Clone, serde::Serialize)]
pub struct StageOutcome {
    pub name: String,
    pub cached: bool,
    pub wall_seconds: f64,
    pub peak_rss_bytes: u64,
    pub warnings: Vec<String>,
    pub summary: serde_json::Map<String, serde_json::Value>,
}

/// What a whole run did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct RunRecord {
    pub spikeyard_version: String,
    pub recording: PathBuf,
    pub recording_hash: String,
    pub config: String,
    pub stages: Vec<StageOutcome>,
    /// Tables published at the top of the output folder.
    pub published: Vec<String>,
    pub finished_unix_s: u64,
}

fn unix_now() -> u64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_secs())
}

/// Remove what a previous run published, so that a failed run leaves no
/// top-level table that looks like its result.
fn unpublish(output_dir: &Path) -> anyhow::Result<()> {
    let run_file = output_dir.join(RUN_FILE);
    if let Ok(text) = std::fs::read_to_string(&run_file) {
        std::fs::remove_file(&run_file).with_context(|| format!("{}: cannot remove", run_file.display()))?;
        if let Ok(previous) = serde_json::from_str::<serde_json::Value>(&text) {
            for name in previous["published"].as_array().into_iter().flatten().filter_map(|v| v.as_str()) {
                let _ = std::fs::remove_file(output_dir.join(name));
            }
        }
    }
    Ok(())
}

/// Run every stage of the plan that is not cached, then publish.
///
/// # Errors
/// [`StageFailed`] when a stage fails (earlier stages' results are kept);
/// I/O errors on the output folder, with its path.
pub fn execute(plan: &Plan, mode: ProgressMode) -> anyhow::Result<RunRecord> {
    let stages_dir = plan.output_dir.join(STAGES_FOLDER);
    std::fs::create_dir_all(&stages_dir)
        .with_context(|| format!("{}: cannot create the output folder", stages_dir.display()))?;
    unpublish(&plan.output_dir)?;
    for warning in &plan.warnings {
        eprintln!("warning: {warning}");
    }
    let mut artifacts: BTreeMap<String, PathBuf> = BTreeMap::new();
    let mut outcomes = Vec::new();
    for (index, step) in plan.steps.iter().enumerate() {
        let manifest = if step.cached {
            let manifest = Manifest::read(&step.folder)
                .with_context(|| format!("{}: manifest vanished", step.folder.display()))?;
            eprintln!("[{}] up to date (cache key {}), not re-run", step.name, &step.cache_key[..16]);
            manifest
        } else {
            let upstream = index.checked_sub(1).map(|i| plan.steps[i].cache_key.clone());
            run_stage(plan, step, upstream, &artifacts, mode)?
        };
        let report = read_report(&step.folder);
        for output in &manifest.outputs {
            artifacts.insert(output.file.clone(), step.folder.join(&output.file));
        }
        outcomes.push(StageOutcome {
            name: step.name.clone(),
            cached: step.cached,
            wall_seconds: manifest.wall_seconds,
            peak_rss_bytes: manifest.peak_rss_bytes,
            warnings: manifest.warnings.clone(),
            summary: report.summary,
        });
    }
    let published = publish(plan, &artifacts)?;
    let record = RunRecord {
        spikeyard_version: env!("CARGO_PKG_VERSION").to_string(),
        recording: plan.recording.clone(),
        recording_hash: plan.recording_hash.clone(),
        config: plan.config.clone(),
        stages: outcomes,
        published,
        finished_unix_s: unix_now(),
    };
    write_atomic(&plan.output_dir.join(RUN_FILE), serde_json::to_string_pretty(&record)?.as_bytes())?;
    Ok(record)
}

/// Link every Parquet table and HTML page the stages wrote into the output
/// folder (a later stage's file of the same name wins).
fn publish(plan: &Plan, artifacts: &BTreeMap<String, PathBuf>) -> anyhow::Result<Vec<String>> {
    let mut published = Vec::new();
    for (name, source) in
        artifacts.iter().filter(|(n, _)| (n.ends_with(".parquet") || n.ends_with(".html")) && !n.contains('/'))
    {
        let target = plan.output_dir.join(name);
        let temporary = plan.output_dir.join(format!(".{name}.partial"));
        let _ = std::fs::remove_file(&temporary);
        if std::fs::hard_link(source, &temporary).is_err() {
            std::fs::copy(source, &temporary)
                .with_context(|| format!("{}: cannot copy to {}", source.display(), temporary.display()))?;
        }
        std::fs::rename(&temporary, &target).with_context(|| format!("{}: cannot publish", target.display()))?;
        published.push(name.clone());
    }
    Ok(published)
}

/// Write a file under a temporary name, sync, rename.
///
/// # Errors
/// Any step fails, with the path.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let temporary = path.with_file_name(format!(".{name}.partial"));
    {
        use std::io::Write;
        let mut file =
            std::fs::File::create(&temporary).with_context(|| format!("{}: cannot create", temporary.display()))?;
        file.write_all(bytes)
            .and_then(|_| file.sync_all())
            .with_context(|| format!("{}: cannot write", temporary.display()))?;
    }
    std::fs::rename(&temporary, path).with_context(|| format!("{}: cannot rename into place", path.display()))
}

fn read_report(folder: &Path) -> StageReport {
    std::fs::read_to_string(folder.join(REPORT_FILE))
        .ok()
        .and_then(|t| serde_json::from_str(&t).ok())
        .unwrap_or_default()
}

/// Files in `folder`, recursively, as paths relative to it (sorted).
fn list_files(folder: &Path) -> std::io::Result<Vec<String>> {
    let mut files = Vec::new();
    let mut pending = vec![PathBuf::new()];
    while let Some(relative) = pending.pop() {
        for entry in std::fs::read_dir(folder.join(&relative))? {
            let entry = entry?;
            let path = relative.join(entry.file_name());
            if entry.file_type()?.is_dir() {
                pending.push(path);
            } else {
                files.push(path.to_string_lossy().into_owned());
            }
        }
    }
    files.sort();
    Ok(files)
}

fn run_stage(
    plan: &Plan,
    step: &Step,
    upstream: Option<String>,
    artifacts: &BTreeMap<String, PathBuf>,
    mode: ProgressMode,
) -> anyhow::Result<Manifest> {
    let stages_dir = plan.output_dir.join(STAGES_FOLDER);
    let partial = stages_dir.join(format!(".{}.partial", step.name));
    if partial.exists() {
        std::fs::remove_dir_all(&partial)
            .with_context(|| format!("{}: cannot remove the leftover of an interrupted run", partial.display()))?;
    }
    std::fs::create_dir_all(&partial).with_context(|| format!("{}: cannot create", partial.display()))?;
    let request = StageRequest {
        contract_version: CONTRACT_VERSION,
        stage: step.name.clone(),
        recording: std::path::absolute(&plan.recording).unwrap_or_else(|_| plan.recording.clone()),
        output_dir: std::path::absolute(&partial).unwrap_or_else(|_| partial.clone()),
        params: step.params.clone(),
        artifacts: artifacts
            .iter()
            .map(|(k, v)| (k.clone(), std::path::absolute(v).unwrap_or_else(|_| v.clone())))
            .collect(),
        threads: plan.threads,
        seed: plan.seed,
        cache_key: step.cache_key.clone(),
        recording_hash: plan.recording_hash.clone(),
        path: PathBuf::new(),
    };
    let request_path = stages_dir.join(format!("{}.request.json", step.name));
    write_atomic(&request_path, serde_json::to_string_pretty(&request)?.as_bytes())?;
    let command_line = format!("{} --request {}", step.executable.display(), request_path.display());

    let started = Instant::now();
    let mut command = Command::new(&step.executable);
    command.arg("--request").arg(&request_path).stdin(Stdio::null()).stdout(Stdio::piped()).stderr(Stdio::piped());
    if let Ok(exe) = std::env::current_exe() {
        command.env("SPIKEYARD", exe);
    }
    if plan.threads > 0 {
        command.env("RAYON_NUM_THREADS", plan.threads.to_string());
    }
    let mut child = spawn_measured(&mut command)
        .with_context(|| format!("stage {}: cannot start {}", step.name, step.executable.display()))?;
    let (sender, receiver) = std::sync::mpsc::channel::<String>();
    let readers: Vec<_> = [
        child.stdout.take().map(|s| Box::new(s) as Box<dyn std::io::Read + Send>),
        child.stderr.take().map(|s| Box::new(s) as Box<dyn std::io::Read + Send>),
    ]
    .into_iter()
    .flatten()
    .map(|stream| {
        let sender = sender.clone();
        std::thread::spawn(move || {
            for line in std::io::BufReader::new(stream).lines() {
                let Ok(line) = line else { break };
                if sender.send(line).is_err() {
                    break;
                }
            }
        })
    })
    .collect();
    drop(sender);
    let tail = follow_output(&step.name, receiver, mode, started);
    for reader in readers {
        let _ = reader.join();
    }
    let (status, peak_rss_bytes) = wait_with_usage(&mut child)
        .with_context(|| format!("stage {}: cannot wait for {}", step.name, step.executable.display()))?;
    let wall_seconds = started.elapsed().as_secs_f64();
    let tail_text = || tail.iter().map(|l| format!("    {l}")).collect::<Vec<_>>().join("\n");
    if !status.success() {
        use std::os::unix::process::ExitStatusExt;
        let status_text = match (status.code(), status.signal()) {
            (Some(code), _) => format!("failed with exit code {code}"),
            (None, Some(signal)) => format!("was killed by signal {signal}"),
            _ => "failed".to_string(),
        };
        let _ = std::fs::remove_dir_all(&partial);
        return Err(StageFailed {
            stage: step.name.clone(),
            command: command_line,
            status: status_text,
            tail: tail_text(),
            bad_input: status.code() == Some(2),
        }
        .into());
    }
    let files = list_files(&partial).with_context(|| format!("{}: cannot list", partial.display()))?;
    let outputs: Vec<String> = files.into_iter().filter(|f| f != REPORT_FILE && f != MANIFEST_FILE).collect();
    if outputs.is_empty() {
        let _ = std::fs::remove_dir_all(&partial);
        return Err(StageFailed {
            stage: step.name.clone(),
            command: command_line,
            status: "exited 0 but wrote no output".into(),
            tail: tail_text(),
            bad_input: false,
        }
        .into());
    }
    let mut output_files = Vec::with_capacity(outputs.len());
    for file in outputs {
        let path = partial.join(&file);
        let bytes = std::fs::metadata(&path).with_context(|| format!("{}: cannot stat", path.display()))?.len();
        let blake3 = hash_file(&path).with_context(|| format!("{}: cannot hash", path.display()))?;
        output_files.push(OutputFile { file, bytes, blake3 });
    }
    let report = read_report(&partial);
    let manifest = Manifest {
        stage: step.name.clone(),
        cache_key: step.cache_key.clone(),
        executable: step.executable.clone(),
        executable_hash: step.executable_hash.clone(),
        stage_version: report.stage_version.clone(),
        params: step.params.clone(),
        seed: plan.seed,
        recording_hash: plan.recording_hash.clone(),
        upstream_cache_key: upstream,
        outputs: output_files,
        wall_seconds,
        peak_rss_bytes,
        finished_unix_s: unix_now(),
        spikeyard_version: env!("CARGO_PKG_VERSION").to_string(),
        warnings: report.warnings,
    };
    write_atomic(&partial.join(MANIFEST_FILE), serde_json::to_string_pretty(&manifest)?.as_bytes())?;
    // Swap the finished folder into place; a crash between the two renames
    // leaves no folder under the final name, which only costs a re-run.
    let old = stages_dir.join(format!(".{}.old", step.name));
    let _ = std::fs::remove_dir_all(&old);
    if step.folder.exists() {
        std::fs::rename(&step.folder, &old).with_context(|| format!("{}: cannot move aside", step.folder.display()))?;
    }
    std::fs::rename(&partial, &step.folder)
        .with_context(|| format!("{}: cannot rename into place", step.folder.display()))?;
    let _ = std::fs::remove_dir_all(&old);
    eprintln!(
        "[{}] done in {:.1} s, peak memory {:.0} MiB",
        step.name,
        wall_seconds,
        peak_rss_bytes as f64 / (1 << 20) as f64
    );
    Ok(manifest)
}

/// Show a stage's output as it arrives; returns its last lines.
pub(crate) fn follow_output(
    stage: &str,
    lines: std::sync::mpsc::Receiver<String>,
    mode: ProgressMode,
    started: Instant,
) -> VecDeque<String> {
    let mut tail = VecDeque::with_capacity(TAIL_LINES);
    let bar = match mode {
        ProgressMode::Bar => {
            let bar = indicatif::ProgressBar::new(0);
            bar.set_style(
                indicatif::ProgressStyle::with_template(
                    "{prefix:>10} [{bar:32}] {percent:>3}%  {elapsed_precise} elapsed, {eta} left",
                )
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
                .progress_chars("=> "),
            );
            bar.set_prefix(stage.to_string());
            Some(bar)
        }
        ProgressMode::Log { .. } => None,
    };
    let mut last_log: Option<Instant> = None;
    for line in lines {
        if let Some((done, total, unit)) = parse_progress_line(&line) {
            match (&bar, mode) {
                (Some(bar), _) => {
                    bar.set_length(total);
                    bar.set_position(done);
                }
                (None, ProgressMode::Log { interval })
                    if last_log.is_none_or(|t| t.elapsed() >= interval) && done < total =>
                {
                    last_log = Some(Instant::now());
                    let elapsed = started.elapsed().as_secs_f64();
                    let fraction = done as f64 / total.max(1) as f64;
                    let eta = if fraction > 0.0 {
                        format!("{:.0} s", elapsed * (1.0 - fraction) / fraction)
                    } else {
                        "unknown".into()
                    };
                    eprintln!(
                        "[{stage}] {:.0}% ({done} of {total} {unit}), {elapsed:.0} s elapsed, about {eta} left",
                        100.0 * fraction
                    );
                }
                _ => {}
            }
            continue;
        }
        let shown = format!("[{stage}] {line}");
        match &bar {
            Some(bar) => bar.println(shown),
            None => eprintln!("{shown}"),
        }
        if tail.len() == TAIL_LINES {
            tail.pop_front();
        }
        tail.push_back(line);
    }
    if let Some(bar) = bar {
        bar.finish_and_clear();
    }
    tail
}

/// Start a child whose peak resident memory, as [`wait_with_usage`] reads
/// it, is its own.
///
/// Linux folds the peak of the memory a process had before `exec` into its
/// `ru_maxrss`, and `Command::spawn` starts the child in the parent's memory
/// (`posix_spawn`, a vfork), so the child would report this process's own
/// peak whenever that is higher: after the benchmark simulated a recording
/// in-process, every stage reported its 149 MiB. Resetting this process's
/// peak to its current size first (`/proc/self/clear_refs`, value 5, Linux
/// 4.0 and later) leaves only that current size, a few MiB, folded in.
/// Where the file cannot be written the figure stays an upper bound.
fn spawn_measured(command: &mut Command) -> std::io::Result<std::process::Child> {
    let _ = std::fs::write("/proc/self/clear_refs", "5");
    command.spawn()
}

/// Wait for the child and read its peak resident memory from the kernel.
fn wait_with_usage(child: &mut std::process::Child) -> std::io::Result<(ExitStatus, u64)> {
    use std::os::unix::process::ExitStatusExt;
    let pid = child.id() as libc::pid_t;
    let mut status: libc::c_int = 0;
    // SAFETY: rusage is plain data; wait4 fills it for our own child.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    loop {
        // SAFETY: valid pointers to locals; pid is our un-reaped child.
        let result = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
        if result == pid {
            break;
        }
        let error = std::io::Error::last_os_error();
        if error.kind() != std::io::ErrorKind::Interrupted {
            return Err(error);
        }
    }
    // ru_maxrss is in KiB on Linux.
    Ok((ExitStatus::from_raw(status), usage.ru_maxrss.max(0) as u64 * 1024))
}

#[cfg(test)]
mod tests {
    use super::*;

    // A child's peak memory is its own, not the peak this process reached
    // before starting it (which `exec` would otherwise fold in).
    #[test]
    fn a_stage_peak_memory_excludes_the_parents_earlier_peak() {
        const BIG: usize = 512 << 20;
        let mut big = vec![0u8; BIG];
        for page in big.chunks_mut(4096) {
            page[0] = 1;
        }
        std::hint::black_box(&big);
        drop(big);
        let mut child = spawn_measured(Command::new("true").stdout(Stdio::null())).unwrap();
        let (status, peak) = wait_with_usage(&mut child).unwrap();
        assert!(status.success());
        assert!(peak < (BIG / 2) as u64, "`true` reported a peak of {} MiB", peak >> 20);
    }
}
