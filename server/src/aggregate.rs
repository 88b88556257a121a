//! Aggregation rules: FedAvg, and the coordinate-wise robust rules of Yin et
//! al. (2018, "Byzantine-robust distributed learning: towards optimal
//! statistical rates", ICML: coordinate-wise median and β-trimmed mean), with
//! optional clipping of each update relative to the current prior.
//!
//! All rules act on parameter vectors in the study's own (log) space and know
//! nothing of what the coordinates mean.

use serde::{Deserialize, Serialize};

use crate::study::fedavg;

/// How a round's submissions are combined.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
#[serde(tag = "rule", rename_all = "snake_case")]
pub enum AggregationRule {
    /// Day-count-weighted mean (McMahan et al. 2017).
    #[default]
    Fedavg,
    /// Per coordinate, drop the `trim_fraction` smallest and largest values
    /// and average the rest, unweighted (Yin et al. 2018, Definition 2).
    TrimmedMean { trim_fraction: f64 },
    /// Per coordinate, the median, unweighted (Yin et al. 2018, Definition 1).
    Median,
}

/// Aggregation settings of a study.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct Aggregation {
    #[serde(default)]
    pub rule: AggregationRule,
    /// When set, each update `θ_k − θ` is scaled down to at most this L2 norm
    /// before aggregation (parameter space units).
    #[serde(default)]
    pub clip_norm: Option<f64>,
}

impl Aggregation {
    pub fn validate(&self) -> Result<(), String> {
        if let AggregationRule::TrimmedMean { trim_fraction } = self.rule
            && !(0.0..0.5).contains(&trim_fraction)
        {
            return Err("aggregation.trim_fraction must be in [0, 0.5)".into());
        }
        if let Some(c) = self.clip_norm
            && !(c.is_finite() && c > 0.0)
        {
            return Err("aggregation.clip_norm must be positive".into());
        }
        Ok(())
    }

    /// Combines `updates` (vector, day count) into the next parameters, given
    /// the `current` ones. `None` when there is nothing to combine.
    pub fn combine(&self, current: &[f64], updates: &[(&[f64], u32)]) -> Option<Vec<f64>> {
        if updates.is_empty() {
            return None;
        }
        let clipped: Vec<Vec<f64>> = updates.iter().map(|(v, _)| self.clip(current, v)).collect();
        let weighted: Vec<(&[f64], u32)> = clipped
            .iter()
            .zip(updates)
            .map(|(v, (_, n))| (v.as_slice(), *n))
            .collect();
        match self.rule {
            AggregationRule::Fedavg => fedavg(&weighted),
            AggregationRule::TrimmedMean { trim_fraction } => {
                Some(coordinatewise(&clipped, |col| {
                    trimmed_mean(col, trim_fraction)
                }))
            }
            AggregationRule::Median => Some(coordinatewise(&clipped, median)),
        }
    }

    fn clip(&self, current: &[f64], v: &[f64]) -> Vec<f64> {
        let Some(c) = self.clip_norm else {
            return v.to_vec();
        };
        let norm = v
            .iter()
            .zip(current)
            .map(|(a, b)| (a - b).powi(2))
            .sum::<f64>()
            .sqrt();
        if norm <= c {
            return v.to_vec();
        }
        let scale = c / norm;
        v.iter()
            .zip(current)
            .map(|(a, b)| b + scale * (a - b))
            .collect()
    }
}

fn coordinatewise(vectors: &[Vec<f64>], f: impl Fn(&mut [f64]) -> f64) -> Vec<f64> {
    let dim = vectors[0].len();
    let mut column = Vec::with_capacity(vectors.len());
    (0..dim)
        .map(|j| {
            column.clear();
            column.extend(vectors.iter().map(|v| v[j]));
            f(&mut column)
        })
        .collect()
}

fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    let n = values.len();
    if n % 2 == 1 {
        values[n / 2]
    } else {
        0.5 * (values[n / 2 - 1] + values[n / 2])
    }
}

