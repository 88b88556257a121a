//! The threshold sweep of one method's daily scores: sensitivity, false alarm episodes and
//! days per participant-month and lead at each threshold; the sensitivity at matched false
//! alarm episode rates; the partial area under the curve (definitions in
//! `docs/evaluation.md`).

use chrono::NaiveDate;
use serde::Serialize;

use crate::cohort::Event;
use crate::detect::calibration::DAYS_PER_MONTH;
use crate::detect::episodes::Grouping;

/// False alarm episodes per participant-month at which methods are compared.
pub const MATCHED_LEVELS: [f64; 4] = [0.1, 0.3, 0.5, 1.0];

/// Spacing of the sweep's thresholds (score units).
pub const SWEEP_STEP: f64 = 0.05;
/// Highest threshold of the sweep.
pub const SWEEP_MAX: f64 = 15.0;
/// Curve points with more false alarm episodes per participant-month than this are left out.
pub const CURVE_MAX_FA: f64 = 3.0;

/// One scored day, compact: what the sweep needs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Compact {
    pub date: NaiveDate,
    pub score: f32,
    /// Length of the departure window that gave the score.
    pub window_days: u8,
}

/// One participant's scores and target events.
#[derive(Debug, Clone)]
pub struct Truth<'a> {
    pub first_date: Option<NaiveDate>,
    /// Scored days in date order.
    pub days: &'a [Compact],
    pub targets: &'a [&'a Event],
}

/// Whole-cohort figures at one threshold.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CurvePoint {
    pub threshold: f64,
    pub sensitivity: Option<f64>,
    pub false_alarm_episodes_per_participant_month: Option<f64>,
    pub false_alarms_per_participant_month: Option<f64>,
    pub median_lead_from_start_days: Option<f64>,
}

/// Sensitivity at a matched false alarm episode rate.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MatchedPoint {
    /// The level asked for (false alarm episodes per participant-month).
    pub false_alarm_episodes_per_participant_month: f64,
    /// The lowest threshold whose rate is at most the level (`null` if none in range).
    pub threshold: Option<f64>,
    /// The rate actually reached there.
    pub achieved_false_alarm_episodes: Option<f64>,
    pub sensitivity: Option<f64>,
    pub median_lead_from_start_days: Option<f64>,
}

