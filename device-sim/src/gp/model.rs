//! Gaussian-process regression with a constant mean: negative log marginal likelihood, its
//! gradient with respect to the log hyperparameters and the mean, and the posterior predictive
//! (Rasmussen & Williams 2006, ch. 2 and 5).

use nalgebra::{Cholesky, DMatrix, DVector, Dyn};

use super::cholesky::{recycle, spd_inverse};
use super::kernel::{DayLags, PreparedKernel, training_cov};
use super::{GpError, Kernel, Result, cholesky_with_jitter};

/// `0.5 · ln(2π)`.
const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

/// A GP prior `f ~ GP(mean, k)` observed through the kernel's own `White` noise.
///
/// `mean` is a constant mean function in the units of `y`; the kernel's hyperparameters are in
/// log space (see [`Kernel`]).
#[derive(Debug, Clone, PartialEq)]
pub struct GpRegression {
    /// Covariance function, including observation noise as a `White` term.
    pub kernel: Kernel,
    /// Constant prior mean of `y`.
    pub mean: f64,
}

/// Everything needed to predict after conditioning on data: the factor of the training
/// covariance and `α = K⁻¹ (y - mean)`, computed once by [`GpRegression::posterior`].
#[derive(Debug, Clone)]
pub struct Posterior {
    kernel: Kernel,
    prepared: PreparedKernel,
    mean: f64,
    t: Vec<f64>,
    cholesky: Cholesky<f64, Dyn>,
    alpha: DVector<f64>,
    jitter: f64,
}

/// Posterior predictive at a set of days.
///
/// `var_latent` is the variance of the latent function `f(t*)`; `var_obs` that of a new
/// observation `y(t*)`, i.e. `var_latent + noise_var`. Both are clamped at 0 (rounding can
/// make them slightly negative near training points of a noise-free model).
#[derive(Debug, Clone, PartialEq)]
pub struct Predictive {
    /// Predictive mean of `f(t*)` (equal to that of `y(t*)`).
    pub mean: Vec<f64>,
    /// Predictive variance of the latent function.
    pub var_latent: Vec<f64>,
    /// Predictive variance of a new noisy observation.
    pub var_obs: Vec<f64>,
}

/// Factorised training data shared by the likelihood, its gradient and the posterior.
struct Factorised {
    prepared: PreparedKernel,
    cholesky: Cholesky<f64, Dyn>,
    residual: DVector<f64>,
    alpha: DVector<f64>,
    jitter: f64,
}

impl GpRegression {
    /// Convenience constructor.
    pub fn new(kernel: Kernel, mean: f64) -> Self {
        Self { kernel, mean }
    }

    /// Checks lengths and finiteness, builds `K`, factorises it and solves for `α`.
    fn factorise(&self, t: &[f64], y: &[f64]) -> Result<Factorised> {
        if t.len() != y.len() {
            return Err(GpError::Shape(format!(
                "{} days but {} observations",
                t.len(),
                y.len()
            )));
        }
        if let Some(i) = t.iter().position(|v| !v.is_finite()) {
            return Err(GpError::NonFinite(format!("day t[{i}] = {}", t[i])));
        }
        if let Some(i) = y.iter().position(|v| !v.is_finite()) {
            return Err(GpError::NonFinite(format!("observation y[{i}] = {}", y[i])));
        }
        if !self.mean.is_finite() {
            return Err(GpError::NonFinite(format!("mean = {}", self.mean)));
        }
        self.kernel.validate()?;
        let prepared = self.kernel.prepare();
        let (cholesky, jitter) = cholesky_with_jitter(training_cov(&prepared, t))?;
        let residual = DVector::from_iterator(y.len(), y.iter().map(|v| v - self.mean));
        let alpha = cholesky.solve(&residual);
        Ok(Factorised {
            prepared,
            cholesky,
            residual,
            alpha,
            jitter,
        })
    }

    /// Negative log marginal likelihood of `y` observed at days `t`.
    ///
    /// ```text
    /// r    = y - mean                       (n)
    /// K    = k(t, t) incl. noise = L Lᵀ     (n × n)
    /// α    = K⁻¹ r = Lᵀ \ (L \ r)
    /// NLML = ½ rᵀα + Σᵢ ln Lᵢᵢ + (n/2) ln 2π
    /// ```
    /// Rasmussen & Williams (2006), eq. 2.30 and Algorithm 2.1. If [`cholesky_with_jitter`]
    /// needed jitter, this is the likelihood under `K + jitter·I`.
    ///
    /// # Errors
    /// [`GpError::Shape`] for `t.len() != y.len()`, [`GpError::NonFinite`] for non-finite
    /// inputs or hyperparameters, [`GpError::NotPositiveDefinite`] from the factorisation.
    pub fn nlml(&self, t: &[f64], y: &[f64]) -> Result<f64> {
        let fac = self.factorise(t, y)?;
        let value = nlml_value(&fac);
        recycle(fac.cholesky.unpack_dirty());
        check_finite(value, "negative log marginal likelihood")?;
        Ok(value)
    }

