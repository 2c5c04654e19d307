//! `spikeyard-report --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_report::EXECUTABLE,
        spikeyard_report::VERSION,
        "One self-contained HTML page per run with inline SVG figures.",
        spikeyard_report::run,
    )
}
