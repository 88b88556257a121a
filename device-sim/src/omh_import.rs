//! Open mHealth (IEEE 1752.1) import: reads one participant's open mHealth JSON data points and
//! writes their daily summary as `daily.csv` (the rules are in `docs/data-format.md`, section
//! "Open mHealth import").
//!
//! # Inputs
//! A file holds one data point object, a JSON array of data points, or newline-delimited JSON
//! (one data point per line, blank lines ignored). A folder stands for every `*.json` file in it,
//! in name order. A data point is `{"header": {...}, "body": {...}}`; the header's `schema_id`
//! (`namespace` `omh`, `name`, `version`) chooses the mapping, `creation_date_time` must be an
//! RFC 3339 timestamp, and `user_id` may name the participant.
//!
//! # Mapping (schema name → column)
//! ```text
//! heart-rate              body.heart_rate {value, unit "beats/min"}, only when
//!                         body.temporal_relationship_to_physical_activity == "at rest"
//!                         (any other point is skipped)                    → resting_hr_bpm, mean
//! heart-rate-variability  body.heart_rate_variability {value, unit "ms"} with
//!                         body.algorithm == "RMSSD" (another algorithm is skipped)
//!                                                                          → hrv_rmssd_ms, mean
//! sleep-duration          body.sleep_duration {value, unit "h" | "min" | "sec" | "s" | "ms" | "d"}
//!                                                                          → sleep_h, sum
//! body-temperature        body.body_temperature {value, unit "C" | "F" | "K"}, absolute
//!                                                                          → skin_temp_delta_c
//! step-count              body.step_count, a number or {value, unit "steps"} → steps, sum
//! respiratory-rate        body.respiratory_rate {value, unit "breaths/min"} → resp_rate_brpm, mean
//! ```
//! Unit conversions: °F → °C `(v − 32) × 5/9`, K → °C `v − 273.15`; durations to hours by
//! 1 h = 60 min = 3600 s, 1 d = 24 h.
//!
//! # Days
//! A timestamp's day is the date part of the RFC 3339 text in its own offset (never converted to
//! UTC): `2024-03-02T06:40:00+09:00` is 2 March. `effective_time_frame` is a `date_time` or a
//! `time_interval` (`start_date_time` and `end_date_time`, or one of them and a `duration`).
//! Overnight measures (sleep, HRV, skin temperature, respiratory rate) belong to the day of
//! waking: the interval's end (a `date_time`'s own day). Daytime measures (resting heart rate,
//! steps) belong to the interval's start (a `date_time`'s own day), so a count over
//! 00:00–24:00 stays on its day; a count over an interval crossing midnight is not split.
//!
//! # Skin temperature reference
//! open mHealth carries absolute temperatures; `daily.csv` wants the nightly deviation from the
//! device's own reference. A night's temperature is the mean of the points ending that day; the
//! reference is the median of all imported nights of the participant; the column is the night
//! minus the reference. The reference is printed and reported ([`ImportReport`]).
//!
//! # Bad points
//! A point that cannot be used is refused and reported ([`PointIssue`]: file, position — the
//! line of a newline-delimited file, the index of an array — JSON pointer of the bad field, and
//! reason); every good point is kept. A point a rule leaves out on purpose (a heart rate not at
//! rest, HRV by another algorithm, a repeat of a point with the same `header.id` and content) is
//! skipped and counted, not refused; another point reusing a `header.id` is refused. Per point the value must
//! be finite and within the plausible range of `docs/data-format.md` (sleep 0–24 h and steps
//! 0–100000 per point as well as per day; absolute temperature 20–45 °C). When a day's sum or a
//! night's deviation falls outside the range, every point of that day is refused.
//!
//! # Architecture invariant
//! Plain files in, plain values out: no runtime, RPC or protobuf type. Rows are written by the
//! cohort writer ([`cohort::DailyWriter`]), so the output reads back with the cohort reader.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::fmt;
use std::path::{Path, PathBuf};

use chrono::{DateTime, FixedOffset, NaiveDate, TimeDelta};
use serde_json::Value;

use crate::cohort::{self, CohortError, DailyWriter, NumberFormat, is_valid_participant_id};
use crate::signal::Signal;

/// Plausible absolute body or skin temperature in °C; outside it a point is refused (a unit or
/// sensor error; wider than any skin or core temperature of a person wearing a device).
pub const ABSOLUTE_TEMPERATURE_RANGE_C: (f64, f64) = (20.0, 45.0);

/// Longest `duration` of a time interval accepted, in days.
const MAX_INTERVAL_DAYS: f64 = 366.0;