/// The figures at threshold `h`.
pub fn at_threshold(truths: &[Truth<'_>], h: f64, rule: Grouping) -> CurvePoint {
    let (mut events, mut detected) = (0usize, 0usize);
    let (mut fa_episodes, mut fa_days, mut outside) = (0usize, 0usize, 0usize);
    let mut leads: Vec<f64> = Vec::new();
    for t in truths {
        let in_target = |d: NaiveDate| t.targets.iter().any(|e| e.start <= d && d <= e.end);
        for e in t.targets {
            events += 1;
            if let Some(first) = t
                .days
                .iter()
                .find(|c| c.date >= e.start && c.date <= e.end && f64::from(c.score) >= h)
            {
                detected += 1;
                leads.push((first.date - e.start).num_days() as f64);
            }
        }
        // Episodes: groups of alarm days; false when none of its days is in a target event.
        let mut span: Option<(NaiveDate, NaiveDate)> = None;
        let mut current_true = false;
        let mut open = false;
        for c in t.days {
            let target = in_target(c.date);
            if !target {
                outside += 1;
            }
            if f64::from(c.score) < h {
                continue;
            }
            if !target {
                fa_days += 1;
            }
            let joins = span.is_some_and(|(f, l)| rule.joins(f, l, c.date));
            if joins {
                if let Some((_, l)) = &mut span {
                    *l = c.date;
                }
            } else {
                span = Some((c.date, c.date));
                if open && !current_true {
                    fa_episodes += 1;
                }
                open = true;
                current_true = false;
            }
            current_true |= target;
        }
        if open && !current_true {
            fa_episodes += 1;
        }
    }
    let months = outside as f64 / DAYS_PER_MONTH;
    leads.sort_by(f64::total_cmp);
    CurvePoint {
        threshold: h,
        sensitivity: (events > 0).then(|| detected as f64 / events as f64),
        false_alarm_episodes_per_participant_month: (months > 0.0)
            .then(|| fa_episodes as f64 / months),
        false_alarms_per_participant_month: (months > 0.0).then(|| fa_days as f64 / months),
        median_lead_from_start_days: median(&leads),
    }
}

fn median(sorted: &[f64]) -> Option<f64> {
    let n = sorted.len();
    (n > 0).then(|| {
        if n % 2 == 1 {
            sorted[n / 2]
        } else {
            0.5 * (sorted[n / 2 - 1] + sorted[n / 2])
        }
    })
}

/// The curve on the grid `0, SWEEP_STEP, …, SWEEP_MAX` from the top down to the first point
/// with more than [`CURVE_MAX_FA`] false alarm episodes per participant-month (included), in
/// ascending threshold order.
pub fn curve(truths: &[Truth<'_>], rule: Grouping) -> Vec<CurvePoint> {
    let n = (SWEEP_MAX / SWEEP_STEP).round() as usize;
    let mut out = Vec::new();
    for i in (0..=n).rev() {
        let p = at_threshold(truths, i as f64 * SWEEP_STEP, rule);
        let stop = p
            .false_alarm_episodes_per_participant_month
            .is_some_and(|f| f > CURVE_MAX_FA);
        out.push(p);
        if stop {
            break;
        }
    }
    out.reverse();
    out
}

/// For each level, the threshold where the false alarm episode rate, coming down from the top
/// of the sweep, first exceeds the level: scanning thresholds downwards from [`SWEEP_MAX`] in
/// steps of [`SWEEP_STEP`] to the first one above the level, then bisecting (to 1e-4) between
/// it and the step before; the sensitivity is read at the upper end (rate at most the level).
/// Scanning from the top matters: far below the useful range, alarm days run together into a
/// few long episodes and the episode rate falls again.
pub fn matched(truths: &[Truth<'_>], rule: Grouping, levels: &[f64]) -> Vec<MatchedPoint> {
    let fa = |h: f64| {
        at_threshold(truths, h, rule)
            .false_alarm_episodes_per_participant_month
            .unwrap_or(0.0)
    };
    levels
        .iter()
        .map(|&level| {
            let none = MatchedPoint {
                false_alarm_episodes_per_participant_month: level,
                threshold: None,
                achieved_false_alarm_episodes: None,
                sensitivity: None,
                median_lead_from_start_days: None,
            };
            let mut hi = SWEEP_MAX;
            if fa(hi) > level {
                return none;
            }
            let mut lo = None;
            let n = (SWEEP_MAX / SWEEP_STEP).round() as usize;
            for i in (0..n).rev() {
                let h = i as f64 * SWEEP_STEP;
                if fa(h) > level {
                    lo = Some(h);
                    break;
                }
                hi = h;
            }
            if let Some(mut lo) = lo {
                while hi - lo > 1e-4 {
                    let mid = 0.5 * (lo + hi);
                    if fa(mid) <= level {
                        hi = mid;
                    } else {
                        lo = mid;
                    }
                }
            }
            let p = at_threshold(truths, hi, rule);
            MatchedPoint {
                false_alarm_episodes_per_participant_month: level,
                threshold: Some(hi),
                achieved_false_alarm_episodes: p.false_alarm_episodes_per_participant_month,
                sensitivity: p.sensitivity,
                median_lead_from_start_days: p.median_lead_from_start_days,
            }
        })
        .collect()
}

/// Area under sensitivity against false alarm episodes per participant-month from 0 to
/// `max_fa`, divided by `max_fa` (1 = perfect): trapezoids through the curve's points sorted
/// by false-alarm rate, starting at (0, 0) and cut at `max_fa` by linear interpolation; a
/// curve that stops short of `max_fa` is extended at its last sensitivity. `None` without
/// target events.
pub fn partial_auc(curve: &[CurvePoint], max_fa: f64) -> Option<f64> {
    let mut pts: Vec<(f64, f64)> = curve
        .iter()
        .filter_map(|p| {
            Some((
                p.false_alarm_episodes_per_participant_month?,
                p.sensitivity?,
            ))
        })
        .collect();
    if pts.is_empty() {
        return None;
    }
    pts.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    let mut area = 0.0;
    let (mut x0, mut y0) = (0.0, 0.0);
    for (x, y) in pts {
        if x >= max_fa {
            let y_cut = if x > x0 {
                y0 + (y - y0) * (max_fa - x0) / (x - x0)
            } else {
                y
            };
            area += 0.5 * (y0 + y_cut) * (max_fa - x0);
            return Some(area / max_fa);
        }
        area += 0.5 * (y0 + y) * (x - x0);
        (x0, y0) = (x, y);
    }
    area += y0 * (max_fa - x0);
    Some(area / max_fa)
}
