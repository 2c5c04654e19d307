//! The request a stage receives, the report it may leave, and its progress lines.
//!
//! A stage is started as `<executable> --request <file.json>`. The JSON is a
//! [`StageRequest`]. The stage writes its files into `output_dir` (a
//! temporary folder that the orchestrator renames into place only if the
//! stage exits 0) and may print progress lines on stderr:
//!
//! ```text
//! spikeyard:progress <done> <total> <unit>
//! ```
//!
//! Every other stderr line is shown to the user as a log line. A stage can
//! be written in any language that reads JSON and writes files.

use crate::error::ContractError;
use serde::{de::DeserializeOwned, Deserialize, Serialize};
use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// Version of the request format; bumped only on incompatible changes.
pub const CONTRACT_VERSION: u32 = 1;

/// Prefix of machine-readable progress lines on a stage's stderr.
pub const PROGRESS_PREFIX: &str = "spikeyard:progress";

/// Name of the optional report a stage leaves in its output folder.
pub const REPORT_FILE: &str = "report.json";

/// What the orchestrator asks of one stage.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct StageRequest {
    pub contract_version: u32,
    /// The stage's name in the config (also its output folder's name).
    pub stage: String,
    /// Description (TOML) of the raw input recording.
    pub recording: PathBuf,
    /// Folder to write outputs into. It exists and is empty.
    pub output_dir: PathBuf,
    /// The stage's `[stage.params]` table from the config, as JSON.
    #[serde(default)]
    pub params: serde_json::Value,
    /// Files produced by earlier stages, by file name (a later stage's file
    /// of the same name wins).
    #[serde(default)]
    pub artifacts: BTreeMap<String, PathBuf>,
    /// Worker threads the stage may use (0 = as many as cores).
    #[serde(default)]
    pub threads: usize,
    /// Seed for any random choice, from the config.
    #[serde(default)]
    pub seed: u64,
    /// The orchestrator's cache key of this stage run (provenance).
    #[serde(default)]
    pub cache_key: String,
    /// Content hash of the raw recording (provenance).
    #[serde(default)]
    pub recording_hash: String,
    /// Where this request was read from (not part of the JSON).
    #[serde(skip)]
    pub path: PathBuf,
}

impl StageRequest {
    /// Read a request file.
    ///
    /// # Errors
    /// The file cannot be read or is not a request.
    pub fn load(path: &Path) -> Result<Self, ContractError> {
        let text = std::fs::read_to_string(path).map_err(|e| ContractError::io(path, e))?;
        let mut request: StageRequest = serde_json::from_str(&text).map_err(|e| ContractError::Format {
            path: path.to_path_buf(),
            message: format!("not a stage request: {e}"),
        })?;
        if request.contract_version != CONTRACT_VERSION {
            return Err(ContractError::Format {
                path: path.to_path_buf(),
                message: format!(
                    "contract_version is {}, but this stage speaks version {CONTRACT_VERSION}",
                    request.contract_version
                ),
            });
        }
        request.path = path.to_path_buf();
        Ok(request)
    }

    /// Parse the parameters into a stage's serde type; an unknown or
    /// mistyped key is reported with its dotted path.
    ///
    /// # Errors
    /// [`ContractError::Param`] naming the key.
    pub fn params<T: DeserializeOwned>(&self) -> Result<T, ContractError> {
        let value = match &self.params {
            serde_json::Value::Null => serde_json::Value::Object(Default::default()),
            other => other.clone(),
        };
        serde_path_to_error::deserialize(value).map_err(|e| ContractError::Param {
            path: self.path.clone(),
            key: format!("{}.params.{}", self.stage, e.path()),
            message: e.inner().to_string(),
        })
    }

    pub fn artifact(&self, name: &str) -> Option<&Path> {
        self.artifacts.get(name).map(PathBuf::as_path)
    }

    /// # Errors
    /// [`ContractError::MissingArtifact`] when no earlier stage wrote `name`.
    pub fn require_artifact(&self, name: &str) -> Result<&Path, ContractError> {
        self.artifact(name)
            .ok_or_else(|| ContractError::MissingArtifact { path: self.path.clone(), name: name.to_string() })
    }

    pub fn output(&self, file: &str) -> PathBuf {
        self.output_dir.join(file)
    }

    /// The recording a stage after the filter works on: the earlier stage's
    /// `filtered.toml` when there is one, else the raw recording (with a
    /// warning in `report` that says what the stage does with it).
    ///
    /// # Errors
    /// The description is refused ([`crate::StageFailure::bad_input`]).
    pub fn open_filtered_or_raw(
        &self,
        report: &mut StageReport,
        use_of_raw: &str,
    ) -> Result<crate::Recording, crate::StageFailure> {
        let path = match self.artifact("filtered.toml") {
            Some(path) => path.to_path_buf(),
            None => {
                report.warn(format!("no earlier stage wrote filtered.toml; {use_of_raw} the raw recording"));
                self.recording.clone()
            }
        };
        crate::Recording::open(&path).map_err(crate::StageFailure::bad_input)
    }

