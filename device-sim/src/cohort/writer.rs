//! Streaming writers of the cohort CSV files (`daily.csv`,
//! `participants.csv`, `events.csv`): one row at a time, never the whole
//! cohort in memory. Lines end in `\n`; the reader also accepts `\r\n`.

use std::collections::{BTreeMap, BTreeSet};
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use chrono::{Datelike, NaiveDate};

use super::{
    Cohort, CohortError, DAILY_FILE, EVENTS_FILE, Event, PARTICIPANTS_FILE, ParticipantSeries,
    is_valid_participant_id,
};
use crate::signal::Signal;

/// Fixed number of decimals written for a signal: enough for the precision
/// of a consumer device, few enough that identical values give identical
/// bytes.
pub fn decimals(signal: Signal) -> u32 {
    match signal {
        Signal::RestingHr | Signal::HrvRmssd | Signal::RespRate => 1,
        Signal::Sleep | Signal::SkinTempDelta => 2,
        Signal::Steps => 0,
    }
}

/// How `DailyWriter` formats numbers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum NumberFormat {
    /// Round to [`decimals`] of the signal (the simulator's choice).
    #[default]
    Fixed,
    /// Shortest text that reads back to the same `f64` (for re-writing data
    /// read from elsewhere without losing precision).
    Exact,
}

/// Appends `value` rounded to `decimals` places, without exponent and
/// without a negative zero.
fn push_fixed(out: &mut Vec<u8>, value: f64, decimals: u32) {
    let scale = 10_i64.pow(decimals);
    let scaled = (value * scale as f64).round() as i64;
    if scaled < 0 {
        out.push(b'-');
    }
    let magnitude = scaled.unsigned_abs();
    let scale = scale as u64;
    push_u64(out, magnitude / scale);
    if decimals > 0 {
        out.push(b'.');
        let frac = magnitude % scale;
        let mut digits = [b'0'; 20];
        let mut rest = frac;
        for slot in digits[..decimals as usize].iter_mut().rev() {
            *slot = b'0' + (rest % 10) as u8;
            rest /= 10;
        }
        out.extend_from_slice(&digits[..decimals as usize]);
    }
}

fn push_u64(out: &mut Vec<u8>, mut n: u64) {
    let mut digits = [0u8; 20];
    let mut i = digits.len();
    loop {
        i -= 1;
        digits[i] = b'0' + (n % 10) as u8;
        n /= 10;
        if n == 0 {
            break;
        }
    }
    out.extend_from_slice(&digits[i..]);
}

fn push_date(out: &mut Vec<u8>, date: NaiveDate) {
    let (year, month, day) = (date.year(), date.month(), date.day());
    let two = |out: &mut Vec<u8>, n: u32| {
        out.extend_from_slice(&[b'0' + (n / 10) as u8, b'0' + (n % 10) as u8])
    };
    // Years outside 0..=9999 cannot be written as YYYY; chrono's format
    // would add a sign, which the reader rejects as it should.
    if (0..=9999).contains(&year) {
        let y = year as u32;
        two(out, y / 100);
        two(out, y % 100);
    } else {
        out.extend_from_slice(date.format("%Y").to_string().as_bytes());
    }
    out.push(b'-');
    two(out, month);
    out.push(b'-');
    two(out, day);
}

/// Streaming writer of `daily.csv`. Participant ids are validated, so no
/// cell ever needs quoting.
#[derive(Debug)]
pub struct DailyWriter<W: Write> {
    out: W,
    path: PathBuf,
    signals: Vec<Signal>,
    format: NumberFormat,
    line: Vec<u8>,
}

impl DailyWriter<BufWriter<File>> {
    /// Creates (truncates) `path` and writes the header.
    pub fn create(
        path: &Path,
        signals: &[Signal],
        format: NumberFormat,
    ) -> Result<Self, CohortError> {
        let file = File::create(path).map_err(|e| CohortError::io(path, e))?;
        Self::with_path(
            BufWriter::with_capacity(1 << 16, file),
            path,
            signals,
            format,
        )
    }
}

impl<W: Write> DailyWriter<W> {
    /// Writes the header to `out`; `signals` are written in `daily.csv`
    /// column order whatever order they are given in.
    pub fn new(out: W, signals: &[Signal], format: NumberFormat) -> Result<Self, CohortError> {
        Self::with_path(out, Path::new("<daily stream>"), signals, format)
    }

    fn with_path(
        out: W,
        path: &Path,
        signals: &[Signal],
        format: NumberFormat,
    ) -> Result<Self, CohortError> {
        let set: BTreeSet<Signal> = signals.iter().copied().collect();
        let mut writer = DailyWriter {
            out,
            path: path.to_owned(),
            signals: set.into_iter().collect(),
            format,
            line: Vec::with_capacity(128),
        };
        writer.line.extend_from_slice(b"participant,date");
        for signal in &writer.signals {
            writer.line.push(b',');
            writer.line.extend_from_slice(signal.column().as_bytes());
        }
        writer.line.push(b'\n');
        writer.flush_line()?;
        Ok(writer)
    }

