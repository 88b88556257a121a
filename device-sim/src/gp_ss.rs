//! Negative log marginal likelihood (NLML) of the shared prior and its exact gradient with
//! respect to all seven wire parameters, computed on the prior's state-space form on whole
//! days in O(n) per series (10-dimensional state), instead of the dense engine's O(n³).
//!
//! # Model
//! The state-space form is the one of [`crate::prospective`] (see its module docs for the
//! derivation): state `x = [b, f, f', p_0 … p_6]`, an observation on day `t` reads
//! `z(t) = μ0 + hₜᵀ x + ε`, `hₜ = e_b + e_f + e_{p[t mod 7]}`, `ε ~ N(0, σ_n²)`, and
//!
//! ```text
//! x₀ ~ N(0, P₀),  P₀ = blockdiag(τ², P∞, C)
//!   P∞ = diag(σ_f², λ² σ_f²),   λ = √3 / ℓ_f                     Matérn-3/2 stationary cov.
//!   C[i][j] = σ_w² exp(−2 sin²(π (i − j) / 7) / ℓ_w²)             weekly circulant
//! over a gap of Δ > 0 days only the trend block [f, f'] moves:
//!   [f, f']ᵀ ← A(Δ) [f, f']ᵀ + N(0, Q(Δ))
//!   A(Δ) = e^{−u} [[1 + u, Δ], [−λ²Δ, 1 − u]],   u = λΔ
//!   Q(Δ) = σ_f² [[1 − e^{−2u}(1 + 2u + 2u²),   2λu² e^{−2u}],
//!                [2λu² e^{−2u},   λ²(1 − e^{−2u}(1 − 2u + 2u²))]]
//! ```
//!
//! # Likelihood: the prediction-error decomposition
//! A Kalman filter (Kalman 1960; Särkkä 2013, *Bayesian Filtering and Smoothing*, Theorem 4.2)
//! run through the observations in day order gives, for each observation `k` on day `t_k`,
//!
//! ```text
//! prediction   m⁻ = Ā m,   P⁻ = Ā P Āᵀ + Q̄          Ā = blockdiag(1, A(Δ), I₇), Q̄ likewise
//! innovation   v = z_k − μ0 − hᵀ m⁻,   S = hᵀ P⁻ h + σ_n²,   g = P⁻ h
//! update       m = m⁻ + g v / S,   P = P⁻ − g gᵀ / S
//! NLML = Σ_k ½ (ln 2π S_k + v_k² / S_k)
//! ```
//!
//! (Harvey 1989, *Forecasting, Structural Time Series Models and the Kalman Filter*, §3.4;
//! Särkkä 2013, §12.3.1, the "energy function" of a linear Gaussian model). It equals the dense
//! NLML of Rasmussen & Williams (2006), eq. 2.30: `S_k` is the k-th squared pivot of the
//! Cholesky factor of `K` in day order and `v_k / √S_k` the k-th entry of `L⁻¹ (z − μ0)`.
//!
//! # Gradient: the sensitivity (tangent) recursions
//! For each parameter `θ_j` the filter carries `∂m/∂θ_j` (10-vector) and `∂P/∂θ_j` (10 × 10),
//! obtained by differentiating every filter line (Gupta & Mehra 1974, "Computational aspects of
//! maximum likelihood estimation and reduction in sensitivity function calculations", IEEE
//! Trans. Automatic Control 19(6):774–783, §III; Särkkä 2013, §12.3.1 with the Kalman-filter
//! parameter derivatives of Appendix A.2 — section numbers from memory). Writing `∂` for
//! `∂/∂θ_j`:
//!
//! ```text
//! ∂m⁻ = ∂Ā m + Ā ∂m
//! ∂P⁻ = ∂Ā P Āᵀ + Ā P ∂Āᵀ + Ā ∂P Āᵀ + ∂Q̄
//! ∂v  = −∂μ0 − hᵀ ∂m⁻,   ∂g = ∂P⁻ h,   ∂S = hᵀ ∂g + ∂σ_n²
//! ∂m  = ∂m⁻ + (∂g / S − g ∂S / S²) v + g ∂v / S
//! ∂P  = ∂P⁻ − (a gᵀ + g aᵀ) / S,   a = ∂g − g ∂S / (2S)
//! ∂NLML += ½ (∂S / S + 2 v ∂v / S − v² ∂S / S²)
//! ∂m₀ = 0,   ∂P₀ = ∂blockdiag(τ², P∞, C)
//! ```
//!
//! The mean μ0 enters only through `v`, so its `∂P` is zero and is not carried. The derivatives
//! of the model matrices with respect to the log parameters are closed forms
//! (`∂/∂log x = x ∂/∂x`; with `u = λΔ`, `∂u/∂log ℓ_f = −u`, `∂λ/∂log ℓ_f = −λ`):
//!
//! ```text
//! ∂P₀/∂log τ²   = τ² e_b e_bᵀ
//! ∂P∞/∂log σ_f² = P∞,    ∂Q/∂log σ_f² = Q,    ∂A/∂log σ_f² = 0
//! ∂P∞/∂log ℓ_f  = diag(0, −2λ²σ_f²)
//! ∂A/∂log ℓ_f   = e^{−u} [[u²,  uΔ], [λ²Δ(2 − u),  u(2 − u)]]
//! ∂Q/∂log ℓ_f   = −σ_f² e^{−2u} [[4u³,  2λu²(3 − 2u)], [2λu²(3 − 2u),  λ² (2 G e^{2u} + 4u(1 − u)²)]]
//!                 with G = 1 − e^{−2u}(1 − 2u + 2u²)  (so Q₁₁ = σ_f² λ² G)
//! ∂C/∂log σ_w²  = C,     ∂C[i][j]/∂log ℓ_w = 4 C[i][j] sin²(π (i − j) / 7) / ℓ_w²
//! ∂S/∂log σ_n²  = σ_n²   (direct term; the filter's own dependence is carried by ∂P)
//! ```
//!
//! The `∂Q/∂log ℓ_f` form is checked in the tests against the product rule applied to
//! `Q = P∞ − A P∞ Aᵀ`, and every derivative against central differences.
//!
//! Cost per observation: one transition of 7 covariance matrices (`P` and six `∂P`) on the two
//! trend rows and columns, and one rank-2 update of each, about 2,000 flops; the whole
//! gradient of a device-year is ~1 Mflop against the dense engine's ~n³/2 ≈ 20 Mflop.
//!
//! # Scope and numerical guard
//! Days are whole and non-decreasing ([`nlml_grad`] takes `i64` days; convert with
//! [`crate::prospective::whole_days`]). Repeated days are allowed (no transition between
//! them; each observation has its own noise, as the dense `White` term). A predictive variance
//! `S_k ≤ n ε max(diag K)` is reported as [`GpError::NotPositiveDefinite`] (with
//! `max_jitter = 0`, none having been tried): that is the dense engine's own pivot test
//! (`gp::cholesky_with_jitter`), since `S_k` is the k-th squared Cholesky pivot, so (up to
//! rounding) where the dense engine would need jitter this module refuses and the caller can
//! use the dense engine (as [`crate::training`] does).

