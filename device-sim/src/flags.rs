//! Deviation flags on a participant's prospective residuals: single-day extremes, sustained
//! shifts (two-sided tabular CUSUM) and a multi-signal illness score; their calibration to a
//! stated false-alarm rate; the cold start; and baseline protection during alarms.
//!
//! Entry point: [`detect`]. Everything here runs on the device, on one participant's data.
//! [`detect_with`] runs the same detectors and rules on any other one-step-ahead
//! [`Predictor`] (the evaluation's comparison methods); only the predictive differs.
//!
//! # Residuals
//! For each signal and observed day, [`crate::prospective::DailyFilter`] gives the one-step-ahead
//! predictive `N(m_t, S_t)` under the shared prior, conditioned only on earlier *conditioned*
//! days, and the standardised residual `z_t = (y_t − m_t)/√S_t`. Under the model, the residuals
//! of successively conditioned days are independent N(0, 1) (the innovations of a Kalman filter
//! are white; Harvey 1989, §3.4), which is what makes the thresholds below calibrated.
//!
//! # Detectors (each flag has a level, Watch or Alert, with its own threshold)
//! - **Single day**: `|z_t| ≥ threshold` (two-sided normal tail).
//! - **Sustained shift**: two-sided tabular CUSUM (Page 1954; Montgomery, *Introduction to
//!   Statistical Quality Control*, §9.1) with reference value `k` (in SDs) on `z_t`:
//!   ```text
//!   C⁺_t = max(0,  z_t − k + C⁺_{t−1}),   C⁻_t = max(0, −z_t − k + C⁻_{t−1}),   C±_0 = 0
//!   ```
//!   The residual entering the CUSUM is winsorised to `±cusum_clip_z` (default: the single-day
//!   Watch threshold, ≈ 3.1), the robust CUSUM of Lucas & Crosier (1982, *Commun. Statist.
//!   Theory Meth.* 11, "Robust CUSUM"): a lone artifact is the single-day detector's business
//!   and cannot raise a sustained-shift alarm by itself; in control it changes the ARL
//!   negligibly (|z| > 3.1 on 0.2 % of days).
//!   *Variant*: an Alert fires when either `C⁺` or `C⁻` exceeds `h_alert`; both statistics are
//!   then reset to 0 (restart after an alarm, no fast initial response). A Watch fires, at most
//!   once per excursion and side, when a statistic exceeds `h_watch < h_alert`; it neither
//!   resets nor protects the baseline. The flag's window runs from the day the statistic last
//!   left 0 to the day it crossed.
//! - **Multi-signal**: on each day, over the signals past their cold start and observed that
//!   day, with residuals `z_j`:
//!   ```text
//!   directional  S = Σ_j s_j z_j / √m,  s = +1 resting HR, −1 HRV, +1 skin temp, +1 resp. rate
//!                (m = number of those four present; sleep and steps carry no sign)
//!   chi-square   X = Σ_j z_j² over every signal present, compared with χ²(m_all)
//!   ```
//!   `S ~ N(0, 1)` and `X ~ χ²(m_all)` under the null when the residuals are independent
//!   across signals. **S is the flag** (one-sided, `S ≥ threshold`, needs `m ≥`
//!   `multi_signal_min_signals`): it concentrates power on the acute-illness pattern
//!   (resting HR up, HRV down, skin temperature up, respiratory rate up; e.g. Mishra et al.
//!   2020, Nat. Biomed. Eng.; Quer et al. 2021, Nat. Med.) instead of spreading it over every
//!   direction. X and its p-value are reported in the flag's reason as a number. Caveat: the
//!   residuals of different signals of one person are not independent in reality (a bad night
//!   moves HR and HRV together), so the multi-signal false-alarm rate is only nominal.
//!
//! # Cold start
//! A signal's first `min_baseline_days` observed days are reported as
//! [`DayStatus::BuildingBaseline`]: predictions and bands are produced, no flag is raised, the
//! CUSUM does not run, and every value is conditioned on. The bands are meaningful from day 1
//! because of the shared prior: the first day's predictive is the population predictive
//! (mean μ0, variance `τ² + σ_f² + σ_w² + σ_n²`, i.e. a band of width ≈ τ around the cohort
//! mean when between-person variation dominates); each conditioned day moves the posterior of
//! the personal offset `b` and trend `f` towards the person, and the band narrows towards the
//! person's own day-to-day spread (`σ_n` plus what remains of the trend).
//!
//! # Baseline protection (which days are conditioned on)
//! After the cold start, a day of a signal is **withheld** (not conditioned on; the filter
//! predicts the next day from the last conditioned one) when any of these holds on that day:
//! 1. it raised a single-day flag (any level);
//! 2. a CUSUM Alert for that signal is active: from the day it fired until it clears;
//! 3. it was part of a multi-signal flag (any level).
//!
//! A CUSUM Alert *clears* on the first day that completes `alarm_clear_days` consecutive
//! observed days whose residual, against the frozen baseline, is back on the in-control side of
//! `k` (`s·z < k`, `s` = +1 for an upward alarm, −1 for a downward one); that day is no longer
//! withheld by the alarm (it still is if rule 1 or 3 applies). While an alarm is active the
//! CUSUM does not run and raises no new flag; single-day and multi-signal flags still do.
//!
//! Withheld days wait in a per-signal list. The next conditioned day **discards** them (they
//! were an isolated outlier or an episode that ended; they never enter the baseline). If the
//! list reaches `max_withheld_days` the change is taken to be lasting (a new normal, e.g. a new
//! medication or a move): every waiting day is conditioned on in date order, the alarm ends and
//! the CUSUM restarts ("re-baselining"). [`ProspectiveDay::conditioned`] records whether a
//! day's value entered the filter, at the time or at a re-baselining.
//!
//! # Calibration
//! [`FlagConfig::from_target`] turns a stated false-alarm budget — expected false Alerts per
//! participant per `n` days — into thresholds, splitting it equally over the
//! [`DETECTOR_STREAMS`] = 2·6 + 1 detector streams (single-day and CUSUM per signal, plus the
//! multi-signal score; a union bound, so the total is at most the budget). For a per-stream
//! daily rate `r` (Watch thresholds use `WATCH_RATE_FACTOR · r`):
//! ```text
//! single day     |z| ≥ Φ⁻¹(1 − r/2)
//! multi-signal   S ≥ Φ⁻¹(1 − r)
//! CUSUM          h solving ARL₀(k, h) = 1/r, ARL from Siegmund's approximation, two-sided
//! ```
//! (Siegmund 1985, *Sequential Analysis*, via Montgomery §9.1: one-sided
//! `ARL = (e^{−2Δb} + 2Δb − 1)/(2Δ²)`, `b = h + 1.166`, `Δ = δ − k` upper / `−δ − k` lower,
//! two-sided `1/ARL = 1/ARL⁺ + 1/ARL⁻`; it matches Lucas & Crosier's (1982) table within 1 %
//! at k = 0.5, h = 4 and 5, checked in the tests). Rates are per observed day of a stream.

