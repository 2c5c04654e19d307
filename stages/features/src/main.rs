//! `spikeyard-features --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_features::EXECUTABLE,
        spikeyard_features::VERSION,
        "Aligned multi-electrode snippets around events, PCA features and positions.",
        spikeyard_features::run,
    )
}
