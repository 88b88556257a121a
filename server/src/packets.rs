//! Flag packets: what a consenting device shares about one episode, and the
//! checks a packet passes before the aggregator stores it.
//!
//! A packet is plain numbers the device already computed (observed values,
//! personalised bands, the population band, the episode's peak and its
//! signals' departures); the aggregator validates their shape and stores
//! them for clinician review. It computes nothing from them.
//!
//! One packet per episode: a device sends an episode again under the same
//! [`EpisodeFacts::key`] as it grows, and the new version replaces the old
//! one (see [`crate::store::Store::upsert_flag_packet`]). Packets stored
//! before episodes existed were migrated into one-alarm-day episodes
//! (`MIGRATE_EPISODES` in [`crate::store`]).

use std::collections::BTreeSet;

use chrono::NaiveDate;
use serde::{Deserialize, Serialize};

use crate::error::{AggregatorError, Result};
use crate::study::StudyConfig;

/// Longest window a packet may carry, in days (inclusive of both ends).
pub const MAX_WINDOW_DAYS: i64 = 120;

/// Longest plain-language reason, in characters.
pub const MAX_REASON_CHARS: usize = 2000;

/// How strong a flag is. Ordered: `Watch < Alert`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagLevel {
    Watch,
    Alert,
}

impl FlagLevel {
    pub const ALL: [FlagLevel; 2] = [FlagLevel::Alert, FlagLevel::Watch];

    /// Stable name used in the database and in URLs.
    pub fn as_str(self) -> &'static str {
        match self {
            FlagLevel::Watch => "watch",
            FlagLevel::Alert => "alert",
        }
    }

    pub fn parse(s: &str) -> Option<FlagLevel> {
        FlagLevel::ALL.into_iter().find(|l| l.as_str() == s)
    }
}

/// Which detector raised a flag. Devices send [`FlagKind::Episode`]; the
/// other kinds name packets stored before episodes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagKind {
    SingleDay,
    Cusum,
    MultiSignal,
    Episode,
}

impl FlagKind {
    /// Stable name used in the database.
    pub fn as_str(self) -> &'static str {
        match self {
            FlagKind::SingleDay => "single_day",
            FlagKind::Cusum => "cusum",
            FlagKind::MultiSignal => "multi_signal",
            FlagKind::Episode => "episode",
        }
    }

    /// Plain-language name for display.
    pub fn label(self) -> &'static str {
        match self {
            FlagKind::SingleDay => "single unusual day (before episodes)",
            FlagKind::Cusum => "sustained shift (before episodes)",
            FlagKind::MultiSignal => "several signals together (before episodes)",
            FlagKind::Episode => "signals departing together",
        }
    }
}

/// Whether a signal was above or below its expected level.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SignalDirection {
    Up,
    Down,
}

impl SignalDirection {
    /// "up" or "down".
    pub fn as_str(self) -> &'static str {
        match self {
            SignalDirection::Up => "up",
            SignalDirection::Down => "down",
        }
    }

    /// An arrow for compact display (always next to the word or a label).
    pub fn arrow(self) -> &'static str {
        match self {
            SignalDirection::Up => "↑",
            SignalDirection::Down => "↓",
        }
    }
}

/// An episode's direction relative to the study's target pattern.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum PatternDirection {
    /// Along the pattern (the only direction that is alerted and sent).
    Target,
    /// Opposite to the pattern (recorded on devices, never sent).
    Mirror,
}

/// One signal's part in an episode's peak score.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalDeparture {
    pub signal: String,
    pub direction: SignalDirection,
    /// Window departure in SDs of the personal baseline (for a migrated
    /// single-signal packet: the old detector's signed statistic).
    pub departure: f64,
    /// Share of the peak score (score units).
    pub contribution: f64,
}

