//! Prospective (one-step-ahead) prediction: for each observed day, the predictive distribution
//! of that day's value given only the days before it, computed by an exact Kalman filter on the
//! state-space form of the shared prior (no refit per day).
//!
//! # The prior as a state-space model on whole days
//! The prior of one participant's standardised series (see [`crate::prior`]) is
//!
//! ```text
//! z(t) = μ0 + b + f(t) + w(t) + ε(t),   t a whole day
//!   b    ~ N(0, τ²)                                  Constant kernel
//!   f    ~ GP(0, σ_f² (1 + √3 r) exp(−√3 r)), r = |Δ|/ℓ_f      Matérn-3/2
//!   w    ~ GP(0, σ_w² exp(−2 sin²(π Δ / 7) / ℓ_w²))            Periodic (period 7)
//!   ε(t) ~ N(0, σ_n²) independent                    White
//! ```
//!
//! Each term has an exact finite-dimensional Markov form on whole days:
//!
//! - **Constant**: one static state `b` with prior variance τ².
//! - **Matérn-3/2**: the 2-state SDE `d[f, f']ᵀ = F [f, f']ᵀ dt + L dβ` with
//!   `F = [[0, 1], [−λ², −2λ]]`, `λ = √3/ℓ_f`, stationary covariance `P∞ = diag(σ_f², λ²σ_f²)`
//!   (Hartikainen & Särkkä 2010, §3; Särkkä & Solin 2019, *Applied Stochastic Differential
//!   Equations*, §12.3). Over a gap of Δ days the exact transition is
//!   ```text
//!   A(Δ) = exp(FΔ) = e^{−u} [[1 + u, Δ], [−λ²Δ, 1 − u]],   u = λΔ
//!   Q(Δ) = P∞ − A P∞ Aᵀ
//!        = σ_f² [[1 − e^{−2u}(1 + 2u + 2u²),   2λu² e^{−2u}],
//!                [2λu² e^{−2u},   λ²(1 − e^{−2u}(1 − 2u + 2u²))]]
//!   ```
//!   (the closed form of `Q` is the product written out; `A P∞` reproduces the kernel,
//!   `[A(Δ) P∞]₀₀ = σ_f² (1 + u) e^{−u} = k_M32(Δ)`).
//! - **Periodic, period exactly 7**: on whole days `k_per(Δ)` depends only on `Δ mod 7`, so
//!   `w(t) = p[t mod 7]` for a static weekly profile `p ~ N(0, C)` with the circulant
//!   `C[i][j] = k_per(i − j)`. `C` is the kernel's Gram matrix on 7 points, hence positive
//!   semi-definite; this is checked numerically through its eigenvalues (an error, never a
//!   silent clamp, if one is below −1e-10 · max). It may be singular (large ℓ_w makes the
//!   profile nearly flat); the filter never inverts it, so no jitter is needed.
//! - **White**: the observation noise of the filter.
//!
//! The state is `x = [b, f, f', p_0 … p_6]` (10 numbers) and an observation on day `t` reads
//! `z(t) = μ0 + hₜᵀ x + ε`, `hₜ = e_b + e_f + e_{p[t mod 7]}`. The filter (Kalman 1960; Särkkä
//! 2013, *Bayesian Filtering and Smoothing*, Theorem 4.2) gives, before seeing `z(t)`,
//!
//! ```text
//! predictive mean  m_t = μ0 + hₜᵀ x̂_{t|<t}
//! predictive var   S_t = hₜᵀ P_{t|<t} hₜ + σ_n²
//! ```
//!
//! which is exactly the dense GP predictive `GpRegression::posterior(t[..i], z[..i])
//! .predict(&[t[i]])` (mean and `var_obs`), at O(1) cost per day instead of O(i³). The
//! prediction-error decomposition `log p(z) = Σ_t −½ (ln 2π S_t + (z_t − m_t)² / S_t)`
//! (Harvey 1989, *Forecasting, Structural Time Series Models and the Kalman Filter*, §3.4)
//! equals minus the dense negative log marginal likelihood (Rasmussen & Williams 2006, eq. 2.30).
//!
//! # Scope
//! Days must be whole numbers (the data format is daily) and non-decreasing; anything else is
//! an error. "Predict without update" is [`DailyFilter::predict`]: it never changes the state,
//! so a caller can score a day and decide afterwards whether to condition on it.

use chrono::NaiveDate;
use nalgebra::{DMatrix, SymmetricEigen};
use rand::Rng;
use rand_distr::StandardNormal;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal};

use crate::prior::{N_PARAMS, PriorParams, WEEK_DAYS};
use crate::signal::Signal;

/// Dimension of the filter state `[b, f, f', p_0 … p_6]`.
pub const STATE_DIM: usize = 10;

/// Days in the weekly profile (the prior's period, as an index count).
const WEEK: usize = 7;
/// State index of the between-person offset `b`.
const IDX_OFFSET: usize = 0;
/// State index of the Matérn trend `f` (its derivative follows at `IDX_TREND + 1`).
const IDX_TREND: usize = 1;
/// State index of the first weekly-profile entry `p_0`.
const IDX_WEEK: usize = 3;

