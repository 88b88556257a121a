//! Cohort data: the types of the shared daily-summary format (`daily.csv`,
//! `participants.csv`, `events.csv`, see `shared/data-format.md`), its reader
//! and writer, and the cohort simulator that produces data with known truth.
//!
//! # Bad rows
//! A row with any bad cell (unparsable date or number, value outside the
//! plausible range, illegal participant id, wrong number of fields, or a
//! duplicate `(participant, date)`) is an input error. The reader
//! *quarantines the whole row*: none of its cells enter the cohort, every
//! bad cell of it is reported as its own [`InputIssue`], and under
//! [`BadRowPolicy::Quarantine`] all good rows are kept. Quarantining the row
//! rather than the cell is deliberate: a row with one impossible value is
//! likely wrong as a whole (shifted columns, a unit mix-up), and the contract
//! treats the row as the unit of input error. Of two rows for the same
//! participant and day the first one in the file is kept and the later one is
//! reported as the duplicate.
//!
//! Every issue with `line >= 2` names a quarantined row; issues on line 1 are
//! about the header (an unknown or repeated column, which is ignored) and
//! never abort. [`write_quarantine`] copies the quarantined rows of a file to
//! a separate CSV for inspection.
//!
//! # Architecture invariant
//! No async runtime, RPC or protobuf type appears in this module: it is plain
//! files in, plain Rust values out.

use std::collections::BTreeMap;
use std::fmt;
use std::path::{Path, PathBuf};

/// The calendar-day type of the cohort API, re-exported so that users of
/// this module need no direct `chrono` dependency.
pub use chrono::NaiveDate;

use crate::signal::Signal;

mod reader;
mod scenario;
mod simulate;
mod writer;

pub use reader::{
    Groups, echo, read_cohort, read_daily, read_events, read_participants, write_quarantine,
};
pub use scenario::{
    ArtifactModel, CycleModel, GroupLevel, GroupSpec, IllnessModel, MissingModel, PerSignal,
    Scenario, SignalModel, SleepCoupling, StressorModel, StressorShape, ValueScale,
};
pub use simulate::{SimulateOptions, SimulationSummary, simulate_to_dir};
pub use writer::{
    DailyWriter, EventsWriter, NumberFormat, ParticipantsWriter, decimals, write_cohort,
    write_daily, write_events, write_participants,
};

/// File names of the three cohort files inside a cohort folder.
pub const DAILY_FILE: &str = "daily.csv";
/// See [`DAILY_FILE`].
pub const PARTICIPANTS_FILE: &str = "participants.csv";
/// See [`DAILY_FILE`].
pub const EVENTS_FILE: &str = "events.csv";
/// Copy of the effective scenario written next to simulated data.
pub const SCENARIO_FILE: &str = "scenario.toml";

/// Event kind for a single-day spike artifact written by the simulator.
pub const KIND_ARTIFACT_SPIKE: &str = "artifact_spike";
/// Event kind for a run of stuck (repeated) values written by the simulator.
pub const KIND_ARTIFACT_STUCK: &str = "artifact_stuck";

/// All daily rows of one participant.
#[derive(Debug, Clone, PartialEq)]
pub struct ParticipantSeries {
    pub participant: String,
    /// Sorted ascending, unique.
    pub dates: Vec<NaiveDate>,
    /// One vector per signal column present in the file, aligned to `dates`;
    /// `None` is an empty cell.
    pub values: BTreeMap<Signal, Vec<Option<f64>>>,
}

impl ParticipantSeries {
    /// Observed days of one signal as `(day index since origin, value)`,
    /// skipping missing cells. Day indices are whole days and may be negative
    /// for dates before `origin`. Both vectors are empty if the signal has no
    /// column.
    pub fn observations(&self, signal: Signal, origin: NaiveDate) -> (Vec<f64>, Vec<f64>) {
        let Some(column) = self.values.get(&signal) else {
            return (Vec::new(), Vec::new());
        };
        self.dates
            .iter()
            .zip(column)
            .filter_map(|(date, value)| value.map(|v| ((*date - origin).num_days() as f64, v)))
            .unzip()
    }

