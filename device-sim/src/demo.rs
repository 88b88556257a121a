//! The end-to-end demo: simulate a cohort, start an aggregator on a loopback
//! port with its database in the output folder, run every participant's
//! device concurrently through the federated rounds, and report the learned
//! prior, convergence and where the outputs are.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::Context;
use indicatif::{ProgressBar, ProgressStyle};
use plimsoll_server::{Coordinator, LocalTraining, Optimizer, SignalLayout, StudyConfig};
use tokio::sync::Semaphore;

use crate::client::{DeviceOptions, DeviceReport, FlagSharing, connect_lazy, run_device_with};
use crate::cohort::{self, BadRowPolicy, Cohort, Scenario, SimulateOptions};
use crate::prior::{PARAM_NAMES, PriorParams};
use crate::signal::Signal;

/// Settings of a demo run.
#[derive(Debug, Clone)]
pub struct DemoOptions {
    /// Scenario file; `None` runs the built-in [`DEFAULT_SCENARIO`].
    pub scenario: Option<PathBuf>,
    pub out_dir: PathBuf,
    pub seed: Option<u64>,
    pub participants: Option<usize>,
    pub rounds: u32,
    pub local_steps: u32,
    pub learning_rate: f64,
    pub window_days: u32,
    /// Keep the review page serving after the report until interrupted.
    pub serve: bool,
    /// Loopback port of the review page (0 = any free port).
    pub review_port: u16,
    /// Abort on the first bad row of the simulated cohort, or quarantine
    /// bad rows (copied to `out_dir/quarantine/`) and go on.
    pub bad_rows: BadRowPolicy,
    /// Train the prior with user-level differential privacy at this ε (δ = 1/N).
    pub dp_epsilon: Option<f64>,
    /// Run each round with secure aggregation (`plimsoll_server::secure_round`).
    pub secure_aggregation: bool,
}

/// The default demo scenario (`demo-data/quick.toml`), built into the
/// binary so the demo runs from any folder.
pub const DEFAULT_SCENARIO: &str = include_str!("../../demo-data/quick.toml");

/// Files a device writes into its output folder; a folder under the demo's
/// `devices/` holding nothing else is one an earlier demo wrote.
pub const DEVICE_OUTPUT_FILES: &[&str] = &[
    "posterior.csv",
    "prospective.csv",
    "flags.csv",
    "flags.json",
    "report.html",
    crate::client::CALIBRATION_FILE,
    crate::device_report::CAUTION_FILE,
];

/// Removes the participant folders an earlier demo left under `devices_dir`
/// (those holding only [`DEVICE_OUTPUT_FILES`]), so the outputs are this
/// run's only. Anything else is left alone and named in the returned list.
pub fn clear_previous_devices(devices_dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
    let mut kept = Vec::new();
    let entries = match std::fs::read_dir(devices_dir) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(kept),
        Err(e) => {
            return Err(e).with_context(|| format!("reading {}", devices_dir.display()));
        }
    };
    for entry in entries {
        let entry = entry.with_context(|| format!("reading {}", devices_dir.display()))?;
        let path = entry.path();
        let ours = path.is_dir()
            && std::fs::read_dir(&path)
                .with_context(|| format!("reading {}", path.display()))?
                .all(|f| {
                    f.is_ok_and(|f| {
                        f.file_type().is_ok_and(|t| t.is_file())
                            && DEVICE_OUTPUT_FILES
                                .iter()
                                .any(|n| f.file_name().to_str() == Some(n))
                    })
                });
        if ours {
            std::fs::remove_dir_all(&path)
                .with_context(|| format!("removing the earlier demo's {}", path.display()))?;
        } else {
            kept.push(path);
        }
    }
    Ok(kept)
}