/// Standard-normal quantile Φ⁻¹(0.75): half-width of the central 50 % band in SDs.
pub const Z50: f64 = 0.674_489_750_196_081_7;
/// Standard-normal quantile Φ⁻¹(0.975): half-width of the central 95 % band in SDs.
pub const Z95: f64 = 1.959_963_984_540_054;

/// Relative tolerance of the weekly covariance's PSD check (smallest eigenvalue ≥ −tol · max).
const PSD_REL_TOL: f64 = 1e-10;

/// Everything that can go wrong in prospective prediction and flagging.
#[derive(Debug, thiserror::Error)]
pub enum ProspectiveError {
    /// A day that is not a whole number: the filter works on whole days only.
    #[error("day t[{index}] = {day} is not a whole day (the data format is daily)")]
    NonIntegerDay {
        /// Position in the input.
        index: usize,
        /// The offending value.
        day: f64,
    },
    /// Days must be non-decreasing: the filter only moves forward in time.
    #[error("day {day} comes after day {previous}: days must be non-decreasing")]
    DaysOutOfOrder {
        /// The day requested.
        day: i64,
        /// The latest day the filter (or the input) had already reached.
        previous: i64,
    },
    /// A NaN or infinity in the data or the prior; the message says where.
    #[error("non-finite value: {0}")]
    NonFinite(String),
    /// Inputs of inconsistent lengths; the message says which.
    #[error("shape mismatch: {0}")]
    Shape(String),
    /// The weekly covariance `C[i][j] = k_per(i − j)` has a clearly negative eigenvalue (cannot
    /// happen for a valid periodic kernel; reported rather than clamped).
    #[error(
        "weekly covariance is not positive semi-definite: smallest eigenvalue {min_eigenvalue:e}, largest {max_eigenvalue:e}"
    )]
    WeeklyCovNotPsd {
        /// Smallest eigenvalue found.
        min_eigenvalue: f64,
        /// Largest eigenvalue found.
        max_eigenvalue: f64,
    },
    /// Two priors were given for the same signal.
    #[error("two priors given for signal {0}")]
    DuplicatePrior(Signal),
    /// A flag configuration that does not make sense; the message says why.
    #[error("invalid flag configuration: {0}")]
    Config(String),
    /// An error while processing one participant's signal.
    #[error("participant {participant}, {signal}: {source}")]
    InSeries {
        /// Participant id.
        participant: String,
        /// Signal being processed.
        signal: Signal,
        /// What went wrong.
        #[source]
        source: Box<ProspectiveError>,
    },
}

/// Result type of prospective prediction and flagging.
pub type Result<T> = std::result::Result<T, ProspectiveError>;

/// The shared prior of one signal in exact state-space form on whole days (see the module
/// docs), in standardised units. Built once per signal and shared by every participant's filter.
#[derive(Debug, Clone, PartialEq)]
pub struct StateSpacePrior {
    /// Population mean μ0.
    mean: f64,
    /// Between-person variance τ².
    between_var: f64,
    /// Matérn-3/2 variance σ_f².
    trend_var: f64,
    /// Matérn-3/2 rate λ = √3 / ℓ_f (per day).
    trend_rate: f64,
    /// Circulant weekly covariance `C[i][j] = k_per(i − j)`.
    weekly_cov: [[f64; WEEK]; WEEK],
    /// A square root `R` with `R Rᵀ = C` (from the eigendecomposition), for sampling.
    weekly_sqrt: [[f64; WEEK]; WEEK],
    /// Observation noise σ_n².
    noise_var: f64,
    /// `(A(Δ), Q(Δ))` for Δ = 1 … [`CACHED_GAPS`] days (the gaps a filter meets almost every
    /// day), computed once by [`StateSpacePrior::compute_transition`].
    cached: [Transition; CACHED_GAPS],
}

/// A Matérn-3/2 transition `A(Δ)` with its process noise `Q(Δ)`.
type Transition = ([[f64; 2]; 2], [[f64; 2]; 2]);

/// Gaps (days) whose transitions each prior keeps precomputed: every gap up to the detector's
/// guard plus its longest window.
const CACHED_GAPS: usize = 16;

impl StateSpacePrior {
    /// The state-space form of a prior.
    ///
    /// # Errors
    /// [`ProspectiveError::NonFinite`] for a non-finite parameter or one whose exponential
    /// overflows, [`ProspectiveError::WeeklyCovNotPsd`] if the weekly covariance check fails.
    pub fn new(prior: &PriorParams) -> Result<StateSpacePrior> {
        StateSpacePrior::from_values(&prior.values)
    }

