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
    /// Per-sensor-model measurement terms of the prior (none unless set).
    #[serde(default)]
    pub sensor_models: Option<SensorModels>,
    /// The participant group column devices report at enrolment (none unless set).
    #[serde(default)]
    pub subgroups: Option<Subgroups>,
    /// User-level differential privacy of the published priors (none unless set;
    /// `crate::privacy`).
    #[serde(default)]
    pub dp: Option<crate::privacy::DpSettings>,
    /// Secure aggregation of each round's updates (none unless set; `crate::secure_round`).
    #[serde(default)]
    pub secure_aggregation: Option<SecureAggregation>,
    /// The alerting direction devices use: weight per signal column (`Study.alert_direction`
    /// in the protocol). `None`: the devices' default acute-illness direction.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub alert_direction: Option<std::collections::BTreeMap<String, f64>>,
}

/// A study's secure-aggregation settings: rounds run the protocol of `crate::secagg` over
/// `SecureStep`, and the aggregator sees only each round's sum.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SecureAggregation {
    /// How long each phase after the first waits for the devices still expected, in
    /// milliseconds (the first phase, which includes local training, has the round's
    /// deadline). A phase closes early once every expected device has answered.
    #[serde(default = "default_phase_deadline_ms")]
    pub phase_deadline_ms: u64,
    /// Fractional bits of the fixed-point encoding of the inputs.
    #[serde(default = "default_frac_bits")]
    pub frac_bits: u32,
    /// Most devices in one calibration session: a stage's devices are split into sessions
    /// of at most this many (the protocol's cost grows with the square of a session's
    /// size), and the aggregator learns each session's sum.
    #[serde(default = "default_max_session_devices")]
    pub max_session_devices: u32,
}

fn default_max_session_devices() -> u32 {
    500
}

impl Default for SecureAggregation {
    fn default() -> Self {
        Self {
            phase_deadline_ms: default_phase_deadline_ms(),
            frac_bits: default_frac_bits(),
            max_session_devices: default_max_session_devices(),
        }
    }
}

fn default_phase_deadline_ms() -> u64 {
    30_000
}

/// 24 bits: a parameter's day-weighted mean is decoded to within 2^−25 ≈ 3·10^−8.
fn default_frac_bits() -> u32 {
    24
}

/// A sensor-aware prior: one population trend, and per sensor model the
/// measurement terms named in `params` (by default the mean offset `mean_z`
/// and the measurement-noise variance `log_noise_var`), each averaged over
/// that model's devices (see [`crate::aggregate::sensor_terms`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SensorModels {
    /// The models a device may declare at enrolment.
    pub models: Vec<String>,
    /// Parameter names kept per model; every signal's layout must have them.
    #[serde(default = "default_sensor_params")]
    pub params: Vec<String>,
    /// Enrolled (non-revoked) devices of a model, with the signal, that it needs for
    /// terms of its own; below this its devices use the pooled terms.
    #[serde(default = "default_min_devices_per_model")]
    pub min_devices: u32,
    /// Column of a cohort's `participants.csv` holding each participant's model, for
    /// simulated devices (a real device knows its own model).
    #[serde(default)]
    pub column: Option<String>,
}

/// The per-model coordinates unless a study names others.
pub const DEFAULT_SENSOR_PARAMS: [&str; 2] = ["mean_z", "log_noise_var"];

/// Enrolled devices a sensor model needs for terms of its own unless a study says otherwise.
pub const DEFAULT_MIN_DEVICES_PER_MODEL: u32 = 10;

fn default_sensor_params() -> Vec<String> {
    DEFAULT_SENSOR_PARAMS
        .iter()
        .map(|s| (*s).to_owned())
        .collect()
}

fn default_min_devices_per_model() -> u32 {
    DEFAULT_MIN_DEVICES_PER_MODEL
}

/// The one participant group column a study collects at enrolment.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Subgroups {
    /// Column name, e.g. `age_band` (as in a cohort's `participants.csv`).
    pub column: String,
    /// The values a device may report.
    pub levels: Vec<String>,
    /// Calibrate the detector's thresholds per level: each device's histogram stage
    /// publishes the sum over its own group's devices, when that group has at least
    /// `min_devices_per_group` submissions; otherwise the whole study's sum.
    #[serde(default)]
    pub calibrate_per_group: bool,
    /// See `calibrate_per_group`.
    #[serde(default = "default_min_devices_per_group")]
    pub min_devices_per_group: u32,
}