    /// Negative log marginal likelihood and its gradient. The gradient lists the kernel's log
    /// hyperparameters in [`Kernel::params`] order, then `∂/∂mean` last.
    ///
    /// ```text
    /// W            = K⁻¹ = L⁻ᵀ L⁻¹                                (n × n, symmetric)
    /// ∂NLML/∂θⱼ    = -½ tr((ααᵀ - W) ∂K/∂θⱼ)                     R&W (2006) eq. 5.9
    ///              = -½ Σ_{i≤k} cᵢₖ (αᵢαₖ - Wᵢₖ) ∂Kᵢₖ/∂θⱼ,   cᵢₖ = 1 if i = k else 2
    /// ∂NLML/∂mean  = -1ᵀ K⁻¹ r = -Σᵢ αᵢ
    /// ```
    /// Cost: one Cholesky (n³/6 multiply-adds), `W` from the triangular inverse and a
    /// triangle-aware product (n³/3 more, see `spd_inverse`; all three blocked so that most
    /// of the arithmetic runs in `matrixmultiply`), and one pass over the upper triangle that
    /// evaluates `∂Kᵢₖ/∂θ` on the fly, so no per-parameter `n × n` matrix is ever allocated.
    /// On whole-day data the pass only sums the weights `cᵢₖ (αᵢαₖ - Wᵢₖ)` per lag, and
    /// `∂k/∂θ` is evaluated once per distinct lag. Any jitter is treated as a constant.
    ///
    /// # Errors
    /// As [`GpRegression::nlml`].
    pub fn nlml_grad(&self, t: &[f64], y: &[f64]) -> Result<(f64, Vec<f64>)> {
        let fac = self.factorise(t, y)?;
        let value = nlml_value(&fac);
        check_finite(value, "negative log marginal likelihood")?;

        let w = spd_inverse(fac.cholesky.l_dirty());
        let acc = match DayLags::new(t) {
            Some(lags) => weighted_dk_by_lag(&fac.prepared, &lags, &w, &fac.alpha),
            None => weighted_dk_by_pair(&fac.prepared, t, &w, &fac.alpha),
        };
        recycle(w);
        recycle(fac.cholesky.unpack_dirty());
        let mut grad: Vec<f64> = acc.into_iter().map(|a| -0.5 * a).collect();
        grad.push(-fac.alpha.sum());
        if let Some(j) = grad.iter().position(|g| !g.is_finite()) {
            return Err(GpError::NonFinite(format!("NLML gradient component {j}")));
        }
        Ok((value, grad))
    }

    /// Conditions on `(t, y)` once and returns what [`Posterior::predict`] needs
    /// (Rasmussen & Williams 2006, Algorithm 2.1, lines 2–3).
    ///
    /// # Errors
    /// As [`GpRegression::nlml`].
    pub fn posterior(&self, t: &[f64], y: &[f64]) -> Result<Posterior> {
        let fac = self.factorise(t, y)?;
        Ok(Posterior {
            kernel: self.kernel.clone(),
            prepared: fac.prepared,
            mean: self.mean,
            t: t.to_vec(),
            cholesky: fac.cholesky,
            alpha: fac.alpha,
            jitter: fac.jitter,
        })
    }
}

