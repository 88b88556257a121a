//! Deviation detection against a guarded personal baseline: departures sustained over the
//! recent days, joint across signals in a stated direction, with thresholds calibrated on the
//! study's own data and alarms grouped into episodes.
//!
//! Entry point: [`score_participant`] (one participant's daily scores), then
//! [`episodes::group`] at the calibrated thresholds. Everything here runs on the device.
//! The device's flags and report use it through [`crate::episode_flags`]; the old day-by-day
//! detectors in [`crate::flags`] remain only for their own tests and benchmark.
//!
//! # Baseline ([`baseline`])
//! For each signal, the one-step predictor (the exact filter of the shared prior, or a
//! comparison method's predictor) is kept **`guard_days` behind**: the forecast for day `t`
//! is conditioned only on days up to `t − guard_days − 1`. A departure that began in the last
//! `guard_days` days therefore cannot pull the baseline after itself, whatever the learned
//! trend length (with a 2–5-day trend the forecast 8 days ahead has reverted to the person's
//! level and weekly rhythm). Released days enter the predictor unless **protected**: a day
//! whose joint score reached `protect_score`, or whose own residual exceeded `clip_z` in
//! absolute value. After `max_protected_days` consecutive protected days of a signal the
//! change is taken to be lasting and the waiting days are released ("re-baselining").
//!
//! The residual is `r_t = (y_t − m_t) / (√S_t · s_p)`, with `N(m_t, S_t)` the guarded
//! forecast and `s_p` the person's **personal scale**:
//! `s_p² = (ν₀ + Σ min(u², c²)) / (ν₀ + n)` over the `n` released days' forecast residuals
//! `u` (a conjugate inverse-gamma update of a residual variance whose prior is 1 with `ν₀ =
//! scale_prior_days` pseudo-days; Gelman et al., *Bayesian Data Analysis* 3rd ed., §2.6). It
//! absorbs a device model or a person noisier or quieter than the cohort.
//!
//! # Departure test (window-limited)
//! For each window length `w` in `windows` (days, ending today), each signal's departure is
//! `Z_{j,w} = Σ clip(r) / √n` over its `n` observed days in the window (residuals clipped at
//! `±clip_z`, so one gross artifact cannot carry a window). This is the window-limited GLR for
//! a level step of unknown size starting `w` days ago (Willsky & Jones 1976, IEEE TAC 21:108;
//! Lai 1995, JRSS-B 57:613) when residuals are independent across days; they are not exactly
//! (short-range correlation), which the empirical calibration absorbs.
//!
//! # Joint score ([`joint`])
//! For each window, `J_w = aᵀR⁻¹Z_w / √(aᵀR⁻¹a)` over the signals present, with `a` the
//! study's target direction ([`joint::TargetPattern`], default acute illness: resting HR, skin
//! temperature, respiratory rate and sleep up, HRV and steps down) and `R` the cross-signal correlation of the
//! residuals, learned from per-device sums of cross-products ([`joint::ResidualMoments`]). The
//! day's **score** is `D_t = max_w J_w`, with the maximising window recorded. Signals in their
//! cold start (fewer than `min_baseline_days` observed days) do not take part; a day with no
//! pattern signal past its cold start has no score. The mirror score `max_w (−J_w)` (the
//! opposite direction) is recorded, never alerted.
//!
//! # Calibration ([`calibration`])
//! Each device counts, for every threshold of a fixed grid, how many episodes its own scores
//! would have produced, and its scored days; the aggregator sums the counts and publishes the
//! lowest threshold whose episode rate meets the budget (episodes per participant-month).
//! Unlabelled target events in the data are counted too, so the calibrated threshold is
//! conservative: at a budget `B` and a true rate `λ` of detectable target episodes, the false
//! episode rate at the published threshold lies between `B − λ` and `B`.
//!
//! # Episodes ([`episodes`])
//! Days whose score reaches the Watch threshold are alarm days; an alarm day within
//! `merge_gap_days` days of the previous one joins its episode, unless the episode already
//! spans `max_episode_days` days from its first alarm day (a persisting alarm then opens a new
//! episode, to be reviewed again). An episode's level is the highest its days reached.

pub mod baseline;
pub mod calibration;
pub mod episodes;
pub mod joint;

use chrono::NaiveDate;
use serde::{Deserialize, Serialize};

use self::baseline::GuardedBaseline;
use self::joint::{
    Correlation, JointWeights, N_SIGNALS, ResidualMoments, TargetPattern, signal_index,
};
use crate::cohort::ParticipantSeries;
use crate::prospective::{Predictor, ProspectiveError, Result};
use crate::signal::Signal;

