//! Gradient-based minimisers over a closure returning a value and its gradient: L-BFGS with a
//! strong-Wolfe line search for full-batch fits, Adam and plain SGD for fixed-budget (possibly
//! stochastic, e.g. random-window) fits.

use std::collections::VecDeque;

use super::{GpError, Result};

/// Settings of [`adam`] (Kingma & Ba 2015, Algorithm 1; defaults as there except the learning
/// rate, which is larger because log hyperparameters move by O(1)).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AdamConfig {
    /// Step size `a`.
    pub learning_rate: f64,
    /// Decay rate of the first-moment estimate `β₁`.
    pub beta1: f64,
    /// Decay rate of the second-moment estimate `β₂`.
    pub beta2: f64,
    /// `ε` added to the root second moment.
    pub eps: f64,
}

impl Default for AdamConfig {
    fn default() -> Self {
        Self {
            learning_rate: 0.05,
            beta1: 0.9,
            beta2: 0.999,
            eps: 1e-8,
        }
    }
}

/// Settings of [`lbfgs`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LbfgsConfig {
    /// Number of `(s, y)` correction pairs kept (`m` in Nocedal & Wright 2006, §7.2).
    pub memory: usize,
    /// Maximum number of iterations (line searches).
    pub max_iters: usize,
    /// Stop when `max |∂f/∂xᵢ| ≤ grad_tol`.
    pub grad_tol: f64,
    /// Stop when `(f_prev - f) ≤ f_rel_tol · max(|f_prev|, |f|, 1)` (the test used by
    /// L-BFGS-B, Zhu et al. 1997).
    pub f_rel_tol: f64,
}

impl Default for LbfgsConfig {
    fn default() -> Self {
        Self {
            memory: 10,
            max_iters: 200,
            grad_tol: 1e-6,
            f_rel_tol: 1e-10,
        }
    }
}

/// Outcome of a minimisation.
#[derive(Debug, Clone)]
pub struct OptimResult {
    /// Final point.
    pub x: Vec<f64>,
    /// Objective at `x`.
    pub f: f64,
    /// Number of objective evaluations.
    pub n_evals: usize,
    /// Number of iterations (updates of `x`).
    pub iterations: usize,
    /// Whether a convergence test was met. Always `false` for the fixed-budget [`adam`] and
    /// [`sgd`], which have no stopping test.
    pub converged: bool,
}

/// Calls `f` and checks the gradient length and finiteness of value and gradient.
fn checked<F>(f: &mut F, x: &[f64]) -> Result<(f64, Vec<f64>)>
where
    F: FnMut(&[f64]) -> Result<(f64, Vec<f64>)>,
{
    let (value, grad) = f(x)?;
    if grad.len() != x.len() {
        return Err(GpError::Shape(format!(
            "objective returned a gradient of length {} for {} parameters",
            grad.len(),
            x.len()
        )));
    }
    if !value.is_finite() {
        return Err(GpError::NonFinite(format!("objective value {value}")));
    }
    if let Some(i) = grad.iter().position(|g| !g.is_finite()) {
        return Err(GpError::NonFinite(format!(
            "objective gradient component {i}"
        )));
    }
    Ok((value, grad))
}

fn check_start(x0: &[f64]) -> Result<()> {
    match x0.iter().position(|v| !v.is_finite()) {
        Some(i) => Err(GpError::NonFinite(format!(
            "starting point x0[{i}] = {}",
            x0[i]
        ))),
        None => Ok(()),
    }
}

