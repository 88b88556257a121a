//! The threshold sweep of one method's daily scores: sensitivity, false alarm episodes and
//! days per participant-month and lead at each threshold; the sensitivity at matched false
//! alarm episode rates; the partial area under the curve (definitions in
//! `docs/evaluation.md`).

use chrono::{Datelike, NaiveDate};
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
    Sweep::with_floor(truths, rule, h).at(h)
}

/// The curve on the grid `0, SWEEP_STEP, …, SWEEP_MAX` from the top down to the first point
/// with more than [`CURVE_MAX_FA`] false alarm episodes per participant-month (included), in
/// ascending threshold order.
pub fn curve(truths: &[Truth<'_>], rule: Grouping) -> Vec<CurvePoint> {
    Sweep::new(truths, rule).curve()
}

/// For each level, the threshold where the false alarm episode rate, coming down from the top
/// of the sweep, first exceeds the level: scanning thresholds downwards from [`SWEEP_MAX`] in
/// steps of [`SWEEP_STEP`] to the first one above the level, then bisecting (to 1e-4) between
/// it and the step before; the sensitivity is read at the upper end (rate at most the level).
/// Scanning from the top matters: far below the useful range, alarm days run together into a
/// few long episodes and the episode rate falls again.
pub fn matched(truths: &[Truth<'_>], rule: Grouping, levels: &[f64]) -> Vec<MatchedPoint> {
    Sweep::new(truths, rule).matched(levels)
}

/// One level of a group column at a matched threshold.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GroupPoint {
    pub level: String,
    pub participants: usize,
    /// Target events of the level's participants.
    pub events: usize,
    pub sensitivity: Option<f64>,
    pub false_alarm_episodes_per_participant_month: Option<f64>,
}

/// How far a group column's levels lie apart when the whole cohort's threshold for one matched
/// level is applied to each of them.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GroupDisparity {
    /// Group column of `participants.csv`.
    pub column: String,
    /// The matched level (false alarm episodes per participant-month over the whole cohort).
    pub matched_level: f64,
    /// The whole cohort's threshold at that level.
    pub threshold: f64,
    /// Every level of the column, in name order.
    pub levels: Vec<GroupPoint>,
    /// Highest minus lowest sensitivity across the levels that have target events.
    pub sensitivity_disparity: Option<f64>,
    /// How large a spread chance alone gives at these levels' event counts
    /// ([`disparity_by_chance`]).
    pub sensitivity_disparity_by_chance: Option<ChanceSpread>,
    /// Highest minus lowest false alarm episode rate across the levels.
    pub false_alarm_disparity: Option<f64>,
    /// Highest over lowest false alarm episode rate (`null` when the lowest is 0).
    pub false_alarm_ratio: Option<f64>,
}

/// The spread of `values` (max − min), `None` with fewer than two.
fn spread(values: &[f64]) -> Option<f64> {
    let max = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let min = values.iter().copied().fold(f64::INFINITY, f64::min);
    (values.len() >= 2).then_some(max - min)
}

/// Seed of the disparities' chance resampling (with the column's and the level's positions
/// mixed in), so a report is reproducible.
const DISPARITY_SEED: u64 = 0x00D1_5BA7;

/// Resamples behind a disparity's chance reference ([`disparity_by_chance`]).
pub const DISPARITY_RESAMPLES: usize = 2000;

/// How large a sensitivity disparity chance alone makes at these event counts.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ChanceSpread {
    /// The 95th percentile of the spread when the levels do not differ.
    pub p95: f64,
    /// Share of those resamples whose spread reaches the observed one (a one-sided p-value of
    /// "the levels have one sensitivity").
    pub p_value: f64,
}