use chrono::NaiveDate;
use plimsoll_server::presentation::group_thousands;
use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};

use crate::cohort::ParticipantSeries;
use crate::prior::PriorParams;
pub use crate::prospective::Predictor;
use crate::prospective::{
    DailyFilter, ProspectiveError, Result, StateSpacePrior, serialize_signal, tail_probability,
};
pub use crate::prospective::{DayStatus, ProspectiveDay};
use crate::signal::Signal;

/// Number of detector streams a false-alarm budget is split over: single-day and CUSUM for each
/// of the six signals, plus the multi-signal score.
pub const DETECTOR_STREAMS: usize = 2 * Signal::ALL.len() + 1;

/// Watch thresholds are set for this many times the Alert false-alarm rate.
pub const WATCH_RATE_FACTOR: f64 = 10.0;

/// Siegmund's correction to the decision interval, `b = h + 1.166` (Siegmund 1985).
const SIEGMUND_SHIFT: f64 = 1.166;

/// How strong a flag is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagLevel {
    /// Worth keeping an eye on (calibrated to `WATCH_RATE_FACTOR` × the Alert rate).
    Watch,
    /// Strong evidence of a deviation (calibrated to the stated false-alarm budget).
    Alert,
}

/// Which detector raised a flag.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagKind {
    /// One day far outside its predictive band.
    SingleDay,
    /// A sustained shift found by the two-sided tabular CUSUM.
    Cusum,
    /// The same day's residuals of several signals together (directional illness score).
    MultiSignal,
}

/// One flag raised for a participant.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Flag {
    pub participant: String,
    /// The signal, or `None` for a multi-signal flag.
    #[serde(serialize_with = "serialize_signal_opt")]
    pub signal: Option<Signal>,
    pub kind: FlagKind,
    pub level: FlagLevel,
    /// First day of the window that triggered the flag (the flag day itself for single-day and
    /// multi-signal flags; the start of the CUSUM excursion for CUSUM flags).
    pub first_day: NaiveDate,
    /// Last day of that window (always the flag day).
    pub last_day: NaiveDate,
    /// Day the flag was raised.
    pub date: NaiveDate,
    /// The detector's statistic: signed `z` (single day), signed CUSUM statistic (`+C⁺` or
    /// `−C⁻`), or the directional score `S` (multi-signal).
    pub score: f64,
    /// Plain-language explanation with the numbers.
    pub reason: String,
}

fn serialize_signal_opt<S: serde::Serializer>(
    signal: &Option<Signal>,
    serializer: S,
) -> std::result::Result<S::Ok, S::Error> {
    match signal {
        Some(s) => serialize_signal(s, serializer),
        None => serializer.serialize_none(),
    }
}

/// Watch and Alert thresholds of one detector (`watch ≤ alert`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Thresholds {
    pub watch: f64,
    pub alert: f64,
}

impl Thresholds {
    /// The level a statistic reaches (`≥` the threshold), if any.
    pub fn level(&self, statistic: f64) -> Option<FlagLevel> {
        if statistic >= self.alert {
            Some(FlagLevel::Alert)
        } else if statistic >= self.watch {
            Some(FlagLevel::Watch)
        } else {
            None
        }
    }

    fn get(&self, level: FlagLevel) -> f64 {
        match level {
            FlagLevel::Watch => self.watch,
            FlagLevel::Alert => self.alert,
        }
    }
}

/// A false-alarm budget: `alerts` expected false Alerts per participant per `per_days` days,
/// across all detectors.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FalseAlarmTarget {
    pub alerts: f64,
    pub per_days: f64,
}

impl FalseAlarmTarget {
    /// Daily Alert rate of one detector stream: `alerts / per_days / DETECTOR_STREAMS`.
    pub fn alert_rate_per_stream(&self) -> f64 {
        self.alerts / self.per_days / DETECTOR_STREAMS as f64
    }
}

/// Thresholds and rules of [`detect`] (see the module docs for each rule).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FlagConfig {
    /// The budget the thresholds were derived from (`None` when set by hand).
    pub target: Option<FalseAlarmTarget>,
    /// Observed days of a signal before it is flagged (cold start).
    pub min_baseline_days: usize,
    /// Single-day thresholds on `|z|`.
    pub single_day_z: Thresholds,
    /// CUSUM reference value `k` (SDs; detects shifts of about `2k` best).
    pub cusum_k: f64,
    /// CUSUM decision intervals `h` (SDs).
    pub cusum_h: Thresholds,
    /// Residuals are winsorised to `±cusum_clip_z` before entering the CUSUM (must exceed
    /// `cusum_k`), so that one gross outlier cannot raise a sustained-shift alarm on its own.
    pub cusum_clip_z: f64,
    /// Thresholds on the directional multi-signal score `S`.
    pub multi_signal_score: Thresholds,
    /// Fewest signed signals (of resting HR, HRV, skin temperature, respiratory rate) present
    /// on a day for the multi-signal flag.
    pub multi_signal_min_signals: usize,
    /// Consecutive in-control days that clear a CUSUM Alert.
    pub alarm_clear_days: usize,
    /// Withheld days after which a change is accepted as the new baseline.
    pub max_withheld_days: usize,
}

/// Default budget: one false Alert per participant per year, across all detectors.
pub const DEFAULT_TARGET: FalseAlarmTarget = FalseAlarmTarget {
    alerts: 1.0,
    per_days: 365.0,
};

impl Default for FlagConfig {
    /// [`FlagConfig::from_target`] of [`DEFAULT_TARGET`].
    fn default() -> FlagConfig {
        FlagConfig::from_target(DEFAULT_TARGET).expect("the default target is valid")
    }
}

