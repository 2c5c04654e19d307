//! spikeyard: plans, caches and runs the stage executables of a pipeline
//! over a multi-electrode array recording.
//!
//! Map of modules, in the order a run uses them:
//! - [`config`]: the pipeline config (TOML): run settings and the ordered
//!   stages with their parameters; built-in stages' parameters are checked
//!   before anything runs.
//! - [`stages`]: finding a stage's executable (config `exec`, next to the
//!   running `spikeyard`, then `PATH`).
//! - [`hash_memo`]: the recording's content hash, remembered between runs
//!   into the same output folder while the file stays the same file.
//! - [`plan`]: the plan as plain data: stage order, executables, cache keys
//!   and whether each stage's cached result is still valid.
//! - [`runner`]: runs the planned stages as child processes, shows their
//!   progress, writes each stage's manifest and publishes the tables.
//! - [`simulate`]: simulated recordings with ground truth, for the demo
//!   and tests; [`truth`] scores detections against it and [`compare`]
//!   scores a sorting.

pub mod commands;
pub mod compare;
pub mod config;
pub mod hash_memo;
pub mod plan;
pub mod runner;
pub mod simulate;
pub mod stages;
pub mod truth;

/// Exit code: every stage finished and the output folder is complete.
pub const EXIT_OK: u8 = 0;
/// Exit code: the run failed inside a stage or while writing results.
pub const EXIT_FAILED: u8 = 1;
/// Exit code: the recording, the config or the command line was refused.
pub const EXIT_BAD_INPUT: u8 = 2;
