//! Stationary covariance kernels on a one-dimensional time axis measured in days.
//!
//! Every kernel is a function of the lag `d = |t - t'|` (days; irregular sampling allowed) plus,
//! for [`Kernel::White`], of whether the two points are the *same observation*. Hyperparameters
//! are stored and exchanged as natural logarithms: the optimiser then works on an unconstrained
//! space, and a unit step means the same relative change whatever the scale of the parameter
//! (Rasmussen & Williams 2006, §5.4.1). Gradients are therefore `∂k/∂(log θ) = θ ∂k/∂θ`.
//!
//! Parameter order is depth-first, left to right: `Sum(a, b)` lists the parameters of `a` then
//! those of `b`, and each leaf lists `log_var`, then `log_len`, then `log_alpha`.

use nalgebra::{DMatrix, DVector};

use super::{GpError, Result};

/// A stationary covariance function `k(t, t')` on days, with hyperparameters in log space.
///
/// Below `s² = exp(log_var)` (variance, units of y²), `ℓ = exp(log_len)` (days),
/// `α = exp(log_alpha)` (dimensionless), `d = |t - t'|` (days) and `r = d / ℓ`.
///
/// ```text
/// Constant           k = s²
/// SquaredExp         k = s² exp(-r²/2)                                 R&W (2006) eq. 4.9
/// Matern12           k = s² exp(-r)                                    R&W (2006) eq. 4.18
/// Matern32           k = s² (1 + √3 r) exp(-√3 r)                      R&W (2006) eq. 4.17
/// Matern52           k = s² (1 + √5 r + 5r²/3) exp(-√5 r)              R&W (2006) eq. 4.17
/// RationalQuadratic  k = s² (1 + r²/(2α))^(-α)                         R&W (2006) eq. 4.19
/// Periodic           k = s² exp(-2 sin²(π d / p) / ℓ²), p = period_days
///                    (MacKay 1998; R&W (2006) eq. 4.31; scikit-learn's ExpSineSquared form)
/// White              k = s² if (t, t') is the same observation, else 0
/// Sum(a, b)          k = k_a + k_b
/// Product(a, b)      k = k_a · k_b
/// ```
///
/// `White` is observation noise: it adds `s²` to the diagonal of the training covariance only.
/// Two distinct observations at the same day do not share it, and it never appears in a
/// cross-covariance. `Periodic::period_days` is fixed (not a hyperparameter) and must be positive.
#[derive(Debug, Clone, PartialEq)]
pub enum Kernel {
    /// Constant offset `s²`.
    Constant {
        /// log variance.
        log_var: f64,
    },
    /// Squared exponential (RBF).
    SquaredExp {
        /// log variance.
        log_var: f64,
        /// log length-scale (days).
        log_len: f64,
    },
    /// Matérn ν = 1/2 (exponential / Ornstein–Uhlenbeck).
    Matern12 {
        /// log variance.
        log_var: f64,
        /// log length-scale (days).
        log_len: f64,
    },
    /// Matérn ν = 3/2.
    Matern32 {
        /// log variance.
        log_var: f64,
        /// log length-scale (days).
        log_len: f64,
    },
    /// Matérn ν = 5/2.
    Matern52 {
        /// log variance.
        log_var: f64,
        /// log length-scale (days).
        log_len: f64,
    },
    /// Rational quadratic: a scale mixture of squared exponentials.
    RationalQuadratic {
        /// log variance.
        log_var: f64,
        /// log length-scale (days).
        log_len: f64,
        /// log shape parameter α.
        log_alpha: f64,
    },
    /// Exact-period kernel (scikit-learn's `ExpSineSquared` times a variance).
    Periodic {
        /// log variance.
        log_var: f64,
        /// log length-scale (dimensionless: it scales `sin(π d / p)`).
        log_len: f64,
        /// Period in days; fixed, not optimised.
        period_days: f64,
    },
    /// Independent observation noise on the training diagonal.
    White {
        /// log noise variance.
        log_var: f64,
    },
    /// `k_a + k_b`.
    Sum(Box<Kernel>, Box<Kernel>),
    /// `k_a · k_b`.
    Product(Box<Kernel>, Box<Kernel>),
}

impl Kernel {
    /// `a + b`, without writing the boxes.
    pub fn sum(a: Kernel, b: Kernel) -> Kernel {
        Kernel::Sum(Box::new(a), Box::new(b))
    }