impl FlagConfig {
    /// Thresholds derived from a false-alarm budget (module docs, "Calibration"), with
    /// `k = 0.5` (tuned to a one-SD shift, the textbook choice), CUSUM input winsorised at the
    /// single-day Watch threshold, a 14-day cold start, at least
    /// 2 signed signals for the multi-signal score, 3 in-control days to clear an alarm and 21
    /// withheld days before re-baselining.
    ///
    /// # Errors
    /// [`ProspectiveError::Config`] unless both numbers are positive and finite and the Watch
    /// rate per stream (`WATCH_RATE_FACTOR · alerts / per_days / DETECTOR_STREAMS`) is below 0.5
    /// per day.
    pub fn from_target(target: FalseAlarmTarget) -> Result<FlagConfig> {
        let FalseAlarmTarget { alerts, per_days } = target;
        if !(alerts.is_finite() && alerts > 0.0 && per_days.is_finite() && per_days > 0.0) {
            return Err(ProspectiveError::Config(format!(
                "false-alarm target must be positive: {alerts} alerts per {per_days} days"
            )));
        }
        let alert_rate = target.alert_rate_per_stream();
        let watch_rate = WATCH_RATE_FACTOR * alert_rate;
        if watch_rate >= 0.5 {
            return Err(ProspectiveError::Config(format!(
                "false-alarm target {alerts} per {per_days} days is too loose: the Watch rate per detector would be {watch_rate:.3} per day"
            )));
        }
        let normal = Normal::standard();
        let two_sided = |r: f64| normal.inverse_cdf(1.0 - r / 2.0);
        let one_sided = |r: f64| normal.inverse_cdf(1.0 - r);
        let k = 0.5;
        Ok(FlagConfig {
            target: Some(target),
            min_baseline_days: 14,
            single_day_z: Thresholds {
                watch: two_sided(watch_rate),
                alert: two_sided(alert_rate),
            },
            cusum_k: k,
            cusum_h: Thresholds {
                watch: decision_interval_for_arl(k, 1.0 / watch_rate),
                alert: decision_interval_for_arl(k, 1.0 / alert_rate),
            },
            cusum_clip_z: two_sided(watch_rate),
            multi_signal_score: Thresholds {
                watch: one_sided(watch_rate),
                alert: one_sided(alert_rate),
            },
            multi_signal_min_signals: 2,
            alarm_clear_days: 3,
            max_withheld_days: 21,
        })
    }

    /// Checks that every threshold pair is finite, non-negative and ordered, and the counts
    /// are at least 1.
    ///
    /// # Errors
    /// [`ProspectiveError::Config`] naming the first bad field.
    pub fn validate(&self) -> Result<()> {
        for (name, t) in [
            ("single_day_z", self.single_day_z),
            ("cusum_h", self.cusum_h),
            ("multi_signal_score", self.multi_signal_score),
        ] {
            if !(t.watch.is_finite() && t.alert.is_finite() && 0.0 <= t.watch && t.watch <= t.alert)
            {
                return Err(ProspectiveError::Config(format!(
                    "{name}: need 0 ≤ watch ≤ alert, got watch {} and alert {}",
                    t.watch, t.alert
                )));
            }
        }
        if !(self.cusum_k.is_finite() && self.cusum_k >= 0.0) {
            return Err(ProspectiveError::Config(format!(
                "cusum_k must be finite and ≥ 0, got {}",
                self.cusum_k
            )));
        }
        if !(self.cusum_clip_z.is_finite() && self.cusum_clip_z > self.cusum_k) {
            return Err(ProspectiveError::Config(format!(
                "cusum_clip_z must be finite and above cusum_k = {}, got {}",
                self.cusum_k, self.cusum_clip_z
            )));
        }
        for (name, n) in [
            ("multi_signal_min_signals", self.multi_signal_min_signals),
            ("alarm_clear_days", self.alarm_clear_days),
            ("max_withheld_days", self.max_withheld_days),
        ] {
            if n == 0 {
                return Err(ProspectiveError::Config(format!(
                    "{name} must be at least 1"
                )));
            }
        }
        Ok(())
    }
}

/// Siegmund's approximation to the average run length of the two-sided tabular CUSUM with
/// reference value `k` and decision interval `h` (SDs) when the mean has shifted by `shift` SDs
/// (0 = in control). Formula and source in the module docs.
pub fn siegmund_arl(k: f64, h: f64, shift: f64) -> f64 {
    let b = h + SIEGMUND_SHIFT;
    let one_sided = |delta: f64| {
        if delta.abs() < 1e-9 {
            b * b
        } else {
            ((-2.0 * delta * b).exp() + 2.0 * delta * b - 1.0) / (2.0 * delta * delta)
        }
    };
    let upper = one_sided(shift - k);
    let lower = one_sided(-shift - k);
    1.0 / (1.0 / upper + 1.0 / lower)
}