    /// The state-space form of a parameter vector in wire order (see [`crate::prior`]).
    ///
    /// # Errors
    /// As [`StateSpacePrior::new`].
    pub fn from_values(values: &[f64; N_PARAMS]) -> Result<StateSpacePrior> {
        let [mean, log_tau2, log_sf2, log_lf, log_sw2, log_lw, log_sn2] = *values;
        let natural = [
            ("between_var", log_tau2.exp()),
            ("trend_var", log_sf2.exp()),
            ("trend_len_days", log_lf.exp()),
            ("weekly_var", log_sw2.exp()),
            ("weekly_len", log_lw.exp()),
            ("noise_var", log_sn2.exp()),
        ];
        if !mean.is_finite() {
            return Err(ProspectiveError::NonFinite(format!(
                "prior mean_z = {mean}"
            )));
        }
        for (name, v) in natural {
            if !(v.is_finite() && v > 0.0) {
                return Err(ProspectiveError::NonFinite(format!(
                    "prior {name} = {v} (from its logarithm)"
                )));
            }
        }
        // The same expressions as the dense kernel (`Kernel::prepare`), so that both sides
        // evaluate k_per from identical floating-point inputs.
        let weekly_var = log_sw2.exp();
        let inv_len_sq = (-2.0 * log_lw).exp();
        let omega = std::f64::consts::PI / WEEK_DAYS;
        let k_per = |lag: usize| {
            let s = (omega * lag as f64).sin();
            weekly_var * (-2.0 * s * s * inv_len_sq).exp()
        };
        let mut weekly_cov = [[0.0; WEEK]; WEEK];
        for (i, row) in weekly_cov.iter_mut().enumerate() {
            for (j, c) in row.iter_mut().enumerate() {
                *c = k_per(i.abs_diff(j));
            }
        }
        let weekly_sqrt = psd_sqrt(&weekly_cov)?;
        let mut model = StateSpacePrior {
            mean,
            between_var: log_tau2.exp(),
            trend_var: log_sf2.exp(),
            trend_rate: 3f64.sqrt() * (-log_lf).exp(),
            weekly_cov,
            weekly_sqrt,
            noise_var: log_sn2.exp(),
            cached: [([[0.0; 2]; 2], [[0.0; 2]; 2]); CACHED_GAPS],
        };
        for (gap, slot) in (1i64..).zip(0..CACHED_GAPS) {
            model.cached[slot] = model.compute_transition(gap);
        }
        Ok(model)
    }

    /// Population mean μ0 (standardised units).
    pub fn mean(&self) -> f64 {
        self.mean
    }

    /// Observation noise variance σ_n² (standardised units).
    pub fn noise_var(&self) -> f64 {
        self.noise_var
    }

    /// Prior predictive variance of a single observation, `τ² + σ_f² + σ_w² + σ_n²`.
    pub fn marginal_var(&self) -> f64 {
        self.between_var + self.trend_var + self.weekly_cov[0][0] + self.noise_var
    }

    /// The weekly covariance `C` (for inspection and tests).
    pub fn weekly_cov(&self) -> [[f64; WEEK]; WEEK] {
        self.weekly_cov
    }

    /// Matérn-3/2 transition `A(Δ)` and process noise `Q(Δ)` over `dt` days (module docs), as
    /// the filter uses them (for inspection and tests, e.g. that [`crate::gp_ss`] uses the same).
    pub fn trend_transition(&self, dt: i64) -> ([[f64; 2]; 2], [[f64; 2]; 2]) {
        self.transition(dt)
    }

    /// Matérn-3/2 transition `A(Δ)` and process noise `Q(Δ)` over `dt` days (module docs),
    /// from the precomputed table when the gap is short.
    fn transition(&self, dt: i64) -> Transition {
        match usize::try_from(dt) {
            Ok(gap @ 1..=CACHED_GAPS) => self.cached[gap - 1],
            _ => self.compute_transition(dt),
        }
    }

    /// [`StateSpacePrior::transition`] computed from its formula.
    fn compute_transition(&self, dt: i64) -> Transition {
        let lam = self.trend_rate;
        let delta = dt as f64;
        let u = lam * delta;
        let e = (-u).exp();
        let a = [
            [e * (1.0 + u), e * delta],
            [-e * lam * lam * delta, e * (1.0 - u)],
        ];
        let e2 = e * e;
        let s2 = self.trend_var;
        let q = [
            [
                s2 * (1.0 - e2 * (1.0 + 2.0 * u + 2.0 * u * u)),
                s2 * 2.0 * lam * u * u * e2,
            ],
            [
                s2 * 2.0 * lam * u * u * e2,
                s2 * lam * lam * (1.0 - e2 * (1.0 - 2.0 * u + 2.0 * u * u)),
            ],
        ];
        (a, q)
    }