    /// Signals with at least one observed value, in `daily.csv` column order.
    pub fn signals(&self) -> Vec<Signal> {
        self.values
            .iter()
            .filter(|(_, column)| column.iter().any(Option::is_some))
            .map(|(signal, _)| *signal)
            .collect()
    }
}

/// One ground-truth event from `events.csv`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Event {
    pub participant: String,
    /// E.g. `acute_illness`, `training_block`, `artifact_spike`.
    pub kind: String,
    /// First day (inclusive) on which the event changes any signal.
    pub start: NaiveDate,
    /// Last day (inclusive) on which the event changes any signal.
    pub end: NaiveDate,
    /// Day the event would become noticeable to the person, if it ever does.
    pub symptom_onset: Option<NaiveDate>,
}

/// A cohort as read from a folder.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Cohort {
    /// Sorted by participant id.
    pub participants: Vec<ParticipantSeries>,
    /// participant -> group column -> value. Empty cells are left out.
    pub groups: BTreeMap<String, BTreeMap<String, String>>,
    /// Sorted as in the file.
    pub events: Vec<Event>,
    /// Every problem found in any of the files, in file then line order.
    pub issues: Vec<InputIssue>,
}

/// One input problem: which file, which physical line, which column, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputIssue {
    pub file: PathBuf,
    /// 1-based physical line on which the record starts (the header is line 1).
    pub line: u64,
    /// 1-based column number and header name, when the problem is one cell.
    pub column: Option<(usize, String)>,
    pub reason: String,
}

impl InputIssue {
    /// True when the issue quarantined a data row (as opposed to a header
    /// remark such as an ignored unknown column).
    pub fn is_row_error(&self) -> bool {
        self.line >= 2
    }
}

impl fmt::Display for InputIssue {
    /// `daily.csv:17:3 (date): unparsable date `2024-13-01`, expected YYYY-MM-DD`
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let name = self.file.file_name().map_or_else(
            || self.file.display().to_string(),
            |n| n.to_string_lossy().into_owned(),
        );
        match &self.column {
            Some((number, column)) => {
                write!(
                    f,
                    "{name}:{}:{number} ({column}): {}",
                    self.line, self.reason
                )
            }
            None => write!(f, "{name}:{}: {}", self.line, self.reason),
        }
    }
}

/// Folder, under a command's output folder, that holds the quarantine
/// copies of bad rows ([`write_quarantine_files`]).
pub const QUARANTINE_DIR: &str = "quarantine";

/// One input file's quarantine copy.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct QuarantineFile {
    /// The file read.
    pub source: PathBuf,
    /// Where its bad rows were copied; `None` when the source is not a
    /// regular file (a pipe cannot be read again): its rows are then known
    /// only from the issues.
    pub written: Option<PathBuf>,
    /// Bad rows of the source (issues on distinct lines ≥ 2).
    pub rows: usize,
}

impl fmt::Display for QuarantineFile {
    /// `3 bad rows of daily.csv copied to out/quarantine/daily.csv`
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let rows = if self.rows == 1 { "row" } else { "rows" };
        match &self.written {
            Some(out) => write!(
                f,
                "{} bad {rows} of {} copied to {}",
                self.rows,
                self.source.display(),
                out.display()
            ),
            None => write!(
                f,
                "{} bad {rows} of {} not copied ({} is not a regular file and cannot be read again; the issues list them)",
                self.rows,
                self.source.display(),
                self.source.display()
            ),
        }
    }
}

