//! Flag packets: what a consenting device shares about one alarm, and the
//! checks a packet passes before the aggregator stores it.
//!
//! A packet is plain numbers the device already computed (observed values,
//! personalised bands, the population band); the aggregator validates their
//! shape and stores them for clinician review. It computes nothing from them.

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

/// Which detector raised a flag.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagKind {
    SingleDay,
    Cusum,
    MultiSignal,
}

impl FlagKind {
    /// Stable name used in the database.
    pub fn as_str(self) -> &'static str {
        match self {
            FlagKind::SingleDay => "single_day",
            FlagKind::Cusum => "cusum",
            FlagKind::MultiSignal => "multi_signal",
        }
    }

    /// Plain-language name for display.
    pub fn label(self) -> &'static str {
        match self {
            FlagKind::SingleDay => "single unusual day",
            FlagKind::Cusum => "sustained shift",
            FlagKind::MultiSignal => "several signals together",
        }
    }
}

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

/// Everything a device shares about one alarm.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FlagPacket {
    /// The flagged signal; `None` for a multi-signal flag.
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
    /// The flagged signal first, then the participant's other signals.
    pub signals: Vec<SignalWindow>,
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
        match (&self.signal, self.kind) {
            (None, FlagKind::MultiSignal) => {}
            (Some(_), FlagKind::MultiSignal) => {
                return Err(bad(
                    "packet.signal".into(),
                    "must be empty for a multi-signal flag".into(),
                ));
            }
            (None, _) => {
                return Err(bad(
                    "packet.signal".into(),
                    format!("a {} flag names its signal", self.kind.as_str()),
                ));
            }
            (Some(s), _) => {
                if config.layout(s).is_none() {
                    return Err(bad(
                        "packet.signal".into(),
                        format!("`{s}` is not a signal of study `{}`", config.study_id),
                    ));
                }
                if self.signals.first().map(|w| &w.signal) != Some(s) {
                    return Err(bad(
                        "packet.signals[0].signal".into(),
                        format!("the flagged signal `{s}` must come first"),
                    ));
                }
            }
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
        for (field, day) in [
            ("first_day", self.first_day),
            ("last_day", self.last_day),
            ("date", self.date),
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
        Ok(())
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