use crate::gp::{GpError, Result};
use crate::prior::{N_PARAMS, WEEK_DAYS};

/// Dimension of the state `[b, f, f', p_0 … p_6]`.
const STATE_DIM: usize = 10;
/// Days in the weekly profile.
const WEEK: usize = 7;
/// State index of the between-person offset `b`.
const IDX_OFFSET: usize = 0;
/// State index of the trend `f` (its derivative `f'` follows).
const IDX_TREND: usize = 1;
/// State index of the first weekly-profile entry `p_0`.
const IDX_WEEK: usize = 3;
/// Parameters whose derivative of `P` is carried: wire positions 1..7 (all but μ0).
const N_COV: usize = N_PARAMS - 1;
/// Wire position of each parameter.
const W_MEAN: usize = 0;
const W_BETWEEN: usize = 1;
const W_TREND_VAR: usize = 2;
const W_TREND_LEN: usize = 3;
const W_WEEKLY_VAR: usize = 4;
const W_WEEKLY_LEN: usize = 5;
const W_NOISE: usize = 6;

/// `0.5 · ln(2π)`.
const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

type Mat = [[f64; STATE_DIM]; STATE_DIM];
type Vec10 = [f64; STATE_DIM];
type M2 = [[f64; 2]; 2];

/// The Matérn-3/2 transition over `Δ` days and its derivatives with respect to the log length
/// scale (those with respect to `log σ_f²` are `0` for `A` and `Q` itself for `Q`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct TrendTransition {
    /// `A(Δ)`.
    pub a: M2,
    /// `Q(Δ)`.
    pub q: M2,
    /// `∂A/∂log ℓ_f`.
    pub da_dlog_len: M2,
    /// `∂Q/∂log ℓ_f`.
    pub dq_dlog_len: M2,
}