/// The decision interval `h ≥ 0` whose in-control two-sided ARL ([`siegmund_arl`] with no
/// shift) equals `arl` (bisection to 1e-10; 0 if even `h = 0` runs longer).
pub fn decision_interval_for_arl(k: f64, arl: f64) -> f64 {
    let (mut lo, mut hi) = (0.0_f64, 1.0_f64);
    if siegmund_arl(k, lo, 0.0) >= arl {
        return 0.0;
    }
    while siegmund_arl(k, hi, 0.0) < arl && hi < 1e6 {
        hi *= 2.0;
    }
    while hi - lo > 1e-10 {
        let mid = 0.5 * (lo + hi);
        if siegmund_arl(k, mid, 0.0) < arl {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

/// Side of a CUSUM statistic.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum CusumSide {
    /// `C⁺`: the signal is running above its prediction.
    Upper,
    /// `C⁻`: the signal is running below its prediction.
    Lower,
}

impl CusumSide {
    /// +1 for upper, −1 for lower.
    pub fn sign(self) -> f64 {
        match self {
            CusumSide::Upper => 1.0,
            CusumSide::Lower => -1.0,
        }
    }

    fn index(self) -> usize {
        match self {
            CusumSide::Upper => 0,
            CusumSide::Lower => 1,
        }
    }
}

/// Two-sided tabular CUSUM on standardised values (module docs): the state `(C⁺, C⁻)`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TabularCusum {
    /// Reference value `k` (SDs).
    pub k: f64,
    /// `C⁺`.
    pub upper: f64,
    /// `C⁻`.
    pub lower: f64,
}

impl TabularCusum {
    /// Both statistics at 0.
    pub fn new(k: f64) -> TabularCusum {
        TabularCusum {
            k,
            upper: 0.0,
            lower: 0.0,
        }
    }

    /// `C⁺ ← max(0, z − k + C⁺)`, `C⁻ ← max(0, −z − k + C⁻)`.
    pub fn update(&mut self, z: f64) {
        self.upper = (z - self.k + self.upper).max(0.0);
        self.lower = (-z - self.k + self.lower).max(0.0);
    }

    /// The side whose statistic exceeds `h` (strictly), the larger one if both do.
    pub fn exceeded(&self, h: f64) -> Option<CusumSide> {
        match (self.upper > h, self.lower > h) {
            (true, true) if self.lower > self.upper => Some(CusumSide::Lower),
            (true, _) => Some(CusumSide::Upper),
            (false, true) => Some(CusumSide::Lower),
            (false, false) => None,
        }
    }

    /// The statistic of one side.
    pub fn statistic(&self, side: CusumSide) -> f64 {
        match side {
            CusumSide::Upper => self.upper,
            CusumSide::Lower => self.lower,
        }
    }

    /// Restart after an alarm: both statistics to 0.
    pub fn reset(&mut self) {
        self.upper = 0.0;
        self.lower = 0.0;
    }
}

/// Direction of each signal in the acute-illness pattern (resting HR up, HRV down, skin
/// temperature up, respiratory rate up); `None` for signals without one (sleep, steps).
pub fn illness_direction(signal: Signal) -> Option<f64> {
    match signal {
        Signal::RestingHr | Signal::SkinTempDelta | Signal::RespRate => Some(1.0),
        Signal::HrvRmssd => Some(-1.0),
        Signal::Sleep | Signal::Steps => None,
    }
}

/// The two multi-signal statistics of one day (module docs).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MultiSignalScore {
    /// Number of residuals in the chi-square sum (every signal given).
    pub n_signals: usize,
    /// `X = Σ z_j²`.
    pub chi_square: f64,
    /// Upper tail `P(χ²(n_signals) ≥ X)`.
    pub chi_square_p: f64,
    /// Number of signed signals in the directional score.
    pub n_directional: usize,
    /// `S = Σ s_j z_j / √m` over the signed signals; `None` if there are none.
    pub directional: Option<f64>,
    /// One-sided upper tail `1 − Φ(S)`.
    pub directional_p: Option<f64>,
}

/// Both multi-signal statistics of one day's residuals `(signal, z)`; `None` when empty.
pub fn multi_signal_score(residuals: &[(Signal, f64)]) -> Option<MultiSignalScore> {
    if residuals.is_empty() {
        return None;
    }
    let n_signals = residuals.len();
    let chi_square: f64 = residuals.iter().map(|(_, z)| z * z).sum();
    let chi_square_p = ChiSquared::new(n_signals as f64)
        .expect("positive degrees of freedom")
        .sf(chi_square);
    let (n_directional, signed_sum) = residuals
        .iter()
        .filter_map(|(s, z)| illness_direction(*s).map(|sign| sign * z))
        .fold((0usize, 0.0), |(n, sum), v| (n + 1, sum + v));
    let directional = (n_directional > 0).then(|| signed_sum / (n_directional as f64).sqrt());
    Some(MultiSignalScore {
        n_signals,
        chi_square,
        chi_square_p,
        n_directional,
        directional,
        directional_p: directional.map(|s| Normal::standard().sf(s)),
    })
}

/// Everything [`detect`] found for one participant.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Detection {
    /// Every observed day of every analysed signal, in date order, then signal order within
    /// a day.
    pub days: Vec<ProspectiveDay>,
    /// Flags in the order raised (date, then signal, then single-day before CUSUM; the
    /// multi-signal flag of a day last).
    pub flags: Vec<Flag>,
}

/// The running CUSUM excursion of one side: where it started and what it averaged.
#[derive(Debug, Clone, Copy, Default)]
struct Excursion {
    start: Option<NaiveDate>,
    n_days: usize,
    sum_observed: f64,
    sum_expected: f64,
    watch_raised: bool,
}

/// An active CUSUM Alert.
#[derive(Debug, Clone, Copy)]
struct Alarm {
    side: CusumSide,
    clear_streak: usize,
}

/// A withheld day waiting to be discarded or conditioned on.
#[derive(Debug, Clone, Copy)]
struct Withheld {
    day: i64,
    z_obs: f64,
    record: usize,
}

/// Per-signal state of [`detect_with`].
#[derive(Debug)]
struct Track<'a, P> {
    signal: Signal,
    column: &'a [Option<f64>],
    filter: P,
    n_observed: usize,
    cusum: TabularCusum,
    excursions: [Excursion; 2],
    alarm: Option<Alarm>,
    withheld: Vec<Withheld>,
}

impl<P> Track<'_, P> {
    fn restart_cusum(&mut self) {
        self.cusum.reset();
        self.excursions = [Excursion::default(); 2];
    }
}

/// One signal's score on the current day.
#[derive(Debug, Clone, Copy)]
struct Scored {
    track: usize,
    record: usize,
    z_obs: f64,
    z: f64,
    cold: bool,
    withhold: bool,
    flagged: bool,
}

/// Scores every observed day of every signal of `series` prospectively under the shared prior
/// (the exact filter [`DailyFilter`]) and raises flags (module docs for every rule). This is
/// [`detect_with`] with one [`DailyFilter`] per signal.
///
/// Signals analysed: those with at least one value in `series` and a prior in `priors`
/// (signals without a prior are skipped). Day indices count from the first date of the series.
///
/// # Errors
/// - [`ProspectiveError::Config`] if `cfg` fails [`FlagConfig::validate`];
/// - [`ProspectiveError::DuplicatePrior`] if two priors share a signal;
/// - [`ProspectiveError::InSeries`] wrapping a bad prior or a non-finite value, with the
///   participant and signal.
pub fn detect(
    series: &ParticipantSeries,
    priors: &[PriorParams],
    cfg: &FlagConfig,
) -> Result<Detection> {
    cfg.validate()?;
    for (i, p) in priors.iter().enumerate() {
        if priors[..i].iter().any(|q| q.signal == p.signal) {
            return Err(ProspectiveError::DuplicatePrior(p.signal));
        }
    }
    let mut filters = Vec::with_capacity(priors.len());
    for (&signal, column) in &series.values {
        let Some(prior) = priors.iter().find(|p| p.signal == signal) else {
            continue;
        };
        if column.len() == series.dates.len() && column.iter().all(Option::is_none) {
            continue;
        }
        let model = StateSpacePrior::new(prior).map_err(|e| ProspectiveError::InSeries {
            participant: series.participant.clone(),
            signal,
            source: Box::new(e),
        })?;
        filters.push((signal, DailyFilter::new(&model)));
    }
    detect_with(series, filters, cfg)
}