/// Adam: `steps` updates from `x0`. No extra evaluation is made at the end: the reported `f` is
/// the objective at the start of the last step (NaN when `steps == 0`), which keeps a FedAvg
/// round's cost at exactly `steps` evaluations.
///
/// ```text
/// g  = ∇f(x, step)
/// m ← β₁ m + (1-β₁) g            v ← β₂ v + (1-β₂) g∘g
/// m̂ = m / (1-β₁ᵗ)                v̂ = v / (1-β₂ᵗ)          t = step + 1
/// x ← x - a m̂ / (√v̂ + ε)
/// ```
/// Kingma & Ba (2015), Algorithm 1. `f` receives the step index (`0..steps`) so that it can draw
/// a different random window at each step.
///
/// # Errors
/// Any error of `f` is returned as is; non-finite values or gradients give
/// [`GpError::NonFinite`], a gradient of the wrong length [`GpError::Shape`].
pub fn adam<F>(mut f: F, x0: &[f64], steps: usize, cfg: &AdamConfig) -> Result<OptimResult>
where
    F: FnMut(&[f64], usize) -> Result<(f64, Vec<f64>)>,
{
    check_start(x0)?;
    let mut x = x0.to_vec();
    let mut m = vec![0.0; x.len()];
    let mut v = vec![0.0; x.len()];
    let mut value = f64::NAN;
    for step in 0..steps {
        let (fx, g) = checked(&mut |x: &[f64]| f(x, step), &x)?;
        value = fx;
        let t = (step + 1) as i32;
        let bias1 = 1.0 - cfg.beta1.powi(t);
        let bias2 = 1.0 - cfg.beta2.powi(t);
        for i in 0..x.len() {
            m[i] = cfg.beta1 * m[i] + (1.0 - cfg.beta1) * g[i];
            v[i] = cfg.beta2 * v[i] + (1.0 - cfg.beta2) * g[i] * g[i];
            let m_hat = m[i] / bias1;
            let v_hat = v[i] / bias2;
            x[i] -= cfg.learning_rate * m_hat / (v_hat.sqrt() + cfg.eps);
        }
    }
    Ok(OptimResult {
        x,
        f: value,
        n_evals: steps,
        iterations: steps,
        converged: false,
    })
}

/// Plain gradient descent, `x ← x - learning_rate · ∇f(x, step)`, for `steps` updates; `f` is
/// reported as in [`adam`] (the objective at the start of the last step).
///
/// # Errors
/// As [`adam`].
pub fn sgd<F>(mut f: F, x0: &[f64], steps: usize, learning_rate: f64) -> Result<OptimResult>
where
    F: FnMut(&[f64], usize) -> Result<(f64, Vec<f64>)>,
{
    check_start(x0)?;
    let mut x = x0.to_vec();
    let mut value = f64::NAN;
    for step in 0..steps {
        let (fx, g) = checked(&mut |x: &[f64]| f(x, step), &x)?;
        value = fx;
        x.iter_mut()
            .zip(&g)
            .for_each(|(xi, gi)| *xi -= learning_rate * gi);
    }
    Ok(OptimResult {
        x,
        f: value,
        n_evals: steps,
        iterations: steps,
        converged: false,
    })
}

/// Sufficient-decrease constant of the Wolfe conditions (Nocedal & Wright 2006, §3.1).
const WOLFE_C1: f64 = 1e-4;
/// Curvature constant; 0.9 is the usual choice for quasi-Newton methods (ibid.).
const WOLFE_C2: f64 = 0.9;
/// Maximum step expansions while bracketing, and bisection-type steps while zooming.
const MAX_BRACKET_STEPS: usize = 25;
const MAX_ZOOM_STEPS: usize = 40;