/// The study configuration of a demo over `signals` with `n` devices.
fn demo_config(
    opts: &DemoOptions,
    title: String,
    signals: &[Signal],
    n: u32,
) -> anyhow::Result<StudyConfig> {
    let dp = opts
        .dp_epsilon
        .map(|target| {
            plimsoll_server::privacy::DpSettings::for_target(
                target,
                1.0,
                opts.rounds,
                1.0 / f64::from(n.max(2)),
                crate::evaluate::command::DP_CLIP_NORM,
            )
            .map_err(|e| anyhow::anyhow!("--dp-epsilon {target}: {e}"))
        })
        .transpose()?;
    Ok(StudyConfig {
        study_id: "demo".into(),
        title,
        signals: initial_layouts(signals),
        rounds: opts.rounds,
        training: LocalTraining {
            optimizer: Optimizer::Sgd,
            local_steps: opts.local_steps,
            learning_rate: opts.learning_rate,
            window_days: opts.window_days,
            hyperprior_weight_per_day: 0.0,
        },
        fraction_per_round: 1.0,
        min_quorum: (n / 2).max(if opts.secure_aggregation { 2 } else { 1 }),
        start_when_enrolled: n,
        round_deadline_ms: 120_000,
        selection_seed: 7,
        aggregation: Default::default(),
        alert_budget_per_participant_month:
            plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
        review_level: plimsoll_server::packets::FlagLevel::Alert,
        sensor_models: None,
        subgroups: None,
        dp,
        secure_aggregation: opts
            .secure_aggregation
            .then(plimsoll_server::study::SecureAggregation::default),
        alert_direction: None,
    })
}

/// Study layouts for `signals`, starting from [`PriorParams::initial`].
pub fn initial_layouts(signals: &[Signal]) -> Vec<SignalLayout> {
    signals
        .iter()
        .map(|&s| {
            let (centre, scale) = s.reference();
            SignalLayout {
                signal: s.column().to_owned(),
                param_names: PARAM_NAMES.iter().map(|n| (*n).to_owned()).collect(),
                reference_center: centre,
                reference_scale: scale,
                initial: PriorParams::initial(s).values.to_vec(),
            }
        })
        .collect()
}

/// Signals with at least one observation anywhere in the cohort.
pub fn cohort_signals(cohort: &Cohort) -> Vec<Signal> {
    let mut found: Vec<Signal> = cohort
        .participants
        .iter()
        .flat_map(|p| p.signals())
        .collect();
    found.sort_unstable();
    found.dedup();
    found
}

/// Outcome of [`run_federated`], for reporting and tests.
#[derive(Debug)]
pub struct FederatedRun {
    pub reports: Vec<DeviceReport>,
    pub history: Vec<plimsoll_server::study::PriorVersion>,
    pub wall: Duration,
}

/// Runs every participant of `cohort` as a device against a fresh aggregator
/// with its database at `db_path`, through the study's rounds and the
/// detector's calibration ([`crate::client::calibrate_detection`]). Devices
/// declare the sensor model and group level the study asks for from the
/// cohort's `participants.csv` columns ([`crate::scheduler::Declared`]).
pub async fn run_federated(
    cohort: &Cohort,
    config: StudyConfig,
    db_path: &Path,
    devices_dir: &Path,
    progress: Option<&ProgressBar>,
) -> anyhow::Result<FederatedRun> {
    run_federated_with(
        cohort,
        config,
        db_path,
        devices_dir,
        FlagSharing::Withheld,
        progress,
    )
    .await
}