/// Closed forms of the module docs for `A(Δ)`, `Q(Δ)` and their `log ℓ_f` derivatives, with
/// `trend_var = σ_f²` and `rate = λ = √3 / ℓ_f`. The expressions for `A` and `Q` are those of
/// `StateSpacePrior::transition` in [`crate::prospective`], term by term.
pub(crate) fn trend_transition(trend_var: f64, rate: f64, delta: f64) -> TrendTransition {
    let lam = rate;
    let u = lam * delta;
    let e = (-u).exp();
    let a = [
        [e * (1.0 + u), e * delta],
        [-e * lam * lam * delta, e * (1.0 - u)],
    ];
    let e2 = e * e;
    let s2 = trend_var;
    let g11 = 1.0 - e2 * (1.0 - 2.0 * u + 2.0 * u * u);
    let q01 = s2 * 2.0 * lam * u * u * e2;
    let q = [
        [s2 * (1.0 - e2 * (1.0 + 2.0 * u + 2.0 * u * u)), q01],
        [q01, s2 * lam * lam * g11],
    ];
    let da_dlog_len = [
        [e * u * u, e * u * delta],
        [e * lam * lam * delta * (2.0 - u), e * u * (2.0 - u)],
    ];
    let dq01 = -s2 * 2.0 * lam * u * u * (3.0 - 2.0 * u) * e2;
    let dq_dlog_len = [
        [-s2 * 4.0 * u * u * u * e2, dq01],
        [
            dq01,
            -s2 * lam * lam * (2.0 * g11 + 4.0 * u * (1.0 - u) * (1.0 - u) * e2),
        ],
    ];
    TrendTransition {
        a,
        q,
        da_dlog_len,
        dq_dlog_len,
    }
}

/// The prior's state-space quantities for one parameter vector, with the derivatives of the
/// weekly covariance.
#[derive(Debug, Clone)]
struct Model {
    mean: f64,
    between_var: f64,
    trend_var: f64,
    trend_rate: f64,
    weekly_cov: [[f64; WEEK]; WEEK],
    /// `∂C/∂log ℓ_w`.
    weekly_cov_dlog_len: [[f64; WEEK]; WEEK],
    noise_var: f64,
}

impl Model {
    fn new(values: &[f64; N_PARAMS]) -> Result<Model> {
        let [mean, log_tau2, log_sf2, log_lf, log_sw2, log_lw, log_sn2] = *values;
        if let Some(j) = values.iter().position(|v| !v.is_finite()) {
            return Err(GpError::NonFinite(format!(
                "prior parameter {j} = {}",
                values[j]
            )));
        }
        let positive = [
            ("between_var", log_tau2.exp()),
            ("trend_var", log_sf2.exp()),
            ("trend_len_days", log_lf.exp()),
            ("weekly_var", log_sw2.exp()),
            ("weekly_len", log_lw.exp()),
            ("noise_var", log_sn2.exp()),
        ];
        for (name, v) in positive {
            if !(v.is_finite() && v > 0.0) {
                return Err(GpError::NonFinite(format!(
                    "prior {name} = {v} (from its logarithm)"
                )));
            }
        }
        // The same expressions as the dense kernel (`Kernel::prepare` / `value_grad`) and
        // `StateSpacePrior::from_values`.
        let weekly_var = log_sw2.exp();
        let inv_len_sq = (-2.0 * log_lw).exp();
        let omega = std::f64::consts::PI / WEEK_DAYS;
        let mut weekly_cov = [[0.0; WEEK]; WEEK];
        let mut weekly_cov_dlog_len = [[0.0; WEEK]; WEEK];
        for i in 0..WEEK {
            for j in 0..WEEK {
                let s = (omega * i.abs_diff(j) as f64).sin();
                let s2_scaled = s * s * inv_len_sq;
                let k = weekly_var * (-2.0 * s2_scaled).exp();
                weekly_cov[i][j] = k;
                weekly_cov_dlog_len[i][j] = 4.0 * k * s2_scaled;
            }
        }
        Ok(Model {
            mean,
            between_var: log_tau2.exp(),
            trend_var: log_sf2.exp(),
            trend_rate: 3f64.sqrt() * (-log_lf).exp(),
            weekly_cov,
            weekly_cov_dlog_len,
            noise_var: log_sn2.exp(),
        })
    }

    /// Prior variance of one observation, `τ² + σ_f² + σ_w² + σ_n²` (every diagonal entry of
    /// the dense `K`).
    fn marginal_var(&self) -> f64 {
        self.between_var + self.trend_var + self.weekly_cov[0][0] + self.noise_var
    }

