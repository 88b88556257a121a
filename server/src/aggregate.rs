//! Aggregation rules: FedAvg, the coordinate-wise robust rules of Yin et
//! al. (2018, "Byzantine-robust distributed learning: towards optimal
//! statistical rates", ICML: coordinate-wise median and β-trimmed mean), and
//! two fairness-aware rules, with optional clipping of each update relative
//! to the current prior. [`sensor_terms`] averages a sensor model's own
//! coordinates over that model's devices.
//!
//! All rules act on parameter vectors in the study's own (log) space and know
//! nothing of what the coordinates mean.
//!
//! # Group-loss-ranked reweighting (`group_rank`)
//!
//! Devices belong to groups `g` (the study's group column, reported at
//! enrolment); a round has `|g|` submissions from group `g`, each with its
//! per-day local loss `F_k` at the received parameters. Take the round's
//! objective with an L1 penalty on the pairwise differences of the groups'
//! mean losses,
//!
//! ```text
//! J = Σ_k w_k F_k + λ Σ_{g<h} |L_g − L_h|,      L_g = (1/|g|) Σ_{k∈g} F_k .
//! ```
//!
//! For `k ∈ g`, `∂L_g/∂F_k = 1/|g|` and `∂|L_g − L_h|/∂L_g = sign(L_g − L_h)`,
//! so `∂J/∂F_k = w_k + λ r_g/|g|` with `r_g = Σ_{h≠g} sign(L_g − L_h)`: a
//! gradient step on `J` weights device `k`'s gradient by that coefficient.
//! The rule applies the penalty's share in proportion to each device's own
//! FedAvg weight, `w_k (1 + λ r_g/|g|)` (equal to the additive form when the
//! weights are normalised to 1 per device, and keeping a group's internal
//! day weighting otherwise); groups with higher loss (`r_g > 0`) count more.
//! The weights are recomputed every round from that round's losses, per
//! signal. `r_g ≥ −(G − 1)`, so a weight stays non-negative when
//! `λ ≤ |g| / (−r_g)` for every group with `r_g < 0`; the rule uses
//! `λ_eff = min(λ, that bound)` ([`group_rank_weights`]). With one group, or
//! equal group losses, it is FedAvg.
//!
//! # q-FedAvg (`q_fedavg`)
//!
//! Li, Sanjabi, Beirami & Smith (2020, "Fair resource allocation in federated
//! learning", ICLR), Algorithm 2, with `L = 1/η` (`η` the study's local step
//! size) and `w^t` the current parameters:
//!
//! ```text
//! Δw_k = L (w^t − w_k),   Δ_k = F_k^q Δw_k,   h_k = q F_k^(q−1) ‖Δw_k‖² + L F_k^q,
//! w^(t+1) = w^t − Σ_k Δ_k / Σ_k h_k .
//! ```
//!
//! The q-FFL objective needs non-negative losses, while a per-day negative log
//! likelihood has no natural zero (it is often negative). Each round, per
//! signal, the rule therefore measures losses above the round's lowest:
//! `F_k = F_k^raw − min_j F_j^raw + 1` (the `+1` keeps the best device's weight
//! positive); a constant shift leaves every device's minimiser where it was.
//! With `q = 0` the rule is the unweighted mean of the submissions.

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
    /// FedAvg weights multiplied by `1 + λ r_g/|g|` (module docs); needs a group column.
    GroupRank { lambda: f64 },
    /// q-FedAvg (Li et al. 2020, Algorithm 2; module docs).
    QFedavg { q: f64 },
}

impl AggregationRule {
    /// The rule's name as written in a study file.
    pub fn name(&self) -> &'static str {
        match self {
            AggregationRule::Fedavg => "fedavg",
            AggregationRule::TrimmedMean { .. } => "trimmed_mean",
            AggregationRule::Median => "median",
            AggregationRule::GroupRank { .. } => "group_rank",
            AggregationRule::QFedavg { .. } => "q_fedavg",
        }
    }

    /// Whether the rule weighs devices by their group.
    pub fn needs_groups(&self) -> bool {
        matches!(self, AggregationRule::GroupRank { .. })
    }

    /// A short description with the rule's setting, e.g. `group_rank λ=1`.
    pub fn label(&self) -> String {
        match self {
            AggregationRule::TrimmedMean { trim_fraction } => {
                format!("trimmed_mean β={trim_fraction}")
            }
            AggregationRule::GroupRank { lambda } => format!("group_rank λ={lambda}"),
            AggregationRule::QFedavg { q } => format!("q_fedavg q={q}"),
            other => other.name().to_owned(),
        }
    }
}