    /// `a · b`, without writing the boxes.
    pub fn product(a: Kernel, b: Kernel) -> Kernel {
        Kernel::Product(Box::new(a), Box::new(b))
    }

    /// Number of (log-space) hyperparameters.
    pub fn n_params(&self) -> usize {
        match self {
            Kernel::Constant { .. } | Kernel::White { .. } => 1,
            Kernel::SquaredExp { .. }
            | Kernel::Matern12 { .. }
            | Kernel::Matern32 { .. }
            | Kernel::Matern52 { .. }
            | Kernel::Periodic { .. } => 2,
            Kernel::RationalQuadratic { .. } => 3,
            Kernel::Sum(a, b) | Kernel::Product(a, b) => a.n_params() + b.n_params(),
        }
    }

    /// Hyperparameters in log space, depth-first left-to-right.
    pub fn params(&self) -> Vec<f64> {
        let mut out = Vec::with_capacity(self.n_params());
        self.push_params(&mut out);
        out
    }

    fn push_params(&self, out: &mut Vec<f64>) {
        match self {
            Kernel::Constant { log_var } | Kernel::White { log_var } => out.push(*log_var),
            Kernel::SquaredExp { log_var, log_len }
            | Kernel::Matern12 { log_var, log_len }
            | Kernel::Matern32 { log_var, log_len }
            | Kernel::Matern52 { log_var, log_len }
            | Kernel::Periodic {
                log_var, log_len, ..
            } => out.extend([*log_var, *log_len]),
            Kernel::RationalQuadratic {
                log_var,
                log_len,
                log_alpha,
            } => out.extend([*log_var, *log_len, *log_alpha]),
            Kernel::Sum(a, b) | Kernel::Product(a, b) => {
                a.push_params(out);
                b.push_params(out);
            }
        }
    }

    /// Sets the hyperparameters from a log-space vector in [`Kernel::params`] order.
    ///
    /// # Panics
    /// If `p.len() != self.n_params()`; callers check the length first.
    pub fn set_params(&mut self, p: &[f64]) {
        assert_eq!(
            p.len(),
            self.n_params(),
            "Kernel::set_params: expected {} parameters, got {}",
            self.n_params(),
            p.len()
        );
        self.take_params(p);
    }

