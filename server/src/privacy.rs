//! User-level differential privacy for the shared prior (study option `dp`): DP-FedAvg with
//! a trusted aggregator (McMahan, Ramage, Talwar & Zhang 2018, "Learning differentially
//! private recurrent language models", ICLR, Algorithm 1 with the fixed-denominator
//! estimator), and a Rényi-DP accountant for the sampled Gaussian mechanism.
//!
//! # Mechanism
//!
//! Each round every active device is selected independently with probability
//! `q = fraction_per_round` (Poisson sampling, drawn from the operating system's randomness).
//! A selected device's update is its whole change `Δ_k = θ_k − θ` over every signal, one
//! vector; the aggregator clips it to L2 norm `C` (`Δ_k · min(1, C/‖Δ_k‖)`), sums the clipped
//! updates, adds Gaussian noise `N(0, (zC)² I)` (`z` the noise multiplier) and divides by the
//! expected number of selected devices `qN` (`N` the active devices when the round closes):
//!
//! ```text
//! θ' = θ + (Σ_k clip(Δ_k, C) + N(0, z²C² I)) / (qN)
//! ```
//!
//! One participant changes the noised sum by at most `C` in L2, whatever their data: the
//! published prior is `(ε, δ)`-DP at the participant level. Day counts do not weight the
//! average (a weight would let one participant's influence grow with their data).
//!
//! # Accountant
//!
//! Per round, the sampled Gaussian mechanism with sampling rate `q` and noise multiplier `z`
//! has Rényi divergence of integer order `α ≥ 2` at most `log(A_α)/(α − 1)` with
//!
//! ```text
//! A_α = Σ_{k=0}^{α} C(α, k) (1 − q)^(α−k) q^k exp((k² − k) / (2z²))
//! ```
//!
//! (Mironov, Talwar & Zhang 2019, "Rényi differential privacy of the sampled Gaussian
//! mechanism", Section 3.3; computed in log space). RDP composes by addition over rounds
//! (Mironov 2017, Proposition 1). The conversion to `(ε, δ)` at order `α` is
//! `ε = R + log((α − 1)/α) − (log δ + log α)/(α − 1)` (Canonne, Kamath & Steinke 2020,
//! Proposition 12, as applied by Google's `dp-accounting` package), and `0` when
//! `δ² + expm1(−R) > 0`; the study's `ε` is the smallest over the orders 2 to 256. The test
//! `tests/privacy.rs` checks these figures against `dp-accounting` 0.6.0.
//!
//! # What it does not cover
//!
//! The aggregator itself is trusted: it sees and stores each update in clear, as well as day
//! counts and losses (which enter the published contributions); `ε` bounds what the published
//! priors reveal about one participant, not what the aggregator's database holds. Noise is
//! drawn in floating point (`rand_distr::Normal`), which is known to leak through the low-order
//! bits in principle (Mironov 2012); a discrete mechanism would close that. A round closes when
//! every selected device has submitted, however few were drawn; a draw of no device, or a round
//! in which fewer than `min_quorum` devices submitted by the deadline, is abandoned and drawn
//! again. The accountant treats each published round as Poisson-sampled: that conditioning is
//! not accounted for, and it is negligible only when `qN` is far above the quorum.
//!
//! # With secure aggregation
//!
//! A study with both `dp` and `secure_aggregation` does not trust the aggregator with any
//! update: each device clips its own change, rounds it to whole units of `2^−24` at random
//! and adds its share of discrete Gaussian noise ([`DistributedNoise`], Kairouz, Liu &
//! Steinke 2021), and the aggregator sees only the masked sum, which it divides by `qN` as
//! above (`secure_round::decode_private_slots`). Each device's share is sized so that a sum
//! over the round's threshold `t` devices carries the full `(zΔ)²`; a sum over more devices
//! carries more noise than the accountant assumes (up to `n/t ≤ 1.5` times the variance), so
//! the stated `ε` is an upper bound. The discrete noise closes the floating-point leak above.
//! Day counts and losses still travel (masked) for the published contributions, outside `ε`,
//! and the calibration stages' sums carry no noise in either mode.

