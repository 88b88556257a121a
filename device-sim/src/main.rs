//! `plimsoll`: the device-side command line (demo, cohort simulation, evaluation).

use std::path::PathBuf;

use anyhow::Context;
use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};
use plimsoll_device::client::{AggregatorAddress, FlagSharing};
use plimsoll_device::cohort::{
    BadRowPolicy, Scenario, SimulateOptions, SimulationSummary, simulate_to_dir,
};
use plimsoll_device::demo::{DemoOptions, initial_layouts, run_demo};
use plimsoll_device::device_report::{CAUTION, counted};
use plimsoll_device::evaluate::command::{EvaluateOptions, PriorOptions, run_evaluation};
use plimsoll_device::evaluate::report::render_table;
use plimsoll_device::evaluate::run::{
    DEFAULT_BUDGET_PER_MONTH, DEFAULT_LOCAL_FIT_DAYS, DEFAULT_TARGET_KIND, EvaluationSettings,
};
use plimsoll_device::flags::FlagLevel;
use plimsoll_device::omh_import::{ImportOptions, ImportReport, import_omh};
use plimsoll_device::participate::{ParticipateOptions, run_participate};
use plimsoll_device::signal::Signal;
use plimsoll_server::aggregate::AggregationRule;
use plimsoll_server::{LocalTraining, StudyConfig};

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
        /// Output folder: must be empty or not exist, unless --force.
        #[arg(long, default_value = "out/cohort")]
        out: PathBuf,
        /// Write into a folder that already holds files (a cohort there is
        /// overwritten).
        #[arg(long)]
        force: bool,
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
        /// Scenario file (TOML); default: the built-in copy of demo-data/quick.toml.
        #[arg(long)]
        scenario: Option<PathBuf>,
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
        /// Keep serving the clinician review page after the report, until Ctrl-C.
        #[arg(long)]
        serve: bool,
        /// Loopback port for the review page (0 picks a free port).
        #[arg(long, default_value_t = 8080)]
        review_port: u16,
        /// Train the prior with user-level differential privacy (DP-FedAvg) at this ε over
        /// the rounds (δ = 1/participants; the noise multiplier is chosen to reach it).
        #[arg(long)]
        dp_epsilon: Option<f64>,
        /// Run each round and the detector's calibration with secure aggregation: the
        /// aggregator learns only sums (pairwise masks with Shamir-shared keys; a round
        /// survives a third of its devices dropping). With --dp-epsilon the devices add the
        /// noise themselves (distributed discrete Gaussian).
        #[arg(long)]
        secure_aggregation: bool,
        /// What a bad input row does: `quarantine` keeps the good rows, reports every bad one
        /// and copies the bad rows to <out>/quarantine/; `abort` stops at the first.
        #[arg(long, value_enum, default_value_t = OnBadRow::Quarantine)]
        on_bad_row: OnBadRow,
    },
    /// Write a study configuration for `plimsoll-aggregator create-study`:
    /// the shared prior's parameter layout and starting values for the
    /// chosen signals, with plain-SGD local training.
    StudyConfig {
        /// Study identifier, `[A-Za-z0-9_-]{1,64}`.
        #[arg(long)]
        study: String,
        /// Human-readable title.
        #[arg(long, default_value = "Remote monitoring pilot")]
        title: String,
        /// Signal column to learn a prior for (repeatable; default: all six).
        #[arg(long = "signal")]
        signals: Vec<String>,
        /// Federated rounds.
        #[arg(long, default_value_t = 80)]
        rounds: u32,
        /// Fewest submissions for a round to be aggregated; also the number
        /// of enrolled devices that starts round 1.
        #[arg(long, default_value_t = 2)]
        min_quorum: u32,
        /// How long a round stays open, in minutes.
        #[arg(long, default_value_t = 60)]
        round_minutes: u32,
        /// False-alarm budget of the detector: Alert episodes per
        /// participant-month on the study's own data (Watch gets 3×).
        #[arg(long, value_parser = parse_budget, default_value_t = DEFAULT_BUDGET_PER_MONTH)]
        false_alarm_budget: f64,
        /// Lowest episode level devices send for clinician review (`alert`:
        /// Alert episodes only; `watch`: Watch and Alert).
        #[arg(long, value_enum, default_value_t = AlarmLevel::Alert)]
        review_level: AlarmLevel,
        /// The alerting direction, one `COLUMN=WEIGHT` per signal (repeatable; a signal not
        /// given has weight 0), e.g. `--alert-direction resting_hr_bpm=1 --alert-direction
        /// hrv_rmssd_ms=-1`. Default: acute illness (resting HR, skin temperature,
        /// respiratory rate and sleep up; HRV and steps down).
        #[arg(long = "alert-direction", value_parser = parse_direction)]
        alert_direction: Vec<(String, f64)>,
        /// A sensor model devices may declare (repeatable): the prior then keeps each
        /// model's mean offset and measurement noise, pooled for a model with fewer than
        /// 10 enrolled devices.
        #[arg(long = "sensor-model")]
        sensor_models: Vec<String>,
        /// A participant group column devices report at enrolment, e.g. age_band.
        #[arg(long, requires = "group_levels")]
        group_column: Option<String>,
        /// A level of --group-column (repeatable).
        #[arg(long = "group-level", requires = "group_column")]
        group_levels: Vec<String>,
        /// Calibrate the detector's thresholds per level of --group-column (a level with
        /// fewer than 10 submitting devices uses the whole study's).
        #[arg(long, requires = "group_column")]
        calibrate_per_group: bool,
        /// How each round's updates are combined: `fedavg`, `group-rank:λ` (over
        /// --group-column) or `q-fedavg:q`.
        #[arg(long, value_parser = parse_rule, default_value = "fedavg")]
        aggregation: AggregationRule,
        /// Train with user-level differential privacy (DP-FedAvg) within this ε over the
        /// rounds: the noise multiplier is chosen to reach it (every device selected each
        /// round, clipping norm 0.5).
        #[arg(long, requires = "dp_delta")]
        dp_epsilon: Option<f64>,
        /// δ of the privacy statement, e.g. 1/(expected participants).
        #[arg(long, requires = "dp_epsilon")]
        dp_delta: Option<f64>,
        /// Run each round and the detector's calibration with secure aggregation (FedAvg
        /// only; no sensor models): the aggregator learns only sums. With --dp-epsilon the
        /// devices add the noise themselves (distributed discrete Gaussian).
        #[arg(long)]
        secure_aggregation: bool,
        /// How long each secure-aggregation phase after the first waits for the devices
        /// still expected, in seconds.
        #[arg(long, default_value_t = 60, requires = "secure_aggregation")]
        secure_phase_seconds: u32,
        /// Output file (never overwritten).
        #[arg(long, default_value = "study.json")]
        out: PathBuf,
    },
    /// Take part in a study as one participant's device: enrol with an
    /// aggregator elsewhere, train through its rounds, then compute the
    /// personalised posterior, prospective bands and flags on this machine.
    /// The study's enrollment code is read from PLIMSOLL_ENROLLMENT_CODE, or
    /// else from the first line of standard input.
    Participate {
        /// Aggregator address, e.g. https://agg.pilot.internal:50051
        /// (http:// only on loopback).
        #[arg(long)]
        aggregator: String,
        /// CA certificate (PEM) the aggregator's certificate must chain to,
        /// e.g. the ca.pem of `plimsoll-aggregator dev-certificate`.
        #[arg(long)]
        ca: Option<PathBuf>,
        /// Study identifier.
        #[arg(long)]
        study: String,
        /// Participant label; selects the participant's rows in --data.
        #[arg(long)]
        participant: String,
        /// The participant's daily measures (daily.csv, shared cohort format).
        #[arg(long)]
        data: PathBuf,
        /// Output folder (the device's secret and its local outputs).
        #[arg(long, default_value = "out/device")]
        out: PathBuf,
        /// The participant consented to share flag packets with the study's
        /// clinical reviewers (recorded at enrolment; default: nothing shared).
        #[arg(long)]
        share_flags: bool,
        /// The device's sensor model, when the study lists models (`GetStudy` names them).
        #[arg(long)]
        sensor_model: Option<String>,
        /// The participant's level of the study's group column, when it has one.
        #[arg(long)]
        group_label: Option<String>,
        /// Allow http:// to a host that is not loopback.
        #[arg(long)]
        insecure_plaintext: bool,
        /// What a bad input row does: `quarantine` keeps the good rows, reports every bad one
        /// and copies the bad rows to <out>/quarantine/; `abort` stops at the first.
        #[arg(long, value_enum, default_value_t = OnBadRow::Quarantine)]
        on_bad_row: OnBadRow,
    },
    /// Compare detection methods on a cohort in the shared format (daily.csv, optional
    /// participants.csv and events.csv): federated prior + personal posterior, the same GP fit
    /// on each participant alone, one population model, and a rolling z-score. Writes
    /// evaluation.csv, evaluation.json, evaluation.svg and prior.json (see docs/evaluation.md).
    Evaluate {
        /// Cohort folder.
        cohort: PathBuf,
        /// Output folder.
        #[arg(long, default_value = "out/evaluation")]
        out: PathBuf,
        /// Use this prior.json instead of learning the prior by federated rounds.
        #[arg(long)]
        prior: Option<PathBuf>,
        /// Federated rounds when learning the prior (all devices per round up to 100, else 100).
        #[arg(long, default_value_t = 80)]
        rounds: u32,
        /// After the federated rounds, run a screened second pass that leaves out the days the
        /// detector's baseline protected (illness episodes, artifacts); see docs/evaluation.md.
        #[arg(long)]
        screened_prior: bool,
        /// Event kind counted as a detection target (repeatable); alarms inside other events
        /// are false alarms.
        #[arg(long = "target-kind", default_value = DEFAULT_TARGET_KIND)]
        target_kinds: Vec<String>,
        /// Alert budget: alarm episodes per participant-month the Alert threshold is
        /// calibrated to on the cohort's own scores (Watch: 3× that).
        #[arg(long, value_parser = parse_budget, default_value_t = DEFAULT_BUDGET_PER_MONTH)]
        false_alarm_budget: f64,
        /// Observed days per signal the local-only method fits its hyperparameters on (also
        /// its cold start).
        #[arg(long, default_value_t = DEFAULT_LOCAL_FIT_DAYS)]
        local_fit_days: usize,
        /// Lowest flag level that counts as an alarm.
        #[arg(long, value_enum, default_value_t = AlarmLevel::Alert)]
        alarm_level: AlarmLevel,
        /// Detector settings (TOML; any field of the detector's settings, the rest default:
        /// guard_days, windows, min_baseline_days, scale_prior_days, clip_z, protect_score,
        /// max_protected_days, merge_gap_days, max_episode_days, pattern.weights; see
        /// docs/evaluation.md).
        #[arg(long)]
        detector: Option<PathBuf>,
        /// What a bad input row does: `quarantine` keeps the good rows, reports every bad one
        /// and copies the bad rows to <out>/quarantine/; `abort` stops at the first.
        #[arg(long, value_enum, default_value_t = OnBadRow::Quarantine)]
        on_bad_row: OnBadRow,
        /// participants.csv column naming each participant's sensor model: learn a
        /// sensor-aware prior (per-model mean offset and measurement noise, pooled for a
        /// model with fewer than 10 devices).
        #[arg(long)]
        sensor_column: Option<String>,
        /// participants.csv column whose level each device reports at enrolment (used by
        /// --aggregation group-rank:λ).
        #[arg(long)]
        group_column: Option<String>,
        /// How each round's updates are combined: `fedavg`, `group-rank:λ` (group-loss-ranked
        /// reweighting over --group-column) or `q-fedavg:q`.
        #[arg(long, value_parser = parse_rule, default_value = "fedavg")]
        aggregation: AggregationRule,
        /// Calibrate each method's alarm threshold per level of this participants.csv column
        /// (levels with fewer than 10 participants use the whole cohort's).
        #[arg(long)]
        calibrate_per_group: Option<String>,
        /// Learn the prior once per aggregation setting (FedAvg; with --sensor-column the
        /// sensor-aware prior; group-rank with --group-column; q-FedAvg) and compare the
        /// federated method's sensitivity and subgroup disparities; writes
        /// evaluation-aggregation.csv and .json instead of the usual outputs.
        #[arg(long)]
        compare_aggregation: bool,
        /// Learn the prior with user-level differential privacy (DP-FedAvg) at this ε over
        /// the rounds (δ = 1/participants, clipping norm 0.5; the noise multiplier is chosen to
        /// reach it).
        #[arg(long)]
        dp_epsilon: Option<f64>,
        /// Learn the prior with secure aggregation in every round (with --dp-epsilon, the
        /// devices add the noise themselves).
        #[arg(long, conflicts_with = "screened_prior")]
        secure_aggregation: bool,
    },
    /// Convert one participant's open mHealth (IEEE 1752.1) JSON data points into daily.csv.
    ///
    /// Reads heart-rate (at rest only; others are skipped), heart-rate-variability (RMSSD;
    /// others are skipped), sleep-duration, body-temperature, step-count and respiratory-rate
    /// data points. A day is the date of the timestamp in its own offset; sleep, HRV, skin
    /// temperature and respiratory rate belong to the day of waking (the interval's end). Steps
    /// and sleep are summed per day, the rest averaged. skin_temp_delta_c is each night's mean
    /// temperature minus the reference: the median of the participant's nightly temperatures
    /// over all imported nights. Refused data points are listed with file, position ([index]
    /// in an array, :line in newline-delimited JSON), JSON pointer and reason; good points are
    /// kept. Exits non-zero when nothing usable was read or an input cannot be read. See
    /// docs/data-format.md.
    ImportOmh {
        /// Files or folders of data points (a folder: every *.json in it, in name order). A
        /// file holds one data point, a JSON array of them, or one per line.
        #[arg(required = true)]
        inputs: Vec<PathBuf>,
        /// Participant label, [A-Za-z0-9_-]{1,64}; default: the data points' header.user_id
        /// (refused when neither is known or they disagree).
        #[arg(long)]
        participant: Option<String>,
        /// The daily.csv to write.
        #[arg(long, default_value = "daily.csv")]
        out: PathBuf,
        /// Replace --out if it exists.
        #[arg(long)]
        force: bool,
    },
}