/// One submission as a rule sees it.
#[derive(Debug, Clone, Copy)]
pub struct UpdateInput<'a> {
    pub values: &'a [f64],
    pub n_days: u32,
    /// Per-day local loss at the received parameters.
    pub loss: f64,
    /// The device's group label (`None` when the study has no group column).
    pub group: Option<&'a str>,
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
        if let AggregationRule::GroupRank { lambda } = self.rule
            && !(lambda.is_finite() && lambda >= 0.0)
        {
            return Err(format!("aggregation.lambda must be ≥ 0, got {lambda}"));
        }
        if let AggregationRule::QFedavg { q } = self.rule
            && !(q.is_finite() && (0.0..=20.0).contains(&q))
        {
            return Err(format!("aggregation.q must be in [0, 20], got {q}"));
        }
        Ok(())
    }

    /// Combines `updates` into the next parameters, given the `current` ones and the local
    /// step size `learning_rate` (q-FedAvg's `L = 1/η`). `None` when there is nothing to
    /// combine.
    pub fn combine(
        &self,
        current: &[f64],
        updates: &[UpdateInput<'_>],
        learning_rate: f64,
    ) -> Option<Vec<f64>> {
        if updates.is_empty() {
            return None;
        }
        let clipped: Vec<Vec<f64>> = updates
            .iter()
            .map(|u| self.clip(current, u.values))
            .collect();
        let with_weights = |w: &[f64]| weighted_mean(&clipped, w);
        match self.rule {
            AggregationRule::Fedavg => {
                let w: Vec<f64> = updates.iter().map(|u| f64::from(u.n_days)).collect();
                with_weights(&w)
            }
            AggregationRule::TrimmedMean { trim_fraction } => {
                Some(coordinatewise(&clipped, |col| {
                    trimmed_mean(col, trim_fraction)
                }))
            }
            AggregationRule::Median => Some(coordinatewise(&clipped, median)),
            AggregationRule::GroupRank { lambda } => {
                with_weights(&group_rank_weights(updates, lambda).weights)
            }
            AggregationRule::QFedavg { q } => {
                let losses: Vec<f64> = updates.iter().map(|u| u.loss).collect();
                Some(q_fedavg(current, &clipped, &losses, q, 1.0 / learning_rate))
            }
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

/// `Σ w_k v_k / Σ w_k`; `None` when the weights sum to zero.
fn weighted_mean(vectors: &[Vec<f64>], weights: &[f64]) -> Option<Vec<f64>> {
    let total: f64 = weights.iter().sum();
    if total.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) {
        return None;
    }
    let mut out = vec![0.0; vectors.first()?.len()];
    for (v, w) in vectors.iter().zip(weights) {
        for (o, x) in out.iter_mut().zip(v) {
            *o += w / total * x;
        }
    }
    Some(out)
}

/// The reweighting of [`AggregationRule::GroupRank`] for one round and signal.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupRankWeights {
    /// Per update, `n_k (1 + λ_eff r_g/|g|)`.
    pub weights: Vec<f64>,
    /// The λ used, after the bound that keeps every weight ≥ 0.
    pub lambda_used: f64,
    /// Per group: label (`""` for none), `|g|`, mean loss `L_g`, rank sum `r_g`.
    pub groups: Vec<(String, usize, f64, i32)>,
}

/// Group-loss-ranked weights (module docs): groups by label, `L_g` the plain mean of the
/// group's losses, `r_g = Σ_{h≠g} sign(L_g − L_h)`, `λ_eff = min(λ, min_{r_g<0} |g|/(−r_g))`.
pub fn group_rank_weights(updates: &[UpdateInput<'_>], lambda: f64) -> GroupRankWeights {
    let mut groups: Vec<(String, usize, f64, i32)> = Vec::new();
    for u in updates {
        let label = u.group.unwrap_or("");
        match groups.iter_mut().find(|g| g.0 == label) {
            Some(g) => {
                g.1 += 1;
                g.2 += u.loss;
            }
            None => groups.push((label.to_owned(), 1, u.loss, 0)),
        }
    }
    for g in &mut groups {
        g.2 /= g.1 as f64;
    }
    let means: Vec<f64> = groups.iter().map(|g| g.2).collect();
    for g in &mut groups {
        g.3 = means
            .iter()
            .map(|&l| match g.2.partial_cmp(&l) {
                Some(std::cmp::Ordering::Greater) => 1,
                Some(std::cmp::Ordering::Less) => -1,
                _ => 0,
            })
            .sum();
    }
    let bound = groups
        .iter()
        .filter(|g| g.3 < 0)
        .map(|g| g.1 as f64 / f64::from(-g.3))
        .fold(f64::INFINITY, f64::min);
    let lambda_used = lambda.min(bound);
    let weights = updates
        .iter()
        .map(|u| {
            let g = groups
                .iter()
                .find(|g| g.0 == u.group.unwrap_or(""))
                .expect("every update's group was counted");
            // Never below zero, even by rounding.
            (f64::from(u.n_days) * (1.0 + lambda_used * f64::from(g.3) / g.1 as f64)).max(0.0)
        })
        .collect();
    GroupRankWeights {
        weights,
        lambda_used,
        groups,
    }
}

/// One q-FedAvg step (Li et al. 2020, Algorithm 2) from `current` with the submitted
/// `vectors`, their raw per-day `losses` (shifted as the module docs say) and `L`.
pub fn q_fedavg(current: &[f64], vectors: &[Vec<f64>], losses: &[f64], q: f64, l: f64) -> Vec<f64> {
    let lowest = losses.iter().copied().fold(f64::INFINITY, f64::min);
    let mut delta = vec![0.0; current.len()];
    let mut h = 0.0;
    for (v, raw) in vectors.iter().zip(losses) {
        let f = raw - lowest + 1.0;
        let dw: Vec<f64> = current.iter().zip(v).map(|(c, x)| l * (c - x)).collect();
        let norm2: f64 = dw.iter().map(|d| d * d).sum();
        let fq = f.powf(q);
        for (d, x) in delta.iter_mut().zip(&dw) {
            *d += fq * x;
        }
        h += q * f.powf(q - 1.0) * norm2 + l * fq;
    }
    current.iter().zip(&delta).map(|(c, d)| c - d / h).collect()
}

/// A sensor model's own coordinates for one signal: the day-weighted mean of `coords` over
/// the model's submitted vectors `(values, n_days)`, written into `pooled`; with no
/// submission from the model this round, its `previous` coordinates are kept.
pub fn sensor_terms(
    pooled: &[f64],
    coords: &[usize],
    model_updates: &[(&[f64], u32)],
    previous: &[f64],
) -> Vec<f64> {
    let mut out = pooled.to_vec();
    let averaged = fedavg(model_updates);
    for &j in coords {
        out[j] = match &averaged {
            Some(avg) => avg[j],
            None => previous[j],
        };
    }
    out
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

    /// Plain inputs: no loss, no group.
    fn plain<'a>(updates: &'a [(&'a [f64], u32)]) -> Vec<UpdateInput<'a>> {
        updates
            .iter()
            .map(|&(values, n_days)| UpdateInput {
                values,
                n_days,
                loss: 0.0,
                group: None,
            })
            .collect()
    }

    fn input<'a>(values: &'a [f64], n_days: u32, loss: f64, group: &'a str) -> UpdateInput<'a> {
        UpdateInput {
            values,
            n_days,
            loss,
            group: Some(group),
        }
    }

    /// Worked example, computed by hand. Group A: two devices, losses 1.0 and 1.2
    /// (L_A = 1.1), 10 and 30 days, values 0 and 1; group B: one device, loss 2.0
    /// (L_B = 2.0), 20 days, value 4. r_A = sign(1.1 − 2.0) = −1, r_B = +1.
    /// λ = 0.5 (within the bound |A|/1 = 2): A's weights 10·(1 − 0.5/2) = 7.5 and
    /// 30·0.75 = 22.5, B's 20·(1 + 0.5/1) = 30, so the result is
    /// (7.5·0 + 22.5·1 + 30·4) / 60 = 142.5/60 = 2.375, against FedAvg's
    /// (0 + 30 + 80) / 60 = 1.8333…. λ = 5 exceeds the bound: λ_eff = 2, A's weights
    /// 0, B's 60, result 4.
    #[test]
    fn group_rank_reweighting_worked_example() {
        let (a1, a2, b) = ([0.0], [1.0], [4.0]);
        let updates = [
            input(&a1, 10, 1.0, "A"),
            input(&a2, 30, 1.2, "A"),
            input(&b, 20, 2.0, "B"),
        ];
        let w = group_rank_weights(&updates, 0.5);
        assert_eq!(w.lambda_used, 0.5);
        assert_eq!(w.weights, vec![7.5, 22.5, 30.0]);
        assert_eq!(w.groups[0].3, -1);
        assert_eq!(w.groups[1].3, 1);
        let rule = |lambda| Aggregation {
            rule: AggregationRule::GroupRank { lambda },
            clip_norm: None,
        };
        let next = rule(0.5).combine(&[0.0], &updates, 1.0).unwrap();
        assert!((next[0] - 2.375).abs() < 1e-12, "{next:?}");
        let fedavg = Aggregation::default()
            .combine(&[0.0], &updates, 1.0)
            .unwrap();
        assert!((fedavg[0] - 110.0 / 60.0).abs() < 1e-12);
        let capped = group_rank_weights(&updates, 5.0);
        assert_eq!(capped.lambda_used, 2.0);
        assert_eq!(capped.weights, vec![0.0, 0.0, 60.0]);
        let next = rule(5.0).combine(&[0.0], &updates, 1.0).unwrap();
        assert!((next[0] - 4.0).abs() < 1e-12);
        // One group, or λ = 0: FedAvg.
        let same = [input(&a1, 10, 1.0, "A"), input(&b, 30, 3.0, "A")];
        let next = rule(1.0).combine(&[0.0], &same, 1.0).unwrap();
        assert!((next[0] - 3.0).abs() < 1e-12);
        let next = rule(0.0).combine(&[0.0], &updates, 1.0).unwrap();
        assert!((next[0] - 110.0 / 60.0).abs() < 1e-12);
    }

    /// Worked example of Li et al. (2020) Algorithm 2, by hand: w^t = 0, L = 1 (η = 1),
    /// q = 1; device 1 submits 1 with raw loss 0.5, device 2 submits −1 with raw loss 1.5,
    /// so the shifted losses are 1 and 2. Δw = (−1, 1), Δ = (−1, 2),
    /// h = (1·1·1 + 1, 1·1·1 + 2) = (2, 3): w^(t+1) = 0 − (−1 + 2)/(2 + 3) = −0.2, pulled
    /// toward the worse-off device 2. With q = 0 the step is the unweighted mean (0).
    #[test]
    fn q_fedavg_worked_example() {
        let (d1, d2) = ([1.0], [-1.0]);
        let updates = [input(&d1, 10, 0.5, ""), input(&d2, 300, 1.5, "")];
        let rule = |q| Aggregation {
            rule: AggregationRule::QFedavg { q },
            clip_norm: None,
        };
        let next = rule(1.0).combine(&[0.0], &updates, 1.0).unwrap();
        assert!((next[0] + 0.2).abs() < 1e-12, "{next:?}");
        let next = rule(0.0).combine(&[0.0], &updates, 1.0).unwrap();
        assert!(next[0].abs() < 1e-12, "{next:?}");
        // A step size of 0.5 (L = 2): Δw = (−2, 2), Δ = (−2, 4), h = (4 + 2, 4 + 4):
        // 0 − 2/14.
        let next = rule(1.0).combine(&[0.0], &updates, 0.5).unwrap();
        assert!((next[0] + 2.0 / 14.0).abs() < 1e-12, "{next:?}");
    }

    /// A model's own coordinates are the day-weighted mean over its devices; without a
    /// submission this round they are carried over; other coordinates stay pooled.
    #[test]
    fn sensor_terms_average_the_models_devices() {
        let pooled = [1.0, 2.0, 3.0];
        let (a, b) = ([0.0, 9.0, 10.0], [4.0, 9.0, 20.0]);
        // (0·10 + 4·30)/40 = 3; (10·10 + 20·30)/40 = 17.5.
        let t = sensor_terms(&pooled, &[0, 2], &[(&a, 10), (&b, 30)], &[7.0, 7.0, 7.0]);
        assert_eq!(t, vec![3.0, 2.0, 17.5]);
        let kept = sensor_terms(&pooled, &[0, 2], &[], &[7.0, 7.0, 7.0]);
        assert_eq!(kept, vec![7.0, 2.0, 7.0]);
    }

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
        let next = agg
            .combine(&[0.0, 0.0], &plain(&[(&[3.0, 4.0], 10)]), 1.0)
            .unwrap();
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
            .combine(&current, &plain(&all), 1.0)
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
        .combine(&current, &plain(&all_up), 1.0)
        .unwrap();
        assert!(
            next.iter()
                .zip(&current)
                .all(|(n, c)| (n - c).abs() <= bound)
        );
        let fedavg = Aggregation::default()
            .combine(&current, &plain(&all_up), 1.0)
            .unwrap();
        assert!(
            fedavg
                .iter()
                .zip(&current)
                .all(|(n, c)| (n - c).abs() > 1e10),
            "FedAvg is moved far: {fedavg:?}"
        );
        // Clipping alone bounds each round's move by the clip norm.
        let clipped = Aggregation {
            rule: AggregationRule::Fedavg,
            clip_norm: Some(0.2),
        }
        .combine(&current, &plain(&all_up), 1.0)
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
