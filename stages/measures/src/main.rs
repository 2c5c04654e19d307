//! `spikeyard-measures --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_measures::EXECUTABLE,
        spikeyard_measures::VERSION,
        "Per-unit quality metrics and firing rates with exact Poisson intervals.",
        spikeyard_measures::run,
    )
}