    /// Draws one path of the prior at the given whole days (standardised units), exactly, by
    /// simulating the state-space model: `b`, the weekly profile and the stationary Matérn
    /// state at the first day, then Matérn transitions over each gap, plus independent noise.
    ///
    /// # Errors
    /// [`ProspectiveError::DaysOutOfOrder`] if `days` decreases.
    pub fn sample<R: Rng + ?Sized>(&self, days: &[i64], rng: &mut R) -> Result<Vec<f64>> {
        let mut normal = || -> f64 { rng.sample(StandardNormal) };
        let b = self.between_var.sqrt() * normal();
        let xi: [f64; WEEK] = std::array::from_fn(|_| normal());
        let profile: [f64; WEEK] =
            std::array::from_fn(|i| (0..WEEK).map(|j| self.weekly_sqrt[i][j] * xi[j]).sum());
        let lam = self.trend_rate;
        let sd = self.trend_var.sqrt();
        let mut f = [sd * normal(), lam * sd * normal()];
        let noise_sd = self.noise_var.sqrt();
        let mut out = Vec::with_capacity(days.len());
        let mut previous: Option<i64> = None;
        for &day in days {
            if let Some(prev) = previous {
                if day < prev {
                    return Err(ProspectiveError::DaysOutOfOrder {
                        day,
                        previous: prev,
                    });
                }
                if day > prev {
                    let (a, q) = self.transition(day - prev);
                    // 2×2 Cholesky of Q (Q is PSD; clamp rounding below zero).
                    let l00 = q[0][0].max(0.0).sqrt();
                    let l10 = if l00 > 0.0 { q[1][0] / l00 } else { 0.0 };
                    let l11 = (q[1][1] - l10 * l10).max(0.0).sqrt();
                    let (n0, n1) = (normal(), normal());
                    f = [
                        a[0][0] * f[0] + a[0][1] * f[1] + l00 * n0,
                        a[1][0] * f[0] + a[1][1] * f[1] + l10 * n0 + l11 * n1,
                    ];
                }
            }
            previous = Some(day);
            let w = profile[week_slot(day)];
            out.push(self.mean + b + f[0] + w + noise_sd * normal());
        }
        Ok(out)
    }
}

/// Position of a day in the weekly profile (`day mod 7`, non-negative for negative days too).
fn week_slot(day: i64) -> usize {
    day.rem_euclid(WEEK as i64) as usize
}

/// A square root `R = V diag(√max(λ, 0))` of a PSD matrix `C = V Λ Vᵀ`, after checking that
/// no eigenvalue is below `−PSD_REL_TOL · max(λ)`.
fn psd_sqrt(c: &[[f64; WEEK]; WEEK]) -> Result<[[f64; WEEK]; WEEK]> {
    let m = DMatrix::from_fn(WEEK, WEEK, |i, j| c[i][j]);
    let eig = SymmetricEigen::new(m);
    let max_eigenvalue = eig.eigenvalues.max();
    let min_eigenvalue = eig.eigenvalues.min();
    if min_eigenvalue.is_nan() || min_eigenvalue < -PSD_REL_TOL * max_eigenvalue.abs() {
        return Err(ProspectiveError::WeeklyCovNotPsd {
            min_eigenvalue,
            max_eigenvalue,
        });
    }
    Ok(std::array::from_fn(|i| {
        std::array::from_fn(|j| eig.eigenvectors[(i, j)] * eig.eigenvalues[j].max(0.0).sqrt())
    }))
}

/// One-step-ahead predictive distribution of one observation, in standardised units.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct OneStep {
    /// Predictive mean.
    pub mean: f64,
    /// Predictive variance of an observation (latent variance plus noise).
    pub var_obs: f64,
}

/// A predictive distribution in the signal's own units with its central bands.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Band {
    pub mean: f64,
    pub sd: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
}

impl OneStep {
    /// Predictive SD (standardised units).
    pub fn sd(&self) -> f64 {
        self.var_obs.max(0.0).sqrt()
    }

    /// Standardised residual `(z − mean) / sd` of a standardised observation `z`. The same
    /// number whether computed in standardised or signal units (the map is affine).
    pub fn residual(&self, z: f64) -> f64 {
        (z - self.mean) / self.sd()
    }

    /// The distribution in the signal's own units, `y = centre + scale · z`, with 50 % and 95 %
    /// central bands (mean ± Φ⁻¹(0.75)·sd, mean ± Φ⁻¹(0.975)·sd).
    pub fn in_units(&self, signal: Signal) -> Band {
        let (centre, scale) = signal.reference();
        let mean = centre + scale * self.mean;
        let sd = scale * self.sd();
        Band {
            mean,
            sd,
            lo50: mean - Z50 * sd,
            hi50: mean + Z50 * sd,
            lo95: mean - Z95 * sd,
            hi95: mean + Z95 * sd,
        }
    }
}

/// Two-sided tail probability `P(|Z| ≥ |z|) = 2 Φ(−|z|)` of a standard normal.
pub fn tail_probability(z: f64) -> f64 {
    2.0 * Normal::standard().sf(z.abs())
}

/// Exact Kalman filter for one participant's series of one signal under its
/// [`StateSpacePrior`] (module docs). Standardised units throughout.
#[derive(Debug, Clone)]
pub struct DailyFilter {
    model: StateSpacePrior,
    /// Filtered state mean at `day` (all zeros before the first update).
    x: [f64; STATE_DIM],
    /// Filtered state covariance at `day`.
    p: [[f64; STATE_DIM]; STATE_DIM],
    /// Day of the filtered state; `None` before the first update (the state is then the
    /// stationary prior, valid at any day).
    day: Option<i64>,
    log_likelihood: f64,
    n_conditioned: usize,
}

