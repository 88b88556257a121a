//! The detector's calibration statistics as the aggregator sees them: two
//! stages of fixed-length arrays that it validates, stores per device and
//! sums element by element. It never computes a correlation or a threshold:
//! devices do that from the published sums (the math lives in
//! `plimsoll-device`'s `detect` module, which this crate does not depend on).
//!
//! Layouts (the proto's `ResidualMomentSums` and `EpisodeCounts`):
//! - residual moments: `cross_products` and `pair_days`, each
//!   [`MOMENT_SIGNALS`]² entries, row-major over a fixed signal order;
//! - episode histogram: `episodes`, [`HISTOGRAM_EDGES`] counts on the fixed
//!   threshold grid, and `scored_days`.

use serde::{Deserialize, Serialize};

use crate::error::{AggregatorError, Result};

/// Signals in the residual-moment matrices (fixed order, see the proto).
pub const MOMENT_SIGNALS: usize = 6;

/// Thresholds of the fixed calibration grid (0.0, 0.1, …, 14.9).
pub const HISTOGRAM_EDGES: usize = 150;

/// Largest day count one device may report (about 2,700 years of days). It
/// keeps sums over any cohort far from overflow and catches a negative
/// number sent as `uint64` (which arrives as a value above 2⁶³).
pub const MAX_DAYS_PER_DEVICE: u64 = 1_000_000;

/// A stage of the calibration, in order.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DetectionStage {
    ResidualMoments,
    EpisodeHistogram,
}

impl DetectionStage {
    pub const ALL: [DetectionStage; 2] = [
        DetectionStage::ResidualMoments,
        DetectionStage::EpisodeHistogram,
    ];

    /// The name stored in the database and used in messages.
    pub fn as_str(self) -> &'static str {
        match self {
            DetectionStage::ResidualMoments => "residual_moments",
            DetectionStage::EpisodeHistogram => "episode_histogram",
        }
    }

    pub fn parse(s: &str) -> Option<DetectionStage> {
        DetectionStage::ALL.into_iter().find(|st| st.as_str() == s)
    }

    /// Position in [`DetectionStage::ALL`].
    pub fn index(self) -> usize {
        self as usize
    }
}

/// One device's submission to a stage, or a stage's published sum.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DetectionStats {
    /// Row-major [`MOMENT_SIGNALS`]² sums of residual cross-products
    /// (dimensionless) and pair counts (days).
    ResidualMoments {
        cross_products: Vec<f64>,
        pair_days: Vec<u64>,
    },
    /// Episodes per grid threshold and scored days.
    EpisodeHistogram {
        episodes: Vec<u64>,
        scored_days: u64,
    },
}

impl DetectionStats {
    pub fn stage(&self) -> DetectionStage {
        match self {
            DetectionStats::ResidualMoments { .. } => DetectionStage::ResidualMoments,
            DetectionStats::EpisodeHistogram { .. } => DetectionStage::EpisodeHistogram,
        }
    }

    /// All zeros in `stage`'s layout (the sum over no device).
    pub fn zero(stage: DetectionStage) -> DetectionStats {
        let n = MOMENT_SIGNALS * MOMENT_SIGNALS;
        match stage {
            DetectionStage::ResidualMoments => DetectionStats::ResidualMoments {
                cross_products: vec![0.0; n],
                pair_days: vec![0; n],
            },
            DetectionStage::EpisodeHistogram => DetectionStats::EpisodeHistogram {
                episodes: vec![0; HISTOGRAM_EDGES],
                scored_days: 0,
            },
        }
    }

    /// Checks one device's submission; errors name the field as the proto
    /// does (`residual_moments.pair_days[7]`).
    pub fn validate(&self) -> Result<()> {
        match self {
            DetectionStats::ResidualMoments {
                cross_products,
                pair_days,
            } => validate_moments(cross_products, pair_days),
            DetectionStats::EpisodeHistogram {
                episodes,
                scored_days,
            } => validate_histogram(episodes, *scored_days),
        }
    }

    /// Adds `other` (validated, same stage) element by element.
    pub fn add(&mut self, other: &DetectionStats) {
        match (self, other) {
            (
                DetectionStats::ResidualMoments {
                    cross_products,
                    pair_days,
                },
                DetectionStats::ResidualMoments {
                    cross_products: c,
                    pair_days: n,
                },
            ) => {
                for (a, b) in cross_products.iter_mut().zip(c) {
                    *a += b;
                }
                for (a, b) in pair_days.iter_mut().zip(n) {
                    *a += b;
                }
            }
            (
                DetectionStats::EpisodeHistogram {
                    episodes,
                    scored_days,
                },
                DetectionStats::EpisodeHistogram {
                    episodes: e,
                    scored_days: d,
                },
            ) => {
                for (a, b) in episodes.iter_mut().zip(e) {
                    *a += b;
                }
                *scored_days += d;
            }
            (this, other) => panic!(
                "adding {} statistics to a {} sum",
                other.stage().as_str(),
                this.stage().as_str()
            ),
        }
    }
}

fn count_ok(field: String, n: u64) -> Result<()> {
    if n > MAX_DAYS_PER_DEVICE {
        return Err(AggregatorError::invalid(
            field,
            format!(
                "{n} is above {MAX_DAYS_PER_DEVICE} days (a negative count sent as uint64 \
                 arrives as a number above 2^63)"
            ),
        ));
    }
    Ok(())
}

