//! Episodes: a participant's alarm days grouped (module docs of [`super`], "Episodes").

use chrono::NaiveDate;
use serde::Serialize;

use super::DayScore;
use crate::flags::FlagLevel;

/// One episode of a participant at given thresholds.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Episode {
    /// First day of the departure window of the episode's first alarm day.
    pub start: NaiveDate,
    /// First day the score reached the Watch threshold (the episode's first alarm day).
    pub first_alarm: NaiveDate,
    /// Day of the highest score.
    pub peak: NaiveDate,
    /// Highest score.
    pub peak_score: f64,
    /// Last alarm day so far.
    pub last_alarm: NaiveDate,
    /// Still open: the last scored day is within the merge gap of the last alarm day.
    pub ongoing: bool,
    /// Highest level reached.
    pub level: FlagLevel,
    /// Alarm days (score at or above Watch) in the episode.
    pub alarm_days: usize,
}

/// How alarm days are grouped into episodes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Grouping {
    /// An alarm day at most this many days after the previous one joins its episode.
    pub merge_gap_days: i64,
    /// An episode covers at most this many days from its first alarm day; a later alarm day
    /// starts a new episode (a persisting alarm is reviewed again).
    pub max_episode_days: i64,
}

impl Grouping {
    /// Whether an alarm day on `date` joins an episode whose first and last alarm days are
    /// `first` and `last`.
    pub fn joins(&self, first: NaiveDate, last: NaiveDate, date: NaiveDate) -> bool {
        (date - last).num_days() <= self.merge_gap_days
            && (date - first).num_days() < self.max_episode_days
    }
}

/// Groups the days whose score reaches `watch` into episodes by the rule of [`Grouping`].
/// Level Alert when some day reaches `alert` (`alert ≥ watch`).
pub fn group(days: &[DayScore], watch: f64, alert: f64, rule: Grouping) -> Vec<Episode> {
    let merge_gap_days = rule.merge_gap_days;
    let mut out: Vec<Episode> = Vec::new();
    let last_scored = days
        .iter()
        .rev()
        .find(|d| d.score.is_some())
        .map(|d| d.date);
    for d in days {
        let Some(s) = d.score else { continue };
        if s < watch {
            continue;
        }
        let level = if s >= alert {
            FlagLevel::Alert
        } else {
            FlagLevel::Watch
        };
        match out.last_mut() {
            Some(e) if rule.joins(e.first_alarm, e.last_alarm, d.date) => {
                e.last_alarm = d.date;
                e.alarm_days += 1;
                e.level = e.level.max(level);
                if s > e.peak_score {
                    e.peak_score = s;
                    e.peak = d.date;
                }
            }
            _ => out.push(Episode {
                start: d.window_start,
                first_alarm: d.date,
                peak: d.date,
                peak_score: s,
                last_alarm: d.date,
                ongoing: false,
                level,
                alarm_days: 1,
            }),
        }
    }
    if let (Some(e), Some(last)) = (out.last_mut(), last_scored) {
        e.ongoing = (last - e.last_alarm).num_days() < merge_gap_days;
    }
    out
}

/// Number of episodes at each threshold of `edges` (ascending), at one level: for each edge
/// `h`, the number of groups of days with score ≥ `h` under the rule of [`group`].
/// One pass per edge; `O(edges × days)`.
pub fn episode_counts(days: &[DayScore], edges: &[f64], rule: Grouping) -> Vec<u64> {
    let scored: Vec<(NaiveDate, f64)> = days
        .iter()
        .filter_map(|d| d.score.map(|s| (d.date, s)))
        .collect();
    edges
        .iter()
        .map(|&h| {
            let mut n = 0u64;
            let mut open: Option<(NaiveDate, NaiveDate)> = None;
            for &(date, s) in &scored {
                if s < h {
                    continue;
                }
                match &mut open {
                    Some((first, last)) if rule.joins(*first, *last, date) => *last = date,
                    _ => {
                        n += 1;
                        open = Some((date, date));
                    }
                }
            }
            n
        })
        .collect()
}