    /// `P₀ = blockdiag(τ², P∞, C)`.
    fn initial_cov(&self) -> Mat {
        let mut p = [[0.0; STATE_DIM]; STATE_DIM];
        p[IDX_OFFSET][IDX_OFFSET] = self.between_var;
        p[IDX_TREND][IDX_TREND] = self.trend_var;
        p[IDX_TREND + 1][IDX_TREND + 1] = self.trend_rate * self.trend_rate * self.trend_var;
        set_weekly_block(&mut p, &self.weekly_cov);
        p
    }

    /// `∂P₀/∂θ` for the covariance parameters, indexed by wire position − 1.
    fn initial_cov_derivatives(&self) -> [Mat; N_COV] {
        let mut d = [[[0.0; STATE_DIM]; STATE_DIM]; N_COV];
        let pinf11 = self.trend_rate * self.trend_rate * self.trend_var;
        d[W_BETWEEN - 1][IDX_OFFSET][IDX_OFFSET] = self.between_var;
        d[W_TREND_VAR - 1][IDX_TREND][IDX_TREND] = self.trend_var;
        d[W_TREND_VAR - 1][IDX_TREND + 1][IDX_TREND + 1] = pinf11;
        d[W_TREND_LEN - 1][IDX_TREND + 1][IDX_TREND + 1] = -2.0 * pinf11;
        set_weekly_block(&mut d[W_WEEKLY_VAR - 1], &self.weekly_cov);
        set_weekly_block(&mut d[W_WEEKLY_LEN - 1], &self.weekly_cov_dlog_len);
        // ∂P₀/∂log σ_n² = 0: the noise is not part of the state.
        d
    }
}

fn set_weekly_block(p: &mut Mat, c: &[[f64; WEEK]; WEEK]) {
    for i in 0..WEEK {
        p[IDX_WEEK + i][IDX_WEEK..IDX_WEEK + WEEK].copy_from_slice(&c[i]);
    }
}

/// `M ← Ā M Āᵀ` with `Ā` the identity except for the trend block `A`.
#[inline]
fn propagate_cov(a: &M2, m: &mut Mat) {
    let (i0, i1) = (IDX_TREND, IDX_TREND + 1);
    let (upper, lower) = m.split_at_mut(i1);
    for (y0, y1) in upper[i0].iter_mut().zip(lower[0].iter_mut()) {
        let (x0, x1) = (*y0, *y1);
        *y0 = a[0][0] * x0 + a[0][1] * x1;
        *y1 = a[1][0] * x0 + a[1][1] * x1;
    }
    for row in m.iter_mut() {
        let (x0, x1) = (row[i0], row[i1]);
        row[i0] = a[0][0] * x0 + a[0][1] * x1;
        row[i1] = a[1][0] * x0 + a[1][1] * x1;
    }
}

/// `x ← Ā x`.
#[inline]
fn propagate_mean(a: &M2, x: &mut Vec10) {
    let (i0, i1) = (IDX_TREND, IDX_TREND + 1);
    let (x0, x1) = (x[i0], x[i1]);
    x[i0] = a[0][0] * x0 + a[0][1] * x1;
    x[i1] = a[1][0] * x0 + a[1][1] * x1;
}

/// `M += Q̄` (the trend block only).
#[inline]
fn add_trend_block(q: &M2, m: &mut Mat) {
    for r in 0..2 {
        for c in 0..2 {
            m[IDX_TREND + r][IDX_TREND + c] += q[r][c];
        }
    }
}

/// `M += ∂Ā P Āᵀ + Ā P ∂Āᵀ` for the `∂Ā` of `log ℓ_f` (nonzero in the trend block only), with
/// the covariance `p` before prediction.
#[inline]
fn add_transition_derivative(a: &M2, da: &M2, p: &Mat, m: &mut Mat) {
    let (i0, i1) = (IDX_TREND, IDX_TREND + 1);
    // Y = rows i0, i1 of P Āᵀ; X = ∂A Y (the two nonzero rows of ∂Ā P Āᵀ).
    let mut x = [[0.0; STATE_DIM]; 2];
    for c in 0..STATE_DIM {
        let (mut y0, mut y1) = (p[i0][c], p[i1][c]);
        if c == i0 || c == i1 {
            let r = c - i0;
            y0 = a[r][0] * p[i0][i0] + a[r][1] * p[i0][i1];
            y1 = a[r][0] * p[i1][i0] + a[r][1] * p[i1][i1];
        }
        x[0][c] = da[0][0] * y0 + da[0][1] * y1;
        x[1][c] = da[1][0] * y0 + da[1][1] * y1;
    }
    for (r, xr) in x.iter().enumerate() {
        for c in 0..STATE_DIM {
            m[i0 + r][c] += xr[c];
            m[c][i0 + r] += xr[c];
        }
    }
}