    /// Signal columns, in the order `write_row` expects values.
    pub fn signals(&self) -> &[Signal] {
        &self.signals
    }

    fn flush_line(&mut self) -> Result<(), CohortError> {
        let result = self.out.write_all(&self.line);
        self.line.clear();
        result.map_err(|e| CohortError::io(&self.path, e))
    }

    fn invalid(&self, msg: String) -> CohortError {
        CohortError::InvalidRecord {
            path: self.path.clone(),
            msg,
        }
    }

    /// Writes one row. `values` follow [`DailyWriter::signals`]; `None` is an
    /// empty cell. A value outside the plausible range, or not finite, is
    /// refused (the simulator clamps before writing).
    pub fn write_row(
        &mut self,
        participant: &str,
        date: NaiveDate,
        values: &[Option<f64>],
    ) -> Result<(), CohortError> {
        if !is_valid_participant_id(participant) {
            return Err(self.invalid(format!(
                "participant id `{}` is not [A-Za-z0-9_-]{{1,64}}",
                participant.escape_debug()
            )));
        }
        if values.len() != self.signals.len() {
            return Err(self.invalid(format!(
                "{} values for {} signal columns",
                values.len(),
                self.signals.len()
            )));
        }
        for (signal, value) in self.signals.iter().zip(values) {
            if let Some(v) = value {
                let (low, high) = signal.plausible_range();
                if !(low..=high).contains(v) {
                    return Err(self.invalid(format!(
                        "{participant} {date} {signal}: {v} outside {low}–{high}"
                    )));
                }
            }
        }
        self.line.extend_from_slice(participant.as_bytes());
        self.line.push(b',');
        push_date(&mut self.line, date);
        for (signal, value) in self.signals.iter().zip(values) {
            self.line.push(b',');
            if let Some(v) = value {
                match self.format {
                    NumberFormat::Fixed => push_fixed(&mut self.line, *v, decimals(*signal)),
                    NumberFormat::Exact => {
                        let v = if *v == 0.0 { 0.0 } else { *v };
                        self.line.extend_from_slice(v.to_string().as_bytes());
                    }
                }
            }
        }
        self.line.push(b'\n');
        self.flush_line()
    }

    /// Writes every row of one participant; signals without a column in this
    /// writer are left out, columns the series lacks are empty.
    pub fn write_series(&mut self, series: &ParticipantSeries) -> Result<(), CohortError> {
        let mut row = vec![None; self.signals.len()];
        for (day, date) in series.dates.iter().enumerate() {
            for (slot, signal) in self.signals.iter().enumerate() {
                row[slot] = series.values.get(signal).and_then(|column| column[day]);
            }
            self.write_row(&series.participant, *date, &row)?;
        }
        Ok(())
    }

    /// Flushes and returns the inner writer.
    pub fn finish(mut self) -> Result<W, CohortError> {
        self.out
            .flush()
            .map_err(|e| CohortError::io(&self.path, e))?;
        Ok(self.out)
    }
}

fn csv_writer<W: Write>(out: W) -> csv::Writer<W> {
    csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(out)
}

/// Streaming writer of `participants.csv`: `participant` plus the given
/// group columns.
#[derive(Debug)]
pub struct ParticipantsWriter<W: Write> {
    out: csv::Writer<W>,
    path: PathBuf,
    n_groups: usize,
}

impl ParticipantsWriter<BufWriter<File>> {
    /// Creates (truncates) `path` and writes the header.
    pub fn create(path: &Path, group_columns: &[&str]) -> Result<Self, CohortError> {
        let file = File::create(path).map_err(|e| CohortError::io(path, e))?;
        Self::with_path(BufWriter::new(file), path, group_columns)
    }
}

impl<W: Write> ParticipantsWriter<W> {
    /// Writes the header to `out`.
    pub fn new(out: W, group_columns: &[&str]) -> Result<Self, CohortError> {
        Self::with_path(out, Path::new("<participants stream>"), group_columns)
    }

    fn with_path(out: W, path: &Path, group_columns: &[&str]) -> Result<Self, CohortError> {
        let mut writer = ParticipantsWriter {
            out: csv_writer(out),
            path: path.to_owned(),
            n_groups: group_columns.len(),
        };
        let header = std::iter::once("participant").chain(group_columns.iter().copied());
        writer
            .out
            .write_record(header)
            .map_err(|e| writer.csv_error(e))?;
        Ok(writer)
    }

    fn csv_error(&self, source: csv::Error) -> CohortError {
        CohortError::Csv {
            path: self.path.clone(),
            source,
        }
    }

    /// Writes one participant; `values` follow the group columns.
    pub fn write_row(&mut self, participant: &str, values: &[&str]) -> Result<(), CohortError> {
        if !is_valid_participant_id(participant) || values.len() != self.n_groups {
            return Err(CohortError::InvalidRecord {
                path: self.path.clone(),
                msg: format!(
                    "participant `{}` with {} group values for {} columns",
                    participant.escape_debug(),
                    values.len(),
                    self.n_groups
                ),
            });
        }
        let record = std::iter::once(participant).chain(values.iter().copied());
        self.out.write_record(record).map_err(|e| self.csv_error(e))
    }

