//! Episodes as the device's flags: runs the detector of [`crate::detect`] on one participant
//! with the shared prior's exact filter and the study's calibration, groups alarm days into
//! episodes, and states for each episode its span, peak, level, direction, the signals
//! involved and a plain-language reason with the study's odds.
//!
//! # What an episode flag says
//! - **Span**: start (first day of the departure window of its first alarm day), first alarm
//!   day, peak day and score, end so far (last alarm day), and whether it is still ongoing
//!   ([`crate::detect::episodes::group`]).
//! - **Level**: the highest reached (Alert when a day reached the Alert threshold).
//! - **Direction**: [`EpisodeDirection::Target`] for the study's pattern (acute illness:
//!   resting HR, skin temperature, respiratory rate, sleep up; HRV, steps down), the only direction that is
//!   alerted and may be sent for review; [`EpisodeDirection::Mirror`] for the opposite
//!   direction (`DayScore.mirror`), recorded in the device's outputs only.
//! - **Signals**: for a target episode, each signal in the peak day's score with its direction
//!   (sign of its window departure), its window departure `Z_{j,w}` and its share of the score.
//! - **Odds** (the reason): how often an episode peaking this high starts on the study's
//!   calibration data, [`crate::detect::calibration::EpisodeHistogram::rate_at`] stated by
//!   [`crate::detect::calibration::once_in`]; where the model's nominal Gaussian rate
//!   ([`crate::detect::calibration::nominal_rate`]) differs by more than a factor of
//!   [`ODDS_DISAGREE_FACTOR`], both. Without a study calibration
//!   ([`StudyCalibration::uncalibrated`]) every reason starts with "UNCALIBRATED" and gives the
//!   nominal rate only, saying so.
//!
//! # Daily rows
//! Each observed signal-day becomes a [`DayRow`] against the guarded baseline: bands
//! `mean ± z_q·sd` (sd with the personal scale), `z` the scaled residual, its two-sided tail
//! probability, whether it was kept out of the baseline (the detector's protection rule: the
//! day's score reached `protect_score` for a signal of the pattern, or `|r| > clip_z`), and
//! its status (baseline building while the signal is in its cold start; flagged on a target
//! alarm day when the signal pushed the score towards the pattern).

use std::fmt::Write as _;

use anyhow::Context;
use chrono::NaiveDate;
use serde::Serialize;

use crate::cohort::ParticipantSeries;
use crate::detect::calibration::{StudyCalibration, nominal_rate, once_in};
use crate::detect::episodes::{Episode, group};
use crate::detect::joint::{N_SIGNALS, TargetPattern};
use crate::detect::{DayScore, DetectConfig, ParticipantScores, score_participant};
use crate::flags::FlagLevel;
use crate::packets::{DayRow, PacketDayStatus};
use crate::prior::PriorParams;
use crate::prospective::{DailyFilter, StateSpacePrior};
use crate::signal::Signal;

/// The calibrated and the nominal rate "disagree" when one exceeds the other by more than
/// this factor (or exactly one of them is zero); the reason then states both.
pub const ODDS_DISAGREE_FACTOR: f64 = 2.0;

/// Beyond once in this many participant-months the model's nominal rate is not stated as a
/// number: that far out in a Gaussian tail the model is not a reliable guide (real residuals
/// have heavier tails), so the reason says "less often than" instead.
pub const NOMINAL_MONTHS_CAP: f64 = 10_000.0;

/// Standard-normal quantiles of the central 50% and 95% bands.
const Z50: f64 = 0.674_489_750_196_081_7;
const Z95: f64 = 1.959_963_984_540_054;

/// Whether a signal was above or below its expected level.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SignalDirection {
    Up,
    Down,
}

impl SignalDirection {
    /// The direction of a signed departure (0 counts as up).
    pub fn of(departure: f64) -> SignalDirection {
        if departure < 0.0 {
            SignalDirection::Down
        } else {
            SignalDirection::Up
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            SignalDirection::Up => "up",
            SignalDirection::Down => "down",
        }
    }
}

/// An episode's direction relative to the study's pattern.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum EpisodeDirection {
    /// Along the pattern: alerted, and sent for review with consent.
    Target,
    /// Opposite: recorded in the device's outputs, never alerted or sent.
    Mirror,
}

/// One signal's part in a target episode's peak score.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Departure {
    #[serde(serialize_with = "crate::prospective::serialize_signal")]
    pub signal: Signal,
    pub direction: SignalDirection,
    /// Window departure `Z_{j,w}` over the peak's window (SDs of the personal baseline).
    pub departure: f64,
    /// Share of the peak score.
    pub contribution: f64,
}