impl DailyFilter {
    /// A filter holding the prior: no observation conditioned on yet.
    pub fn new(model: &StateSpacePrior) -> DailyFilter {
        let mut p = [[0.0; STATE_DIM]; STATE_DIM];
        p[IDX_OFFSET][IDX_OFFSET] = model.between_var;
        p[IDX_TREND][IDX_TREND] = model.trend_var;
        p[IDX_TREND + 1][IDX_TREND + 1] = model.trend_rate * model.trend_rate * model.trend_var;
        for i in 0..WEEK {
            for j in 0..WEEK {
                p[IDX_WEEK + i][IDX_WEEK + j] = model.weekly_cov[i][j];
            }
        }
        DailyFilter {
            model: model.clone(),
            x: [0.0; STATE_DIM],
            p,
            day: None,
            log_likelihood: 0.0,
            n_conditioned: 0,
        }
    }

    /// Log marginal likelihood of every observation conditioned on so far (prediction-error
    /// decomposition; equals −NLML of the dense GP on the same observations).
    pub fn log_likelihood(&self) -> f64 {
        self.log_likelihood
    }

    /// Number of observations conditioned on so far.
    pub fn n_conditioned(&self) -> usize {
        self.n_conditioned
    }

    /// Day of the last conditioned observation.
    pub fn last_day(&self) -> Option<i64> {
        self.day
    }

    /// Propagates the state mean and covariance to `day` in place (no conditioning); the
    /// filter is unchanged on error.
    fn propagate(&mut self, day: i64) -> Result<()> {
        let Some(from) = self.day else {
            return Ok(());
        };
        if day < from {
            return Err(ProspectiveError::DaysOutOfOrder {
                day,
                previous: from,
            });
        }
        if day == from {
            return Ok(());
        }
        let (a, q) = self.model.transition(day - from);
        let (x, p) = (&mut self.x, &mut self.p);
        let (i0, i1) = (IDX_TREND, IDX_TREND + 1);
        // x_f ← A x_f
        let (f0, f1) = (x[i0], x[i1]);
        x[i0] = a[0][0] * f0 + a[0][1] * f1;
        x[i1] = a[1][0] * f0 + a[1][1] * f1;
        // Cross-covariances of the trend block with every other state: rows ← A · rows.
        for o in (0..STATE_DIM).filter(|&o| o != i0 && o != i1) {
            let (c0, c1) = (p[i0][o], p[i1][o]);
            let n0 = a[0][0] * c0 + a[0][1] * c1;
            let n1 = a[1][0] * c0 + a[1][1] * c1;
            p[i0][o] = n0;
            p[i1][o] = n1;
            p[o][i0] = n0;
            p[o][i1] = n1;
        }
        // Trend block ← A P Aᵀ + Q.
        let m = [[p[i0][i0], p[i0][i1]], [p[i1][i0], p[i1][i1]]];
        let am = [
            [
                a[0][0] * m[0][0] + a[0][1] * m[1][0],
                a[0][0] * m[0][1] + a[0][1] * m[1][1],
            ],
            [
                a[1][0] * m[0][0] + a[1][1] * m[1][0],
                a[1][0] * m[0][1] + a[1][1] * m[1][1],
            ],
        ];
        let b00 = am[0][0] * a[0][0] + am[0][1] * a[0][1] + q[0][0];
        let b01 = am[0][0] * a[1][0] + am[0][1] * a[1][1] + q[0][1];
        let b11 = am[1][0] * a[1][0] + am[1][1] * a[1][1] + q[1][1];
        p[i0][i0] = b00;
        p[i0][i1] = b01;
        p[i1][i0] = b01;
        p[i1][i1] = b11;
        self.day = Some(day);
        Ok(())
    }

    /// Indices of the states an observation on `day` reads.
    fn observed_states(day: i64) -> [usize; 3] {
        [IDX_OFFSET, IDX_TREND, IDX_WEEK + week_slot(day)]
    }

    fn one_step(
        &self,
        day: i64,
        x: &[f64; STATE_DIM],
        p: &[[f64; STATE_DIM]; STATE_DIM],
    ) -> OneStep {
        let idx = Self::observed_states(day);
        let mean = self.model.mean + idx.iter().map(|&i| x[i]).sum::<f64>();
        let mut var = self.model.noise_var;
        for &i in &idx {
            for &j in &idx {
                var += p[i][j];
            }
        }
        OneStep { mean, var_obs: var }
    }