/// Limited-memory BFGS: search direction from the two-loop recursion (Nocedal & Wright 2006,
/// Algorithm 7.4, with `H₀ = γ I`, `γ = sᵀy / yᵀy` from eq. 7.20), step from a line search
/// satisfying the strong Wolfe conditions (ibid. Algorithms 3.5 and 3.6, with safeguarded
/// quadratic interpolation in the zoom phase):
///
/// ```text
/// f(x + a d) ≤ f(x) + c₁ a ∇fᵀd        c₁ = 1e-4
/// |∇f(x + a d)ᵀd| ≤ c₂ |∇fᵀd|           c₂ = 0.9
/// ```
///
/// An `Err` or non-finite value from `f` at a trial point inside the line search (e.g. a
/// covariance that is not positive definite for extreme hyperparameters) is treated as an
/// infinitely bad point, so the step shrinks. Pairs with `sᵀy ≤ ε yᵀy` are skipped to keep the
/// inverse-Hessian approximation positive definite. If no acceptable step is found even along
/// steepest descent, the current point is returned with `converged = false`.
///
/// # Errors
/// Errors of `f` at `x0` are returned as is; [`GpError::Optimizer`] if `cfg.memory` is 0;
/// [`GpError::NonFinite`] / [`GpError::Shape`] as for [`adam`].
pub fn lbfgs<F>(mut f: F, x0: &[f64], cfg: &LbfgsConfig) -> Result<OptimResult>
where
    F: FnMut(&[f64]) -> Result<(f64, Vec<f64>)>,
{
    if cfg.memory == 0 {
        return Err(GpError::Optimizer(
            "L-BFGS memory must be at least 1".into(),
        ));
    }
    check_start(x0)?;
    let mut x = x0.to_vec();
    let (mut fx, mut g) = checked(&mut f, &x)?;
    let mut n_evals = 1;
    let mut history: VecDeque<Correction> = VecDeque::with_capacity(cfg.memory);
    let result = |x, f, n_evals, iterations, converged| OptimResult {
        x,
        f,
        n_evals,
        iterations,
        converged,
    };
    if inf_norm(&g) <= cfg.grad_tol {
        return Ok(result(x, fx, n_evals, 0, true));
    }
    for iteration in 1..=cfg.max_iters {
        let mut direction = two_loop(&g, &history);
        if dot(&direction, &g) >= 0.0 {
            // Not a descent direction (can only follow from rounding): restart.
            history.clear();
            direction = g.iter().map(|v| -v).collect();
        }
        let step = if history.is_empty() {
            (1.0 / norm(&direction)).min(1.0)
        } else {
            1.0
        };
        let mut search = LineSearch {
            f: &mut f,
            x: &x,
            fx,
            direction: &direction,
            dphi0: dot(&g, &direction),
            n_evals: &mut n_evals,
        };
        let accepted = match search.run(step)? {
            Some(trial) => trial,
            None if !history.is_empty() => {
                // Retry once along steepest descent with a fresh memory.
                history.clear();
                let direction: Vec<f64> = g.iter().map(|v| -v).collect();
                let mut search = LineSearch {
                    f: &mut f,
                    x: &x,
                    fx,
                    direction: &direction,
                    dphi0: -dot(&g, &g),
                    n_evals: &mut n_evals,
                };
                match search.run((1.0 / norm(&direction)).min(1.0))? {
                    Some(trial) => trial,
                    None => return Ok(result(x, fx, n_evals, iteration - 1, false)),
                }
            }
            None => return Ok(result(x, fx, n_evals, iteration - 1, false)),
        };
        let s: Vec<f64> = accepted.x.iter().zip(&x).map(|(a, b)| a - b).collect();
        let y: Vec<f64> = accepted.g.iter().zip(&g).map(|(a, b)| a - b).collect();
        let sy = dot(&s, &y);
        let yy = dot(&y, &y);
        if sy > f64::EPSILON * yy && yy > 0.0 {
            if history.len() == cfg.memory {
                history.pop_front();
            }
            history.push_back(Correction {
                s,
                y,
                rho: 1.0 / sy,
                gamma: sy / yy,
            });
        }
        let f_prev = fx;
        x = accepted.x;
        fx = accepted.f;
        g = accepted.g;
        if inf_norm(&g) <= cfg.grad_tol
            || f_prev - fx <= cfg.f_rel_tol * f_prev.abs().max(fx.abs()).max(1.0)
        {
            return Ok(result(x, fx, n_evals, iteration, true));
        }
    }
    Ok(result(x, fx, n_evals, cfg.max_iters, false))
}

/// One L-BFGS correction pair `s = x₊ - x`, `y = ∇f₊ - ∇f`, with `ρ = 1/sᵀy`, `γ = sᵀy/yᵀy`.
struct Correction {
    s: Vec<f64>,
    y: Vec<f64>,
    rho: f64,
    gamma: f64,
}

/// `d = -H ∇f` by the two-loop recursion (Nocedal & Wright 2006, Algorithm 7.4).
fn two_loop(g: &[f64], history: &VecDeque<Correction>) -> Vec<f64> {
    let mut q = g.to_vec();
    let mut coeffs = Vec::with_capacity(history.len());
    for c in history.iter().rev() {
        let a = c.rho * dot(&c.s, &q);
        q.iter_mut().zip(&c.y).for_each(|(qi, yi)| *qi -= a * yi);
        coeffs.push(a);
    }
    let gamma = history.back().map_or(1.0, |c| c.gamma);
    q.iter_mut().for_each(|qi| *qi *= gamma);
    for (c, a) in history.iter().zip(coeffs.iter().rev()) {
        let b = c.rho * dot(&c.y, &q);
        q.iter_mut()
            .zip(&c.s)
            .for_each(|(qi, si)| *qi += (a - b) * si);
    }
    q.iter_mut().for_each(|qi| *qi = -*qi);
    q
}

/// A point evaluated by the line search; `f = +∞` (and empty `g`) when `f` failed there.
struct Trial {
    step: f64,
    x: Vec<f64>,
    f: f64,
    g: Vec<f64>,
    /// Directional derivative `∇f(x)ᵀd` (NaN when the evaluation failed).
    slope: f64,
}

/// Strong-Wolfe line search along `direction` from `x` (Nocedal & Wright 2006, Alg. 3.5–3.6).
struct LineSearch<'a, F> {
    f: &'a mut F,
    x: &'a [f64],
    fx: f64,
    direction: &'a [f64],
    dphi0: f64,
    n_evals: &'a mut usize,
}