impl Posterior {
    /// Predictive mean and variances at days `t_star`.
    ///
    /// ```text
    /// K*   = k(t*, t), no noise            (n* × n)
    /// mean = mean + K* α                   R&W (2006) eq. 2.25 / Alg. 2.1 line 4
    /// V    = L \ K*ᵀ                       (n × n*)
    /// var_latent = k(t*, t*) - colsum(V∘V) R&W (2006) eq. 2.26 / Alg. 2.1 lines 5–6
    /// var_obs    = var_latent + noise_var
    /// ```
    /// Non-finite entries of `t_star` give NaN in the corresponding outputs.
    pub fn predict(&self, t_star: &[f64]) -> Predictive {
        let n = self.t.len();
        let mut v = DMatrix::from_fn(n, t_star.len(), |i, a| {
            self.prepared.value((t_star[a] - self.t[i]).abs(), false)
        });
        let mean: Vec<f64> = v
            .column_iter()
            .map(|k_star| self.mean + k_star.dot(&self.alpha))
            .collect();
        // The factor's diagonal is strictly positive (checked when factorising), so the
        // triangular solve cannot hit a zero pivot.
        let solved = self.cholesky.l_dirty().solve_lower_triangular_mut(&mut v);
        debug_assert!(solved);
        let prior_latent = self.prepared.value(0.0, false);
        let noise = self.prepared.value(0.0, true) - prior_latent;
        let var_latent: Vec<f64> = v
            .column_iter()
            .map(|col| (prior_latent - col.norm_squared()).max(0.0))
            .collect();
        let var_obs = var_latent.iter().map(|v| v + noise).collect();
        Predictive {
            mean,
            var_latent,
            var_obs,
        }
    }

    /// Kernel the posterior was computed with.
    pub fn kernel(&self) -> &Kernel {
        &self.kernel
    }

    /// Constant prior mean.
    pub fn mean(&self) -> f64 {
        self.mean
    }

    /// Number of training observations.
    pub fn n_obs(&self) -> usize {
        self.t.len()
    }

    /// Diagonal jitter that the factorisation needed (0 when none).
    pub fn jitter(&self) -> f64 {
        self.jitter
    }
}

/// `Σ_{i≤k} cᵢₖ (αᵢαₖ - Wᵢₖ) ∂Kᵢₖ/∂θ` (one entry per kernel parameter), evaluating the
/// kernel derivatives pair by pair; `w = K⁻¹` (only its upper triangle is read).
fn weighted_dk_by_pair(
    prepared: &PreparedKernel,
    t: &[f64],
    w: &DMatrix<f64>,
    alpha: &DVector<f64>,
) -> Vec<f64> {
    let n = t.len();
    let n_params = prepared.n_params();
    let (w, alpha) = (w.as_slice(), alpha.as_slice());
    let mut acc = vec![0.0; n_params];
    let mut dk = vec![0.0; n_params];
    for j in 0..n {
        let w_col = &w[j * n..j * n + j + 1];
        let (alpha_j, t_j) = (alpha[j], t[j]);
        for (i, w_ij) in w_col.iter().enumerate() {
            let q = alpha[i] * alpha_j - w_ij;
            let weight = if i == j { q } else { 2.0 * q };
            prepared.value_grad((t[i] - t_j).abs(), i == j, &mut dk);
            for (a, d) in acc.iter_mut().zip(&dk) {
                *a += weight * d;
            }
        }
    }
    acc
}

/// Same sum as [`weighted_dk_by_pair`] on whole-day data: the weights are first summed per lag
/// (diagonal separately, since `White` depends on it), then each lag's derivative is
/// evaluated once.
fn weighted_dk_by_lag(
    prepared: &PreparedKernel,
    lags: &DayLags,
    w: &DMatrix<f64>,
    alpha: &DVector<f64>,
) -> Vec<f64> {
    let n = alpha.len();
    let n_params = prepared.n_params();
    let (w, alpha) = (w.as_slice(), alpha.as_slice());
    let mut weight_by_lag = vec![0.0; lags.n_lags()];
    let mut weight_diag = 0.0;
    for j in 0..n {
        let w_col = &w[j * n..j * n + j];
        let alpha_j = alpha[j];
        for (i, w_ij) in w_col.iter().enumerate() {
            weight_by_lag[lags.lag(i, j)] += 2.0 * (alpha[i] * alpha_j - w_ij);
        }
        weight_diag += alpha_j * alpha_j - w[j * n + j];
    }
    let mut acc = vec![0.0; n_params];
    let mut dk = vec![0.0; n_params];
    let mut add = |acc: &mut [f64], weight: f64, lag: f64, same: bool| {
        prepared.value_grad(lag, same, &mut dk);
        acc.iter_mut().zip(&dk).for_each(|(a, d)| *a += weight * d);
    };
    for (lag, &weight) in weight_by_lag.iter().enumerate() {
        if weight != 0.0 {
            add(&mut acc, weight, lag as f64, false);
        }
    }
    add(&mut acc, weight_diag, 0.0, true);
    acc
}

fn nlml_value(fac: &Factorised) -> f64 {
    let n = fac.residual.len();
    let l = fac.cholesky.l_dirty();
    let half_log_det: f64 = (0..n).map(|i| l[(i, i)].ln()).sum();
    0.5 * fac.residual.dot(&fac.alpha) + half_log_det + n as f64 * HALF_LN_2PI
}