/// Devices a group needs for a calibration of its own unless a study says otherwise.
pub const DEFAULT_MIN_DEVICES_PER_GROUP: u32 = 10;

fn default_min_devices_per_group() -> u32 {
    DEFAULT_MIN_DEVICES_PER_GROUP
}

/// Distinct names of 1 to 64 characters without control characters or surrounding spaces
/// (group levels such as `65+` or `V-VI` are kept as a cohort file writes them); `what`
/// names the field.
fn check_names(what: &str, names: &[String]) -> Result<(), String> {
    if names.is_empty() {
        return Err(format!("{what}: at least one is needed"));
    }
    for (i, n) in names.iter().enumerate() {
        if n.is_empty()
            || n.chars().count() > 64
            || n.trim() != n
            || n.chars().any(char::is_control)
        {
            return Err(format!(
                "{what}[{i}]: `{}` must be 1 to 64 characters, without control characters or surrounding spaces",
                n.escape_debug()
            ));
        }
        if names[..i].contains(n) {
            return Err(format!("{what}[{i}]: `{n}` repeated"));
        }
    }
    Ok(())
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
        if let Some(direction) = &self.alert_direction {
            for (signal, weight) in direction {
                if !self.signals.iter().any(|s| &s.signal == signal) {
                    return Err(format!(
                        "alert_direction: `{signal}` is not one of the study's signals"
                    ));
                }
                if !weight.is_finite() {
                    return Err(format!(
                        "alert_direction: the weight of `{signal}` must be finite, got {weight}"
                    ));
                }
            }
            if direction.values().all(|w| *w == 0.0) {
                return Err("alert_direction: at least one signal needs a non-zero weight".into());
            }
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
        if let Some(sm) = &self.sensor_models {
            check_names("sensor_models.models", &sm.models)?;
            if sm.params.is_empty() {
                return Err("sensor_models.params: at least one parameter name is needed".into());
            }
            for (i, p) in sm.params.iter().enumerate() {
                if let Some(s) = self.signals.iter().find(|s| !s.param_names.contains(p)) {
                    return Err(format!(
                        "sensor_models.params[{i}]: `{p}` is not a parameter of signal {}",
                        s.signal
                    ));
                }
            }
            if sm.min_devices == 0 {
                return Err("sensor_models.min_devices must be at least 1".into());
            }
        }
        if let Some(g) = &self.subgroups {
            if !valid_id(&g.column) {
                return Err(format!(
                    "subgroups.column: `{}` must match [A-Za-z0-9_-]{{1,64}}",
                    g.column
                ));
            }
            check_names("subgroups.levels", &g.levels)?;
            if g.min_devices_per_group == 0 {
                return Err("subgroups.min_devices_per_group must be at least 1".into());
            }
        }
        if let Some(dp) = &self.dp {
            dp.validate()?;
            if self.aggregation.rule != crate::aggregate::AggregationRule::Fedavg
                || self.aggregation.clip_norm.is_some()
            {
                return Err(format!(
                    "dp: differential privacy runs DP-FedAvg with its own clipping; aggregation.rule {} and aggregation.clip_norm cannot be combined with it",
                    self.aggregation.rule.name()
                ));
            }
            if self.sensor_models.is_some() {
                return Err(
                    "dp: per-sensor-model terms are not covered by the privacy accounting; remove sensor_models or dp".into(),
                );
            }
        }
        if let Some(sa) = &self.secure_aggregation {
            if self.aggregation.rule != crate::aggregate::AggregationRule::Fedavg
                || self.aggregation.clip_norm.is_some()
            {
                return Err(format!(
                    "secure_aggregation: the aggregator sees only the sum of masked inputs, so \
                     aggregation.rule {} and aggregation.clip_norm (which need each update) \
                     cannot run; use fedavg without clip_norm",
                    self.aggregation.rule.name()
                ));
            }
            if self.sensor_models.is_some() {
                return Err(
                    "secure_aggregation: per-sensor-model terms need each update's model; remove sensor_models or secure_aggregation".into(),
                );
            }
            if self.min_quorum < 2 {
                return Err("secure_aggregation: min_quorum must be at least 2".into());
            }
            if sa.max_session_devices < 4 {
                return Err(format!(
                    "secure_aggregation.max_session_devices must be at least 4, got {}",
                    sa.max_session_devices
                ));
            }
            if sa.phase_deadline_ms == 0 {
                return Err("secure_aggregation.phase_deadline_ms must be positive".into());
            }
            if !(8..=40).contains(&sa.frac_bits) {
                return Err(format!(
                    "secure_aggregation.frac_bits must be in 8..=40, got {}",
                    sa.frac_bits
                ));
            }
        }
        if self.aggregation.rule.needs_groups() && self.subgroups.is_none() {
            return Err(format!(
                "aggregation.rule {}: needs a group column (set subgroups)",
                self.aggregation.rule.name()
            ));
        }
        self.aggregation.validate()
    }

    /// The rounds training runs: `rounds`, or fewer when differential privacy's budget would
    /// be spent before (`DpSettings::rounds_within_budget` at `q = fraction_per_round`).
    pub fn round_limit(&self) -> u32 {
        match &self.dp {
            Some(dp) => dp.rounds_within_budget(self.fraction_per_round, self.rounds),
            None => self.rounds,
        }
    }

    /// `ε` spent after `rounds_completed` rounds (`None` without differential privacy).
    pub fn epsilon_spent(&self, rounds_completed: u32) -> Option<f64> {
        self.dp
            .as_ref()
            .map(|dp| dp.epsilon_after(self.fraction_per_round, rounds_completed))
    }

    /// Position of each per-model coordinate in `signal`'s layout (empty without sensor models).
    pub fn sensor_coordinates(&self, signal: &str) -> Vec<usize> {
        let (Some(sm), Some(layout)) = (&self.sensor_models, self.layout(signal)) else {
            return Vec::new();
        };
        sm.params
            .iter()
            .filter_map(|p| layout.param_names.iter().position(|n| n == p))
            .collect()
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

/// One sensor model's full parameter vector for one signal (the pooled vector with the
/// per-model coordinates replaced by the model's own).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SensorTerms {
    pub sensor_model: String,
    pub signal: String,
    pub values: Vec<f64>,
    /// Devices of the model whose update entered this version (0: carried over).
    pub n_devices: u32,
}

/// A published version of the shared prior.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PriorVersion {
    pub version: u32,
    pub round_id: u64,
    pub params: Vec<SignalParams>,
    pub contributions: Vec<Contribution>,
    pub created_unix_ms: i64,
    /// Per sensor model, for the models that have terms of their own in this version.
    #[serde(default)]
    pub sensor_terms: Vec<SensorTerms>,
}

impl PriorVersion {
    /// The parameters a device of `sensor_model` uses: its model's vectors where the
    /// version has them, the pooled ones otherwise.
    pub fn params_for(&self, sensor_model: Option<&str>) -> Vec<SignalParams> {
        self.params
            .iter()
            .map(|p| {
                sensor_model
                    .and_then(|m| {
                        self.sensor_terms
                            .iter()
                            .find(|t| t.sensor_model == m && t.signal == p.signal)
                    })
                    .map_or_else(
                        || p.clone(),
                        |t| SignalParams {
                            signal: p.signal.clone(),
                            values: t.values.clone(),
                        },
                    )
            })
            .collect()
    }

    /// Whether `sensor_model` has terms of its own in this version.
    pub fn has_terms(&self, sensor_model: &str) -> bool {
        self.sensor_terms
            .iter()
            .any(|t| t.sensor_model == sensor_model)
    }
}

/// What a device should do now.
#[derive(Debug, Clone, PartialEq)]
pub enum Work {
    Task {
        round_id: u64,
        shared: Vec<SignalParams>,
        training: LocalTraining,
        deadline_unix_ms: i64,
        /// Present in a study with secure aggregation.
        secure: Option<crate::secure_round::SecureTask>,
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
