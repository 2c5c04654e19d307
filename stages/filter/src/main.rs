//! `spikeyard-filter --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_filter::EXECUTABLE,
        spikeyard_filter::VERSION,
        "Band-pass, notch and common median reference, with per-channel QC.",
        spikeyard_filter::run,
    )
}