impl<F> LineSearch<'_, F>
where
    F: FnMut(&[f64]) -> Result<(f64, Vec<f64>)>,
{
    fn trial(&mut self, step: f64) -> Result<Trial> {
        let x: Vec<f64> = self
            .x
            .iter()
            .zip(self.direction)
            .map(|(xi, di)| xi + step * di)
            .collect();
        *self.n_evals += 1;
        match (self.f)(&x) {
            Ok((value, grad)) => {
                if grad.len() != x.len() {
                    return Err(GpError::Shape(format!(
                        "objective returned a gradient of length {} for {} parameters",
                        grad.len(),
                        x.len()
                    )));
                }
                if value.is_finite() && grad.iter().all(|v| v.is_finite()) {
                    let slope = dot(&grad, self.direction);
                    return Ok(Trial {
                        step,
                        x,
                        f: value,
                        g: grad,
                        slope,
                    });
                }
                Ok(failed_trial(step, x))
            }
            Err(_) => Ok(failed_trial(step, x)),
        }
    }

    fn armijo_fails(&self, t: &Trial) -> bool {
        t.f > self.fx + WOLFE_C1 * t.step * self.dphi0
    }

    fn curvature_holds(&self, t: &Trial) -> bool {
        t.slope.abs() <= -WOLFE_C2 * self.dphi0
    }

    /// Bracketing phase (Algorithm 3.5); `None` if no point with sufficient decrease was found.
    fn run(&mut self, first_step: f64) -> Result<Option<Trial>> {
        let mut prev = Trial {
            step: 0.0,
            x: self.x.to_vec(),
            f: self.fx,
            g: Vec::new(),
            slope: self.dphi0,
        };
        let mut step = first_step;
        for i in 0..MAX_BRACKET_STEPS {
            let cur = self.trial(step)?;
            if self.armijo_fails(&cur) || (i > 0 && cur.f >= prev.f) {
                return self.zoom(prev, cur);
            }
            if self.curvature_holds(&cur) {
                return Ok(Some(cur));
            }
            if cur.slope >= 0.0 {
                return self.zoom(cur, prev);
            }
            step *= 2.0;
            prev = cur;
        }
        Ok((prev.step > 0.0).then_some(prev))
    }

    /// Zoom phase (Algorithm 3.6). Invariant: `lo` satisfies sufficient decrease and has the
    /// lowest value seen; the bracket `[lo, hi]` contains a strong-Wolfe step.
    fn zoom(&mut self, mut lo: Trial, mut hi: Trial) -> Result<Option<Trial>> {
        for _ in 0..MAX_ZOOM_STEPS {
            if (hi.step - lo.step).abs() <= f64::EPSILON * hi.step.abs().max(lo.step.abs()) {
                break;
            }
            let step = interpolate(&lo, &hi);
            let cur = self.trial(step)?;
            if self.armijo_fails(&cur) || cur.f >= lo.f {
                hi = cur;
            } else {
                if self.curvature_holds(&cur) {
                    return Ok(Some(cur));
                }
                if cur.slope * (hi.step - lo.step) >= 0.0 {
                    hi = std::mem::replace(&mut lo, cur);
                } else {
                    lo = cur;
                }
            }
        }
        Ok((lo.step > 0.0).then_some(lo))
    }
}

fn failed_trial(step: f64, x: Vec<f64>) -> Trial {
    Trial {
        step,
        x,
        f: f64::INFINITY,
        g: Vec::new(),
        slope: f64::NAN,
    }
}