/// One episode of one participant, as the device reports it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EpisodeFlag {
    /// Stable as the episode grows: `ep-<first alarm day>` (`mirror-…` for a mirror episode).
    pub key: String,
    pub direction: EpisodeDirection,
    /// Highest level reached (a mirror episode's is the level it would have had).
    pub level: FlagLevel,
    pub start: NaiveDate,
    pub first_alarm: NaiveDate,
    pub peak: NaiveDate,
    pub peak_score: f64,
    /// Last alarm day so far.
    pub end: NaiveDate,
    pub ongoing: bool,
    pub alarm_days: usize,
    /// First day of the window that gave the peak score (the peak day for a mirror episode,
    /// whose window is not recorded).
    pub peak_window_start: NaiveDate,
    /// Signals in the peak score, largest contribution first (empty for a mirror episode).
    pub involved: Vec<Departure>,
    pub reason: String,
}

impl EpisodeFlag {
    /// Alerted: a target episode (mirror episodes never are).
    pub fn alerted(&self) -> bool {
        self.direction == EpisodeDirection::Target
    }
}

/// One participant's detection on the device.
#[derive(Debug, Clone)]
pub struct EpisodeDetection {
    pub participant: String,
    pub scores: ParticipantScores,
    /// Every observed signal-day, in date order.
    pub rows: Vec<DayRow>,
    /// Target and mirror episodes, by first alarm day.
    pub episodes: Vec<EpisodeFlag>,
    /// Whether the thresholds came from the study's data.
    pub calibrated: bool,
}

impl EpisodeDetection {
    /// Target episodes at or above `level` (what is sent for review, with consent).
    pub fn for_review(&self, level: FlagLevel) -> impl Iterator<Item = &EpisodeFlag> {
        self.episodes
            .iter()
            .filter(move |e| e.alerted() && e.level >= level)
    }
}

/// Scores `series` with the exact filter of each shared prior in `priors` (signals without a
/// prior are left out), the study's `calibration` and detector settings `cfg` (its
/// `min_baseline_days` is the cold start), and groups the alarm days into episodes.
///
/// # Errors
/// An invalid prior or configuration, or a detection error naming the participant and signal.
pub fn detect_episodes(
    series: &ParticipantSeries,
    priors: &[PriorParams],
    calibration: &StudyCalibration,
    cfg: &DetectConfig,
) -> anyhow::Result<EpisodeDetection> {
    let mut models: Vec<(Signal, StateSpacePrior)> = Vec::new();
    for p in priors {
        if !series.values.contains_key(&p.signal) {
            continue;
        }
        let model =
            StateSpacePrior::new(p).with_context(|| format!("shared prior of {}", p.signal))?;
        models.push((p.signal, model));
    }
    let predictors: Vec<(Signal, DailyFilter)> = models
        .iter()
        .map(|(s, m)| (*s, DailyFilter::new(m)))
        .collect();
    let scores = score_participant(series, predictors, &calibration.correlation, cfg)
        .with_context(|| format!("detection for participant {}", series.participant))?;
    let (watch, alert) = (calibration.watch.threshold, calibration.alert.threshold);
    let rule = cfg.grouping();
    let mut episodes: Vec<EpisodeFlag> = group(&scores.days, watch, alert.max(watch), rule)
        .into_iter()
        .map(|e| target_flag(&e, &scores.days, calibration, cfg))
        .collect();
    let mirrored: Vec<DayScore> = scores
        .days
        .iter()
        .map(|d| DayScore {
            score: d.mirror,
            window_start: d.date,
            ..d.clone()
        })
        .collect();
    episodes.extend(
        group(&mirrored, watch, alert.max(watch), rule)
            .into_iter()
            .map(|e| mirror_flag(&e, calibration, cfg)),
    );
    episodes.sort_by(|a, b| (a.first_alarm, a.key.as_str()).cmp(&(b.first_alarm, b.key.as_str())));
    let rows = day_rows(&scores, watch, cfg);
    Ok(EpisodeDetection {
        participant: series.participant.clone(),
        scores,
        rows,
        episodes,
        calibrated: calibration.is_calibrated(),
    })
}

