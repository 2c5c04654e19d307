//! Finding stage executables, and checking built-in stages' parameters
//! before anything runs.
//!
//! A stage named NAME runs `spikeyard-NAME`, looked for next to the running
//! `spikeyard` first, then on PATH. A config's `exec` overrides both: a
//! value with a `/` is a path relative to the config file, anything else a
//! command name looked up the same way. Listing and running stages share
//! [`find_stage_executable`].

use std::path::{Path, PathBuf};

/// Prefix of stage executables' names.
pub const STAGE_PREFIX: &str = "spikeyard-";

/// A stage that ships with spikeyard.
pub struct BuiltinStage {
    pub name: &'static str,
    pub about: &'static str,
    /// Check parameters against a sample rate; returns warnings.
    pub check: fn(&serde_json::Value, f64) -> Result<Vec<String>, String>,
    /// Settle parameters that depend on the rest of the pipeline, given
    /// whether every later stage is a built-in one run by its own
    /// executable (None: nothing to settle).
    pub settle: Option<fn(&mut serde_json::Value, bool)>,
}

fn parse_params<T: serde::de::DeserializeOwned>(params: &serde_json::Value) -> Result<T, String> {
    serde_path_to_error::deserialize(params.clone()).map_err(|e| format!("params.{}: {}", e.path(), e.inner()))
}

/// The built-in stages, in pipeline order.
pub const BUILTIN_STAGES: &[BuiltinStage] = &[
    BuiltinStage {
        name: "filter",
        about: "band-pass, notch, common median reference, channel QC",
        check: |params, rate| {
            let p: spikeyard_filter::params::FilterParams = parse_params(params)?;
            p.check(rate).map(|v| v.warnings).map_err(|e| format!("params: {e}"))
        },
        // store_filtered_as = "auto": packed when only built-in stages read
        // the filtered copy, plain i16 when a stage of the user's may.
        settle: Some(|params, later_built_in| {
            let key = "store_filtered_as";
            if let Some(table) = params.as_object_mut() {
                if table.get(key).is_none_or(|v| v == "auto") {
                    let storage = if later_built_in { "packed-i16" } else { "i16" };
                    table.insert(key.into(), storage.into());
                }
            }
        }),
    },
    BuiltinStage {
        name: "detect",
        about: "MAD-threshold spike detection, merged across neighbouring electrodes",
        check: |params, rate| {
            let p: spikeyard_detect::params::DetectParams = parse_params(params)?;
            p.check(rate).map(|_| Vec::new()).map_err(|e| format!("params: {e}"))
        },
        settle: None,
    },
    BuiltinStage {
        name: "features",
        about: "aligned multi-electrode snippets, PCA features, positions",
        check: |params, rate| {
            let p: spikeyard_features::params::FeaturesParams = parse_params(params)?;
            p.check(rate).map(|_| Vec::new()).map_err(|e| format!("params: {e}"))
        },
        settle: None,
    },
    BuiltinStage {
        name: "cluster",
        about: "units per neighbourhood by BIC-selected mixtures, merged; spikes, units, templates",
        check: |params, rate| {
            let p: spikeyard_cluster::params::ClusterParams = parse_params(params)?;
            p.check(rate).map(|_| Vec::new()).map_err(|e| format!("params: {e}"))
        },
        settle: None,
    },
    BuiltinStage {
        name: "measures",
        about: "unit quality metrics, firing rates with exact Poisson intervals",
        check: |params, _rate| {
            let p: spikeyard_measures::params::MeasuresParams = parse_params(params)?;
            p.check().map(|_| Vec::new()).map_err(|e| format!("params: {e}"))
        },
        settle: None,
    },
    BuiltinStage {
        name: "propagation",
        about: "spike-triggered footprints, axon tracking, conduction velocity per branch",
        check: |params, _rate| {
            let p: spikeyard_propagation::params::PropagationParams = parse_params(params)?;
            p.check().map(|_| Vec::new()).map_err(|e| format!("params: {e}"))
        },
        settle: None,
    },
    BuiltinStage {
        name: "report",
        about: "one self-contained HTML page with the run, the array, the units and their axons",
        check: |params, _rate| {
            let p: spikeyard_report::params::ReportParams = parse_params(params)?;
            p.check().map(|_| Vec::new()).map_err(|e| format!("params: {e}"))
        },
        settle: None,
    },
];

pub fn builtin(name: &str) -> Option<&'static BuiltinStage> {
    BUILTIN_STAGES.iter().find(|s| s.name == name)
}

