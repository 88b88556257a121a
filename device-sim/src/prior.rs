//! The shared prior of one signal: the parameter vector exchanged in federated
//! rounds, the GP model it defines, and its reading in plain units.
//!
//! Model, in standardised units `z = (y − centre) / scale` (see
//! [`Signal::reference`]), for participant `p` on day `t`:
//!
//! ```text
//! z_p(t) = μ0 + b_p + f_p(t) + w_p(t) + ε_p(t)
//!   b_p ~ N(0, τ²)                          between-person offset   (Constant kernel)
//!   f_p ~ GP(0, Matérn-3/2(σ_f², ℓ_f))       slow personal trend
//!   w_p ~ GP(0, Periodic(σ_w², ℓ_w, 7 days)) weekly rhythm
//!   ε_p ~ N(0, σ_n²)                          day-to-day noise        (White kernel)
//! ```
//!
//! Marginally over `b_p`, a participant's series is a GP with mean μ0 and
//! kernel `τ² + k_M32 + k_per + σ_n² δ`. With few days the posterior of `b_p`
//! stays near 0 (bands centred near the population with width ≈ τ); as days
//! accumulate it moves to the person's own level — this is what makes early
//! bands meaningful and later bands personal.
//!
//! Parameter vector (the order on the wire): `[μ0, log τ², log σ_f², log ℓ_f,
//! log σ_w², log ℓ_w, log σ_n²]`. Variances and lengths are optimised in log
//! space so every value of the vector is a valid model and Adam's steps are
//! scale-free.

use crate::gp::{GpRegression, Kernel, LogNormalPrior};
use crate::signal::Signal;

/// Names of the shared parameter vector's coordinates, in wire order.
pub const PARAM_NAMES: [&str; 7] = [
    "mean_z",
    "log_between_var",
    "log_trend_var",
    "log_trend_len_days",
    "log_weekly_var",
    "log_weekly_len",
    "log_noise_var",
];

/// Number of shared parameters per signal.
pub const N_PARAMS: usize = PARAM_NAMES.len();

/// Period of the weekly component, in days (fixed, not learned).
pub const WEEK_DAYS: f64 = 7.0;

/// One signal's shared prior parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PriorParams {
    pub signal: Signal,
    pub values: [f64; N_PARAMS],
}

/// The prior read in the signal's own units.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PlainSummary {
    /// Population mean μ0 (signal units).
    pub population_mean: f64,
    /// Between-person SD τ (signal units).
    pub between_sd: f64,
    /// SD of the slow personal trend σ_f (signal units).
    pub trend_sd: f64,
    /// Trend length scale ℓ_f (days).
    pub trend_len_days: f64,
    /// SD of the weekly component σ_w (signal units).
    pub weekly_amplitude: f64,
    /// Day-to-day noise SD σ_n (signal units).
    pub noise_sd: f64,
}

impl PriorParams {
    /// Starting point of round 1: the population at the reference centre,
    /// between-person SD ≈ 0.7 scale units, a two-week trend, a small weekly
    /// rhythm and noise SD ≈ 0.55 scale units. Deliberately vague (common
    /// practice: start broad and let the cohort sharpen it).
    pub fn initial(signal: Signal) -> PriorParams {
        PriorParams {
            signal,
            values: [
                0.0,
                0.5f64.ln(),
                0.2f64.ln(),
                14.0f64.ln(),
                0.05f64.ln(),
                1.0f64.ln(),
                0.3f64.ln(),
            ],
        }
    }

    /// Builds from a wire vector; `None` when the length is wrong or a value
    /// is not finite.
    pub fn from_slice(signal: Signal, values: &[f64]) -> Option<PriorParams> {
        let values: [f64; N_PARAMS] = values.try_into().ok()?;
        values
            .iter()
            .all(|v| v.is_finite())
            .then_some(PriorParams { signal, values })
    }

    /// The GP this vector defines, in standardised units.
    pub fn model(&self) -> GpRegression {
        model_from(&self.values)
    }

    /// The prior in the signal's own units.
    pub fn summary(&self) -> PlainSummary {
        let (centre, scale) = self.signal.reference();
        let sd = |log_var: f64| scale * (0.5 * log_var).exp();
        let v = &self.values;
        PlainSummary {
            population_mean: centre + scale * v[0],
            between_sd: sd(v[1]),
            trend_sd: sd(v[2]),
            trend_len_days: v[3].exp(),
            weekly_amplitude: sd(v[4]),
            noise_sd: sd(v[6]),
        }
    }
}

/// The GP for a parameter vector in wire order (see the module docs).
pub fn model_from(values: &[f64]) -> GpRegression {
    let kernel = Kernel::sum(
        Kernel::sum(
            Kernel::sum(
                Kernel::Constant { log_var: values[1] },
                Kernel::Matern32 {
                    log_var: values[2],
                    log_len: values[3],
                },
            ),
            Kernel::Periodic {
                log_var: values[4],
                log_len: values[5],
                period_days: WEEK_DAYS,
            },
        ),
        Kernel::White { log_var: values[6] },
    );
    GpRegression {
        kernel,
        mean: values[0],
    }
}

/// Reorders the engine's gradient (kernel parameters, then the mean) into
/// wire order (mean first). The kernel's parameters come depth-first, which
/// for [`model_from`] is exactly wire positions 1..7.
pub fn gradient_to_wire(engine_grad: &[f64]) -> [f64; N_PARAMS] {
    let mut g = [0.0; N_PARAMS];
    g[0] = engine_grad[N_PARAMS - 1];
    g[1..].copy_from_slice(&engine_grad[..N_PARAMS - 1]);
    g
}

/// Weak log-normal hyperpriors that keep weakly identified parameters
/// sensible on short series (common practice; widths chosen so the bulk of
/// the prior covers a factor of ~e² either way):
/// - trend length ℓ_f: median 21 days;
/// - weekly length ℓ_w: median 1;
/// - every variance: median at the initial value, wide.
pub fn hyperpriors() -> [Option<LogNormalPrior>; N_PARAMS] {
    let wide = |mu: f64| {
        Some(LogNormalPrior {
            mu_log: mu,
            sigma_log: 2.0,
        })
    };
    let init = PriorParams::initial(Signal::RestingHr).values;
    [
        None,
        wide(init[1]),
        wide(init[2]),
        Some(LogNormalPrior {
            mu_log: 21.0f64.ln(),
            sigma_log: 1.0,
        }),
        wide(init[4]),
        Some(LogNormalPrior {
            mu_log: 0.0,
            sigma_log: 1.0,
        }),
        wide(init[6]),
    ]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wire_order_matches_kernel_order() {
        let p = PriorParams::initial(Signal::Sleep);
        let model = p.model();
        assert_eq!(model.kernel.params(), p.values[1..].to_vec());
        assert_eq!(model.mean, p.values[0]);
    }

    #[test]
    fn summary_reads_plain_units() {
        // Hand computation: centre 65 bpm, scale 10 bpm; mean_z 0.5 → 70 bpm;
        // log τ² = ln 0.25 → τ = 0.5 · 10 = 5 bpm.
        let mut p = PriorParams::initial(Signal::RestingHr);
        p.values[0] = 0.5;
        p.values[1] = 0.25f64.ln();
        let s = p.summary();
        assert!((s.population_mean - 70.0).abs() < 1e-12);
        assert!((s.between_sd - 5.0).abs() < 1e-12);
    }
}
