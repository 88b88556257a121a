//! Detection metrics against ground-truth event windows, accumulated one
//! participant at a time so a large cohort never sits in memory.
//!
//! Definitions (stable; the JSON report uses these names):
//! - `sensitivity`: detected target events / target events, where an event is
//!   detected when an alarm fires on a day from its `start` to its `end`
//!   (inclusive).
//! - `false_alarms_per_participant_month`: alarm-days outside every target
//!   event window, divided by event-free observed participant-days / 30.4375.
//!   An alarm-day is a (participant, date) with at least one flag; several
//!   flags on one day count once.
//! - `median_lead_from_start_days`, `median_lead_from_onset_days`: median over
//!   detected events of (first alarm date − event start) and (first alarm date
//!   − symptom onset); negative = before onset.
//! - `coverage_95`: share of scored, event-free observed days whose value lies
//!   inside the nominal 95% prospective band.
//! - `mean_nlpd`: mean negative log predictive density of those days under
//!   N(mean, sd²), in standardised units `(y − centre) / scale` so signals
//!   are comparable (nats per observation).

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

/// Everything one method produced for one participant.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ParticipantResult {
    /// Days past the method's cold start (only these are scored).
    pub days: Vec<ScoredDay>,
    /// Dates with at least one flag (any level, any detector).
    pub alarm_dates: BTreeSet<NaiveDate>,
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
    event_free_days: usize,
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
    pub median_lead_from_start_days: Option<f64>,
    pub median_lead_from_onset_days: Option<f64>,
    pub coverage_95: Option<f64>,
    pub mean_nlpd: Option<f64>,
    pub event_free_days: usize,
}

/// Subgroup key: `("all", "all")` or `(group column, level)`.
pub type Subgroup = (String, String);

/// Accumulates metrics per subgroup for one method at one threshold setting.
#[derive(Debug, Clone, Default)]
pub struct Accumulator {
    cells: BTreeMap<Subgroup, Cell>,
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

impl Accumulator {
    /// Adds one participant's result. `groups` are the participant's group
    /// columns (`participants.csv`); `targets` its target events.
    pub fn add(
        &mut self,
        groups: &BTreeMap<String, String>,
        targets: &[&Event],
        result: &ParticipantResult,
    ) {
        let inside = |d: NaiveDate| targets.iter().any(|e| e.start <= d && d <= e.end);
        let mut cell = Cell {
            participants: 1,
            events: targets.len(),
            ..Cell::default()
        };
        for e in targets {
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
        cell.false_alarm_days = result.alarm_dates.iter().filter(|d| !inside(**d)).count();
        let scored_dates: BTreeSet<NaiveDate> = result.days.iter().map(|d| d.date).collect();
        cell.event_free_days = scored_dates.iter().filter(|d| !inside(**d)).count();
        for d in result.days.iter().filter(|d| !inside(d.date)) {
            if !(d.sd > 0.0 && d.sd.is_finite()) {
                continue;
            }
            cell.coverage_n += 1;
            if (d.observed - d.mean).abs() <= Z975 * d.sd {
                cell.covered += 1;
            }
            let (_, scale) = d.signal.reference();
            let sd = d.sd / scale;
            let r = (d.observed - d.mean) / scale;
            cell.nlpd_sum +=
                0.5 * (2.0 * std::f64::consts::PI * sd * sd).ln() + 0.5 * (r / sd).powi(2);
        }
        let mut keys: Vec<Subgroup> = vec![("all".into(), "all".into())];
        keys.extend(groups.iter().map(|(k, v)| (k.clone(), v.clone())));
        for key in keys {
            let c = self.cells.entry(key).or_default();
            c.participants += cell.participants;
            c.events += cell.events;
            c.detected += cell.detected;
            c.lead_from_start.extend(&cell.lead_from_start);
            c.lead_from_onset.extend(&cell.lead_from_onset);
            c.false_alarm_days += cell.false_alarm_days;
            c.event_free_days += cell.event_free_days;
            c.covered += cell.covered;
            c.coverage_n += cell.coverage_n;
            c.nlpd_sum += cell.nlpd_sum;
        }
    }

    /// Merges another accumulator (e.g. from another thread).
    pub fn merge(&mut self, other: Accumulator) {
        for (key, o) in other.cells {
            let c = self.cells.entry(key).or_default();
            c.participants += o.participants;
            c.events += o.events;
            c.detected += o.detected;
            c.lead_from_start.extend(o.lead_from_start);
            c.lead_from_onset.extend(o.lead_from_onset);
            c.false_alarm_days += o.false_alarm_days;
            c.event_free_days += o.event_free_days;
            c.covered += o.covered;
            c.coverage_n += o.coverage_n;
            c.nlpd_sum += o.nlpd_sum;
        }
    }

    /// Final metrics per subgroup, `("all", "all")` first.
    pub fn finish(self) -> Vec<(Subgroup, Metrics)> {
        let mut out: Vec<(Subgroup, Metrics)> = self
            .cells
            .into_iter()
            .map(|(key, mut c)| {
                let months = c.event_free_days as f64 / 30.4375;
                let m = Metrics {
                    participants: c.participants,
                    events: c.events,
                    events_detected: c.detected,
                    sensitivity: (c.events > 0).then(|| c.detected as f64 / c.events as f64),
                    false_alarms_per_participant_month: (months > 0.0)
                        .then(|| c.false_alarm_days as f64 / months),
                    median_lead_from_start_days: median(&mut c.lead_from_start),
                    median_lead_from_onset_days: median(&mut c.lead_from_onset),
                    coverage_95: (c.coverage_n > 0).then(|| c.covered as f64 / c.coverage_n as f64),
                    mean_nlpd: (c.coverage_n > 0).then(|| c.nlpd_sum / c.coverage_n as f64),
                    event_free_days: c.event_free_days,
                };
                (key, m)
            })
            .collect();
        out.sort_by_key(|((col, lvl), _)| (col != "all", col.clone(), lvl.clone()));
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
            days,
            alarm_dates: [date(3), date(11), date(20)].into_iter().collect(),
        };
        let groups = BTreeMap::from([("sex".to_string(), "female".to_string())]);
        let mut acc = Accumulator::default();
        acc.add(&groups, &[&event], &result);
        let out = acc.finish();
        assert_eq!(out[0].0, ("all".to_string(), "all".to_string()));
        let m = &out[0].1;
        assert_eq!(m.events_detected, 1);
        assert_eq!(m.sensitivity, Some(1.0));
        // Lead: first alarm in window is day 11: 11 − 10 = 1; 11 − 12 = −1.
        assert_eq!(m.median_lead_from_start_days, Some(1.0));
        assert_eq!(m.median_lead_from_onset_days, Some(-1.0));
        // Event-free scored days: 30 − 5 = 25; false alarm-days: 2 (days 3, 20).
        assert_eq!(m.event_free_days, 25);
        let fa = m.false_alarms_per_participant_month.unwrap();
        assert!((fa - 2.0 / (25.0 / 30.4375)).abs() < 1e-12);
        // Coverage 24/25; NLPD: 24 days at r = 0 (0.5 ln 2π) and one at r = 2.5.
        assert!((m.coverage_95.unwrap() - 24.0 / 25.0).abs() < 1e-12);
        let half_ln_2pi = 0.5 * (2.0 * std::f64::consts::PI).ln();
        let expected = (25.0 * half_ln_2pi + 0.5 * 2.5f64.powi(2)) / 25.0;
        assert!((m.mean_nlpd.unwrap() - expected).abs() < 1e-12);
        assert_eq!(out[1].0, ("sex".to_string(), "female".to_string()));
    }
}
