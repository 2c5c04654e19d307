//! The plan: what will run, with which executable, under which cache key,
//! and whether a previous run's result can be reused. Built as plain data
//! before anything runs, so it can be tested, logged and shown by
//! `spikeyard run --dry-run`.
//!
//! # What goes into a stage's cache key
//! - the cache format version ([`CACHE_FORMAT`]);
//! - the stage's name;
//! - the content hash of its executable (a rebuilt stage re-runs);
//! - its parameters as canonical JSON (keys sorted);
//! - the run seed;
//! - the content hash of the recording: its description, its electrode
//!   table and every byte of its data (not timestamps);
//! - the previous stage's cache key, so a change anywhere upstream re-runs
//!   everything downstream and nothing upstream.
//!
//! The thread count is not in the key: results do not depend on it.
//! A cached result is reused when its manifest has the same key and every
//! output it lists still exists with the recorded size.

use crate::config::PipelineConfig;
use crate::stages::{builtin, find_stage_executable};
use serde::{Deserialize, Serialize};
use spikeyard_contract::hash::{hash_file, hash_parts};
use spikeyard_contract::Recording;
use std::path::{Path, PathBuf};

/// Version of the cache key recipe; bump it when the recipe changes.
pub const CACHE_FORMAT: &str = "spikeyard-cache-1";
/// Each stage's manifest, in its output folder.
pub const MANIFEST_FILE: &str = "manifest.json";
/// Folder of stage outputs inside the run's output folder.
pub const STAGES_FOLDER: &str = "stages";

/// One planned stage.
#[derive(Debug, Clone, Serialize)]
pub struct Step {
    pub name: String,
    pub executable: PathBuf,
    pub executable_hash: String,
    pub params: serde_json::Value,
    pub cache_key: String,
    /// Final output folder of the stage.
    pub folder: PathBuf,
    /// A valid result with this key is already there.
    pub cached: bool,
}

/// The whole plan.
#[derive(Debug, Clone, Serialize)]
pub struct Plan {
    pub recording: PathBuf,
    pub recording_hash: String,
    pub output_dir: PathBuf,
    pub config: String,
    pub threads: usize,
    pub seed: u64,
    pub steps: Vec<Step>,
    /// Warnings from checking built-in stages' parameters.
    pub warnings: Vec<String>,
}

/// One output file of a stage, as its manifest records it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutputFile {
    pub file: String,
    pub bytes: u64,
    pub blake3: String,
}

/// What a finished stage leaves beside its outputs.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Manifest {
    pub stage: String,
    pub cache_key: String,
    pub executable: PathBuf,
    pub executable_hash: String,
    pub stage_version: String,
    pub params: serde_json::Value,
    pub seed: u64,
    pub recording_hash: String,
    pub upstream_cache_key: Option<String>,
    pub outputs: Vec<OutputFile>,
    pub wall_seconds: f64,
    pub peak_rss_bytes: u64,
    pub finished_unix_s: u64,
    pub spikeyard_version: String,
    pub warnings: Vec<String>,
}

impl Manifest {
    pub fn read(folder: &Path) -> Option<Manifest> {
        let text = std::fs::read_to_string(folder.join(MANIFEST_FILE)).ok()?;
        serde_json::from_str(&text).ok()
    }

    /// Every listed output exists with its recorded size.
    pub fn outputs_present(&self, folder: &Path) -> bool {
        self.outputs
            .iter()
            .all(|o| std::fs::metadata(folder.join(&o.file)).map(|m| m.len() == o.bytes).unwrap_or(false))
    }
}

/// Content hash of a recording: description, electrode table and data,
/// given the hash of the data file (`hash_file`, or remembered:
/// [`crate::hash_memo`]).
///
/// # Errors
/// The description or electrode table cannot be read.
pub fn hash_recording(recording: &Recording, data: &str) -> std::io::Result<String> {
    let description = std::fs::read(&recording.description_path)?;
    let electrodes = std::fs::read(&recording.electrodes_path)?;
    Ok(hash_parts([
        ("description", description.as_slice()),
        ("electrodes", electrodes.as_slice()),
        ("data", data.as_bytes()),
    ]))
}

/// The cache key of one stage (see the module docs for the recipe).
pub fn cache_key(
    name: &str,
    executable_hash: &str,
    params: &serde_json::Value,
    seed: u64,
    recording_hash: &str,
    upstream: Option<&str>,
) -> String {
    let params = serde_json::to_string(params).unwrap_or_default();
    hash_parts([
        ("format", CACHE_FORMAT.as_bytes()),
        ("stage", name.as_bytes()),
        ("executable", executable_hash.as_bytes()),
        ("params", params.as_bytes()),
        ("seed", &seed.to_le_bytes()),
        ("recording", recording_hash.as_bytes()),
        ("upstream", upstream.unwrap_or("").as_bytes()),
    ])
}