    /// Consumes `self.n_params()` values from the front of `p`; returns the rest.
    fn take_params<'a>(&mut self, p: &'a [f64]) -> &'a [f64] {
        match self {
            Kernel::Constant { log_var } | Kernel::White { log_var } => {
                *log_var = p[0];
                &p[1..]
            }
            Kernel::SquaredExp { log_var, log_len }
            | Kernel::Matern12 { log_var, log_len }
            | Kernel::Matern32 { log_var, log_len }
            | Kernel::Matern52 { log_var, log_len }
            | Kernel::Periodic {
                log_var, log_len, ..
            } => {
                *log_var = p[0];
                *log_len = p[1];
                &p[2..]
            }
            Kernel::RationalQuadratic {
                log_var,
                log_len,
                log_alpha,
            } => {
                *log_var = p[0];
                *log_len = p[1];
                *log_alpha = p[2];
                &p[3..]
            }
            Kernel::Sum(a, b) | Kernel::Product(a, b) => {
                let rest = a.take_params(p);
                b.take_params(rest)
            }
        }
    }

    /// Names of the hyperparameters in [`Kernel::params`] order, e.g. `"matern32.log_var"`.
    ///
    /// Names are not prefixed by their position in a `Sum`/`Product`, so a kernel with two
    /// leaves of the same kind repeats names; index by position when that matters.
    pub fn param_names(&self) -> Vec<String> {
        let mut out = Vec::with_capacity(self.n_params());
        self.push_names(&mut out);
        out
    }

    fn push_names(&self, out: &mut Vec<String>) {
        let leaf = |out: &mut Vec<String>, kind: &str, names: &[&str]| {
            out.extend(names.iter().map(|n| format!("{kind}.{n}")));
        };
        match self {
            Kernel::Constant { .. } => leaf(out, "constant", &["log_var"]),
            Kernel::White { .. } => leaf(out, "white", &["log_var"]),
            Kernel::SquaredExp { .. } => leaf(out, "squared_exp", &["log_var", "log_len"]),
            Kernel::Matern12 { .. } => leaf(out, "matern12", &["log_var", "log_len"]),
            Kernel::Matern32 { .. } => leaf(out, "matern32", &["log_var", "log_len"]),
            Kernel::Matern52 { .. } => leaf(out, "matern52", &["log_var", "log_len"]),
            Kernel::Periodic { .. } => leaf(out, "periodic", &["log_var", "log_len"]),
            Kernel::RationalQuadratic { .. } => leaf(
                out,
                "rational_quadratic",
                &["log_var", "log_len", "log_alpha"],
            ),
            Kernel::Sum(a, b) | Kernel::Product(a, b) => {
                a.push_names(out);
                b.push_names(out);
            }
        }
    }

    /// Checks that every hyperparameter is finite and every period positive and finite.
    pub(crate) fn validate(&self) -> Result<()> {
        let names = self.param_names();
        for (name, value) in names.iter().zip(self.params()) {
            if !value.is_finite() {
                return Err(GpError::NonFinite(format!(
                    "kernel hyperparameter {name} = {value}"
                )));
            }
        }
        self.validate_periods()
    }

    fn validate_periods(&self) -> Result<()> {
        match self {
            Kernel::Periodic { period_days, .. }
                if !(period_days.is_finite() && *period_days > 0.0) =>
            {
                Err(GpError::NonFinite(format!(
                    "periodic kernel period_days = {period_days} (must be positive and finite)"
                )))
            }
            Kernel::Sum(a, b) | Kernel::Product(a, b) => {
                a.validate_periods()?;
                b.validate_periods()
            }
            _ => Ok(()),
        }
    }

    /// Natural-scale form used by the inner loops (exponentials taken once, not per entry).
    pub(crate) fn prepare(&self) -> PreparedKernel {
        use PreparedKernel as P;
        match self {
            Kernel::Constant { log_var } => P::Constant { var: log_var.exp() },
            Kernel::White { log_var } => P::White { var: log_var.exp() },
            Kernel::SquaredExp { log_var, log_len } => P::SquaredExp {
                var: log_var.exp(),
                inv_len: (-log_len).exp(),
            },
            Kernel::Matern12 { log_var, log_len } => P::Matern12 {
                var: log_var.exp(),
                inv_len: (-log_len).exp(),
            },
            Kernel::Matern32 { log_var, log_len } => P::Matern32 {
                var: log_var.exp(),
                inv_len: (-log_len).exp(),
            },
            Kernel::Matern52 { log_var, log_len } => P::Matern52 {
                var: log_var.exp(),
                inv_len: (-log_len).exp(),
            },
            Kernel::RationalQuadratic {
                log_var,
                log_len,
                log_alpha,
            } => P::RationalQuadratic {
                var: log_var.exp(),
                inv_len: (-log_len).exp(),
                alpha: log_alpha.exp(),
            },
            Kernel::Periodic {
                log_var,
                log_len,
                period_days,
            } => P::Periodic {
                var: log_var.exp(),
                inv_len_sq: (-2.0 * log_len).exp(),
                omega: std::f64::consts::PI / period_days,
            },
            Kernel::Sum(a, b) => P::Sum(Box::new(a.prepare()), Box::new(b.prepare()), a.n_params()),
            Kernel::Product(a, b) => {
                P::Product(Box::new(a.prepare()), Box::new(b.prepare()), a.n_params())
            }
        }
    }

    /// Training covariance `K[i][j] = k(t_i, t_j)`, `n × n`, including `White` noise on the
    /// diagonal (noise is tied to the observation index, not to the day).
    pub fn cov(&self, t: &[f64]) -> DMatrix<f64> {
        let prepared = self.prepare();
        training_cov(&prepared, t)
    }

    /// Training covariance and its derivatives `∂K/∂(log θ_j)`, one `n × n` matrix per
    /// hyperparameter in [`Kernel::params`] order.
    ///
    /// The model's gradient does not use this (it evaluates derivative entries on the fly);
    /// it is here for callers that need the matrices and for checking.
    pub fn cov_with_grad(&self, t: &[f64]) -> (DMatrix<f64>, Vec<DMatrix<f64>>) {
        let n = t.len();
        let n_params = self.n_params();
        let prepared = self.prepare();
        let mut k = DMatrix::zeros(n, n);
        let mut grads = vec![DMatrix::zeros(n, n); n_params];
        let mut g = vec![0.0; n_params];
        for j in 0..n {
            for i in 0..=j {
                let v = prepared.value_grad((t[i] - t[j]).abs(), i == j, &mut g);
                k[(i, j)] = v;
                k[(j, i)] = v;
                for (dk, gp) in grads.iter_mut().zip(&g) {
                    dk[(i, j)] = *gp;
                    dk[(j, i)] = *gp;
                }
            }
        }
        (k, grads)
    }

    /// Cross-covariance `K*[a][i] = k(t*_a, t_i)`, `n_star × n`, without `White` noise.
    pub fn cross_cov(&self, t_star: &[f64], t: &[f64]) -> DMatrix<f64> {
        let prepared = self.prepare();
        DMatrix::from_fn(t_star.len(), t.len(), |a, i| {
            prepared.value((t_star[a] - t[i]).abs(), false)
        })
    }

    /// Prior variances `k(t*_a, t*_a)`; `include_noise` adds the `White` variance (the variance
    /// of a new observation rather than of the latent function).
    pub fn diag(&self, t_star: &[f64], include_noise: bool) -> DVector<f64> {
        let v = self.prepare().value(0.0, include_noise);
        DVector::from_element(t_star.len(), v)
    }

    /// Total observation-noise variance the kernel adds on the training diagonal (0 without a
    /// `White` term): `k(t, t)` for the same observation minus `k(t, t)` for two distinct ones.
    /// For a `White` inside a `Product` this is the noise scaled by the other factor at lag 0.
    pub fn noise_var(&self) -> f64 {
        let prepared = self.prepare();
        prepared.value(0.0, true) - prepared.value(0.0, false)
    }
}

