//! Local training on a device (the inner loop of FedAvg) and the centralised
//! fit of the same pooled objective, used as the correctness yardstick.
//!
//! Objective of device `k` for shared parameters `θ` (wire order, see
//! [`crate::prior`]), on its standardised series `(t_k, z_k)` of `n_k` days:
//!
//! ```text
//! L_k(θ) = NLML(θ; t_k, z_k) / n_k  +  λ · Σ_j −log p_j(θ_j)
//! ```
//!
//! with NLML from Rasmussen & Williams (2006), eq. 2.30, and optional
//! log-normal hyperpriors `p_j` weighted per day by `λ`. FedAvg (McMahan et
//! al. 2017, Algorithm 1) runs `E` local steps on `L_k` from the round's
//! shared `θ` and averages the results weighted by `n_k`; the fixed point it
//! targets is the minimiser of the pooled per-day objective
//! `Σ_k NLML_k(θ) / Σ_k n_k + λ Σ_j −log p_j(θ_j)`.
//!
//! The NLML and its gradient come from the state-space form of the prior ([`crate::gp_ss`],
//! O(n) per series) whenever the days are whole and non-decreasing, which the daily data
//! format guarantees; otherwise (fractional or unsorted days), or where the state-space form
//! meets a numerically singular covariance that the dense engine would jitter, from the dense
//! engine ([`crate::gp::GpRegression::nlml_grad`], O(n³)). Both compute the same function
//! (tested to 1e-8 in `tests/ss_likelihood.rs`), so the choice changes cost, not results.

use rand::Rng;

use crate::gp::{self, AdamConfig, GpError, LbfgsConfig, OptimResult};
use crate::gp_ss;
use crate::prior::{N_PARAMS, gradient_to_wire, hyperpriors, model_from};
use crate::prospective::whole_days;

/// One signal's observations on a device, standardised.
#[derive(Debug, Clone, PartialEq)]
pub struct LocalSeries {
    /// Day index of each observation (days since the participant's first day).
    pub t: Vec<f64>,
    /// Standardised values `(y − centre) / scale`.
    pub z: Vec<f64>,
}

impl LocalSeries {
    pub fn n_days(&self) -> usize {
        self.t.len()
    }

    /// The observations with `start ≤ t < start + len`.
    fn window(&self, start: f64, len: f64) -> LocalSeries {
        let (t, z) = self
            .t
            .iter()
            .zip(&self.z)
            .filter(|(t, _)| **t >= start && **t < start + len)
            .map(|(t, z)| (*t, *z))
            .unzip();
        LocalSeries { t, z }
    }
}

/// Optimiser choice for local steps.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum LocalOptimizer {
    Adam,
    Sgd,
}

/// How one round of local training runs (mirrors the task's settings).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LocalSettings {
    pub optimizer: LocalOptimizer,
    pub steps: usize,
    pub learning_rate: f64,
    /// Random contiguous window length in days for each step; 0 = full series.
    pub window_days: u32,
    /// λ: weight per day of the hyperprior penalty; 0 disables it.
    pub hyperprior_weight_per_day: f64,
}

/// What a device sends back for one signal.
#[derive(Debug, Clone, PartialEq)]
pub struct LocalUpdate {
    pub values: [f64; N_PARAMS],
    pub n_days: u32,
    /// Per-day NLML of the full series under the parameters received.
    pub loss_at_received: f64,
}

/// Fewest observations a window may hold; shorter windows fall back to the
/// full series (a handful of points says nothing about a 2-week trend).
const MIN_WINDOW_OBS: usize = 14;

/// Which computation of the NLML an objective uses for a series (module docs).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LikelihoodEngine {
    /// Kalman filter with sensitivity recursions on whole days ([`crate::gp_ss`]), O(n).
    StateSpace,
    /// Dense Cholesky of the `n × n` covariance ([`crate::gp::GpRegression`]), O(n³).
    Dense,
}

/// The engine the objectives use for `series`: [`LikelihoodEngine::StateSpace`] when its days
/// are whole and non-decreasing, else [`LikelihoodEngine::Dense`]. (A state-space evaluation
/// that meets a numerically singular covariance still falls back to the dense engine, which
/// adds jitter; see [`nlml_grad`].)
pub fn likelihood_engine(series: &LocalSeries) -> LikelihoodEngine {
    match whole_days(&series.t) {
        Ok(_) => LikelihoodEngine::StateSpace,
        Err(_) => LikelihoodEngine::Dense,
    }
}

