//! A device's data completeness, as the study's lead sees it: per enrolled
//! signal, how many days of the participant's series carry a value and the
//! last such day, plus the series' first and last day. Counts and dates
//! only; no value of any day ever travels in it (the message has no field
//! that could hold one). The device sends a new summary on each run; the
//! aggregator keeps the latest per device (`data_summaries`, schema 7).

use chrono::NaiveDate;
use serde::{Deserialize, Serialize};

use crate::error::{AggregatorError, Result};

/// One signal's completeness on a device.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct SignalCoverage {
    pub signal: String,
    /// Days of the series with a value of this signal.
    pub days_with_data: u32,
    /// Last day with a value; `None` when no day has one.
    pub last_day: Option<NaiveDate>,
}

/// A device's data completeness.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct DataSummary {
    /// First and last day of the participant's series, inclusive.
    pub first_day: NaiveDate,
    pub last_day: NaiveDate,
    /// One entry per enrolled signal, in the order sent.
    pub signals: Vec<SignalCoverage>,
}

impl DataSummary {
    /// Calendar days from the first to the last day, both included.
    pub fn span_days(&self) -> u32 {
        (self.last_day - self.first_day).num_days().max(0) as u32 + 1
    }

    /// Share of the span's days with a value of `signal` (0 to 1), or `None`
    /// when the summary does not cover that signal.
    pub fn completeness(&self, signal: &str) -> Option<f64> {
        self.signals
            .iter()
            .find(|c| c.signal == signal)
            .map(|c| f64::from(c.days_with_data) / f64::from(self.span_days()))
    }

    /// Last day with a value of any signal.
    pub fn last_data_day(&self) -> Option<NaiveDate> {
        self.signals.iter().filter_map(|c| c.last_day).max()
    }

    /// Checks that the summary can be true of a device that enrolled
    /// `enrolled`: the span runs forwards, every signal is enrolled and
    /// appears once, no count exceeds the span, and every last day lies in it
    /// (present exactly when the count is not zero). Errors name the field.
    pub fn validate(&self, enrolled: &[String]) -> Result<()> {
        if self.last_day < self.first_day {
            return Err(AggregatorError::invalid(
                "last_day",
                format!("{} is before first_day {}", self.last_day, self.first_day),
            ));
        }
        // A series longer than 100 years is not a wearable's (common practice: a sanity bound).
        if self.span_days() > 36_525 {
            return Err(AggregatorError::invalid(
                "last_day",
                format!(
                    "the span {} to {} exceeds 100 years",
                    self.first_day, self.last_day
                ),
            ));
        }
        let span = self.span_days();
        for (i, c) in self.signals.iter().enumerate() {
            let at = format!("signals[{i}]");
            if !enrolled.contains(&c.signal) {
                return Err(AggregatorError::invalid(
                    format!("{at}.signal"),
                    format!(
                        "`{}` is not a signal this device enrolled ({})",
                        c.signal,
                        enrolled.join(", ")
                    ),
                ));
            }
            if self.signals[..i].iter().any(|o| o.signal == c.signal) {
                return Err(AggregatorError::invalid(
                    format!("{at}.signal"),
                    format!("`{}` appears twice", c.signal),
                ));
            }
            if c.days_with_data > span {
                return Err(AggregatorError::invalid(
                    format!("{at}.days_with_data"),
                    format!("{} days with data in a {span}-day span", c.days_with_data),
                ));
            }
            match c.last_day {
                None if c.days_with_data > 0 => {
                    return Err(AggregatorError::invalid(
                        format!("{at}.last_day"),
                        format!("missing while days_with_data is {}", c.days_with_data),
                    ));
                }
                Some(d) if c.days_with_data == 0 => {
                    return Err(AggregatorError::invalid(
                        format!("{at}.last_day"),
                        format!("{d} given while days_with_data is 0"),
                    ));
                }
                Some(d) if d < self.first_day || d > self.last_day => {
                    return Err(AggregatorError::invalid(
                        format!("{at}.last_day"),
                        format!(
                            "{d} lies outside the series {} to {}",
                            self.first_day, self.last_day
                        ),
                    ));
                }
                _ => {}
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn day(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    fn summary() -> DataSummary {
        DataSummary {
            first_day: day("2024-03-01"),
            last_day: day("2024-03-31"),
            signals: vec![
                SignalCoverage {
                    signal: "resting_hr".into(),
                    days_with_data: 28,
                    last_day: Some(day("2024-03-30")),
                },
                SignalCoverage {
                    signal: "steps".into(),
                    days_with_data: 0,
                    last_day: None,
                },
            ],
        }
    }

    fn enrolled() -> Vec<String> {
        vec!["resting_hr".into(), "steps".into()]
    }

    #[test]
    fn span_completeness_and_last_day() {
        let s = summary();
        // March has 31 days (calendar).
        assert_eq!(s.span_days(), 31);
        assert!((s.completeness("resting_hr").unwrap() - 28.0 / 31.0).abs() < 1e-12);
        assert_eq!(s.completeness("steps"), Some(0.0));
        assert_eq!(s.completeness("hrv_rmssd"), None);
        assert_eq!(s.last_data_day(), Some(day("2024-03-30")));
        s.validate(&enrolled()).unwrap();
    }

    #[test]
    fn impossible_summaries_name_their_field() {
        let field_of = |s: &DataSummary| match s.validate(&enrolled()) {
            Err(AggregatorError::InvalidArgument { field, .. }) => field,
            other => panic!("expected a refusal, got {other:?}"),
        };
        let mut s = summary();
        s.signals[0].days_with_data = 32;
        assert_eq!(field_of(&s), "signals[0].days_with_data");
        let mut s = summary();
        s.signals[0].last_day = Some(day("2024-04-01"));
        assert_eq!(field_of(&s), "signals[0].last_day");
        let mut s = summary();
        s.signals[1].last_day = Some(day("2024-03-02"));
        assert_eq!(field_of(&s), "signals[1].last_day");
        let mut s = summary();
        s.signals[1].signal = "resting_hr".into();
        assert_eq!(field_of(&s), "signals[1].signal");
        let mut s = summary();
        s.signals[1].signal = "body_mass".into();
        assert_eq!(field_of(&s), "signals[1].signal");
        let mut s = summary();
        s.last_day = day("2024-02-28");
        assert_eq!(field_of(&s), "last_day");
    }
}