    /// The predictive distribution of an observation on `day` given everything conditioned so
    /// far, without changing the filter ("predict without update").
    ///
    /// # Errors
    /// [`ProspectiveError::DaysOutOfOrder`] if `day` is before the last conditioned day.
    pub fn predict(&self, day: i64) -> Result<OneStep> {
        // Only the three observed states matter, so instead of propagating the whole state
        // (what `update` does) this forms the 3 × 3 block of the propagated covariance
        // directly: the same arithmetic, on only the entries it needs.
        let w = IDX_WEEK + week_slot(day);
        let (i0, i1) = (IDX_TREND, IDX_TREND + 1);
        let (x, p) = (&self.x, &self.p);
        let static_var = p[IDX_OFFSET][IDX_OFFSET] + 2.0 * p[IDX_OFFSET][w] + p[w][w];
        let Some(from) = self.day else {
            return Ok(self.one_step(day, x, p));
        };
        if day < from {
            return Err(ProspectiveError::DaysOutOfOrder {
                day,
                previous: from,
            });
        }
        if day == from {
            return Ok(self.one_step(day, x, p));
        }
        let (a, q) = self.model.transition(day - from);
        let trend_mean = a[0][0] * x[i0] + a[0][1] * x[i1];
        // Row i0 of A P (trend block) and its cross-covariances with the offset and the slot.
        let cross = |o: usize| a[0][0] * p[i0][o] + a[0][1] * p[i1][o];
        let am00 = a[0][0] * p[i0][i0] + a[0][1] * p[i1][i0];
        let am01 = a[0][0] * p[i0][i1] + a[0][1] * p[i1][i1];
        let trend_var = am00 * a[0][0] + am01 * a[0][1] + q[0][0];
        let mean = self.model.mean + x[IDX_OFFSET] + trend_mean + x[w];
        let var =
            self.model.noise_var + static_var + trend_var + 2.0 * (cross(IDX_OFFSET) + cross(w));
        Ok(OneStep { mean, var_obs: var })
    }

    /// Conditions on the observation `z` (standardised units) on `day` and returns the
    /// predictive distribution it had before conditioning.
    ///
    /// ```text
    /// v = z − m_t,  S = hᵀ P h + σ_n²,  g = P h
    /// x ← x + g v / S,   P ← P − g gᵀ / S,   log p += −½ (ln 2π S + v² / S)
    /// ```
    ///
    /// # Errors
    /// [`ProspectiveError::DaysOutOfOrder`] as for [`DailyFilter::predict`];
    /// [`ProspectiveError::NonFinite`] if `z` is not finite (the filter is then unchanged).
    pub fn update(&mut self, day: i64, z: f64) -> Result<OneStep> {
        if !z.is_finite() {
            return Err(ProspectiveError::NonFinite(format!(
                "observation on day {day} = {z}"
            )));
        }
        self.propagate(day)?;
        let pred = self.one_step(day, &self.x, &self.p);
        let idx = Self::observed_states(day);
        let (x, p) = (&mut self.x, &mut self.p);
        let g: [f64; STATE_DIM] = std::array::from_fn(|r| idx.iter().map(|&c| p[r][c]).sum());
        let s = pred.var_obs;
        let v = z - pred.mean;
        // Kalman gain k = g / S, formed once: one division per state instead of one per
        // covariance entry.
        let k: [f64; STATE_DIM] = std::array::from_fn(|r| g[r] / s);
        for r in 0..STATE_DIM {
            x[r] += k[r] * v;
            for c in 0..STATE_DIM {
                p[r][c] -= k[r] * g[c];
            }
        }
        self.day = Some(day);
        self.log_likelihood += -0.5 * ((2.0 * std::f64::consts::PI * s).ln() + v * v / s);
        self.n_conditioned += 1;
        Ok(pred)
    }
}

/// Anything that gives a one-step-ahead predictive of a signal's next standardised value from
/// the values it has been given, and can be told a new value. [`crate::flags::detect_with`]
/// runs the same detectors, thresholds and baseline-protection rules on top of any predictor:
/// the exact filter of the shared prior ([`DailyFilter`]) or the comparison methods of
/// [`crate::evaluate::methods`].
///
/// Contract: `predict` never changes the predictor ("predict without update"); days passed to
/// `update` are whole days since the participant's first day and never decrease; both work in
/// standardised units `(y − centre) / scale` ([`Signal::reference`]).
pub trait Predictor {
    /// Predictive distribution of an observation on `day` given every value conditioned so far.
    ///
    /// # Errors
    /// [`ProspectiveError::DaysOutOfOrder`] if `day` is before the last conditioned day.
    fn predict(&self, day: i64) -> Result<OneStep>;

    /// Conditions on the value `z` observed on `day`.
    ///
    /// # Errors
    /// [`ProspectiveError::DaysOutOfOrder`] as for `predict`; [`ProspectiveError::NonFinite`]
    /// for a non-finite `z` (the predictor is then unchanged).
    fn update(&mut self, day: i64, z: f64) -> Result<()>;
}

impl Predictor for DailyFilter {
    fn predict(&self, day: i64) -> Result<OneStep> {
        DailyFilter::predict(self, day)
    }

    fn update(&mut self, day: i64, z: f64) -> Result<()> {
        DailyFilter::update(self, day, z).map(|_| ())
    }
}