/// [`run_federated`] with every participant's flag-sharing choice set to `sharing`.
pub async fn run_federated_with(
    cohort: &Cohort,
    config: StudyConfig,
    db_path: &Path,
    devices_dir: &Path,
    sharing: FlagSharing,
    progress: Option<&ProgressBar>,
) -> anyhow::Result<FederatedRun> {
    let started = Instant::now();
    let coordinator = Arc::new(
        Coordinator::open(db_path).with_context(|| format!("opening {}", db_path.display()))?,
    );
    let study_id = config.study_id.clone();
    let rounds = config.rounds;
    // What each device declares at enrolment, from the cohort's group columns.
    let declared = crate::scheduler::Declared::from_config(&config);
    let enrollment_code = coordinator.create_study(config, plimsoll_server::service::now_ms())?;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let server = plimsoll_server::serve(coordinator.clone(), listener).await?;
    let channel = connect_lazy(server.addr)?;
    let cpu = Arc::new(Semaphore::new(
        std::thread::available_parallelism().map_or(2, |n| n.get()),
    ));
    let mut tasks = tokio::task::JoinSet::new();
    for (i, series) in cohort.participants.iter().enumerate() {
        let (sensor_model, group_label) = declared.values(cohort, &series.participant);
        let opts = DeviceOptions {
            study_id: study_id.clone(),
            enrollment_code: enrollment_code.clone(),
            out_dir: devices_dir.join(&series.participant),
            wait_ms: 5_000,
            seed: 0x5eed_0000 + i as u64,
            device_secret: None,
            sensor_model: (!sensor_model.is_empty()).then_some(sensor_model),
            group_label: (!group_label.is_empty()).then_some(group_label),
        };
        tasks.spawn(run_device_with(
            channel.clone(),
            series.clone(),
            opts,
            sharing,
            cpu.clone(),
        ));
    }
    let mut watch = coordinator.subscribe();
    let mut reports = Vec::new();
    loop {
        tokio::select! {
            joined = tasks.join_next() => match joined {
                Some(result) => reports.push(result??),
                None => break,
            },
            _ = watch.changed() => {
                if let Some(pb) = progress {
                    let done = coordinator.status(&study_id)?.rounds_completed;
                    pb.set_position(u64::from(done.min(rounds)));
                }
            }
        }
    }
    if let Some(pb) = progress {
        pb.set_position(u64::from(rounds));
    }
    reports.sort_by(|a, b| a.participant.cmp(&b.participant));
    let history = coordinator.prior_history(&study_id)?;
    server.shutdown().await?;
    Ok(FederatedRun {
        reports,
        history,
        wall: started.elapsed(),
    })
}

