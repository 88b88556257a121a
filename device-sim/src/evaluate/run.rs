//! Runs every method of [`super::methods`] over a cohort with the detector of
//! [`crate::detect`], calibrates each method's thresholds on its own scores the way a study
//! would (summed per-device episode histograms), sweeps the threshold, and gathers the
//! metrics of [`super::metrics`] and [`super::sweep`] into an [`EvaluationReport`].
//!
//! Every predictor-based method goes through [`score_participant`] with the same
//! [`DetectConfig`] (guard, windows, joint score, protection); only the one-step predictor
//! differs, and the cold start is lengthened where a method needs more days. The correlation
//! `R` of each method is learned from its own residual moments in a first pass (what the
//! federated statistics round does), then every participant is scored again with it.
//! Participants are spread over threads.

use std::collections::{BTreeMap, HashMap};

use anyhow::{Context, bail};
use indicatif::ProgressBar;

use super::methods::{
    Method, PopulationPredictor, ROLLING_MIN_VALUES, ROLLING_SD_FLOOR, ROLLING_WINDOW_VALUES,
    RollingZ, alavi_scores, fit_local,
};
use super::metrics::{Accumulator, ParticipantResult, Period, ScoredDate, ScoredDay, scored_dates};
use super::report::{CAUTION, EvaluationReport, MethodSummary, ReportSettings, SCHEMA};
use super::sweep::{self, Compact, Truth};
use crate::cohort::{Cohort, Event, ParticipantSeries};
use crate::detect::calibration::EpisodeHistogram;
use crate::detect::episodes::group;
use crate::detect::joint::{Correlation, ResidualMoments};
use crate::detect::{DayScore, DetectConfig, ParticipantScores, score_participant};
use crate::flags::FlagLevel;
use crate::prior::PriorParams;
use crate::prospective::{DailyFilter, StateSpacePrior};
use crate::signal::Signal;

/// Default number of observed days per signal that `local_only` fits on.
pub const DEFAULT_LOCAL_FIT_DAYS: usize = 28;

/// Default event kinds counted as detection targets.
pub const DEFAULT_TARGET_KIND: &str = "acute_illness";

/// Default false-alarm budget: Alert episodes per participant-month.
pub const DEFAULT_BUDGET_PER_MONTH: f64 = 0.3;

pub use crate::detect::calibration::WATCH_BUDGET_FACTOR;
pub use crate::detect::joint::CORRELATION_SHRINK_DAYS;

/// How to evaluate.
#[derive(Debug, Clone, PartialEq)]
pub struct EvaluationSettings {
    /// Detector settings shared by every method.
    pub detect: DetectConfig,
    /// Alert budget: episodes per participant-month on the calibration data.
    pub budget_per_month: f64,
    /// Event kinds counted as detection targets.
    pub target_kinds: Vec<String>,
    /// Lowest level that counts as an alarm.
    pub alarm_level: FlagLevel,
    /// Observed days per signal that `local_only` fits on (and its cold start).
    pub local_fit_days: usize,
    /// Worker threads (at least 1).
    pub threads: usize,
    /// Where the shared prior came from, in words (reported).
    pub prior_source: String,
    /// Calibrate each method's alarm threshold per level of this `participants.csv` column
    /// (a level with fewer than [`MIN_PARTICIPANTS_PER_GROUP`] participants uses the whole
    /// cohort's threshold); `None`: one threshold for everyone.
    pub calibrate_column: Option<String>,
}

/// Participants a group needs for a calibration of its own (the aggregator's
/// `subgroups.min_devices_per_group` default).
pub const MIN_PARTICIPANTS_PER_GROUP: usize =
    plimsoll_server::study::DEFAULT_MIN_DEVICES_PER_GROUP as usize;

/// The shared prior of a cohort: pooled, and per sensor model for the models that have
/// terms of their own (a sensor-aware prior).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct CohortPriors {
    pub pooled: Vec<PriorParams>,
    /// The `participants.csv` column naming each participant's sensor model.
    pub sensor_column: Option<String>,
    /// Sensor model → its priors (its own measurement terms).
    pub by_sensor: BTreeMap<String, Vec<PriorParams>>,
}

