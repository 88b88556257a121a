//! `plimsoll evaluate`: read a cohort in the shared format, learn the shared prior by real
//! federated rounds over loopback gRPC (or load a `prior.json`), evaluate the four methods and
//! write `evaluation.csv`, `evaluation.json`, `evaluation.svg` and `prior.json`.
//!
//! The prior is learned on the cohort being evaluated, each device training only on its own
//! data, as a pilot would run it (a run-in during which the prior is learned, then detection).
//! To evaluate on participants the prior never saw, learn it on another cohort and pass its
//! `prior.json` with `--prior`.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use indicatif::{ProgressBar, ProgressStyle};
use plimsoll_server::aggregate::{Aggregation, AggregationRule};
use plimsoll_server::study::{SensorModels, Subgroups};
use plimsoll_server::{LocalTraining, Optimizer, StudyConfig};

use super::prior_file::{read_prior_file, write_prior_file};
use super::report::{
    EvaluationReport, render_svg, write_csv, write_disparity_csv, write_json, write_matched_csv,
};
use super::run::{CohortPriors, EvaluationSettings, evaluate_cohort};
use crate::client::MIN_DAYS_TO_ENROLL;
use crate::cohort::{BadRowPolicy, Cohort, QuarantineFile, read_cohort, write_quarantine_files};
use crate::demo::initial_layouts;
use crate::detect::calibration::shared_prior_filters;
use crate::prior::PriorParams;
use crate::scheduler::{PhaseBars, PoolOptions, run_federated_pooled};
use crate::signal::Signal;

/// Devices per federated round when the cohort has more than this many.
pub const MAX_DEVICES_PER_ROUND: usize = 100;

/// Settings of `plimsoll evaluate`.
#[derive(Debug, Clone)]
pub struct EvaluateOptions {
    pub cohort_dir: PathBuf,
    pub out_dir: PathBuf,
    /// Load this `prior.json` instead of learning the prior.
    pub prior: Option<PathBuf>,
    /// Federated rounds when learning the prior.
    pub rounds: u32,
    /// Follow the federated rounds with the screened second pass ([`learn_prior`]).
    pub screened: bool,
    /// Everything about detection and metrics.
    pub settings: EvaluationSettings,
    /// Show progress bars.
    pub progress: bool,
    /// Abort on the first bad row, or quarantine bad rows (copied to
    /// `out_dir/quarantine/`) and go on.
    pub bad_rows: BadRowPolicy,
    /// Sensor-aware prior, group column, aggregation rule.
    pub groups: PriorOptions,
}

/// Clipping norm of a device's whole update under `--dp-epsilon` (parameter-space units, all
/// signals together). A plain-SGD round moves a device's 7 log-scale numbers per signal by
/// a few tenths at most once training settles, so 0.5 clips early rounds and few later ones.
pub const DP_CLIP_NORM: f64 = 0.5;

/// How the federated prior is learned: subgroups (sensor-aware terms, group column,
/// aggregation rule) and differential privacy.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct PriorOptions {
    /// `participants.csv` column naming each participant's sensor model: learn a
    /// sensor-aware prior (per-model mean and measurement noise).
    pub sensor_column: Option<String>,
    /// The group column devices report at enrolment (fairness-aware aggregation).
    pub group_column: Option<String>,
    /// How each round's updates are combined.
    pub rule: AggregationRule,
    /// User-level differential privacy at this `ε` over the planned rounds (δ = 1/N, clip
    /// [`DP_CLIP_NORM`], the noise multiplier that reaches `ε`; DP-FedAvg, `plimsoll_server::privacy`).
    pub dp_epsilon: Option<f64>,
    /// Run every round with secure aggregation (`plimsoll_server::secure_round`; with
    /// `dp_epsilon`, the devices add the noise).
    pub secure_aggregation: bool,
}