/// `--on-bad-row`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
enum OnBadRow {
    /// Keep the good rows, report and quarantine the bad ones.
    Quarantine,
    /// Stop at the first bad row, naming file, line, column and reason.
    Abort,
}

impl From<OnBadRow> for BadRowPolicy {
    fn from(v: OnBadRow) -> BadRowPolicy {
        match v {
            OnBadRow::Quarantine => BadRowPolicy::Quarantine,
            OnBadRow::Abort => BadRowPolicy::Abort,
        }
    }
}

/// `--alarm-level`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
enum AlarmLevel {
    /// Alert flags only.
    Alert,
    /// Watch and Alert flags.
    Watch,
}

/// Environment variable the study's enrollment code may be read from.
const ENROLLMENT_CODE_ENV: &str = "PLIMSOLL_ENROLLMENT_CODE";

/// The enrollment code from the environment, or else standard input (kept
/// off the command line, where other users could read it).
fn read_enrollment_code() -> anyhow::Result<String> {
    if let Ok(code) = std::env::var(ENROLLMENT_CODE_ENV) {
        return Ok(code);
    }
    eprintln!("enrollment code (one line on standard input):");
    let mut line = String::new();
    std::io::stdin()
        .read_line(&mut line)
        .context("reading the enrollment code from standard input")?;
    let code = line.trim().to_owned();
    if code.is_empty() {
        anyhow::bail!(
            "no enrollment code: set {ENROLLMENT_CODE_ENV} or write it on standard input"
        );
    }
    Ok(code)
}