/// Settings of the detector (module docs for each rule). In a file, any subset of the fields
/// (missing ones take their defaults; unknown ones are refused).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct DetectConfig {
    /// Days the baseline is kept behind the day scored.
    pub guard_days: usize,
    /// Window lengths of the departure test (days, ending on the day scored).
    pub windows: Vec<usize>,
    /// Observed days of a signal before it takes part in the score.
    pub min_baseline_days: usize,
    /// Pseudo-days of the personal scale's prior.
    pub scale_prior_days: f64,
    /// Residuals are clipped at `±clip_z` in the window sums and the personal scale.
    pub clip_z: f64,
    /// A day whose score reaches this is kept out of the baseline.
    pub protect_score: f64,
    /// Consecutive protected days after which a change is accepted as lasting.
    pub max_protected_days: usize,
    /// Alarm days at most this many days apart form one episode.
    pub merge_gap_days: i64,
    /// An episode covers at most this many days from its first alarm day.
    pub max_episode_days: i64,
    /// The alerting direction.
    pub pattern: TargetPattern,
}

impl DetectConfig {
    /// The episode grouping rule of these settings.
    pub fn grouping(&self) -> episodes::Grouping {
        episodes::Grouping {
            merge_gap_days: self.merge_gap_days,
            max_episode_days: self.max_episode_days,
        }
    }
}

impl Default for DetectConfig {
    fn default() -> DetectConfig {
        DetectConfig {
            guard_days: 3,
            windows: vec![1, 2, 3, 4, 5, 7],
            min_baseline_days: 0,
            scale_prior_days: 14.0,
            clip_z: 4.0,
            protect_score: 3.0,
            max_protected_days: 21,
            merge_gap_days: 3,
            max_episode_days: 14,
            pattern: TargetPattern::ACUTE_ILLNESS,
        }
    }
}

impl DetectConfig {
    /// Reads settings from a TOML file (any subset of the fields) and validates them.
    ///
    /// # Errors
    /// The file cannot be read, is not valid TOML for these settings (the message names the
    /// file, line and column and the field), or a setting is unusable.
    pub fn from_toml_file(path: &std::path::Path) -> anyhow::Result<DetectConfig> {
        use anyhow::Context;
        let text = std::fs::read_to_string(path)
            .with_context(|| format!("reading detector settings {}", path.display()))?;
        let cfg: DetectConfig = toml::from_str(&text).map_err(|e| {
            let at = e
                .span()
                .map(|span| {
                    let before = &text[..span.start.min(text.len())];
                    let line = before.matches('\n').count() + 1;
                    let column = before.len() - before.rfind('\n').map_or(0, |i| i + 1) + 1;
                    format!(", line {line}, column {column}")
                })
                .unwrap_or_default();
            anyhow::anyhow!("detector settings {}{at}: {}", path.display(), e.message())
        })?;
        cfg.validate()
            .with_context(|| format!("detector settings {}", path.display()))?;
        Ok(cfg)
    }

    /// Checks that every setting is usable.
    ///
    /// # Errors
    /// [`ProspectiveError::Config`] naming the first bad field.
    pub fn validate(&self) -> Result<()> {
        let bad = |m: String| Err(ProspectiveError::Config(m));
        if self.windows.is_empty() || self.windows.contains(&0) {
            return bad(format!(
                "windows must be non-empty and ≥ 1 day, got {:?}",
                self.windows
            ));
        }
        if !(self.scale_prior_days.is_finite() && self.scale_prior_days > 0.0) {
            return bad(format!(
                "scale_prior_days must be > 0, got {}",
                self.scale_prior_days
            ));
        }
        if !(self.clip_z.is_finite() && self.clip_z > 0.0) {
            return bad(format!("clip_z must be > 0, got {}", self.clip_z));
        }
        if !self.protect_score.is_finite() {
            return bad(format!(
                "protect_score must be finite, got {}",
                self.protect_score
            ));
        }
        if self.max_episode_days < 1 {
            return bad(format!(
                "max_episode_days must be ≥ 1, got {}",
                self.max_episode_days
            ));
        }
        if self.merge_gap_days < 0 {
            return bad(format!(
                "merge_gap_days must be ≥ 0, got {}",
                self.merge_gap_days
            ));
        }
        if self.pattern.weights.iter().all(|w| *w == 0.0) {
            return bad("the target pattern has no signal".into());
        }
        Ok(())
    }
}