/// Runs the demo and prints its report to standard output.
pub async fn run_demo(opts: &DemoOptions) -> anyhow::Result<()> {
    let t0 = Instant::now();
    let (scenario, scenario_name) = match &opts.scenario {
        Some(path) => (Scenario::from_path(path)?, path.display().to_string()),
        None => (
            Scenario::from_toml_str(DEFAULT_SCENARIO).context("the built-in demo scenario")?,
            "the built-in quick scenario".to_owned(),
        ),
    };
    // Check the study settings before simulating anything (all six signals
    // and four devices stand in for what the cohort decides).
    demo_config(opts, String::new(), &Signal::ALL, 4)?
        .validate()
        .map_err(|e| anyhow::anyhow!("demo settings: {e}"))?;
    let cohort_dir = opts.out_dir.join("cohort");
    std::fs::create_dir_all(&cohort_dir)
        .with_context(|| format!("creating {}", cohort_dir.display()))?;
    let sim = SimulateOptions {
        seed: opts.seed,
        participants: opts.participants,
        days: None,
    };
    let summary = cohort::simulate_to_dir(&scenario, &sim, &cohort_dir, &mut |_, _| {})?;
    println!(
        "Simulated {} participants × {} days (seed {}) into {}",
        summary.n_participants,
        summary.n_days,
        summary.seed,
        cohort_dir.display()
    );
    // Read the cohort back through the same validating reader a real pilot's
    // export goes through.
    let cohort = cohort::read_cohort(&cohort_dir, opts.bad_rows)
        .with_context(|| format!("reading the cohort in {}", cohort_dir.display()))?;
    for issue in &cohort.issues {
        println!("  input issue: {issue}");
    }
    for file in cohort::write_quarantine_files(&cohort.issues, &opts.out_dir)? {
        println!("  {file}");
    }
    let signals = cohort_signals(&cohort);
    let n = cohort.participants.len() as u32;
    let config = demo_config(
        opts,
        format!("Demo cohort from {scenario_name}"),
        &signals,
        n,
    )?;
    let db_path = opts.out_dir.join("aggregator.db");
    for suffix in ["", "-wal", "-shm"] {
        let p = PathBuf::from(format!("{}{suffix}", db_path.display()));
        if p.exists() {
            std::fs::remove_file(&p)
                .with_context(|| format!("removing the previous demo database {}", p.display()))?;
        }
    }
    let bar = ProgressBar::new(u64::from(opts.rounds)).with_style(
        ProgressStyle::with_template("federated rounds {bar:40} {pos}/{len} [{elapsed}]")
            .expect("static template"),
    );
    let devices_dir = opts.out_dir.join("devices");
    for kept in clear_previous_devices(&devices_dir)? {
        println!(
            "  left in place (not written by a demo): {}",
            kept.display()
        );
    }
    let privacy = config.dp.map(|dp| {
        let rounds = config.round_limit();
        format!(
            "Privacy: user-level DP-FedAvg, ε = {:.2} of {} after {rounds} rounds (δ = {:.3}, noise multiplier {:.2}, clipping norm {}); the prior is noisier for it.",
            config.epsilon_spent(rounds).unwrap_or(0.0),
            dp.epsilon_budget,
            dp.delta,
            dp.noise_multiplier,
            dp.clip_norm
        )
    });
    // Every demo participant consented to share flag packets with reviewers.
    let run = run_federated_with(
        &cohort,
        config,
        &db_path,
        &devices_dir,
        FlagSharing::Consented,
        Some(&bar),
    )
    .await?;
    bar.finish();

    let mut out = std::io::stdout().lock();
    writeln!(out)?;
    if let Some(line) = &privacy {
        writeln!(out, "{line}")?;
    }
    if opts.secure_aggregation {
        // Devices behind each round's sum (the most over the round's signals).
        let per_round: Vec<u32> = run
            .history
            .iter()
            .skip(1)
            .map(|p| {
                p.contributions
                    .iter()
                    .map(|c| c.n_devices)
                    .max()
                    .unwrap_or(0)
            })
            .collect();
        writeln!(
            out,
            "Privacy: secure aggregation in {} rounds and both calibration stages; the aggregator saw only sums (each round's over {}–{} devices) and stored no device's update or statistics.",
            per_round.len(),
            per_round.iter().min().unwrap_or(&0),
            per_round.iter().max().unwrap_or(&0)
        )?;
    }
    writeln!(
        out,
        "Learned shared prior (version {}), in plain units:",
        run.history.last().map_or(0, |p| p.version)
    )?;
    // The unit sits with the signal's name, so every number column lines up;
    // values at the signal's precision, as in the flags' reasons.
    writeln!(
        out,
        "  {:<40} {:>10} {:>11} {:>14} {:>12} {:>9}",
        "signal (unit)", "pop. mean", "between SD", "trend len (d)", "weekly amp.", "noise SD"
    )?;
    let latest = run.history.last().context("no prior published")?;
    for p in &latest.params {
        let signal: Signal = p.signal.parse()?;
        let prior = PriorParams::from_slice(signal, &p.values).context("prior vector")?;
        let s = prior.summary();
        let v = |x: f64| crate::flags::fmt_number(signal, x);
        writeln!(
            out,
            "  {:<40} {:>10} {:>11} {:>14.1} {:>12} {:>9}",
            format!("{} ({})", signal.label(), signal.unit()),
            v(s.population_mean),
            v(s.between_sd),
            s.trend_len_days,
            v(s.weekly_amplitude),
            v(s.noise_sd),
        )?;
    }
    writeln!(out)?;
    writeln!(
        out,
        "Convergence: pooled objective of the prior each round started from (nats/day, lower is better):"
    )?;
    write!(out, "  {:>5}", "round")?;
    for p in &latest.params {
        write!(out, " {:>18}", p.signal)?;
    }
    writeln!(out)?;
    let rounds: Vec<_> = run.history.iter().skip(1).collect();
    let shown = convergence_rows(rounds.len());
    for v in shown.iter().map(|&i| rounds[i]) {
        write!(out, "  {:>5}", v.round_id)?;
        for p in &latest.params {
            match v.contributions.iter().find(|c| c.signal == p.signal) {
                Some(c) => write!(out, " {:>18.4}", c.mean_local_loss)?,
                None => write!(out, " {:>18}", "–")?,
            }
        }
        writeln!(out)?;
    }
    writeln!(out)?;
    writeln!(out, "Outputs:")?;
    writeln!(
        out,
        "  cohort (shared CSV format):     {}",
        cohort_dir.display()
    )?;
    writeln!(
        out,
        "  aggregator database (SQLite):   {}",
        db_path.display()
    )?;
    writeln!(
        out,
        "  per-device posterior bands:     {}/<participant>/posterior.csv",
        devices_dir.display()
    )?;
    writeln!(
        out,
        "  per-device flags and report:    {}/<participant>/{{flags.csv,flags.json,prospective.csv,report.html,CAUTION.txt}}",
        devices_dir.display()
    )?;
    writeln!(
        out,
        "  per-device detector calibration: {}/<participant>/{}",
        devices_dir.display(),
        crate::client::CALIBRATION_FILE
    )?;
    if let Some(c) = run.reports.first().map(|r| &r.calibration) {
        writeln!(
            out,
            "Detector calibrated over gRPC from {} devices' sums: Alert at score {:.1}, Watch at {:.1} (budget {} Alert episodes per participant-month).",
            c.histogram_devices, c.alert.threshold, c.watch.threshold, c.budget_per_month
        )?;
    }
    let flags: usize = run.reports.iter().map(|r| r.flags).sum();
    let alerts: usize = run.reports.iter().map(|r| r.alerts).sum();
    let sent: usize = run.reports.iter().map(|r| r.packets_sent).sum();
    writeln!(
        out,
        "Episodes: {flags} flagged on devices ({alerts} reached Alert; thresholds from the study's calibration above); {sent} flag packets sent for review (one per episode, participants consented)."
    )?;
    writeln!(
        out,
        "Devices: {}; federated training took {:.1} s; whole demo {:.1} s.",
        run.reports.len(),
        run.wall.as_secs_f64(),
        t0.elapsed().as_secs_f64()
    )?;
    drop(out);

    let (name, password) = plimsoll_server::ensure_demo_reviewer(&db_path, "demo")?;
    // The configured port, or any free one when it is taken.
    let listener = match tokio::net::TcpListener::bind(("127.0.0.1", opts.review_port)).await {
        Ok(l) => l,
        Err(e) => {
            println!(
                "(port {} is not available: {e}; using a free port instead)",
                opts.review_port
            );
            tokio::net::TcpListener::bind(("127.0.0.1", 0)).await?
        }
    };
    let review = plimsoll_server::serve_review(&db_path, listener).await?;
    println!();
    println!("Clinician review page: {}", review.url());
    println!("  sign in as `{name}` with password `{password}` (a new one each demo run)");
    println!("  {}", crate::device_report::CAUTION);
    if opts.serve {
        println!("Serving the review page until interrupted (Ctrl-C).");
        tokio::signal::ctrl_c().await?;
    } else {
        println!(
            "(Run the demo with --serve to keep the page open; it closes when the demo exits.)"
        );
    }
    review.shutdown().await?;
    Ok(())
}

/// Indices of the rounds to print: the first five, then roughly doubling
/// steps, and always the last.
fn convergence_rows(n: usize) -> Vec<usize> {
    let mut rows: Vec<usize> = (0..n.min(5)).collect();
    let mut next = 9;
    while next < n {
        rows.push(next);
        next = next * 2 + 1;
    }
    if n > 0 && rows.last() != Some(&(n - 1)) {
        rows.push(n - 1);
    }
    rows
}

#[cfg(test)]
mod tests {
    use super::convergence_rows;

    #[test]
    fn convergence_rows_keep_first_and_last() {
        assert_eq!(convergence_rows(3), vec![0, 1, 2]);
        assert_eq!(convergence_rows(80), vec![0, 1, 2, 3, 4, 9, 19, 39, 79]);
    }
}