impl CohortPriors {
    /// A prior without sensor terms.
    pub fn pooled(pooled: Vec<PriorParams>) -> CohortPriors {
        CohortPriors {
            pooled,
            ..CohortPriors::default()
        }
    }

    /// The sensor model `participant` uses terms of, if any.
    pub fn sensor_of<'a>(&self, cohort: &'a Cohort, participant: &str) -> Option<&'a str> {
        let column = self.sensor_column.as_ref()?;
        let model = cohort.groups.get(participant)?.get(column)?;
        self.by_sensor.contains_key(model).then_some(model.as_str())
    }
}

impl EvaluationSettings {
    /// The defaults: [`DetectConfig::default`], [`DEFAULT_BUDGET_PER_MONTH`], target
    /// `acute_illness`, Alert level, 28 fitting days, one thread per core.
    pub fn new(prior_source: &str) -> EvaluationSettings {
        EvaluationSettings {
            detect: DetectConfig::default(),
            budget_per_month: DEFAULT_BUDGET_PER_MONTH,
            target_kinds: vec![DEFAULT_TARGET_KIND.into()],
            alarm_level: FlagLevel::Alert,
            local_fit_days: DEFAULT_LOCAL_FIT_DAYS,
            threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            prior_source: prior_source.into(),
            calibrate_column: None,
        }
    }
}

/// What happened to the `local_only` fits.
#[derive(Debug, Clone, Default)]
struct LocalFitStats {
    fitted: usize,
    not_converged: usize,
    too_few_days: usize,
    failed: usize,
    first_failure: Option<String>,
}

impl LocalFitStats {
    fn merge(&mut self, o: LocalFitStats) {
        self.fitted += o.fitted;
        self.not_converged += o.not_converged;
        self.too_few_days += o.too_few_days;
        self.failed += o.failed;
        if self.first_failure.is_none() {
            self.first_failure = o.first_failure;
        }
    }
}

/// One participant's scores under every method, kept compact.
struct Scored {
    index: usize,
    per_method: Vec<(Vec<Compact>, Vec<ScoredDate>)>,
}