/// Parses a positive number of episodes per participant-month, e.g. `0.3`.
/// `--aggregation`: `fedavg`, `group-rank:λ` or `q-fedavg:q`.
/// `COLUMN=WEIGHT` of `--alert-direction`.
fn parse_direction(text: &str) -> Result<(String, f64), String> {
    let (column, weight) = text
        .split_once('=')
        .ok_or_else(|| format!("`{text}`: expected COLUMN=WEIGHT, e.g. resting_hr_bpm=1"))?;
    column.parse::<Signal>().map_err(|e| e.to_string())?;
    let weight: f64 = weight
        .parse()
        .map_err(|_| format!("`{weight}`: the weight of {column} is not a number"))?;
    if !weight.is_finite() {
        return Err(format!("the weight of {column} must be finite"));
    }
    Ok((column.to_owned(), weight))
}

fn parse_rule(text: &str) -> Result<AggregationRule, String> {
    let (name, value) = text.split_once(':').unwrap_or((text, ""));
    let number = |what: &str| -> Result<f64, String> {
        value.trim().parse::<f64>().map_err(|e| {
            format!("`{text}`: expected {name}:{what} with a number, e.g. {name}:1 ({e})")
        })
    };
    let rule = match name.trim() {
        "fedavg" if value.is_empty() => AggregationRule::Fedavg,
        "group-rank" => AggregationRule::GroupRank {
            lambda: number("λ")?,
        },
        "q-fedavg" => AggregationRule::QFedavg { q: number("q")? },
        _ => {
            return Err(format!(
                "`{text}`: expected fedavg, group-rank:λ or q-fedavg:q"
            ));
        }
    };
    plimsoll_server::aggregate::Aggregation {
        rule,
        clip_norm: None,
    }
    .validate()?;
    Ok(rule)
}

