//! The stage's command line: usage errors and refused requests exit non-zero
//! with a message that names the file.

use std::process::Command;

fn stage() -> Command {
    Command::new(env!("CARGO_BIN_EXE_spikeyard-measures"))
}

#[test]
fn missing_request_argument_is_a_usage_error() {
    let output = stage().output().unwrap();
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--request"));
}

#[test]
fn unreadable_request_names_the_file() {
    let output = stage().args(["--request", "/nonexistent/request.json"]).output().unwrap();
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("/nonexistent/request.json"));
}