/// The spread of sensitivities a column would show by chance alone: a bootstrap test of
/// equal sensitivities (Efron & Tibshirani 1993, *An Introduction to the Bootstrap*, §16.2,
/// from memory). Each level's participants, given as (target events, detected) per
/// participant, are replaced by as many drawn with replacement from all levels pooled, so the
/// levels keep their sizes and share one sensitivity, and a participant's events stay
/// together (they share the person's baseline). `observed` is the spread the column showed.
/// `None` with fewer than two levels that have events. Deterministic for a given `seed`.
///
/// A spread is a maximum minus a minimum, so chance alone makes it positive, and the more so
/// the fewer events a level has: a spread below `p95` cannot be told from chance on this
/// cohort, and halving one that is cannot be shown either.
pub fn disparity_by_chance(
    levels: &[Vec<(usize, usize)>],
    observed: f64,
    seed: u64,
) -> Option<ChanceSpread> {
    use rand::{Rng, SeedableRng};
    let levels: Vec<&Vec<(usize, usize)>> = levels
        .iter()
        .filter(|l| l.iter().any(|&(events, _)| events > 0))
        .collect();
    if levels.len() < 2 {
        return None;
    }
    let pooled: Vec<(usize, usize)> = levels.iter().flat_map(|l| l.iter().copied()).collect();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut spreads = Vec::with_capacity(DISPARITY_RESAMPLES);
    let mut sensitivities = Vec::with_capacity(levels.len());
    for _ in 0..DISPARITY_RESAMPLES {
        sensitivities.clear();
        for members in &levels {
            let (mut events, mut detected) = (0usize, 0usize);
            for _ in 0..members.len() {
                let (e, d) = pooled[rng.random_range(0..pooled.len())];
                events += e;
                detected += d;
            }
            // A drawn level may hold no event: it has no sensitivity, as a level without
            // events has none.
            if events > 0 {
                sensitivities.push(detected as f64 / events as f64);
            }
        }
        spreads.push(spread(&sensitivities).unwrap_or(0.0));
    }
    spreads.sort_by(f64::total_cmp);
    let p95 = spreads[(0.95 * (spreads.len() - 1) as f64).round() as usize];
    // Ties count as reaching it; a small tolerance keeps an exact tie from rounding away.
    let reached = spreads.iter().filter(|&&x| x >= observed - 1e-12).count();
    Some(ChanceSpread {
        p95,
        p_value: reached as f64 / spreads.len() as f64,
    })
}