    /// A refused parameter set, as the error of the stage's `check()` says.
    pub fn params_refused(&self, message: String) -> crate::StageFailure {
        crate::StageFailure::bad_input(ContractError::Param {
            path: self.path.clone(),
            key: format!("{}.params", self.stage),
            message,
        })
    }

    /// Parquet key-value metadata for every table a stage writes: the
    /// program and version, the parameters, the run's cache key and the
    /// recording's content hash.
    pub fn table_metadata(
        &self,
        executable: &str,
        version: &str,
        params: &impl Serialize,
    ) -> Vec<(&'static str, String)> {
        vec![
            (crate::table::META_WRITER, format!("{executable} {version}")),
            ("spikeyard.params", serde_json::to_string(params).unwrap_or_default()),
            ("spikeyard.cache_key", self.cache_key.clone()),
            ("spikeyard.recording_hash", self.recording_hash.clone()),
        ]
    }
}

/// What a stage says about its run, left as `report.json` in its output.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct StageReport {
    pub stage_version: String,
    #[serde(default)]
    pub warnings: Vec<String>,
    /// Free-form figures worth showing (counts, noise levels...).
    #[serde(default)]
    pub summary: serde_json::Map<String, serde_json::Value>,
}

impl StageReport {
    /// Write the report into `output_dir`.
    ///
    /// # Errors
    /// I/O errors, with the path.
    pub fn write(&self, output_dir: &Path) -> Result<(), ContractError> {
        let path = output_dir.join(REPORT_FILE);
        let text = serde_json::to_string_pretty(self).unwrap_or_default();
        std::fs::write(&path, text).map_err(|e| ContractError::io(path, e))
    }

    /// Record a warning and print it on stderr, where the user sees it live.
    pub fn warn(&mut self, message: impl Into<String>) {
        let message = message.into();
        eprintln!("warning: {message}");
        self.warnings.push(message);
    }
}

/// Prints progress lines at most every `interval`, and always the last one.
pub struct ProgressReporter {
    total: u64,
    done: u64,
    unit: String,
    last: Option<Instant>,
    interval: Duration,
}

impl ProgressReporter {
    pub fn new(total: u64, unit: &str) -> Self {
        ProgressReporter {
            total,
            done: 0,
            unit: unit.replace(char::is_whitespace, "_"),
            last: None,
            interval: Duration::from_millis(250),
        }
    }

    pub fn advance(&mut self, n: u64) {
        self.done = (self.done + n).min(self.total);
        let due = self.last.is_none_or(|t| t.elapsed() >= self.interval);
        if due || self.done == self.total {
            self.last = Some(Instant::now());
            let mut err = std::io::stderr().lock();
            let _ = writeln!(err, "{PROGRESS_PREFIX} {} {} {}", self.done, self.total, self.unit);
        }
    }
}

/// Parse a progress line: `(done, total, unit)`.
pub fn parse_progress_line(line: &str) -> Option<(u64, u64, String)> {
    let rest = line.strip_prefix(PROGRESS_PREFIX)?;
    let mut parts = rest.split_whitespace();
    let done = parts.next()?.parse().ok()?;
    let total = parts.next()?.parse().ok()?;
    let unit = parts.next().unwrap_or("").to_string();
    Some((done, total, unit))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Params {
        #[serde(default)]
        threshold_sigma: f64,
    }

    fn request(params: serde_json::Value) -> StageRequest {
        StageRequest {
            contract_version: CONTRACT_VERSION,
            stage: "detect".into(),
            recording: "rec.toml".into(),
            output_dir: "out".into(),
            params,
            artifacts: BTreeMap::new(),
            threads: 0,
            seed: 0,
            cache_key: String::new(),
            recording_hash: String::new(),
            path: "req.json".into(),
        }
    }

    #[test]
    fn unknown_parameter_is_named_with_its_stage() {
        let err = request(serde_json::json!({"threshold_sgma": 4.0})).params::<Params>().unwrap_err().to_string();
        assert!(err.contains("detect.params"), "{err}");
        assert!(err.contains("threshold_sgma"), "{err}");
    }

    #[test]
    fn mistyped_parameter_names_its_key() {
        let err = request(serde_json::json!({"threshold_sigma": "five"})).params::<Params>().unwrap_err().to_string();
        assert!(err.contains("detect.params.threshold_sigma"), "{err}");
    }

    #[test]
    fn progress_lines_round_trip() {
        assert_eq!(parse_progress_line("spikeyard:progress 5 10 frames"), Some((5, 10, "frames".to_string())));
        assert_eq!(parse_progress_line("warning: x"), None);
    }
}
