//! libFuzzer target for the cohort CSV readers. The same bytes are read as
//! `daily.csv`, `participants.csv` and `events.csv`, each under both bad-row
//! policies, and every property the reader documents is checked; a violation
//! panics, which libFuzzer reports as a crash. Checked on every input:
//!
//! 1. no reader panics;
//! 2. with the quarantine policy a read either fails with an error or
//!    returns rows and issues that name the file, whose line numbers lie
//!    inside it (`1 ..= line breaks + 1`, where `\n`, `\r\n` and a lone
//!    `\r` each end a line, as each ends a CSV record) and come in file order;
//! 3. the quarantine file written from those issues holds exactly one record
//!    per line named by a row issue (no bad row dropped, none added);
//! 4. the two policies agree: `Abort` stops with the first row issue
//!    `Quarantine` reports, that issue is on line 2 or later (header remarks,
//!    on line 1, never abort), and a file without row issues reads the same
//!    under both;
//! 5. `daily.csv`: participants sorted and unique with valid ids, each one's
//!    dates sorted and unique, one value per date in every signal column,
//!    every value finite and inside its plausible range;
//! 6. `participants.csv`: valid ids, group cells trimmed and non-empty;
//! 7. `events.csv`: valid ids, non-empty kinds, `start <= end`.

#![no_main]

use std::collections::BTreeSet;
use std::fmt::Debug;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use plimsoll_device::cohort::{
    BadRowPolicy, CohortError, Event, Groups, InputIssue, ParticipantSeries,
    is_valid_participant_id, read_daily, read_events, read_participants, write_quarantine,
};

/// The input file and the quarantine output of this process, in a folder of
/// its own under the temporary directory (`scripts/fuzz` points `TMPDIR` at
/// a scratch folder it removes afterwards).
struct Scratch {
    input: PathBuf,
    quarantine: PathBuf,
}

fn scratch() -> &'static Scratch {
    static SCRATCH: OnceLock<Scratch> = OnceLock::new();
    SCRATCH.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("plimsoll-fuzz-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("create scratch folder");
        Scratch {
            input: dir.join("input.csv"),
            quarantine: dir.join("quarantine.csv"),
        }
    })
}

fuzz_target!(|data: &[u8]| {
    let files = scratch();
    std::fs::write(&files.input, data).expect("write input");
    let n_lines = count_lines(data);

    if let Some(series) = read_both(files, n_lines, read_daily) {
        check_daily(&series);
    }
    if let Some(groups) = read_both(files, n_lines, read_participants) {
        check_participants(&groups);
    }
    if let Some(events) = read_both(files, n_lines, read_events) {
        check_events(&events);
    }
});

/// Lines in `data`: one more than its line breaks, where `\n`, `\r\n` and a
/// lone `\r` each count once.
fn count_lines(data: &[u8]) -> u64 {
    let breaks = data
        .iter()
        .enumerate()
        .filter(|&(i, &b)| b == b'\r' || (b == b'\n' && (i == 0 || data[i - 1] != b'\r')))
        .count();
    breaks as u64 + 1
}

type Read<T> = fn(&Path, BadRowPolicy) -> Result<(T, Vec<InputIssue>), CohortError>;

