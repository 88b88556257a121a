//! The aggregator's own domain types: a study's configuration, its shared
//! parameters and the updates devices submit. Parameters are opaque named
//! vectors here: the aggregator averages them without knowing what they mean.

use serde::{Deserialize, Serialize};

/// Optimiser a device runs locally.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Optimizer {
    Adam,
    Sgd,
}

/// Local-training settings sent with every task.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LocalTraining {
    pub optimizer: Optimizer,
    /// Local optimisation steps per round (E in FedAvg).
    pub local_steps: u32,
    /// Step size in parameter space.
    pub learning_rate: f64,
    /// Random contiguous window length in days; 0 = full series.
    pub window_days: u32,
    /// Weight per day of the hyperprior penalty; 0 disables it.
    pub hyperprior_weight_per_day: f64,
}

impl Default for LocalTraining {
    /// Plain SGD, two local steps, full series. Measured on the quick demo
    /// cohort: with Adam (fresh state each round) or many local steps, local
    /// optimisation drifts toward each participant's own mean and collapses
    /// the between-person variance (client drift on non-IID data), leaving
    /// the federated prior 1–10% above the centralised optimum; few plain SGD
    /// steps stay within about 1% (see DEVELOPERS.md, "Federated training").
    fn default() -> Self {
        LocalTraining {
            optimizer: Optimizer::Sgd,
            local_steps: 2,
            learning_rate: 1.0,
            window_days: 0,
            hyperprior_weight_per_day: 0.0,
        }
    }
}

/// Layout and initial value of one signal's shared parameter vector.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalLayout {
    pub signal: String,
    pub param_names: Vec<String>,
    pub reference_center: f64,
    pub reference_scale: f64,
    /// Parameters of prior version 0, in `param_names` order.
    pub initial: Vec<f64>,
}

/// Everything that defines a study's federated training.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StudyConfig {
    pub study_id: String,
    pub title: String,
    pub signals: Vec<SignalLayout>,
    pub rounds: u32,
    pub training: LocalTraining,
    /// Fraction of enrolled devices selected each round, in (0, 1].
    pub fraction_per_round: f64,
    /// Minimum accepted submissions for a round to be aggregated.
    pub min_quorum: u32,
    /// Devices that must be enrolled before round 1 opens (at least the quorum).
    pub start_when_enrolled: u32,
    /// How long a round stays open, in milliseconds.
    pub round_deadline_ms: u64,
    /// Seed for the per-round random selection of devices.
    pub selection_seed: u64,
    /// How submissions are combined (FedAvg unless set).
    #[serde(default)]
    pub aggregation: crate::aggregate::Aggregation,
    /// False-alarm budget of the detector: Alert episodes per
    /// participant-month on the study's own data (Watch gets 3×). Devices
    /// calibrate their thresholds to it; > 0.
    #[serde(default = "default_alert_budget")]
    pub alert_budget_per_participant_month: f64,
    /// Lowest episode level devices send for clinician review (Alert unless
    /// set); the aggregator refuses packets below it.
    #[serde(default = "default_review_level")]
    pub review_level: crate::packets::FlagLevel,
}

/// Default false-alarm budget: 0.3 Alert episodes per participant-month
/// (about one in three months).
pub const DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH: f64 = 0.3;

fn default_alert_budget() -> f64 {
    DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH
}

/// Studies from before the setting existed send Alerts only.
fn default_review_level() -> crate::packets::FlagLevel {
    crate::packets::FlagLevel::Alert
}

