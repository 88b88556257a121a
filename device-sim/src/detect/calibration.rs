//! Empirical calibration of the alert thresholds from fixed-bin episode counts (module docs
//! of [`super`], "Calibration"), and what a device computes for, and keeps from, the study's
//! federated calibration ([`device_moments`], [`device_histogram`], [`StudyCalibration`]).

use serde::{Deserialize, Serialize};

use super::episodes::{Grouping, episode_counts};
use super::joint::{CORRELATION_SHRINK_DAYS, Correlation, ResidualMoments, TargetPattern};
use super::{DayScore, DetectConfig, score_participant};
use crate::cohort::ParticipantSeries;
use crate::prior::PriorParams;
use crate::prospective::{DailyFilter, Result, StateSpacePrior};
use crate::signal::Signal;

/// Watch thresholds are calibrated to this many times the Alert budget.
pub const WATCH_BUDGET_FACTOR: f64 = 3.0;

/// Days per month used for every per-month rate (365.25 / 12).
pub const DAYS_PER_MONTH: f64 = 30.4375;

/// Lowest threshold edge of the calibration grid.
pub const EDGE_MIN: f64 = 0.0;
/// Spacing of the calibration grid (score units).
pub const EDGE_STEP: f64 = 0.1;
/// Number of edges: thresholds 0.0, 0.1, …, 14.9.
pub const N_EDGES: usize = 150;

/// The fixed threshold grid every device counts on.
pub fn edges() -> Vec<f64> {
    (0..N_EDGES)
        .map(|i| EDGE_MIN + EDGE_STEP * i as f64)
        .collect()
}

/// What a device sends for calibration: for each threshold of [`edges`], the number of
/// episodes its own score series would have had at that threshold, and the number of scored
/// days. Counts only; no score or daily value leaves the device.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpisodeHistogram {
    pub episodes: Vec<u64>,
    pub scored_days: u64,
}

impl Default for EpisodeHistogram {
    fn default() -> EpisodeHistogram {
        EpisodeHistogram {
            episodes: vec![0; N_EDGES],
            scored_days: 0,
        }
    }
}

impl EpisodeHistogram {
    /// The histogram of one participant's scores.
    pub fn from_days(days: &[DayScore], rule: Grouping) -> EpisodeHistogram {
        EpisodeHistogram {
            episodes: episode_counts(days, &edges(), rule),
            scored_days: days.iter().filter(|d| d.score.is_some()).count() as u64,
        }
    }

    /// Adds another device's counts (what the aggregator does).
    pub fn merge(&mut self, other: &EpisodeHistogram) {
        for (a, b) in self.episodes.iter_mut().zip(&other.episodes) {
            *a += b;
        }
        self.scored_days += other.scored_days;
    }

    /// Episodes per participant-month at edge `i`.
    pub fn rate(&self, i: usize) -> f64 {
        if self.scored_days == 0 {
            return 0.0;
        }
        self.episodes[i] as f64 / (self.scored_days as f64 / DAYS_PER_MONTH)
    }

    /// The lowest grid threshold at and above which every edge's episode rate is at most
    /// `per_month` (scanning down from the top: far below the useful range alarm days run
    /// together into few long episodes, so the rate is not monotone there); the top edge,
    /// marked [`Calibrated::capped`], if even that exceeds the budget.
    pub fn threshold_for(&self, per_month: f64) -> Calibrated {
        let mut best = None;
        for i in (0..N_EDGES).rev() {
            if self.rate(i) > per_month {
                break;
            }
            best = Some(i);
        }
        match best {
            Some(i) => Calibrated {
                threshold: edges()[i],
                rate: self.rate(i),
                capped: false,
            },
            None => Calibrated {
                threshold: edges()[N_EDGES - 1],
                rate: self.rate(N_EDGES - 1),
                capped: true,
            },
        }
    }

    /// How often an episode with a peak this high starts on this study's data: the episode
    /// rate at the highest grid edge not above `score`, per participant-month.
    pub fn rate_at(&self, score: f64) -> f64 {
        let i = (((score - EDGE_MIN) / EDGE_STEP).floor().max(0.0) as usize).min(N_EDGES - 1);
        self.rate(i)
    }
}

/// A threshold chosen from a histogram.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Calibrated {
    pub threshold: f64,
    /// Episode rate per participant-month at that threshold on the calibration data.
    pub rate: f64,
    /// True when even the top of the grid exceeds the budget.
    pub capped: bool,
}

