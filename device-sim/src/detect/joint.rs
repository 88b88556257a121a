//! Joint evidence across signals in a stated direction (module docs of [`super`], "Joint
//! score"), and the per-device residual moments from which the cross-signal correlation is
//! learned.

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

use crate::signal::Signal;

/// Number of signals.
pub const N_SIGNALS: usize = Signal::ALL.len();

/// Pseudo-days by which the learned correlation is shrunk towards the identity
/// ([`ResidualMoments::correlation`]); used by the evaluation and by devices after the
/// federated calibration.
pub const CORRELATION_SHRINK_DAYS: f64 = 200.0;

/// Position of a signal in [`Signal::ALL`].
pub fn signal_index(signal: Signal) -> usize {
    Signal::ALL
        .iter()
        .position(|&s| s == signal)
        .expect("every signal is in Signal::ALL")
}

/// The direction of departure that raises alerts: one weight per signal in [`Signal::ALL`]
/// order (`+` up, `−` down, 0 not part of the pattern).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TargetPattern {
    pub weights: [f64; N_SIGNALS],
}

impl TargetPattern {
    /// Acute illness: resting HR, skin temperature, respiratory rate and sleep up, HRV and
    /// steps down, each with unit weight in its residual's units (directions as reported,
    /// from memory, by Mishra et al. 2020, Nat. Biomed. Eng. 4:1208: resting HR up and steps
    /// down around infection; Quer et al. 2021, Nat. Med. 27:73: resting HR up, sleep up and
    /// steps down in infected participants). Sleep and steps in the direction separate illness from the
    /// commonest confounders that also raise resting HR: a hard-training block (steps up)
    /// and a late night of drinking (sleep down); `docs/evaluation.md`, detection log.
    pub const ACUTE_ILLNESS: TargetPattern = TargetPattern {
        // resting HR, HRV, sleep, skin temp, steps, resp. rate
        weights: [1.0, -1.0, 1.0, 1.0, -1.0, 1.0],
    };

    /// The direction with `weights` per signal column (`daily.csv` name); a signal not
    /// named has weight 0.
    ///
    /// # Errors
    /// An unknown column, a non-finite weight, or no non-zero weight.
    pub fn from_weights<'a>(
        weights: impl IntoIterator<Item = (&'a String, &'a f64)>,
    ) -> std::result::Result<TargetPattern, String> {
        let mut out = TargetPattern {
            weights: [0.0; N_SIGNALS],
        };
        for (column, &weight) in weights {
            let signal: Signal = column
                .parse()
                .map_err(|e: crate::signal::UnknownSignal| e.to_string())?;
            if !weight.is_finite() {
                return Err(format!(
                    "the weight of {column} must be finite, got {weight}"
                ));
            }
            out.weights[signal_index(signal)] = weight;
        }
        if out.weights.iter().all(|w| *w == 0.0) {
            return Err("no signal has a non-zero weight".into());
        }
        Ok(out)
    }

    /// The weight of one signal.
    pub fn weight(&self, signal: Signal) -> f64 {
        self.weights[signal_index(signal)]
    }
}

/// Same-day cross-products of scaled residuals on released days: what a device sends so the
/// cohort's cross-signal correlation can be learned (sums and counts only, never a daily
/// value).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResidualMoments {
    /// `Σ r_j r_k` over days with both observed.
    pub cross: [[f64; N_SIGNALS]; N_SIGNALS],
    /// Number of days with both observed.
    pub count: [[u64; N_SIGNALS]; N_SIGNALS],
}

impl Default for ResidualMoments {
    fn default() -> ResidualMoments {
        ResidualMoments {
            cross: [[0.0; N_SIGNALS]; N_SIGNALS],
            count: [[0; N_SIGNALS]; N_SIGNALS],
        }
    }
}

