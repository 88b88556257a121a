//! `plimsoll-aggregator`: the aggregator's command line.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;

use anyhow::{Context, bail};
use clap::{Parser, Subcommand};
use plimsoll_server::{Coordinator, StudyConfig, serve, service::now_ms};

#[derive(Debug, Parser)]
#[command(
    name = "plimsoll-aggregator",
    version,
    about = "Federated-prior aggregator for Plimsoll studies"
)]
struct Cli {
    /// SQLite database holding all studies, devices, rounds and priors.
    #[arg(long, global = true, default_value = "plimsoll-aggregator.db")]
    db: PathBuf,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Serve gRPC (aggregator, health, reflection) until interrupted.
    Serve {
        /// Address to listen on.
        #[arg(long, default_value = "127.0.0.1:50051")]
        listen: SocketAddr,
    },
    /// Create a study from a JSON configuration file.
    CreateStudy {
        /// Path to the study configuration (JSON).
        config: PathBuf,
    },
    /// Print each study's progress.
    Status,
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into()),
        )
        .init();
    let cli = Cli::parse();
    let coordinator = Arc::new(
        Coordinator::open(&cli.db)
            .with_context(|| format!("opening database {}", cli.db.display()))?,
    );
    match cli.command {
        Command::Serve { listen } => {
            if !listen.ip().is_loopback() {
                bail!("refusing to serve plaintext gRPC on non-loopback address {listen}");
            }
            let listener = tokio::net::TcpListener::bind(listen)
                .await
                .with_context(|| format!("binding {listen}"))?;
            let server = serve(coordinator, listener).await?;
            println!("aggregator listening on {}", server.addr);
            tokio::signal::ctrl_c().await?;
            server.shutdown().await?;
        }
        Command::CreateStudy { config } => {
            let text = std::fs::read_to_string(&config)
                .with_context(|| format!("reading {}", config.display()))?;
            let study: StudyConfig = serde_json::from_str(&text)
                .with_context(|| format!("parsing study configuration {}", config.display()))?;
            let id = study.study_id.clone();
            coordinator.create_study(study, now_ms())?;
            println!("created study `{id}`");
        }
        Command::Status => {
            for id in coordinator.study_ids() {
                let s = coordinator.status(&id)?;
                println!(
                    "{id}: {} devices, {}/{} rounds, prior version {}, open round {}",
                    s.devices_enrolled,
                    s.rounds_completed,
                    s.config.rounds,
                    s.prior_version,
                    s.current_round
                );
            }
        }
    }
    Ok(())
}
