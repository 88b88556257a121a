//! The four detection methods the evaluation compares, as one-step-ahead [`Predictor`]s that
//! [`crate::flags::detect_with`] runs through the same detectors, thresholds and
//! baseline-protection rules:
//!
//! - `federated`: the exact filter ([`DailyFilter`]) under the shared prior learned by
//!   federated rounds, i.e. the personal posterior the device computes.
//! - `local_only`: the same filter with hyperparameters fit on the participant's own first
//!   `local_fit_days` observed days of the signal alone ([`fit_local`]); it scores from the
//!   day after those days (earlier it has nothing to predict with).
//! - `population`: the shared prior's marginal predictive, never conditioned
//!   ([`PopulationPredictor`]): one model for everybody, no personalisation.
//! - `rolling_z`: the textbook rolling-baseline z-score ([`RollingZ`]).
//!
//! All work in standardised units `(y − centre) / scale` ([`Signal::reference`]).

use std::collections::VecDeque;

use crate::cohort::ParticipantSeries;
use crate::detect::{DayScore, ParticipantScores};
use crate::gp::LbfgsConfig;
use crate::prior::{N_PARAMS, PriorParams};
use crate::prospective::{OneStep, Predictor, ProspectiveError, Result, StateSpacePrior};
use crate::signal::Signal;
use crate::training::{LocalSeries, fit_single};

/// A method of the comparison.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Method {
    Federated,
    LocalOnly,
    Population,
    RollingZ,
    Alavi,
}

impl Method {
    /// Every method, in report order.
    pub const ALL: [Method; 5] = [
        Method::Federated,
        Method::LocalOnly,
        Method::Population,
        Method::RollingZ,
        Method::Alavi,
    ];

    /// Stable key used in the CSV, JSON and plot.
    pub fn key(self) -> &'static str {
        match self {
            Method::Federated => "federated",
            Method::LocalOnly => "local_only",
            Method::Population => "population",
            Method::RollingZ => "rolling_z",
            Method::Alavi => "rhr_median_rule",
        }
    }

    /// One-line description for the report.
    pub fn description(self) -> &'static str {
        match self {
            Method::Federated => {
                "shared GP prior learned by federated rounds, personal posterior by the exact filter"
            }
            Method::LocalOnly => {
                "same GP, hyperparameters fit (MAP, L-BFGS) on the participant's own first days alone"
            }
            Method::Population => {
                "shared prior's marginal predictive, never conditioned: one model, no personalisation"
            }
            Method::RollingZ => {
                "rolling-baseline z-score: mean and SD of the last 28 conditioned values"
            }
            Method::Alavi => {
                "resting HR at least 4 bpm above a streaming median baseline on two consecutive nights (Alavi et al. 2022); score = the smaller excess of the two nights, in bpm"
            }
        }
    }
}

/// Checks the predictor contract shared by the non-filter predictors: finite value, days that
/// never decrease.
fn check_update(last_day: Option<i64>, day: i64, z: f64) -> Result<()> {
    if !z.is_finite() {
        return Err(ProspectiveError::NonFinite(format!(
            "observation on day {day} = {z}"
        )));
    }
    match last_day {
        Some(previous) if day < previous => Err(ProspectiveError::DaysOutOfOrder { day, previous }),
        _ => Ok(()),
    }
}

/// The population model: every day's predictive is the shared prior's marginal for a new
/// person,
///
/// ```text
/// z ~ N(μ0, τ² + σ_f² + σ_w² + σ_n²)      (StateSpacePrior::marginal_var)
/// ```
///
/// whatever the person's earlier values. `update` checks its input and otherwise ignores it.
/// Its residuals are not white for a person away from the population mean (the offset `b`
/// persists), which is exactly what personalisation removes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PopulationPredictor {
    mean: f64,
    var: f64,
    last_day: Option<i64>,
}

impl PopulationPredictor {
    pub fn new(model: &StateSpacePrior) -> PopulationPredictor {
        PopulationPredictor {
            mean: model.mean(),
            var: model.marginal_var(),
            last_day: None,
        }
    }
}

impl Predictor for PopulationPredictor {
    fn predict(&self, day: i64) -> Result<OneStep> {
        check_update(self.last_day, day, 0.0)?;
        Ok(OneStep {
            mean: self.mean,
            var_obs: self.var,
        })
    }

    fn update(&mut self, day: i64, z: f64) -> Result<()> {
        check_update(self.last_day, day, z)?;
        self.last_day = Some(day);
        Ok(())
    }
}

/// Conditioned values in the rolling baseline.
pub const ROLLING_WINDOW_VALUES: usize = 28;
/// Fewest conditioned values before the rolling z-score scores a day (its cold start).
pub const ROLLING_MIN_VALUES: usize = 14;
/// Floor on the rolling SD (standardised units), so that a run of identical values (a stuck
/// sensor) cannot make every later residual infinite.
pub const ROLLING_SD_FLOOR: f64 = 1e-6;