/// Indices of the states an observation on `day` reads (`hₜ`'s three ones).
#[inline]
fn observed_states(day: i64) -> [usize; 3] {
    [
        IDX_OFFSET,
        IDX_TREND,
        IDX_WEEK + day.rem_euclid(WEEK as i64) as usize,
    ]
}

/// `M h` for the observation vector with ones at `idx`.
#[inline]
fn times_h(m: &Mat, idx: &[usize; 3]) -> Vec10 {
    std::array::from_fn(|r| m[r][idx[0]] + m[r][idx[1]] + m[r][idx[2]])
}

/// `hᵀ x`.
#[inline]
fn dot_h(x: &Vec10, idx: &[usize; 3]) -> f64 {
    x[idx[0]] + x[idx[1]] + x[idx[2]]
}

fn check_inputs(days: &[i64], z: &[f64]) -> Result<()> {
    if days.len() != z.len() {
        return Err(GpError::Shape(format!(
            "{} days but {} observations",
            days.len(),
            z.len()
        )));
    }
    if let Some(i) = z.iter().position(|v| !v.is_finite()) {
        return Err(GpError::NonFinite(format!("observation z[{i}] = {}", z[i])));
    }
    if let Some(i) = days.windows(2).position(|w| w[1] < w[0]) {
        return Err(GpError::Shape(format!(
            "day {} comes after day {}: days must be non-decreasing",
            days[i + 1],
            days[i]
        )));
    }
    Ok(())
}

/// Negative log marginal likelihood of the standardised series `z` observed on whole `days`
/// under the prior with wire parameters `values` (module docs). Equals the dense
/// `prior::model_from(values).nlml(t, z)` (R&W 2006, eq. 2.30) when the latter needs no jitter.
///
/// # Errors
/// [`GpError::Shape`] for unequal lengths or decreasing days, [`GpError::NonFinite`] for a
/// non-finite observation or parameter, [`GpError::NotPositiveDefinite`] when a predictive
/// variance fails the dense engine's pivot test (module docs).
pub fn nlml(values: &[f64; N_PARAMS], days: &[i64], z: &[f64]) -> Result<f64> {
    check_inputs(days, z)?;
    let model = Model::new(values)?;
    let min_s = days.len() as f64 * f64::EPSILON * model.marginal_var();
    let mut m = [0.0; STATE_DIM];
    let mut p = model.initial_cov();
    let mut value = 0.0;
    let mut previous: Option<i64> = None;
    for (&day, &zk) in days.iter().zip(z) {
        if let Some(prev) = previous
            && day > prev
        {
            let tr = trend_transition(model.trend_var, model.trend_rate, (day - prev) as f64);
            propagate_mean(&tr.a, &mut m);
            propagate_cov(&tr.a, &mut p);
            add_trend_block(&tr.q, &mut p);
        }
        previous = Some(day);
        let idx = observed_states(day);
        let g = times_h(&p, &idx);
        let s = dot_h(&g, &idx) + model.noise_var;
        check_variance(s, min_s, days.len())?;
        let v = zk - model.mean - dot_h(&m, &idx);
        value += 0.5 * (s.ln() + v * v / s) + HALF_LN_2PI;
        let gain: Vec10 = std::array::from_fn(|r| g[r] / s);
        for r in 0..STATE_DIM {
            m[r] += gain[r] * v;
            for c in 0..STATE_DIM {
                p[r][c] -= gain[r] * g[c];
            }
        }
    }
    check_value(value)
}

