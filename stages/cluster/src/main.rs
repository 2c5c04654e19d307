//! `spikeyard-cluster --request REQUEST.json`: see the library docs.

fn main() -> std::process::ExitCode {
    spikeyard_contract::stage_main(
        spikeyard_cluster::EXECUTABLE,
        spikeyard_cluster::VERSION,
        "Clusters event features into units, merges split units, writes spikes, units and templates.",
        spikeyard_cluster::run,
    )
}