/// One signal's baseline reading on one observed day.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SignalDay {
    pub date: NaiveDate,
    #[serde(serialize_with = "crate::prospective::serialize_signal")]
    pub signal: Signal,
    pub observed: f64,
    /// Guarded forecast mean and SD (with the personal scale) in the signal's units.
    pub mean: f64,
    pub sd: f64,
    /// Scaled residual `r_t`.
    pub residual: f64,
    /// In the signal's cold start (not part of the score).
    pub cold: bool,
    /// Kept out of the baseline (module docs, "Baseline": the day's joint score reached
    /// `protect_score` and the signal is in the pattern, or its own residual exceeded
    /// `clip_z`). A day released later by the lasting-change rule stays marked.
    pub protected: bool,
}

/// One calendar day of a participant with data.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DayScore {
    pub date: NaiveDate,
    /// `D_t`, or `None` when no pattern signal past its cold start was observed in the window.
    pub score: Option<f64>,
    /// `max_w (−J_w)`: departure in the opposite direction (recorded only).
    pub mirror: Option<f64>,
    /// First day of the window that gave `score`.
    pub window_start: NaiveDate,
    /// Each signal's share of `score` (its window departure weighted by `R⁻¹a`).
    pub contributions: [f64; N_SIGNALS],
    /// Each signal's window departure `Z_{j,w}` in the maximising window (`None` = absent).
    pub departures: [Option<f64>; N_SIGNALS],
}

/// One participant's detection output.
#[derive(Debug, Clone, PartialEq, Default, Serialize)]
pub struct ParticipantScores {
    pub days: Vec<DayScore>,
    /// Baseline reading of every observed signal-day, in date order.
    pub signal_days: Vec<SignalDay>,
    /// Cross-products of the released-day residuals (for learning `R`).
    pub moments: ResidualMoments,
}

/// A copy of `series` without the signal-days its baseline kept out (`SignalDay::protected`
/// in `scores`, which must come from scoring this series): what a device trains on in the
/// screened second pass of the shared prior (so that illness episodes and artifacts do not
/// shape the prior's length scales). Returns the copy and the number of values removed.
pub fn without_protected_days(
    series: &ParticipantSeries,
    scores: &ParticipantScores,
) -> (ParticipantSeries, usize) {
    let mut out = series.clone();
    let mut removed = 0;
    let index: std::collections::HashMap<NaiveDate, usize> = series
        .dates
        .iter()
        .enumerate()
        .map(|(i, &d)| (d, i))
        .collect();
    for d in scores.signal_days.iter().filter(|d| d.protected) {
        if let (Some(column), Some(&i)) = (out.values.get_mut(&d.signal), index.get(&d.date))
            && column[i].take().is_some()
        {
            removed += 1;
        }
    }
    (out, removed)
}

/// The maximising window of a day: score, window length, each signal's contribution and
/// window departure.
type BestWindow = (f64, usize, [f64; N_SIGNALS], [Option<f64>; N_SIGNALS]);

/// Per-signal state.
struct Track<'a, P> {
    signal: Signal,
    index: usize,
    column: &'a [Option<f64>],
    baseline: GuardedBaseline<P>,
    n_observed: usize,
    /// `(day, clipped residual)` of the last days, oldest first (only past the cold start).
    recent: std::collections::VecDeque<(i64, f64)>,
}