/// Scores every observed day of every signal of `series` prospectively with the given
/// predictors, one per signal, and raises flags with exactly the detectors, thresholds, cold
/// start and baseline-protection rules of [`detect`] (module docs). Only the one-step-ahead
/// predictive differs between predictors; this is what lets the evaluation compare methods
/// like for like.
///
/// Signals analysed: those with a predictor and at least one value in `series` (predictors of
/// other signals are dropped). Day indices count from the first date of the series.
///
/// # Errors
/// - [`ProspectiveError::Config`] if `cfg` fails [`FlagConfig::validate`];
/// - [`ProspectiveError::DuplicatePrior`] if two predictors share a signal;
/// - [`ProspectiveError::InSeries`] wrapping a column of the wrong length, a non-finite value
///   or a predictor error, with the participant and signal.
pub fn detect_with<P: Predictor>(
    series: &ParticipantSeries,
    predictors: Vec<(Signal, P)>,
    cfg: &FlagConfig,
) -> Result<Detection> {
    cfg.validate()?;
    for (i, (signal, _)) in predictors.iter().enumerate() {
        if predictors[..i].iter().any(|(other, _)| other == signal) {
            return Err(ProspectiveError::DuplicatePrior(*signal));
        }
    }
    let in_series = |signal: Signal, source: ProspectiveError| ProspectiveError::InSeries {
        participant: series.participant.clone(),
        signal,
        source: Box::new(source),
    };
    let mut predictors: Vec<Option<(Signal, P)>> = predictors.into_iter().map(Some).collect();
    let mut tracks = Vec::new();
    for (&signal, column) in &series.values {
        let Some(slot) = predictors
            .iter_mut()
            .find(|p| p.as_ref().is_some_and(|(s, _)| *s == signal))
        else {
            continue;
        };
        if column.len() != series.dates.len() {
            return Err(in_series(
                signal,
                ProspectiveError::Shape(format!(
                    "{} values for {} dates",
                    column.len(),
                    series.dates.len()
                )),
            ));
        }
        if column.iter().all(Option::is_none) {
            continue;
        }
        let (_, filter) = slot.take().expect("found above");
        tracks.push(Track {
            signal,
            column,
            filter,
            n_observed: 0,
            cusum: TabularCusum::new(cfg.cusum_k),
            excursions: [Excursion::default(); 2],
            alarm: None,
            withheld: Vec::new(),
        });
    }
    let mut out = Detection {
        days: Vec::with_capacity(tracks.len() * series.dates.len()),
        flags: Vec::new(),
    };
    let Some(&origin) = series.dates.first() else {
        return Ok(out);
    };
    let mut today: Vec<Scored> = Vec::with_capacity(tracks.len());
    let mut residuals: Vec<(Signal, f64)> = Vec::with_capacity(tracks.len());
    for (i, &date) in series.dates.iter().enumerate() {
        let day = (date - origin).num_days();
        today.clear();

        // 1. Predict and score every signal observed today (no conditioning yet).
        for (track_idx, track) in tracks.iter_mut().enumerate() {
            let Some(value) = track.column[i] else {
                continue;
            };
            let signal = track.signal;
            if !value.is_finite() {
                return Err(in_series(
                    signal,
                    ProspectiveError::NonFinite(format!("value on {date} = {value}")),
                ));
            }
            let (centre, scale) = signal.reference();
            let z_obs = (value - centre) / scale;
            let pred = track
                .filter
                .predict(day)
                .map_err(|e| in_series(signal, e))?;
            let band = pred.in_units(signal);
            let z = pred.residual(z_obs);
            let cold = track.n_observed < cfg.min_baseline_days;
            track.n_observed += 1;
            today.push(Scored {
                track: track_idx,
                record: out.days.len(),
                z_obs,
                z,
                cold,
                withhold: false,
                flagged: false,
            });
            out.days.push(ProspectiveDay {
                date,
                signal,
                observed: value,
                mean: band.mean,
                sd: band.sd,
                lo50: band.lo50,
                hi50: band.hi50,
                lo95: band.lo95,
                hi95: band.hi95,
                z,
                tail_p: tail_probability(z),
                conditioned: false,
                status: if cold {
                    DayStatus::BuildingBaseline
                } else {
                    DayStatus::Normal
                },
            });
        }

        // 2. Per-signal detectors: single day, then CUSUM.
        for scored in today.iter_mut().filter(|s| !s.cold) {
            let track = &mut tracks[scored.track];
            let record = &out.days[scored.record];
            if let Some(level) = cfg.single_day_z.level(scored.z.abs()) {
                out.flags.push(Flag {
                    participant: series.participant.clone(),
                    signal: Some(track.signal),
                    kind: FlagKind::SingleDay,
                    level,
                    first_day: date,
                    last_day: date,
                    date,
                    score: scored.z,
                    reason: single_day_reason(record),
                });
                scored.withhold = true;
                scored.flagged = true;
            }
            let (alarm_active, cusum_flag) = step_cusum(track, record, cfg);
            if let Some((level, side, statistic, excursion)) = cusum_flag {
                out.flags.push(Flag {
                    participant: series.participant.clone(),
                    signal: Some(track.signal),
                    kind: FlagKind::Cusum,
                    level,
                    first_day: excursion.start.unwrap_or(date),
                    last_day: date,
                    date,
                    score: side.sign() * statistic,
                    reason: cusum_reason(
                        track.signal,
                        date,
                        level,
                        side,
                        statistic,
                        &excursion,
                        cfg,
                    ),
                });
                scored.flagged = true;
            }
            scored.withhold |= alarm_active;
        }

        // 3. Multi-signal score over the signals past their cold start.
        residuals.clear();
        residuals.extend(
            today
                .iter()
                .filter(|s| !s.cold)
                .map(|s| (tracks[s.track].signal, s.z)),
        );
        if let Some(score) = multi_signal_score(&residuals)
            && score.n_directional >= cfg.multi_signal_min_signals
            && let Some(s) = score.directional
            && let Some(level) = cfg.multi_signal_score.level(s)
        {
            let involved: Vec<&Scored> = today
                .iter()
                .filter(|x| !x.cold && illness_direction(tracks[x.track].signal).is_some())
                .collect();
            let records: Vec<&ProspectiveDay> =
                involved.iter().map(|x| &out.days[x.record]).collect();
            let reason = multi_signal_reason(&records, &score);
            out.flags.push(Flag {
                participant: series.participant.clone(),
                signal: None,
                kind: FlagKind::MultiSignal,
                level,
                first_day: date,
                last_day: date,
                date,
                score: s,
                reason,
            });
            for x in today
                .iter_mut()
                .filter(|x| !x.cold && illness_direction(tracks[x.track].signal).is_some())
            {
                x.withhold = true;
                x.flagged = true;
            }
        }

        // 4. Condition, withhold or re-baseline.
        for scored in &today {
            let track = &mut tracks[scored.track];
            let signal = track.signal;
            if scored.flagged {
                out.days[scored.record].status = DayStatus::Flagged;
            }
            if !scored.withhold {
                track.withheld.clear();
                track
                    .filter
                    .update(day, scored.z_obs)
                    .map_err(|e| in_series(signal, e))?;
                out.days[scored.record].conditioned = true;
                continue;
            }
            track.withheld.push(Withheld {
                day,
                z_obs: scored.z_obs,
                record: scored.record,
            });
            if track.withheld.len() >= cfg.max_withheld_days {
                for w in std::mem::take(&mut track.withheld) {
                    track
                        .filter
                        .update(w.day, w.z_obs)
                        .map_err(|e| in_series(signal, e))?;
                    out.days[w.record].conditioned = true;
                }
                track.alarm = None;
                track.restart_cusum();
            }
        }
    }
    Ok(out)
}