impl PriorOptions {
    /// A short description, e.g. `fedavg, sensor-aware (device_model)`.
    pub fn label(&self) -> String {
        let mut out = self.rule.label();
        if let Some(g) = &self.group_column
            && self.rule.needs_groups()
        {
            out.push_str(&format!(" over {g}"));
        }
        if let Some(c) = &self.sensor_column {
            out.push_str(&format!(", sensor-aware ({c})"));
        }
        if let Some(e) = self.dp_epsilon {
            out.push_str(&format!(", DP ε={e}"));
        }
        if self.secure_aggregation {
            out.push_str(", secure aggregation");
        }
        out
    }
}

/// The distinct values of `column` among `members`, sorted; an error naming the column and
/// the columns the cohort has when no member has a value in it.
fn column_levels(cohort: &Cohort, members: &[usize], column: &str) -> anyhow::Result<Vec<String>> {
    let mut levels: Vec<String> = members
        .iter()
        .filter_map(|&i| {
            cohort
                .groups
                .get(&cohort.participants[i].participant)?
                .get(column)
                .cloned()
        })
        .collect();
    levels.sort();
    levels.dedup();
    if levels.is_empty() {
        let mut known: Vec<&String> = cohort.groups.values().flat_map(|g| g.keys()).collect();
        known.sort();
        known.dedup();
        bail!(
            "participants.csv has no value in column `{column}` for any participant; its group columns are: {}",
            if known.is_empty() {
                "none".to_owned()
            } else {
                known
                    .iter()
                    .map(|k| k.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            }
        );
    }
    Ok(levels)
}

/// Paths and timings of a finished evaluation.
#[derive(Debug)]
pub struct EvaluationOutcome {
    pub report: EvaluationReport,
    pub csv: PathBuf,
    pub matched_csv: PathBuf,
    pub disparity_csv: PathBuf,
    pub json: PathBuf,
    pub svg: PathBuf,
    pub prior: PathBuf,
    /// Input problems the reader quarantined, as printable lines.
    pub issues: Vec<String>,
    /// Where the quarantined rows were copied, per input file.
    pub quarantine: Vec<QuarantineFile>,
    /// Things the run went on despite, e.g. a target kind that no event has.
    pub warnings: Vec<String>,
    /// Reading and checking the cohort.
    pub reading: Duration,
    /// Learning (or loading) the prior: enrolment and rounds of every pass, and what lies
    /// between them.
    pub training: Duration,
    /// Enrolment of every pass (zero with `--prior`).
    pub enrolment: Duration,
    /// Federated rounds of every pass (zero with `--prior`).
    pub rounds: Duration,
    /// Devices dropped from federated training (calls that kept failing), over every pass.
    pub dropped: usize,
    pub detection: Duration,
}

/// One warning per target kind that no event in `events.csv` has, naming
/// the kinds present (without such events every target count is zero).
pub fn target_kind_warnings(cohort: &Cohort, target_kinds: &[String]) -> Vec<String> {
    let present: std::collections::BTreeSet<&str> =
        cohort.events.iter().map(|e| e.kind.as_str()).collect();
    let listed = if present.is_empty() {
        "none (no events.csv, or no event in it)".to_owned()
    } else {
        present.iter().copied().collect::<Vec<_>>().join(", ")
    };
    target_kinds
        .iter()
        .filter(|k| !present.contains(k.as_str()))
        .map(|k| {
            format!(
                "--target-kind {k}: no event of this kind in events.csv, so nothing counts as a detection target for it; kinds present: {listed}"
            )
        })
        .collect()
}

/// Runs the whole command (see the module docs).
///
/// # Errors
/// An unreadable cohort, no participant able to enrol (when learning), a bad `--prior` file,
/// an evaluation error, or a failed write; each with context.
pub async fn run_evaluation(opts: &EvaluateOptions) -> anyhow::Result<EvaluationOutcome> {
    let t_read = Instant::now();
    let spinner = opts.progress.then(|| {
        let s = ProgressBar::new_spinner().with_style(
            ProgressStyle::with_template("reading the cohort {spinner} [{elapsed}]")
                .expect("static template"),
        );
        s.enable_steady_tick(Duration::from_millis(200));
        s
    });
    let cohort = read_cohort(&opts.cohort_dir, opts.bad_rows)
        .with_context(|| format!("reading the cohort in {}", opts.cohort_dir.display()))?;
    if let Some(s) = &spinner {
        s.finish();
    }
    let reading = t_read.elapsed();
    let cohort = Arc::new(cohort);
    if cohort.participants.is_empty() {
        bail!("{}: no participant in daily.csv", opts.cohort_dir.display());
    }
    let issues: Vec<String> = cohort.issues.iter().map(ToString::to_string).collect();
    std::fs::create_dir_all(&opts.out_dir)
        .with_context(|| format!("creating the output folder {}", opts.out_dir.display()))?;
    let quarantine = write_quarantine_files(&cohort.issues, &opts.out_dir)?;
    let warnings = target_kind_warnings(&cohort, &opts.settings.target_kinds);
    let prior_path = opts.out_dir.join("prior.json");

    let t_train = Instant::now();
    let learned = match &opts.prior {
        Some(path) => {
            let (priors, source) = read_prior_file(path)?;
            if let Some(column) = &opts.groups.sensor_column
                && priors.sensor_column.as_deref() != Some(column.as_str())
            {
                bail!(
                    "--sensor-column {column}: the prior file {} holds no sensor terms for that column; learn the prior again with --sensor-column",
                    path.display()
                );
            }
            LearnedPrior {
                priors,
                source: format!("file {} ({source})", path.display()),
                ..LearnedPrior::default()
            }
        }
        None => {
            let work = opts.out_dir.join("federated");
            learn_prior(
                &cohort,
                opts.rounds,
                opts.screened,
                &opts.groups,
                &work,
                opts.progress,
            )
            .await?
        }
    };
    let LearnedPrior {
        priors,
        source,
        enrolment,
        rounds,
        dropped,
    } = learned;
    let training = t_train.elapsed();
    if opts.prior.as_deref() != Some(prior_path.as_path()) {
        write_prior_file(&prior_path, &priors, &source)?;
    }

    let mut settings = opts.settings.clone();
    settings.prior_source = source;
    let name = opts.cohort_dir.file_name().map_or_else(
        || opts.cohort_dir.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    );
    let bar = opts.progress.then(|| {
        ProgressBar::new(cohort.participants.len() as u64).with_style(
            ProgressStyle::with_template(
                "detection (5 methods) {bar:40} {pos}/{len} participants [{elapsed}]",
            )
            .expect("static template"),
        )
    });
    let t_detect = Instant::now();
    // Detection is CPU-bound and runs on its own threads; nothing else runs on the async
    // runtime by now (the aggregator has shut down), so blocking here is harmless.
    let mut report = evaluate_cohort(&cohort, &name, &priors, &settings, bar.as_ref())?;
    if opts.prior.is_none() {
        report.prior_objective = prior_objective(&cohort, &priors.pooled, settings.threads)?;
    }
    let detection = t_detect.elapsed();
    if let Some(b) = &bar {
        b.finish();
    }

    let csv = opts.out_dir.join("evaluation.csv");
    let json = opts.out_dir.join("evaluation.json");
    let matched_csv = opts.out_dir.join("evaluation-matched.csv");
    write_matched_csv(&report, &matched_csv)
        .with_context(|| format!("writing {}", matched_csv.display()))?;
    let disparity_csv = opts.out_dir.join("evaluation-disparity.csv");
    write_disparity_csv(&report, &disparity_csv)
        .with_context(|| format!("writing {}", disparity_csv.display()))?;
    let svg = opts.out_dir.join("evaluation.svg");
    write_csv(&report, &csv).with_context(|| format!("writing {}", csv.display()))?;
    write_json(&report, &json).with_context(|| format!("writing {}", json.display()))?;
    std::fs::write(&svg, render_svg(&report))
        .with_context(|| format!("writing {}", svg.display()))?;
    Ok(EvaluationOutcome {
        report,
        csv,
        matched_csv,
        disparity_csv,
        json,
        svg,
        prior: prior_path,
        issues,
        quarantine,
        warnings,
        reading,
        training,
        enrolment,
        rounds,
        dropped,
        detection,
    })
}

/// Per signal, the pooled per-day objective of `priors` over every participant's training
/// series (what federated training minimises), on `threads` threads.
///
/// # Errors
/// A likelihood that cannot be evaluated.
pub fn prior_objective(
    cohort: &Cohort,
    priors: &[PriorParams],
    threads: usize,
) -> anyhow::Result<std::collections::BTreeMap<String, f64>> {
    let series: Vec<_> = cohort
        .participants
        .iter()
        .map(crate::client::local_training_series)
        .collect();
    let mut out = std::collections::BTreeMap::new();
    for p in priors {
        let of_signal: Vec<&crate::training::LocalSeries> = series
            .iter()
            .flat_map(|s| s.iter().filter(|(sig, _)| *sig == p.signal).map(|(_, l)| l))
            .collect();
        let chunk = of_signal.len().div_ceil(threads.max(1)).max(1);
        let parts: Vec<anyhow::Result<(f64, f64)>> = std::thread::scope(|scope| {
            let handles: Vec<_> = of_signal
                .chunks(chunk)
                .map(|part| {
                    scope.spawn(move || -> anyhow::Result<(f64, f64)> {
                        let mut sum = 0.0;
                        let mut days = 0.0;
                        for s in part.iter().filter(|s| s.n_days() > 0) {
                            sum += crate::training::nlml(&p.values, s)?;
                            days += s.n_days() as f64;
                        }
                        Ok((sum, days))
                    })
                })
                .collect();
            handles
                .into_iter()
                .map(|h| h.join().expect("objective thread panicked"))
                .collect()
        });
        let (mut sum, mut days) = (0.0, 0.0);
        for part in parts {
            let (s, d) = part?;
            sum += s;
            days += d;
        }
        if days > 0.0 {
            out.insert(p.signal.column().to_owned(), sum / days);
        }
    }
    Ok(out)
}

/// A learned (or loaded) prior, how it was learned and what it took.
#[derive(Debug, Default)]
pub struct LearnedPrior {
    pub priors: CohortPriors,
    /// How it was learned, in words (the report's prior source line).
    pub source: String,
    pub enrolment: Duration,
    pub rounds: Duration,
    /// Devices dropped over every pass.
    pub dropped: usize,
}

/// Learns the shared prior with the real federated path ([`run_federated_pooled`]: an
/// aggregator over loopback gRPC and one device per participant, each training on its own
/// data only, at most [`PoolOptions::workers`] devices working at once and only the devices
/// selected for a round woken), with the demo's local training (2 plain-SGD steps of size 1
/// per round on the full series), all devices per round up to [`MAX_DEVICES_PER_ROUND`] and
/// that many above. Participants without a signal of `MIN_DAYS_TO_ENROLL` observed days
/// cannot enrol and are left out of training (not of the evaluation). A device whose calls
/// keep failing is dropped and counted in the source line. The aggregator databases go to
/// `work_dir`; devices write nothing (detection and its calibration are computed in process
/// by the evaluation).
///
/// With `screened`, a second pass follows (the robust prior of `docs/evaluation.md`): each
/// device scores its own days under the first pass's prior with the detector's guarded
/// baseline ([`crate::detect`], identity correlation), leaves out the signal-days that
/// baseline protected (departures in the alerting direction scoring `protect_score` or more,
/// and single residuals beyond `clip_z`), and training continues from the first pass's prior
/// for [`screened_rounds`] more rounds on what is left. Illness episodes and artifacts then
/// shape the prior less (they otherwise shorten its trend length, so the one-step forecast
/// follows a departure). Returns the last published prior and a description of how it was
/// learned, with the trend lengths before and after the second pass.
///
/// # Errors
/// No participant can enrol, or a federated run fails.
pub async fn learn_prior(
    cohort: &Arc<Cohort>,
    rounds: u32,
    screened: bool,
    groups: &PriorOptions,
    work_dir: &Path,
    progress: bool,
) -> anyhow::Result<LearnedPrior> {
    let members: Vec<usize> = cohort
        .participants
        .iter()
        .enumerate()
        .filter(|(_, p)| {
            p.values
                .values()
                .any(|c| c.iter().flatten().count() >= MIN_DAYS_TO_ENROLL)
        })
        .map(|(i, _)| i)
        .collect();
    if members.is_empty() {
        bail!(
            "no participant has a signal with {MIN_DAYS_TO_ENROLL} observed days, so none can enrol in federated training; pass a prior with --prior"
        );
    }
    if screened && groups.dp_epsilon.is_some() {
        bail!(
            "--screened-prior with --dp-epsilon: the second pass would spend privacy the first pass's budget does not count; use one of them"
        );
    }
    let n = members.len();
    let per_round = n.min(MAX_DEVICES_PER_ROUND);
    let signals = {
        let mut found: Vec<Signal> = members
            .iter()
            .flat_map(|&i| cohort.participants[i].signals())
            .collect();
        found.sort_unstable();
        found.dedup();
        found
    };
    let config = StudyConfig {
        study_id: "evaluation".into(),
        title: "Shared prior for plimsoll evaluate".into(),
        signals: initial_layouts(&signals),
        rounds,
        training: LocalTraining {
            optimizer: Optimizer::Sgd,
            local_steps: 2,
            learning_rate: 1.0,
            window_days: 0,
            hyperprior_weight_per_day: 0.0,
        },
        fraction_per_round: per_round as f64 / n as f64,
        min_quorum: (per_round as u32 / 2).max(1),
        start_when_enrolled: n as u32,
        round_deadline_ms: 120_000,
        selection_seed: 7,
        aggregation: Aggregation {
            rule: groups.rule,
            clip_norm: None,
        },
        secure_aggregation: groups
            .secure_aggregation
            .then(plimsoll_server::study::SecureAggregation::default),
        alert_direction: None,
        alert_budget_per_participant_month:
            plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
        review_level: plimsoll_server::packets::FlagLevel::Alert,
        sensor_models: groups
            .sensor_column
            .as_ref()
            .map(|column| -> anyhow::Result<SensorModels> {
                Ok(SensorModels {
                    models: column_levels(cohort, &members, column).context("--sensor-column")?,
                    params: plimsoll_server::study::DEFAULT_SENSOR_PARAMS
                        .iter()
                        .map(|s| (*s).to_owned())
                        .collect(),
                    min_devices: plimsoll_server::study::DEFAULT_MIN_DEVICES_PER_MODEL,
                    column: Some(column.clone()),
                })
            })
            .transpose()?,
        subgroups: groups
            .group_column
            .as_ref()
            .map(|column| -> anyhow::Result<Subgroups> {
                Ok(Subgroups {
                    column: column.clone(),
                    levels: column_levels(cohort, &members, column).context("--group-column")?,
                    calibrate_per_group: false,
                    min_devices_per_group: plimsoll_server::study::DEFAULT_MIN_DEVICES_PER_GROUP,
                })
            })
            .transpose()?,
        dp: groups
            .dp_epsilon
            .map(|target| {
                plimsoll_server::privacy::DpSettings::for_target(
                    target,
                    per_round as f64 / n as f64,
                    rounds,
                    1.0 / n as f64,
                    DP_CLIP_NORM,
                )
                .map_err(|e| anyhow::anyhow!("--dp-epsilon {target}: {e}"))
            })
            .transpose()?,
    };
    config
        .validate()
        .map_err(|e| anyhow::anyhow!("federated training settings: {e}"))?;
    let mut pool = PoolOptions::default();
    if groups.secure_aggregation {
        // Every selected device must stay at work through a secure round's phases: room
        // for twice the expected selection (Poisson selection under differential privacy
        // varies around it).
        pool.workers = pool.workers.max(2 * per_round);
    }
    let first_pass = federated_pass(
        cohort,
        &members,
        config.clone(),
        &pool,
        &work_dir.join("pass-1"),
        "",
        progress,
    )
    .await?;
    let first = first_pass.priors;
    let mut learned = LearnedPrior {
        priors: CohortPriors::default(),
        source: format!(
            "federated: {rounds} rounds over loopback gRPC on this cohort ({}), {} devices enrolled, {per_round} per round, prior version {}{}; {} devices at a time over {} connections; {} devices dropped",
            groups.label(),
            first_pass.enrolled,
            first_pass.version,
            if first.by_sensor.is_empty() {
                String::new()
            } else {
                format!(
                    ", own terms for sensor models {}",
                    first
                        .by_sensor
                        .keys()
                        .cloned()
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            },
            pool.workers,
            pool.connections,
            first_pass.dropped
        ),
        enrolment: first_pass.enrolment,
        rounds: first_pass.rounds,
        dropped: first_pass.dropped,
    };
    if let Some(dp) = &config.dp {
        learned.source.push_str(&format!(
            "; differential privacy: ε {:.2} spent of {} after {} rounds (δ = 1/{n}, noise multiplier {:.3}, clipping norm {})",
            config.epsilon_spent(config.round_limit()).unwrap_or(0.0),
            dp.epsilon_budget,
            config.round_limit(),
            dp.noise_multiplier,
            dp.clip_norm
        ));
    }
    if !screened {
        learned.priors = first;
        return Ok(learned);
    }
    let detect = crate::detect::DetectConfig::default();
    let mut removed = 0usize;
    let mut total = 0usize;
    let mut screened_participants = Vec::with_capacity(n);
    for &i in &members {
        let series = &cohort.participants[i];
        let predictors = shared_prior_filters(series, &first.pooled)?;
        let scores = crate::detect::score_participant(
            series,
            predictors,
            &crate::detect::joint::Correlation::identity(),
            &detect,
        )?;
        let (kept, n_removed) = crate::detect::without_protected_days(series, &scores);
        removed += n_removed;
        total += scores.signal_days.len();
        screened_participants.push(kept);
    }
    let screened_cohort = Arc::new(Cohort {
        participants: screened_participants,
        ..Cohort::default()
    });
    let more = screened_rounds(rounds);
    let mut second_config = config;
    second_config.study_id = "evaluation-screened".into();
    second_config.rounds = more;
    for layout in &mut second_config.signals {
        if let Some(p) = first
            .pooled
            .iter()
            .find(|p| p.signal.column() == layout.signal)
        {
            layout.initial = p.values.to_vec();
        }
    }
    let all: Vec<usize> = (0..screened_cohort.participants.len()).collect();
    let second_pass = federated_pass(
        &screened_cohort,
        &all,
        second_config,
        &pool,
        &work_dir.join("pass-2-screened"),
        "screened ",
        progress,
    )
    .await?;
    let second = second_pass.priors;
    let lengths: Vec<String> = second
        .pooled
        .iter()
        .filter_map(|p| {
            let before = first.pooled.iter().find(|q| q.signal == p.signal)?;
            Some(format!(
                "{} {:.1} -> {:.1}",
                p.signal.column(),
                before.values[3].exp(),
                p.values[3].exp()
            ))
        })
        .collect();
    learned.source.push_str(&format!(
        "; then {more} screened rounds (version {}, {} devices dropped) without the {removed} of {total} signal-days ({:.1}%) the guarded baseline protected; trend length (days) first pass -> screened: {}",
        second_pass.version,
        second_pass.dropped,
        100.0 * removed as f64 / total.max(1) as f64,
        lengths.join(", ")
    ));
    learned.enrolment += second_pass.enrolment;
    learned.rounds += second_pass.rounds;
    learned.dropped += second_pass.dropped;
    learned.priors = second;
    Ok(learned)
}

/// Rounds of the screened second pass after `rounds` first-pass rounds: a quarter, at least
/// 10 (it starts from the first pass's prior, so it only needs to move, not to converge from
/// the generic start).
pub fn screened_rounds(rounds: u32) -> u32 {
    (rounds / 4).max(10)
}

/// What one federated pass gave.
struct Pass {
    priors: CohortPriors,
    version: u32,
    enrolled: usize,
    dropped: usize,
    enrolment: Duration,
    rounds: Duration,
}

/// One federated training run of `config` on the participants `members` of `cohort` in
/// `work_dir` (a fresh aggregator database), with an enrolment and a rounds progress bar
/// (labels prefixed by `label`); returns the last published prior and its version.
async fn federated_pass(
    cohort: &Arc<Cohort>,
    members: &[usize],
    config: StudyConfig,
    pool: &PoolOptions,
    work_dir: &Path,
    label: &str,
    progress: bool,
) -> anyhow::Result<Pass> {
    std::fs::create_dir_all(work_dir)
        .with_context(|| format!("creating {}", work_dir.display()))?;
    let sensor_column = config.sensor_models.as_ref().and_then(|m| m.column.clone());
    let db_path = work_dir.join("aggregator.db");
    for suffix in ["", "-wal", "-shm"] {
        let p = PathBuf::from(format!("{}{suffix}", db_path.display()));
        if p.exists() {
            std::fs::remove_file(&p)
                .with_context(|| format!("removing the previous database {}", p.display()))?;
        }
    }
    let bar = |len: u64, what: &str| {
        progress.then(|| {
            ProgressBar::new(len).with_style(
                ProgressStyle::with_template(&format!(
                    "{label}{what} {{bar:40}} {{pos}}/{{len}} [{{elapsed}}]"
                ))
                .expect("static template"),
            )
        })
    };
    let bars = PhaseBars {
        enrolment: bar(members.len() as u64, "enrolment (devices)"),
        rounds: bar(u64::from(config.rounds), "federated rounds"),
    };
    let run = run_federated_pooled(cohort, members, config, &db_path, pool, &bars).await?;
    for d in run.dropped.iter().take(5) {
        tracing::warn!(
            "device of participant {} dropped from federated training: {}",
            d.participant,
            d.reason
        );
    }
    let latest = run.history.last().context("no prior was published")?;
    let parse = |params: &[plimsoll_server::study::SignalParams], what: &str| {
        let mut priors = Vec::with_capacity(params.len());
        for p in params {
            let signal: Signal = p.signal.parse()?;
            priors.push(
                PriorParams::from_slice(signal, &p.values)
                    .with_context(|| format!("published {what}prior of {signal}"))?,
            );
        }
        anyhow::Ok(priors)
    };
    let mut priors = CohortPriors {
        pooled: parse(&latest.params, "")?,
        sensor_column: sensor_column.clone(),
        by_sensor: Default::default(),
    };
    let models: std::collections::BTreeSet<&str> = latest
        .sensor_terms
        .iter()
        .map(|t| t.sensor_model.as_str())
        .collect();
    for model in models {
        priors.by_sensor.insert(
            model.to_owned(),
            parse(
                &latest.params_for(Some(model)),
                &format!("sensor model {model}'s "),
            )?,
        );
    }
    Ok(Pass {
        priors,
        version: latest.version,
        enrolled: run.enrolled,
        dropped: run.dropped.len(),
        enrolment: run.enrolment,
        rounds: run.rounds,
    })
}