/// NLML (as [`nlml`]) and its gradient with respect to the seven wire parameters
/// `[μ0, log τ², log σ_f², log ℓ_f, log σ_w², log ℓ_w, log σ_n²]`, by the sensitivity
/// recursions of the module docs (Gupta & Mehra 1974). Equals the dense
/// `gradient_to_wire(model_from(values).nlml_grad(t, z))` (R&W 2006, eq. 5.9).
///
/// # Errors
/// As [`nlml`].
pub fn nlml_grad(
    values: &[f64; N_PARAMS],
    days: &[i64],
    z: &[f64],
) -> Result<(f64, [f64; N_PARAMS])> {
    check_inputs(days, z)?;
    let model = Model::new(values)?;
    let min_s = days.len() as f64 * f64::EPSILON * model.marginal_var();
    let mut m = [0.0; STATE_DIM];
    let mut p = model.initial_cov();
    // ∂m for every wire parameter; ∂P for wire positions 1..7 (index = position − 1).
    let mut dm = [[0.0; STATE_DIM]; N_PARAMS];
    let mut dp = model.initial_cov_derivatives();
    let mut value = 0.0;
    let mut grad = [0.0; N_PARAMS];
    let mut previous: Option<i64> = None;
    for (&day, &zk) in days.iter().zip(z) {
        if let Some(prev) = previous
            && day > prev
        {
            let tr = trend_transition(model.trend_var, model.trend_rate, (day - prev) as f64);
            // Terms that need m and P before prediction come before m and P move.
            let (f0, f1) = (m[IDX_TREND], m[IDX_TREND + 1]);
            for dmj in dm.iter_mut() {
                propagate_mean(&tr.a, dmj);
            }
            let da = &tr.da_dlog_len;
            dm[W_TREND_LEN][IDX_TREND] += da[0][0] * f0 + da[0][1] * f1;
            dm[W_TREND_LEN][IDX_TREND + 1] += da[1][0] * f0 + da[1][1] * f1;
            for dpj in dp.iter_mut() {
                propagate_cov(&tr.a, dpj);
            }
            // P is still the covariance before prediction here.
            add_transition_derivative(&tr.a, &tr.da_dlog_len, &p, &mut dp[W_TREND_LEN - 1]);
            add_trend_block(&tr.q, &mut dp[W_TREND_VAR - 1]);
            add_trend_block(&tr.dq_dlog_len, &mut dp[W_TREND_LEN - 1]);
            propagate_mean(&tr.a, &mut m);
            propagate_cov(&tr.a, &mut p);
            add_trend_block(&tr.q, &mut p);
        }
        previous = Some(day);

        let idx = observed_states(day);
        let g = times_h(&p, &idx);
        let s = dot_h(&g, &idx) + model.noise_var;
        check_variance(s, min_s, days.len())?;
        let inv_s = 1.0 / s;
        let v = zk - model.mean - dot_h(&m, &idx);
        value += 0.5 * (s.ln() + v * v * inv_s) + HALF_LN_2PI;
        let gain: Vec10 = std::array::from_fn(|r| g[r] * inv_s);

        // μ0: ∂P = 0, so ∂S = 0 and ∂g = 0.
        {
            let dv = -1.0 - dot_h(&dm[W_MEAN], &idx);
            grad[W_MEAN] += v * dv * inv_s;
            for (d, kr) in dm[W_MEAN].iter_mut().zip(&gain) {
                *d += kr * dv;
            }
        }
        for (j, dpj) in dp.iter_mut().enumerate() {
            let wire = j + 1;
            let dg = times_h(dpj, &idx);
            let mut ds = dot_h(&dg, &idx);
            if wire == W_NOISE {
                ds += model.noise_var;
            }
            let dv = -dot_h(&dm[wire], &idx);
            grad[wire] += 0.5 * (ds * inv_s + 2.0 * v * dv * inv_s - v * v * ds * inv_s * inv_s);
            let ds_over_s = ds * inv_s;
            // ∂m += (∂g/S − g ∂S/S²) v + g ∂v / S
            for (r, d) in dm[wire].iter_mut().enumerate() {
                *d += (dg[r] * inv_s - gain[r] * ds_over_s) * v + gain[r] * dv;
            }
            // ∂P −= (a gᵀ + g aᵀ)/S = a Kᵀ + K aᵀ,  a = ∂g − g ∂S/(2S),  K = g/S
            let a: Vec10 = std::array::from_fn(|r| dg[r] - 0.5 * g[r] * ds_over_s);
            for r in 0..STATE_DIM {
                let (ar, kr) = (a[r], gain[r]);
                for c in 0..STATE_DIM {
                    dpj[r][c] -= ar * gain[c] + kr * a[c];
                }
            }
        }
        for r in 0..STATE_DIM {
            m[r] += gain[r] * v;
            for c in 0..STATE_DIM {
                p[r][c] -= gain[r] * g[c];
            }
        }
    }
    let value = check_value(value)?;
    if let Some(j) = grad.iter().position(|g| !g.is_finite()) {
        return Err(GpError::NonFinite(format!("NLML gradient component {j}")));
    }
    Ok((value, grad))
}

/// The dense engine's pivot test on a one-step predictive variance (module docs).
#[inline]
fn check_variance(s: f64, min_s: f64, n: usize) -> Result<()> {
    if s > min_s && s.is_finite() {
        Ok(())
    } else {
        Err(GpError::NotPositiveDefinite { n, max_jitter: 0.0 })
    }
}