    /// Flushes and returns the inner writer.
    pub fn finish(self) -> Result<W, CohortError> {
        let path = self.path;
        self.out
            .into_inner()
            .map_err(|e| CohortError::io(&path, e.into_error()))
    }
}

/// Streaming writer of `events.csv`.
#[derive(Debug)]
pub struct EventsWriter<W: Write> {
    out: csv::Writer<W>,
    path: PathBuf,
    date_buf: Vec<u8>,
}

impl EventsWriter<BufWriter<File>> {
    /// Creates (truncates) `path` and writes the header.
    pub fn create(path: &Path) -> Result<Self, CohortError> {
        let file = File::create(path).map_err(|e| CohortError::io(path, e))?;
        Self::with_path(BufWriter::new(file), path)
    }
}

impl<W: Write> EventsWriter<W> {
    /// Writes the header to `out`.
    pub fn new(out: W) -> Result<Self, CohortError> {
        Self::with_path(out, Path::new("<events stream>"))
    }

    fn with_path(out: W, path: &Path) -> Result<Self, CohortError> {
        let mut out = csv_writer(out);
        out.write_record(["participant", "kind", "start", "end", "symptom_onset"])
            .map_err(|e| CohortError::Csv {
                path: path.to_owned(),
                source: e,
            })?;
        Ok(EventsWriter {
            out,
            path: path.to_owned(),
            date_buf: Vec::with_capacity(40),
        })
    }

    /// Writes one event.
    pub fn write_event(&mut self, event: &Event) -> Result<(), CohortError> {
        if !is_valid_participant_id(&event.participant)
            || event.end < event.start
            || event.kind.is_empty()
        {
            return Err(CohortError::InvalidRecord {
                path: self.path.clone(),
                msg: format!("bad event {event:?}"),
            });
        }
        let buf = &mut self.date_buf;
        buf.clear();
        push_date(buf, event.start);
        push_date(buf, event.end);
        if let Some(onset) = event.symptom_onset {
            push_date(buf, onset);
        }
        let onset: &[u8] = if event.symptom_onset.is_some() {
            &buf[20..30]
        } else {
            b""
        };
        let record: [&[u8]; 5] = [
            event.participant.as_bytes(),
            event.kind.as_bytes(),
            &buf[0..10],
            &buf[10..20],
            onset,
        ];
        self.out.write_record(record).map_err(|e| CohortError::Csv {
            path: self.path.clone(),
            source: e,
        })
    }

    /// Flushes and returns the inner writer.
    pub fn finish(self) -> Result<W, CohortError> {
        let path = self.path;
        self.out
            .into_inner()
            .map_err(|e| CohortError::io(&path, e.into_error()))
    }
}

/// Writes `daily.csv` for the given participants, with a column for every
/// signal any of them has, numbers in [`NumberFormat::Exact`] so nothing read
/// from elsewhere loses precision.
pub fn write_daily(path: &Path, participants: &[ParticipantSeries]) -> Result<(), CohortError> {
    let signals: Vec<Signal> = participants
        .iter()
        .flat_map(|p| p.values.keys().copied())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let mut writer = DailyWriter::create(path, &signals, NumberFormat::Exact)?;
    for series in participants {
        writer.write_series(series)?;
    }
    writer.finish()?;
    Ok(())
}

/// Writes `participants.csv` with the union of the group columns (sorted);
/// a participant without a value for a column gets an empty cell.
pub fn write_participants(
    path: &Path,
    groups: &BTreeMap<String, BTreeMap<String, String>>,
) -> Result<(), CohortError> {
    let columns: Vec<&str> = groups
        .values()
        .flat_map(|g| g.keys().map(String::as_str))
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let mut writer = ParticipantsWriter::create(path, &columns)?;
    for (participant, group) in groups {
        let values: Vec<&str> = columns
            .iter()
            .map(|c| group.get(*c).map_or("", String::as_str))
            .collect();
        writer.write_row(participant, &values)?;
    }
    writer.finish()?;
    Ok(())
}

/// Writes `events.csv` in the given order.
pub fn write_events(path: &Path, events: &[Event]) -> Result<(), CohortError> {
    let mut writer = EventsWriter::create(path)?;
    for event in events {
        writer.write_event(event)?;
    }
    writer.finish()?;
    Ok(())
}

/// Writes a whole cohort into `dir` (created if needed): `daily.csv`, plus
/// `participants.csv` and `events.csv` when the cohort has groups or events.
pub fn write_cohort(dir: &Path, cohort: &Cohort) -> Result<(), CohortError> {
    std::fs::create_dir_all(dir).map_err(|e| CohortError::io(dir, e))?;
    write_daily(&dir.join(DAILY_FILE), &cohort.participants)?;
    if !cohort.groups.is_empty() {
        write_participants(&dir.join(PARTICIPANTS_FILE), &cohort.groups)?;
    }
    if !cohort.events.is_empty() {
        write_events(&dir.join(EVENTS_FILE), &cohort.events)?;
    }
    Ok(())
}