/// What `import-omh` is asked to do.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ImportOptions {
    /// Files and folders (a folder: every `*.json` in it, in name order).
    pub inputs: Vec<PathBuf>,
    /// Participant label; when `None`, the data points' `header.user_id` names the participant.
    pub participant: Option<String>,
    /// The `daily.csv` to write.
    pub out: PathBuf,
    /// Replace an existing `out`.
    pub overwrite: bool,
}

/// Where a data point sits in its file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Position {
    /// The file holds this one data point (or could not be parsed at all).
    Whole,
    /// 1-based line of a newline-delimited file.
    Line(u64),
    /// 0-based index in a JSON array.
    Index(usize),
}

/// One refused data point (or unreadable file): file, position, field and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PointIssue {
    pub file: PathBuf,
    pub position: Position,
    /// JSON pointer (RFC 6901) of the bad field inside the data point; empty for the point or
    /// the file as a whole.
    pub pointer: String,
    pub reason: String,
}

impl fmt::Display for PointIssue {
    /// `day.json [12] /body/heart_rate/unit: unknown unit `bpm`, expected `beats/min``, with
    /// `day.ndjson:3` for a line and the bare file name for a single-point file.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", place(&self.file, self.position))?;
        if !self.pointer.is_empty() {
            write!(f, " {}", self.pointer)?;
        }
        write!(f, ": {}", self.reason)
    }
}

/// `file.json`, `file.json:3` (a line) or `file.json [12]` (an array index).
fn place(file: &Path, position: Position) -> String {
    match position {
        Position::Whole => file.display().to_string(),
        Position::Line(line) => format!("{}:{line}", file.display()),
        Position::Index(index) => format!("{} [{index}]", file.display()),
    }
}

/// What an import read, used, skipped and refused, and what it wrote.
#[derive(Debug, Clone, PartialEq)]
pub struct ImportReport {
    pub participant: String,
    /// The file written; `None` when no point was usable (nothing is written then).
    pub written: Option<PathBuf>,
    /// Input files read.
    pub files: usize,
    /// Data points found (used + skipped + refused points; a file that is not JSON counts once).
    pub points_read: usize,
    /// Data points that went into a day's value.
    pub points_used: usize,
    /// Skipped points by reason.
    pub skipped: BTreeMap<&'static str, usize>,
    /// Every refused point, in file then position order (day-level refusals last).
    pub refused: Vec<PointIssue>,
    /// Rows written to `daily.csv`.
    pub days_written: usize,
    /// Days with a value, per column written.
    pub days_per_signal: BTreeMap<Signal, usize>,
    /// The skin temperature reference (°C) and the number of nights it is the median of.
    pub skin_temp_reference: Option<(f64, usize)>,
}

impl ImportReport {
    /// Skipped points in all.
    pub fn points_skipped(&self) -> usize {
        self.skipped.values().sum()
    }
}