/// "about once in 40 participant-months" for a rate per participant-month.
pub fn once_in(rate_per_month: f64) -> String {
    if rate_per_month <= 0.0 {
        return "not once on this study's data so far".into();
    }
    let months = 1.0 / rate_per_month;
    if months < 1.0 {
        format!("about {:.1} times per participant-month", rate_per_month)
    } else if months < 10.0 {
        format!("about once in {months:.1} participant-months")
    } else {
        format!("about once in {:.0} participant-months", months)
    }
}

/// The one-step predictor of the shared prior (its exact Kalman filter) for every signal of
/// `priors` that `series` has: the predictors the detector runs on a device (the `federated`
/// method of the evaluation).
///
/// # Errors
/// An invalid prior.
pub fn shared_prior_filters(
    series: &ParticipantSeries,
    priors: &[PriorParams],
) -> Result<Vec<(Signal, DailyFilter)>> {
    priors
        .iter()
        .filter(|p| series.values.contains_key(&p.signal))
        .map(|p| Ok((p.signal, DailyFilter::new(&StateSpacePrior::new(p)?))))
        .collect()
}

/// Stage 1 of the federated calibration, on the device: the residual moments of its own
/// days, scored against the shared prior with independent signals
/// ([`Correlation::identity`]). Sums of cross-products and pair counts only.
///
/// # Errors
/// As [`score_participant`].
pub fn device_moments(
    series: &ParticipantSeries,
    priors: &[PriorParams],
    cfg: &DetectConfig,
) -> Result<ResidualMoments> {
    let filters = shared_prior_filters(series, priors)?;
    Ok(score_participant(series, filters, &Correlation::identity(), cfg)?.moments)
}

/// Stage 2, on the device: the episode histogram of its own days scored with the cohort's
/// correlation `corr` (from the summed moments, [`cohort_correlation`]), grouped by `cfg`'s
/// rule. Counts only.
///
/// # Errors
/// As [`score_participant`].
pub fn device_histogram(
    series: &ParticipantSeries,
    priors: &[PriorParams],
    corr: &Correlation,
    cfg: &DetectConfig,
) -> Result<EpisodeHistogram> {
    let filters = shared_prior_filters(series, priors)?;
    let scores = score_participant(series, filters, corr, cfg)?;
    Ok(EpisodeHistogram::from_days(&scores.days, cfg.grouping()))
}

/// The cohort's cross-signal correlation from the summed moments, shrunk by
/// [`CORRELATION_SHRINK_DAYS`] (as the evaluation does).
pub fn cohort_correlation(summed: &ResidualMoments) -> Correlation {
    summed.correlation(CORRELATION_SHRINK_DAYS)
}

/// What a device keeps from the study's federated calibration: the cohort's correlation,
/// the thresholds at the study's false-alarm budget, and the summed histogram they came
/// from (for stated odds: [`StudyCalibration::rate_at`]). Written as `calibration.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StudyCalibration {
    /// Cross-signal correlation of the residuals, learned from the cohort's summed moments.
    pub correlation: Correlation,
    /// The study's Alert budget: episodes per participant-month.
    pub budget_per_month: f64,
    /// Alert threshold: at most `budget_per_month` episodes per participant-month.
    pub alert: Calibrated,
    /// Watch threshold: at most [`WATCH_BUDGET_FACTOR`] × the budget.
    pub watch: Calibrated,
    /// The cohort's summed episode histogram.
    pub histogram: EpisodeHistogram,
    /// Devices whose moments entered the correlation.
    pub moment_devices: u32,
    /// Devices whose histogram entered the thresholds.
    pub histogram_devices: u32,
    /// Under per-group calibration, the group (the study's group column) whose devices'
    /// histograms gave the thresholds; `None`: the whole study's.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub histogram_group: Option<String>,
    /// The alerting direction the scores were computed in (the study's; the thresholds mean
    /// nothing in another direction). Absent in older files: the default.
    #[serde(default = "default_pattern")]
    pub pattern: TargetPattern,
}

fn default_pattern() -> TargetPattern {
    TargetPattern::ACUTE_ILLNESS
}

impl StudyCalibration {
    /// The thresholds for `budget_per_month` (Alert) and [`WATCH_BUDGET_FACTOR`] times it
    /// (Watch) from the cohort's summed `histogram`, as the evaluation calibrates.
    pub fn new(
        correlation: Correlation,
        histogram: EpisodeHistogram,
        budget_per_month: f64,
        moment_devices: u32,
        histogram_devices: u32,
    ) -> StudyCalibration {
        StudyCalibration {
            alert: histogram.threshold_for(budget_per_month),
            watch: histogram.threshold_for(WATCH_BUDGET_FACTOR * budget_per_month),
            correlation,
            budget_per_month,
            histogram,
            moment_devices,
            histogram_devices,
            histogram_group: None,
            pattern: TargetPattern::ACUTE_ILLNESS,
        }
    }