fn target_flag(
    e: &Episode,
    days: &[DayScore],
    calibration: &StudyCalibration,
    cfg: &DetectConfig,
) -> EpisodeFlag {
    let peak = days
        .iter()
        .find(|d| d.date == e.peak)
        .expect("an episode's peak is one of its days");
    let mut involved: Vec<Departure> = Signal::ALL
        .iter()
        .enumerate()
        .filter_map(|(j, &signal)| {
            let departure = peak.departures[j]?;
            let contribution = peak.contributions[j];
            let in_score = cfg.pattern.weights[j] != 0.0 || contribution.abs() > 1e-12;
            in_score.then_some(Departure {
                signal,
                direction: SignalDirection::of(departure),
                departure,
                contribution,
            })
        })
        .collect();
    involved.sort_by(|a, b| b.contribution.total_cmp(&a.contribution));
    let mut flag = EpisodeFlag {
        key: format!("ep-{}", e.first_alarm),
        direction: EpisodeDirection::Target,
        level: e.level,
        start: e.start,
        first_alarm: e.first_alarm,
        peak: e.peak,
        peak_score: e.peak_score,
        end: e.last_alarm,
        ongoing: e.ongoing,
        alarm_days: e.alarm_days,
        peak_window_start: peak.window_start,
        involved,
        reason: String::new(),
    };
    flag.reason = target_reason(&flag, calibration, &cfg.pattern);
    flag
}

fn mirror_flag(e: &Episode, calibration: &StudyCalibration, cfg: &DetectConfig) -> EpisodeFlag {
    let mut reason = String::new();
    if !calibration.is_calibrated() {
        reason.push_str("UNCALIBRATED (no study calibration yet; nominal thresholds). ");
    }
    let _ = write!(
        reason,
        "Departure opposite to {} from {} to {}{}, peak score {:.2} on {}. Recorded only: the \
         opposite direction is never alerted or sent for review.",
        pattern_text(&cfg.pattern),
        e.start,
        e.last_alarm,
        if e.ongoing { " (ongoing)" } else { "" },
        e.peak_score,
        e.peak
    );
    EpisodeFlag {
        key: format!("mirror-{}", e.first_alarm),
        direction: EpisodeDirection::Mirror,
        level: e.level,
        start: e.start,
        first_alarm: e.first_alarm,
        peak: e.peak,
        peak_score: e.peak_score,
        end: e.last_alarm,
        ongoing: e.ongoing,
        alarm_days: e.alarm_days,
        peak_window_start: e.peak,
        involved: Vec::new(),
        reason,
    }
}

/// "the acute-illness direction (up: …; down: …)" for `pattern`.
pub fn pattern_text(pattern: &TargetPattern) -> String {
    let names = |sign: f64| -> Vec<&'static str> {
        (0..N_SIGNALS)
            .filter(|&j| pattern.weights[j] * sign > 0.0)
            .map(|j| Signal::ALL[j].label())
            .collect()
    };
    let (up, down) = (names(1.0), names(-1.0));
    let name = if *pattern == TargetPattern::ACUTE_ILLNESS {
        "the acute-illness direction"
    } else {
        "the study's direction"
    };
    let mut parts = Vec::new();
    if !up.is_empty() {
        parts.push(format!("up: {}", up.join(", ")));
    }
    if !down.is_empty() {
        parts.push(format!("down: {}", down.join(", ")));
    }
    format!("{name} ({})", parts.join("; "))
}

/// The reason of a target episode (module docs, "Odds").
pub fn target_reason(
    flag: &EpisodeFlag,
    calibration: &StudyCalibration,
    pattern: &TargetPattern,
) -> String {
    let mut out = String::new();
    let calibrated = calibration.is_calibrated();
    if !calibrated {
        out.push_str("UNCALIBRATED: this study has no calibration yet. ");
    }
    let level = match flag.level {
        FlagLevel::Alert => "Alert",
        FlagLevel::Watch => "Watch",
    };
    let signals: Vec<String> = flag
        .involved
        .iter()
        .map(|d| {
            format!(
                "{} {} (window departure {:+.1} SD)",
                d.signal.label(),
                d.direction.as_str(),
                d.departure
            )
        })
        .collect();
    let window_days = (flag.peak - flag.peak_window_start).num_days() + 1;
    let _ = write!(
        out,
        "{level} episode from {} to {}{}: {} — together in {}. Peak score {:.2} on {} over the \
         {window_days} day{} from {}; {} alarm day{}.",
        flag.start,
        flag.end,
        if flag.ongoing { " (ongoing)" } else { "" },
        if signals.is_empty() {
            "no signal recorded".to_owned()
        } else {
            signals.join(", ")
        },
        pattern_text(pattern),
        flag.peak_score,
        flag.peak,
        if window_days == 1 { "" } else { "s" },
        flag.peak_window_start,
        flag.alarm_days,
        if flag.alarm_days == 1 { "" } else { "s" },
    );
    let nominal = nominal_rate(flag.peak_score);
    if calibrated {
        let rate = calibration.histogram.rate_at(flag.peak_score);
        let _ = write!(
            out,
            " On this study's calibration data ({:.0} participant-months; thresholds Alert {:.1}, \
             Watch {:.1}), {}.",
            calibration.participant_months(),
            calibration.alert.threshold,
            calibration.watch.threshold,
            if rate > 0.0 {
                format!("an episode peaking this high starts {}", once_in(rate))
            } else {
                "no episode peaked this high".to_owned()
            }
        );
        if disagree(rate, nominal) {
            let _ = write!(
                out,
                " By the model's Gaussian tail alone a day this high would be expected {}; \
                 the study's data are the better guide.",
                nominal_once_in(nominal)
            );
        }
    } else {
        let _ = write!(
            out,
            " Thresholds (Alert {:.2}, Watch {:.2}) follow the nominal Gaussian rule, not this \
             study's data. By the model alone a day this high would be expected {}; in \
             practice scores this high are usually more frequent than that.",
            calibration.alert.threshold,
            calibration.watch.threshold,
            nominal_once_in(nominal)
        );
    }
    out
}

