//! The stage's command line: usage errors and refused requests exit 2 with
//! a message that names the file.

#[test]
fn command_line_errors_are_refused_clearly() {
    spikeyard_contract::testing::check_stage_command_line(std::path::Path::new(env!("CARGO_BIN_EXE_spikeyard-report")));
}
