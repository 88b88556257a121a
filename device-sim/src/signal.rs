//! The daily signals of the cohort data format, with units, plausible ranges
//! and the fixed reference scale used to standardise each on device.

use std::fmt;
use std::str::FromStr;

/// One daily measure, named after its column in `daily.csv`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Signal {
    RestingHr,
    HrvRmssd,
    Sleep,
    SkinTempDelta,
    Steps,
    RespRate,
}

impl Signal {
    /// Every signal, in the column order of `daily.csv`.
    pub const ALL: [Signal; 6] = [
        Signal::RestingHr,
        Signal::HrvRmssd,
        Signal::Sleep,
        Signal::SkinTempDelta,
        Signal::Steps,
        Signal::RespRate,
    ];

    /// Column name in `daily.csv`.
    pub fn column(self) -> &'static str {
        match self {
            Signal::RestingHr => "resting_hr_bpm",
            Signal::HrvRmssd => "hrv_rmssd_ms",
            Signal::Sleep => "sleep_h",
            Signal::SkinTempDelta => "skin_temp_delta_c",
            Signal::Steps => "steps",
            Signal::RespRate => "resp_rate_brpm",
        }
    }

    /// Unit for display.
    pub fn unit(self) -> &'static str {
        match self {
            Signal::RestingHr => "bpm",
            Signal::HrvRmssd => "ms",
            Signal::Sleep => "h",
            Signal::SkinTempDelta => "°C",
            Signal::Steps => "steps",
            Signal::RespRate => "breaths/min",
        }
    }

    /// Plain-language name for display.
    pub fn label(self) -> &'static str {
        match self {
            Signal::RestingHr => "resting heart rate",
            Signal::HrvRmssd => "overnight HRV (RMSSD)",
            Signal::Sleep => "sleep duration",
            Signal::SkinTempDelta => "skin temperature deviation",
            Signal::Steps => "daily steps",
            Signal::RespRate => "overnight respiratory rate",
        }
    }

    /// Inclusive plausible range from the data-format contract; values
    /// outside it are input errors.
    pub fn plausible_range(self) -> (f64, f64) {
        match self {
            Signal::RestingHr => (25.0, 220.0),
            Signal::HrvRmssd => (1.0, 300.0),
            Signal::Sleep => (0.0, 24.0),
            Signal::SkinTempDelta => (-5.0, 5.0),
            Signal::Steps => (0.0, 100_000.0),
            Signal::RespRate => (4.0, 60.0),
        }
    }

    /// Fixed centre and scale (signal units) used to standardise observations
    /// before any GP computation: `z = (y - centre) / scale`.
    ///
    /// These are round numbers of the order of adult population values
    /// (common practice); they only set the units the optimiser works in and
    /// are never learned from data, so they carry no participant information.
    pub fn reference(self) -> (f64, f64) {
        match self {
            Signal::RestingHr => (65.0, 10.0),
            Signal::HrvRmssd => (40.0, 20.0),
            Signal::Sleep => (7.0, 1.0),
            Signal::SkinTempDelta => (0.0, 0.5),
            Signal::Steps => (8000.0, 4000.0),
            Signal::RespRate => (15.0, 2.0),
        }
    }
}

impl fmt::Display for Signal {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.column())
    }
}

/// Error for a column name that is not a known signal.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct UnknownSignal(pub String);

impl fmt::Display for UnknownSignal {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "unknown signal column `{}`", self.0)
    }
}

impl std::error::Error for UnknownSignal {}

impl FromStr for Signal {
    type Err = UnknownSignal;

    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Signal::ALL
            .into_iter()
            .find(|sig| sig.column() == s)
            .ok_or_else(|| UnknownSignal(s.to_owned()))
    }
}
