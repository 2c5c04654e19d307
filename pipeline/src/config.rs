//! The pipeline config: `[run]` settings and an ordered list of
//! `[[stage]]` tables, each with a `name`, an optional `exec` and a
//! `[stage.params]` table that is handed to the stage untouched.
//!
//! Unknown keys are refused with their dotted path, because a misspelt
//! threshold that silently falls back to its default changes results.

use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// The built-in configuration, used when `--config` is not given.
pub const DEFAULT_CONFIG: &str = include_str!("../../configs/default.toml");

/// `[run]`: settings that apply to every stage.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RunSettings {
    /// Worker threads each stage may use; 0 uses every core. Results do not
    /// depend on it. Default 0.
    pub threads: usize,
    /// Seed for every random choice a stage makes. Default 1.
    pub seed: u64,
}

impl Default for RunSettings {
    fn default() -> Self {
        RunSettings { threads: 0, seed: 1 }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawConfig {
    #[serde(default)]
    run: RunSettings,
    #[serde(default, rename = "stage")]
    stages: Vec<RawStage>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawStage {
    name: String,
    #[serde(default)]
    exec: Option<String>,
    #[serde(default)]
    params: toml::Table,
}

/// One stage as configured.
#[derive(Debug, Clone, PartialEq)]
pub struct StageConfig {
    pub name: String,
    /// Executable: a path (relative to the config file) or a name on PATH.
    pub exec: Option<String>,
    /// `[stage.params]` as JSON, for the request.
    pub params: serde_json::Value,
}

/// A loaded pipeline config.
#[derive(Debug, Clone)]
pub struct PipelineConfig {
    /// The file it came from; `None` for the built-in default.
    pub path: Option<PathBuf>,
    pub run: RunSettings,
    pub stages: Vec<StageConfig>,
}

/// A config that cannot be used: file and problem.
#[derive(Debug, thiserror::Error)]
#[error("{origin}: {message}")]
pub struct ConfigError {
    pub origin: String,
    pub message: String,
}

impl PipelineConfig {
    /// Load a config file, or the built-in default when `path` is `None`.
    ///
    /// # Errors
    /// Unreadable file, TOML syntax, unknown keys, wrong types, no stages,
    /// or a stage name used twice or not usable as a folder name.
    pub fn load(path: Option<&Path>) -> Result<Self, ConfigError> {
        let (origin, text) = match path {
            Some(p) => {
                let text = std::fs::read_to_string(p).map_err(|e| ConfigError {
                    origin: p.display().to_string(),
                    message: format!("cannot read: {e}"),
                })?;
                (p.display().to_string(), text)
            }
            None => ("built-in default config".to_string(), DEFAULT_CONFIG.to_string()),
        };
        Self::parse(&text, &origin, path)
    }

    /// Parse config text; `origin` names it in errors.
    ///
    /// # Errors
    /// As [`PipelineConfig::load`].
    pub fn parse(text: &str, origin: &str, path: Option<&Path>) -> Result<Self, ConfigError> {
        let error = |message: String| ConfigError { origin: origin.to_string(), message };
        let table: toml::Table = text.parse().map_err(|e: toml::de::Error| error(one_line(&e.to_string())))?;
        let raw: RawConfig = serde_path_to_error::deserialize(toml::Value::Table(table)).map_err(|e| {
            let key = e.path().to_string().replace("stage[", "stage.[");
            error(format!("{key}: {}", e.inner()))
        })?;
        if raw.stages.is_empty() {
            return Err(error("no [[stage]] is configured".into()));
        }
        let mut stages: Vec<StageConfig> = Vec::with_capacity(raw.stages.len());
        for (index, stage) in raw.stages.into_iter().enumerate() {
            let valid_name = !stage.name.is_empty()
                && stage.name.chars().all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-' || c == '_');
            if !valid_name {
                return Err(error(format!(
                    "stage.[{index}].name is \"{}\", but it must be lowercase letters, digits, - or _",
                    stage.name
                )));
            }
            if stages.iter().any(|s| s.name == stage.name) {
                return Err(error(format!("stage.[{index}].name \"{}\" is used by an earlier stage", stage.name)));
            }
            let params =
                serde_json::to_value(&stage.params).map_err(|e| error(format!("stage {}: params: {e}", stage.name)))?;
            stages.push(StageConfig { name: stage.name, exec: stage.exec, params });
        }
        Ok(PipelineConfig { path: path.map(Path::to_path_buf), run: raw.run, stages })
    }

    /// The config's name for messages.
    pub fn origin(&self) -> String {
        self.path.as_ref().map_or_else(|| "built-in default config".to_string(), |p| p.display().to_string())
    }

    /// The folder relative `exec` paths are resolved against.
    pub fn folder(&self) -> PathBuf {
        match &self.path {
            Some(p) => p.parent().map(Path::to_path_buf).unwrap_or_default(),
            None => std::env::current_dir().unwrap_or_default(),
        }
    }
}

fn one_line(message: &str) -> String {
    message.lines().map(str::trim).filter(|l| !l.is_empty()).collect::<Vec<_>>().join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<PipelineConfig, ConfigError> {
        PipelineConfig::parse(text, "test.toml", None)
    }

    #[test]
    fn default_config_parses_with_filter_then_detect() {
        let config = PipelineConfig::load(None).unwrap();
        let names: Vec<_> = config.stages.iter().map(|s| s.name.as_str()).collect();
        assert_eq!(names, vec!["filter", "detect", "features", "cluster", "measures", "propagation", "report"]);
    }

    // The default config file must say exactly what the stages' defaults are.
    #[test]
    fn default_config_matches_the_stages_defaults() {
        let config = PipelineConfig::load(None).unwrap();
        let filter: spikeyard_filter::params::FilterParams =
            serde_json::from_value(config.stages[0].params.clone()).unwrap();
        assert_eq!(filter, spikeyard_filter::params::FilterParams::default());
        let detect: spikeyard_detect::params::DetectParams =
            serde_json::from_value(config.stages[1].params.clone()).unwrap();
        assert_eq!(detect, spikeyard_detect::params::DetectParams::default());
        let features: spikeyard_features::params::FeaturesParams =
            serde_json::from_value(config.stages[2].params.clone()).unwrap();
        assert_eq!(features, spikeyard_features::params::FeaturesParams::default());
        let cluster: spikeyard_cluster::params::ClusterParams =
            serde_json::from_value(config.stages[3].params.clone()).unwrap();
        assert_eq!(cluster, spikeyard_cluster::params::ClusterParams::default());
        let measures: spikeyard_measures::params::MeasuresParams =
            serde_json::from_value(config.stages[4].params.clone()).unwrap();
        assert_eq!(measures, spikeyard_measures::params::MeasuresParams::default());
        let propagation: spikeyard_propagation::params::PropagationParams =
            serde_json::from_value(config.stages[5].params.clone()).unwrap();
        assert_eq!(propagation, spikeyard_propagation::params::PropagationParams::default());
        let report: spikeyard_report::params::ReportParams =
            serde_json::from_value(config.stages[6].params.clone()).unwrap();
        assert_eq!(report, spikeyard_report::params::ReportParams::default());
        assert_eq!(config.run, RunSettings::default());
        // And it lists every parameter, so the file documents them all.
        let listed = |i: usize| config.stages[i].params.as_object().unwrap().len();
        let all = |v: serde_json::Value| v.as_object().unwrap().len();
        assert_eq!(listed(0), all(serde_json::to_value(spikeyard_filter::params::FilterParams::default()).unwrap()));
        assert_eq!(listed(1), all(serde_json::to_value(spikeyard_detect::params::DetectParams::default()).unwrap()));
        assert_eq!(
            listed(2),
            all(serde_json::to_value(spikeyard_features::params::FeaturesParams::default()).unwrap())
        );
        assert_eq!(listed(3), all(serde_json::to_value(spikeyard_cluster::params::ClusterParams::default()).unwrap()));
        assert_eq!(
            listed(4),
            all(serde_json::to_value(spikeyard_measures::params::MeasuresParams::default()).unwrap())
        );
        assert_eq!(
            listed(5),
            all(serde_json::to_value(spikeyard_propagation::params::PropagationParams::default()).unwrap())
        );
        assert_eq!(listed(6), all(serde_json::to_value(spikeyard_report::params::ReportParams::default()).unwrap()));
    }

    #[test]
    fn unknown_key_is_named_with_its_path() {
        let err = parse("[run]\nthreds = 2\n[[stage]]\nname = \"filter\"\n").unwrap_err().to_string();
        assert!(err.contains("test.toml") && err.contains("threds"), "{err}");
    }

    #[test]
    fn wrong_type_is_named_with_its_path() {
        let err = parse("[run]\nthreads = \"two\"\n[[stage]]\nname = \"filter\"\n").unwrap_err().to_string();
        assert!(err.contains("run.threads"), "{err}");
    }

    #[test]
    fn duplicate_stage_names_are_refused() {
        let err = parse("[[stage]]\nname = \"filter\"\n[[stage]]\nname = \"filter\"\n").unwrap_err().to_string();
        assert!(err.contains("used by an earlier stage"), "{err}");
    }

    #[test]
    fn config_without_stages_is_refused() {
        assert!(parse("[run]\nthreads = 1\n").unwrap_err().to_string().contains("no [[stage]]"));
    }

    #[test]
    fn syntax_error_names_the_file() {
        let err = parse("[[stage]\nname=").unwrap_err().to_string();
        assert!(err.starts_with("test.toml: "), "{err}");
    }
}
