//! Runs the four methods of [`super::methods`] over every participant of a cohort, at the
//! calibrated thresholds and at each threshold scale of the sweep, and gathers the metrics of
//! [`super::metrics`] into an [`EvaluationReport`].
//!
//! Every method goes through [`detect_with`] with the same [`FlagConfig`] (detectors,
//! thresholds, baseline protection); only the predictive differs, and the cold start is the
//! configured one, lengthened where a method needs more days (`local_only`: its fitting days;
//! `rolling_z`: [`ROLLING_MIN_VALUES`]). Participants are spread over threads and each thread
//! keeps its own accumulators, merged at the end.

use std::collections::{BTreeMap, HashMap};

use anyhow::{Context, bail};
use indicatif::ProgressBar;

use super::methods::{
    Method, PopulationPredictor, ROLLING_MIN_VALUES, ROLLING_SD_FLOOR, ROLLING_WINDOW_VALUES,
    RollingZ, fit_local,
};
use super::metrics::{Accumulator, ParticipantResult, Period, ScoredDay};
use super::report::{CAUTION, CurvePoint, EvaluationReport, MethodSummary, ReportSettings, SCHEMA};
use crate::cohort::{Cohort, Event, ParticipantSeries};
use crate::flags::{Detection, FlagConfig, FlagLevel, detect_with};
use crate::prior::PriorParams;
use crate::prospective::{DailyFilter, DayStatus, StateSpacePrior};
use crate::signal::Signal;

/// Default threshold multipliers of the sweep (1 = calibrated).
pub const THRESHOLD_SCALES: [f64; 9] = [0.6, 0.7, 0.8, 0.9, 1.0, 1.15, 1.3, 1.5, 1.75];

/// Default number of observed days per signal that `local_only` fits on.
pub const DEFAULT_LOCAL_FIT_DAYS: usize = 28;

/// Default event kinds counted as detection targets.
pub const DEFAULT_TARGET_KIND: &str = "acute_illness";

/// How to evaluate.
#[derive(Debug, Clone, PartialEq)]
pub struct EvaluationSettings {
    /// Detectors and calibrated thresholds shared by every method.
    pub flag_config: FlagConfig,
    /// Event kinds counted as detection targets.
    pub target_kinds: Vec<String>,
    /// Lowest flag level that counts as an alarm.
    pub alarm_level: FlagLevel,
    /// Observed days per signal that `local_only` fits on (and its cold start).
    pub local_fit_days: usize,
    /// Threshold multipliers of the sweep; 1 is added if missing.
    pub threshold_scales: Vec<f64>,
    /// Worker threads (at least 1).
    pub threads: usize,
    /// Where the shared prior came from, in words (reported).
    pub prior_source: String,
}

impl EvaluationSettings {
    /// The defaults: `FlagConfig::default()`, target `acute_illness`, Alert level, 28 fitting
    /// days, [`THRESHOLD_SCALES`], one thread per core.
    pub fn new(prior_source: &str) -> EvaluationSettings {
        EvaluationSettings {
            flag_config: FlagConfig::default(),
            target_kinds: vec![DEFAULT_TARGET_KIND.into()],
            alarm_level: FlagLevel::Alert,
            local_fit_days: DEFAULT_LOCAL_FIT_DAYS,
            threshold_scales: THRESHOLD_SCALES.to_vec(),
            threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            prior_source: prior_source.into(),
        }
    }
}