/// Rolling-baseline z-score: the predictive of the next value is `N(x̄, s²)` over the last
/// `ROLLING_WINDOW_VALUES` *conditioned* values `x_1 … x_n` (a count window, whatever their
/// dates),
///
/// ```text
/// x̄ = Σ x_i / n,   s² = max(Σ (x_i − x̄)² / (n − 1), ROLLING_SD_FLOOR²)
/// ```
///
/// (the usual sample SD, not a predictive-t band: this is the baseline as practitioners compute
/// it). A count window rather than a calendar one because baseline protection withholds alarm
/// days: a calendar window could empty out during a long alarm, while a count window always
/// holds the most recent accepted baseline. With fewer than 2 values the predictive is
/// `N(x̄ or 0, 1)`, a placeholder for days that are inside the cold start anyway (the method's
/// cold start is at least [`ROLLING_MIN_VALUES`] observed days, all conditioned on).
#[derive(Debug, Clone, PartialEq)]
pub struct RollingZ {
    values: VecDeque<f64>,
    last_day: Option<i64>,
}

impl Default for RollingZ {
    fn default() -> RollingZ {
        RollingZ {
            values: VecDeque::with_capacity(ROLLING_WINDOW_VALUES),
            last_day: None,
        }
    }
}

impl RollingZ {
    /// Number of values in the baseline now.
    pub fn n_values(&self) -> usize {
        self.values.len()
    }
}

impl Predictor for RollingZ {
    fn predict(&self, day: i64) -> Result<OneStep> {
        check_update(self.last_day, day, 0.0)?;
        let n = self.values.len();
        if n < 2 {
            return Ok(OneStep {
                mean: self.values.front().copied().unwrap_or(0.0),
                var_obs: 1.0,
            });
        }
        let mean = self.values.iter().sum::<f64>() / n as f64;
        let ss: f64 = self.values.iter().map(|x| (x - mean).powi(2)).sum();
        Ok(OneStep {
            mean,
            var_obs: (ss / (n - 1) as f64).max(ROLLING_SD_FLOOR * ROLLING_SD_FLOOR),
        })
    }

    fn update(&mut self, day: i64, z: f64) -> Result<()> {
        check_update(self.last_day, day, z)?;
        if self.values.len() == ROLLING_WINDOW_VALUES {
            self.values.pop_front();
        }
        self.values.push_back(z);
        self.last_day = Some(day);
        Ok(())
    }
}

/// Hyperparameters of one signal fit on one participant's first days alone.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LocalFit {
    /// Fitted parameters in wire order ([`crate::prior`]).
    pub prior: PriorParams,
    /// Whether L-BFGS met its convergence test (the parameters are used either way).
    pub converged: bool,
}

/// Fits the GP hyperparameters of `signal` on the first `n_days` observed days of `series`
/// (no later day: fitting on the whole series would let the method see the future), by
/// L-BFGS from [`PriorParams::initial`] on the MAP objective
///
/// ```text
/// NLML(θ; t, z) / n  +  (1/n) Σ_j −log p_j(θ_j)      (training::per_day_objective, λ = 1/n)
/// ```
///
/// i.e. the project's weak log-normal hyperpriors ([`crate::prior::hyperpriors`]) count once,
/// as in a MAP fit; they hold no cohort information. Without them, maximum likelihood on a few
/// weeks sends weakly identified parameters to the boundary.
///
/// Expected behaviour, not a bug: with a free mean μ0, one series cannot tell the population
/// mean from the person's offset `b`, so the mean absorbs the offset and the between-person
/// variance τ² collapses towards the hyperprior's pull; the band is then centred on the
/// person's early mean and only as wide as their early day-to-day spread.
///
/// Returns `Ok(None)` when the signal has fewer than `n_days` observed days.
///
/// # Errors
/// The optimiser's error ([`crate::gp::GpError`]) or a fit whose parameters define no valid
/// state-space model, as a message.
pub fn fit_local(
    series: &ParticipantSeries,
    signal: Signal,
    n_days: usize,
) -> std::result::Result<Option<LocalFit>, String> {
    let Some(&origin) = series.dates.first() else {
        return Ok(None);
    };
    let (t, y) = series.observations(signal, origin);
    if n_days == 0 || t.len() < n_days {
        return Ok(None);
    }
    let (centre, scale) = signal.reference();
    let local = LocalSeries {
        t: t[..n_days].to_vec(),
        z: y[..n_days].iter().map(|v| (v - centre) / scale).collect(),
    };
    let start = PriorParams::initial(signal);
    let result = fit_single(
        &start.values,
        &local,
        1.0 / n_days as f64,
        &LbfgsConfig::default(),
    )
    .map_err(|e| e.to_string())?;
    let values: [f64; N_PARAMS] = result
        .x
        .as_slice()
        .try_into()
        .map_err(|_| "optimiser changed the parameter count".to_owned())?;
    let prior = PriorParams::from_slice(signal, &values)
        .ok_or_else(|| "fit gave a non-finite parameter".to_owned())?;
    StateSpacePrior::new(&prior).map_err(|e| e.to_string())?;
    Ok(Some(LocalFit {
        prior,
        converged: result.converged,
    }))
}