    /// The same calibration, stating that its scores were computed in direction `pattern`.
    pub fn in_direction(mut self, pattern: TargetPattern) -> StudyCalibration {
        self.pattern = pattern;
        self
    }

    /// How often an episode peaking at `score` starts on this study's data, per
    /// participant-month ([`EpisodeHistogram::rate_at`]; [`once_in`] words it).
    pub fn rate_at(&self, score: f64) -> f64 {
        self.histogram.rate_at(score)
    }

    /// The fallback when the study has no calibration yet: independent signals (identity
    /// correlation), an empty histogram, and thresholds from the **nominal Gaussian rule**:
    ///
    /// ```text
    /// h(B) = Φ⁻¹(1 − B / DAYS_PER_MONTH)
    /// ```
    ///
    /// the score a standard normal day exceeds on `B` days per participant-month, with
    /// `B` = [`NOMINAL_ALERT_PER_MONTH`] (Alert, h ≈ 2.33) and [`NOMINAL_WATCH_PER_MONTH`]
    /// (Watch, h ≈ 1.89). The day's score is N(0, 1) under the model only for one window
    /// with correctly modelled, independent residuals; it is the maximum over several windows
    /// and real residuals are correlated, so the real rate is higher. Every reason made under
    /// this calibration says it is uncalibrated ([`StudyCalibration::is_calibrated`]).
    pub fn uncalibrated() -> StudyCalibration {
        let nominal = |per_month: f64| Calibrated {
            threshold: nominal_threshold(per_month),
            rate: per_month,
            capped: false,
        };
        StudyCalibration {
            correlation: Correlation::identity(),
            budget_per_month: NOMINAL_ALERT_PER_MONTH,
            alert: nominal(NOMINAL_ALERT_PER_MONTH),
            watch: nominal(NOMINAL_WATCH_PER_MONTH),
            histogram: EpisodeHistogram::default(),
            moment_devices: 0,
            histogram_devices: 0,
            histogram_group: None,
            pattern: TargetPattern::ACUTE_ILLNESS,
        }
    }

    /// The calibration of a study from its summed histogram and learned correlation, at the
    /// given Alert and Watch budgets (episodes per participant-month; Watch ≥ Alert), when
    /// the number of contributing devices is not known (tests, the evaluation).
    pub fn from_histogram(
        correlation: Correlation,
        histogram: EpisodeHistogram,
        alert_per_month: f64,
        watch_per_month: f64,
    ) -> StudyCalibration {
        StudyCalibration {
            correlation,
            budget_per_month: alert_per_month,
            alert: histogram.threshold_for(alert_per_month),
            watch: histogram.threshold_for(watch_per_month.max(alert_per_month)),
            histogram,
            moment_devices: 0,
            histogram_devices: 0,
            histogram_group: None,
            pattern: TargetPattern::ACUTE_ILLNESS,
        }
    }

    /// True when the thresholds come from the study's data (its histogram has scored days),
    /// false for [`StudyCalibration::uncalibrated`].
    pub fn is_calibrated(&self) -> bool {
        self.histogram.scored_days > 0
    }

    /// Participant-months of data behind the histogram.
    pub fn participant_months(&self) -> f64 {
        self.histogram.scored_days as f64 / DAYS_PER_MONTH
    }
}

/// Alert budget of [`StudyCalibration::uncalibrated`]: episodes per participant-month (the
/// evaluation's default budget).
pub const NOMINAL_ALERT_PER_MONTH: f64 = 0.3;

/// Watch budget of [`StudyCalibration::uncalibrated`]: [`WATCH_BUDGET_FACTOR`] times the
/// Alert budget (as the evaluation calibrates Watch).
pub const NOMINAL_WATCH_PER_MONTH: f64 = WATCH_BUDGET_FACTOR * NOMINAL_ALERT_PER_MONTH;

/// `Φ⁻¹(1 − per_month / DAYS_PER_MONTH)`: the nominal threshold for a rate of `per_month`
/// days per participant-month (see [`StudyCalibration::uncalibrated`]).
pub fn nominal_threshold(per_month: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    let p = (per_month / DAYS_PER_MONTH).clamp(1e-12, 0.5);
    Normal::standard().inverse_cdf(1.0 - p)
}

/// The model's nominal rate of a score at least `score`: `(1 − Φ(score)) · DAYS_PER_MONTH`
/// days per participant-month, were the day's score standard normal (see
/// [`StudyCalibration::uncalibrated`] for why it is not).
pub fn nominal_rate(score: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    Normal::standard().sf(score) * DAYS_PER_MONTH
}