use rand_distr::{Distribution, Normal};
use serde::{Deserialize, Serialize};

/// Differential-privacy settings of a study.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct DpSettings {
    /// `z`: the noise's standard deviation over the clipping norm.
    pub noise_multiplier: f64,
    /// `C`: each device's whole update (every signal) is clipped to this L2 norm, in
    /// parameter-space units.
    pub clip_norm: f64,
    /// Training stops before a round that would take `ε` above this.
    pub epsilon_budget: f64,
    /// `δ` of the `(ε, δ)` statement (often `1/N`).
    pub delta: f64,
}

/// Orders `α` the accountant minimises over.
pub const ORDERS: std::ops::RangeInclusive<u32> = 2..=256;

impl DpSettings {
    /// Checks the settings, naming the field.
    pub fn validate(&self) -> Result<(), String> {
        let positive = |name: &str, v: f64| {
            if v.is_finite() && v > 0.0 {
                Ok(())
            } else {
                Err(format!("dp.{name} must be positive, got {v}"))
            }
        };
        positive("noise_multiplier", self.noise_multiplier)?;
        positive("clip_norm", self.clip_norm)?;
        positive("epsilon_budget", self.epsilon_budget)?;
        if !(self.delta > 0.0 && self.delta < 1.0) {
            return Err(format!("dp.delta must be in (0, 1), got {}", self.delta));
        }
        Ok(())
    }

    /// Settings that reach `target` ε after `rounds` rounds at sampling rate `q`: the
    /// smallest noise multiplier that does ([`noise_for_epsilon`]), clipping at `clip_norm`.
    pub fn for_target(
        target: f64,
        q: f64,
        rounds: u32,
        delta: f64,
        clip_norm: f64,
    ) -> Result<DpSettings, String> {
        if !(target.is_finite() && target > 0.0) {
            return Err(format!("the ε budget must be positive, got {target}"));
        }
        let noise_multiplier = noise_for_epsilon(target, q, rounds, delta).ok_or_else(|| {
            format!("no noise multiplier up to 1000 keeps ε within {target} over {rounds} rounds")
        })?;
        let s = DpSettings {
            noise_multiplier,
            clip_norm,
            epsilon_budget: target,
            delta,
        };
        s.validate()?;
        Ok(s)
    }

    /// `ε` after `rounds` rounds at sampling rate `q`.
    pub fn epsilon_after(&self, q: f64, rounds: u32) -> f64 {
        epsilon(q, self.noise_multiplier, rounds, self.delta).0
    }