/// A stage executable that could not be found.
#[derive(Debug, thiserror::Error)]
#[error("stage {stage}: no executable {wanted} {searched}{hint}")]
pub struct StageNotFound {
    pub stage: String,
    pub wanted: String,
    pub searched: String,
    pub hint: String,
}

/// Folders searched for a command name: next to the running executable, then PATH.
pub fn search_directories() -> Vec<PathBuf> {
    let mut dirs = Vec::new();
    if let Some(dir) = std::env::current_exe().ok().and_then(|p| p.parent().map(Path::to_path_buf)) {
        dirs.push(dir);
    }
    if let Some(path) = std::env::var_os("PATH") {
        dirs.extend(std::env::split_paths(&path));
    }
    dirs
}

fn is_executable(path: &Path) -> bool {
    use std::os::unix::fs::PermissionsExt;
    path.metadata().map(|m| m.is_file() && m.permissions().mode() & 0o111 != 0).unwrap_or(false)
}

/// Find the executable of stage `stage`, honouring `exec` (see module docs).
///
/// # Errors
/// [`StageNotFound`] naming what was looked for, where, and the closest
/// built-in stage name.
pub fn find_stage_executable(stage: &str, exec: Option<&str>, config_folder: &Path) -> Result<PathBuf, StageNotFound> {
    let not_found = |wanted: String, searched: String| {
        let hint = closest_builtin(stage)
            .filter(|c| *c != stage)
            .map(|c| format!("; did you mean stage \"{c}\"?"))
            .unwrap_or_default();
        StageNotFound { stage: stage.to_string(), wanted, searched, hint }
    };
    let name = match exec {
        Some(exec) if exec.contains('/') => {
            let path = config_folder.join(exec);
            return if is_executable(&path) {
                Ok(path)
            } else {
                Err(not_found(
                    path.display().to_string(),
                    "(the config's exec path is missing or not executable)".into(),
                ))
            };
        }
        Some(exec) => exec.to_string(),
        None => format!("{STAGE_PREFIX}{stage}"),
    };
    let dirs = search_directories();
    dirs.iter().map(|d| d.join(&name)).find(|p| is_executable(p)).ok_or_else(|| {
        let list: Vec<String> = dirs.iter().map(|d| d.display().to_string()).collect();
        not_found(name.clone(), format!("in {}", list.join(":")))
    })
}

/// The built-in stage name closest to `name` by edit distance, if close.
pub fn closest_builtin(name: &str) -> Option<&'static str> {
    BUILTIN_STAGES.iter().map(|s| (edit_distance(name, s.name), s.name)).min().filter(|(d, _)| *d <= 3).map(|(_, n)| n)
}

fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut previous: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut current = vec![i + 1];
        for (j, cb) in b.iter().enumerate() {
            let substitution = previous[j] + usize::from(ca != *cb);
            current.push(substitution.min(previous[j + 1] + 1).min(current[j] + 1));
        }
        previous = current;
    }
    previous[b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn misspelt_stage_gets_the_closest_name() {
        assert_eq!(closest_builtin("fliter"), Some("filter"));
        assert_eq!(closest_builtin("detct"), Some("detect"));
        assert_eq!(closest_builtin("cluster-my-own-way"), None);
    }

    #[test]
    fn missing_stage_names_what_and_where_it_searched() {
        let err = find_stage_executable("fliter", None, Path::new(".")).unwrap_err().to_string();
        assert!(err.contains("spikeyard-fliter") && err.contains("did you mean stage \"filter\""), "{err}");
    }

    #[test]
    fn exec_path_is_relative_to_the_config_folder() {
        let dir = tempfile::tempdir().unwrap();
        let script = dir.path().join("my-stage.sh");
        std::fs::write(&script, "#!/bin/sh\n").unwrap();
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&script, std::fs::Permissions::from_mode(0o755)).unwrap();
        assert_eq!(
            find_stage_executable("mine", Some("./my-stage.sh"), dir.path()).unwrap(),
            dir.path().join("./my-stage.sh")
        );
        assert!(find_stage_executable("mine", Some("./absent.sh"), dir.path()).is_err());
    }

    #[test]
    fn builtin_checks_name_the_bad_key() {
        let err = (builtin("filter").unwrap().check)(&serde_json::json!({"ordre": 3}), 20000.0).unwrap_err();
        assert!(err.contains("ordre"), "{err}");
        let err =
            (builtin("detect").unwrap().check)(&serde_json::json!({"threshold_sigma": -1.0}), 20000.0).unwrap_err();
        assert!(err.contains("threshold_sigma"), "{err}");
    }
}