/// Minimiser of the quadratic through `(lo.step, lo.f)` with slope `lo.slope` and
/// `(hi.step, hi.f)`, kept inside the middle 80 % of the bracket; bisection when it falls
/// outside or `hi` failed to evaluate.
fn interpolate(lo: &Trial, hi: &Trial) -> f64 {
    let width = hi.step - lo.step;
    let bisection = lo.step + 0.5 * width;
    if !hi.f.is_finite() {
        return bisection;
    }
    let curvature = 2.0 * (hi.f - lo.f - lo.slope * width);
    let step = lo.step - lo.slope * width * width / curvature;
    let (a, b) = (lo.step + 0.1 * width, lo.step + 0.9 * width);
    if step.is_finite() && step >= a.min(b) && step <= a.max(b) {
        step
    } else {
        bisection
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn norm(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}

fn inf_norm(a: &[f64]) -> f64 {
    a.iter().fold(0.0, |m, v| m.max(v.abs()))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rosenbrock (1960): f = (1 - x)² + 100 (y - x²)², unique minimum f = 0 at (1, 1).
    fn rosenbrock(p: &[f64]) -> Result<(f64, Vec<f64>)> {
        let (x, y) = (p[0], p[1]);
        let f = (1.0 - x).powi(2) + 100.0 * (y - x * x).powi(2);
        let g = vec![
            -2.0 * (1.0 - x) - 400.0 * x * (y - x * x),
            200.0 * (y - x * x),
        ];
        Ok((f, g))
    }

    /// From Nocedal & Wright's standard start (-1.2, 1) with the default settings.
    #[test]
    fn lbfgs_finds_rosenbrock_minimum() {
        let res = lbfgs(rosenbrock, &[-1.2, 1.0], &LbfgsConfig::default()).unwrap();
        assert!(res.converged, "{res:?}");
        assert!(
            (res.x[0] - 1.0).abs() < 1e-5 && (res.x[1] - 1.0).abs() < 1e-5,
            "{res:?}"
        );
        assert!(res.iterations < 100, "{res:?}");
    }

    /// Errors of the objective away from the start shrink the step instead of aborting:
    /// a quadratic with minimum at 3 that refuses to evaluate beyond 3.5.
    #[test]
    fn lbfgs_shrinks_step_on_objective_error() {
        let f = |p: &[f64]| {
            if p[0] > 3.5 {
                Err(GpError::NotPositiveDefinite {
                    n: 1,
                    max_jitter: 0.0,
                })
            } else {
                Ok(((p[0] - 3.0).powi(2), vec![2.0 * (p[0] - 3.0)]))
            }
        };
        // From -20 the first step has length 1 and the bracketing phase doubles it until a
        // trial lands at 12 > 3.5, where the objective errs.
        let res = lbfgs(f, &[-20.0], &LbfgsConfig::default()).unwrap();
        assert!(res.converged && (res.x[0] - 3.0).abs() < 1e-6, "{res:?}");
    }

    #[test]
    fn lbfgs_propagates_error_at_start_and_rejects_zero_memory() {
        let failing =
            |_: &[f64]| -> Result<(f64, Vec<f64>)> { Err(GpError::Shape("no data".into())) };
        assert!(matches!(
            lbfgs(failing, &[0.0], &LbfgsConfig::default()),
            Err(GpError::Shape(_))
        ));
        let cfg = LbfgsConfig {
            memory: 0,
            ..LbfgsConfig::default()
        };
        assert!(matches!(
            lbfgs(rosenbrock, &[0.0, 0.0], &cfg),
            Err(GpError::Optimizer(_))
        ));
    }

    /// f = Σ cᵢ (xᵢ - i)², an ill-scaled quadratic; Adam must decrease it substantially and
    /// pass the step index through.
    #[test]
    fn adam_decreases_a_quadratic() {
        let scales = [1.0, 10.0, 0.1];
        let f = |x: &[f64]| -> f64 {
            x.iter()
                .enumerate()
                .map(|(i, v)| scales[i] * (v - i as f64).powi(2))
                .sum()
        };
        let mut seen_steps = Vec::new();
        let objective = |x: &[f64], step: usize| {
            seen_steps.push(step);
            let g = x
                .iter()
                .enumerate()
                .map(|(i, v)| 2.0 * scales[i] * (v - i as f64))
                .collect();
            Ok((f(x), g))
        };
        let x0 = [5.0, -5.0, 5.0];
        let res = adam(objective, &x0, 500, &AdamConfig::default()).unwrap();
        assert!(f(&res.x) < 1e-2 * f(&x0), "{res:?}");
        // `f` is the objective at the start of the last step, not re-evaluated at `x`.
        assert!(res.f < 1e-2 * f(&x0), "{res:?}");
        assert_eq!(res.n_evals, 500);
        assert_eq!(seen_steps, (0..500).collect::<Vec<_>>());
    }

    #[test]
    fn sgd_decreases_a_quadratic_and_reports_non_finite() {
        let objective = |x: &[f64], _: usize| Ok((x[0] * x[0], vec![2.0 * x[0]]));
        let res = sgd(objective, &[4.0], 50, 0.1).unwrap();
        // x_k = 4 · 0.8^k exactly for this quadratic.
        assert!((res.x[0] - 4.0 * 0.8f64.powi(50)).abs() < 1e-12);
        let bad = |_: &[f64], _: usize| Ok((f64::NAN, vec![0.0]));
        assert!(matches!(
            sgd(bad, &[1.0], 3, 0.1),
            Err(GpError::NonFinite(_))
        ));
    }
}
