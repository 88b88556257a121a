//! Detection metrics against ground-truth event windows, accumulated one
//! participant at a time so a large cohort never sits in memory.
//!
//! Definitions (stable; the JSON report uses these names, see `docs/evaluation.md`):
//! - `sensitivity`: detected target events / target events, where an event is
//!   detected when an alarm fires on a day from its `start` to its `end`
//!   (inclusive).
//! - `false_alarms_per_participant_month`: alarm-days outside every target
//!   event window, divided by `days_outside_targets / 30.4375`, where
//!   `days_outside_targets` counts the participant-days with at least one scored
//!   signal (past the method's cold start) outside every target event. An
//!   alarm-day is a (participant, date) with at least one alarm; several alarms
//!   on one day count once. Alarms during non-target events (stressors,
//!   artifacts) are false alarms: telling them from illness is the point.
//! - `median_lead_from_start_days`, `median_lead_from_onset_days`: median over
//!   detected events of (first alarm date in the window − event start) and
//!   (first alarm date in the window − symptom onset); negative = before onset.
//! - `coverage_95`: share of calibration days (scored signal-days outside
//!   *every* event, target or not) whose value lies inside the nominal 95%
//!   prospective band. Days inside any event are left out because no method
//!   is meant to predict them; `calibration_signal_days` counts the days used.
//! - `mean_nlpd`: mean negative log predictive density of the calibration days
//!   under N(mean, sd²), in standardised units `(y − centre) / scale` so
//!   signals are comparable (nats per observation).
//!
//! Per-period cells: with [`Accumulator::with_periods`], every quantity above
//! is also accumulated for windows of days since the participant's first date
//! (column [`PERIOD_COLUMN`]); an event belongs to the period its start falls
//! in, and a participant counts in a period where it has a scored day.

use std::collections::{BTreeMap, BTreeSet};

use chrono::NaiveDate;
use serde::Serialize;

use crate::cohort::Event;
use crate::signal::Signal;

/// One scored (prospective) observation of one signal.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScoredDay {
    pub signal: Signal,
    pub date: NaiveDate,
    pub observed: f64,
    /// Prospective predictive mean and SD of the observation (signal units).
    pub mean: f64,
    pub sd: f64,
}

/// One scored date's baseline readings summed over signals: all the metrics need of the
/// [`ScoredDay`]s of a date (kept instead of them, so a large cohort's results fit in memory).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScoredDate {
    pub date: NaiveDate,
    /// Signal-days of the date with a usable predictive SD (positive and finite).
    pub readings: u16,
    /// Of those, observations inside the central 95% predictive band.
    pub covered: u16,
    /// Their summed negative log predictive density in reference-scale units.
    pub nlpd_sum: f64,
}

/// The [`ScoredDate`]s of `days`, in date order.
pub fn scored_dates(days: &[ScoredDay]) -> Vec<ScoredDate> {
    let mut by_date: BTreeMap<NaiveDate, ScoredDate> = BTreeMap::new();
    for d in days {
        let entry = by_date.entry(d.date).or_insert(ScoredDate {
            date: d.date,
            readings: 0,
            covered: 0,
            nlpd_sum: 0.0,
        });
        if !(d.sd > 0.0 && d.sd.is_finite()) {
            continue;
        }
        entry.readings += 1;
        if (d.observed - d.mean).abs() <= Z975 * d.sd {
            entry.covered += 1;
        }
        let (_, scale) = d.signal.reference();
        let sd = d.sd / scale;
        let r = (d.observed - d.mean) / scale;
        entry.nlpd_sum +=
            0.5 * (2.0 * std::f64::consts::PI * sd * sd).ln() + 0.5 * (r / sd).powi(2);
    }
    by_date.into_values().collect()
}

/// Everything one method produced for one participant.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ParticipantResult {
    /// The participant's first date in the data (origin of the periods); `None`
    /// leaves the participant out of the per-period cells.
    pub first_date: Option<NaiveDate>,
    /// Days past the method's cold start (only these are scored), from [`scored_dates`].
    pub days: Vec<ScoredDate>,
    /// Dates with at least one alarm (a flag at the evaluated level or above).
    pub alarm_dates: BTreeSet<NaiveDate>,
    /// Alarm episodes as (first, last) alarm date.
    pub episodes: Vec<(NaiveDate, NaiveDate)>,
}

/// Group column under which per-period cells are reported.
pub const PERIOD_COLUMN: &str = "days_since_start";

/// A window of days since a participant's first date (0 = the first date),
/// inclusive at both ends; `last_day: None` is open-ended.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Period {
    /// Level shown in reports, e.g. `1-28` (1-based days).
    pub label: String,
    pub first_day: i64,
    pub last_day: Option<i64>,
}