fn parse_budget(text: &str) -> Result<f64, String> {
    let v: f64 = text.trim().parse().map_err(|e| {
        format!("expected episodes per participant-month such as 0.3, got `{text}`: {e}")
    })?;
    if !(v.is_finite() && v > 0.0) {
        return Err(format!("the budget must be a positive number, got {v}"));
    }
    Ok(v)
}

/// Arguments of `plimsoll evaluate` after parsing.
struct EvaluateArgs {
    cohort: PathBuf,
    out: PathBuf,
    prior: Option<PathBuf>,
    rounds: u32,
    screened_prior: bool,
    target_kinds: Vec<String>,
    false_alarm_budget: f64,
    local_fit_days: usize,
    alarm_level: AlarmLevel,
    detector: Option<PathBuf>,
    on_bad_row: OnBadRow,
    groups: PriorOptions,
    calibrate_per_group: Option<String>,
    compare_aggregation: bool,
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "warn".into()),
        )
        .with_writer(std::io::stderr)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .init();
    match Cli::parse().command {
        Command::StudyConfig {
            study,
            title,
            signals,
            rounds,
            min_quorum,
            round_minutes,
            false_alarm_budget,
            review_level,
            alert_direction,
            sensor_models,
            group_column,
            group_levels,
            calibrate_per_group,
            aggregation,
            dp_epsilon,
            dp_delta,
            secure_aggregation,
            secure_phase_seconds,
            out,
        } => {
            let signals: Vec<Signal> = if signals.is_empty() {
                Signal::ALL.to_vec()
            } else {
                signals
                    .iter()
                    .map(|s| {
                        s.parse::<Signal>()
                            .map_err(|e| anyhow::anyhow!("--signal {s}: {e}"))
                    })
                    .collect::<anyhow::Result<_>>()?
            };
            let config = StudyConfig {
                study_id: study,
                title,
                signals: initial_layouts(&signals),
                rounds,
                training: LocalTraining::default(),
                fraction_per_round: 1.0,
                min_quorum,
                start_when_enrolled: min_quorum,
                round_deadline_ms: u64::from(round_minutes) * 60_000,
                selection_seed: rand::random(),
                aggregation: plimsoll_server::aggregate::Aggregation {
                    rule: aggregation,
                    clip_norm: None,
                },
                alert_budget_per_participant_month: false_alarm_budget,
                review_level: match review_level {
                    AlarmLevel::Alert => plimsoll_server::packets::FlagLevel::Alert,
                    AlarmLevel::Watch => plimsoll_server::packets::FlagLevel::Watch,
                },
                sensor_models: (!sensor_models.is_empty()).then(|| {
                    plimsoll_server::study::SensorModels {
                        models: sensor_models,
                        params: plimsoll_server::study::DEFAULT_SENSOR_PARAMS
                            .iter()
                            .map(|s| (*s).to_owned())
                            .collect(),
                        min_devices: plimsoll_server::study::DEFAULT_MIN_DEVICES_PER_MODEL,
                        column: None,
                    }
                }),
                subgroups: group_column.map(|column| plimsoll_server::study::Subgroups {
                    column,
                    levels: group_levels,
                    calibrate_per_group,
                    min_devices_per_group: plimsoll_server::study::DEFAULT_MIN_DEVICES_PER_GROUP,
                }),
                dp: match (dp_epsilon, dp_delta) {
                    (Some(target), Some(delta)) => Some(
                        plimsoll_server::privacy::DpSettings::for_target(
                            target,
                            1.0,
                            rounds,
                            delta,
                            plimsoll_device::evaluate::command::DP_CLIP_NORM,
                        )
                        .map_err(|e| anyhow::anyhow!("--dp-epsilon {target}: {e}"))?,
                    ),
                    _ => None,
                },
                secure_aggregation: secure_aggregation.then(|| {
                    plimsoll_server::study::SecureAggregation {
                        phase_deadline_ms: u64::from(secure_phase_seconds) * 1000,
                        ..Default::default()
                    }
                }),
                alert_direction: (!alert_direction.is_empty())
                    .then(|| alert_direction.into_iter().collect()),
            };
            config
                .validate()
                .map_err(|e| anyhow::anyhow!("study configuration: {e}"))?;
            let json = serde_json::to_string_pretty(&config)? + "\n";
            std::fs::OpenOptions::new()
                .write(true)
                .create_new(true)
                .open(&out)
                .and_then(|mut f| std::io::Write::write_all(&mut f, json.as_bytes()))
                .with_context(|| {
                    format!(
                        "writing {} (an existing file is never overwritten)",
                        out.display()
                    )
                })?;
            println!(
                "wrote {} ({} signals, {rounds} rounds, quorum {min_quorum})",
                out.display(),
                signals.len()
            );
            Ok(())
        }
        Command::Participate {
            aggregator,
            ca,
            study,
            participant,
            data,
            out,
            share_flags,
            sensor_model,
            group_label,
            insecure_plaintext,
            on_bad_row,
        } => {
            let ca_pem = ca
                .map(|p| std::fs::read(&p).with_context(|| format!("reading {}", p.display())))
                .transpose()?;
            let opts = ParticipateOptions {
                address: AggregatorAddress {
                    url: aggregator,
                    ca_pem,
                    insecure_plaintext,
                },
                study_id: study,
                enrollment_code: read_enrollment_code()?,
                participant,
                data,
                out_dir: out,
                sharing: if share_flags {
                    FlagSharing::Consented
                } else {
                    FlagSharing::Withheld
                },
                sensor_model,
                group_label,
                bad_rows: on_bad_row.into(),
            };
            let report = run_participate(&opts).await?;
            println!(
                "device {} of `{}`: {} rounds trained, prior version {}",
                report.device_id, opts.study_id, report.rounds_trained, report.prior_version
            );
            let c = &report.calibration;
            println!(
                "detector calibrated with {} devices{}: Alert at score {:.1}, Watch at {:.1} ({} Alert episodes per participant-month budget)",
                c.histogram_devices,
                c.histogram_group
                    .as_ref()
                    .map_or(String::new(), |g| format!(" of group {g}")),
                c.alert.threshold,
                c.watch.threshold,
                c.budget_per_month
            );
            println!(
                "alerting in {}",
                plimsoll_device::episode_flags::pattern_text(&c.pattern)
            );
            println!(
                "{} flagged ({}), {} sent for review; outputs in {}",
                counted(report.flags, "episode", "episodes"),
                counted(report.alerts, "Alert", "Alerts"),
                report.packets_sent,
                opts.out_dir.display()
            );
            println!("{CAUTION}");
            Ok(())
        }
        Command::Simulate {
            scenario,
            out,
            seed,
            participants,
            days,
            force,
        } => {
            let parsed = Scenario::from_path(&scenario)?;
            refuse_non_empty(&out, force)?;
            std::fs::create_dir_all(&out)
                .with_context(|| format!("creating the output folder {}", out.display()))?;
            let bar = ProgressBar::new(0).with_style(
                ProgressStyle::with_template(
                    "simulating {bar:40} {pos}/{len} participants [{elapsed}]",
                )
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
            serve,
            review_port,
            on_bad_row,
            dp_epsilon,
            secure_aggregation,
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
                serve,
                review_port,
                bad_rows: on_bad_row.into(),
                dp_epsilon,
                secure_aggregation,
            })
            .await
        }
        Command::Evaluate {
            cohort,
            out,
            prior,
            rounds,
            screened_prior,
            target_kinds,
            false_alarm_budget,
            local_fit_days,
            alarm_level,
            detector,
            on_bad_row,
            sensor_column,
            group_column,
            aggregation,
            calibrate_per_group,
            compare_aggregation,
            dp_epsilon,
            secure_aggregation,
        } => {
            evaluate(EvaluateArgs {
                cohort,
                out,
                prior,
                rounds,
                screened_prior,
                target_kinds,
                false_alarm_budget,
                local_fit_days,
                alarm_level,
                detector,
                on_bad_row,
                groups: PriorOptions {
                    sensor_column,
                    group_column,
                    rule: aggregation,
                    dp_epsilon,
                    secure_aggregation,
                },
                calibrate_per_group,
                compare_aggregation,
            })
            .await
        }
        Command::ImportOmh {
            inputs,
            participant,
            out,
            force,
        } => {
            let report = import_omh(&ImportOptions {
                inputs,
                participant,
                out,
                overwrite: force,
            })?;
            print_import_report(&report);
            if report.written.is_none() {
                anyhow::bail!("nothing usable was read; no daily.csv written");
            }
            Ok(())
        }
    }
}