fn check_finite(value: f64, what: &str) -> Result<()> {
    if value.is_finite() {
        Ok(())
    } else {
        Err(GpError::NonFinite(format!("{what} = {value}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every kernel kind, nested in sums and products, with irregular days and a duplicate day.
    fn all_kinds_model() -> GpRegression {
        let kernel = crate::gp::kernel::tests::all_kinds();
        GpRegression::new(kernel, 0.7)
    }

    fn data(n: usize) -> (Vec<f64>, Vec<f64>) {
        // Irregular days with one repeated day; y a deterministic wiggle (no RNG needed).
        let mut t: Vec<f64> = (0..n)
            .map(|i| (i as f64 * 1.37).floor() + 0.25 * (i % 3) as f64)
            .collect();
        t[3] = t[2];
        let y = t
            .iter()
            .map(|d| (d * 0.9).sin() + 0.3 * (d * 0.31).cos() + 0.05 * (d * 7.7).sin())
            .collect();
        (t, y)
    }

    fn set_all(m: &GpRegression, p: &[f64]) -> GpRegression {
        let mut out = m.clone();
        let k = out.kernel.n_params();
        out.kernel.set_params(&p[..k]);
        out.mean = p[k];
        out
    }

    /// Analytic gradient against central differences of `nlml` (h = 1e-5; truncation error
    /// O(h²) ≈ 1e-10 relative, rounding ≈ 1e-16·|NLML|/h ≈ 1e-10). Tolerance 1e-6 relative to
    /// max(|g|, 1e-2).
    #[test]
    fn nlml_grad_matches_finite_differences_for_every_kernel_and_the_mean() {
        let model = all_kinds_model();
        let (t, y) = data(40);
        let (value, grad) = model.nlml_grad(&t, &y).unwrap();
        assert!((value - model.nlml(&t, &y).unwrap()).abs() < 1e-12 * value.abs());
        let mut p = model.kernel.params();
        p.push(model.mean);
        assert_eq!(grad.len(), p.len());
        let h = 1e-5;
        for j in 0..p.len() {
            let (mut plus, mut minus) = (p.clone(), p.clone());
            plus[j] += h;
            minus[j] -= h;
            let fd = (set_all(&model, &plus).nlml(&t, &y).unwrap()
                - set_all(&model, &minus).nlml(&t, &y).unwrap())
                / (2.0 * h);
            let tol = 1e-6 * grad[j].abs().max(1e-2);
            assert!(
                (fd - grad[j]).abs() <= tol,
                "param {j}: analytic {} vs finite difference {fd}",
                grad[j]
            );
        }
    }

    /// The on-the-fly gradient against the textbook form -½ tr((ααᵀ - K⁻¹) ∂K/∂θ) built from
    /// full matrices (R&W 2006 eq. 5.9) with nalgebra's own inverse. Tolerance 1e-9 relative.
    #[test]
    fn nlml_grad_matches_dense_trace_formula() {
        let model = all_kinds_model();
        let (t, y) = data(25);
        let (_, grad) = model.nlml_grad(&t, &y).unwrap();
        let (k, dks) = model.kernel.cov_with_grad(&t);
        let chol = Cholesky::new(k).unwrap();
        let r = DVector::from_iterator(y.len(), y.iter().map(|v| v - model.mean));
        let alpha = chol.solve(&r);
        let inner = &alpha * alpha.transpose() - chol.inverse();
        for (j, dk) in dks.iter().enumerate() {
            let dense = -0.5 * (&inner * dk).trace();
            assert!(
                (dense - grad[j]).abs() <= 1e-9 * dense.abs().max(1.0),
                "param {j}: {dense} vs {}",
                grad[j]
            );
        }
        assert!((grad.last().unwrap() + alpha.sum()).abs() < 1e-12 * alpha.sum().abs().max(1.0));
    }

    /// Whole-day data take the lag-table paths; they must agree with pair-by-pair evaluation
    /// (same formulas, different summation order: tolerance 1e-12 relative).
    #[test]
    fn lag_table_paths_agree_with_pairwise_evaluation() {
        let model = all_kinds_model();
        let t: Vec<f64> = [0, 1, 1, 2, 5, 9, 10, 11, 30, 31, 45, 46, 47, 80]
            .iter()
            .map(|&d| d as f64)
            .collect();
        let y: Vec<f64> = t.iter().map(|d| (d * 0.4).sin()).collect();
        let lags = DayLags::new(&t).expect("whole days over a short span use the table");
        let prepared = model.kernel.prepare();
        let k_table = training_cov(&prepared, &t);
        let k_direct = DMatrix::from_fn(t.len(), t.len(), |i, j| {
            prepared.value((t[i] - t[j]).abs(), i == j)
        });
        assert_eq!(k_table, k_direct);

        let fac = model.factorise(&t, &y).unwrap();
        let w = spd_inverse(fac.cholesky.l_dirty());
        let by_lag = weighted_dk_by_lag(&prepared, &lags, &w, &fac.alpha);
        let by_pair = weighted_dk_by_pair(&prepared, &t, &w, &fac.alpha);
        for (a, b) in by_lag.iter().zip(&by_pair) {
            assert!((a - b).abs() <= 1e-12 * b.abs().max(1.0), "{a} vs {b}");
        }
        // Fractional days, or a span much longer than the number of pairs, fall back.
        assert!(DayLags::new(&[0.0, 0.5]).is_none());
        assert!(DayLags::new(&[0.0, 1000.0]).is_none());
    }

    #[test]
    fn spd_inverse_inverts() {
        let (t, _) = data(30);
        let k = all_kinds_model().kernel.cov(&t);
        let chol = Cholesky::new(k.clone()).unwrap();
        let w = spd_inverse(chol.l_dirty());
        let err = (&k * &w - DMatrix::identity(30, 30)).abs().max();
        assert!(err < 1e-8, "|K W - I| = {err:e}");
    }

    /// With one observation and an SE + White kernel the posterior has a closed form
    /// (R&W 2006 eqs. 2.25–2.26 with n = 1): mean = m + k(d)(y - m)/(s² + σ²),
    /// var_latent = s² - k(d)²/(s² + σ²).
    #[test]
    fn single_observation_posterior_matches_closed_form() {
        let (s2, noise, len) = (2.0_f64, 0.5_f64, 3.0_f64);
        let model = GpRegression::new(
            Kernel::sum(
                Kernel::SquaredExp {
                    log_var: s2.ln(),
                    log_len: len.ln(),
                },
                Kernel::White {
                    log_var: noise.ln(),
                },
            ),
            1.0,
        );
        let post = model.posterior(&[10.0], &[4.0]).unwrap();
        let pred = post.predict(&[10.0, 12.0]);
        for (a, d) in [0.0_f64, 2.0].into_iter().enumerate() {
            let k = s2 * (-0.5 * d * d / (len * len)).exp();
            let mean = 1.0 + k * 3.0 / (s2 + noise);
            let var = s2 - k * k / (s2 + noise);
            assert!((pred.mean[a] - mean).abs() < 1e-12);
            assert!((pred.var_latent[a] - var).abs() < 1e-12);
            assert!((pred.var_obs[a] - var - noise).abs() < 1e-12);
        }
    }

    #[test]
    fn no_observations_give_the_prior() {
        let model = GpRegression::new(
            Kernel::sum(
                Kernel::Matern52 {
                    log_var: 0.0,
                    log_len: 0.0,
                },
                Kernel::White { log_var: -1.0 },
            ),
            2.5,
        );
        assert_eq!(model.nlml(&[], &[]).unwrap(), 0.0);
        assert_eq!(model.nlml_grad(&[], &[]).unwrap().1, vec![0.0; 4]);
        let pred = model.posterior(&[], &[]).unwrap().predict(&[1.0]);
        assert_eq!(pred.mean, vec![2.5]);
        assert!((pred.var_latent[0] - 1.0).abs() < 1e-15);
        assert!((pred.var_obs[0] - 1.0 - (-1.0f64).exp()).abs() < 1e-15);
    }

    #[test]
    fn input_errors_are_reported() {
        let model = all_kinds_model();
        assert!(matches!(
            model.nlml(&[0.0, 1.0], &[0.0]),
            Err(GpError::Shape(_))
        ));
        assert!(matches!(
            model.nlml(&[0.0, f64::NAN], &[0.0, 1.0]),
            Err(GpError::NonFinite(m)) if m.contains("t[1]")
        ));
        assert!(matches!(
            model.nlml(&[0.0, 1.0], &[0.0, f64::INFINITY]),
            Err(GpError::NonFinite(m)) if m.contains("y[1]")
        ));
        let mut bad = model.clone();
        bad.mean = f64::NAN;
        assert!(bad.nlml_grad(&[0.0], &[0.0]).is_err());
    }
}
