//! `plimsoll evaluate`: read a cohort in the shared format, learn the shared prior by real
//! federated rounds over loopback gRPC (or load a `prior.json`), evaluate the four methods and
//! write `evaluation.csv`, `evaluation.json`, `evaluation.svg` and `prior.json`.
//!
//! The prior is learned on the cohort being evaluated, each device training only on its own
//! data, as a pilot would run it (a run-in during which the prior is learned, then detection).
//! To evaluate on participants the prior never saw, learn it on another cohort and pass its
//! `prior.json` with `--prior`.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use indicatif::{ProgressBar, ProgressStyle};
use plimsoll_server::{LocalTraining, Optimizer, StudyConfig};

use super::prior_file::{read_prior_file, write_prior_file};
use super::report::{EvaluationReport, render_svg, write_csv, write_json, write_matched_csv};
use super::run::{EvaluationSettings, evaluate_cohort};
use crate::client::MIN_DAYS_TO_ENROLL;
use crate::cohort::{BadRowPolicy, Cohort, read_cohort};
use crate::demo::{cohort_signals, initial_layouts, run_federated};
use crate::detect::calibration::shared_prior_filters;
use crate::prior::PriorParams;
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
}

/// Paths and timings of a finished evaluation.
#[derive(Debug)]
pub struct EvaluationOutcome {
    pub report: EvaluationReport,
    pub csv: PathBuf,
    pub matched_csv: PathBuf,
    pub json: PathBuf,
    pub svg: PathBuf,
    pub prior: PathBuf,
    /// Input problems the reader quarantined, as printable lines.
    pub issues: Vec<String>,
    pub training: Duration,
    pub detection: Duration,
}

/// Runs the whole command (see the module docs).
///
/// # Errors
/// An unreadable cohort, no participant able to enrol (when learning), a bad `--prior` file,
/// an evaluation error, or a failed write; each with context.
pub async fn run_evaluation(opts: &EvaluateOptions) -> anyhow::Result<EvaluationOutcome> {
    let cohort = read_cohort(&opts.cohort_dir, BadRowPolicy::Quarantine)
        .with_context(|| format!("reading the cohort in {}", opts.cohort_dir.display()))?;
    if cohort.participants.is_empty() {
        bail!("{}: no participant in daily.csv", opts.cohort_dir.display());
    }
    let issues: Vec<String> = cohort.issues.iter().map(ToString::to_string).collect();
    std::fs::create_dir_all(&opts.out_dir)
        .with_context(|| format!("creating {}", opts.out_dir.display()))?;
    let prior_path = opts.out_dir.join("prior.json");

    let t_train = Instant::now();
    let (priors, source) = match &opts.prior {
        Some(path) => {
            let (priors, source) = read_prior_file(path)?;
            (priors, format!("file {} ({source})", path.display()))
        }
        None => {
            let work = opts.out_dir.join("federated");
            learn_prior(&cohort, opts.rounds, opts.screened, &work, opts.progress).await?
        }
    };
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
    let report = evaluate_cohort(&cohort, &name, &priors, &settings, bar.as_ref())?;
    let detection = t_detect.elapsed();
    if let Some(b) = &bar {
        b.finish();
    }

    let csv = opts.out_dir.join("evaluation.csv");
    let json = opts.out_dir.join("evaluation.json");
    let matched_csv = opts.out_dir.join("evaluation-matched.csv");
    write_matched_csv(&report, &matched_csv)
        .with_context(|| format!("writing {}", matched_csv.display()))?;
    let svg = opts.out_dir.join("evaluation.svg");
    write_csv(&report, &csv).with_context(|| format!("writing {}", csv.display()))?;
    write_json(&report, &json).with_context(|| format!("writing {}", json.display()))?;
    std::fs::write(&svg, render_svg(&report))
        .with_context(|| format!("writing {}", svg.display()))?;
    Ok(EvaluationOutcome {
        report,
        csv,
        matched_csv,
        json,
        svg,
        prior: prior_path,
        issues,
        training,
        detection,
    })
}