/// Copies the bad rows of every file named by a row issue to
/// `out_dir/quarantine/<file name>` ([`write_quarantine`]), creating the
/// folder; writes nothing when no row was quarantined. Errors name the path.
pub fn write_quarantine_files(
    issues: &[InputIssue],
    out_dir: &Path,
) -> Result<Vec<QuarantineFile>, CohortError> {
    let mut sources: Vec<&Path> = Vec::new();
    for issue in issues.iter().filter(|i| i.is_row_error()) {
        if !sources.contains(&issue.file.as_path()) {
            sources.push(&issue.file);
        }
    }
    let mut done = Vec::new();
    for source in sources {
        let mut lines: Vec<u64> = issues
            .iter()
            .filter(|i| i.is_row_error() && i.file == source)
            .map(|i| i.line)
            .collect();
        lines.dedup();
        let regular = std::fs::metadata(source).is_ok_and(|m| m.is_file());
        let written = if regular {
            let dir = out_dir.join(QUARANTINE_DIR);
            std::fs::create_dir_all(&dir).map_err(|e| CohortError::io(&dir, e))?;
            let name = source
                .file_name()
                .map_or_else(|| "input.csv".into(), |n| n.to_os_string());
            let out = dir.join(name);
            write_quarantine(source, issues, &out)?;
            Some(out)
        } else {
            None
        };
        done.push(QuarantineFile {
            source: source.to_owned(),
            written,
            rows: lines.len(),
        });
    }
    Ok(done)
}

/// What the reader does with a bad row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum BadRowPolicy {
    /// Keep the good rows, report every bad one as an [`InputIssue`].
    #[default]
    Quarantine,
    /// Stop at the first bad row with [`CohortError::Aborted`].
    Abort,
}

/// Errors of the cohort module. Row-level problems are [`InputIssue`]s, not
/// errors, unless the policy is [`BadRowPolicy::Abort`].
#[derive(Debug, thiserror::Error)]
pub enum CohortError {
    /// Reading or writing a file failed.
    #[error("{}: {source}", path.display())]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The CSV layer failed (an I/O error while parsing, in practice).
    #[error("{}: {source}", path.display())]
    Csv {
        path: PathBuf,
        #[source]
        source: csv::Error,
    },
    /// The file has no header (nothing, or only blank lines).
    #[error("{}: file is empty (no header)", path.display())]
    Empty { path: PathBuf },
    /// `daily.csv` has a header but no data row.
    #[error("{}: no rows (the file has a header and nothing after it)", path.display())]
    NoRows { path: PathBuf },
    /// A required column is absent from the header.
    #[error("{}: missing required column `{column}`", path.display())]
    MissingColumn { path: PathBuf, column: String },
    /// A bad row under [`BadRowPolicy::Abort`].
    #[error("bad input row, aborting: {0}")]
    Aborted(InputIssue),
    /// A scenario file that does not parse or does not make sense.
    #[error("scenario {}: {msg}", path.display())]
    Scenario { path: PathBuf, msg: String },
    /// A writer was handed a value the format cannot hold.
    #[error("{}: cannot write record: {msg}", path.display())]
    InvalidRecord { path: PathBuf, msg: String },
}

impl CohortError {
    pub(crate) fn io(path: &Path, source: std::io::Error) -> Self {
        CohortError::Io {
            path: path.to_owned(),
            source,
        }
    }
}

/// True when `id` matches `[A-Za-z0-9_-]{1,64}`.
pub fn is_valid_participant_id(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
}

/// Parses a strict ISO 8601 calendar date `YYYY-MM-DD`.
pub fn parse_date(text: &str) -> Option<NaiveDate> {
    let b = text.as_bytes();
    let digits = |r: std::ops::Range<usize>| b[r].iter().all(u8::is_ascii_digit);
    if b.len() != 10
        || b[4] != b'-'
        || b[7] != b'-'
        || !digits(0..4)
        || !digits(5..7)
        || !digits(8..10)
    {
        return None;
    }
    let year = text[0..4].parse().ok()?;
    let month = text[5..7].parse().ok()?;
    let day = text[8..10].parse().ok()?;
    NaiveDate::from_ymd_opt(year, month, day)
}
