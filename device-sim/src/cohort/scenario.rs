//! Scenario files (TOML) for the cohort simulator: cohort size and dates,
//! subgroup mixes, per-signal models, missing data, artifacts and injected
//! events. Every field is documented here; `demo-data/*.toml` are worked
//! examples.
//!
//! Units: an effect on a signal with `scale = "linear"` is in the signal's
//! own unit (bpm, ms, h, °C, steps, breaths/min). An effect on a signal with
//! `scale = "log"` (RMSSD and steps in the demo scenarios) is a *fraction*:
//! `-0.2` multiplies the value by 0.8. Spreads (`between_sd`, `day_sd`,
//! `noise_sd`) of a log-scale signal are standard deviations of its natural
//! log.

use std::path::{Path, PathBuf};

use chrono::NaiveDate;
use serde::{Deserialize, Serialize};

use super::CohortError;
use crate::signal::Signal;

/// One optional value per signal, keyed by `daily.csv` column name.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(
    deny_unknown_fields,
    bound(deserialize = "T: Deserialize<'de>", serialize = "T: Serialize")
)]
pub struct PerSignal<T> {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub resting_hr_bpm: Option<T>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub hrv_rmssd_ms: Option<T>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sleep_h: Option<T>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub skin_temp_delta_c: Option<T>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub steps: Option<T>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub resp_rate_brpm: Option<T>,
}

impl<T> Default for PerSignal<T> {
    fn default() -> Self {
        PerSignal {
            resting_hr_bpm: None,
            hrv_rmssd_ms: None,
            sleep_h: None,
            skin_temp_delta_c: None,
            steps: None,
            resp_rate_brpm: None,
        }
    }
}

impl<T> PerSignal<T> {
    /// The value for `signal`, if set.
    pub fn get(&self, signal: Signal) -> Option<&T> {
        match signal {
            Signal::RestingHr => self.resting_hr_bpm.as_ref(),
            Signal::HrvRmssd => self.hrv_rmssd_ms.as_ref(),
            Signal::Sleep => self.sleep_h.as_ref(),
            Signal::SkinTempDelta => self.skin_temp_delta_c.as_ref(),
            Signal::Steps => self.steps.as_ref(),
            Signal::RespRate => self.resp_rate_brpm.as_ref(),
        }
    }

    /// Mutable slot for `signal`.
    pub fn slot_mut(&mut self, signal: Signal) -> &mut Option<T> {
        match signal {
            Signal::RestingHr => &mut self.resting_hr_bpm,
            Signal::HrvRmssd => &mut self.hrv_rmssd_ms,
            Signal::Sleep => &mut self.sleep_h,
            Signal::SkinTempDelta => &mut self.skin_temp_delta_c,
            Signal::Steps => &mut self.steps,
            Signal::RespRate => &mut self.resp_rate_brpm,
        }
    }

    /// True when no signal has a value.
    pub fn is_empty(&self) -> bool {
        self.iter().next().is_none()
    }

    /// The signals that have a value, in `daily.csv` column order.
    pub fn iter(&self) -> impl Iterator<Item = (Signal, &T)> {
        Signal::ALL
            .into_iter()
            .filter_map(|s| self.get(s).map(|v| (s, v)))
    }
}

impl PerSignal<f64> {
    /// The value for `signal`, or `default` when unset.
    pub fn or(&self, signal: Signal, default: f64) -> f64 {
        self.get(signal).copied().unwrap_or(default)
    }
}

/// How a signal's effects combine.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ValueScale {
    /// Effects add, in signal units.
    #[default]
    Linear,
    /// Effects multiply (given as fractions); spreads are SDs of `ln(value)`.
    Log,
}