fn check_value(value: f64) -> Result<f64> {
    if value.is_finite() {
        Ok(value)
    } else {
        Err(GpError::NonFinite(format!(
            "negative log marginal likelihood = {value}"
        )))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::prior::PriorParams;
    use crate::prospective::{StateSpacePrior, filter_nlml};
    use crate::signal::Signal;

    fn values() -> [f64; N_PARAMS] {
        [
            0.3,
            0.4f64.ln(),
            0.25f64.ln(),
            20.0f64.ln(),
            0.08f64.ln(),
            0.9f64.ln(),
            0.2f64.ln(),
        ]
    }

    fn series() -> (Vec<i64>, Vec<f64>) {
        let days: Vec<i64> = (3..80).filter(|d| d % 5 != 2 && d % 11 != 0).collect();
        let z = days
            .iter()
            .map(|&d| {
                let d = d as f64;
                0.4 + 0.5 * (d / 9.0).sin() + 0.2 * (d * 2.1).cos()
            })
            .collect();
        (days, z)
    }

    fn central_difference(f: impl Fn(f64) -> f64, x: f64, h: f64) -> f64 {
        (f(x + h) - f(x - h)) / (2.0 * h)
    }

    /// `A`, `Q` are the expressions of `StateSpacePrior::transition` (bitwise, same
    /// arithmetic), so training and prospective filtering use one model.
    #[test]
    fn transition_is_the_prospective_one() {
        let v = values();
        let prior = StateSpacePrior::from_values(&v).unwrap();
        let model = Model::new(&v).unwrap();
        for dt in [1, 2, 7, 45] {
            let ours = trend_transition(model.trend_var, model.trend_rate, dt as f64);
            let (a, q) = prior.trend_transition(dt);
            assert_eq!(ours.a, a);
            assert_eq!(ours.q, q);
        }
        assert_eq!(model.weekly_cov, prior.weekly_cov());
    }

    /// The closed-form `∂A/∂log ℓ_f` and `∂Q/∂log ℓ_f` against central differences of `A`, `Q`
    /// (h = 1e-5: truncation ~1e-10 relative; tolerance 1e-8 on unit-scale entries), and
    /// `∂Q/∂log ℓ_f` against the product rule on `Q = P∞ − A P∞ Aᵀ` (same derivative by another
    /// route; tolerance 1e-13).
    #[test]
    fn transition_derivatives_are_exact() {
        let s2 = 0.7;
        for log_len in [0.5f64, 2.0, 3.5] {
            for delta in [1.0, 3.0, 10.0] {
                let rate = |ll: f64| 3f64.sqrt() * (-ll).exp();
                let tr = trend_transition(s2, rate(log_len), delta);
                let lam = rate(log_len);
                let scale = [[1.0, 1.0 / lam], [lam, 1.0]];
                for (i, scale_row) in scale.iter().enumerate() {
                    for (j, &entry_scale) in scale_row.iter().enumerate() {
                        let fd_a = central_difference(
                            |ll| trend_transition(s2, rate(ll), delta).a[i][j],
                            log_len,
                            1e-5,
                        );
                        let fd_q = central_difference(
                            |ll| trend_transition(s2, rate(ll), delta).q[i][j],
                            log_len,
                            1e-5,
                        );
                        let tol = 1e-8 * entry_scale.max(1.0) * lam.max(1.0);
                        assert!(
                            (fd_a - tr.da_dlog_len[i][j]).abs() < tol,
                            "dA[{i}][{j}] ℓ=e^{log_len} Δ={delta}: {fd_a} vs {}",
                            tr.da_dlog_len[i][j]
                        );
                        assert!(
                            (fd_q - tr.dq_dlog_len[i][j]).abs() < tol * s2 * lam.max(1.0),
                            "dQ[{i}][{j}]: {fd_q} vs {}",
                            tr.dq_dlog_len[i][j]
                        );
                    }
                }
                // Product rule: ∂Q = ∂P∞ − ∂A P∞ Aᵀ − A ∂P∞ Aᵀ − A P∞ ∂Aᵀ.
                let (a, da) = (tr.a, tr.da_dlog_len);
                let pinf = [[s2, 0.0], [0.0, lam * lam * s2]];
                let dpinf = [[0.0, 0.0], [0.0, -2.0 * lam * lam * s2]];
                let triple = |x: &M2, y: &M2, w: &M2, i: usize, j: usize| -> f64 {
                    (0..2)
                        .map(|k| (0..2).map(|l| x[i][k] * y[k][l] * w[j][l]).sum::<f64>())
                        .sum()
                };
                for i in 0..2 {
                    for j in 0..2 {
                        let prod = dpinf[i][j]
                            - triple(&da, &pinf, &a, i, j)
                            - triple(&a, &dpinf, &a, i, j)
                            - triple(&a, &pinf, &da, i, j);
                        assert!(
                            (prod - tr.dq_dlog_len[i][j]).abs() < 1e-13 * lam.max(1.0).powi(2),
                            "product rule dQ[{i}][{j}]: {prod} vs {}",
                            tr.dq_dlog_len[i][j]
                        );
                    }
                }
            }
        }
    }

    /// `∂C/∂log ℓ_w` against central differences of `C` (h = 1e-5, tolerance 1e-9).
    #[test]
    fn weekly_derivative_is_exact() {
        let v = values();
        let model = Model::new(&v).unwrap();
        for i in 0..WEEK {
            for j in 0..WEEK {
                let fd = central_difference(
                    |ll| {
                        let mut w = v;
                        w[W_WEEKLY_LEN] = ll;
                        Model::new(&w).unwrap().weekly_cov[i][j]
                    },
                    v[W_WEEKLY_LEN],
                    1e-5,
                );
                assert!((fd - model.weekly_cov_dlog_len[i][j]).abs() < 1e-9);
            }
        }
    }

    /// The value equals the prospective filter's −log-likelihood (`prospective::filter_nlml`,
    /// itself tested against the dense engine), and `nlml` equals `nlml_grad`'s value; to
    /// 1e-12 relative (same recursion, different order of a few additions).
    #[test]
    fn value_matches_the_prospective_filter() {
        let v = values();
        let (days, z) = series();
        let t: Vec<f64> = days.iter().map(|&d| d as f64).collect();
        let prior = PriorParams {
            signal: Signal::RestingHr,
            values: v,
        };
        let reference = filter_nlml(&prior, &t, &z).unwrap();
        let (value, _) = nlml_grad(&v, &days, &z).unwrap();
        assert!((value - reference).abs() < 1e-12 * reference.abs());
        assert!((nlml(&v, &days, &z).unwrap() - value).abs() < 1e-12 * value.abs());
    }

    /// Gradient against central differences of the value (h = 1e-5; truncation and rounding
    /// both ~1e-10 relative): tolerance 1e-6 relative to max(|g|, 1e-2). Includes a repeated
    /// day and negative days.
    #[test]
    fn gradient_matches_finite_differences() {
        let v = values();
        let (mut days, mut z) = series();
        days.insert(4, days[3]);
        z.insert(4, z[3] - 0.3);
        days.iter_mut().for_each(|d| *d -= 20);
        let (_, grad) = nlml_grad(&v, &days, &z).unwrap();
        for j in 0..N_PARAMS {
            let fd = central_difference(
                |x| {
                    let mut w = v;
                    w[j] = x;
                    nlml(&w, &days, &z).unwrap()
                },
                v[j],
                1e-5,
            );
            assert!(
                (fd - grad[j]).abs() <= 1e-6 * grad[j].abs().max(1e-2),
                "param {j}: analytic {} vs finite difference {fd}",
                grad[j]
            );
        }
    }

    #[test]
    fn empty_series_and_bad_inputs() {
        let v = values();
        assert_eq!(nlml_grad(&v, &[], &[]).unwrap(), (0.0, [0.0; N_PARAMS]));
        assert!(matches!(
            nlml_grad(&v, &[0, 1], &[0.0]),
            Err(GpError::Shape(_))
        ));
        assert!(matches!(
            nlml_grad(&v, &[3, 1], &[0.0, 0.0]),
            Err(GpError::Shape(m)) if m.contains("non-decreasing")
        ));
        assert!(matches!(
            nlml_grad(&v, &[0, 1], &[0.0, f64::NAN]),
            Err(GpError::NonFinite(m)) if m.contains("z[1]")
        ));
        let mut bad = v;
        bad[W_NOISE] = f64::INFINITY;
        assert!(matches!(
            nlml(&bad, &[0], &[0.0]),
            Err(GpError::NonFinite(_))
        ));
        bad[W_NOISE] = 800.0; // exp overflows
        assert!(matches!(
            nlml(&bad, &[0], &[0.0]),
            Err(GpError::NonFinite(m)) if m.contains("noise_var")
        ));
    }

    /// Two observations on the same day with almost no noise make `K` numerically singular:
    /// the second predictive variance fails the dense pivot test and is refused, as the dense
    /// engine would refuse it without jitter.
    #[test]
    fn numerically_singular_series_is_refused() {
        let mut v = values();
        v[W_NOISE] = -60.0;
        assert!(matches!(
            nlml_grad(&v, &[5, 5], &[0.1, 0.1]),
            Err(GpError::NotPositiveDefinite { n: 2, .. })
        ));
        assert!(nlml_grad(&v, &[5, 6], &[0.1, 0.1]).is_ok());
    }
}