/// Converts day offsets given as `f64` to whole days, checking that each is a finite whole
/// number and that they never decrease.
///
/// # Errors
/// [`ProspectiveError::NonFinite`], [`ProspectiveError::NonIntegerDay`] or
/// [`ProspectiveError::DaysOutOfOrder`], naming the first offending entry.
pub fn whole_days(t: &[f64]) -> Result<Vec<i64>> {
    let mut out = Vec::with_capacity(t.len());
    for (index, &day) in t.iter().enumerate() {
        if !day.is_finite() {
            return Err(ProspectiveError::NonFinite(format!(
                "day t[{index}] = {day}"
            )));
        }
        if day.fract() != 0.0 || day.abs() > 1e15 {
            return Err(ProspectiveError::NonIntegerDay { index, day });
        }
        let d = day as i64;
        if let Some(&previous) = out.last()
            && d < previous
        {
            return Err(ProspectiveError::DaysOutOfOrder { day: d, previous });
        }
        out.push(d);
    }
    Ok(out)
}

/// Filters a whole series, conditioning on every observation: returns the one-step-ahead
/// predictive of each observation given all earlier ones (standardised units), and the filter
/// afterwards (its [`DailyFilter::log_likelihood`] is −NLML of the series).
fn run_filter(prior: &PriorParams, t: &[f64], z: &[f64]) -> Result<(Vec<OneStep>, DailyFilter)> {
    if t.len() != z.len() {
        return Err(ProspectiveError::Shape(format!(
            "{} days but {} observations",
            t.len(),
            z.len()
        )));
    }
    let days = whole_days(t)?;
    let mut filter = DailyFilter::new(&StateSpacePrior::new(prior)?);
    let mut out = Vec::with_capacity(days.len());
    for (&day, &value) in days.iter().zip(z) {
        out.push(filter.update(day, value)?);
    }
    Ok((out, filter))
}

/// One-step-ahead predictive of every observation of a standardised series given only the
/// observations before it (standardised units; `t` whole days, non-decreasing).
///
/// Entry `i` equals `prior.model().posterior(&t[..i], &z[..i]).predict(&[t[i]])` (mean and
/// `var_obs`), computed in O(n) total.
///
/// # Errors
/// See [`whole_days`], [`StateSpacePrior::new`]; [`ProspectiveError::Shape`] for unequal
/// lengths; [`ProspectiveError::NonFinite`] for a non-finite observation.
pub fn one_step_ahead(prior: &PriorParams, t: &[f64], z: &[f64]) -> Result<Vec<OneStep>> {
    run_filter(prior, t, z).map(|(steps, _)| steps)
}

/// Negative log marginal likelihood of a standardised series by the prediction-error
/// decomposition; equals `prior.model().nlml(t, z)` (R&W 2006 eq. 2.30) in O(n).
///
/// # Errors
/// As [`one_step_ahead`].
pub fn filter_nlml(prior: &PriorParams, t: &[f64], z: &[f64]) -> Result<f64> {
    run_filter(prior, t, z).map(|(_, filter)| -filter.log_likelihood())
}

/// What a prospective day meant for flagging.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum DayStatus {
    /// Fewer than the configured minimum of earlier observed days: no flags yet.
    BuildingBaseline,
    /// Scored, no flag raised for this signal on this day.
    Normal,
    /// A flag was raised for this signal on this day (single-day, CUSUM, or a multi-signal
    /// flag that included this signal).
    Flagged,
}

/// One observed day of one signal, scored prospectively (signal units).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ProspectiveDay {
    pub date: NaiveDate,
    #[serde(serialize_with = "serialize_signal")]
    pub signal: Signal,
    /// The observed value.
    pub observed: f64,
    /// One-step-ahead predictive mean given only earlier conditioned days.
    pub mean: f64,
    /// Predictive SD of an observation (latent plus day-to-day noise).
    pub sd: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
    /// Standardised residual `(observed − mean) / sd`.
    pub z: f64,
    /// Two-sided tail probability `2 Φ(−|z|)`.
    pub tail_p: f64,
    /// Whether this value entered the personal baseline (was conditioned on by the filter);
    /// false for days withheld by baseline protection (see [`crate::flags`]).
    pub conditioned: bool,
    pub status: DayStatus,
}