impl Period {
    /// Days `first..=last` counted from 1, labelled `first-last` (or `first+`
    /// when open-ended).
    pub fn days(first: i64, last: Option<i64>) -> Period {
        Period {
            label: match last {
                Some(l) => format!("{first}-{l}"),
                None => format!("{first}+"),
            },
            first_day: first - 1,
            last_day: last.map(|l| l - 1),
        }
    }

    fn contains(&self, origin: NaiveDate, date: NaiveDate) -> bool {
        let d = (date - origin).num_days();
        d >= self.first_day && self.last_day.is_none_or(|l| d <= l)
    }
}

/// Running sums for one (method, subgroup) cell.
#[derive(Debug, Clone, Default)]
struct Cell {
    participants: usize,
    events: usize,
    detected: usize,
    lead_from_start: Vec<f64>,
    lead_from_onset: Vec<f64>,
    false_alarm_days: usize,
    false_alarm_episodes: usize,
    days_outside_targets: usize,
    covered: usize,
    coverage_n: usize,
    nlpd_sum: f64,
}

/// Final metrics of one (method, subgroup) cell.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Metrics {
    pub participants: usize,
    pub events: usize,
    pub events_detected: usize,
    pub sensitivity: Option<f64>,
    pub false_alarms_per_participant_month: Option<f64>,
    /// Alarm episodes with no alarm day inside a target event, per participant-month.
    pub false_alarm_episodes_per_participant_month: Option<f64>,
    pub median_lead_from_start_days: Option<f64>,
    pub median_lead_from_onset_days: Option<f64>,
    pub coverage_95: Option<f64>,
    pub mean_nlpd: Option<f64>,
    /// Participant-days with a scored signal outside every target event (the
    /// false-alarm denominator).
    pub days_outside_targets: usize,
    /// Signal-days outside every event used for `coverage_95` and `mean_nlpd`.
    pub calibration_signal_days: usize,
}

/// Subgroup key: `("all", "all")` or `(group column, level)`.
pub type Subgroup = (String, String);

/// Accumulates metrics per subgroup for one method at one threshold setting.
#[derive(Debug, Clone, Default)]
pub struct Accumulator {
    cells: BTreeMap<Subgroup, Cell>,
    periods: Vec<Period>,
}

/// Two-sided 97.5% standard-normal quantile (1.959963984540054; from memory,
/// agrees with statrs' inverse CDF, checked in a test below).
const Z975: f64 = 1.959_963_984_540_054;

fn median(values: &mut [f64]) -> Option<f64> {
    if values.is_empty() {
        return None;
    }
    values.sort_by(f64::total_cmp);
    let n = values.len();
    Some(if n % 2 == 1 {
        values[n / 2]
    } else {
        0.5 * (values[n / 2 - 1] + values[n / 2])
    })
}

impl Cell {
    /// One participant's contribution, restricted to the dates `within` accepts.
    fn of_participant(
        targets: &[&Event],
        others: &[&Event],
        result: &ParticipantResult,
        within: impl Fn(NaiveDate) -> bool,
    ) -> Cell {
        let in_target = |d: NaiveDate| targets.iter().any(|e| e.start <= d && d <= e.end);
        let in_other = |d: NaiveDate| others.iter().any(|e| e.start <= d && d <= e.end);
        let mut cell = Cell::default();
        for e in targets.iter().filter(|e| within(e.start)) {
            cell.events += 1;
            if let Some(first) = result.alarm_dates.range(e.start..=e.end).next() {
                cell.detected += 1;
                cell.lead_from_start
                    .push((*first - e.start).num_days() as f64);
                if let Some(onset) = e.symptom_onset {
                    cell.lead_from_onset
                        .push((*first - onset).num_days() as f64);
                }
            }
        }
        cell.false_alarm_days = result
            .alarm_dates
            .iter()
            .filter(|d| within(**d) && !in_target(**d))
            .count();
        cell.false_alarm_episodes = result
            .episodes
            .iter()
            .filter(|(first, last)| {
                within(*first)
                    && !result
                        .alarm_dates
                        .range(*first..=*last)
                        .any(|d| in_target(*d))
            })
            .count();
        for d in result.days.iter().filter(|d| within(d.date)) {
            cell.participants = 1;
            if in_target(d.date) {
                continue;
            }
            cell.days_outside_targets += 1;
            if in_other(d.date) {
                continue;
            }
            cell.coverage_n += d.readings as usize;
            cell.covered += d.covered as usize;
            cell.nlpd_sum += d.nlpd_sum;
        }
        cell
    }

