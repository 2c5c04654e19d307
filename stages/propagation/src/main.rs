//! `spikeyard-propagation --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_propagation::EXECUTABLE,
        spikeyard_propagation::VERSION,
        "Spike-triggered footprints and axonal conduction velocity per unit and branch.",
        spikeyard_propagation::run,
    )
}