/// Learns the shared prior with the real federated path ([`run_federated`]: an aggregator
/// and one device per participant over loopback gRPC, each training on its own data only),
/// with the demo's local training (2 plain-SGD steps of size 1 per round on the full series),
/// all devices per round up to [`MAX_DEVICES_PER_ROUND`] and that many above. Participants
/// without a signal of `MIN_DAYS_TO_ENROLL` observed days cannot enrol and are left out of
/// training (not of the evaluation). The aggregator databases and the devices' outputs go to
/// `work_dir`.
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
    cohort: &Cohort,
    rounds: u32,
    screened: bool,
    work_dir: &Path,
    progress: bool,
) -> anyhow::Result<(Vec<PriorParams>, String)> {
    let participants: Vec<_> = cohort
        .participants
        .iter()
        .filter(|p| {
            p.values
                .values()
                .any(|c| c.iter().flatten().count() >= MIN_DAYS_TO_ENROLL)
        })
        .cloned()
        .collect();
    if participants.is_empty() {
        bail!(
            "no participant has a signal with {MIN_DAYS_TO_ENROLL} observed days, so none can enrol in federated training; pass a prior with --prior"
        );
    }
    let n = participants.len();
    let training_cohort = Cohort {
        participants,
        ..Cohort::default()
    };
    let per_round = n.min(MAX_DEVICES_PER_ROUND);
    let signals = cohort_signals(&training_cohort);
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
        aggregation: Default::default(),
        alert_budget_per_participant_month:
            plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
        review_level: plimsoll_server::packets::FlagLevel::Alert,
    };
    let (first, version) = federated_pass(
        &training_cohort,
        config.clone(),
        &work_dir.join("pass-1"),
        "federated rounds",
        progress,
    )
    .await?;
    let mut source = format!(
        "federated: {rounds} rounds over loopback gRPC on this cohort, {n} devices enrolled, {per_round} per round, prior version {version}"
    );
    if !screened {
        return Ok((first, source));
    }
    let detect = crate::detect::DetectConfig::default();
    let mut removed = 0usize;
    let mut total = 0usize;
    let mut screened_participants = Vec::with_capacity(n);
    for series in &training_cohort.participants {
        let predictors = shared_prior_filters(series, &first)?;
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
    let screened_cohort = Cohort {
        participants: screened_participants,
        ..Cohort::default()
    };
    let more = screened_rounds(rounds);
    let mut second_config = config;
    second_config.study_id = "evaluation-screened".into();
    second_config.rounds = more;
    for layout in &mut second_config.signals {
        if let Some(p) = first.iter().find(|p| p.signal.column() == layout.signal) {
            layout.initial = p.values.to_vec();
        }
    }
    let (second, version) = federated_pass(
        &screened_cohort,
        second_config,
        &work_dir.join("pass-2-screened"),
        "screened rounds",
        progress,
    )
    .await?;
    let lengths: Vec<String> = second
        .iter()
        .filter_map(|p| {
            let before = first.iter().find(|q| q.signal == p.signal)?;
            Some(format!(
                "{} {:.1} -> {:.1}",
                p.signal.column(),
                before.values[3].exp(),
                p.values[3].exp()
            ))
        })
        .collect();
    source.push_str(&format!(
        "; then {more} screened rounds (version {version}) without the {removed} of {total} signal-days ({:.1}%) the guarded baseline protected; trend length (days) first pass -> screened: {}",
        100.0 * removed as f64 / total.max(1) as f64,
        lengths.join(", ")
    ));
    Ok((second, source))
}

/// Rounds of the screened second pass after `rounds` first-pass rounds: a quarter, at least
/// 10 (it starts from the first pass's prior, so it only needs to move, not to converge from
/// the generic start).
pub fn screened_rounds(rounds: u32) -> u32 {
    (rounds / 4).max(10)
}

/// One federated training run of `config` on `cohort` in `work_dir` (a fresh aggregator
/// database); returns the last published prior and its version.
async fn federated_pass(
    cohort: &Cohort,
    config: StudyConfig,
    work_dir: &Path,
    label: &str,
    progress: bool,
) -> anyhow::Result<(Vec<PriorParams>, u32)> {
    std::fs::create_dir_all(work_dir)
        .with_context(|| format!("creating {}", work_dir.display()))?;
    let db_path = work_dir.join("aggregator.db");
    for suffix in ["", "-wal", "-shm"] {
        let p = PathBuf::from(format!("{}{suffix}", db_path.display()));
        if p.exists() {
            std::fs::remove_file(&p)
                .with_context(|| format!("removing the previous database {}", p.display()))?;
        }
    }
    let bar = progress.then(|| {
        ProgressBar::new(u64::from(config.rounds)).with_style(
            ProgressStyle::with_template(&format!(
                "{label} {{bar:40}} {{pos}}/{{len}} [{{elapsed}}]"
            ))
            .expect("static template"),
        )
    });
    let run = run_federated(
        cohort,
        config,
        &db_path,
        &work_dir.join("devices"),
        bar.as_ref(),
    )
    .await?;
    if let Some(b) = &bar {
        b.finish();
    }
    let latest = run.history.last().context("no prior was published")?;
    let mut priors = Vec::with_capacity(latest.params.len());
    for p in &latest.params {
        let signal: Signal = p.signal.parse()?;
        priors.push(
            PriorParams::from_slice(signal, &p.values)
                .with_context(|| format!("published prior of {signal}"))?,
        );
    }
    Ok((priors, latest.version))
}