fn validate_moments(cross: &[f64], days: &[u64]) -> Result<()> {
    let n = MOMENT_SIGNALS;
    for (name, len) in [
        ("residual_moments.cross_products", cross.len()),
        ("residual_moments.pair_days", days.len()),
    ] {
        if len != n * n {
            return Err(AggregatorError::invalid(
                name,
                format!("expected {} values ({n}×{n}, row-major), got {len}", n * n),
            ));
        }
    }
    for (i, v) in cross.iter().enumerate() {
        if !v.is_finite() {
            return Err(AggregatorError::invalid(
                format!("residual_moments.cross_products[{i}]"),
                format!("{v} is not finite"),
            ));
        }
    }
    for (i, &d) in days.iter().enumerate() {
        count_ok(format!("residual_moments.pair_days[{i}]"), d)?;
    }
    for j in 0..n {
        let jj = j * n + j;
        if cross[jj] < 0.0 {
            return Err(AggregatorError::invalid(
                format!("residual_moments.cross_products[{jj}]"),
                format!("a sum of squares cannot be negative, got {}", cross[jj]),
            ));
        }
        for k in 0..n {
            let (jk, kj, kk) = (j * n + k, k * n + j, k * n + k);
            if cross[jk] != cross[kj] {
                return Err(AggregatorError::invalid(
                    format!("residual_moments.cross_products[{jk}]"),
                    format!("{} differs from entry {kj} ({})", cross[jk], cross[kj]),
                ));
            }
            if days[jk] != days[kj] {
                return Err(AggregatorError::invalid(
                    format!("residual_moments.pair_days[{jk}]"),
                    format!("{} differs from entry {kj} ({})", days[jk], days[kj]),
                ));
            }
            if days[jk] > days[jj].min(days[kk]) {
                return Err(AggregatorError::invalid(
                    format!("residual_moments.pair_days[{jk}]"),
                    format!(
                        "{} pair days exceed the days of one of the two signals ({} and {})",
                        days[jk], days[jj], days[kk]
                    ),
                ));
            }
        }
    }
    Ok(())
}

fn validate_histogram(episodes: &[u64], scored_days: u64) -> Result<()> {
    if episodes.len() != HISTOGRAM_EDGES {
        return Err(AggregatorError::invalid(
            "episode_histogram.episodes",
            format!(
                "expected {HISTOGRAM_EDGES} counts (one per grid threshold), got {}",
                episodes.len()
            ),
        ));
    }
    count_ok("episode_histogram.scored_days".into(), scored_days)?;
    for (i, &e) in episodes.iter().enumerate() {
        if e > scored_days {
            return Err(AggregatorError::invalid(
                format!("episode_histogram.episodes[{i}]"),
                format!(
                    "{e} episodes exceed the {scored_days} scored days (an episode has at \
                     least one day){}",
                    if e > MAX_DAYS_PER_DEVICE {
                        "; a negative count sent as uint64 arrives as a number above 2^63"
                    } else {
                        ""
                    }
                ),
            ));
        }
    }
    Ok(())
}

/// One stage's state as a device sees it.
#[derive(Debug, Clone, PartialEq)]
pub struct StageView {
    pub stage: DetectionStage,
    /// The stage accepts submissions.
    pub open: bool,
    pub complete: bool,
    pub devices_submitted: u32,
    /// Enrolled devices that are not revoked.
    pub devices_expected: u32,
    /// The calling device's submission is stored.
    pub device_submitted: bool,
    /// After this the stage completes with a quorum; `None` while not open.
    pub deadline_ms: Option<i64>,
    pub completed_ms: Option<i64>,
    /// The published sum, once complete.
    pub sum: Option<DetectionStats>,
    /// When `sum` is over the calling device's group only: its label and device count.
    pub group: Option<(String, u32)>,
}

/// Result of an accepted submission.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StatsOutcome {
    pub devices_submitted: u32,
    pub stage_complete: bool,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn moments() -> DetectionStats {
        let n = MOMENT_SIGNALS;
        let mut cross = vec![0.0; n * n];
        let mut days = vec![0; n * n];
        for j in 0..n {
            cross[j * n + j] = 10.0;
            days[j * n + j] = 20;
        }
        cross[1] = 2.0;
        cross[n] = 2.0;
        days[1] = 15;
        days[n] = 15;
        DetectionStats::ResidualMoments {
            cross_products: cross,
            pair_days: days,
        }
    }

    #[test]
    fn a_consistent_submission_passes_and_sums_elementwise() {
        let m = moments();
        m.validate().unwrap();
        let mut sum = DetectionStats::zero(DetectionStage::ResidualMoments);
        sum.add(&m);
        sum.add(&m);
        let DetectionStats::ResidualMoments {
            cross_products,
            pair_days,
        } = sum
        else {
            unreachable!()
        };
        // Hand computation: twice each entry.
        assert_eq!(cross_products[1], 4.0);
        assert_eq!(pair_days[0], 40);
    }

    #[test]
    fn asymmetric_or_impossible_counts_are_refused_naming_the_entry() {
        // Structural rules of a sum of cross-products (common practice).
        let DetectionStats::ResidualMoments {
            cross_products,
            mut pair_days,
        } = moments()
        else {
            unreachable!()
        };
        pair_days[1] = 25;
        pair_days[MOMENT_SIGNALS] = 25;
        let err = DetectionStats::ResidualMoments {
            cross_products,
            pair_days,
        }
        .validate()
        .unwrap_err();
        assert!(
            err.to_string().contains("residual_moments.pair_days[1]"),
            "{err}"
        );
        let err = DetectionStats::EpisodeHistogram {
            episodes: vec![3; HISTOGRAM_EDGES],
            scored_days: 2,
        }
        .validate()
        .unwrap_err();
        assert!(
            err.to_string().contains("episode_histogram.episodes[0]"),
            "{err}"
        );
    }
}