/// NLML of one series and its gradient in wire order, from the engine of
/// [`likelihood_engine`]; falls back to the dense engine when the state-space form reports
/// [`GpError::NotPositiveDefinite`] (the case in which the dense engine would add jitter).
///
/// # Errors
/// As [`crate::gp::GpRegression::nlml_grad`]; a `values` of the wrong length is a
/// [`GpError::Shape`].
pub fn nlml_grad(values: &[f64], series: &LocalSeries) -> gp::Result<(f64, [f64; N_PARAMS])> {
    let params = as_params(values)?;
    if let Ok(days) = whole_days(&series.t) {
        match gp_ss::nlml_grad(params, &days, &series.z) {
            Err(GpError::NotPositiveDefinite { .. }) => {}
            other => return other,
        }
    }
    let (nlml, engine_grad) = model_from(values).nlml_grad(&series.t, &series.z)?;
    Ok((nlml, gradient_to_wire(&engine_grad)))
}

/// `values` as the prior's parameter array ([`GpError::Shape`] for another length).
fn as_params(values: &[f64]) -> gp::Result<&[f64; N_PARAMS]> {
    values.try_into().map_err(|_| {
        GpError::Shape(format!(
            "{} parameters given, the prior has {N_PARAMS}",
            values.len()
        ))
    })
}

/// NLML of one series without its gradient, from the same engines as [`nlml_grad`] (for
/// reporting a prior's fit, where the gradient would be work thrown away).
///
/// # Errors
/// As [`nlml_grad`].
pub fn nlml(values: &[f64], series: &LocalSeries) -> gp::Result<f64> {
    let params = as_params(values)?;
    if let Ok(days) = whole_days(&series.t) {
        match gp_ss::nlml(params, &days, &series.z) {
            Err(GpError::NotPositiveDefinite { .. }) => {}
            other => return other,
        }
    }
    model_from(values).nlml(&series.t, &series.z)
}

/// Per-day objective `L_k` and its gradient in wire order.
pub fn per_day_objective(
    values: &[f64],
    series: &LocalSeries,
    hyperprior_weight_per_day: f64,
) -> gp::Result<(f64, Vec<f64>)> {
    let n = series.n_days() as f64;
    let (nlml, wire_grad) = nlml_grad(values, series)?;
    let mut grad: Vec<f64> = wire_grad.iter().map(|g| g / n).collect();
    let mut value = nlml / n;
    if hyperprior_weight_per_day > 0.0 {
        for (j, prior) in hyperpriors().iter().enumerate() {
            if let Some(p) = prior {
                value += hyperprior_weight_per_day * p.neg_log_density(values[j]);
                grad[j] += hyperprior_weight_per_day * p.grad(values[j]);
            }
        }
    }
    Ok((value, grad))
}

/// Runs one round of local training from the shared `received` parameters.
pub fn train_local<R: Rng>(
    received: &[f64; N_PARAMS],
    series: &LocalSeries,
    settings: &LocalSettings,
    rng: &mut R,
) -> gp::Result<LocalUpdate> {
    if series.n_days() == 0 {
        return Err(gp::GpError::Shape("no observed days to train on".into()));
    }
    let (loss_at_received, grad_at_received) = per_day_objective(received, series, 0.0)?;
    let first = series.t[0];
    let last = *series.t.last().expect("non-empty");
    let window = f64::from(settings.window_days);
    let use_windows = settings.window_days > 0 && last - first + 1.0 > window;
    // Windows are drawn up front so the optimiser closure stays a pure
    // function of the step index.
    let windows: Vec<Option<LocalSeries>> = (0..settings.steps)
        .map(|_| {
            use_windows.then(|| {
                let start = first
                    + rng
                        .random_range(0.0..=(last - first + 1.0 - window))
                        .floor();
                series.window(start, window)
            })
        })
        .map(|w| w.filter(|w| w.n_days() >= MIN_WINDOW_OBS))
        .collect();
    // The first step on the full series without a hyperprior evaluates the objective at
    // the received parameters again: the value and gradient just computed are reused (the
    // same numbers, one likelihood evaluation fewer per round).
    let mut at_received = (settings.hyperprior_weight_per_day == 0.0
        && windows.first().is_none_or(Option::is_none))
    .then_some((loss_at_received, grad_at_received));
    let mut objective = |x: &[f64], step: usize| {
        if step == 0
            && x == received.as_slice()
            && let Some(known) = at_received.take()
        {
            return Ok(known);
        }
        let data = windows.get(step).and_then(Option::as_ref).unwrap_or(series);
        per_day_objective(x, data, settings.hyperprior_weight_per_day)
    };
    let result = match settings.optimizer {
        LocalOptimizer::Adam => gp::adam(
            &mut objective,
            received,
            settings.steps,
            &AdamConfig {
                learning_rate: settings.learning_rate,
                ..AdamConfig::default()
            },
        )?,
        LocalOptimizer::Sgd => gp::sgd(
            &mut objective,
            received,
            settings.steps,
            settings.learning_rate,
        )?,
    };
    let values: [f64; N_PARAMS] = result
        .x
        .as_slice()
        .try_into()
        .map_err(|_| gp::GpError::Shape("optimiser changed the parameter count".into()))?;
    if values.iter().any(|v| !v.is_finite()) {
        return Err(gp::GpError::NonFinite(
            "local training produced a non-finite parameter".into(),
        ));
    }
    Ok(LocalUpdate {
        values,
        n_days: series.n_days() as u32,
        loss_at_received,
    })
}

