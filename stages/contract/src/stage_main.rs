//! The `main` every Rust stage shares: parse `--request FILE`, run, write
//! the report, print the error chain once and exit non-zero on failure.

use crate::request::{StageReport, StageRequest};
use std::process::ExitCode;

/// Exit code of a stage whose input or parameters were refused.
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code of a stage that failed while working.
pub const EXIT_FAILED: u8 = 1;

/// A stage failure: whether the input was at fault, and the message chain.
#[derive(Debug)]
pub struct StageFailure {
    pub bad_input: bool,
    pub error: Box<dyn std::error::Error + Send + Sync>,
}

impl StageFailure {
    pub fn bad_input(error: impl Into<Box<dyn std::error::Error + Send + Sync>>) -> Self {
        StageFailure { bad_input: true, error: error.into() }
    }
    pub fn failed(error: impl Into<Box<dyn std::error::Error + Send + Sync>>) -> Self {
        StageFailure { bad_input: false, error: error.into() }
    }
}

/// Run a stage from its command line. `run` does the work and returns the
/// report, which is written into the output folder last.
pub fn stage_main(
    executable: &str,
    version: &str,
    about: &str,
    run: impl FnOnce(&StageRequest) -> Result<StageReport, StageFailure>,
) -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let usage = format!("usage: {executable} --request REQUEST.json\n\n{about}");
    let request_path = match args.as_slice() {
        [flag] if flag == "--version" || flag == "-V" => {
            println!("{executable} {version}");
            return ExitCode::SUCCESS;
        }
        [flag] if flag == "--help" || flag == "-h" => {
            println!("{usage}");
            return ExitCode::SUCCESS;
        }
        [flag, path] if flag == "--request" => std::path::PathBuf::from(path),
        _ => {
            eprintln!("{executable}: error: expected --request REQUEST.json\n{usage}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let outcome = StageRequest::load(&request_path).map_err(StageFailure::bad_input).and_then(|request| {
        let mut report = run(&request)?;
        report.stage_version = format!("{executable} {version}");
        report.write(&request.output_dir).map_err(StageFailure::failed)?;
        Ok(())
    });
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(failure) => {
            let mut message = format!("{executable}: error: {}", failure.error);
            let mut source = failure.error.source();
            while let Some(cause) = source {
                message.push_str(&format!("\n  caused by: {cause}"));
                source = cause.source();
            }
            eprintln!("{message}");
            ExitCode::from(if failure.bad_input { EXIT_BAD_INPUT } else { EXIT_FAILED })
        }
    }
}

impl From<crate::error::RecordingError> for StageFailure {
    /// A read error while working (the description was already accepted).
    fn from(error: crate::error::RecordingError) -> Self {
        StageFailure::failed(error)
    }
}

impl From<crate::error::ContractError> for StageFailure {
    /// An error while reading an earlier stage's output or writing our own.
    fn from(error: crate::error::ContractError) -> Self {
        StageFailure::failed(error)
    }
}