/// Build the plan. `recording_hash` is passed in so that the caller can
/// show progress while hashing a large file.
///
/// # Errors
/// A stage executable is missing or unreadable, or a built-in stage's
/// parameters are refused (message names the config and the key).
pub fn build_plan(
    config: &PipelineConfig,
    recording: &Recording,
    recording_hash: &str,
    output_dir: &Path,
) -> anyhow::Result<Plan> {
    let mut steps: Vec<Step> = Vec::new();
    let mut warnings = Vec::new();
    let built_in = |stage: &crate::config::StageConfig| {
        builtin(&stage.name).is_some()
            && stage.exec.as_deref().is_none_or(|e| e == format!("{}{}", crate::stages::STAGE_PREFIX, stage.name))
    };
    for (index, stage) in config.stages.iter().enumerate() {
        let executable = find_stage_executable(&stage.name, stage.exec.as_deref(), &config.folder())?;
        let mut params = stage.params.clone();
        if let (Some(b), true) = (builtin(&stage.name), built_in(stage)) {
            if let Some(settle) = b.settle {
                settle(&mut params, config.stages[index + 1..].iter().all(built_in));
            }
            let stage_warnings = (b.check)(&params, recording.sample_rate_hz).map_err(|e| {
                crate::config::ConfigError { origin: config.origin(), message: format!("stage {}: {e}", stage.name) }
            })?;
            warnings.extend(stage_warnings.into_iter().map(|w| format!("stage {}: {w}", stage.name)));
        }
        let executable_hash =
            hash_file(&executable).map_err(|e| anyhow::anyhow!("{}: cannot read: {e}", executable.display()))?;
        let upstream = steps.last().map(|s| s.cache_key.as_str());
        let key = cache_key(&stage.name, &executable_hash, &params, config.run.seed, recording_hash, upstream);
        let folder = output_dir.join(STAGES_FOLDER).join(&stage.name);
        // A stage is reusable only if everything before it is too.
        let upstream_cached = steps.last().is_none_or(|s| s.cached);
        let cached = upstream_cached
            && Manifest::read(&folder).is_some_and(|m| m.cache_key == key && m.outputs_present(&folder));
        steps.push(Step {
            name: stage.name.clone(),
            executable,
            executable_hash,
            params,
            cache_key: key,
            folder,
            cached,
        });
    }
    Ok(Plan {
        recording: recording.description_path.clone(),
        recording_hash: recording_hash.to_string(),
        output_dir: output_dir.to_path_buf(),
        config: config.origin(),
        threads: config.run.threads,
        seed: config.run.seed,
        steps,
        warnings,
    })
}

impl Plan {
    /// A human-readable listing of the plan.
    pub fn describe(&self) -> String {
        let mut text = format!(
            "plan for {} -> {} (config: {})\n",
            self.recording.display(),
            self.output_dir.display(),
            self.config
        );
        for (i, step) in self.steps.iter().enumerate() {
            text.push_str(&format!(
                "  {}. {:<10} {:<8} {}  key {}\n",
                i + 1,
                step.name,
                if step.cached { "cached" } else { "run" },
                step.executable.display(),
                &step.cache_key[..16]
            ));
        }
        text
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cache_key_changes_with_each_ingredient() {
        let params = serde_json::json!({"order": 3});
        let base = cache_key("filter", "exe", &params, 1, "rec", None);
        assert_eq!(base, cache_key("filter", "exe", &params, 1, "rec", None));
        let variants = [
            cache_key("detect", "exe", &params, 1, "rec", None),
            cache_key("filter", "exe2", &params, 1, "rec", None),
            cache_key("filter", "exe", &serde_json::json!({"order": 4}), 1, "rec", None),
            cache_key("filter", "exe", &params, 2, "rec", None),
            cache_key("filter", "exe", &params, 1, "rec2", None),
            cache_key("filter", "exe", &params, 1, "rec", Some("up")),
        ];
        for v in variants {
            assert_ne!(v, base);
        }
    }

    #[test]
    fn parameter_order_does_not_change_the_key() {
        let a: serde_json::Value = serde_json::from_str(r#"{"a":1,"b":2}"#).unwrap();
        let b: serde_json::Value = serde_json::from_str(r#"{"b":2,"a":1}"#).unwrap();
        assert_eq!(cache_key("s", "e", &a, 1, "r", None), cache_key("s", "e", &b, 1, "r", None));
    }
}