/// What makes a packet an episode (the packet's `first_day`, `last_day`,
/// `date`, `score` and `level` are its start, end so far, peak day, peak
/// score and highest level).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpisodeFacts {
    /// Device-chosen key, stable as the episode grows; unique per device.
    /// Migrated packets have `legacy-<packet id>`.
    pub key: String,
    /// The episode may still grow.
    pub ongoing: bool,
    /// Relative to the study's pattern; `None` for a migrated single-signal
    /// packet (the old detectors had no pattern direction).
    pub direction: Option<PatternDirection>,
    /// Signals in the peak score, largest contribution first (empty for a
    /// migrated multi-signal packet, which did not record them).
    pub involved: Vec<SignalDeparture>,
    /// First day of the window that gave the peak score.
    pub peak_window_start: NaiveDate,
    /// Alarm days in the episode so far.
    pub alarm_days: u32,
}

/// Prefix of the keys `MIGRATE_EPISODES` gives stored packets; refused in
/// new packets so a device cannot overwrite a migrated one.
pub const LEGACY_KEY_PREFIX: &str = "legacy-";

/// Longest episode key, in bytes.
pub const MAX_KEY_LEN: usize = 64;

/// How a day entered the device's prospective scoring.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DayStatus {
    BuildingBaseline,
    Normal,
    Flagged,
}

/// One observed day of one signal (signal units).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WindowDay {
    pub date: NaiveDate,
    pub observed: f64,
    pub mean: f64,
    pub sd: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
    pub z: f64,
    pub tail_p: f64,
    pub conditioned: bool,
    pub status: DayStatus,
}

/// The band of the shared prior alone (signal units), constant over a window.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PopulationBand {
    pub mean: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
}

/// One signal's observed days over a packet's window.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalWindow {
    pub signal: String,
    pub population: PopulationBand,
    pub days: Vec<WindowDay>,
}

/// Everything a device shares about one episode.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FlagPacket {
    /// `None` for an episode; the one flagged signal of a migrated
    /// single-signal packet.
    pub signal: Option<String>,
    pub kind: FlagKind,
    pub level: FlagLevel,
    pub first_day: NaiveDate,
    pub last_day: NaiveDate,
    pub date: NaiveDate,
    pub score: f64,
    pub reason: String,
    pub window_start: NaiveDate,
    pub window_end: NaiveDate,
    /// The involved signals first, then the participant's other signals.
    pub signals: Vec<SignalWindow>,
    pub episode: EpisodeFacts,
}

impl FlagPacket {
    /// Days in the window, both ends included.
    pub fn window_days(&self) -> i64 {
        (self.window_end - self.window_start).num_days() + 1
    }