    fn absorb(&mut self, o: Cell) {
        self.participants += o.participants;
        self.events += o.events;
        self.detected += o.detected;
        self.lead_from_start.extend(o.lead_from_start);
        self.lead_from_onset.extend(o.lead_from_onset);
        self.false_alarm_days += o.false_alarm_days;
        self.false_alarm_episodes += o.false_alarm_episodes;
        self.days_outside_targets += o.days_outside_targets;
        self.covered += o.covered;
        self.coverage_n += o.coverage_n;
        self.nlpd_sum += o.nlpd_sum;
    }
}

impl Accumulator {
    /// An accumulator that also reports each of `periods` under [`PERIOD_COLUMN`].
    pub fn with_periods(periods: Vec<Period>) -> Self {
        Accumulator {
            cells: BTreeMap::new(),
            periods,
        }
    }

    /// Adds one participant's result. `groups` are the participant's group
    /// columns (`participants.csv`); `targets` its target events; `others` its
    /// other events (their days are false-alarm days but not calibration days).
    pub fn add(
        &mut self,
        groups: &BTreeMap<String, String>,
        targets: &[&Event],
        others: &[&Event],
        result: &ParticipantResult,
    ) {
        let mut whole = Cell::of_participant(targets, others, result, |_| true);
        // A participant counts in the whole cohort even without a scored day.
        whole.participants = 1;
        let mut keys: Vec<Subgroup> = vec![("all".into(), "all".into())];
        keys.extend(groups.iter().map(|(k, v)| (k.clone(), v.clone())));
        for key in keys {
            self.cells.entry(key).or_default().absorb(whole.clone());
        }
        if let Some(origin) = result.first_date {
            for period in &self.periods {
                let cell =
                    Cell::of_participant(targets, others, result, |d| period.contains(origin, d));
                self.cells
                    .entry((PERIOD_COLUMN.into(), period.label.clone()))
                    .or_default()
                    .absorb(cell);
            }
        }
    }

    /// Merges another accumulator (e.g. from another thread) with the same periods.
    pub fn merge(&mut self, other: Accumulator) {
        for (key, o) in other.cells {
            self.cells.entry(key).or_default().absorb(o);
        }
    }

