//! Empirical calibration of the alert thresholds from fixed-bin episode counts (module docs
//! of [`super`], "Calibration").

use serde::{Deserialize, Serialize};

use super::DayScore;
use super::episodes::{Grouping, episode_counts};

/// Days per month used for every per-month rate (365.25 / 12).
pub const DAYS_PER_MONTH: f64 = 30.4375;

/// Lowest threshold edge of the calibration grid.
pub const EDGE_MIN: f64 = 0.0;
/// Spacing of the calibration grid (score units).
pub const EDGE_STEP: f64 = 0.1;
/// Number of edges: thresholds 0.0, 0.1, …, 14.9.
pub const N_EDGES: usize = 150;

/// The fixed threshold grid every device counts on.
pub fn edges() -> Vec<f64> {
    (0..N_EDGES)
        .map(|i| EDGE_MIN + EDGE_STEP * i as f64)
        .collect()
}

/// What a device sends for calibration: for each threshold of [`edges`], the number of
/// episodes its own score series would have had at that threshold, and the number of scored
/// days. Counts only; no score or daily value leaves the device.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpisodeHistogram {
    pub episodes: Vec<u64>,
    pub scored_days: u64,
}

impl Default for EpisodeHistogram {
    fn default() -> EpisodeHistogram {
        EpisodeHistogram {
            episodes: vec![0; N_EDGES],
            scored_days: 0,
        }
    }
}

impl EpisodeHistogram {
    /// The histogram of one participant's scores.
    pub fn from_days(days: &[DayScore], rule: Grouping) -> EpisodeHistogram {
        EpisodeHistogram {
            episodes: episode_counts(days, &edges(), rule),
            scored_days: days.iter().filter(|d| d.score.is_some()).count() as u64,
        }
    }

    /// Adds another device's counts (what the aggregator does).
    pub fn merge(&mut self, other: &EpisodeHistogram) {
        for (a, b) in self.episodes.iter_mut().zip(&other.episodes) {
            *a += b;
        }
        self.scored_days += other.scored_days;
    }

    /// Episodes per participant-month at edge `i`.
    pub fn rate(&self, i: usize) -> f64 {
        if self.scored_days == 0 {
            return 0.0;
        }
        self.episodes[i] as f64 / (self.scored_days as f64 / DAYS_PER_MONTH)
    }

    /// The lowest grid threshold at and above which every edge's episode rate is at most
    /// `per_month` (scanning down from the top: far below the useful range alarm days run
    /// together into few long episodes, so the rate is not monotone there); the top edge,
    /// marked [`Calibrated::capped`], if even that exceeds the budget.
    pub fn threshold_for(&self, per_month: f64) -> Calibrated {
        let mut best = None;
        for i in (0..N_EDGES).rev() {
            if self.rate(i) > per_month {
                break;
            }
            best = Some(i);
        }
        match best {
            Some(i) => Calibrated {
                threshold: edges()[i],
                rate: self.rate(i),
                capped: false,
            },
            None => Calibrated {
                threshold: edges()[N_EDGES - 1],
                rate: self.rate(N_EDGES - 1),
                capped: true,
            },
        }
    }

    /// How often an episode with a peak this high starts on this study's data: the episode
    /// rate at the highest grid edge not above `score`, per participant-month.
    pub fn rate_at(&self, score: f64) -> f64 {
        let i = (((score - EDGE_MIN) / EDGE_STEP).floor().max(0.0) as usize).min(N_EDGES - 1);
        self.rate(i)
    }
}

/// A threshold chosen from a histogram.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Calibrated {
    pub threshold: f64,
    /// Episode rate per participant-month at that threshold on the calibration data.
    pub rate: f64,
    /// True when even the top of the grid exceeds the budget.
    pub capped: bool,
}

/// "about once in 40 participant-months" for a rate per participant-month.
pub fn once_in(rate_per_month: f64) -> String {
    if rate_per_month <= 0.0 {
        return "not once on this study's data so far".into();
    }
    let months = 1.0 / rate_per_month;
    if months < 1.0 {
        format!("about {:.1} times per participant-month", rate_per_month)
    } else if months < 10.0 {
        format!("about once in {months:.1} participant-months")
    } else {
        format!("about once in {:.0} participant-months", months)
    }
}