    /// Checks the packet against the study it is sent to; the error names
    /// the offending field as `packet.<path>`.
    pub fn validate(&self, config: &StudyConfig) -> Result<()> {
        let bad = |field: String, reason: String| AggregatorError::invalid(field, reason);
        if self.kind != FlagKind::Episode {
            return Err(bad(
                "packet.kind".into(),
                format!(
                    "devices send episodes (FLAG_KIND_EPISODE); `{}` names packets stored before episodes",
                    self.kind.as_str()
                ),
            ));
        }
        if let Some(s) = &self.signal {
            return Err(bad(
                "packet.signal".into(),
                format!("must be empty for an episode (its signals are in `involved`), got `{s}`"),
            ));
        }
        if self.level < config.review_level {
            return Err(bad(
                "packet.level".into(),
                format!(
                    "{} is below the study's lowest level sent for review ({})",
                    self.level.as_str(),
                    config.review_level.as_str()
                ),
            ));
        }
        if !self.score.is_finite() {
            return Err(bad(
                "packet.score".into(),
                format!("{} is not finite", self.score),
            ));
        }
        if self.reason.trim().is_empty() {
            return Err(bad("packet.reason".into(), "must not be empty".into()));
        }
        let reason_chars = self.reason.chars().count();
        if reason_chars > MAX_REASON_CHARS {
            return Err(bad(
                "packet.reason".into(),
                format!("{reason_chars} characters; at most {MAX_REASON_CHARS}"),
            ));
        }
        if self.window_end < self.window_start {
            return Err(bad(
                "packet.window_end".into(),
                format!(
                    "{} is before window_start {}",
                    self.window_end, self.window_start
                ),
            ));
        }
        if self.window_days() > MAX_WINDOW_DAYS {
            return Err(bad(
                "packet.window_end".into(),
                format!(
                    "the window is {} days; at most {MAX_WINDOW_DAYS}",
                    self.window_days()
                ),
            ));
        }
        if self.first_day > self.last_day {
            return Err(bad(
                "packet.first_day".into(),
                format!("{} is after last_day {}", self.first_day, self.last_day),
            ));
        }
        if self.date < self.first_day || self.date > self.last_day {
            return Err(bad(
                "packet.date".into(),
                format!(
                    "the peak day {} is outside the episode {}..={}",
                    self.date, self.first_day, self.last_day
                ),
            ));
        }
        for (field, day) in [
            ("first_day", self.first_day),
            ("last_day", self.last_day),
            ("date", self.date),
            ("peak_window_start", self.episode.peak_window_start),
        ] {
            if day < self.window_start || day > self.window_end {
                return Err(bad(
                    format!("packet.{field}"),
                    format!(
                        "{day} is outside the window {}..={}",
                        self.window_start, self.window_end
                    ),
                ));
            }
        }
        if self.signals.is_empty() {
            return Err(bad(
                "packet.signals".into(),
                "at least one signal window is needed".into(),
            ));
        }
        let mut seen = BTreeSet::new();
        for (i, w) in self.signals.iter().enumerate() {
            let at = format!("packet.signals[{i}]");
            if config.layout(&w.signal).is_none() {
                return Err(bad(
                    format!("{at}.signal"),
                    format!(
                        "`{}` is not a signal of study `{}`",
                        w.signal, config.study_id
                    ),
                ));
            }
            if !seen.insert(&w.signal) {
                return Err(bad(
                    format!("{at}.signal"),
                    format!("`{}` appears twice", w.signal),
                ));
            }
            let p = &w.population;
            check_band(
                &format!("{at}.population"),
                [p.mean, p.lo50, p.hi50, p.lo95, p.hi95],
            )?;
            let mut previous: Option<NaiveDate> = None;
            for (j, d) in w.days.iter().enumerate() {
                let at = format!("{at}.days[{j}]");
                if d.date < self.window_start || d.date > self.window_end {
                    return Err(bad(
                        format!("{at}.date"),
                        format!("{} is outside the window", d.date),
                    ));
                }
                if previous.is_some_and(|p| p >= d.date) {
                    return Err(bad(
                        format!("{at}.date"),
                        format!("{} is not after the previous row's date", d.date),
                    ));
                }
                previous = Some(d.date);
                for (name, v) in [("observed", d.observed), ("z", d.z)] {
                    if !v.is_finite() {
                        return Err(bad(format!("{at}.{name}"), format!("{v} is not finite")));
                    }
                }
                if !(d.sd.is_finite() && d.sd > 0.0) {
                    return Err(bad(
                        format!("{at}.sd"),
                        format!("{} is not a positive number", d.sd),
                    ));
                }
                if !(0.0..=1.0).contains(&d.tail_p) {
                    return Err(bad(
                        format!("{at}.tail_p"),
                        format!("{} is not in [0, 1]", d.tail_p),
                    ));
                }
                check_band(&at, [d.mean, d.lo50, d.hi50, d.lo95, d.hi95])?;
            }
        }
        self.validate_episode(config)
    }