impl ResidualMoments {
    /// Adds one day's residuals (`None` = not observed or not usable).
    pub fn add_day(&mut self, r: &[Option<f64>; N_SIGNALS]) {
        for (j, a) in r.iter().enumerate() {
            let Some(a) = a else { continue };
            for (k, b) in r.iter().enumerate() {
                if let Some(b) = b {
                    self.cross[j][k] += a * b;
                    self.count[j][k] += 1;
                }
            }
        }
    }

    /// Adds another device's moments (what the aggregator does).
    pub fn merge(&mut self, other: &ResidualMoments) {
        for j in 0..N_SIGNALS {
            for k in 0..N_SIGNALS {
                self.cross[j][k] += other.cross[j][k];
                self.count[j][k] += other.count[j][k];
            }
        }
    }

    /// The correlation matrix these moments imply: `ρ_jk = Σ r_j r_k / √(Σ r_j² Σ r_k²)` over
    /// the days both were observed (pairwise), shrunk towards the identity by
    /// `n / (n + shrink_days)` and made positive definite (eigenvalues floored at 0.05).
    /// Signals with no days keep correlation 0.
    pub fn correlation(&self, shrink_days: f64) -> Correlation {
        let mut m = [[0.0; N_SIGNALS]; N_SIGNALS];
        for (j, row) in m.iter_mut().enumerate() {
            row[j] = 1.0;
            for (k, cell) in row.iter_mut().enumerate() {
                if j == k || self.count[j][k] < 2 {
                    continue;
                }
                let n = self.count[j][k] as f64;
                let (vj, vk) = (self.cross[j][j], self.cross[k][k]);
                if vj <= 0.0 || vk <= 0.0 {
                    continue;
                }
                // Pairwise: the diagonal sums cover more days than the pair; rescale them to
                // the pair's count by their per-day means.
                let mj = vj / self.count[j][j] as f64;
                let mk = vk / self.count[k][k] as f64;
                let rho = (self.cross[j][k] / n) / (mj * mk).sqrt();
                *cell = rho.clamp(-0.95, 0.95) * n / (n + shrink_days);
            }
        }
        Correlation::new(m)
    }
}

/// A positive-definite correlation matrix over the six signals.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Correlation {
    pub matrix: [[f64; N_SIGNALS]; N_SIGNALS],
}

impl Correlation {
    /// Independent signals.
    pub fn identity() -> Correlation {
        let mut m = [[0.0; N_SIGNALS]; N_SIGNALS];
        for (j, row) in m.iter_mut().enumerate() {
            row[j] = 1.0;
        }
        Correlation { matrix: m }
    }

    /// `m` symmetrised, with eigenvalues floored at 0.05 and the diagonal rescaled to 1.
    pub fn new(m: [[f64; N_SIGNALS]; N_SIGNALS]) -> Correlation {
        let a = DMatrix::from_fn(N_SIGNALS, N_SIGNALS, |i, j| 0.5 * (m[i][j] + m[j][i]));
        let eig = a.symmetric_eigen();
        let vals = eig.eigenvalues.map(|v| v.max(0.05));
        let fixed =
            &eig.eigenvectors * DMatrix::from_diagonal(&vals) * eig.eigenvectors.transpose();
        let mut out = [[0.0; N_SIGNALS]; N_SIGNALS];
        for i in 0..N_SIGNALS {
            for j in 0..N_SIGNALS {
                out[i][j] = fixed[(i, j)] / (fixed[(i, i)] * fixed[(j, j)]).sqrt();
            }
        }
        Correlation { matrix: out }
    }
}

/// The joint score of one window over the signals present in it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct JointScore {
    /// `aᵀR⁻¹x / √(aᵀR⁻¹a)`: N(0, 1) when `x ~ N(0, R)`.
    pub score: f64,
    /// Each signal's share of the score (`score = Σ contribution`); 0 for absent signals.
    pub contributions: [f64; N_SIGNALS],
}