/// Model of one daily signal. For participant `i` on day `t`, before
/// measurement (on the log scale for `scale = "log"`):
///
/// ```text
/// x[i,t] = b[i] + a[i,t] + w(t) + s(t) + g[i]·t/365 + cycle[i,t] + coupling[i,t] + events[i,t]
/// b[i]   = mean + Σ group shifts + between_sd·(ρ·F[i] + √(1−ρ²)·e[i])   F, e ~ N(0,1)
/// a[i,t] = ar1·a[i,t−1] + √(1−ar1²)·day_sd·ε[i,t]                     (stationary AR(1))
/// w(t)   = weekend_effect on Saturdays and Sundays (days of waking)
/// s(t)   = seasonal_amplitude·cos(2π·(doy(t) − seasonal_peak_day_of_year)/365.25)
/// g[i]   = fitness_trend_per_year·T[i]                                T ~ N(0,1), shared by all signals
/// y[i,t] = x[i,t] + device_bias + noise_sd·device_noise_scale·(optical scale)·η[i,t]
/// ```
/// with ρ = `fitness_correlation` and F the participant's latent fitness,
/// shared by all signals so that baselines are correlated (a fit person has a
/// lower resting HR and a higher RMSSD).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SignalModel {
    #[serde(default)]
    pub scale: ValueScale,
    /// Population mean of individual baselines (log scale: the median).
    pub mean: f64,
    /// Between-person SD of baselines.
    pub between_sd: f64,
    /// Correlation of the baseline with latent fitness, in [−1, 1].
    #[serde(default)]
    pub fitness_correlation: f64,
    /// Stationary SD of the day-to-day AR(1) deviation.
    pub day_sd: f64,
    /// Lag-1 autocorrelation of the day-to-day deviation, in (−1, 1).
    pub ar1: f64,
    /// Added on Saturdays and Sundays.
    #[serde(default)]
    pub weekend_effect: f64,
    /// Amplitude of the annual cycle.
    #[serde(default)]
    pub seasonal_amplitude: f64,
    /// Day of the year (1–366) on which the annual cycle peaks.
    #[serde(default = "default_peak_day")]
    pub seasonal_peak_day_of_year: u32,
    /// Change per year per SD of the participant's fitness trend.
    #[serde(default)]
    pub fitness_trend_per_year: f64,
    /// Measurement noise SD of a device with noise scale 1.
    pub noise_sd: f64,
    /// Measured by the wrist optical (PPG) sensor: subgroup optical error
    /// (`optical_noise_scale`, `optical_missing_probability`) applies.
    #[serde(default)]
    pub optical: bool,
}

fn default_peak_day() -> u32 {
    15
}

/// A categorical participant attribute written to `participants.csv`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GroupSpec {
    /// Column name in `participants.csv`, e.g. `age_band`.
    pub column: String,
    pub levels: Vec<GroupLevel>,
}

/// One value of a group column, its share of the cohort and what it does.
/// Group columns are drawn independently of each other.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GroupLevel {
    pub value: String,
    /// Relative share within the column (normalised over the levels).
    pub share: f64,
    /// Added to the population baseline mean.
    #[serde(default, skip_serializing_if = "PerSignal::is_empty")]
    pub baseline_shift: PerSignal<f64>,
    /// Systematic measurement bias (for a device model).
    #[serde(default, skip_serializing_if = "PerSignal::is_empty")]
    pub device_bias: PerSignal<f64>,
    /// Multiplies the signal's `noise_sd` (for a device model); 1 if unset.
    #[serde(default, skip_serializing_if = "PerSignal::is_empty")]
    pub device_noise_scale: PerSignal<f64>,
    /// Multiplies the noise of optical signals (e.g. wrist PPG error that
    /// grows with skin pigmentation or motion, a known fairness hazard).
    #[serde(default = "one")]
    pub optical_noise_scale: f64,
    /// Extra probability per day that each optical signal is missing alone.
    #[serde(default)]
    pub optical_missing_probability: f64,
    /// Probability of having menstrual cycles; multiplied over the levels that
    /// set it, 0 when no level of the participant sets it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cycle_probability: Option<f64>,
}

fn one() -> f64 {
    1.0
}

/// Cross-signal coupling through sleep: a night shorter than the
/// participant's own baseline raises resting HR on the day of waking and
/// lowers overnight RMSSD the following night.
///
/// ```text
/// deficit[t] = max(0, b_sleep − sleep[t])           (hours, true sleep)
/// rhr[t]    += resting_hr_bpm_per_hour_lost · deficit[t]
/// rmssd[t+1] ×= (1 + hrv_per_hour_lost · deficit[t])
/// ```
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SleepCoupling {
    pub resting_hr_bpm_per_hour_lost: f64,
    /// Fraction, e.g. −0.04 for 4 % lower RMSSD per hour lost.
    pub hrv_per_hour_lost: f64,
}