/// For each group column and each matched point with a threshold: every level's sensitivity
/// and false alarm episode rate at that (whole-cohort) threshold, and their disparities.
/// `groups[i]` holds participant `truths[i]`'s group values; a participant without a value in a
/// column is left out of that column.
pub fn disparities(
    truths: &[Truth<'_>],
    groups: &[&std::collections::BTreeMap<String, String>],
    rule: Grouping,
    matched: &[MatchedPoint],
) -> Vec<GroupDisparity> {
    use std::collections::BTreeMap;
    let mut columns: BTreeMap<&str, BTreeMap<&str, Vec<Truth<'_>>>> = BTreeMap::new();
    for (t, g) in truths.iter().zip(groups) {
        for (column, level) in g.iter() {
            columns
                .entry(column.as_str())
                .or_default()
                .entry(level.as_str())
                .or_default()
                .push(t.clone());
        }
    }
    let mut out = Vec::new();
    for (c, (column, levels)) in columns.iter().enumerate() {
        for (k, m) in matched.iter().enumerate() {
            let Some(h) = m.threshold else { continue };
            // One prepared sweep per level gives its figures at `h` (as `at_threshold`) and
            // each participant's (events, detected) there, for the chance reference.
            let sweeps: Vec<Sweep> = levels
                .values()
                .map(|members| Sweep::with_floor(members, rule, h))
                .collect();
            let counts: Vec<Vec<(usize, usize)>> = sweeps
                .iter()
                .map(|sweep| {
                    sweep
                        .truths
                        .iter()
                        .map(|t| {
                            let tally = tally_of(std::slice::from_ref(t), h, rule);
                            (tally.events, tally.detected)
                        })
                        .collect()
                })
                .collect();
            let points: Vec<GroupPoint> = levels
                .iter()
                .zip(sweeps.iter().zip(&counts))
                .map(|((level, members), (sweep, counts))| {
                    let p = sweep.at(h);
                    GroupPoint {
                        level: (*level).to_owned(),
                        participants: members.len(),
                        events: counts.iter().map(|&(e, _)| e).sum(),
                        sensitivity: p.sensitivity,
                        false_alarm_episodes_per_participant_month: p
                            .false_alarm_episodes_per_participant_month,
                    }
                })
                .collect();
            let sens: Vec<f64> = points.iter().filter_map(|p| p.sensitivity).collect();
            let fa: Vec<f64> = points
                .iter()
                .filter_map(|p| p.false_alarm_episodes_per_participant_month)
                .collect();
            let observed = spread(&sens);
            let fa_min = fa.iter().copied().fold(f64::INFINITY, f64::min);
            let fa_max = fa.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            out.push(GroupDisparity {
                column: (*column).to_owned(),
                matched_level: m.false_alarm_episodes_per_participant_month,
                threshold: h,
                sensitivity_disparity: observed,
                sensitivity_disparity_by_chance: observed.and_then(|observed| {
                    disparity_by_chance(
                        &counts,
                        observed,
                        DISPARITY_SEED ^ ((c as u64) << 32 | k as u64),
                    )
                }),
                false_alarm_disparity: spread(&fa),
                false_alarm_ratio: (fa.len() >= 2 && fa_min > 0.0).then(|| fa_max / fa_min),
                levels: points,
            });
        }
    }
    out
}

/// One participant as the sweep reads it: day numbers instead of dates, each day's target
/// membership worked out once, and only the days that can alarm at a threshold of the sweep.
#[derive(Debug)]
struct PreparedTruth {
    /// Days with a score at or above the sweep's floor, in date order: (day number, score,
    /// inside a target event).
    candidates: Vec<(i64, f32, bool)>,
    /// Target events as (first, last) day numbers.
    targets: Vec<(i64, i64)>,
    /// Highest score of the participant (`-inf` without a scored day).
    max_score: f64,
}

/// Counts at one threshold, summed over participants.
#[derive(Default)]
struct Tally {
    events: usize,
    detected: usize,
    fa_episodes: usize,
    fa_days: usize,
    leads: Vec<f64>,
}

impl Tally {
    fn absorb(&mut self, o: Tally) {
        self.events += o.events;
        self.detected += o.detected;
        self.fa_episodes += o.fa_episodes;
        self.fa_days += o.fa_days;
        self.leads.extend(o.leads);
    }
}

/// The threshold sweep of one method, prepared once and evaluated at many thresholds. The
/// figures equal [`at_threshold`]'s definition: the days below every threshold the sweep asks
/// about only ever count in the false-alarm denominator (event-free scored days), which does
/// not depend on the threshold and is counted once; each figure is remembered per threshold,
/// so [`Sweep::curve`] and [`Sweep::matched`] share the grid points; participants are split
/// over threads.
#[derive(Debug)]
pub struct Sweep {
    truths: Vec<PreparedTruth>,
    /// Scored days outside every target event, over all participants.
    outside: usize,
    /// Lowest threshold this sweep may be asked about.
    floor: f64,
    rule: Grouping,
    threads: usize,
    seen: std::cell::RefCell<std::collections::HashMap<u64, CurvePoint>>,
}

impl Sweep {
    /// A sweep over thresholds from 0 up.
    pub fn new(truths: &[Truth<'_>], rule: Grouping) -> Sweep {
        Sweep::with_floor(truths, rule, 0.0)
    }

    fn with_floor(truths: &[Truth<'_>], rule: Grouping, floor: f64) -> Sweep {
        let day = |d: NaiveDate| i64::from(d.num_days_from_ce());
        let mut outside = 0usize;
        let prepared = truths
            .iter()
            .map(|t| {
                let targets: Vec<(i64, i64)> = t
                    .targets
                    .iter()
                    .map(|e| (day(e.start), day(e.end)))
                    .collect();
                let in_target = |d: i64| targets.iter().any(|&(s, e)| s <= d && d <= e);
                let mut max_score = f64::NEG_INFINITY;
                let mut candidates = Vec::new();
                for c in t.days {
                    let d = day(c.date);
                    let target = in_target(d);
                    if !target {
                        outside += 1;
                    }
                    let score = f64::from(c.score);
                    max_score = max_score.max(score);
                    if score >= floor {
                        candidates.push((d, c.score, target));
                    }
                }
                PreparedTruth {
                    candidates,
                    targets,
                    max_score,
                }
            })
            .collect();
        Sweep {
            truths: prepared,
            outside,
            floor,
            rule,
            threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
            seen: Default::default(),
        }
    }

    /// The figures at threshold `h` (at least the floor, 0 for [`Sweep::new`]).
    pub fn at(&self, h: f64) -> CurvePoint {
        if let Some(p) = self.seen.borrow().get(&h.to_bits()) {
            return *p;
        }
        debug_assert!(h >= self.floor, "threshold {h} below the sweep's floor");
        let chunk = self.truths.len().div_ceil(self.threads.max(1)).max(1);
        let mut tally = Tally::default();
        if self.truths.len() < 2 * chunk || self.threads <= 1 {
            tally = tally_of(&self.truths, h, self.rule);
        } else {
            let rule = self.rule;
            let parts: Vec<Tally> = std::thread::scope(|scope| {
                let handles: Vec<_> = self
                    .truths
                    .chunks(chunk)
                    .map(|part| scope.spawn(move || tally_of(part, h, rule)))
                    .collect();
                handles
                    .into_iter()
                    .map(|h| h.join().expect("sweep thread panicked"))
                    .collect()
            });
            for part in parts {
                tally.absorb(part);
            }
        }
        let months = self.outside as f64 / DAYS_PER_MONTH;
        tally.leads.sort_by(f64::total_cmp);
        let point = CurvePoint {
            threshold: h,
            sensitivity: (tally.events > 0).then(|| tally.detected as f64 / tally.events as f64),
            false_alarm_episodes_per_participant_month: (months > 0.0)
                .then(|| tally.fa_episodes as f64 / months),
            false_alarms_per_participant_month: (months > 0.0)
                .then(|| tally.fa_days as f64 / months),
            median_lead_from_start_days: median(&tally.leads),
        };
        self.seen.borrow_mut().insert(h.to_bits(), point);
        point
    }

    /// See [`curve`].
    pub fn curve(&self) -> Vec<CurvePoint> {
        let n = (SWEEP_MAX / SWEEP_STEP).round() as usize;
        let mut out = Vec::new();
        for i in (0..=n).rev() {
            let p = self.at(i as f64 * SWEEP_STEP);
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

    /// See [`matched`].
    pub fn matched(&self, levels: &[f64]) -> Vec<MatchedPoint> {
        let fa = |h: f64| {
            self.at(h)
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
                let p = self.at(hi);
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
}

/// Events, detections, leads and false alarms of `truths` at threshold `h`.
fn tally_of(truths: &[PreparedTruth], h: f64, rule: Grouping) -> Tally {
    let mut tally = Tally::default();
    for t in truths {
        tally.events += t.targets.len();
        if t.max_score < h {
            continue;
        }
        for &(start, end) in &t.targets {
            if let Some(&(first, _, _)) = t
                .candidates
                .iter()
                .find(|&&(d, s, _)| d >= start && d <= end && f64::from(s) >= h)
            {
                tally.detected += 1;
                tally.leads.push((first - start) as f64);
            }
        }
        // Episodes: groups of alarm days; false when none of its days is in a target event.
        let mut span: Option<(i64, i64)> = None;
        let mut current_true = false;
        let mut open = false;
        for &(d, score, target) in &t.candidates {
            if f64::from(score) < h {
                continue;
            }
            if !target {
                tally.fa_days += 1;
            }
            let joins = span.is_some_and(|(f, l)| {
                d - l <= rule.merge_gap_days && d - f < rule.max_episode_days
            });
            if joins {
                if let Some((_, l)) = &mut span {
                    *l = d;
                }
            } else {
                span = Some((d, d));
                if open && !current_true {
                    tally.fa_episodes += 1;
                }
                open = true;
                current_true = false;
            }
            current_true |= target;
        }
        if open && !current_true {
            tally.fa_episodes += 1;
        }
    }
    tally
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

#[cfg(test)]
mod tests {
    use std::collections::BTreeMap;

    use super::*;

    fn day(d: u32) -> NaiveDate {
        NaiveDate::from_ymd_opt(2024, 1, d).unwrap()
    }

    /// 30 scored days, score 0 except `high` days at 3.
    fn days(high: &[u32]) -> Vec<Compact> {
        (1..=30)
            .map(|d| Compact {
                date: day(d),
                score: if high.contains(&d) { 3.0 } else { 0.0 },
                window_days: 1,
            })
            .collect()
    }

    /// The chance reference of a two-level disparity matches the normal approximation of
    /// the two-proportion test (common practice): with one event per participant, 400
    /// participants per level and a pooled sensitivity of 0.75, the difference of the two
    /// sensitivities under "no difference" has standard error √(0.75·0.25·(1/400 + 1/400)) =
    /// 0.0306, so its absolute value exceeds 1.96·0.0306 = 0.060 in 5 % of samples; and an
    /// observed spread of 0.3 (0.9 against 0.6) is far beyond it, with p ≈ 0.
    #[test]
    fn chance_spread_matches_the_two_proportion_test() {
        let level = |detected: usize| -> Vec<(usize, usize)> {
            (0..400).map(|i| (1, usize::from(i < detected))).collect()
        };
        let se = (0.75f64 * 0.25 * (2.0 / 400.0)).sqrt();
        let chance = disparity_by_chance(&[level(360), level(240)], 0.3, 3).unwrap();
        assert!((chance.p95 - 1.96 * se).abs() < 0.006, "{chance:?}");
        assert_eq!(chance.p_value, 0.0);
        // Observed at the 95th percentile of |N(0, se)|: p near 0.05.
        let chance = disparity_by_chance(&[level(360), level(240)], 1.96 * se, 3).unwrap();
        assert!((chance.p_value - 0.05).abs() < 0.02, "{chance:?}");

        // A level without events takes no part; one level alone has no disparity.
        let none: Vec<(usize, usize)> = vec![(0, 0); 10];
        assert_eq!(disparity_by_chance(&[level(360), none], 0.1, 3), None);
    }

    #[test]
    fn disparities_of_a_hand_worked_cohort() {
        let event = |who: &str| Event {
            participant: who.into(),
            kind: "acute_illness".into(),
            start: day(9),
            end: day(11),
            symptom_onset: None,
        };
        let (ea, eb) = (event("a"), event("b"));
        let (ta, tb) = ([&ea], [&eb]);
        // a (sensor x): alarm on day 10, inside its illness: detected, no false alarm.
        // b (sensor y): no alarm in its illness, one alarm on day 20: missed, one false episode.
        // c (no sensor recorded): left out of the column.
        let (da, db, dc) = (days(&[10]), days(&[20]), days(&[5]));
        let truths = [
            Truth {
                first_date: Some(day(1)),
                days: &da,
                targets: &ta,
            },
            Truth {
                first_date: Some(day(1)),
                days: &db,
                targets: &tb,
            },
            Truth {
                first_date: Some(day(1)),
                days: &dc,
                targets: &[],
            },
        ];
        let group = |v: Option<&str>| {
            v.map(|v| BTreeMap::from([("sensor".to_owned(), v.to_owned())]))
                .unwrap_or_default()
        };
        let (ga, gb, gc) = (group(Some("x")), group(Some("y")), group(None));
        let matched = [MatchedPoint {
            false_alarm_episodes_per_participant_month: 0.3,
            threshold: Some(2.0),
            achieved_false_alarm_episodes: None,
            sensitivity: None,
            median_lead_from_start_days: None,
        }];
        let rule = Grouping {
            merge_gap_days: 3,
            max_episode_days: 14,
        };
        let d = disparities(&truths, &[&ga, &gb, &gc], rule, &matched);
        assert_eq!(d.len(), 1);
        let d = &d[0];
        assert_eq!((d.column.as_str(), d.threshold), ("sensor", 2.0));
        assert_eq!(
            d.levels.iter().map(|p| p.participants).sum::<usize>(),
            2,
            "c left out"
        );
        assert_eq!(d.levels[0].sensitivity, Some(1.0));
        assert_eq!(d.levels[1].sensitivity, Some(0.0));
        assert_eq!((d.levels[0].events, d.levels[1].events), (1, 1));
        // b: 1 false episode over 27 days outside its illness, per month of 30.4375 days.
        let fa_b = 1.0 / (27.0 / 30.4375);
        assert_eq!(
            d.levels[0].false_alarm_episodes_per_participant_month,
            Some(0.0)
        );
        assert!(
            (d.levels[1]
                .false_alarm_episodes_per_participant_month
                .unwrap()
                - fa_b)
                .abs()
                < 1e-12
        );
        assert_eq!(d.sensitivity_disparity, Some(1.0));
        // By hand: each level draws one of {a, b}; the draws differ, and the spread is 1, half
        // the time.
        let chance = d.sensitivity_disparity_by_chance.unwrap();
        assert_eq!(chance.p95, 1.0);
        assert!((chance.p_value - 0.5).abs() < 0.05, "{chance:?}");
        assert!((d.false_alarm_disparity.unwrap() - fa_b).abs() < 1e-12);
        assert_eq!(d.false_alarm_ratio, None, "the lowest rate is 0");
    }
}
