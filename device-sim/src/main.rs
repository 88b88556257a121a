//! `plimsoll`: the device-side command line (demo, cohort simulation).

use std::path::PathBuf;

use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};
use plimsoll_device::cohort::{Scenario, SimulateOptions, SimulationSummary, simulate_to_dir};
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
    /// Generate a synthetic cohort with known injected events (daily.csv,
    /// participants.csv, events.csv, scenario.toml) from a scenario file.
    Simulate {
        /// Scenario file (TOML), e.g. demo-data/pilot.toml.
        scenario: PathBuf,
        /// Output folder.
        #[arg(long, default_value = "out/cohort")]
        out: PathBuf,
        /// Override the scenario's seed.
        #[arg(long)]
        seed: Option<u64>,
        /// Override the number of participants.
        #[arg(long)]
        participants: Option<usize>,
        /// Override the number of days.
        #[arg(long)]
        days: Option<usize>,
    },
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
        #[arg(long, default_value_t = 80)]
        rounds: u32,
        /// Local optimisation steps per round (plain SGD).
        #[arg(long, default_value_t = 2)]
        local_steps: u32,
        /// SGD step size (parameter space; the objective is per day).
        #[arg(long, default_value_t = 1.0)]
        learning_rate: f64,
        /// Window length in days for local steps (0 = full series).
        #[arg(long, default_value_t = 0)]
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
        Command::Simulate {
            scenario,
            out,
            seed,
            participants,
            days,
        } => {
            let parsed = Scenario::from_path(&scenario)?;
            std::fs::create_dir_all(&out)?;
            let bar = ProgressBar::new(0).with_style(
                ProgressStyle::with_template("simulating {bar:40} {pos}/{len} participants [{elapsed}]")
                    .expect("static template"),
            );
            let opts = SimulateOptions {
                seed,
                participants,
                days,
            };
            let summary = simulate_to_dir(&parsed, &opts, &out, &mut |done, total| {
                bar.set_length(total as u64);
                bar.set_position(done as u64);
            })?;
            bar.finish();
            print_summary(&summary, &out);
            Ok(())
        }
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

fn print_summary(s: &SimulationSummary, out: &std::path::Path) {
    println!(
        "{} participants × {} days, seed {} → {}",
        s.n_participants,
        s.n_days,
        s.seed,
        out.display()
    );
    println!("Participants per subgroup:");
    for (column, levels) in &s.participants_per_group {
        let parts: Vec<String> = levels.iter().map(|(v, n)| format!("{v}: {n}")).collect();
        println!("  {column:<14} {}", parts.join(", "));
    }
    println!("Events by kind:");
    for (kind, n) in &s.events_by_kind {
        println!("  {kind:<22} {n}");
    }
    println!("Missing-data rate per signal (share of participant-days without a value):");
    for (signal, rate) in &s.missing_rate {
        println!("  {:<20} {:>5.1}%", signal.column(), 100.0 * rate);
    }
}