/// A CUSUM flag raised today: level, side, statistic, and the excursion that led to it.
type CusumFlag = (FlagLevel, CusumSide, f64, Excursion);

/// Advances one signal's CUSUM (or its active alarm) by one day. Returns whether an Alert is
/// active after today (so today is withheld) and the flag raised today, if any.
fn step_cusum<P>(
    track: &mut Track<'_, P>,
    record: &ProspectiveDay,
    cfg: &FlagConfig,
) -> (bool, Option<CusumFlag>) {
    let z = record.z;
    if let Some(alarm) = &mut track.alarm {
        if alarm.side.sign() * z < cfg.cusum_k {
            alarm.clear_streak += 1;
        } else {
            alarm.clear_streak = 0;
        }
        if alarm.clear_streak >= cfg.alarm_clear_days {
            track.alarm = None;
            return (false, None);
        }
        return (true, None);
    }
    track
        .cusum
        .update(z.clamp(-cfg.cusum_clip_z, cfg.cusum_clip_z));
    for side in [CusumSide::Upper, CusumSide::Lower] {
        let excursion = &mut track.excursions[side.index()];
        if track.cusum.statistic(side) > 0.0 {
            excursion.start.get_or_insert(record.date);
            excursion.n_days += 1;
            excursion.sum_observed += record.observed;
            excursion.sum_expected += record.mean;
        } else {
            *excursion = Excursion::default();
        }
    }
    if let Some(side) = track.cusum.exceeded(cfg.cusum_h.alert) {
        let statistic = track.cusum.statistic(side);
        let excursion = track.excursions[side.index()];
        track.restart_cusum();
        track.alarm = Some(Alarm {
            side,
            clear_streak: 0,
        });
        return (true, Some((FlagLevel::Alert, side, statistic, excursion)));
    }
    let mut flag = None;
    for side in [CusumSide::Upper, CusumSide::Lower] {
        let statistic = track.cusum.statistic(side);
        let excursion = &mut track.excursions[side.index()];
        if statistic > cfg.cusum_h.watch && !excursion.watch_raised {
            excursion.watch_raised = true;
            flag = Some((FlagLevel::Watch, side, statistic, *excursion));
        }
    }
    (false, flag)
}

/// A value of a signal as a number, at the signal's precision (steps with
/// thousands commas): the review pages' own rule
/// ([`plimsoll_server::presentation::fmt_signal_value`]).
pub(crate) fn fmt_number(signal: Signal, v: f64) -> String {
    plimsoll_server::presentation::fmt_signal_value(signal.column(), v)
}

/// A value of a signal with its unit, e.g. `74.2 bpm`.
fn fmt_value(signal: Signal, v: f64) -> String {
    format!("{} {}", fmt_number(signal, v), signal.unit())
}

/// `p` as a frequency in days, e.g. `about 1 in 2,000 days` (two significant figures).
fn one_in_days(p: f64) -> String {
    let n = 1.0 / p;
    if !(n.is_finite()) || n >= 1e6 {
        return "fewer than 1 in a million days".to_owned();
    }
    if n < 10.0 {
        return format!("about 1 in {} days", n.round().max(1.0) as u64);
    }
    let magnitude = 10f64.powf(n.log10().floor() - 1.0);
    let rounded = (n / magnitude).round() * magnitude;
    format!(
        "about 1 in {} days",
        group_thousands(rounded.round() as u64)
    )
}

/// e.g. "resting heart rate 74.2 bpm vs expected 63.1 bpm (95% band 57.0–69.2); a day this far
/// out is expected about 1 in 2,000 days".
fn single_day_reason(day: &ProspectiveDay) -> String {
    let s = day.signal;
    format!(
        "{} {} vs expected {} (95% band {}–{}); a day this far out is expected {}",
        s.label(),
        fmt_value(s, day.observed),
        fmt_value(s, day.mean),
        fmt_number(s, day.lo95),
        fmt_number(s, day.hi95),
        one_in_days(day.tail_p)
    )
}

fn cusum_reason(
    signal: Signal,
    date: NaiveDate,
    level: FlagLevel,
    side: CusumSide,
    statistic: f64,
    excursion: &Excursion,
    cfg: &FlagConfig,
) -> String {
    let n = excursion.n_days.max(1) as f64;
    let h = cfg.cusum_h.get(level);
    let first = excursion.start.unwrap_or(date);
    let direction = match side {
        CusumSide::Upper => "higher",
        CusumSide::Lower => "lower",
    };
    let level_name = match level {
        FlagLevel::Watch => "watch",
        FlagLevel::Alert => "alert",
    };
    format!(
        "{} has run {direction} than expected for {} observed days ({first} to {date}): on average {} vs expected {}; the cumulative deviation score {statistic:.1} passed the {level_name} level {h:.1} (by chance alone this level is reached {})",
        signal.label(),
        excursion.n_days,
        fmt_value(signal, excursion.sum_observed / n),
        fmt_value(signal, excursion.sum_expected / n),
        one_in_days(1.0 / siegmund_arl(cfg.cusum_k, h, 0.0)),
    )
}