    /// The most rounds, up to `planned`, whose `ε` stays within the budget.
    pub fn rounds_within_budget(&self, q: f64, planned: u32) -> u32 {
        let rdp: Vec<f64> = ORDERS
            .map(|a| rdp_sampled_gaussian(q, self.noise_multiplier, a))
            .collect();
        let fits = |t: u32| epsilon_from_rdp(&rdp, t, self.delta).0 <= self.epsilon_budget;
        // ε grows with the rounds: the largest t that fits, by bisection.
        let (mut lo, mut hi) = (0u32, planned);
        if fits(hi) {
            return hi;
        }
        while hi - lo > 1 {
            let mid = lo + (hi - lo) / 2;
            if fits(mid) {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        lo
    }
}

/// `log(exp(a) + exp(b))` without overflow.
fn log_add(a: f64, b: f64) -> f64 {
    let (hi, lo) = if a > b { (a, b) } else { (b, a) };
    if lo == f64::NEG_INFINITY {
        return hi;
    }
    hi + (lo - hi).exp().ln_1p()
}

/// `log C(n, k)` through the log-gamma function.
fn log_binomial(n: u32, k: u32) -> f64 {
    use statrs::function::gamma::ln_gamma;
    let (n, k) = (f64::from(n), f64::from(k));
    ln_gamma(n + 1.0) - ln_gamma(k + 1.0) - ln_gamma(n - k + 1.0)
}

/// RDP of one round of the sampled Gaussian mechanism at integer order `alpha ≥ 2`
/// (module docs).
pub fn rdp_sampled_gaussian(q: f64, z: f64, alpha: u32) -> f64 {
    assert!(alpha >= 2, "integer orders from 2");
    if q <= 0.0 {
        return 0.0;
    }
    if q >= 1.0 {
        return f64::from(alpha) / (2.0 * z * z);
    }
    let mut log_a = f64::NEG_INFINITY;
    for k in 0..=alpha {
        let kf = f64::from(k);
        let term = log_binomial(alpha, k)
            + kf * q.ln()
            + f64::from(alpha - k) * (-q).ln_1p()
            + (kf * kf - kf) / (2.0 * z * z);
        log_a = log_add(log_a, term);
    }
    log_a / f64::from(alpha - 1)
}

/// `(ε, best order)` from per-order RDP of one round composed over `rounds` rounds.
fn epsilon_from_rdp(rdp: &[f64], rounds: u32, delta: f64) -> (f64, u32) {
    let mut best = (f64::INFINITY, 0);
    for (alpha, r) in ORDERS.zip(rdp) {
        let total = f64::from(rounds) * r;
        let a = f64::from(alpha);
        let eps = if delta * delta + (-total).exp_m1() > 0.0 {
            0.0
        } else {
            total + (-1.0 / a).ln_1p() - (delta * a).ln() / (a - 1.0)
        };
        if eps < best.0 {
            best = (eps, alpha);
        }
    }
    (best.0.max(0.0), best.1)
}

/// `(ε, best order)` after `rounds` rounds of the sampled Gaussian mechanism with sampling
/// rate `q` and noise multiplier `z`, at `δ`.
pub fn epsilon(q: f64, z: f64, rounds: u32, delta: f64) -> (f64, u32) {
    let rdp: Vec<f64> = ORDERS.map(|a| rdp_sampled_gaussian(q, z, a)).collect();
    epsilon_from_rdp(&rdp, rounds, delta)
}

/// The smallest noise multiplier (to 0.1%) whose `ε` after `rounds` rounds at sampling rate
/// `q` is at most `target` (`None` if even `z = 1000` is not enough).
pub fn noise_for_epsilon(target: f64, q: f64, rounds: u32, delta: f64) -> Option<f64> {
    let eps = |z: f64| epsilon(q, z, rounds, delta).0;
    let (mut lo, mut hi) = (0.05_f64, 1000.0_f64);
    if eps(hi) > target {
        return None;
    }
    if eps(lo) <= target {
        return Some(lo);
    }
    while hi / lo > 1.001 {
        let mid = (lo * hi).sqrt();
        if eps(mid) <= target {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    Some(hi)
}

/// Clips `delta` (a device's whole update) to L2 norm `c` in place; returns the norm before.
pub fn clip(delta: &mut [f64], c: f64) -> f64 {
    let norm = delta.iter().map(|d| d * d).sum::<f64>().sqrt();
    if norm > c {
        let scale = c / norm;
        for d in delta.iter_mut() {
            *d *= scale;
        }
    }
    norm
}

/// The noised mean of clipped updates: `(Σ clip(Δ_k) + N(0, (zC)² I)) / expected`.
pub fn noised_mean(
    deltas: &[Vec<f64>],
    dim: usize,
    settings: &DpSettings,
    expected: f64,
    rng: &mut impl rand::Rng,
) -> Vec<f64> {
    let mut sum = vec![0.0; dim];
    for d in deltas {
        let mut d = d.clone();
        clip(&mut d, settings.clip_norm);
        for (s, x) in sum.iter_mut().zip(&d) {
            *s += x;
        }
    }
    let noise = Normal::new(0.0, settings.noise_multiplier * settings.clip_norm)
        .expect("a positive, finite standard deviation");
    sum.iter()
        .map(|s| (s + noise.sample(rng)) / expected)
        .collect()
}

/// A sample of the discrete Gaussian `N_Z(0, σ²)`, `P(x) ∝ exp(−x²/(2σ²))` on the integers
/// (Canonne, Kamath & Steinke 2020, "The discrete Gaussian for differential privacy",
/// NeurIPS: the rejection sampler from a discrete Laplace of scale `t = ⌊σ⌋ + 1`, from
/// memory). The Bernoulli draws compare an `f64` uniform with `exp(−γ)` rather than using
/// the paper's exact rational arithmetic (common practice).
pub fn discrete_gaussian<R: rand::Rng + ?Sized>(sigma2: f64, rng: &mut R) -> i64 {
    assert!(sigma2 > 0.0 && sigma2.is_finite(), "σ² must be positive");
    let t = sigma2.sqrt().floor() as u64 + 1;
    loop {
        let y = discrete_laplace(t, rng);
        let gamma = (y.unsigned_abs() as f64 - sigma2 / t as f64).powi(2) / (2.0 * sigma2);
        if bernoulli_exp(gamma, rng) {
            return y;
        }
    }
}

/// A sample of the discrete Laplace distribution `P(x) ∝ exp(−|x|/t)` on the integers
/// (same paper, the sampler for integer `t`).
fn discrete_laplace<R: rand::Rng + ?Sized>(t: u64, rng: &mut R) -> i64 {
    loop {
        let u = rng.random_range(0..t);
        if !bernoulli_exp(u as f64 / t as f64, rng) {
            continue;
        }
        let mut v = 0u64;
        while bernoulli_exp(1.0, rng) {
            v += 1;
        }
        let x = (u + t * v) as i64;
        let negative: bool = rng.random();
        if negative && x == 0 {
            continue;
        }
        return if negative { -x } else { x };
    }
}

/// `true` with probability `exp(−γ)`.
fn bernoulli_exp<R: rand::Rng + ?Sized>(gamma: f64, rng: &mut R) -> bool {
    rng.random::<f64>() < (-gamma).exp()
}

/// The distributed discrete Gaussian under secure aggregation (Kairouz, Liu & Steinke
/// 2021, "The distributed discrete Gaussian mechanism for federated learning with secure
/// aggregation", ICML): each device clips its change to `C`, expresses it in units of
/// `γ = 2^−frac_bits`, rounds each coordinate at random to an integer (unbiased) and adds its
/// own discrete Gaussian noise of standard deviation [`Self::device_stddev_units`]. The
/// aggregator sees only the sum.
///
/// Sensitivity: rounding moves each of `d` coordinates by less than one unit, so one
/// participant changes the sum by at most `Δ = C/γ + √d` units in L2 (the triangle
/// inequality; the paper's conditional rounding gives a tighter bound, not needed at
/// `γ = 2^−24`). Each device's variance is `(zΔ)²/t` for a round of threshold `t`, so any
/// published sum (at least `t` inputs) carries at least `(zΔ)²`: the accountant's noise
/// multiplier `z` holds. The sum of `m ≥ t` independent discrete Gaussians is not exactly a
/// discrete Gaussian; the paper bounds the difference by
/// `τ = 10 Σ_{k=1}^{m−1} exp(−2π² s² k/(k+1))` with `s²` each device's variance (from
/// memory), which [`Self::tau`] computes and [`Self::for_round`] requires below `10⁻¹²`; the
/// discrete Gaussian's Rényi divergence is at most the continuous one's (Canonne, Kamath &
/// Steinke 2020, from memory), so the sampled Gaussian accountant above applies.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DistributedNoise {
    /// `C`.
    pub clip_norm: f64,
    /// Each device's noise standard deviation, in units of `γ`.
    pub device_stddev_units: f64,
}

impl DistributedNoise {
    /// The noise for a round of threshold `t` over `d` coordinates in units of `2^−frac_bits`.
    ///
    /// # Errors
    /// `τ` not negligible (a tiny noise in units: raise `frac_bits` or `z`).
    pub fn for_round(
        settings: &DpSettings,
        threshold: usize,
        dim: usize,
        frac_bits: u32,
    ) -> Result<Self, String> {
        let units = f64::from(frac_bits).exp2();
        let delta = settings.clip_norm * units + (dim as f64).sqrt();
        let noise = Self {
            clip_norm: settings.clip_norm,
            device_stddev_units: settings.noise_multiplier * delta
                / (threshold.max(1) as f64).sqrt(),
        };
        let tau = noise.tau(threshold.max(2) * 4);
        if tau > 1e-12 {
            return Err(format!(
                "the distributed noise's τ = {tau:e} is not negligible"
            ));
        }
        Ok(noise)
    }

    /// The paper's `τ` for `m` devices.
    pub fn tau(&self, m: usize) -> f64 {
        let s2 = self.device_stddev_units.powi(2);
        10.0 * (1..m)
            .map(|k| (-2.0 * std::f64::consts::PI.powi(2) * s2 * k as f64 / (k as f64 + 1.0)).exp())
            .sum::<f64>()
    }

    /// One device's noised input in units of `γ` (as `f64` integers): `delta` clipped to `C`,
    /// scaled, rounded at random and noised.
    pub fn device_units<R: rand::Rng + ?Sized>(
        &self,
        delta: &[f64],
        frac_bits: u32,
        rng: &mut R,
    ) -> Vec<f64> {
        let mut d = delta.to_vec();
        clip(&mut d, self.clip_norm);
        let scale = (frac_bits as f64).exp2();
        let s2 = self.device_stddev_units.powi(2);
        d.iter()
            .map(|x| {
                let u = x * scale;
                let floor = u.floor();
                let up = rng.random::<f64>() < u - floor;
                floor + f64::from(u8::from(up)) + discrete_gaussian(s2, rng) as f64
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    /// The sampler against the distribution's definition: `P(x) = exp(−x²/(2σ²)) / Σ_y
    /// exp(−y²/(2σ²))` (Canonne, Kamath & Steinke 2020, Definition 1), the normaliser summed
    /// directly over |y| ≤ 60. 200,000 draws at σ² = 2 and at σ² = 0.3: each of P(0), P(±1),
    /// P(±2) within 5 standard errors, and the sample variance within 2% of the exact one.
    #[test]
    fn the_discrete_gaussian_matches_its_definition() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        for sigma2 in [2.0, 0.3] {
            let w = |x: i64| (-(x * x) as f64 / (2.0 * sigma2)).exp();
            let z: f64 = (-60..=60).map(w).sum();
            let var: f64 = (-60..=60).map(|x| (x * x) as f64 * w(x) / z).sum();
            let n = 200_000;
            let draws: Vec<i64> = (0..n)
                .map(|_| discrete_gaussian(sigma2, &mut rng))
                .collect();
            for x in [0, 1, -1, 2, -2] {
                let p = w(x) / z;
                let seen = draws.iter().filter(|&&d| d == x).count() as f64 / n as f64;
                let se = (p * (1.0 - p) / n as f64).sqrt();
                assert!(
                    (seen - p).abs() < 5.0 * se,
                    "σ²={sigma2} P({x}) {seen} vs {p}"
                );
            }
            let v = draws.iter().map(|&d| (d * d) as f64).sum::<f64>() / n as f64;
            assert!(
                (v / var - 1.0).abs() < 0.02,
                "σ²={sigma2} variance {v} vs {var}"
            );
        }
    }

    /// A device's units: clipped to C, unbiased rounding, and noise of the stated scale; the
    /// sum over `t` devices carries at least `(zΔ)²` of variance.
    #[test]
    fn distributed_noise_has_the_scale_the_accountant_assumes() {
        let settings = DpSettings {
            noise_multiplier: 1.0,
            clip_norm: 0.5,
            epsilon_budget: 8.0,
            delta: 1e-4,
        };
        let noise = DistributedNoise::for_round(&settings, 9, 4, 10).unwrap();
        let delta_units = 0.5 * 1024.0 + 2.0;
        assert!((noise.device_stddev_units - delta_units / 3.0).abs() < 1e-9);
        assert!(noise.tau(100) < 1e-300);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        // A change of norm 5 is clipped to 0.5: [0.3, 0.4, 0, 0] after clipping, in units.
        let n = 20_000;
        let mut mean = [0.0; 4];
        let mut sq = [0.0; 4];
        for _ in 0..n {
            let u = noise.device_units(&[3.0, 4.0, 0.0, 0.0], 10, &mut rng);
            for j in 0..4 {
                assert_eq!(u[j].fract(), 0.0, "whole units");
                mean[j] += u[j] / n as f64;
                sq[j] += u[j] * u[j] / n as f64;
            }
        }
        let want = [0.3 * 1024.0, 0.4 * 1024.0, 0.0, 0.0];
        let sd = noise.device_stddev_units;
        for j in 0..4 {
            let se = sd / (n as f64).sqrt();
            assert!(
                (mean[j] - want[j]).abs() < 5.0 * se,
                "coordinate {j}: {} vs {}",
                mean[j],
                want[j]
            );
            let var = sq[j] - mean[j] * mean[j];
            assert!(
                (var / (sd * sd) - 1.0).abs() < 0.05,
                "coordinate {j}: variance {var}"
            );
        }
    }

    /// Without sampling (q = 1) the Gaussian mechanism's RDP is α/(2z²) exactly (Mironov
    /// 2017, Proposition 7); the sampled formula at q = 1 reduces to it term by term.
    #[test]
    fn full_participation_is_the_gaussian_mechanism() {
        for alpha in [2, 5, 32] {
            let want = f64::from(alpha) / (2.0 * 1.5 * 1.5);
            assert!((rdp_sampled_gaussian(1.0, 1.5, alpha) - want).abs() < 1e-12);
            // Just below 1 the sum agrees with it closely.
            let near = rdp_sampled_gaussian(1.0 - 1e-12, 1.5, alpha);
            assert!((near - want).abs() < 1e-6, "{near} vs {want}");
        }
    }

    /// Clipping bounds the norm and keeps the direction; the noise's standard deviation is
    /// zC/expected (a sample of 4,000 draws within 5% of it, a 5-sigma bound for the sample
    /// standard deviation: common practice).
    #[test]
    fn clipping_and_noise_scale() {
        let mut d = vec![3.0, 4.0];
        assert_eq!(clip(&mut d, 1.0), 5.0);
        assert!((d[0] - 0.6).abs() < 1e-12 && (d[1] - 0.8).abs() < 1e-12);
        let mut small = vec![0.1, 0.2];
        clip(&mut small, 1.0);
        assert_eq!(small, vec![0.1, 0.2]);

        let settings = DpSettings {
            noise_multiplier: 1.2,
            clip_norm: 0.5,
            epsilon_budget: 1.0,
            delta: 1e-5,
        };
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        // Ten devices each pushing (10, 0) (norm 10, clipped to 0.5): mean 0.5·10/20 = 0.25.
        let deltas = vec![vec![10.0, 0.0]; 10];
        let draws: Vec<Vec<f64>> = (0..4000)
            .map(|_| noised_mean(&deltas, 2, &settings, 20.0, &mut rng))
            .collect();
        let mean0 = draws.iter().map(|d| d[0]).sum::<f64>() / 4000.0;
        let sd1 = (draws.iter().map(|d| d[1] * d[1]).sum::<f64>() / 4000.0).sqrt();
        let want_sd = 1.2 * 0.5 / 20.0;
        assert!(
            (mean0 - 0.25).abs() < 5.0 * want_sd / 4000f64.sqrt(),
            "{mean0}"
        );
        assert!((sd1 / want_sd - 1.0).abs() < 0.05, "{sd1} vs {want_sd}");
    }

    #[test]
    fn rounds_within_budget_and_noise_for_epsilon_agree() {
        let z = noise_for_epsilon(3.0, 0.01, 80, 1e-4).unwrap();
        let eps = epsilon(0.01, z, 80, 1e-4).0;
        assert!(eps <= 3.0 && eps > 2.9, "z {z}: ε {eps}");
        let s = DpSettings {
            noise_multiplier: z,
            clip_norm: 1.0,
            epsilon_budget: 3.0,
            delta: 1e-4,
        };
        assert_eq!(s.rounds_within_budget(0.01, 80), 80);
        let fewer = s.rounds_within_budget(0.01, 1000);
        assert!((80..1000).contains(&fewer));
        assert!(s.epsilon_after(0.01, fewer) <= 3.0);
        assert!(s.epsilon_after(0.01, fewer + 1) > 3.0);
    }
}