/// `cfg` with every detector threshold (single-day, CUSUM `h`, multi-signal; Watch and Alert)
/// multiplied by `factor`. The CUSUM winsorisation, `k` and the rules are unchanged; the
/// budget is dropped unless `factor` is 1.
pub fn scale_thresholds(cfg: &FlagConfig, factor: f64) -> FlagConfig {
    let mut out = cfg.clone();
    for t in [
        &mut out.single_day_z,
        &mut out.cusum_h,
        &mut out.multi_signal_score,
    ] {
        t.watch *= factor;
        t.alert *= factor;
    }
    if factor != 1.0 {
        out.target = None;
    }
    out
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

/// Per-thread state: one accumulator per (method, scale).
struct Worker {
    accumulators: Vec<Vec<Accumulator>>,
    local: LocalFitStats,
}

/// Evaluates every participant of `cohort` with the four methods, `priors` being the shared
/// prior of `federated` and `population` (signals without a prior are not analysed by any
/// method, so that all four see the same signals).
///
/// # Errors
/// Invalid settings (no thresholds, zero fitting days, a bad flag configuration), an invalid
/// prior, or a detection error naming the participant and signal.
pub fn evaluate_cohort(
    cohort: &Cohort,
    cohort_name: &str,
    priors: &[PriorParams],
    settings: &EvaluationSettings,
    progress: Option<&ProgressBar>,
) -> anyhow::Result<EvaluationReport> {
    settings.flag_config.validate()?;
    if settings.local_fit_days == 0 {
        bail!("local_fit_days must be at least 1");
    }
    let mut scales = settings.threshold_scales.clone();
    if scales.iter().any(|s| !(s.is_finite() && *s > 0.0)) {
        bail!("threshold scales must be positive: {scales:?}");
    }
    if !scales.contains(&1.0) {
        scales.push(1.0);
    }
    scales.sort_by(f64::total_cmp);
    scales.dedup();
    let calibrated = scales
        .iter()
        .position(|s| *s == 1.0)
        .expect("1 was added above");

    let mut models: Vec<(Signal, StateSpacePrior)> = Vec::with_capacity(priors.len());
    for p in priors {
        if models.iter().any(|(s, _)| *s == p.signal) {
            bail!("two priors for {}", p.signal);
        }
        let model =
            StateSpacePrior::new(p).with_context(|| format!("shared prior of {}", p.signal))?;
        models.push((p.signal, model));
    }

    // Flag configuration per (method, scale).
    let configs: Vec<Vec<FlagConfig>> = Method::ALL
        .iter()
        .map(|&method| {
            scales
                .iter()
                .map(|&f| {
                    let mut cfg = scale_thresholds(&settings.flag_config, f);
                    cfg.min_baseline_days = cold_start(method, settings);
                    cfg
                })
                .collect()
        })
        .collect();

    let fit_days = settings.local_fit_days as i64;
    let periods = vec![
        Period::days(1, Some(fit_days)),
        Period::days(fit_days + 1, Some(2 * fit_days)),
        Period::days(2 * fit_days + 1, None),
    ];

    let mut events: HashMap<&str, (Vec<&Event>, Vec<&Event>)> = HashMap::new();
    for e in &cohort.events {
        let entry = events.entry(e.participant.as_str()).or_default();
        if settings.target_kinds.contains(&e.kind) {
            entry.0.push(e);
        } else {
            entry.1.push(e);
        }
    }
    let no_groups = BTreeMap::new();
    let no_events = (Vec::new(), Vec::new());

    let n_threads = settings.threads.clamp(1, cohort.participants.len().max(1));
    let new_worker = || Worker {
        accumulators: Method::ALL
            .iter()
            .map(|_| {
                scales
                    .iter()
                    .map(|_| Accumulator::with_periods(periods.clone()))
                    .collect()
            })
            .collect(),
        local: LocalFitStats::default(),
    };
    let results: Vec<anyhow::Result<Worker>> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..n_threads)
            .map(|thread| {
                let (models, configs, events) = (&models, &configs, &events);
                let (no_groups, no_events) = (&no_groups, &no_events);
                let mut worker = new_worker();
                scope.spawn(move || -> anyhow::Result<Worker> {
                    for series in cohort.participants.iter().skip(thread).step_by(n_threads) {
                        let groups = cohort.groups.get(&series.participant).unwrap_or(no_groups);
                        let (targets, others) =
                            events.get(series.participant.as_str()).unwrap_or(no_events);
                        let local_models =
                            fit_local_models(series, models, settings, &mut worker.local)?;
                        for (m, &method) in Method::ALL.iter().enumerate() {
                            for (k, cfg) in configs[m].iter().enumerate() {
                                let detection =
                                    run_method(method, series, models, &local_models, cfg)?;
                                let result =
                                    participant_result(series, &detection, settings.alarm_level);
                                worker.accumulators[m][k].add(groups, targets, others, &result);
                            }
                        }
                        if let Some(pb) = progress {
                            pb.inc(1);
                        }
                    }
                    Ok(worker)
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("evaluation thread panicked"))
            .collect()
    });
    let mut merged = new_worker();
    for worker in results {
        let worker = worker?;
        for (mine, theirs) in merged.accumulators.iter_mut().zip(worker.accumulators) {
            for (a, b) in mine.iter_mut().zip(theirs) {
                a.merge(b);
            }
        }
        merged.local.merge(worker.local);
    }

    let mut methods = Vec::with_capacity(Method::ALL.len());
    for (m, (&method, accumulators)) in Method::ALL.iter().zip(merged.accumulators).enumerate() {
        let mut subgroups = Vec::new();
        let mut curve = Vec::with_capacity(scales.len());
        for (k, acc) in accumulators.into_iter().enumerate() {
            let finished = acc.finish();
            let all = &finished.first().context("no participant was evaluated")?.1;
            curve.push(CurvePoint {
                threshold_scale: scales[k],
                sensitivity: all.sensitivity,
                false_alarms_per_participant_month: all.false_alarms_per_participant_month,
            });
            if k == calibrated {
                subgroups = finished;
            }
        }
        let mut summary = MethodSummary::new(
            method.key(),
            method.description(),
            configs[m][calibrated].min_baseline_days,
            subgroups,
            curve,
        );
        if method == Method::LocalOnly {
            let s = &merged.local;
            summary.notes.push(format!(
                "{} signal series fitted ({} stopped before the L-BFGS convergence test and were used as they were); {} signal series had fewer than {} observed days and were not analysed; {} fits failed",
                s.fitted, s.not_converged, s.too_few_days, settings.local_fit_days, s.failed
            ));
            if let Some(msg) = &s.first_failure {
                summary.notes.push(format!("first failed fit: {msg}"));
            }
        }
        methods.push(summary);
    }

    Ok(EvaluationReport {
        schema: SCHEMA.into(),
        cohort: cohort_name.into(),
        participants: cohort.participants.len(),
        target_kinds: settings.target_kinds.clone(),
        input_issues: cohort.issues.iter().filter(|i| i.is_row_error()).count(),
        settings: ReportSettings {
            alarm_level: settings.alarm_level,
            false_alarm_target: settings.flag_config.target,
            flag_config: settings.flag_config.clone(),
            threshold_scales: scales,
            prior_source: settings.prior_source.clone(),
            local_fit_days: settings.local_fit_days,
            rolling_window_values: ROLLING_WINDOW_VALUES,
            rolling_min_values: ROLLING_MIN_VALUES,
            rolling_sd_floor: ROLLING_SD_FLOOR,
        },
        methods,
        caution: CAUTION.into(),
    })
}

/// Observed days of a signal before `method` scores it.
fn cold_start(method: Method, settings: &EvaluationSettings) -> usize {
    let base = settings.flag_config.min_baseline_days;
    match method {
        Method::Federated | Method::Population => base,
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

/// One method's detection on one participant.
fn run_method(
    method: Method,
    series: &ParticipantSeries,
    models: &[(Signal, StateSpacePrior)],
    local_models: &[(Signal, StateSpacePrior)],
    cfg: &FlagConfig,
) -> anyhow::Result<Detection> {
    let filters = |m: &[(Signal, StateSpacePrior)]| -> Vec<(Signal, DailyFilter)> {
        m.iter().map(|(s, m)| (*s, DailyFilter::new(m))).collect()
    };
    let detection = match method {
        Method::Federated => detect_with(series, filters(models), cfg),
        Method::LocalOnly => detect_with(series, filters(local_models), cfg),
        Method::Population => detect_with(
            series,
            models
                .iter()
                .map(|(s, m)| (*s, PopulationPredictor::new(m)))
                .collect(),
            cfg,
        ),
        Method::RollingZ => detect_with(
            series,
            models
                .iter()
                .map(|(s, _)| (*s, RollingZ::default()))
                .collect(),
            cfg,
        ),
    };
    detection.with_context(|| format!("method {}", method.key()))
}

/// The scored days (past the cold start) and alarm dates of one detection.
fn participant_result(
    series: &ParticipantSeries,
    detection: &Detection,
    alarm_level: FlagLevel,
) -> ParticipantResult {
    ParticipantResult {
        first_date: series.dates.first().copied(),
        days: detection
            .days
            .iter()
            .filter(|d| d.status != DayStatus::BuildingBaseline)
            .map(|d| ScoredDay {
                signal: d.signal,
                date: d.date,
                observed: d.observed,
                mean: d.mean,
                sd: d.sd,
            })
            .collect(),
        alarm_dates: detection
            .flags
            .iter()
            .filter(|f| f.level >= alarm_level)
            .map(|f| f.date)
            .collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scaling_multiplies_every_threshold_and_nothing_else() {
        let cfg = FlagConfig::default();
        let scaled = scale_thresholds(&cfg, 1.5);
        assert_eq!(scaled.single_day_z.alert, 1.5 * cfg.single_day_z.alert);
        assert_eq!(scaled.cusum_h.watch, 1.5 * cfg.cusum_h.watch);
        assert_eq!(
            scaled.multi_signal_score.alert,
            1.5 * cfg.multi_signal_score.alert
        );
        assert_eq!(scaled.cusum_k, cfg.cusum_k);
        assert_eq!(scaled.cusum_clip_z, cfg.cusum_clip_z);
        assert_eq!(scaled.target, None);
        assert_eq!(scale_thresholds(&cfg, 1.0), cfg);
        scaled.validate().unwrap();
    }
}