/// Pooled per-day objective over many series: `Σ_k NLML_k / Σ_k n_k` plus the
/// hyperprior term, with its gradient. Series are independent given `θ`, so
/// the pooled likelihood is the product of per-series likelihoods.
pub fn pooled_objective(
    values: &[f64],
    all: &[LocalSeries],
    hyperprior_weight_per_day: f64,
) -> gp::Result<(f64, Vec<f64>)> {
    let total: f64 = all.iter().map(|s| s.n_days() as f64).sum();
    let mut value = 0.0;
    let mut grad = vec![0.0; N_PARAMS];
    for s in all.iter().filter(|s| s.n_days() > 0) {
        let w = s.n_days() as f64 / total;
        let (v, g) = per_day_objective(values, s, 0.0)?;
        value += w * v;
        for (a, b) in grad.iter_mut().zip(&g) {
            *a += w * b;
        }
    }
    if hyperprior_weight_per_day > 0.0 {
        for (j, prior) in hyperpriors().iter().enumerate() {
            if let Some(p) = prior {
                value += hyperprior_weight_per_day * p.neg_log_density(values[j]);
                grad[j] += hyperprior_weight_per_day * p.grad(values[j]);
            }
        }
    }
    Ok((value, grad))
}

/// Centralised full-batch L-BFGS on the pooled objective (the baseline a
/// federated prior is compared against; it needs all data in one place, so it
/// exists for evaluation only).
pub fn fit_centralised(
    start: &[f64; N_PARAMS],
    all: &[LocalSeries],
    hyperprior_weight_per_day: f64,
    config: &LbfgsConfig,
) -> gp::Result<OptimResult> {
    gp::lbfgs(
        |x| pooled_objective(x, all, hyperprior_weight_per_day),
        start,
        config,
    )
}

/// Fit on one series alone (no sharing): L-BFGS on its own per-day objective.
pub fn fit_single(
    start: &[f64; N_PARAMS],
    series: &LocalSeries,
    hyperprior_weight_per_day: f64,
    config: &LbfgsConfig,
) -> gp::Result<OptimResult> {
    gp::lbfgs(
        |x| per_day_objective(x, series, hyperprior_weight_per_day),
        start,
        config,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The value-only NLML equals the value `nlml_grad` returns, on whole days with a gap
    /// (state-space engine) and on fractional days (dense engine).
    #[test]
    fn nlml_equals_the_value_of_nlml_grad() {
        let values = crate::prior::PriorParams::initial(crate::signal::Signal::RestingHr).values;
        for t in [
            vec![0.0, 1.0, 2.0, 5.0, 6.0, 9.0],
            vec![0.0, 0.5, 2.25, 5.0, 6.5, 9.0],
        ] {
            let series = LocalSeries {
                z: t.iter().map(|d: &f64| (0.7 * d).sin()).collect(),
                t,
            };
            let (want, _) = nlml_grad(&values, &series).unwrap();
            let got = nlml(&values, &series).unwrap();
            assert!(
                (got - want).abs() <= 1e-12 * want.abs().max(1.0),
                "{got} vs {want}"
            );
        }
    }
}