fn multi_signal_reason(days: &[&ProspectiveDay], score: &MultiSignalScore) -> String {
    let parts: Vec<String> = days
        .iter()
        .map(|d| {
            format!(
                "{} {} vs expected {} (z {:+.1})",
                d.signal.label(),
                fmt_value(d.signal, d.observed),
                fmt_value(d.signal, d.mean),
                d.z
            )
        })
        .collect();
    format!(
        "acute-illness pattern across {} signals ({}): combined score {:.2}, a day this high is expected {}; chi-square over all {} signals {:.1} (p = {:.2e})",
        score.n_directional,
        parts.join("; "),
        score.directional.unwrap_or(f64::NAN),
        one_in_days(score.directional_p.unwrap_or(f64::NAN)),
        score.n_signals,
        score.chi_square,
        score.chi_square_p,
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeMap;

    /// Siegmund's approximation against Lucas & Crosier (1982), Table 1 (two-sided, k = 0.5):
    /// ARL₀ 168 (h = 4), 465 (h = 5); ARL at a 1σ shift 8.38 (h = 4), 10.4 (h = 5).
    /// Tolerance 1.5 % relative (Siegmund's approximation error at these settings).
    #[test]
    fn siegmund_matches_published_arls() {
        for (h, shift, published) in [
            (4.0, 0.0, 168.0),
            (5.0, 0.0, 465.0),
            (4.0, 1.0, 8.38),
            (5.0, 1.0, 10.4),
        ] {
            let arl = siegmund_arl(0.5, h, shift);
            assert!(
                (arl / published - 1.0).abs() < 0.015,
                "h {h}, shift {shift}: {arl} vs {published}"
            );
        }
    }

    #[test]
    fn decision_interval_inverts_the_arl() {
        for arl in [50.0, 168.0, 1000.0, 5000.0] {
            let h = decision_interval_for_arl(0.5, arl);
            assert!((siegmund_arl(0.5, h, 0.0) / arl - 1.0).abs() < 1e-8);
        }
    }

    /// Thresholds from the default target, by hand: per-stream rate r = 1/365/13 = 2.107e-4;
    /// single-day alert Φ⁻¹(1 − r/2) = 3.70, watch (10r) 3.07; multi-signal Φ⁻¹(1 − r) = 3.53.
    #[test]
    fn from_target_gives_normal_tail_thresholds() {
        let cfg = FlagConfig::default();
        let r = 1.0 / 365.0 / 13.0;
        let n = Normal::standard();
        assert!((cfg.single_day_z.alert - n.inverse_cdf(1.0 - r / 2.0)).abs() < 1e-9);
        assert!((cfg.single_day_z.alert - 3.70).abs() < 0.01);
        assert!((cfg.single_day_z.watch - 3.07).abs() < 0.01);
        assert!((cfg.multi_signal_score.alert - 3.53).abs() < 0.01);
        assert!((siegmund_arl(0.5, cfg.cusum_h.alert, 0.0) * r - 1.0).abs() < 1e-6);
        assert!(cfg.cusum_h.watch < cfg.cusum_h.alert);
        cfg.validate().unwrap();
        assert!(
            FlagConfig::from_target(FalseAlarmTarget {
                alerts: 0.0,
                per_days: 1.0
            })
            .is_err()
        );
        assert!(
            FlagConfig::from_target(FalseAlarmTarget {
                alerts: 100.0,
                per_days: 1.0
            })
            .is_err()
        );
    }

    /// Hand computation: z = (RHR +2, HRV −1, skin +1.5, resp +0.5, sleep −3).
    /// S = (2 + 1 + 1.5 + 0.5)/√4 = 2.5; X = 4 + 1 + 2.25 + 0.25 + 9 = 16.5 on 5 df, whose
    /// upper tail is 0.005550 (χ²(5) survival function at 16.5, e.g. scipy.stats.chi2.sf).
    #[test]
    fn multi_signal_score_by_hand() {
        let s = multi_signal_score(&[
            (Signal::RestingHr, 2.0),
            (Signal::HrvRmssd, -1.0),
            (Signal::SkinTempDelta, 1.5),
            (Signal::RespRate, 0.5),
            (Signal::Sleep, -3.0),
        ])
        .unwrap();
        assert_eq!(s.n_signals, 5);
        assert_eq!(s.n_directional, 4);
        assert!((s.directional.unwrap() - 2.5).abs() < 1e-12);
        assert!((s.chi_square - 16.5).abs() < 1e-12);
        assert!(
            (s.chi_square_p - 0.005_550).abs() < 5e-6,
            "{}",
            s.chi_square_p
        );
        assert!((s.directional_p.unwrap() - 0.006_209_665).abs() < 1e-8);
        let only_sleep = multi_signal_score(&[(Signal::Sleep, 1.0)]).unwrap();
        assert_eq!(only_sleep.directional, None);
        assert!(multi_signal_score(&[]).is_none());
    }

    #[test]
    fn cusum_recursion_and_two_sided_alarm() {
        let mut c = TabularCusum::new(0.5);
        for z in [1.0, 2.0, -0.2] {
            c.update(z);
        }
        // C⁺: 0.5, 2.0, 1.3; C⁻: 0, 0, 0.
        assert!((c.upper - 1.3).abs() < 1e-12 && c.lower == 0.0);
        assert_eq!(c.exceeded(1.0), Some(CusumSide::Upper));
        assert_eq!(c.exceeded(1.3), None);
        c.reset();
        for _ in 0..3 {
            c.update(-2.0);
        }
        assert!((c.lower - 4.5).abs() < 1e-12);
        assert_eq!(c.exceeded(4.0), Some(CusumSide::Lower));
    }

    #[test]
    fn reasons_state_the_numbers() {
        assert_eq!(one_in_days(1.0 / 2_034.0), "about 1 in 2,000 days");
        assert_eq!(one_in_days(0.2), "about 1 in 5 days");
        assert_eq!(one_in_days(0.0), "fewer than 1 in a million days");
        let day = ProspectiveDay {
            date: NaiveDate::from_ymd_opt(2024, 3, 1).unwrap(),
            signal: Signal::RestingHr,
            observed: 74.2,
            mean: 63.1,
            sd: 3.1,
            lo50: 61.0,
            hi50: 65.2,
            lo95: 57.0,
            hi95: 69.2,
            z: 3.58,
            tail_p: 1.0 / 2_000.0,
            conditioned: false,
            status: DayStatus::Flagged,
        };
        assert_eq!(
            single_day_reason(&day),
            "resting heart rate 74.2 bpm vs expected 63.1 bpm (95% band 57.0–69.2); a day this far out is expected about 1 in 2,000 days"
        );
        assert_eq!(fmt_value(Signal::Steps, 12_345.4), "12,345 steps");
    }

    /// A flat, noise-free-ish person: constant series with a 1-day spike, then a 10-day upward
    /// step. Checks cold start, the single-day flag and its withholding, the CUSUM alert with
    /// its window, protection during the alarm, and clearing after the step ends.
    #[test]
    fn detect_walks_through_the_rules() {
        let prior = PriorParams {
            signal: Signal::RestingHr,
            values: [
                0.0,
                0.5f64.ln(),
                0.01f64.ln(),
                30f64.ln(),
                0.001f64.ln(),
                0.0,
                0.04f64.ln(),
            ],
        };
        let start = NaiveDate::from_ymd_opt(2024, 1, 1).unwrap();
        let n = 80;
        let dates: Vec<NaiveDate> = (0..n).map(|d| start + chrono::Duration::days(d)).collect();
        // Deterministic small wiggle (SD ≈ 1.4 bpm ≈ 0.14 z-units), level 60 bpm.
        let mut values: Vec<Option<f64>> = (0..n)
            .map(|d| Some(60.0 + 2.0 * ((d as f64) * 2.39).sin()))
            .collect();
        values[30] = Some(85.0); // spike
        for v in values.iter_mut().take(60).skip(45) {
            *v = v.map(|x| x + 4.0); // 15-day step of ≈ 2 noise SDs
        }
        let series = ParticipantSeries {
            participant: "p1".into(),
            dates,
            values: BTreeMap::from([(Signal::RestingHr, values)]),
        };
        let cfg = FlagConfig::default();
        let det = detect(&series, &[prior], &cfg).unwrap();
        assert_eq!(det.days.len(), n as usize);
        assert!(
            det.days[..14]
                .iter()
                .all(|d| d.status == DayStatus::BuildingBaseline && d.conditioned)
        );
        assert!(
            det.days[14..30]
                .iter()
                .all(|d| d.status == DayStatus::Normal)
        );
        let spike: Vec<&Flag> = det
            .flags
            .iter()
            .filter(|f| f.kind == FlagKind::SingleDay)
            .collect();
        assert!(
            spike
                .iter()
                .any(|f| f.date == series.dates[30] && f.level == FlagLevel::Alert)
        );
        assert!(!det.days[30].conditioned);
        assert!(
            det.days[31].conditioned,
            "isolated spike discarded, next day conditioned"
        );
        let alert = det
            .flags
            .iter()
            .find(|f| f.kind == FlagKind::Cusum && f.level == FlagLevel::Alert)
            .expect("a CUSUM alert for the step");
        assert!(
            alert.date >= series.dates[45] && alert.date <= series.dates[53],
            "{alert:?}"
        );
        assert!(alert.first_day >= series.dates[44] && alert.score > 0.0);
        assert!(
            alert.reason.contains("higher than expected"),
            "{}",
            alert.reason
        );
        let alert_idx = (alert.date - start).num_days() as usize;
        assert!(
            det.days[alert_idx..60].iter().all(|d| !d.conditioned),
            "protected during the step"
        );
        assert!(
            det.days[70..].iter().all(|d| d.conditioned),
            "alarm cleared after the step"
        );
        for f in &det.flags {
            assert!(
                f.date >= series.dates[14],
                "no flag during the cold start: {f:?}"
            );
        }
        let json = serde_json::to_string(&det).unwrap();
        assert!(json.contains("\"signal\":\"resting_hr_bpm\""));
        assert!(json.contains("\"status\":\"building_baseline\""));
    }

    /// A lasting shift is re-baselined after `max_withheld_days` withheld days.
    #[test]
    fn lasting_shift_is_rebaselined() {
        let prior = PriorParams {
            signal: Signal::Sleep,
            values: [
                0.0,
                0.5f64.ln(),
                0.01f64.ln(),
                30f64.ln(),
                0.001f64.ln(),
                0.0,
                0.04f64.ln(),
            ],
        };
        let start = NaiveDate::from_ymd_opt(2024, 1, 1).unwrap();
        let n = 120;
        let dates: Vec<NaiveDate> = (0..n).map(|d| start + chrono::Duration::days(d)).collect();
        let values: Vec<Option<f64>> = (0..n)
            .map(|d| Some(7.0 + 0.1 * ((d as f64) * 2.39).sin() + if d >= 40 { 1.5 } else { 0.0 }))
            .collect();
        let series = ParticipantSeries {
            participant: "p2".into(),
            dates,
            values: BTreeMap::from([(Signal::Sleep, values)]),
        };
        let det = detect(&series, &[prior], &FlagConfig::default()).unwrap();
        // Withheld from day 40 for 21 days, then all conditioned together; afterwards the
        // new level is the baseline.
        assert!(
            det.flags
                .iter()
                .any(|f| f.date == series.dates[40] && f.kind == FlagKind::SingleDay)
        );
        assert!(det.days[..40].iter().all(|d| d.conditioned));
        assert!(
            det.days[40..61].iter().all(|d| d.conditioned),
            "re-baselined days are conditioned"
        );
        assert!(
            det.days[100..]
                .iter()
                .all(|d| d.conditioned && d.status == DayStatus::Normal)
        );
    }

    #[test]
    fn config_and_prior_errors() {
        let series = ParticipantSeries {
            participant: "p".into(),
            dates: vec![NaiveDate::from_ymd_opt(2024, 1, 1).unwrap()],
            values: BTreeMap::from([(Signal::Sleep, vec![Some(7.0)])]),
        };
        let p = PriorParams::initial(Signal::Sleep);
        assert!(matches!(
            detect(&series, &[p, p], &FlagConfig::default()),
            Err(ProspectiveError::DuplicatePrior(Signal::Sleep))
        ));
        let mut cfg = FlagConfig::default();
        cfg.single_day_z.watch = 5.0;
        assert!(matches!(
            detect(&series, &[p], &cfg),
            Err(ProspectiveError::Config(_))
        ));
        // No prior for the signal: skipped, not an error.
        let det = detect(
            &series,
            &[PriorParams::initial(Signal::Steps)],
            &FlagConfig::default(),
        )
        .unwrap();
        assert!(det.days.is_empty());
    }
}