/// Errors that stop an import. Bad data points are not errors but [`PointIssue`]s.
#[derive(Debug, thiserror::Error)]
pub enum ImportError {
    /// An input could not be read.
    #[error("cannot read {}: {source}", path.display())]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// A folder given as input holds no `*.json` file.
    #[error("{}: folder holds no *.json file", path.display())]
    EmptyFolder { path: PathBuf },
    /// The participant is unknown, ambiguous, or not a valid id.
    #[error("participant: {0}")]
    Participant(String),
    /// The output file exists and overwriting was not asked for.
    #[error("{} exists; pass --force to replace it", path.display())]
    OutputExists { path: PathBuf },
    /// Writing `daily.csv` failed.
    #[error(transparent)]
    Write(#[from] CohortError),
}

/// A data point that cannot be used: the field (JSON pointer) and why.
#[derive(Debug, Clone, PartialEq, Eq)]
struct Refusal {
    pointer: String,
    reason: String,
}

fn refuse(pointer: impl Into<String>, reason: impl Into<String>) -> Refusal {
    Refusal {
        pointer: pointer.into(),
        reason: reason.into(),
    }
}

/// One usable measurement of a data point, before daily aggregation.
#[derive(Debug, Clone, PartialEq)]
struct Measure {
    signal: Signal,
    date: NaiveDate,
    /// In the column's unit, except skin temperature: absolute °C.
    value: f64,
    /// JSON pointer of the value, named when a day-level check refuses the point.
    value_pointer: &'static str,
}

#[derive(Debug, Clone, PartialEq)]
enum Reading {
    Used(Measure),
    Skipped(&'static str),
}

/// Skip reason of a heart rate not at rest.
pub const SKIP_NOT_AT_REST: &str = "heart rate not at rest";
/// Skip reason of an HRV point computed by another algorithm than RMSSD.
pub const SKIP_NOT_RMSSD: &str = "heart rate variability not RMSSD";
/// Skip reason of a data point repeated with the same `header.id` and content (an export read
/// twice, overlapping exports).
pub const SKIP_DUPLICATE: &str = "repeated data point (same header.id and content)";

/// A hash of a data point's content, to tell a repeated point from a different one reusing its
/// `header.id` (serde_json keeps object keys sorted, so equal points print equally).
fn point_hash(point: &Value) -> u64 {
    use std::hash::{Hash, Hasher};
    let mut hasher = std::collections::hash_map::DefaultHasher::new();
    point.to_string().hash(&mut hasher);
    hasher.finish()
}

/// How a day's points combine.
fn is_summed(signal: Signal) -> bool {
    matches!(signal, Signal::Steps | Signal::Sleep)
}

/// Overnight measures take the day of waking (the interval's end).
fn is_overnight(signal: Signal) -> bool {
    matches!(
        signal,
        Signal::Sleep | Signal::HrvRmssd | Signal::SkinTempDelta | Signal::RespRate
    )
}

/// Reads the inputs, maps every data point, and writes `daily.csv` (unless nothing is usable).
pub fn import_omh(options: &ImportOptions) -> Result<ImportReport, ImportError> {
    let files = input_files(&options.inputs)?;
    if !options.overwrite && options.out.exists() {
        return Err(ImportError::OutputExists {
            path: options.out.clone(),
        });
    }
    let mut refused = Vec::new();
    let mut skipped: BTreeMap<&'static str, usize> = BTreeMap::new();
    let mut user_ids = BTreeSet::new();
    let mut measures: Vec<(usize, Position, Measure)> = Vec::new();
    let mut points_read = 0;
    // header.id → where it was first seen and a hash of that point.
    let mut seen: HashMap<String, (usize, Position, u64)> = HashMap::new();
    for (file_index, path) in files.iter().enumerate() {
        let bytes = std::fs::read(path).map_err(|source| ImportError::Io {
            path: path.clone(),
            source,
        })?;
        let text = String::from_utf8_lossy(&bytes);
        for (position, parsed) in split_points(&text) {
            points_read += 1;
            let issue = |r: Refusal| PointIssue {
                file: path.clone(),
                position,
                pointer: r.pointer,
                reason: r.reason,
            };
            let point = match parsed {
                Ok(point) => point,
                Err(reason) => {
                    refused.push(issue(refuse("", reason)));
                    continue;
                }
            };
            if let Some(id) = point.pointer("/header/id").and_then(Value::as_str) {
                let hash = point_hash(&point);
                match seen.get(id) {
                    None => {
                        seen.insert(id.to_owned(), (file_index, position, hash));
                    }
                    Some(&(_, _, first)) if first == hash => {
                        *skipped.entry(SKIP_DUPLICATE).or_default() += 1;
                        continue;
                    }
                    Some(&(first_file, first_position, _)) => {
                        refused.push(issue(refuse(
                            "/header/id",
                            format!(
                                "header.id `{}` already used by {} with different content",
                                cohort::echo(id),
                                place(&files[first_file], first_position)
                            ),
                        )));
                        continue;
                    }
                }
            }
            let (user_id, reading) = interpret(&point);
            if let Some(id) = user_id {
                user_ids.insert(id);
            }
            match reading {
                Ok(Reading::Used(m)) => measures.push((file_index, position, m)),
                Ok(Reading::Skipped(why)) => *skipped.entry(why).or_default() += 1,
                Err(r) => refused.push(issue(r)),
            }
        }
    }
    let participant = resolve_participant(options.participant.as_deref(), &user_ids)?;

    let mut days = aggregate(&measures);
    // Day-level checks: a sum or a nightly deviation out of range refuses the day's points.
    let skin_temp_reference = skin_temperature_deviation(&mut days);
    let mut points_used = 0;
    for (signal, by_day) in &mut days {
        let (low, high) = signal.plausible_range();
        by_day.retain(|date, day| {
            if (low..=high).contains(&day.value) {
                points_used += day.points.len();
                return true;
            }
            let what = if *signal == Signal::SkinTempDelta {
                "night's deviation from the reference"
            } else if is_summed(*signal) {
                "day's total"
            } else {
                "day's mean"
            };
            for &(file_index, position, pointer) in &day.points {
                refused.push(PointIssue {
                    file: files[file_index].clone(),
                    position,
                    pointer: pointer.to_owned(),
                    reason: format!(
                        "{what} on {date} is {} {}, outside {low}–{high} ({} points)",
                        round_for_text(day.value),
                        signal.unit(),
                        day.points.len()
                    ),
                });
            }
            false
        });
    }
    days.retain(|_, by_day| !by_day.is_empty());

    let mut report = ImportReport {
        participant,
        written: None,
        files: files.len(),
        points_read,
        points_used,
        skipped,
        refused,
        days_written: 0,
        days_per_signal: days.iter().map(|(s, d)| (*s, d.len())).collect(),
        skin_temp_reference,
    };
    if points_used == 0 {
        return Ok(report);
    }
    report.days_written = write_days(options, &report.participant, &days)?;
    report.written = Some(options.out.clone());
    Ok(report)
}

/// A value for a message: four significant decimals at most.
fn round_for_text(value: f64) -> f64 {
    (value * 10_000.0).round() / 10_000.0
}

/// The files named by the inputs: a file as given, a folder as its `*.json` files in name order.
fn input_files(inputs: &[PathBuf]) -> Result<Vec<PathBuf>, ImportError> {
    let io = |path: &Path| {
        let path = path.to_owned();
        move |source| ImportError::Io { path, source }
    };
    let mut files = Vec::new();
    for input in inputs {
        let meta = std::fs::metadata(input).map_err(io(input))?;
        if !meta.is_dir() {
            files.push(input.clone());
            continue;
        }
        let mut found = Vec::new();
        for entry in std::fs::read_dir(input).map_err(io(input))? {
            let path = entry.map_err(io(input))?.path();
            let is_json = path
                .extension()
                .is_some_and(|e| e.eq_ignore_ascii_case("json"));
            if is_json && path.is_file() {
                found.push(path);
            }
        }
        if found.is_empty() {
            return Err(ImportError::EmptyFolder {
                path: input.clone(),
            });
        }
        found.sort();
        files.extend(found);
    }
    Ok(files)
}

/// The data points of one file with their positions: a JSON array (by index), a single value
/// (the whole file), or newline-delimited JSON (by line). `Err` is a point (or file) that is not
/// JSON, with the parser's reason.
fn split_points(text: &str) -> Vec<(Position, Result<Value, String>)> {
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    if text.trim().is_empty() {
        return vec![(Position::Whole, Err("empty file: no data point".into()))];
    }
    let whole_error = match serde_json::from_str::<Value>(text) {
        Ok(Value::Array(items)) => {
            return items
                .into_iter()
                .enumerate()
                .map(|(i, v)| (Position::Index(i), Ok(v)))
                .collect();
        }
        Ok(value) => return vec![(Position::Whole, Ok(value))],
        Err(e) => e,
    };
    // Newline-delimited when there are several non-blank lines and one of them is a JSON object
    // by itself (a line of a pretty-printed object never is); otherwise the file is one broken
    // JSON text, reported once.
    let non_blank = || text.split('\n').filter(|l| !l.trim().is_empty());
    let has_object_line =
        non_blank().any(|l| serde_json::from_str::<Value>(l).is_ok_and(|v| v.is_object()));
    if !(has_object_line && non_blank().nth(1).is_some()) {
        return vec![(Position::Whole, Err(format!("not JSON: {whole_error}")))];
    }
    text.split('\n')
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty())
        .map(|(i, line)| {
            let parsed =
                serde_json::from_str::<Value>(line).map_err(|e| format!("line is not JSON: {e}"));
            (Position::Line(i as u64 + 1), parsed)
        })
        .collect()
}

/// The user id named by the point's header (if readable) and what the point gives.
fn interpret(point: &Value) -> (Option<String>, Result<Reading, Refusal>) {
    let user_id = point
        .pointer("/header/user_id")
        .and_then(Value::as_str)
        .map(str::to_owned);
    (user_id, read_point(point))
}

fn read_point(point: &Value) -> Result<Reading, Refusal> {
    if !point.is_object() {
        return Err(refuse("", "not a data point: expected a JSON object"));
    }
    let header = field(point, "", "header")?;
    let schema = field(header, "/header", "schema_id")?;
    let namespace = string(field(schema, "/header/schema_id", "namespace")?, || {
        "/header/schema_id/namespace".into()
    })?;
    let name = string(field(schema, "/header/schema_id", "name")?, || {
        "/header/schema_id/name".into()
    })?;
    let version = field(schema, "/header/schema_id", "version")?;
    let created = string(field(header, "/header", "creation_date_time")?, || {
        "/header/creation_date_time".into()
    })?;
    timestamp(created, "/header/creation_date_time")?;
    if let Some(user_id) = header.get("user_id")
        && !user_id.is_string()
    {
        return Err(refuse("/header/user_id", "expected a string"));
    }
    let body = field(point, "", "body")?;
    if !body.is_object() {
        return Err(refuse("/body", "expected an object"));
    }
    let schema_text = || {
        let version = version
            .as_str()
            .map_or_else(|| version.to_string(), str::to_owned);
        format!("{namespace}:{name}:{version}")
    };
    if namespace != "omh" {
        return Err(refuse(
            "/header/schema_id",
            format!(
                "unknown schema `{}` (namespace `omh` expected)",
                cohort::echo(&schema_text())
            ),
        ));
    }
    let (signal, value, value_pointer) = match name {
        "heart-rate" => {
            let relation = body.get("temporal_relationship_to_physical_activity");
            match relation {
                Some(Value::String(r)) if r == "at rest" => {}
                Some(v) if !v.is_string() => {
                    return Err(refuse(
                        "/body/temporal_relationship_to_physical_activity",
                        "expected a string",
                    ));
                }
                _ => return Ok(Reading::Skipped(SKIP_NOT_AT_REST)),
            }
            let value = unit_value(body, "/body", "heart_rate", &["beats/min"])?.0;
            (Signal::RestingHr, value, "/body/heart_rate/value")
        }
        "heart-rate-variability" => {
            // From memory, not checked against a published schema file: the algorithm field is
            // `body.algorithm` with values such as "RMSSD", "SDNN", "pNN50".
            let algorithm = string(field(body, "/body", "algorithm")?, || {
                "/body/algorithm".into()
            })?;
            if !algorithm.eq_ignore_ascii_case("RMSSD") {
                return Ok(Reading::Skipped(SKIP_NOT_RMSSD));
            }
            let value = unit_value(body, "/body", "heart_rate_variability", &["ms"])?.0;
            (
                Signal::HrvRmssd,
                value,
                "/body/heart_rate_variability/value",
            )
        }
        "sleep-duration" => {
            let (value, unit) = unit_value(body, "/body", "sleep_duration", DURATION_UNITS)?;
            let hours = duration_seconds(value, unit) / 3600.0;
            (Signal::Sleep, hours, "/body/sleep_duration/value")
        }
        "body-temperature" => {
            let (value, unit) = unit_value(body, "/body", "body_temperature", &["C", "F", "K"])?;
            let celsius = match unit {
                "F" => (value - 32.0) * 5.0 / 9.0,
                "K" => value - 273.15,
                _ => value,
            };
            let (low, high) = ABSOLUTE_TEMPERATURE_RANGE_C;
            if !(low..=high).contains(&celsius) {
                return Err(refuse(
                    "/body/body_temperature/value",
                    format!(
                        "{value} {unit} is {} °C, outside {low}–{high} °C",
                        round_for_text(celsius)
                    ),
                ));
            }
            // The range of `skin_temp_delta_c` applies to the night's deviation, later.
            (
                Signal::SkinTempDelta,
                celsius,
                "/body/body_temperature/value",
            )
        }
        "step-count" => {
            let steps = field(body, "/body", "step_count")?;
            if steps.is_object() {
                let value = unit_value(body, "/body", "step_count", &["steps"])?.0;
                (Signal::Steps, value, "/body/step_count/value")
            } else {
                let value = number(steps, "/body/step_count")?;
                (Signal::Steps, value, "/body/step_count")
            }
        }
        "respiratory-rate" => {
            let value = unit_value(body, "/body", "respiratory_rate", &["breaths/min"])?.0;
            (Signal::RespRate, value, "/body/respiratory_rate/value")
        }
        _ => {
            return Err(refuse(
                "/header/schema_id/name",
                format!(
                    "unknown schema `{}` (supported: heart-rate, heart-rate-variability, \
                     sleep-duration, body-temperature, step-count, respiratory-rate)",
                    cohort::echo(&schema_text())
                ),
            ));
        }
    };
    let (low, high) = signal.plausible_range();
    if signal != Signal::SkinTempDelta && !(low..=high).contains(&value) {
        return Err(refuse(
            value_pointer,
            format!(
                "{} {} outside {low}–{high}",
                round_for_text(value),
                signal.unit()
            ),
        ));
    }
    let (start, end) = frame_days(body)?;
    let date = if is_overnight(signal) { end } else { start };
    Ok(Reading::Used(Measure {
        signal,
        date,
        value,
        value_pointer,
    }))
}

/// Duration units accepted (sleep and interval durations), converted by [`duration_seconds`].
const DURATION_UNITS: &[&str] = &["ms", "sec", "s", "min", "h", "d"];

/// `value` in one of [`DURATION_UNITS`], in seconds.
fn duration_seconds(value: f64, unit: &str) -> f64 {
    match unit {
        "ms" => value / 1000.0,
        "min" => value * 60.0,
        "h" => value * 3600.0,
        "d" => value * 86_400.0,
        _ => value, // "sec", "s"
    }
}

/// `parent[key]`, or a refusal naming the missing field.
fn field<'a>(parent: &'a Value, base: &str, key: &str) -> Result<&'a Value, Refusal> {
    match parent.get(key) {
        Some(Value::Null) | None => Err(refuse(
            format!("{base}/{key}"),
            format!("missing field `{key}`"),
        )),
        Some(v) => Ok(v),
    }
}