/// Scores every day of `series` (module docs): one predictor per signal, the cohort's
/// correlation `corr`, settings `cfg`.
///
/// # Errors
/// [`ProspectiveError::Config`] for a bad `cfg`; [`ProspectiveError::InSeries`] for a
/// predictor error or a non-finite value, naming the participant and signal.
pub fn score_participant<P: Predictor>(
    series: &ParticipantSeries,
    predictors: Vec<(Signal, P)>,
    corr: &Correlation,
    cfg: &DetectConfig,
) -> Result<ParticipantScores> {
    cfg.validate()?;
    let in_series = |signal: Signal, source: ProspectiveError| ProspectiveError::InSeries {
        participant: series.participant.clone(),
        signal,
        source: Box::new(source),
    };
    let max_window = *cfg.windows.iter().max().expect("validated") as i64;
    let weights = JointWeights::new(corr, &cfg.pattern);
    let mut tracks: Vec<Track<'_, P>> = Vec::new();
    for (signal, predictor) in predictors {
        let Some(column) = series.values.get(&signal) else {
            continue;
        };
        if column.len() != series.dates.len() {
            return Err(in_series(
                signal,
                ProspectiveError::Shape(format!(
                    "{} values for {} dates",
                    column.len(),
                    series.dates.len()
                )),
            ));
        }
        if tracks.iter().any(|t| t.signal == signal) {
            return Err(ProspectiveError::DuplicatePrior(signal));
        }
        tracks.push(Track {
            signal,
            index: signal_index(signal),
            column,
            baseline: GuardedBaseline::new(
                predictor,
                cfg.guard_days,
                cfg.scale_prior_days,
                cfg.clip_z,
                cfg.max_protected_days,
            ),
            n_observed: 0,
            recent: std::collections::VecDeque::new(),
        });
    }
    let mut out = ParticipantScores::default();
    let Some(&origin) = series.dates.first() else {
        return Ok(out);
    };
    out.days.reserve(series.dates.len());
    out.signal_days.reserve(series.dates.len() * tracks.len());
    for (i, &date) in series.dates.iter().enumerate() {
        let day = (date - origin).num_days();
        let first_of_day = out.signal_days.len();
        let mut today: [Option<f64>; N_SIGNALS] = [None; N_SIGNALS];
        let mut any = false;
        for track in &mut tracks {
            let Some(value) = track.column[i] else {
                continue;
            };
            if !value.is_finite() {
                return Err(in_series(
                    track.signal,
                    ProspectiveError::NonFinite(format!("value on {date} = {value}")),
                ));
            }
            let (centre, scale) = track.signal.reference();
            let z_obs = (value - centre) / scale;
            let b = track
                .baseline
                .score(day, z_obs)
                .map_err(|e| in_series(track.signal, e))?;
            let cold = track.n_observed < cfg.min_baseline_days;
            track.n_observed += 1;
            out.signal_days.push(SignalDay {
                date,
                signal: track.signal,
                observed: value,
                mean: centre + scale * b.mean,
                sd: scale * b.sd,
                residual: b.residual,
                cold,
                protected: false,
            });
            if !cold {
                today[track.index] = Some(b.residual);
                track
                    .recent
                    .push_back((day, b.residual.clamp(-cfg.clip_z, cfg.clip_z)));
                any = true;
            }
            while track
                .recent
                .front()
                .is_some_and(|&(d, _)| d <= day - max_window)
            {
                track.recent.pop_front();
            }
        }
        // (score, window, contributions, departures) of the best window so far.
        let mut best: Option<BestWindow> = None;
        let mut mirror: Option<f64> = None;
        if any {
            for &w in &cfg.windows {
                let from = day - w as i64 + 1;
                let mut x: [Option<f64>; N_SIGNALS] = [None; N_SIGNALS];
                for track in &tracks {
                    let (mut sum, mut n) = (0.0, 0usize);
                    for &(d, r) in track.recent.iter().rev() {
                        if d < from {
                            break;
                        }
                        sum += r;
                        n += 1;
                    }
                    if n > 0 {
                        x[track.index] = Some(sum / (n as f64).sqrt());
                    }
                }
                if let Some(j) = weights.score(&x) {
                    if best.as_ref().is_none_or(|b| j.score > b.0) {
                        best = Some((j.score, w, j.contributions, x));
                    }
                    mirror = Some(mirror.map_or(-j.score, |m: f64| m.max(-j.score)));
                }
            }
        }
        let score = best.as_ref().map(|b| b.0);
        let protect_joint = score.is_some_and(|s| s >= cfg.protect_score);
        let mut usable: [Option<f64>; N_SIGNALS] = [None; N_SIGNALS];
        for track in &mut tracks {
            if track.column[i].is_none() {
                continue;
            }
            let r = today[track.index];
            let extreme = r.is_some_and(|r| r.abs() > cfg.clip_z);
            let in_pattern = cfg.pattern.weights[track.index] != 0.0;
            let protect = extreme || (protect_joint && in_pattern);
            track.baseline.protect_last(protect);
            if protect {
                if let Some(d) = out.signal_days[first_of_day..]
                    .iter_mut()
                    .find(|d| d.signal == track.signal)
                {
                    d.protected = true;
                }
            } else {
                usable[track.index] = r;
            }
        }
        out.moments.add_day(&usable);
        let (window, contributions, departures) = match best {
            Some((_, w, c, x)) => (w, c, x),
            None => (1, [0.0; N_SIGNALS], [None; N_SIGNALS]),
        };
        out.days.push(DayScore {
            date,
            score,
            mirror,
            window_start: date - chrono::Duration::days(window as i64 - 1),
            contributions,
            departures,
        });
    }
    Ok(out)
}