/// [`once_in`] for the model's nominal rate, "less often than once in 10000 participant-months
/// (too far in the model's tail to put a figure on)" beyond [`NOMINAL_MONTHS_CAP`].
fn nominal_once_in(rate_per_month: f64) -> String {
    if rate_per_month * NOMINAL_MONTHS_CAP < 1.0 {
        format!(
            "less often than once in {NOMINAL_MONTHS_CAP:.0} participant-months (too far in \
             the model's tail to put a figure on)"
        )
    } else {
        once_in(rate_per_month)
    }
}

/// Whether two rates differ by more than [`ODDS_DISAGREE_FACTOR`] (or one is zero).
fn disagree(a: f64, b: f64) -> bool {
    if a <= 0.0 || b <= 0.0 {
        return (a <= 0.0) != (b <= 0.0);
    }
    (a / b).max(b / a) > ODDS_DISAGREE_FACTOR
}

/// The daily rows (module docs, "Daily rows").
fn day_rows(scores: &ParticipantScores, watch: f64, cfg: &DetectConfig) -> Vec<DayRow> {
    use statrs::distribution::{ContinuousCDF, Normal};
    let normal = Normal::standard();
    let mut out = Vec::with_capacity(scores.signal_days.len());
    let mut days = scores.days.iter().peekable();
    for s in &scores.signal_days {
        while days.next_if(|d| d.date < s.date).is_some() {}
        let day = days.peek().filter(|d| d.date == s.date);
        let j = crate::detect::joint::signal_index(s.signal);
        let score = day.and_then(|d| d.score);
        let in_pattern = cfg.pattern.weights[j] != 0.0;
        let protected = (!s.cold && s.residual.abs() > cfg.clip_z)
            || (in_pattern && score.is_some_and(|x| x >= cfg.protect_score));
        let pushed = day.is_some_and(|d| d.contributions[j] > 0.0);
        let status = if s.cold {
            PacketDayStatus::BuildingBaseline
        } else if score.is_some_and(|x| x >= watch) && pushed {
            PacketDayStatus::Flagged
        } else {
            PacketDayStatus::Normal
        };
        out.push(DayRow {
            signal: s.signal,
            date: s.date,
            observed: s.observed,
            mean: s.mean,
            sd: s.sd,
            lo50: s.mean - Z50 * s.sd,
            hi50: s.mean + Z50 * s.sd,
            lo95: s.mean - Z95 * s.sd,
            hi95: s.mean + Z95 * s.sd,
            z: s.residual,
            tail_p: (2.0 * normal.sf(s.residual.abs())).clamp(0.0, 1.0),
            conditioned: !protected,
            status,
        });
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::detect::calibration::{Calibrated, EpisodeHistogram, N_EDGES};
    use crate::detect::joint::Correlation;

    fn flag(peak_score: f64) -> EpisodeFlag {
        let d = |s: &str| s.parse::<NaiveDate>().unwrap();
        EpisodeFlag {
            key: "ep-2024-04-09".into(),
            direction: EpisodeDirection::Target,
            level: FlagLevel::Alert,
            start: d("2024-04-08"),
            first_alarm: d("2024-04-09"),
            peak: d("2024-04-11"),
            peak_score,
            end: d("2024-04-11"),
            ongoing: true,
            alarm_days: 3,
            peak_window_start: d("2024-04-08"),
            involved: vec![
                Departure {
                    signal: Signal::RestingHr,
                    direction: SignalDirection::Up,
                    departure: 3.1,
                    contribution: 2.2,
                },
                Departure {
                    signal: Signal::HrvRmssd,
                    direction: SignalDirection::Down,
                    departure: -2.4,
                    contribution: 1.7,
                },
            ],
            reason: String::new(),
        }
    }

    /// A study histogram over 1,000 participant-months in which episodes peaking at 4.0 or
    /// more started 25 times: 1 in 40 participant-months.
    fn study() -> StudyCalibration {
        let mut episodes = vec![0u64; N_EDGES];
        for (i, n) in episodes.iter_mut().enumerate() {
            // 0.1-wide grid: edges 0.0 … 14.9; 25 episodes at and above 4.0, 2,000 below.
            *n = if i >= 40 { 25 } else { 2_000 };
        }
        let histogram = EpisodeHistogram {
            episodes,
            scored_days: (1_000.0 * crate::detect::calibration::DAYS_PER_MONTH) as u64,
        };
        StudyCalibration {
            budget_per_month: 0.3,
            moment_devices: 0,
            histogram_devices: 0,
            histogram_group: None,
            pattern: TargetPattern::ACUTE_ILLNESS,
            correlation: Correlation::identity(),
            alert: Calibrated {
                threshold: 4.0,
                rate: 0.025,
                capped: false,
            },
            watch: Calibrated {
                threshold: 3.0,
                rate: 0.2,
                capped: false,
            },
            histogram,
        }
    }

    #[test]
    fn calibrated_reason_states_the_study_odds_and_the_nominal_when_they_disagree() {
        // Hand computation: rate_at(4.2) = 25 / 1,000 = 0.025 per participant-month → "once
        // in 40". Nominal: (1 − Φ(4.2)) · 30.4375 = 1.335e-5 · 30.4375 ≈ 4.06e-4 per month →
        // once in 2,461.7 months, printed 2462 (1 − Φ(4.2) = 1.3346e-5, Abramowitz & Stegun
        // Table 26.1). They disagree by far more than a factor of 2: both are stated.
        let text = target_reason(&flag(4.2), &study(), &TargetPattern::ACUTE_ILLNESS);
        assert!(
            text.contains("about once in 40 participant-months"),
            "{text}"
        );
        assert!(text.contains("Gaussian tail alone"), "{text}");
        assert!(text.contains("starts about once in 40"), "{text}");
        assert!(
            text.contains("about once in 2462 participant-months"),
            "{text}"
        );
        assert!(!text.contains("UNCALIBRATED"), "{text}");
        assert!(text.contains("resting heart rate up"), "{text}");
        assert!(text.contains("down (window departure -2.4 SD)"), "{text}");
        assert!(text.contains("acute-illness direction"), "{text}");
        assert!(
            !text.contains("million"),
            "no nominal-only tiny odds: {text}"
        );
    }

    #[test]
    fn uncalibrated_reason_says_so_and_gives_the_nominal_rate_only() {
        let cal = StudyCalibration::uncalibrated();
        // Nominal thresholds: Φ⁻¹(1 − 0.3/30.4375) = 2.332 and Φ⁻¹(1 − 0.9/30.4375) = 1.887
        // (statrs inverse CDF; common-table values 2.33 and 1.89).
        assert!(
            (cal.alert.threshold - 2.332).abs() < 1e-3,
            "{:?}",
            cal.alert
        );
        assert!(
            (cal.watch.threshold - 1.887).abs() < 1e-3,
            "{:?}",
            cal.watch
        );
        assert!(!cal.is_calibrated());
        let text = target_reason(&flag(4.2), &cal, &TargetPattern::ACUTE_ILLNESS);
        assert!(text.starts_with("UNCALIBRATED"), "{text}");
        assert!(text.contains("nominal Gaussian rule"), "{text}");
        assert!(!text.contains("calibration data"), "{text}");
        // Once in 2,462 months is within the cap and stated; a peak of 6.0 (1 − Φ(6) ≈ 1e-9,
        // once in about 3e7 months) is past it and stated as "less often than".
        assert!(text.contains("once in 2462"), "{text}");
        let far = target_reason(&flag(6.0), &cal, &TargetPattern::ACUTE_ILLNESS);
        assert!(far.contains("less often than once in 10000"), "{far}");
    }

    #[test]
    fn rates_within_a_factor_of_two_agree() {
        // Common practice: state one figure when two estimates agree within a factor of 2.
        assert!(!disagree(0.025, 0.04));
        assert!(disagree(0.025, 0.06));
        assert!(disagree(0.0, 0.01));
        assert!(!disagree(0.0, 0.0));
    }
}
