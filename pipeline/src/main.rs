//! `spikeyard`: command-line glue over the library (see its docs).

use clap::{Parser, Subcommand};
use spikeyard::{commands, runner::ProgressMode};
use std::path::PathBuf;
use std::process::ExitCode;

/// Spike sorting for multi-electrode array recordings, as a pipeline of
/// stage executables chained by a TOML config.
#[derive(Parser)]
#[command(name = "spikeyard", version, about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Run the pipeline on a recording; stages whose inputs did not change are reused.
    Run {
        /// Recording description (TOML).
        #[arg(long)]
        recording: PathBuf,
        /// Output folder.
        #[arg(long)]
        out: PathBuf,
        /// Pipeline config (TOML); the built-in default when absent.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Show the plan (stages, executables, cache hits) and stop.
        #[arg(long)]
        dry_run: bool,
    },
    /// Write a simulated recording with ground truth.
    Simulate {
        #[arg(long)]
        out: PathBuf,
        /// sparse-grid, dense-axons, culture or dense-culture.
        #[arg(long, default_value = "sparse-grid")]
        scenario: String,
        #[arg(long, default_value_t = 60.0)]
        duration_s: f64,
        #[arg(long, default_value_t = 1)]
        seed: u64,
    },
    /// Simulate a recording, run the default pipeline on it, and compare with the truth.
    Demo {
        #[arg(long, default_value = "demo-out")]
        out: PathBuf,
        /// sparse-grid, dense-axons, culture or dense-culture.
        #[arg(long, default_value = "sparse-grid")]
        scenario: String,
        #[arg(long, default_value_t = 60.0)]
        duration_s: f64,
    },
    /// Validate a recording without running the pipeline and describe it.
    Check {
        /// Recording description (TOML).
        recording: PathBuf,
    },
    /// Score a sorting against ground truth (one-to-one spike matching).
    Compare {
        /// A results folder (its spikes.parquet) or a spikes table.
        #[arg(long)]
        sorting: PathBuf,
        /// Ground-truth spikes table (unit_id, sample, time_s), e.g. truth_spikes.parquet.
        #[arg(long)]
        truth: PathBuf,
        /// Matching window, ± ms.
        #[arg(long, default_value_t = 0.5)]
        window_ms: f64,
        /// Where to write the table; default comparison.parquet beside the sorting.
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// List the built-in stages and where their executables are.
    Stages,
    /// Print the built-in default config (a starting point for your own).
    DefaultConfig,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    let mode = ProgressMode::for_stderr();
    let outcome = match cli.command {
        Command::Run { recording, out, config, dry_run } => {
            commands::run(&recording, &out, config.as_deref(), dry_run, mode).map(|_| ())
        }
        Command::Simulate { out, scenario, duration_s, seed } => {
            commands::simulate(&out, &scenario, duration_s, seed).map(|_| ())
        }
        Command::Demo { out, scenario, duration_s } => commands::demo(&out, &scenario, duration_s, mode),
        Command::Compare { sorting, truth, window_ms, out } => {
            commands::compare(&sorting, &truth, window_ms, out.as_deref()).map(|c| print!("{}", c.describe()))
        }
        Command::Check { recording } => commands::check(&recording).map(|report| print!("{}", report.text)),
        Command::Stages => {
            print!("{}", commands::list_stages());
            Ok(())
        }
        Command::DefaultConfig => {
            print!("{}", spikeyard::config::DEFAULT_CONFIG);
            Ok(())
        }
    };
    match outcome {
        Ok(()) => ExitCode::from(spikeyard::EXIT_OK),
        Err(error) => {
            eprintln!("error: {error:#}");
            ExitCode::from(commands::exit_code(&error))
        }
    }
}