/// Serialises a signal as its `daily.csv` column name.
pub(crate) fn serialize_signal<S: serde::Serializer>(
    signal: &Signal,
    serializer: S,
) -> std::result::Result<S::Ok, S::Error> {
    serializer.serialize_str(signal.column())
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn params() -> PriorParams {
        PriorParams {
            signal: Signal::RestingHr,
            values: [
                0.3,
                0.4f64.ln(),
                0.25f64.ln(),
                20.0f64.ln(),
                0.08f64.ln(),
                0.9f64.ln(),
                0.2f64.ln(),
            ],
        }
    }

    /// The closed-form Q equals P∞ − A P∞ Aᵀ computed from the matrices (1e-14 absolute on
    /// unit-variance entries), and A(Δ) P∞ reproduces the Matérn-3/2 kernel (R&W eq. 4.17).
    #[test]
    fn matern_transition_is_consistent() {
        let model = StateSpacePrior::new(&params()).unwrap();
        let lam = model.trend_rate;
        let s2 = model.trend_var;
        let pinf = [[s2, 0.0], [0.0, lam * lam * s2]];
        for dt in [1, 2, 5, 30] {
            let (a, q) = model.transition(dt);
            for i in 0..2 {
                for j in 0..2 {
                    let apa: f64 = (0..2)
                        .map(|k| (0..2).map(|l| a[i][k] * pinf[k][l] * a[j][l]).sum::<f64>())
                        .sum();
                    assert!(
                        (pinf[i][j] - apa - q[i][j]).abs()
                            < 1e-14 * s2.max(1.0) * lam.max(1.0).powi(2)
                    );
                }
            }
            let r = dt as f64 / (3f64.sqrt() / lam);
            let k = s2 * (1.0 + 3f64.sqrt() * r) * (-(3f64.sqrt()) * r).exp();
            assert!((a[0][0] * pinf[0][0] - k).abs() < 1e-14);
        }
    }

    /// C is a symmetric circulant (to rounding), PSD, and its diagonal is σ_w².
    #[test]
    fn weekly_covariance_is_circulant_psd() {
        for log_len in [-1.0, 0.0, 1.0, 3.0] {
            let mut p = params();
            p.values[5] = log_len;
            let model = StateSpacePrior::new(&p).unwrap();
            let c = model.weekly_cov();
            for i in 0..WEEK {
                assert!((c[i][i] - 0.08).abs() < 1e-15);
                for j in 0..WEEK {
                    assert_eq!(c[i][j], c[j][i]);
                    // Circulant up to rounding: sin(πd/7) and sin(π(7 − d)/7) differ in
                    // the last bits.
                    assert!((c[i][j] - c[0][(j + WEEK - i) % WEEK]).abs() < 1e-15);
                }
            }
            let eig = SymmetricEigen::new(DMatrix::from_fn(WEEK, WEEK, |i, j| c[i][j]));
            assert!(eig.eigenvalues.min() > -1e-12, "{}", eig.eigenvalues);
        }
    }

    #[test]
    fn bad_days_are_errors() {
        let p = params();
        assert!(matches!(
            one_step_ahead(&p, &[0.0, 1.5], &[0.0, 0.0]),
            Err(ProspectiveError::NonIntegerDay { index: 1, .. })
        ));
        assert!(matches!(
            one_step_ahead(&p, &[3.0, 1.0], &[0.0, 0.0]),
            Err(ProspectiveError::DaysOutOfOrder {
                day: 1,
                previous: 3
            })
        ));
        assert!(matches!(
            one_step_ahead(&p, &[0.0], &[0.0, 1.0]),
            Err(ProspectiveError::Shape(_))
        ));
        let mut filter = DailyFilter::new(&StateSpacePrior::new(&p).unwrap());
        filter.update(5, 0.1).unwrap();
        assert!(filter.predict(4).is_err());
        assert!(filter.update(6, f64::NAN).is_err());
        assert_eq!(filter.n_conditioned(), 1);
    }

    /// Predicting never changes the filter.
    #[test]
    fn predict_does_not_update() {
        let model = StateSpacePrior::new(&params()).unwrap();
        let mut filter = DailyFilter::new(&model);
        filter.update(0, 0.5).unwrap();
        let before = filter.predict(3).unwrap();
        let _ = filter.predict(10).unwrap();
        assert_eq!(filter.predict(3).unwrap(), before);
        assert_eq!(filter.n_conditioned(), 1);
    }

    #[test]
    fn band_quantiles_match_statrs() {
        let n = Normal::standard();
        assert!((n.inverse_cdf(0.75) - Z50).abs() < 1e-12);
        assert!((n.inverse_cdf(0.975) - Z95).abs() < 1e-12);
        // statrs' erfc is accurate to about 1e-10 relative here.
        assert!((tail_probability(-1.959_963_984_540_054) - 0.05).abs() < 1e-9);
    }

    /// Sampling from the state-space form reproduces the prior's marginal variance and the
    /// lag-7 covariance (weekly term fully correlated, Matérn decayed): 20,000 paths, tolerance
    /// 4 standard errors.
    #[test]
    fn sampled_paths_have_prior_moments() {
        let p = params();
        let model = StateSpacePrior::new(&p).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let n = 20_000;
        let (mut s0, mut s00, mut s07) = (0.0, 0.0, 0.0);
        for _ in 0..n {
            let z = model.sample(&[3, 10], &mut rng).unwrap();
            let (a, b) = (z[0] - model.mean(), z[1] - model.mean());
            s0 += a;
            s00 += a * a;
            s07 += a * b;
        }
        let n_f = n as f64;
        let var = model.marginal_var();
        let k = p.model().kernel.cov(&[3.0, 10.0]);
        assert!((s0 / n_f).abs() < 4.0 * (var / n_f).sqrt());
        assert!((s00 / n_f - var).abs() < 4.0 * var * (2.0 / n_f).sqrt());
        assert!((s07 / n_f - k[(0, 1)]).abs() < 4.0 * var * (2.0 / n_f).sqrt());
    }
}