impl Default for SleepCoupling {
    fn default() -> Self {
        SleepCoupling {
            resting_hr_bpm_per_hour_lost: 0.0,
            hrv_per_hour_lost: 0.0,
        }
    }
}

/// Menstrual cycle for participants who have one: cycles of random length
/// whose luteal phase (the last `luteal_days` days) raises wrist skin
/// temperature (about +0.33 °C in Shilaih et al., Biosci Rep 2018) and
/// resting HR a little, ramping over `transition_days` at ovulation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CycleModel {
    pub length_mean_days: f64,
    pub length_sd_days: f64,
    pub luteal_days: u32,
    #[serde(default = "default_transition")]
    pub transition_days: u32,
    /// Full luteal effect per signal (fractions for log-scale signals).
    pub luteal_effect: PerSignal<f64>,
}

fn default_transition() -> u32 {
    2
}

/// Missing data.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MissingModel {
    /// Probability that a worn day is missing entirely (row absent).
    #[serde(default)]
    pub day_probability: f64,
    /// Non-wear gaps (several days, all signals) per participant-year.
    #[serde(default)]
    pub gap_rate_per_year: f64,
    /// Inclusive range of gap lengths.
    #[serde(default = "default_gap_days")]
    pub gap_days: [u32; 2],
    /// Probability per signal-day that one signal is missing alone.
    #[serde(default)]
    pub single_signal_probability: f64,
    /// Fraction of participants who stop wearing the device for good, on a
    /// day drawn uniformly from the second to the last tenth of the study.
    #[serde(default)]
    pub dropout_probability: f64,
}

fn default_gap_days() -> [u32; 2] {
    [2, 7]
}

/// No missing data (the same as an empty `[missing]` table).
impl Default for MissingModel {
    fn default() -> Self {
        MissingModel {
            day_probability: 0.0,
            gap_rate_per_year: 0.0,
            gap_days: default_gap_days(),
            single_signal_probability: 0.0,
            dropout_probability: 0.0,
        }
    }
}

/// Sensor artifacts, written to `events.csv` as `artifact_spike` and
/// `artifact_stuck` (start and end = the days carrying the bad values).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ArtifactModel {
    /// Probability per written signal-day of a spike.
    #[serde(default)]
    pub spike_probability: f64,
    /// Inclusive range of spike sizes in multiples of the signal's `day_sd`
    /// (sign random).
    #[serde(default = "default_spike_size")]
    pub spike_size_day_sd: [f64; 2],
    /// Runs of a stuck signal (last value repeated) per participant-year.
    #[serde(default)]
    pub stuck_rate_per_year: f64,
    /// Inclusive range of stuck-run lengths.
    #[serde(default = "default_stuck_days")]
    pub stuck_days: [u32; 2],
}

fn default_spike_size() -> [f64; 2] {
    [5.0, 10.0]
}

fn default_stuck_days() -> [u32; 2] {
    [2, 5]
}

/// No artifacts (the same as an empty `[artifacts]` table).
impl Default for ArtifactModel {
    fn default() -> Self {
        ArtifactModel {
            spike_probability: 0.0,
            spike_size_day_sd: default_spike_size(),
            stuck_rate_per_year: 0.0,
            stuck_days: default_stuck_days(),
        }
    }
}