/// Directional joint score of per-signal departures `x` (`None` = absent) under correlation
/// `corr` in the direction `pattern`: the likelihood-ratio statistic for a mean shift along
/// `a` when `x ~ N(0, R)` (the matched filter; e.g. Kay 1998, *Fundamentals of Statistical
/// Signal Processing II*, §4.3). `None` when no signal of the pattern is present.
pub fn joint_score(
    x: &[Option<f64>; N_SIGNALS],
    corr: &Correlation,
    pattern: &TargetPattern,
) -> Option<JointScore> {
    let present: Vec<usize> = (0..N_SIGNALS).filter(|&j| x[j].is_some()).collect();
    if !present.iter().any(|&j| pattern.weights[j] != 0.0) {
        return None;
    }
    let n = present.len();
    let r = DMatrix::from_fn(n, n, |a, b| corr.matrix[present[a]][present[b]]);
    let a = DVector::from_fn(n, |i, _| pattern.weights[present[i]]);
    let xv = DVector::from_fn(n, |i, _| x[present[i]].unwrap_or(0.0));
    let chol = r.cholesky()?;
    let w = chol.solve(&a); // R⁻¹ a
    let norm = a.dot(&w).sqrt();
    if !(norm.is_finite() && norm > 0.0) {
        return None;
    }
    let mut contributions = [0.0; N_SIGNALS];
    let mut score = 0.0;
    for (i, &j) in present.iter().enumerate() {
        let c = w[i] * xv[i] / norm;
        contributions[j] = c;
        score += c;
    }
    Some(JointScore {
        score,
        contributions,
    })
}

/// [`joint_score`] precomputed for one correlation and pattern: for every subset of present
/// signals (a bitmask over [`Signal::ALL`]), the weights `R⁻¹a / √(aᵀR⁻¹a)`, so a day's score
/// is a dot product (the detector scores every day and window; one small Cholesky per subset
/// instead of per window).
#[derive(Debug, Clone)]
pub struct JointWeights {
    table: Vec<Option<[f64; N_SIGNALS]>>,
}

impl JointWeights {
    /// Weights for every subset of signals under `corr` and `pattern`.
    pub fn new(corr: &Correlation, pattern: &TargetPattern) -> JointWeights {
        let table = (0..1usize << N_SIGNALS)
            .map(|mask| {
                let x: [Option<f64>; N_SIGNALS] =
                    std::array::from_fn(|j| (mask & (1 << j) != 0).then_some(1.0));
                // With x = 1 on every present signal, each contribution is its weight.
                joint_score(&x, corr, pattern).map(|s| s.contributions)
            })
            .collect();
        JointWeights { table }
    }

    /// The same value as [`joint_score`] with this table's correlation and pattern.
    pub fn score(&self, x: &[Option<f64>; N_SIGNALS]) -> Option<JointScore> {
        let mask = (0..N_SIGNALS)
            .filter(|&j| x[j].is_some())
            .fold(0usize, |m, j| m | (1 << j));
        let w = self.table[mask].as_ref()?;
        let mut contributions = [0.0; N_SIGNALS];
        let mut score = 0.0;
        for j in 0..N_SIGNALS {
            if let Some(v) = x[j] {
                contributions[j] = w[j] * v;
                score += contributions[j];
            }
        }
        Some(JointScore {
            score,
            contributions,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_direction_from_named_weights() {
        let named: std::collections::BTreeMap<String, f64> = [
            ("steps".to_owned(), -0.5),
            ("resting_hr_bpm".to_owned(), 2.0),
        ]
        .into();
        let p = TargetPattern::from_weights(&named).unwrap();
        assert_eq!(p.weights, [2.0, 0.0, 0.0, 0.0, -0.5, 0.0]);
        let bad = |pairs: &[(&str, f64)]| {
            let m: std::collections::BTreeMap<String, f64> =
                pairs.iter().map(|(k, v)| ((*k).to_owned(), *v)).collect();
            TargetPattern::from_weights(&m).unwrap_err()
        };
        assert!(bad(&[("glucose", 1.0)]).contains("glucose"));
        assert!(bad(&[("steps", f64::NAN)]).contains("finite"));
        assert!(bad(&[("steps", 0.0)]).contains("non-zero"));
        assert!(bad(&[]).contains("non-zero"));
    }
}