/// The published resting-HR rule's score (Alavi et al. 2022, Nat. Med. 28:175): on a night
/// `t` with resting HR observed on `t` and on the calendar night before, the smaller of the two
/// nights' excess over the streaming median of every earlier night's resting HR (at least
/// `min_nights` of them). The rule as published alarms when this is at least 4 bpm; the sweep
/// varies the 4. The median includes every earlier night ("streaming"), alarm nights too (the
/// rule has no baseline protection; from memory of the paper's description).
pub fn alavi_scores(series: &ParticipantSeries, min_nights: usize) -> ParticipantScores {
    let mut out = ParticipantScores::default();
    let Some(column) = series.values.get(&crate::signal::Signal::RestingHr) else {
        return out;
    };
    let mut earlier: Vec<f64> = Vec::new();
    let mut prev_excess: Option<(chrono::NaiveDate, f64)> = None;
    for (i, &date) in series.dates.iter().enumerate() {
        let Some(v) = column[i].filter(|v| v.is_finite()) else {
            continue;
        };
        let excess = (earlier.len() >= min_nights.max(1)).then(|| v - sorted_median(&earlier));
        if let Some(x) = excess {
            if let Some((d, px)) = prev_excess
                && (date - d).num_days() == 1
            {
                out.days.push(DayScore {
                    date,
                    score: Some(x.min(px)),
                    mirror: None,
                    window_start: d,
                    contributions: [0.0; 6],
                    departures: [None; 6],
                });
            }
            prev_excess = Some((date, x));
        } else {
            prev_excess = None;
        }
        let pos = earlier.partition_point(|e| *e < v);
        earlier.insert(pos, v);
    }
    out
}

/// Median of a sorted, non-empty slice.
fn sorted_median(sorted: &[f64]) -> f64 {
    let n = sorted.len();
    if n % 2 == 1 {
        sorted[n / 2]
    } else {
        0.5 * (sorted[n / 2 - 1] + sorted[n / 2])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Population predictive by hand: parameters (μ0 0.3, τ² 0.4, σ_f² 0.25, σ_w² 0.08,
    /// σ_n² 0.2) give mean 0.3 and variance 0.4 + 0.25 + 0.08 + 0.2 = 0.93 on every day,
    /// before and after updates (1e-12).
    #[test]
    fn population_is_the_marginal_and_never_conditions() {
        let prior = PriorParams {
            signal: Signal::RestingHr,
            values: [
                0.3,
                0.4f64.ln(),
                0.25f64.ln(),
                20f64.ln(),
                0.08f64.ln(),
                0.9f64.ln(),
                0.2f64.ln(),
            ],
        };
        let mut p = PopulationPredictor::new(&StateSpacePrior::new(&prior).unwrap());
        let before = p.predict(0).unwrap();
        assert!((before.mean - 0.3).abs() < 1e-12);
        assert!((before.var_obs - 0.93).abs() < 1e-12);
        for (day, z) in [(0, 5.0), (1, -3.0), (4, 2.0)] {
            p.update(day, z).unwrap();
        }
        assert_eq!(p.predict(9).unwrap(), before);
        assert!(p.predict(3).is_err(), "days never go back");
        assert!(p.update(10, f64::NAN).is_err());
    }

    /// Rolling z by hand. Values 1, 2, 3, 4: mean 2.5, sample variance
    /// ((1.5² + 0.5²)·2)/3 = 5/3. After 28 more values of 10 the window holds only the 10s:
    /// mean 10, variance at the floor (1e-12).
    #[test]
    fn rolling_z_by_hand() {
        let mut r = RollingZ::default();
        assert_eq!(
            r.predict(0).unwrap(),
            OneStep {
                mean: 0.0,
                var_obs: 1.0
            }
        );
        r.update(0, 1.0).unwrap();
        assert_eq!(r.predict(1).unwrap().mean, 1.0);
        for (day, z) in [(1, 2.0), (2, 3.0), (5, 4.0)] {
            r.update(day, z).unwrap();
        }
        let p = r.predict(6).unwrap();
        assert!((p.mean - 2.5).abs() < 1e-12);
        assert!((p.var_obs - 5.0 / 3.0).abs() < 1e-12);
        assert!((p.residual(2.5 + 5f64.sqrt()) - 3f64.sqrt()).abs() < 1e-12);
        for day in 6..6 + ROLLING_WINDOW_VALUES as i64 {
            r.update(day, 10.0).unwrap();
        }
        assert_eq!(r.n_values(), ROLLING_WINDOW_VALUES);
        let p = r.predict(100).unwrap();
        assert!((p.mean - 10.0).abs() < 1e-12);
        assert_eq!(p.var_obs, ROLLING_SD_FLOOR * ROLLING_SD_FLOOR);
        assert!(r.update(20, 1.0).is_err(), "days never go back");
    }

    /// 29-value window arithmetic: the 29th value pushes out the first.
    #[test]
    fn rolling_window_drops_the_oldest() {
        let mut r = RollingZ::default();
        for day in 0..=ROLLING_WINDOW_VALUES as i64 {
            r.update(day, day as f64).unwrap();
        }
        // Values 1..=28: mean 14.5.
        assert!((r.predict(40).unwrap().mean - 14.5).abs() < 1e-12);
    }
}