async fn evaluate(args: EvaluateArgs) -> anyhow::Result<()> {
    let t0 = std::time::Instant::now();
    let mut settings = EvaluationSettings::new("");
    settings.budget_per_month = args.false_alarm_budget;
    settings.target_kinds = args.target_kinds.clone();
    settings.local_fit_days = args.local_fit_days;
    if let Some(path) = &args.detector {
        settings.detect = plimsoll_device::detect::DetectConfig::from_toml_file(path)?;
    }
    settings.alarm_level = match args.alarm_level {
        AlarmLevel::Alert => FlagLevel::Alert,
        AlarmLevel::Watch => FlagLevel::Watch,
    };
    settings.calibrate_column = args.calibrate_per_group.clone();
    if args.groups.rule.needs_groups() && args.groups.group_column.is_none() {
        anyhow::bail!(
            "--aggregation {}: needs --group-column (the participants.csv column whose level each device reports)",
            args.groups.rule.label()
        );
    }
    if args.compare_aggregation {
        return compare(args, settings).await;
    }
    let outcome = run_evaluation(&EvaluateOptions {
        cohort_dir: args.cohort,
        out_dir: args.out,
        prior: args.prior,
        rounds: args.rounds,
        screened: args.screened_prior,
        settings,
        progress: true,
        bad_rows: args.on_bad_row.into(),
        groups: args.groups,
    })
    .await?;
    if !outcome.issues.is_empty() {
        println!("{} input issues (rows quarantined):", outcome.issues.len());
        for issue in outcome.issues.iter().take(20) {
            println!("  {issue}");
        }
        if outcome.issues.len() > 20 {
            println!("  … and {} more", outcome.issues.len() - 20);
        }
    }
    for file in &outcome.quarantine {
        println!("{file}");
    }
    for warning in &outcome.warnings {
        eprintln!("warning: {warning}");
    }
    let report = &outcome.report;
    println!();
    println!(
        "{} participants; targets: {}; alarms: {} level and above",
        report.participants,
        report.target_kinds.join(", "),
        match report.settings.alarm_level {
            FlagLevel::Alert => "alert",
            FlagLevel::Watch => "watch",
        },
    );
    println!("Prior: {}", report.settings.prior_source);
    if !report.prior_objective.is_empty() {
        let parts: Vec<String> = report
            .prior_objective
            .iter()
            .map(|(s, v)| format!("{s} {v:.4}"))
            .collect();
        println!(
            "Pooled objective of the prior on this cohort (nats/day): {}",
            parts.join(", ")
        );
    }
    for m in &report.methods {
        for note in &m.notes {
            println!("{}: {note}", m.method);
        }
    }
    println!();
    print!("{}", render_table(report));
    println!();
    println!("Outputs:");
    println!("  table (CSV):   {}", outcome.csv.display());
    println!("  matched (CSV): {}", outcome.matched_csv.display());
    println!("  disparity (CSV): {}", outcome.disparity_csv.display());
    println!("  report (JSON): {}", outcome.json.display());
    println!("  curves (SVG):  {}", outcome.svg.display());
    println!("  shared prior:  {}", outcome.prior.display());
    if outcome.dropped > 0 {
        println!(
            "Devices dropped from federated training (calls kept failing): {}",
            outcome.dropped
        );
    }
    println!(
        "Reading {:.1} s; prior {:.1} s (enrolment {:.1} s, rounds {:.1} s); detection {:.1} s; total {:.1} s.",
        outcome.reading.as_secs_f64(),
        outcome.training.as_secs_f64(),
        outcome.enrolment.as_secs_f64(),
        outcome.rounds.as_secs_f64(),
        outcome.detection.as_secs_f64(),
        t0.elapsed().as_secs_f64()
    );
    Ok(())
}