/// Acute illness with ground truth. Over `start..=end`:
///
/// ```text
/// start = onset − presymptomatic days,  peak = onset + peak delay,  end = peak + recovery days
/// u(t)  = (t − start + 1)/(peak − start + 1) up to the peak, then 1 − (t − peak)/(end − peak + 1)
/// fever ~ N(fever_c_mean, fever_c_sd) truncated to [0.1, 3] °C; severity = fever / fever_c_mean
/// resting HR += resting_hr_bpm_per_fever_c · fever · u(t)   (≈ 8.5 bpm/°C, Karjalainen & Viitasalo 1986)
/// skin temp  += skin_temp_c_per_fever_c · fever · u(t)
/// RMSSD, resp rate: effect_at_peak · severity · u(t)
/// sleep, steps (behaviour): effect_at_peak · severity · u(t), from symptom onset only
/// ```
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct IllnessModel {
    /// Event kind written to `events.csv`.
    #[serde(default = "default_illness_kind")]
    pub kind: String,
    /// Expected number per participant-year.
    pub rate_per_year: f64,
    /// Inclusive ranges (days).
    pub presymptomatic_days: [u32; 2],
    pub peak_after_onset_days: [u32; 2],
    pub recovery_days: [u32; 2],
    /// Peak core-temperature rise (°C).
    pub fever_c_mean: f64,
    pub fever_c_sd: f64,
    #[serde(default = "default_rhr_per_fever")]
    pub resting_hr_bpm_per_fever_c: f64,
    pub skin_temp_c_per_fever_c: f64,
    /// Peak effect at severity 1 on RMSSD, respiratory rate, sleep and steps.
    pub effect_at_peak: PerSignal<f64>,
}

fn default_illness_kind() -> String {
    "acute_illness".to_owned()
}

fn default_rhr_per_fever() -> f64 {
    8.5
}

/// Time course of a stressor's effect.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StressorShape {
    /// Full effect on day one, fading linearly to `1/n` on the last day.
    Decay,
    /// Ramping over the first three days, then full until the end.
    Plateau,
}

/// A load that moves signals without illness (training block, time-zone
/// shift, late night with alcohol); no symptom onset.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StressorModel {
    pub kind: String,
    pub rate_per_year: f64,
    pub duration_days: [u32; 2],
    pub shape: StressorShape,
    pub peak_effect: PerSignal<f64>,
    /// SD of a per-event multiplier (mean 1) on the effect size.
    #[serde(default)]
    pub effect_sd_fraction: f64,
}

/// A simulation scenario. See the module doc for units.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    pub name: String,
    #[serde(default)]
    pub description: String,
    /// Default seed; `SimulateOptions::seed` overrides it. At most 2^63 − 1
    /// (a TOML integer).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub seed: Option<u64>,
    pub participants: usize,
    pub days: usize,
    /// First day, `"YYYY-MM-DD"`.
    pub start_date: NaiveDate,
    /// Minimum days between the end of one illness or stressor and the start
    /// of the next in the same participant (artifacts may overlap anything).
    #[serde(default = "default_event_gap")]
    pub min_days_between_events: u32,
    #[serde(default)]
    pub groups: Vec<GroupSpec>,
    /// Signals to generate; an absent signal has no column.
    pub signals: PerSignal<SignalModel>,
    #[serde(default)]
    pub sleep_coupling: SleepCoupling,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub menstrual_cycle: Option<CycleModel>,
    #[serde(default)]
    pub missing: MissingModel,
    #[serde(default)]
    pub artifacts: ArtifactModel,
    #[serde(default)]
    pub illness: Vec<IllnessModel>,
    #[serde(default)]
    pub stressor: Vec<StressorModel>,
}

fn default_event_gap() -> u32 {
    7
}

impl Scenario {
    /// Reads and validates a scenario file.
    pub fn from_path(path: &Path) -> Result<Self, CohortError> {
        let text = std::fs::read_to_string(path).map_err(|e| CohortError::io(path, e))?;
        Self::parse(&text, path)
    }

    /// Parses and validates a scenario from TOML text.
    pub fn from_toml_str(text: &str) -> Result<Self, CohortError> {
        Self::parse(text, Path::new("<inline>"))
    }

    fn parse(text: &str, path: &Path) -> Result<Self, CohortError> {
        let scenario: Scenario = toml::from_str(text).map_err(|e| CohortError::Scenario {
            path: path.to_owned(),
            msg: e.to_string(),
        })?;
        scenario.validate().map_err(|msg| CohortError::Scenario {
            path: path.to_owned(),
            msg,
        })?;
        Ok(scenario)
    }

    /// The scenario as TOML (the form written next to simulated data).
    pub fn to_toml_string(&self) -> Result<String, CohortError> {
        toml::to_string(self).map_err(|e| CohortError::Scenario {
            path: PathBuf::from("<serialise>"),
            msg: e.to_string(),
        })
    }