/// Training covariance from a prepared kernel (upper triangle evaluated, mirrored). On a
/// whole-day grid (see [`DayLags`]) each distinct lag is evaluated once and looked up.
pub(crate) fn training_cov(prepared: &PreparedKernel, t: &[f64]) -> DMatrix<f64> {
    let n = t.len();
    let mut k = super::cholesky::zeros(n);
    if let Some(lags) = DayLags::new(t) {
        let table: Vec<f64> = (0..lags.n_lags())
            .map(|lag| prepared.value(lag as f64, false))
            .collect();
        let diag = prepared.value(0.0, true);
        for j in 0..n {
            for i in 0..j {
                let v = table[lags.lag(i, j)];
                k[(i, j)] = v;
                k[(j, i)] = v;
            }
            k[(j, j)] = diag;
        }
        return k;
    }
    for j in 0..n {
        for i in 0..=j {
            let v = prepared.value((t[i] - t[j]).abs(), i == j);
            k[(i, j)] = v;
            k[(j, i)] = v;
        }
    }
    k
}

/// Lags of a training set whose days are all whole numbers, so that kernel entries (and their
/// derivatives) can be evaluated once per distinct lag `0..n_lags` instead of once per pair.
///
/// Daily data — the common case — has at most `span + 1` distinct lags against `n(n+1)/2`
/// pairs (n = 365: 366 evaluations instead of 66 795). The table is used only when it is no
/// larger than the number of pairs. Values are identical to direct evaluation: the difference of
/// two whole-number `f64` days below 2⁵³ is exact.
#[derive(Debug, Clone)]
pub(crate) struct DayLags {
    days: Vec<i64>,
    n_lags: usize,
}

impl DayLags {
    /// `None` unless every day is a whole number of magnitude below 2⁵² and the lag table
    /// would be smaller than the number of pairs.
    pub(crate) fn new(t: &[f64]) -> Option<Self> {
        const MAX_EXACT: f64 = 4_503_599_627_370_496.0; // 2^52
        let n = t.len();
        if n == 0 || !t.iter().all(|d| d.fract() == 0.0 && d.abs() < MAX_EXACT) {
            return None;
        }
        let days: Vec<i64> = t.iter().map(|&d| d as i64).collect();
        let (lo, hi) = days
            .iter()
            .fold((i64::MAX, i64::MIN), |(lo, hi), &d| (lo.min(d), hi.max(d)));
        let n_lags = usize::try_from(hi - lo).ok()?.checked_add(1)?;
        (n_lags <= n * (n + 1) / 2).then_some(Self { days, n_lags })
    }