/// Reads the input under both policies, checks properties 2–4 and returns
/// what the quarantine read kept, if it succeeded.
fn read_both<T: PartialEq + Debug>(files: &Scratch, n_lines: u64, read: Read<T>) -> Option<T> {
    let path = files.input.as_path();
    let quarantined = read(path, BadRowPolicy::Quarantine);
    let aborted = read(path, BadRowPolicy::Abort);
    if let Ok((_, issues)) = &quarantined {
        check_issues(files, n_lines, issues);
    }
    match (&quarantined, &aborted) {
        (_, Err(CohortError::Aborted(issue))) => {
            assert!(issue.line >= 2, "a line-1 issue aborted the read: {issue}");
            if let Ok((_, issues)) = &quarantined {
                let first_row_issue = issues.iter().find(|i| i.is_row_error());
                assert_eq!(
                    first_row_issue,
                    Some(issue),
                    "Abort stopped on an issue that is not Quarantine's first row issue"
                );
            }
        }
        (Ok(kept), Ok(read_under_abort)) => {
            assert!(
                kept.1.iter().all(|i| !i.is_row_error()),
                "Abort accepted a file in which Quarantine found row issues: {:?}",
                kept.1
            );
            assert_eq!(
                kept, read_under_abort,
                "the policies disagree on a clean file"
            );
        }
        (Ok((_, issues)), Err(error)) => {
            panic!("Quarantine read the file ({issues:?}) but Abort failed with: {error}")
        }
        (Err(error), Ok(_)) => {
            panic!("Abort read the file but Quarantine failed with: {error}")
        }
        (Err(_), Err(_)) => {}
    }
    quarantined.ok().map(|(kept, _)| kept)
}

/// Properties 2 and 3 for the issues of a successful quarantine read.
fn check_issues(files: &Scratch, n_lines: u64, issues: &[InputIssue]) {
    let mut previous_line = 1;
    for issue in issues {
        assert_eq!(issue.file, files.input, "issue names another file: {issue}");
        assert!(
            (1..=n_lines).contains(&issue.line),
            "issue line {} outside a {n_lines}-line file: {issue}",
            issue.line
        );
        assert!(
            issue.line >= previous_line,
            "issue on line {} reported after one on line {previous_line}",
            issue.line
        );
        previous_line = issue.line;
    }
    let row_lines: BTreeSet<u64> = issues
        .iter()
        .filter(|i| i.is_row_error())
        .map(|i| i.line)
        .collect();
    let written = write_quarantine(&files.input, issues, &files.quarantine)
        .expect("write_quarantine on a file the reader accepted");
    assert_eq!(
        written,
        row_lines.len(),
        "quarantine file holds {written} records for row issues on lines {row_lines:?}"
    );
}

fn check_daily(series: &[ParticipantSeries]) {
    for pair in series.windows(2) {
        assert!(
            pair[0].participant < pair[1].participant,
            "participants `{}` and `{}` not sorted and unique",
            pair[0].participant,
            pair[1].participant
        );
    }
    let signals: Option<Vec<_>> = series.first().map(|s| s.values.keys().collect());
    for s in series {
        assert!(
            is_valid_participant_id(&s.participant),
            "kept id {:?}",
            s.participant
        );
        assert!(
            !s.dates.is_empty(),
            "participant `{}` kept without a day",
            s.participant
        );
        assert!(
            s.dates.windows(2).all(|w| w[0] < w[1]),
            "dates of `{}` not sorted and unique: {:?}",
            s.participant,
            s.dates
        );
        assert_eq!(
            Some(s.values.keys().collect::<Vec<_>>()),
            signals,
            "participants with different signal columns"
        );
        for (signal, column) in &s.values {
            assert_eq!(
                column.len(),
                s.dates.len(),
                "{signal:?} of `{}`",
                s.participant
            );
            let (low, high) = signal.plausible_range();
            for value in column.iter().flatten() {
                assert!(
                    value.is_finite() && (low..=high).contains(value),
                    "kept {signal:?} value {value} of `{}` outside {low}..={high}",
                    s.participant
                );
            }
        }
    }
}

fn check_participants(groups: &Groups) {
    for (participant, row) in groups {
        assert!(
            is_valid_participant_id(participant),
            "kept id {participant:?}"
        );
        for (column, value) in row {
            assert_ne!(column, "participant", "the id column kept as a group");
            assert!(
                !value.is_empty() && value.trim() == value,
                "group cell {value:?} of `{participant}` kept untrimmed or empty"
            );
        }
    }
}

fn check_events(events: &[Event]) {
    for event in events {
        assert!(
            is_valid_participant_id(&event.participant),
            "kept {event:?}"
        );
        assert!(
            !event.kind.is_empty() && event.kind.trim() == event.kind,
            "kept {event:?}"
        );
        assert!(event.start <= event.end, "kept {event:?}");
    }
}