    /// Signals the scenario generates, in `daily.csv` column order.
    pub fn signals(&self) -> Vec<Signal> {
        self.signals.iter().map(|(s, _)| s).collect()
    }

    /// Checks that every number makes sense; returns a message naming the
    /// offending field.
    pub fn validate(&self) -> Result<(), String> {
        let prob = |name: &str, p: f64| {
            if (0.0..=1.0).contains(&p) {
                Ok(())
            } else {
                Err(format!("{name} = {p} is not a probability in [0, 1]"))
            }
        };
        let non_negative = |name: &str, x: f64| {
            if x >= 0.0 && x.is_finite() {
                Ok(())
            } else {
                Err(format!("{name} = {x} must be a finite number >= 0"))
            }
        };
        let range_u = |name: &str, r: [u32; 2]| {
            if r[0] <= r[1] {
                Ok(())
            } else {
                Err(format!("{name} = [{}, {}]: min above max", r[0], r[1]))
            }
        };
        if self.participants == 0 || self.days == 0 {
            return Err("participants and days must be at least 1".to_owned());
        }
        if self.seed.is_some_and(|s| s > i64::MAX as u64) {
            return Err("seed must be at most 2^63 - 1".to_owned());
        }
        if self.signals.iter().next().is_none() {
            return Err("no signal model: add at least one [signals.<column>] table".to_owned());
        }
        let mut columns = vec!["participant"];
        for group in &self.groups {
            let c = group.column.as_str();
            if c.is_empty() || columns.contains(&c) || c.contains([',', '"', '\n', '\r']) {
                return Err(format!(
                    "group column `{c}` is empty, repeated, reserved or not a plain CSV name"
                ));
            }
            columns.push(c);
            if group.levels.is_empty() {
                return Err(format!("group `{c}` has no levels"));
            }
            let mut total = 0.0;
            for level in &group.levels {
                let at = format!("groups.{c}.{}", level.value);
                if level.value.trim().is_empty() {
                    return Err(format!("group `{c}` has a level with an empty value"));
                }
                non_negative(&format!("{at}.share"), level.share)?;
                total += level.share;
                non_negative(
                    &format!("{at}.optical_noise_scale"),
                    level.optical_noise_scale,
                )?;
                prob(
                    &format!("{at}.optical_missing_probability"),
                    level.optical_missing_probability,
                )?;
                if let Some(p) = level.cycle_probability {
                    prob(&format!("{at}.cycle_probability"), p)?;
                }
                for (signal, scale) in level.device_noise_scale.iter() {
                    non_negative(&format!("{at}.device_noise_scale.{signal}"), *scale)?;
                }
                self.check_effects(&format!("{at}.baseline_shift"), &level.baseline_shift)?;
                self.check_effects(&format!("{at}.device_bias"), &level.device_bias)?;
            }
            if total <= 0.0 {
                return Err(format!("group `{c}`: shares sum to zero"));
            }
        }
        for (signal, model) in self.signals.iter() {
            let at = format!("signals.{signal}");
            if model.scale == ValueScale::Log && model.mean <= 0.0 {
                return Err(format!("{at}.mean must be > 0 on the log scale"));
            }
            non_negative(&format!("{at}.between_sd"), model.between_sd)?;
            non_negative(&format!("{at}.day_sd"), model.day_sd)?;
            non_negative(&format!("{at}.noise_sd"), model.noise_sd)?;
            if !(model.ar1 > -1.0 && model.ar1 < 1.0) {
                return Err(format!("{at}.ar1 = {} must be in (-1, 1)", model.ar1));
            }
            if !(-1.0..=1.0).contains(&model.fitness_correlation) {
                return Err(format!("{at}.fitness_correlation must be in [-1, 1]"));
            }
            if !(1..=366).contains(&model.seasonal_peak_day_of_year) {
                return Err(format!("{at}.seasonal_peak_day_of_year must be in 1..=366"));
            }
            if model.scale == ValueScale::Log && model.seasonal_amplitude.abs() >= 1.0 {
                return Err(format!(
                    "{at}.seasonal_amplitude must be in (-1, 1) on the log scale"
                ));
            }
        }
        if let Some(cycle) = &self.menstrual_cycle {
            if cycle.length_mean_days < 15.0
                || f64::from(cycle.luteal_days) >= cycle.length_mean_days
            {
                return Err(
                    "menstrual_cycle: length_mean_days must be >= 15 and above luteal_days"
                        .to_owned(),
                );
            }
            non_negative("menstrual_cycle.length_sd_days", cycle.length_sd_days)?;
            self.check_effects("menstrual_cycle.luteal_effect", &cycle.luteal_effect)?;
        }
        let m = &self.missing;
        prob("missing.day_probability", m.day_probability)?;
        prob(
            "missing.single_signal_probability",
            m.single_signal_probability,
        )?;
        prob("missing.dropout_probability", m.dropout_probability)?;
        non_negative("missing.gap_rate_per_year", m.gap_rate_per_year)?;
        range_u("missing.gap_days", m.gap_days)?;
        let a = &self.artifacts;
        prob("artifacts.spike_probability", a.spike_probability)?;
        non_negative("artifacts.stuck_rate_per_year", a.stuck_rate_per_year)?;
        range_u("artifacts.stuck_days", a.stuck_days)?;
        if a.stuck_days[0] == 0 {
            return Err("artifacts.stuck_days must start at 1 or more".to_owned());
        }
        if !(a.spike_size_day_sd[0] <= a.spike_size_day_sd[1] && a.spike_size_day_sd[0] >= 0.0) {
            return Err(
                "artifacts.spike_size_day_sd must be [min, max] with 0 <= min <= max".to_owned(),
            );
        }
        for ill in &self.illness {
            let at = format!("illness.{}", ill.kind);
            check_kind(&ill.kind)?;
            non_negative(&format!("{at}.rate_per_year"), ill.rate_per_year)?;
            range_u(
                &format!("{at}.presymptomatic_days"),
                ill.presymptomatic_days,
            )?;
            range_u(
                &format!("{at}.peak_after_onset_days"),
                ill.peak_after_onset_days,
            )?;
            range_u(&format!("{at}.recovery_days"), ill.recovery_days)?;
            if ill.recovery_days[0] == 0 {
                return Err(format!("{at}.recovery_days must start at 1 or more"));
            }
            if !(ill.fever_c_mean > 0.0 && ill.fever_c_mean <= 3.0) {
                return Err(format!("{at}.fever_c_mean must be in (0, 3]"));
            }
            non_negative(&format!("{at}.fever_c_sd"), ill.fever_c_sd)?;
            self.check_effects(&format!("{at}.effect_at_peak"), &ill.effect_at_peak)?;
        }
        for st in &self.stressor {
            let at = format!("stressor.{}", st.kind);
            check_kind(&st.kind)?;
            non_negative(&format!("{at}.rate_per_year"), st.rate_per_year)?;
            range_u(&format!("{at}.duration_days"), st.duration_days)?;
            if st.duration_days[0] == 0 {
                return Err(format!("{at}.duration_days must start at 1 or more"));
            }
            non_negative(&format!("{at}.effect_sd_fraction"), st.effect_sd_fraction)?;
            self.check_effects(&format!("{at}.peak_effect"), &st.peak_effect)?;
        }
        Ok(())
    }

    /// Effects must be finite, and fractions on log-scale signals above −1.
    fn check_effects(&self, at: &str, effects: &PerSignal<f64>) -> Result<(), String> {
        for (signal, value) in effects.iter() {
            if !value.is_finite() {
                return Err(format!("{at}.{signal} must be finite"));
            }
            let log = self
                .signals
                .get(signal)
                .is_some_and(|m| m.scale == ValueScale::Log);
            if log && *value <= -1.0 {
                return Err(format!(
                    "{at}.{signal} = {value}: a fraction on a log-scale signal must be above -1"
                ));
            }
        }
        Ok(())
    }
}

fn check_kind(kind: &str) -> Result<(), String> {
    if kind.is_empty()
        || !kind
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
    {
        return Err(format!(
            "event kind `{kind}` must be a non-empty [A-Za-z0-9_-] name"
        ));
    }
    Ok(())
}