    /// Number of distinct lags the table covers (`max day - min day + 1`).
    pub(crate) fn n_lags(&self) -> usize {
        self.n_lags
    }

    /// `|t_i - t_j|` in whole days.
    #[inline]
    pub(crate) fn lag(&self, i: usize, j: usize) -> usize {
        self.days[i].abs_diff(self.days[j]) as usize
    }
}

/// [`Kernel`] with hyperparameters on their natural scale, for evaluation in inner loops.
/// `Sum`/`Product` carry the parameter count of their left child so gradients can be split.
#[derive(Debug, Clone)]
pub(crate) enum PreparedKernel {
    Constant {
        var: f64,
    },
    SquaredExp {
        var: f64,
        inv_len: f64,
    },
    Matern12 {
        var: f64,
        inv_len: f64,
    },
    Matern32 {
        var: f64,
        inv_len: f64,
    },
    Matern52 {
        var: f64,
        inv_len: f64,
    },
    RationalQuadratic {
        var: f64,
        inv_len: f64,
        alpha: f64,
    },
    Periodic {
        var: f64,
        inv_len_sq: f64,
        omega: f64,
    },
    White {
        var: f64,
    },
    Sum(Box<PreparedKernel>, Box<PreparedKernel>, usize),
    Product(Box<PreparedKernel>, Box<PreparedKernel>, usize),
}

const SQRT3: f64 = 1.732_050_807_568_877_2;
const SQRT5: f64 = 2.236_067_977_499_79;

impl PreparedKernel {
    /// Number of hyperparameters (as [`Kernel::n_params`]).
    pub(crate) fn n_params(&self) -> usize {
        use PreparedKernel as P;
        match self {
            P::Constant { .. } | P::White { .. } => 1,
            P::SquaredExp { .. }
            | P::Matern12 { .. }
            | P::Matern32 { .. }
            | P::Matern52 { .. }
            | P::Periodic { .. } => 2,
            P::RationalQuadratic { .. } => 3,
            P::Sum(a, b, _) | P::Product(a, b, _) => a.n_params() + b.n_params(),
        }
    }

    /// `k(d)` for lag `d = |t - t'| ≥ 0`; `same` is true when both arguments are the same
    /// training observation (only `White` looks at it).
    pub(crate) fn value(&self, d: f64, same: bool) -> f64 {
        use PreparedKernel as P;
        match self {
            P::Constant { var } => *var,
            P::White { var } => {
                if same {
                    *var
                } else {
                    0.0
                }
            }
            P::SquaredExp { var, inv_len } => {
                let r = d * inv_len;
                var * (-0.5 * r * r).exp()
            }
            P::Matern12 { var, inv_len } => var * (-d * inv_len).exp(),
            P::Matern32 { var, inv_len } => {
                let a = SQRT3 * d * inv_len;
                var * (1.0 + a) * (-a).exp()
            }
            P::Matern52 { var, inv_len } => {
                let a = SQRT5 * d * inv_len;
                var * (1.0 + a + a * a / 3.0) * (-a).exp()
            }
            P::RationalQuadratic {
                var,
                inv_len,
                alpha,
            } => {
                let r = d * inv_len;
                var * (1.0 + r * r / (2.0 * alpha)).powf(-alpha)
            }
            P::Periodic {
                var,
                inv_len_sq,
                omega,
            } => {
                let s = (omega * d).sin();
                var * (-2.0 * s * s * inv_len_sq).exp()
            }
            P::Sum(a, b, _) => a.value(d, same) + b.value(d, same),
            P::Product(a, b, _) => a.value(d, same) * b.value(d, same),
        }
    }

