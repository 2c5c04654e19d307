//! `spikeyard-detect --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_detect::EXECUTABLE,
        spikeyard_detect::VERSION,
        "Threshold-crossing spike detection with merging across neighbouring electrodes.",
        spikeyard_detect::run,
    )
}