    /// Final metrics per subgroup: `("all", "all")` first, then group columns
    /// and their levels in alphabetical order, then the periods in their order.
    pub fn finish(self) -> Vec<(Subgroup, Metrics)> {
        let periods = self.periods;
        let mut out: Vec<(Subgroup, Metrics)> = self
            .cells
            .into_iter()
            .map(|(key, mut c)| {
                let months = c.days_outside_targets as f64 / 30.4375;
                let m = Metrics {
                    participants: c.participants,
                    events: c.events,
                    events_detected: c.detected,
                    sensitivity: (c.events > 0).then(|| c.detected as f64 / c.events as f64),
                    false_alarms_per_participant_month: (months > 0.0)
                        .then(|| c.false_alarm_days as f64 / months),
                    false_alarm_episodes_per_participant_month: (months > 0.0)
                        .then(|| c.false_alarm_episodes as f64 / months),
                    median_lead_from_start_days: median(&mut c.lead_from_start),
                    median_lead_from_onset_days: median(&mut c.lead_from_onset),
                    coverage_95: (c.coverage_n > 0).then(|| c.covered as f64 / c.coverage_n as f64),
                    mean_nlpd: (c.coverage_n > 0).then(|| c.nlpd_sum / c.coverage_n as f64),
                    days_outside_targets: c.days_outside_targets,
                    calibration_signal_days: c.coverage_n,
                };
                (key, m)
            })
            .collect();
        let rank = |(col, lvl): &Subgroup| {
            let period = (col == PERIOD_COLUMN)
                .then(|| periods.iter().position(|p| &p.label == lvl))
                .flatten();
            (
                col != "all",
                col == PERIOD_COLUMN,
                col.clone(),
                period,
                lvl.clone(),
            )
        };
        out.sort_by_key(|(key, _)| rank(key));
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use statrs::distribution::{ContinuousCDF, Normal};

    fn date(d: u32) -> NaiveDate {
        NaiveDate::from_ymd_opt(2026, 1, d).unwrap()
    }

    #[test]
    fn z975_matches_statrs() {
        // statrs 0.19 inverse CDF of the standard normal.
        assert!((Normal::standard().inverse_cdf(0.975) - Z975).abs() < 1e-9);
    }

    #[test]
    fn hand_computed_case() {
        // One event on days 10–14 (onset day 12); alarms on days 3, 11 and 20.
        // Scored, observed days 1..=30 with mean 60, sd 10 (bpm; scale 10 → sd 1).
        let event = Event {
            participant: "p1".into(),
            kind: "acute_illness".into(),
            start: date(10),
            end: date(14),
            symptom_onset: Some(date(12)),
        };
        let days: Vec<ScoredDay> = (1..=30)
            .map(|d| ScoredDay {
                signal: Signal::RestingHr,
                date: date(d),
                // Day 5 lies outside the 95% band; every other day at the mean.
                observed: if d == 5 { 85.0 } else { 60.0 },
                mean: 60.0,
                sd: 10.0,
            })
            .collect();
        let result = ParticipantResult {
            first_date: Some(date(1)),
            days: scored_dates(&days),
            alarm_dates: [date(3), date(11), date(20)].into_iter().collect(),
            episodes: vec![
                (date(3), date(3)),
                (date(11), date(11)),
                (date(20), date(20)),
            ],
        };
        let groups = BTreeMap::from([("sex".to_string(), "female".to_string())]);
        let mut acc = Accumulator::default();
        acc.add(&groups, &[&event], &[], &result);
        let out = acc.finish();
        assert_eq!(out[0].0, ("all".to_string(), "all".to_string()));
        let m = &out[0].1;
        assert_eq!(m.events_detected, 1);
        assert_eq!(m.sensitivity, Some(1.0));
        // Lead: first alarm in window is day 11: 11 − 10 = 1; 11 − 12 = −1.
        assert_eq!(m.median_lead_from_start_days, Some(1.0));
        assert_eq!(m.median_lead_from_onset_days, Some(-1.0));
        // Event-free scored days: 30 − 5 = 25; false alarm-days: 2 (days 3, 20).
        assert_eq!(m.days_outside_targets, 25);
        assert_eq!(m.calibration_signal_days, 25);
        let fa = m.false_alarms_per_participant_month.unwrap();
        assert!((fa - 2.0 / (25.0 / 30.4375)).abs() < 1e-12);
        // Three episodes, one inside the event: two false episodes.
        let fe = m.false_alarm_episodes_per_participant_month.unwrap();
        assert!((fe - 2.0 / (25.0 / 30.4375)).abs() < 1e-12);
        // Coverage 24/25; NLPD: 24 days at r = 0 (0.5 ln 2π) and one at r = 2.5.
        assert!((m.coverage_95.unwrap() - 24.0 / 25.0).abs() < 1e-12);
        let half_ln_2pi = 0.5 * (2.0 * std::f64::consts::PI).ln();
        let expected = (25.0 * half_ln_2pi + 0.5 * 2.5f64.powi(2)) / 25.0;
        assert!((m.mean_nlpd.unwrap() - expected).abs() < 1e-12);
        assert_eq!(out[1].0, ("sex".to_string(), "female".to_string()));
    }

    /// The same participant with a non-target event on days 20–21 and two
    /// periods (days 1–14, 15+): the alarm on day 20 stays a false alarm, days
    /// 20–21 leave the calibration set, and each period gets its own share.
    #[test]
    fn other_events_and_periods() {
        let event = |kind: &str, start: u32, end: u32| Event {
            participant: "p1".into(),
            kind: kind.into(),
            start: date(start),
            end: date(end),
            symptom_onset: None,
        };
        let illness = event("acute_illness", 10, 14);
        let stressor = event("late_night_alcohol", 20, 21);
        let result = ParticipantResult {
            first_date: Some(date(1)),
            days: scored_dates(
                &(1..=30)
                    .map(|d| ScoredDay {
                        signal: Signal::Sleep,
                        date: date(d),
                        observed: 7.0,
                        mean: 7.0,
                        sd: 1.0,
                    })
                    .collect::<Vec<_>>(),
            ),
            alarm_dates: [date(3), date(11), date(20)].into_iter().collect(),
            episodes: vec![
                (date(3), date(3)),
                (date(11), date(11)),
                (date(20), date(20)),
            ],
        };
        let mut acc =
            Accumulator::with_periods(vec![Period::days(1, Some(14)), Period::days(15, None)]);
        acc.add(&BTreeMap::new(), &[&illness], &[&stressor], &result);
        let out = acc.finish();
        let labels: Vec<&str> = out.iter().map(|((_, l), _)| l.as_str()).collect();
        assert_eq!(labels, ["all", "1-14", "15+"]);
        let all = &out[0].1;
        assert_eq!(all.days_outside_targets, 25);
        assert_eq!(all.calibration_signal_days, 23);
        let fa = all.false_alarms_per_participant_month.unwrap();
        assert!((fa - 2.0 / (25.0 / 30.4375)).abs() < 1e-12);
        let first = &out[1].1;
        assert_eq!((first.events, first.events_detected), (1, 1));
        // Days 1–14 minus the event days 10–14: 9 days, one false alarm (day 3).
        assert_eq!(first.days_outside_targets, 9);
        assert!((first.false_alarms_per_participant_month.unwrap() - 30.4375 / 9.0).abs() < 1e-12);
        let second = &out[2].1;
        assert_eq!((second.events, second.sensitivity), (0, None));
        assert_eq!(second.days_outside_targets, 16);
        assert_eq!(second.calibration_signal_days, 14);
    }
}