/// `plimsoll evaluate --compare-aggregation`.
async fn compare(args: EvaluateArgs, settings: EvaluationSettings) -> anyhow::Result<()> {
    use plimsoll_device::evaluate::compare::{
        compare_aggregation, comparison_settings, render_comparison,
    };
    let t0 = std::time::Instant::now();
    let cohort = plimsoll_device::cohort::read_cohort(&args.cohort, args.on_bad_row.into())
        .with_context(|| format!("reading the cohort in {}", args.cohort.display()))?;
    if !cohort.issues.is_empty() {
        println!(
            "{} input issues (rows quarantined; run without --compare-aggregation to list them)",
            cohort.issues.len()
        );
    }
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("creating the output folder {}", args.out.display()))?;
    let name = args.cohort.file_name().map_or_else(
        || args.cohort.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    );
    let compared = comparison_settings(
        args.groups.sensor_column.as_deref(),
        args.groups.group_column.as_deref(),
    );
    let result = compare_aggregation(
        &std::sync::Arc::new(cohort),
        &name,
        args.rounds,
        &settings,
        &compared,
        &args.out,
        true,
    )
    .await?;
    println!();
    println!("{}", plimsoll_proto::caution::TEXT);
    println!();
    print!("{}", render_comparison(&result));
    println!();
    println!("Outputs:");
    println!("  comparison (CSV):  {}", result.csv.display());
    println!("  comparison (JSON): {}", result.json.display());
    println!("Total {:.1} s.", t0.elapsed().as_secs_f64());
    Ok(())
}