fn string(value: &Value, pointer: impl FnOnce() -> String) -> Result<&str, Refusal> {
    value
        .as_str()
        .ok_or_else(|| refuse(pointer(), format!("expected a string, got {}", kind(value))))
}

fn number(value: &Value, pointer: &str) -> Result<f64, Refusal> {
    let v = value
        .as_f64()
        .ok_or_else(|| refuse(pointer, format!("expected a number, got {}", kind(value))))?;
    if !v.is_finite() {
        return Err(refuse(pointer, "not a finite number"));
    }
    Ok(v)
}

fn kind(value: &Value) -> String {
    match value {
        Value::String(s) => format!("the string `{}`", cohort::echo(s)),
        Value::Null => "null".into(),
        Value::Bool(b) => format!("{b}"),
        Value::Number(n) => format!("the number {n}"),
        Value::Array(_) => "an array".into(),
        Value::Object(_) => "an object".into(),
    }
}

/// `parent[key]` (at JSON pointer `base`) as a unit-value `{value, unit}` with `unit` one of
/// `units`.
fn unit_value(
    parent: &Value,
    base: &str,
    key: &str,
    units: &[&'static str],
) -> Result<(f64, &'static str), Refusal> {
    let object = field(parent, base, key)?;
    let base = format!("{base}/{key}");
    if !object.is_object() {
        return Err(refuse(
            &base,
            format!("expected a unit-value object, got {}", kind(object)),
        ));
    }
    let unit_pointer = format!("{base}/unit");
    let unit = string(field(object, &base, "unit")?, || unit_pointer.clone())?;
    let Some(unit) = units.iter().find(|u| **u == unit) else {
        let expected: Vec<String> = units.iter().map(|u| format!("`{u}`")).collect();
        return Err(refuse(
            unit_pointer,
            format!(
                "unknown unit `{}`, expected {}",
                cohort::echo(unit),
                expected.join(" or ")
            ),
        ));
    };
    let value = number(field(object, &base, "value")?, &format!("{base}/value"))?;
    Ok((value, unit))
}

/// Parses an RFC 3339 timestamp keeping its offset.
fn timestamp(text: &str, pointer: &str) -> Result<DateTime<FixedOffset>, Refusal> {
    DateTime::parse_from_rfc3339(text).map_err(|e| {
        refuse(
            pointer,
            format!(
                "unparsable timestamp `{}` ({e}), expected RFC 3339 such as 2024-03-02T06:40:00+01:00",
                cohort::echo(text)
            ),
        )
    })
}

/// The local days of `body.effective_time_frame`: (start, end) of an interval, or the day of a
/// `date_time` twice.
fn frame_days(body: &Value) -> Result<(NaiveDate, NaiveDate), Refusal> {
    const BASE: &str = "/body/effective_time_frame";
    let frame = field(body, "/body", "effective_time_frame")?;
    if let Some(at) = frame.get("date_time") {
        let pointer = format!("{BASE}/date_time");
        let day = timestamp(string(at, || pointer.clone())?, &pointer)?.date_naive();
        return Ok((day, day));
    }
    let Some(interval) = frame.get("time_interval") else {
        return Err(refuse(
            BASE,
            "missing field: `date_time` or `time_interval` expected",
        ));
    };
    const IBASE: &str = "/body/effective_time_frame/time_interval";
    let moment = |key: &str| -> Result<Option<DateTime<FixedOffset>>, Refusal> {
        let pointer = format!("{IBASE}/{key}");
        interval
            .get(key)
            .map(|v| timestamp(string(v, || pointer.clone())?, &pointer))
            .transpose()
    };
    let start = moment("start_date_time")?;
    let end = moment("end_date_time")?;
    let duration = match interval.get("duration") {
        None => None,
        Some(_) => {
            let (value, unit) = unit_value(interval, IBASE, "duration", DURATION_UNITS)?;
            let seconds = duration_seconds(value, unit);
            if !(0.0..=MAX_INTERVAL_DAYS * 86_400.0).contains(&seconds) {
                return Err(refuse(
                    format!("{IBASE}/duration/value"),
                    format!("duration {value} {unit} outside 0–{MAX_INTERVAL_DAYS} days"),
                ));
            }
            Some(TimeDelta::milliseconds((seconds * 1000.0).round() as i64))
        }
    };
    let (start, end) = match (start, end, duration) {
        (Some(s), Some(e), _) => (s, e),
        (Some(s), None, Some(d)) => (s, s + d),
        (None, Some(e), Some(d)) => (e - d, e),
        _ => {
            return Err(refuse(
                IBASE,
                "missing field: `start_date_time` and `end_date_time`, or one of them and `duration`",
            ));
        }
    };
    if end < start {
        return Err(refuse(
            format!("{IBASE}/end_date_time"),
            "the interval ends before it starts",
        ));
    }
    Ok((start.date_naive(), end.date_naive()))
}

/// One day's value of one signal and the points it came from.
#[derive(Debug, Clone, PartialEq)]
struct Day {
    /// Mean or sum of the points (for skin temperature: the night's mean in °C, then the
    /// deviation from the reference).
    value: f64,
    points: Vec<(usize, Position, &'static str)>,
}

/// Combines the measures per signal and day: mean, or sum for steps and sleep.
fn aggregate(
    measures: &[(usize, Position, Measure)],
) -> BTreeMap<Signal, BTreeMap<NaiveDate, Day>> {
    let mut days: BTreeMap<Signal, BTreeMap<NaiveDate, Day>> = BTreeMap::new();
    for (file, position, m) in measures {
        let day = days
            .entry(m.signal)
            .or_default()
            .entry(m.date)
            .or_insert(Day {
                value: 0.0,
                points: Vec::new(),
            });
        day.value += m.value;
        day.points.push((*file, *position, m.value_pointer));
    }
    for (signal, by_day) in &mut days {
        if !is_summed(*signal) {
            for day in by_day.values_mut() {
                day.value /= day.points.len() as f64;
            }
        }
    }
    days
}

/// Turns the nights' absolute skin temperatures into deviations from their median; returns
/// the reference (°C) and the number of nights.
fn skin_temperature_deviation(
    days: &mut BTreeMap<Signal, BTreeMap<NaiveDate, Day>>,
) -> Option<(f64, usize)> {
    let nights = days.get_mut(&Signal::SkinTempDelta)?;
    let mut values: Vec<f64> = nights.values().map(|d| d.value).collect();
    values.sort_by(f64::total_cmp);
    let n = values.len();
    let reference = if n % 2 == 1 {
        values[n / 2]
    } else {
        (values[n / 2 - 1] + values[n / 2]) / 2.0
    };
    for night in nights.values_mut() {
        night.value -= reference;
    }
    Some((reference, n))
}

/// Writes the days through the cohort writer; returns the number of rows.
fn write_days(
    options: &ImportOptions,
    participant: &str,
    days: &BTreeMap<Signal, BTreeMap<NaiveDate, Day>>,
) -> Result<usize, ImportError> {
    if let Some(parent) = options.out.parent().filter(|p| !p.as_os_str().is_empty()) {
        std::fs::create_dir_all(parent).map_err(|e| CohortError::Io {
            path: parent.to_owned(),
            source: e,
        })?;
    }
    let signals: Vec<Signal> = days.keys().copied().collect();
    let dates: BTreeSet<NaiveDate> = days.values().flat_map(|d| d.keys().copied()).collect();
    let mut writer = DailyWriter::create(&options.out, &signals, NumberFormat::Fixed)?;
    let columns = writer.signals().to_vec();
    let mut row = vec![None; columns.len()];
    for date in &dates {
        for (slot, signal) in columns.iter().enumerate() {
            row[slot] = days[signal].get(date).map(|d| d.value);
        }
        writer.write_row(participant, *date, &row)?;
    }
    writer.finish()?;
    Ok(dates.len())
}

/// The participant label: `--participant`, or else the one `header.user_id` of the points.
fn resolve_participant(
    flag: Option<&str>,
    user_ids: &BTreeSet<String>,
) -> Result<String, ImportError> {
    let listed = || {
        user_ids
            .iter()
            .map(|id| format!("`{}`", cohort::echo(id)))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let label = match flag {
        Some(label) => {
            if user_ids.iter().any(|id| id != label) {
                return Err(ImportError::Participant(format!(
                    "--participant `{}` disagrees with the data points' header.user_id {}; \
                     import one participant's points at a time, under the label their user_id gives",
                    cohort::echo(label),
                    listed()
                )));
            }
            label.to_owned()
        }
        None => match user_ids.len() {
            0 => {
                return Err(ImportError::Participant(
                    "unknown: no data point has header.user_id; pass --participant LABEL".into(),
                ));
            }
            1 => user_ids.first().expect("one id").clone(),
            _ => {
                return Err(ImportError::Participant(format!(
                    "the data points belong to several users ({}); import one participant at a time",
                    listed()
                )));
            }
        },
    };
    if !is_valid_participant_id(&label) {
        return Err(ImportError::Participant(format!(
            "`{}` is not a valid participant id ([A-Za-z0-9_-]{{1,64}})",
            cohort::echo(&label)
        )));
    }
    Ok(label)
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn point(name: &str, body: Value) -> Value {
        json!({
            "header": {
                "schema_id": {"namespace": "omh", "name": name, "version": "1.0"},
                "creation_date_time": "2024-03-02T08:00:00+01:00"
            },
            "body": body
        })
    }

    fn used(p: &Value) -> Measure {
        match read_point(p) {
            Ok(Reading::Used(m)) => m,
            other => panic!("expected a used point, got {other:?}"),
        }
    }

    #[test]
    fn temperature_units_convert_to_celsius() {
        for (value, unit, celsius) in [(98.6, "F", 37.0), (310.15, "K", 37.0), (36.5, "C", 36.5)] {
            let p = point(
                "body-temperature",
                json!({"body_temperature": {"value": value, "unit": unit},
                       "effective_time_frame": {"date_time": "2024-03-02T06:00:00+01:00"}}),
            );
            let m = used(&p);
            assert!(
                (m.value - celsius).abs() < 1e-9,
                "{value} {unit} → {}",
                m.value
            );
        }
    }

    #[test]
    fn durations_convert_to_hours() {
        for (value, unit, hours) in [(450.0, "min", 7.5), (27_000.0, "sec", 7.5), (7.5, "h", 7.5)] {
            let p = point(
                "sleep-duration",
                json!({"sleep_duration": {"value": value, "unit": unit},
                       "effective_time_frame": {"date_time": "2024-03-02T06:00:00+01:00"}}),
            );
            assert!((used(&p).value - hours).abs() < 1e-12, "{value} {unit}");
        }
    }

    #[test]
    fn interval_from_start_and_duration_ends_in_the_start_offset() {
        let p = point(
            "sleep-duration",
            json!({"sleep_duration": {"value": 8, "unit": "h"},
                   "effective_time_frame": {"time_interval": {
                       "start_date_time": "2024-03-01T23:00:00+09:00",
                       "duration": {"value": 8, "unit": "h"}}}}),
        );
        // Ends 2024-03-02T07:00+09:00: 2 March locally, 1 March in UTC (22:00Z).
        assert_eq!(used(&p).date, NaiveDate::from_ymd_opt(2024, 3, 2).unwrap());
    }

    #[test]
    fn file_shapes_are_told_apart() {
        assert!(matches!(
            split_points("{\"a\": 1}").as_slice(),
            [(Position::Whole, Ok(_))]
        ));
        assert!(matches!(
            split_points("[{\"a\": 1}, {\"b\": 2}]").as_slice(),
            [(Position::Index(0), Ok(_)), (Position::Index(1), Ok(_))]
        ));
        let lines = split_points("{\"a\": 1}\n\n{\"b\": \n{\"c\": 3}\n");
        assert!(matches!(
            lines.as_slice(),
            [
                (Position::Line(1), Ok(_)),
                (Position::Line(3), Err(_)),
                (Position::Line(4), Ok(_))
            ]
        ));
        assert!(matches!(
            split_points("{\n\"a\": \n").as_slice(),
            [(Position::Whole, Err(_))]
        ));
    }

    #[test]
    fn participant_rules() {
        let ids = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<BTreeSet<_>>();
        assert_eq!(resolve_participant(None, &ids(&["p1"])).unwrap(), "p1");
        assert_eq!(
            resolve_participant(Some("p1"), &ids(&["p1"])).unwrap(),
            "p1"
        );
        assert_eq!(resolve_participant(Some("p2"), &ids(&[])).unwrap(), "p2");
        assert!(resolve_participant(None, &ids(&[])).is_err());
        assert!(resolve_participant(Some("p2"), &ids(&["p1"])).is_err());
        assert!(resolve_participant(None, &ids(&["p1", "p2"])).is_err());
        assert!(resolve_participant(None, &ids(&["a@b.org"])).is_err());
    }
}