    /// The episode fields' checks (part of [`FlagPacket::validate`]).
    fn validate_episode(&self, config: &StudyConfig) -> Result<()> {
        let bad = |field: String, reason: String| AggregatorError::invalid(field, reason);
        let e = &self.episode;
        let key_ok = !e.key.is_empty()
            && e.key.len() <= MAX_KEY_LEN
            && e.key
                .bytes()
                .all(|b| b.is_ascii_alphanumeric() || b"_.:-".contains(&b));
        if !key_ok {
            return Err(bad(
                "packet.episode_key".into(),
                format!("`{}` must match [A-Za-z0-9_.:-]{{1,{MAX_KEY_LEN}}}", e.key),
            ));
        }
        if e.key.starts_with(LEGACY_KEY_PREFIX) {
            return Err(bad(
                "packet.episode_key".into(),
                format!("`{LEGACY_KEY_PREFIX}` keys are reserved for migrated packets"),
            ));
        }
        if e.direction != Some(PatternDirection::Target) {
            return Err(bad(
                "packet.direction".into(),
                "only episodes along the study's pattern (TARGET) are sent for review".into(),
            ));
        }
        if e.alarm_days == 0 {
            return Err(bad(
                "packet.alarm_days".into(),
                "an episode has at least one alarm day".into(),
            ));
        }
        if e.peak_window_start > self.date {
            return Err(bad(
                "packet.peak_window_start".into(),
                format!(
                    "{} is after the peak day {}",
                    e.peak_window_start, self.date
                ),
            ));
        }
        if e.involved.is_empty() {
            return Err(bad(
                "packet.involved".into(),
                "at least one signal takes part in an episode".into(),
            ));
        }
        let mut seen = BTreeSet::new();
        for (i, d) in e.involved.iter().enumerate() {
            let at = format!("packet.involved[{i}]");
            if config.layout(&d.signal).is_none() {
                return Err(bad(
                    format!("{at}.signal"),
                    format!(
                        "`{}` is not a signal of study `{}`",
                        d.signal, config.study_id
                    ),
                ));
            }
            if !seen.insert(&d.signal) {
                return Err(bad(
                    format!("{at}.signal"),
                    format!("`{}` appears twice", d.signal),
                ));
            }
            if !self.signals.iter().any(|w| w.signal == d.signal) {
                return Err(bad(
                    format!("{at}.signal"),
                    format!("`{}` has no window in `signals`", d.signal),
                ));
            }
            for (name, v) in [("departure", d.departure), ("contribution", d.contribution)] {
                if !v.is_finite() {
                    return Err(bad(format!("{at}.{name}"), format!("{v} is not finite")));
                }
            }
            let sign_ok = match d.direction {
                SignalDirection::Up => d.departure >= 0.0,
                SignalDirection::Down => d.departure <= 0.0,
            };
            if !sign_ok {
                return Err(bad(
                    format!("{at}.direction"),
                    format!(
                        "{} does not match the departure {}",
                        d.direction.as_str(),
                        d.departure
                    ),
                ));
            }
        }
        Ok(())
    }

    /// Column names of the involved signals (or the one flagged signal of a
    /// migrated single-signal packet).
    pub fn involved_signals(&self) -> Vec<&str> {
        let mut out: Vec<&str> = self
            .episode
            .involved
            .iter()
            .map(|d| d.signal.as_str())
            .collect();
        if let Some(s) = &self.signal
            && !out.contains(&s.as_str())
        {
            out.push(s);
        }
        out
    }
}

/// `[mean, lo50, hi50, lo95, hi95]` must be finite with nested bands
/// `lo95 ≤ lo50 ≤ mean ≤ hi50 ≤ hi95`.
fn check_band(at: &str, [mean, lo50, hi50, lo95, hi95]: [f64; 5]) -> Result<()> {
    for (name, v) in [
        ("mean", mean),
        ("lo50", lo50),
        ("hi50", hi50),
        ("lo95", lo95),
        ("hi95", hi95),
    ] {
        if !v.is_finite() {
            return Err(AggregatorError::invalid(
                format!("{at}.{name}"),
                format!("{v} is not finite"),
            ));
        }
    }
    if !(lo95 <= lo50 && lo50 <= mean && mean <= hi50 && hi50 <= hi95) {
        return Err(AggregatorError::invalid(
            format!("{at}.lo95"),
            format!(
                "bands must nest as lo95 ≤ lo50 ≤ mean ≤ hi50 ≤ hi95; got {lo95} ≤ {lo50} ≤ {mean} ≤ {hi50} ≤ {hi95}"
            ),
        ));
    }
    Ok(())
}
