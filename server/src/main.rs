//! `plimsoll-aggregator`: the aggregator's command line.

use std::io::BufRead;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;

use anyhow::{Context, bail};
use clap::{Parser, Subcommand};
use plimsoll_server::review::accounts;
use plimsoll_server::store::Store;
use plimsoll_server::{Coordinator, StudyConfig, serve, serve_review, service::now_ms};

/// Environment variable a new reviewer's password may be read from
/// (otherwise the first line of standard input is).
const PASSWORD_ENV: &str = "PLIMSOLL_REVIEWER_PASSWORD";

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
        /// Also serve the clinician review pages (HTTP) on this address,
        /// e.g. 127.0.0.1:8080. Loopback only.
        #[arg(long)]
        review_listen: Option<SocketAddr>,
    },
    /// Manage clinician reviewer accounts.
    Reviewer {
        #[command(subcommand)]
        command: ReviewerCommand,
    },
    /// Create a study from a JSON configuration file.
    CreateStudy {
        /// Path to the study configuration (JSON).
        config: PathBuf,
    },
    /// Print each study's progress.
    Status,
}

#[derive(Debug, Subcommand)]
enum ReviewerCommand {
    /// Create a reviewer account. The password is read from the environment
    /// variable PLIMSOLL_REVIEWER_PASSWORD, or else from the first line of
    /// standard input (at least 12 characters).
    Add {
        /// Reviewer name, `[A-Za-z0-9_-]{1,64}`.
        name: String,
        /// Study to assign the reviewer to (repeatable).
        #[arg(long = "study")]
        studies: Vec<String>,
    },
    /// Let an existing reviewer review a study.
    Assign {
        name: String,
        #[arg(long)]
        study: String,
    },
    /// Replace a reviewer's password (read like `add`) and end their sessions.
    Password { name: String },
}

fn read_password() -> anyhow::Result<String> {
    if let Ok(p) = std::env::var(PASSWORD_ENV) {
        return Ok(p);
    }
    eprintln!("password (one line on standard input):");
    let mut line = String::new();
    std::io::stdin()
        .lock()
        .read_line(&mut line)
        .context("reading the password from standard input")?;
    let password = line.trim_end_matches(['\r', '\n']).to_owned();
    if password.is_empty() {
        bail!("no password given: set {PASSWORD_ENV} or write it on standard input");
    }
    Ok(password)
}

fn reviewer_command(db: &std::path::Path, command: ReviewerCommand) -> anyhow::Result<()> {
    let mut store =
        Store::open(db).with_context(|| format!("opening database {}", db.display()))?;
    match command {
        ReviewerCommand::Add { name, studies } => {
            let password = read_password()?;
            accounts::add_reviewer(&mut store, &name, &password, now_ms())?;
            for study in &studies {
                accounts::assign(&mut store, &name, study)?;
            }
            println!(
                "created reviewer `{name}` ({} studies assigned)",
                studies.len()
            );
        }
        ReviewerCommand::Assign { name, study } => {
            accounts::assign(&mut store, &name, &study)?;
            println!("reviewer `{name}` may now review study `{study}`");
        }
        ReviewerCommand::Password { name } => {
            let password = read_password()?;
            accounts::set_password(&mut store, &name, &password)?;
            println!("password of `{name}` replaced; their sessions have ended");
        }
    }
    Ok(())
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into()),
        )
        .init();
    let cli = Cli::parse();
    let open = || -> anyhow::Result<Arc<Coordinator>> {
        Ok(Arc::new(Coordinator::open(&cli.db).with_context(|| {
            format!("opening database {}", cli.db.display())
        })?))
    };
    match cli.command {
        Command::Serve {
            listen,
            review_listen,
        } => {
            if !listen.ip().is_loopback() {
                bail!("refusing to serve plaintext gRPC on non-loopback address {listen}");
            }
            if let Some(addr) = review_listen
                && !addr.ip().is_loopback()
            {
                bail!("refusing to serve plaintext review pages on non-loopback address {addr}");
            }
            let listener = tokio::net::TcpListener::bind(listen)
                .await
                .with_context(|| format!("binding {listen}"))?;
            let server = serve(open()?, listener).await?;
            println!("aggregator listening on {}", server.addr);
            let review = match review_listen {
                Some(addr) => {
                    let listener = tokio::net::TcpListener::bind(addr)
                        .await
                        .with_context(|| format!("binding {addr}"))?;
                    let review = serve_review(&cli.db, listener).await?;
                    println!("review pages on {}", review.url());
                    Some(review)
                }
                None => None,
            };
            tokio::signal::ctrl_c().await?;
            if let Some(review) = review {
                review.shutdown().await?;
            }
            server.shutdown().await?;
        }
        Command::CreateStudy { config } => {
            let text = std::fs::read_to_string(&config)
                .with_context(|| format!("reading {}", config.display()))?;
            let study: StudyConfig = serde_json::from_str(&text)
                .with_context(|| format!("parsing study configuration {}", config.display()))?;
            let id = study.study_id.clone();
            open()?.create_study(study, now_ms())?;
            println!("created study `{id}`");
        }
        Command::Reviewer { command } => reviewer_command(&cli.db, command)?,
        Command::Status => {
            let coordinator = open()?;
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