/// Refuses to simulate into a folder that holds anything, unless `force`.
fn refuse_non_empty(out: &std::path::Path, force: bool) -> anyhow::Result<()> {
    let mut entries = match std::fs::read_dir(out) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(()),
        Err(e) => {
            return Err(e).with_context(|| format!("reading the output folder {}", out.display()));
        }
    };
    if !force && entries.next().is_some() {
        anyhow::bail!(
            "{} is not empty; choose an empty or new folder with --out, or pass --force to overwrite the cohort there",
            out.display()
        );
    }
    Ok(())
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

/// Largest number of refused points listed one by one.
const MAX_LISTED_ISSUES: usize = 50;

fn print_import_report(r: &ImportReport) {
    println!(
        "{} read from {}: {} used, {} skipped, {} refused",
        counted(r.points_read, "data point", "data points"),
        counted(r.files, "file", "files"),
        r.points_used,
        r.points_skipped(),
        r.refused.len()
    );
    for (reason, n) in &r.skipped {
        println!("  skipped: {n} × {reason}");
    }
    if !r.refused.is_empty() {
        println!("Refused:");
        for issue in r.refused.iter().take(MAX_LISTED_ISSUES) {
            println!("  {issue}");
        }
        if r.refused.len() > MAX_LISTED_ISSUES {
            println!("  … and {} more", r.refused.len() - MAX_LISTED_ISSUES);
        }
    }
    if let Some((reference, nights)) = r.skin_temp_reference {
        println!(
            "Skin temperature reference: {reference:.2} °C (median of {})",
            counted(nights, "night", "nights")
        );
    }
    if let Some(out) = &r.written {
        let per_signal: Vec<String> = r
            .days_per_signal
            .iter()
            .map(|(signal, n)| format!("{} {n}", signal.column()))
            .collect();
        println!(
            "Wrote {} for participant {}: {} ({})",
            out.display(),
            r.participant,
            counted(r.days_written, "day", "days"),
            per_signal.join(", ")
        );
    }
}
