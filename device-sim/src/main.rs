//! `plimsoll`: the device-side command line (demo, cohort simulation).

use std::path::PathBuf;

use clap::{Parser, Subcommand};
use plimsoll_device::demo::{DemoOptions, run_demo};

#[derive(Debug, Parser)]
#[command(
    name = "plimsoll",
    version,
    about = "Personal baselines for wearable cohorts, learned by federated rounds"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Simulate a small cohort, train the shared prior over loopback gRPC, and report.
    Demo {
        /// Scenario file (TOML).
        #[arg(long, default_value = "demo-data/quick.toml")]
        scenario: PathBuf,
        /// Output folder (cohort, aggregator database, device outputs).
        #[arg(long, default_value = "out/demo")]
        out: PathBuf,
        /// Override the scenario's seed.
        #[arg(long)]
        seed: Option<u64>,
        /// Override the scenario's number of participants.
        #[arg(long)]
        participants: Option<usize>,
        /// Federated rounds.
        #[arg(long, default_value_t = 25)]
        rounds: u32,
        /// Local optimisation steps per round.
        #[arg(long, default_value_t = 10)]
        local_steps: u32,
        /// Adam step size (log-parameter space).
        #[arg(long, default_value_t = 0.05)]
        learning_rate: f64,
        /// Window length in days for local steps (0 = full series).
        #[arg(long, default_value_t = 60)]
        window_days: u32,
    },
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "warn".into()),
        )
        .with_writer(std::io::stderr)
        .init();
    match Cli::parse().command {
        Command::Demo {
            scenario,
            out,
            seed,
            participants,
            rounds,
            local_steps,
            learning_rate,
            window_days,
        } => {
            run_demo(&DemoOptions {
                scenario,
                out_dir: out,
                seed,
                participants,
                rounds,
                local_steps,
                learning_rate,
                window_days,
            })
            .await
        }
    }
}