impl StudyConfig {
    /// Checks the configuration and says which field is wrong.
    pub fn validate(&self) -> Result<(), String> {
        if !valid_id(&self.study_id) {
            return Err(format!(
                "study_id `{}` must match [A-Za-z0-9_-]{{1,64}}",
                self.study_id
            ));
        }
        if self.signals.is_empty() {
            return Err("signals: at least one signal is needed".into());
        }
        for (i, s) in self.signals.iter().enumerate() {
            if s.param_names.is_empty() || s.param_names.len() != s.initial.len() {
                return Err(format!(
                    "signals[{i}] ({}): {} param_names but {} initial values",
                    s.signal,
                    s.param_names.len(),
                    s.initial.len()
                ));
            }
            if let Some(j) = s.initial.iter().position(|v| !v.is_finite()) {
                return Err(format!("signals[{i}].initial[{j}] is not finite"));
            }
            if !(s.reference_scale.is_finite() && s.reference_scale > 0.0) {
                return Err(format!("signals[{i}].reference_scale must be positive"));
            }
        }
        if self.rounds == 0 {
            return Err("rounds must be at least 1".into());
        }
        if !(self.fraction_per_round > 0.0 && self.fraction_per_round <= 1.0) {
            return Err("fraction_per_round must be in (0, 1]".into());
        }
        if self.min_quorum == 0 {
            return Err("min_quorum must be at least 1".into());
        }
        if self.start_when_enrolled < self.min_quorum {
            return Err("start_when_enrolled must be at least min_quorum".into());
        }
        if self.training.local_steps == 0 {
            return Err("training.local_steps must be at least 1".into());
        }
        if !(self.training.learning_rate.is_finite() && self.training.learning_rate > 0.0) {
            return Err("training.learning_rate must be positive".into());
        }
        if self.round_deadline_ms == 0 {
            return Err("round_deadline_ms must be positive".into());
        }
        let budget = self.alert_budget_per_participant_month;
        // Above 30 per participant-month an Alert would be expected daily.
        if !(budget.is_finite() && budget > 0.0 && budget <= 30.0) {
            return Err(format!(
                "alert_budget_per_participant_month must be in (0, 30], got {budget}"
            ));
        }
        self.aggregation.validate()
    }

    pub fn layout(&self, signal: &str) -> Option<&SignalLayout> {
        self.signals.iter().find(|s| s.signal == signal)
    }
}

/// Identifier rule shared by studies and participant labels.
pub fn valid_id(id: &str) -> bool {
    !id.is_empty()
        && id.len() <= 64
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
}

/// Shared parameters of one signal.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalParams {
    pub signal: String,
    pub values: Vec<f64>,
}

/// One signal's entry in a device's submission.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalUpdate {
    pub signal: String,
    pub values: Vec<f64>,
    pub n_days: u32,
    pub local_loss: f64,
}

/// Per-signal summary of what entered an aggregation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Contribution {
    pub signal: String,
    pub n_devices: u32,
    pub n_days: u64,
    pub mean_local_loss: f64,
}

/// A published version of the shared prior.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PriorVersion {
    pub version: u32,
    pub round_id: u64,
    pub params: Vec<SignalParams>,
    pub contributions: Vec<Contribution>,
    pub created_unix_ms: i64,
}

/// What a device should do now.
#[derive(Debug, Clone, PartialEq)]
pub enum Work {
    Task {
        round_id: u64,
        shared: Vec<SignalParams>,
        training: LocalTraining,
        deadline_unix_ms: i64,
    },
    Wait {
        retry_after_ms: u32,
        reason: String,
    },
    Done {
        prior_version: u32,
    },
}

/// Public progress of a study.
#[derive(Debug, Clone, PartialEq)]
pub struct StudyStatus {
    pub config: StudyConfig,
    pub rounds_completed: u32,
    pub current_round: u64,
    pub devices_enrolled: u32,
    pub prior_version: u32,
}

/// Result of an accepted submission.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SubmitOutcome {
    pub accepted_in_round: u32,
    pub round_closed: bool,
}

/// Weighted average of parameter vectors (FedAvg, McMahan et al. 2017, eq. for
/// `w_{t+1} = Σ_k (n_k / n) w^k_{t+1}`), weights = day counts.
pub fn fedavg(updates: &[(&[f64], u32)]) -> Option<Vec<f64>> {
    let total: f64 = updates.iter().map(|(_, n)| f64::from(*n)).sum();
    let dim = updates.first()?.0.len();
    if total <= 0.0 {
        return None;
    }
    let mut out = vec![0.0; dim];
    for (values, n) in updates {
        let w = f64::from(*n) / total;
        for (o, v) in out.iter_mut().zip(values.iter()) {
            *o += w * v;
        }
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fedavg_weights_by_day_count() {
        // Hand computation: (1*10 + 4*30) / 40 = 3.25; (2*10 + 0*30) / 40 = 0.5.
        let a = [1.0, 2.0];
        let b = [4.0, 0.0];
        let avg = fedavg(&[(&a, 10), (&b, 30)]).unwrap();
        assert!((avg[0] - 3.25).abs() < 1e-12);
        assert!((avg[1] - 0.5).abs() < 1e-12);
    }

    #[test]
    fn ids_follow_the_data_format_rule() {
        assert!(valid_id("p-001_A"));
        assert!(!valid_id(""));
        assert!(!valid_id("p 1"));
        assert!(!valid_id(&"x".repeat(65)));
    }
}