/// Runs `f` over the participants on `threads` threads, in participant order.
fn par_map<T: Send>(
    cohort: &Cohort,
    threads: usize,
    f: impl Fn(usize, &ParticipantSeries) -> anyhow::Result<T> + Sync,
) -> anyhow::Result<Vec<T>> {
    let n_threads = threads.clamp(1, cohort.participants.len().max(1));
    let results: Vec<anyhow::Result<Vec<(usize, T)>>> = std::thread::scope(|scope| {
        let f = &f;
        let handles: Vec<_> = (0..n_threads)
            .map(|thread| {
                scope.spawn(move || -> anyhow::Result<Vec<(usize, T)>> {
                    let mut out = Vec::new();
                    for (i, series) in cohort
                        .participants
                        .iter()
                        .enumerate()
                        .skip(thread)
                        .step_by(n_threads)
                    {
                        out.push((i, f(i, series)?));
                    }
                    Ok(out)
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("evaluation thread panicked"))
            .collect()
    });
    let mut all = Vec::with_capacity(cohort.participants.len());
    for r in results {
        all.extend(r?);
    }
    all.sort_by_key(|(i, _)| *i);
    Ok(all.into_iter().map(|(_, t)| t).collect())
}

/// Evaluates every participant of `cohort` with every method, `priors` being the shared
/// prior of `federated` and `population` (signals without a prior are not analysed by any
/// method).
///
/// # Errors
/// Invalid settings, an invalid prior, or a detection error naming the participant and signal.
pub fn evaluate_cohort(
    cohort: &Cohort,
    cohort_name: &str,
    priors: &CohortPriors,
    settings: &EvaluationSettings,
    progress: Option<&ProgressBar>,
) -> anyhow::Result<EvaluationReport> {
    settings.detect.validate()?;
    if settings.local_fit_days == 0 {
        bail!("local_fit_days must be at least 1");
    }
    if !(settings.budget_per_month.is_finite() && settings.budget_per_month > 0.0) {
        bail!(
            "the false-alarm budget must be positive, got {}",
            settings.budget_per_month
        );
    }
    let build = |priors: &[PriorParams], what: &str| {
        let mut models: Vec<(Signal, StateSpacePrior)> = Vec::with_capacity(priors.len());
        for p in priors {
            if models.iter().any(|(s, _)| *s == p.signal) {
                bail!("two priors for {}", p.signal);
            }
            let model =
                StateSpacePrior::new(p).with_context(|| format!("{what} prior of {}", p.signal))?;
            models.push((p.signal, model));
        }
        Ok(models)
    };
    let models = build(&priors.pooled, "shared")?;
    let mut by_sensor = BTreeMap::new();
    for (model, p) in &priors.by_sensor {
        by_sensor.insert(
            model.as_str(),
            build(p, &format!("sensor model {model}'s"))?,
        );
    }
    // A participant's shared prior: its sensor model's where the model has its own terms.
    let models_of = |series: &ParticipantSeries| -> &[(Signal, StateSpacePrior)] {
        priors
            .sensor_of(cohort, &series.participant)
            .and_then(|m| by_sensor.get(m))
            .map_or(&models[..], |v| &v[..])
    };
    let configs: Vec<DetectConfig> = Method::ALL
        .iter()
        .map(|&m| {
            let mut cfg = settings.detect.clone();
            cfg.min_baseline_days = cold_start(m, settings);
            cfg
        })
        .collect();

    // Local fits once per participant (they do not depend on R).
    let local: Vec<(Vec<(Signal, StateSpacePrior)>, LocalFitStats)> =
        par_map(cohort, settings.threads, |_, series| {
            let mut stats = LocalFitStats::default();
            let m = fit_local_models(series, &models, settings, &mut stats)?;
            Ok((m, stats))
        })?;

    // Pass 1: residual moments per method (identity correlation), summed as the aggregator
    // would.
    let identity = Correlation::identity();
    let moments: Vec<Vec<ResidualMoments>> = par_map(cohort, settings.threads, |i, series| {
        Method::ALL
            .iter()
            .enumerate()
            .map(|(m, &method)| {
                Ok(run_method(
                    method,
                    series,
                    models_of(series),
                    &local[i].0,
                    &identity,
                    &configs[m],
                )?
                .map(|s| s.moments)
                .unwrap_or_default())
            })
            .collect()
    })?;
    let correlations: Vec<Correlation> = (0..Method::ALL.len())
        .map(|m| {
            let mut sum = ResidualMoments::default();
            for p in &moments {
                sum.merge(&p[m]);
            }
            sum.correlation(CORRELATION_SHRINK_DAYS)
        })
        .collect();

    // Pass 2: scores with the learned correlation.
    let mut scored: Vec<Scored> = par_map(cohort, settings.threads, |i, series| {
        let mut per_method = Vec::with_capacity(Method::ALL.len());
        for (m, &method) in Method::ALL.iter().enumerate() {
            let s = run_method(
                method,
                series,
                models_of(series),
                &local[i].0,
                &correlations[m],
                &configs[m],
            )?;
            per_method.push(match s {
                Some(s) => (compact(&s.days), scored_dates(&scored_days(&s))),
                None => (Vec::new(), Vec::new()),
            });
        }
        if let Some(pb) = progress {
            pb.inc(1);
        }
        Ok(Scored {
            index: i,
            per_method,
        })
    })?;

    let mut events: HashMap<&str, (Vec<&Event>, Vec<&Event>)> = HashMap::new();
    for e in &cohort.events {
        let entry = events.entry(e.participant.as_str()).or_default();
        if settings.target_kinds.contains(&e.kind) {
            entry.0.push(e);
        } else {
            entry.1.push(e);
        }
    }
    let no_events = (Vec::new(), Vec::new());
    let no_groups = BTreeMap::new();
    let fit_days = settings.local_fit_days as i64;
    let periods = vec![
        Period::days(1, Some(fit_days)),
        Period::days(fit_days + 1, Some(2 * fit_days)),
        Period::days(2 * fit_days + 1, None),
    ];
    let mut local_stats = LocalFitStats::default();
    for (_, s) in local {
        local_stats.merge(s);
    }

    let gap = settings.detect.grouping();
    let mut methods = Vec::with_capacity(Method::ALL.len());
    for (m, &method) in Method::ALL.iter().enumerate() {
        // Calibration: summed per-device episode histograms.
        let histograms = participant_histograms(&scored, m, gap);
        let mut hist = EpisodeHistogram::default();
        for h in &histograms {
            hist.merge(h);
        }
        let alert = hist.threshold_for(settings.budget_per_month);
        let watch = hist.threshold_for(WATCH_BUDGET_FACTOR * settings.budget_per_month);
        let alarm_threshold = match settings.alarm_level {
            FlagLevel::Alert => alert.threshold,
            FlagLevel::Watch => watch.threshold,
        };
        let mut group_notes = Vec::new();
        if let Some(column) = &settings.calibrate_column {
            group_notes = calibrate_per_group(
                cohort,
                &mut scored,
                m,
                &histograms,
                column,
                alarm_threshold,
                settings,
            );
        }

        let truths: Vec<Truth<'_>> = scored
            .iter()
            .map(|s| {
                let series = &cohort.participants[s.index];
                let (targets, _) = events
                    .get(series.participant.as_str())
                    .unwrap_or(&no_events);
                Truth {
                    first_date: series.dates.first().copied(),
                    days: &s.per_method[m].0,
                    targets,
                }
            })
            .collect();
        let sweep = sweep::Sweep::new(&truths, gap);
        let curve = sweep.curve();
        let matched = sweep.matched(&sweep::MATCHED_LEVELS);
        let pauc = sweep::partial_auc(&curve, 1.0);
        let group_values: Vec<&BTreeMap<String, String>> = scored
            .iter()
            .map(|s| {
                cohort
                    .groups
                    .get(&cohort.participants[s.index].participant)
                    .unwrap_or(&no_groups)
            })
            .collect();
        let disparities = sweep::disparities(&truths, &group_values, gap, &matched);

        let mut acc = Accumulator::with_periods(periods.clone());
        for s in &scored {
            let series = &cohort.participants[s.index];
            let groups = cohort.groups.get(&series.participant).unwrap_or(&no_groups);
            let (targets, others) = events
                .get(series.participant.as_str())
                .unwrap_or(&no_events);
            let (days, signal_days) = &s.per_method[m];
            let result = participant_result(series, days, signal_days, alarm_threshold, gap);
            acc.add(groups, targets, others, &result);
        }
        let mut summary = MethodSummary::new(
            method.key(),
            method.description(),
            configs[m].min_baseline_days,
            acc.finish(),
            curve,
        );
        summary.matched = matched;
        summary.disparities = disparities;
        summary.partial_auc_to_1 = pauc;
        summary.alert_threshold = alert;
        summary.watch_threshold = watch;
        summary.calibration_rate_at_alert = alert.rate;
        summary.notes.extend(group_notes);
        if method == Method::LocalOnly {
            let s = &local_stats;
            summary.notes.push(format!(
                "{} signal series fitted ({} stopped before the L-BFGS convergence test and were used as they were); {} signal series had fewer than {} observed days and were not analysed; {} fits failed",
                s.fitted, s.not_converged, s.too_few_days, settings.local_fit_days, s.failed
            ));
            if let Some(msg) = &s.first_failure {
                summary.notes.push(format!("first failed fit: {msg}"));
            }
        }
        if alert.capped {
            summary.notes.push(
                "even the top of the calibration grid exceeds the budget: the Alert threshold is capped".into(),
            );
        }
        methods.push(summary);
    }

    Ok(EvaluationReport {
        prior_objective: BTreeMap::new(),
        schema: SCHEMA.into(),
        cohort: cohort_name.into(),
        participants: cohort.participants.len(),
        target_kinds: settings.target_kinds.clone(),
        input_issues: cohort.issues.iter().filter(|i| i.is_row_error()).count(),
        issues: cohort
            .issues
            .iter()
            .take(super::report::MAX_LISTED_ISSUES)
            .map(super::report::ReportedIssue::from_issue)
            .collect(),
        issues_not_listed: cohort
            .issues
            .len()
            .saturating_sub(super::report::MAX_LISTED_ISSUES),
        settings: ReportSettings {
            alarm_level: settings.alarm_level,
            budget_alert_episodes_per_participant_month: settings.budget_per_month,
            watch_budget_factor: WATCH_BUDGET_FACTOR,
            detect: settings.detect.clone(),
            correlation_shrink_days: CORRELATION_SHRINK_DAYS,
            prior_source: settings.prior_source.clone(),
            local_fit_days: settings.local_fit_days,
            rolling_window_values: ROLLING_WINDOW_VALUES,
            rolling_min_values: ROLLING_MIN_VALUES,
            rolling_sd_floor: ROLLING_SD_FLOOR,
            matched_levels: sweep::MATCHED_LEVELS.to_vec(),
        },
        methods,
        caution: CAUTION.into(),
    })
}

/// Per-group calibration of method `m` (evaluation form of the aggregator's per-group
/// histogram sums): each level of `column` with at least [`MIN_PARTICIPANTS_PER_GROUP`]
/// participants gets the threshold its own summed episode histogram gives for the budget
/// (`h_g`), the others the whole cohort's (`h`). Scores of a participant in group `g` are
/// then shifted by `h − h_g`, so the single threshold `h` flags exactly what `h_g` flags in
/// the group (alarm days and episodes depend on the threshold only through `score ≥ h`):
/// the calibrated default applies each group's own threshold, and a sweep moves every
/// group's threshold by the same amount. Returns a note per level.
fn calibrate_per_group(
    cohort: &Cohort,
    scored: &mut [Scored],
    m: usize,
    histograms: &[EpisodeHistogram],
    column: &str,
    pooled_threshold: f64,
    settings: &EvaluationSettings,
) -> Vec<String> {
    let level_of = |s: &Scored| {
        cohort
            .groups
            .get(&cohort.participants[s.index].participant)
            .and_then(|g| g.get(column))
            .cloned()
    };
    let mut hists: BTreeMap<String, (usize, EpisodeHistogram)> = BTreeMap::new();
    for (s, h) in scored.iter().zip(histograms) {
        let Some(level) = level_of(s) else { continue };
        let entry = hists.entry(level).or_default();
        entry.0 += 1;
        entry.1.merge(h);
    }
    let budget = match settings.alarm_level {
        FlagLevel::Alert => settings.budget_per_month,
        FlagLevel::Watch => WATCH_BUDGET_FACTOR * settings.budget_per_month,
    };
    let thresholds: BTreeMap<String, f64> = hists
        .iter()
        .map(|(level, (n, hist))| {
            let h = if *n >= MIN_PARTICIPANTS_PER_GROUP {
                hist.threshold_for(budget).threshold
            } else {
                pooled_threshold
            };
            (level.clone(), h)
        })
        .collect();
    for s in scored.iter_mut() {
        let Some(h) = level_of(s).and_then(|l| thresholds.get(&l).copied()) else {
            continue;
        };
        let shift = (pooled_threshold - h) as f32;
        for c in &mut s.per_method[m].0 {
            c.score += shift;
        }
    }
    thresholds
        .iter()
        .map(|(level, h)| {
            let n = hists[level].0;
            format!(
                "calibrated per {column}: {level} ({n} participants) alarm threshold {h:.2}{}",
                if n >= MIN_PARTICIPANTS_PER_GROUP {
                    ""
                } else {
                    " (too few participants: the whole cohort's)"
                }
            )
        })
        .collect()
}

/// Each participant's episode histogram under method `m` (what a device would submit), in
/// the order of `scored`.
fn participant_histograms(
    scored: &[Scored],
    m: usize,
    gap: crate::detect::episodes::Grouping,
) -> Vec<EpisodeHistogram> {
    scored
        .iter()
        .map(|s| EpisodeHistogram::from_days(&expand(&s.per_method[m].0), gap))
        .collect()
}

/// Observed days of a signal before `method` scores it.
fn cold_start(method: Method, settings: &EvaluationSettings) -> usize {
    let base = settings.detect.min_baseline_days;
    match method {
        Method::Federated | Method::Population => base,
        Method::Alavi => base.max(ROLLING_MIN_VALUES),
        Method::LocalOnly => base.max(settings.local_fit_days),
        Method::RollingZ => base.max(ROLLING_MIN_VALUES),
    }
}

/// The `local_only` model of every signal that has a shared prior and enough observed days.
fn fit_local_models(
    series: &ParticipantSeries,
    models: &[(Signal, StateSpacePrior)],
    settings: &EvaluationSettings,
    stats: &mut LocalFitStats,
) -> anyhow::Result<Vec<(Signal, StateSpacePrior)>> {
    let mut out = Vec::new();
    let present = series.signals();
    for &(signal, _) in models.iter().filter(|(s, _)| present.contains(s)) {
        match fit_local(series, signal, settings.local_fit_days) {
            Ok(Some(fit)) => {
                stats.fitted += 1;
                stats.not_converged += usize::from(!fit.converged);
                out.push((signal, StateSpacePrior::new(&fit.prior)?));
            }
            Ok(None) => stats.too_few_days += 1,
            Err(msg) => {
                stats.failed += 1;
                stats.first_failure.get_or_insert_with(|| {
                    format!("participant {}, {signal}: {msg}", series.participant)
                });
            }
        }
    }
    Ok(out)
}

/// One method's scores on one participant (`None` when the method analyses no signal).
fn run_method(
    method: Method,
    series: &ParticipantSeries,
    models: &[(Signal, StateSpacePrior)],
    local_models: &[(Signal, StateSpacePrior)],
    corr: &Correlation,
    cfg: &DetectConfig,
) -> anyhow::Result<Option<ParticipantScores>> {
    let filters = |m: &[(Signal, StateSpacePrior)]| -> Vec<(Signal, DailyFilter)> {
        m.iter().map(|(s, m)| (*s, DailyFilter::new(m))).collect()
    };
    let scores = match method {
        Method::Federated => score_participant(series, filters(models), corr, cfg),
        Method::LocalOnly => score_participant(series, filters(local_models), corr, cfg),
        Method::Population => score_participant(
            series,
            models
                .iter()
                .map(|(s, m)| (*s, PopulationPredictor::new(m)))
                .collect(),
            corr,
            cfg,
        ),
        Method::RollingZ => score_participant(
            series,
            models
                .iter()
                .map(|(s, _)| (*s, RollingZ::default()))
                .collect(),
            corr,
            cfg,
        ),
        Method::Alavi => return Ok(Some(alavi_scores(series, cfg.min_baseline_days))),
    };
    scores
        .map(Some)
        .with_context(|| format!("method {}", method.key()))
}

/// The compact form of a score series kept for the sweep.
fn compact(days: &[DayScore]) -> Vec<Compact> {
    days.iter()
        .filter_map(|d| {
            d.score.map(|s| Compact {
                date: d.date,
                score: s as f32,
                window_days: ((d.date - d.window_start).num_days() + 1) as u8,
            })
        })
        .collect()
}

/// Back from the compact form (scored days only).
fn expand(days: &[Compact]) -> Vec<DayScore> {
    days.iter()
        .map(|c| DayScore {
            date: c.date,
            score: Some(f64::from(c.score)),
            mirror: None,
            window_start: c.date - chrono::Duration::days(i64::from(c.window_days) - 1),
            contributions: [0.0; 6],
            departures: [None; 6],
        })
        .collect()
}

/// Baseline readings past the cold start, for coverage and NLPD.
fn scored_days(s: &ParticipantScores) -> Vec<ScoredDay> {
    s.signal_days
        .iter()
        .filter(|d| !d.cold)
        .map(|d| ScoredDay {
            signal: d.signal,
            date: d.date,
            observed: d.observed,
            mean: d.mean,
            sd: d.sd,
        })
        .collect()
}

/// Alarm days and episodes of one participant at one threshold.
fn participant_result(
    series: &ParticipantSeries,
    days: &[Compact],
    signal_days: &[ScoredDate],
    threshold: f64,
    gap: crate::detect::episodes::Grouping,
) -> ParticipantResult {
    let expanded = expand(days);
    let episodes = group(&expanded, threshold, threshold, gap);
    let alarm_dates = days
        .iter()
        .filter(|c| f64::from(c.score) >= threshold)
        .map(|c| c.date)
        .collect();
    ParticipantResult {
        first_date: series.dates.first().copied(),
        days: signal_days.to_vec(),
        alarm_dates,
        episodes: episodes
            .iter()
            .map(|e| (e.first_alarm, e.last_alarm))
            .collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::NaiveDate;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, StandardNormal};
    use statrs::distribution::{ContinuousCDF, Normal};

    /// Per-group calibration on scores of a known distribution: 30 participants a group,
    /// a year of independent daily scores, N(0, 1) in group `a` and N(1, 1) in group `b`.
    /// With one threshold, `b` raises far more false alarms; calibrated per group, each
    /// group's episode rate at the cohort's threshold is within its budget (and above half
    /// of it: the grid's step is 0.1), and the two groups' thresholds lie about one unit
    /// apart, near the normal quantile of the budget's daily rate (statrs 0.19
    /// `Normal::inverse_cdf`; episodes of independent days start at rate ≈ p(1 − p)).
    #[test]
    fn per_group_calibration_meets_the_budget_in_each_group() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let start = NaiveDate::from_ymd_opt(2024, 1, 1).unwrap();
        let mut cohort = Cohort::default();
        let mut scored = Vec::new();
        for i in 0..60 {
            let participant = format!("p{i:02}");
            let group = if i < 30 { "a" } else { "b" };
            let mean = if i < 30 { 0.0 } else { 1.0 };
            cohort.participants.push(ParticipantSeries {
                participant: participant.clone(),
                dates: vec![start],
                values: BTreeMap::new(),
            });
            cohort.groups.insert(
                participant,
                BTreeMap::from([("arm".to_owned(), group.to_owned())]),
            );
            let days: Vec<Compact> = (0..365)
                .map(|d| {
                    let z: f64 = StandardNormal.sample(&mut rng);
                    Compact {
                        date: start + chrono::Duration::days(d),
                        score: (mean + z) as f32,
                        window_days: 1,
                    }
                })
                .collect();
            scored.push(Scored {
                index: i,
                per_method: vec![(days, Vec::new())],
            });
        }
        let mut settings = EvaluationSettings::new("test");
        settings.budget_per_month = 0.3;
        let gap = settings.detect.grouping();
        let rate_of = |scored: &[Scored], group: std::ops::Range<usize>, h: f64| {
            let mut hist = EpisodeHistogram::default();
            for s in &scored[group] {
                hist.merge(&EpisodeHistogram::from_days(
                    &expand(&s.per_method[0].0),
                    gap,
                ));
            }
            let i = crate::detect::calibration::edges()
                .iter()
                .position(|e| (e - h).abs() < 1e-9)
                .expect("a grid threshold");
            hist.rate(i)
        };
        let mut pooled = EpisodeHistogram::default();
        for s in &scored {
            pooled.merge(&EpisodeHistogram::from_days(
                &expand(&s.per_method[0].0),
                gap,
            ));
        }
        let h = pooled.threshold_for(0.3).threshold;
        let (a, b) = (rate_of(&scored, 0..30, h), rate_of(&scored, 30..60, h));
        assert!(
            b > 5.0 * a,
            "one threshold: a {a}, b {b} per participant-month"
        );

        let histograms = participant_histograms(&scored, 0, gap);
        let notes = calibrate_per_group(&cohort, &mut scored, 0, &histograms, "arm", h, &settings);
        assert_eq!(notes.len(), 2, "{notes:?}");
        for group in [0..30, 30..60] {
            let r = rate_of(&scored, group.clone(), h);
            assert!(
                (0.15..=0.3).contains(&r),
                "group {group:?}: {r} per participant-month at the calibrated default"
            );
        }
        let threshold_of =
            |note: &str| -> f64 { note.rsplit("threshold ").next().unwrap().parse().unwrap() };
        let (ha, hb) = (threshold_of(&notes[0]), threshold_of(&notes[1]));
        assert!((hb - ha - 1.0).abs() <= 0.25, "thresholds {ha} and {hb}");
        let p = 0.3 / 30.4375;
        let z = Normal::new(0.0, 1.0).unwrap().inverse_cdf(1.0 - p);
        assert!(
            (ha - z).abs() <= 0.3,
            "group a threshold {ha}, normal quantile {z}"
        );
    }
}