/// Mean after dropping `⌊β n⌋` values from each end.
fn trimmed_mean(values: &mut [f64], beta: f64) -> f64 {
    values.sort_by(f64::total_cmp);
    let n = values.len();
    let cut = ((beta * n as f64).floor() as usize).min((n - 1) / 2);
    let kept = &values[cut..n - cut];
    kept.iter().sum::<f64>() / kept.len() as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn median_and_trimmed_mean_by_hand() {
        // Hand computations.
        assert_eq!(median(&mut [3.0, 1.0, 2.0]), 2.0);
        assert_eq!(median(&mut [4.0, 1.0, 3.0, 2.0]), 2.5);
        // 10 values, β = 0.1: drop 1 from each end → mean of 2..=9 = 5.5.
        let mut v: Vec<f64> = (1..=10).map(f64::from).collect();
        assert_eq!(trimmed_mean(&mut v, 0.1), 5.5);
    }

    #[test]
    fn clipping_bounds_the_step() {
        let agg = Aggregation {
            rule: AggregationRule::Fedavg,
            clip_norm: Some(0.5),
        };
        let next = agg.combine(&[0.0, 0.0], &[(&[3.0, 4.0], 10)]).unwrap();
        // (3, 4) has norm 5; scaled to norm 0.5 → (0.3, 0.4).
        assert!((next[0] - 0.3).abs() < 1e-12 && (next[1] - 0.4).abs() < 1e-12);
    }

    /// 10% adversarial devices submit extreme but finite vectors. Robust
    /// rules stay within the honest devices' range (Yin et al. 2018: with
    /// β ≥ the adversarial fraction the trimmed mean of each coordinate lies
    /// between honest order statistics); FedAvg is dragged away.
    #[test]
    fn robust_rules_resist_ten_percent_adversaries() {
        let mut rng = ChaCha8Rng::seed_from_u64(42);
        let current = [0.0, 1.0, -1.0, 2.0, 0.5, 0.0, -2.0];
        let honest: Vec<Vec<f64>> = (0..90)
            .map(|_| {
                current
                    .iter()
                    .map(|c| c + 0.1 * (rng.random::<f64>() - 0.5))
                    .collect()
            })
            .collect();
        let adversarial: Vec<Vec<f64>> = (0..10)
            .map(|i| vec![if i % 2 == 0 { 1e12 } else { -1e12 }; 7])
            .collect();
        let all: Vec<(&[f64], u32)> = honest
            .iter()
            .chain(adversarial.iter())
            .map(|v| (v.as_slice(), 180))
            .collect();
        // The stated bound: every coordinate within the honest range, which is
        // within ±0.05 of the current prior here.
        let bound = 0.05;
        for rule in [
            AggregationRule::TrimmedMean { trim_fraction: 0.1 },
            AggregationRule::Median,
        ] {
            let next = Aggregation {
                rule,
                clip_norm: None,
            }
            .combine(&current, &all)
            .unwrap();
            for (n, c) in next.iter().zip(&current) {
                assert!(
                    (n - c).abs() <= bound,
                    "{rule:?} moved a coordinate by {}",
                    n - c
                );
            }
        }
        // Same-sign attack: all adversaries push up; the trimmed mean still holds.
        let pushed: Vec<Vec<f64>> = (0..10).map(|_| vec![1e12; 7]).collect();
        let all_up: Vec<(&[f64], u32)> = honest
            .iter()
            .chain(pushed.iter())
            .map(|v| (v.as_slice(), 180))
            .collect();
        let next = Aggregation {
            rule: AggregationRule::TrimmedMean { trim_fraction: 0.1 },
            clip_norm: None,
        }
        .combine(&current, &all_up)
        .unwrap();
        assert!(
            next.iter()
                .zip(&current)
                .all(|(n, c)| (n - c).abs() <= bound)
        );
        let plain = Aggregation::default().combine(&current, &all_up).unwrap();
        assert!(
            plain
                .iter()
                .zip(&current)
                .all(|(n, c)| (n - c).abs() > 1e10),
            "FedAvg is moved far: {plain:?}"
        );
        // Clipping alone bounds each round's move by the clip norm.
        let clipped = Aggregation {
            rule: AggregationRule::Fedavg,
            clip_norm: Some(0.2),
        }
        .combine(&current, &all_up)
        .unwrap();
        let step = clipped
            .iter()
            .zip(&current)
            .map(|(a, b)| (a - b).powi(2))
            .sum::<f64>()
            .sqrt();
        assert!(step <= 0.2 + 1e-12, "clipped FedAvg step {step}");
    }
}