    /// `k(d)` and, written into `grad` (length = number of parameters), `∂k/∂(log θ_j)`.
    ///
    /// ```text
    /// ∂k/∂log s² = k                                  (every leaf)
    /// SquaredExp         ∂k/∂log ℓ = k r²
    /// Matern12           ∂k/∂log ℓ = k r
    /// Matern32           ∂k/∂log ℓ = s² a² exp(-a),            a = √3 r
    /// Matern52           ∂k/∂log ℓ = s² a² (1 + a) exp(-a) / 3, a = √5 r
    /// RationalQuadratic  ∂k/∂log ℓ = s² r² b^(-α-1),            b = 1 + r²/(2α)
    ///                    ∂k/∂log α = k (r²/(2b) - α ln b)
    /// Periodic           ∂k/∂log ℓ = 4 k sin²(π d/p) / ℓ²
    /// Product            ∂(k_a k_b) = ∂k_a · k_b  and  k_a · ∂k_b
    /// ```
    pub(crate) fn value_grad(&self, d: f64, same: bool, grad: &mut [f64]) -> f64 {
        use PreparedKernel as P;
        match self {
            P::Constant { var } => {
                grad[0] = *var;
                *var
            }
            P::White { var } => {
                let k = if same { *var } else { 0.0 };
                grad[0] = k;
                k
            }
            P::SquaredExp { var, inv_len } => {
                let r = d * inv_len;
                let k = var * (-0.5 * r * r).exp();
                grad[0] = k;
                grad[1] = k * r * r;
                k
            }
            P::Matern12 { var, inv_len } => {
                let r = d * inv_len;
                let k = var * (-r).exp();
                grad[0] = k;
                grad[1] = k * r;
                k
            }
            P::Matern32 { var, inv_len } => {
                let a = SQRT3 * d * inv_len;
                let e = var * (-a).exp();
                let k = (1.0 + a) * e;
                grad[0] = k;
                grad[1] = a * a * e;
                k
            }
            P::Matern52 { var, inv_len } => {
                let a = SQRT5 * d * inv_len;
                let e = var * (-a).exp();
                let k = (1.0 + a + a * a / 3.0) * e;
                grad[0] = k;
                grad[1] = a * a * (1.0 + a) * e / 3.0;
                k
            }
            P::RationalQuadratic {
                var,
                inv_len,
                alpha,
            } => {
                let r2 = (d * inv_len) * (d * inv_len);
                let b = 1.0 + r2 / (2.0 * alpha);
                let k = var * b.powf(-alpha);
                grad[0] = k;
                grad[1] = k * r2 / b;
                grad[2] = k * (r2 / (2.0 * b) - alpha * b.ln());
                k
            }
            P::Periodic {
                var,
                inv_len_sq,
                omega,
            } => {
                let s = (omega * d).sin();
                let s2_scaled = s * s * inv_len_sq;
                let k = var * (-2.0 * s2_scaled).exp();
                grad[0] = k;
                grad[1] = 4.0 * k * s2_scaled;
                k
            }
            P::Sum(a, b, n_left) => {
                let (ga, gb) = grad.split_at_mut(*n_left);
                a.value_grad(d, same, ga) + b.value_grad(d, same, gb)
            }
            P::Product(a, b, n_left) => {
                let (ga, gb) = grad.split_at_mut(*n_left);
                let ka = a.value_grad(d, same, ga);
                let kb = b.value_grad(d, same, gb);
                ga.iter_mut().for_each(|g| *g *= kb);
                gb.iter_mut().for_each(|g| *g *= ka);
                ka * kb
            }
        }
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// One of every kind, nested, so order and splitting are exercised (also used by the model's tests).
    pub(crate) fn all_kinds() -> Kernel {
        Kernel::sum(
            Kernel::sum(
                Kernel::product(
                    Kernel::Matern32 {
                        log_var: 0.3,
                        log_len: 1.7,
                    },
                    Kernel::Periodic {
                        log_var: -0.2,
                        log_len: 0.1,
                        period_days: 7.0,
                    },
                ),
                Kernel::sum(
                    Kernel::SquaredExp {
                        log_var: -0.5,
                        log_len: 2.5,
                    },
                    Kernel::RationalQuadratic {
                        log_var: 0.2,
                        log_len: 1.1,
                        log_alpha: -0.4,
                    },
                ),
            ),
            Kernel::sum(
                Kernel::sum(
                    Kernel::Matern12 {
                        log_var: -1.0,
                        log_len: 3.0,
                    },
                    Kernel::Matern52 {
                        log_var: 0.4,
                        log_len: 0.9,
                    },
                ),
                Kernel::sum(
                    Kernel::Constant { log_var: -1.5 },
                    Kernel::White { log_var: -2.0 },
                ),
            ),
        )
    }

    #[test]
    fn params_round_trip_in_depth_first_order() {
        let mut k = all_kinds();
        let p = k.params();
        assert_eq!(p.len(), k.n_params());
        assert_eq!(p.len(), 15);
        assert_eq!(k.param_names().len(), 15);
        assert_eq!(k.param_names()[0], "matern32.log_var");
        assert_eq!(k.param_names()[3], "periodic.log_len");
        assert_eq!(k.param_names()[14], "white.log_var");
        assert_eq!(p[0], 0.3);
        assert_eq!(p[14], -2.0);
        let shifted: Vec<f64> = p.iter().map(|v| v + 1.0).collect();
        k.set_params(&shifted);
        assert_eq!(k.params(), shifted);
    }

    #[test]
    #[should_panic(expected = "expected 15 parameters")]
    fn set_params_rejects_wrong_length() {
        all_kinds().set_params(&[0.0; 3]);
    }

    /// ∂K/∂log θ from `cov_with_grad` against central differences of `cov`
    /// (step h = 1e-5, error O(h²) ≈ 1e-10 relative; tolerance 1e-6 of the matrix scale).
    #[test]
    fn cov_grad_matches_finite_differences() {
        let t = [0.0, 0.5, 1.0, 3.0, 3.0, 7.5, 11.0, 30.0];
        let k0 = all_kinds();
        let (_, grads) = k0.cov_with_grad(&t);
        let p0 = k0.params();
        let h = 1e-5;
        for j in 0..p0.len() {
            let mut plus = k0.clone();
            let mut minus = k0.clone();
            let mut p = p0.clone();
            p[j] += h;
            plus.set_params(&p);
            p[j] -= 2.0 * h;
            minus.set_params(&p);
            let fd = (plus.cov(&t) - minus.cov(&t)) / (2.0 * h);
            let err = (&fd - &grads[j]).abs().max();
            let scale = fd.abs().max().max(1e-3);
            assert!(
                err <= 1e-6 * scale,
                "param {j} ({}) max error {err:e} (scale {scale:e})",
                k0.param_names()[j]
            );
        }
    }

    #[test]
    fn values_at_known_lags() {
        // Closed forms evaluated by hand (from the formulas in the doc comment):
        // Matérn 3/2 with s² = 1, ℓ = 1 at d = 1: (1 + √3) e^{-√3}.
        let m32 = Kernel::Matern32 {
            log_var: 0.0,
            log_len: 0.0,
        };
        let k = m32.cross_cov(&[1.0], &[0.0])[(0, 0)];
        assert!((k - (1.0 + SQRT3) * (-SQRT3).exp()).abs() < 1e-15);
        // Periodic: one full period apart is perfectly correlated.
        let per = Kernel::Periodic {
            log_var: 2f64.ln(),
            log_len: 0.0,
            period_days: 7.0,
        };
        assert!((per.cross_cov(&[14.0], &[0.0])[(0, 0)] - 2.0).abs() < 1e-12);
        // White: on the training diagonal only, never across, even at the same day.
        let white = Kernel::White {
            log_var: 0.5f64.ln(),
        };
        let c = white.cov(&[3.0, 3.0]);
        assert_eq!((c[(0, 0)], c[(0, 1)]), (0.5, 0.0));
        assert_eq!(white.cross_cov(&[3.0], &[3.0])[(0, 0)], 0.0);
        assert!((white.noise_var() - 0.5).abs() < 1e-15);
        assert_eq!(white.diag(&[1.0], false)[0], 0.0);
    }

    #[test]
    fn noise_var_sums_white_terms() {
        let k = Kernel::sum(
            Kernel::sum(
                Kernel::White {
                    log_var: 0.1f64.ln(),
                },
                Kernel::SquaredExp {
                    log_var: 0.0,
                    log_len: 0.0,
                },
            ),
            Kernel::White {
                log_var: 0.2f64.ln(),
            },
        );
        assert!((k.noise_var() - 0.3).abs() < 1e-15);
        assert_eq!(
            Kernel::Matern52 {
                log_var: 0.0,
                log_len: 0.0
            }
            .noise_var(),
            0.0
        );
    }

    #[test]
    fn validate_rejects_nan_and_bad_period() {
        let mut k = all_kinds();
        assert!(k.validate().is_ok());
        let mut p = k.params();
        p[4] = f64::NAN;
        k.set_params(&p);
        assert!(matches!(k.validate(), Err(GpError::NonFinite(m)) if m.contains("squared_exp")));
        let per = Kernel::Periodic {
            log_var: 0.0,
            log_len: 0.0,
            period_days: 0.0,
        };
        assert!(per.validate().is_err());
    }
}
