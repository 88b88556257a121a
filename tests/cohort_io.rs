//! Reader and writer of the cohort CSV files against `shared/data-format.md`:
//! one test per kind of bad input, plus round trips and the quarantine file.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use plimsoll_device::cohort::{
    BadRowPolicy, Cohort, CohortError, DailyWriter, Event, InputIssue, NaiveDate, NumberFormat,
    ParticipantSeries, parse_date, read_cohort, read_daily, read_events, read_participants,
    write_cohort, write_quarantine,
};
use plimsoll_device::signal::Signal;

const HEADER: &str =
    "participant,date,resting_hr_bpm,hrv_rmssd_ms,sleep_h,skin_temp_delta_c,steps,resp_rate_brpm";

fn date(text: &str) -> NaiveDate {
    parse_date(text).expect("test date")
}

/// Writes `content` as `name` in a fresh temporary folder.
fn file_with(name: &str, content: &[u8]) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join(name);
    std::fs::write(&path, content).expect("write test file");
    (dir, path)
}

fn read_ok(content: &str) -> (Vec<ParticipantSeries>, Vec<InputIssue>) {
    let (_dir, path) = file_with("daily.csv", content.as_bytes());
    read_daily(&path, BadRowPolicy::Quarantine).expect("read")
}

fn total_rows(series: &[ParticipantSeries]) -> usize {
    series.iter().map(|p| p.dates.len()).sum()
}

#[test]
fn good_file_reads_sorted_with_missing_cells() {
    let content = format!(
        "{HEADER}\n\
         b2,2024-01-02,61.0,40.5,7.25,0.10,8000,14.5\n\
         a1,2024-01-03,70.0,,6.5,-0.20,12000,\n\
         a1,2024-01-01,72.5,35.0,7.0,0.00,9000,15.0\n"
    );
    let (series, issues) = read_ok(&content);
    assert!(issues.is_empty(), "{issues:?}");
    assert_eq!(series.len(), 2);
    let a1 = &series[0];
    assert_eq!(a1.participant, "a1");
    assert_eq!(a1.dates, vec![date("2024-01-01"), date("2024-01-03")]);
    assert_eq!(a1.values[&Signal::HrvRmssd], vec![Some(35.0), None]);
    assert_eq!(a1.values[&Signal::RespRate], vec![Some(15.0), None]);
    let (days, hr) = a1.observations(Signal::RestingHr, date("2024-01-01"));
    assert_eq!(days, vec![0.0, 2.0]);
    assert_eq!(hr, vec![72.5, 70.0]);
    let (days, _) = a1.observations(Signal::HrvRmssd, date("2024-01-02"));
    assert_eq!(
        days,
        vec![-1.0],
        "day index is relative to origin, missing cells skipped"
    );
    assert_eq!(a1.signals().len(), 6);
}

#[test]
fn subset_of_columns_and_signals_list() {
    let (series, issues) = read_ok("date,participant,steps\n2024-02-01,p1,100\n2024-02-02,p1,\n");
    assert!(issues.is_empty());
    assert_eq!(
        series[0].values.keys().copied().collect::<Vec<_>>(),
        vec![Signal::Steps]
    );
    assert_eq!(series[0].signals(), vec![Signal::Steps]);
    let (_, hr) = series[0].observations(Signal::RestingHr, date("2024-02-01"));
    assert!(hr.is_empty(), "absent column gives no observations");
    let (series, _) = read_ok("participant,date,steps\np1,2024-02-02,\n");
    assert!(
        series[0].signals().is_empty(),
        "a column with no value is not an observed signal"
    );
}

#[test]
fn bad_date_is_reported_with_file_line_column_and_row_quarantined() {
    let content = format!(
        "{HEADER}\n\
         p1,2024-01-01,60,40,7,0,8000,15\n\
         p1,2024-13-01,60,40,7,0,8000,15\n\
         p1,2024-1-3,60,40,7,0,8000,15\n\
         p1,2024-01-04,60,40,7,0,8000,15\n"
    );
    let (series, issues) = read_ok(&content);
    assert_eq!(total_rows(&series), 2, "good rows kept");
    assert_eq!(issues.len(), 2);
    assert_eq!(issues[0].line, 3);
    assert_eq!(issues[0].column, Some((2, "date".to_owned())));
    assert_eq!(
        issues[0].to_string(),
        "daily.csv:3:2 (date): unparsable date `2024-13-01`, expected YYYY-MM-DD"
    );
    assert_eq!(
        issues[1].line, 4,
        "non-padded dates are not ISO 8601 YYYY-MM-DD"
    );
}

#[test]
fn duplicate_day_keeps_first_and_reports_later_even_unsorted() {
    let content = format!(
        "{HEADER}\n\
         p1,2024-01-02,60,40,7,0,8000,15\n\
         p1,2024-01-01,61,40,7,0,8000,15\n\
         p2,2024-01-01,50,40,7,0,8000,15\n\
         p1,2024-01-02,99,40,7,0,8000,15\n"
    );
    let (series, issues) = read_ok(&content);
    assert_eq!(issues.len(), 1, "{issues:?}");
    assert_eq!(issues[0].line, 5);
    assert!(
        issues[0].reason.contains("duplicate day 2024-01-02"),
        "{}",
        issues[0]
    );
    assert!(
        issues[0].reason.contains("line 2"),
        "names the first occurrence: {}",
        issues[0]
    );
    let p1 = &series[0];
    assert_eq!(p1.dates, vec![date("2024-01-01"), date("2024-01-02")]);
    assert_eq!(
        p1.values[&Signal::RestingHr],
        vec![Some(61.0), Some(60.0)],
        "first row kept"
    );
}

#[test]
fn out_of_range_value_is_reported() {
    let content = format!(
        "{HEADER}\n\
         p1,2024-01-01,260,40,7,0,8000,15\n\
         p1,2024-01-02,60,40,7,-5.01,8000,15\n\
         p1,2024-01-03,25,1,0,-5,0,4\n\
         p1,2024-01-04,220,300,24,5,100000,60\n"
    );
    let (series, issues) = read_ok(&content);
    assert_eq!(
        total_rows(&series),
        2,
        "the inclusive range ends are accepted"
    );
    assert_eq!(issues.len(), 2);
    assert_eq!(issues[0].column, Some((3, "resting_hr_bpm".to_owned())));
    assert!(
        issues[0].reason.contains("outside the plausible range"),
        "{}",
        issues[0]
    );
    assert_eq!(
        (issues[1].line, issues[1].column.clone()),
        (3, Some((6, "skin_temp_delta_c".to_owned())))
    );
}

#[test]
fn non_numeric_cells_are_reported_each() {
    let content = format!(
        "{HEADER}\n\
         p1,2024-01-01,sixty,40,NaN,0,8000,15\n\
         p1,2024-01-02,60,inf,7,0,8000,15\n\
         p1,2024-01-03,60,40,7,0,8000,15\n"
    );
    let (series, issues) = read_ok(&content);
    assert_eq!(total_rows(&series), 1);
    let cells: Vec<(u64, usize)> = issues
        .iter()
        .map(|i| (i.line, i.column.as_ref().expect("cell").0))
        .collect();
    assert_eq!(
        cells,
        vec![(2, 3), (2, 5), (3, 4)],
        "every bad cell of a quarantined row is reported"
    );
    assert!(
        issues
            .iter()
            .all(|i| i.reason.starts_with("non-numeric value")),
        "{issues:?}"
    );
}

#[test]
fn unknown_column_is_reported_and_ignored_without_aborting() {
    let content =
        "participant,date,mood,resting_hr_bpm,resting_hr_bpm\np1,2024-01-01,happy,60,61\n";
    let (_dir, path) = file_with("daily.csv", content.as_bytes());
    let (series, issues) =
        read_daily(&path, BadRowPolicy::Abort).expect("header remarks never abort");
    assert_eq!(issues.len(), 2);
    assert_eq!(
        (issues[0].line, issues[0].column.clone()),
        (1, Some((3, "mood".to_owned())))
    );
    assert!(issues[0].reason.contains("unknown column"));
    assert!(issues[1].reason.contains("repeated column"));
    assert!(!issues[0].is_row_error());
    assert_eq!(
        series[0].values[&Signal::RestingHr],
        vec![Some(60.0)],
        "first of repeated columns used"
    );
}

#[test]
fn empty_file_and_header_only_are_errors() {
    for content in ["", "\n"] {
        let (_dir, path) = file_with("daily.csv", content.as_bytes());
        let err = read_daily(&path, BadRowPolicy::Quarantine).expect_err("empty");
        assert!(
            matches!(err, CohortError::Empty { .. }),
            "{content:?}: {err}"
        );
        assert!(err.to_string().contains("daily.csv"), "{err}");
        assert!(err.to_string().contains("empty"), "{err}");
    }
    // A header and nothing else is "no rows", not "empty".
    let (_dir, path) = file_with("daily.csv", HEADER.as_bytes());
    let err = read_daily(&path, BadRowPolicy::Quarantine).expect_err("no rows");
    assert!(matches!(err, CohortError::NoRows { .. }), "{err}");
    let text = err.to_string();
    assert!(
        text.contains("daily.csv") && text.contains("no rows"),
        "{text}"
    );
    assert!(!text.contains("empty"), "{text}");
}

#[test]
fn echoed_cells_are_cut_to_80_characters() {
    let huge = "9".repeat(400) + "x";
    let content = format!("{HEADER}\np1,2024-01-01,{huge},,,,,\np1,{huge},60,,,,,\n");
    let (series, issues) = read_ok(&content);
    assert!(series.is_empty());
    assert_eq!(issues.len(), 2, "{issues:?}");
    for issue in &issues {
        let text = issue.to_string();
        // 80 echoed characters (reader::MAX_ECHO_CHARS) plus the reason's own words.
        assert!(text.len() < 200, "{} characters: {text}", text.len());
        assert!(text.contains("… (401 characters)"), "{text}");
    }
}

/// Reads `content` through a pipe, as `--data /dev/stdin` does.
#[cfg(unix)]
fn read_from_pipe(content: &str) -> (Vec<ParticipantSeries>, Vec<InputIssue>) {
    use std::io::Write;
    use std::process::{Command, Stdio};
    let mut child = Command::new("cat")
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .expect("cat runs");
    let mut stdin = child.stdin.take().unwrap();
    let text = content.to_owned();
    let writer = std::thread::spawn(move || stdin.write_all(text.as_bytes()).unwrap());
    let fd = std::os::fd::AsRawFd::as_raw_fd(child.stdout.as_ref().unwrap());
    let path = PathBuf::from(format!("/proc/self/fd/{fd}"));
    let read = read_daily(&path, BadRowPolicy::Quarantine).expect("read from a pipe");
    writer.join().unwrap();
    child.wait().unwrap();
    read
}

#[cfg(unix)]
#[test]
fn line_numbers_come_from_the_stream_read_from_a_pipe() {
    // The report in the issue: lines 6 and 10 were reported as line 1.
    let mut content = format!("{HEADER}\n");
    for day in 1..=9 {
        let hr = if day == 5 || day == 9 { "999" } else { "60" };
        content.push_str(&format!("p1,2024-01-{day:02},{hr},,,,,\n"));
    }
    let (series, issues) = read_from_pipe(&content);
    let lines: Vec<u64> = issues.iter().map(|i| i.line).collect();
    assert_eq!(lines, [6, 10], "{issues:?}");
    assert_eq!(series[0].dates.len(), 7);
    // The same bytes from a file give the same lines.
    let (_, from_file) = read_ok(&content);
    let file_lines: Vec<u64> = from_file.iter().map(|i| i.line).collect();
    assert_eq!(file_lines, lines);
}

#[test]
fn missing_required_column_is_an_error() {
    let (_dir, path) = file_with("daily.csv", b"participant,resting_hr_bpm\np1,60\n");
    let err = read_daily(&path, BadRowPolicy::Quarantine).expect_err("no date column");
    assert!(
        matches!(&err, CohortError::MissingColumn { column, .. } if column == "date"),
        "{err}"
    );
}

#[test]
fn utf8_bom_is_accepted() {
    let mut content = b"\xEF\xBB\xBF".to_vec();
    content.extend_from_slice(format!("{HEADER}\np1,2024-01-01,60,40,7,0,8000,15\n").as_bytes());
    let (_dir, path) = file_with("daily.csv", &content);
    let (series, issues) = read_daily(&path, BadRowPolicy::Abort).expect("BOM file reads");
    assert!(issues.is_empty(), "{issues:?}");
    assert_eq!(series[0].participant, "p1");
}

#[test]
fn crlf_line_ends_are_accepted_and_lines_counted() {
    let content = format!(
        "{HEADER}\r\np1,2024-01-01,60,40,7,0,8000,15\r\np1,2024-01-02,60,40,7,0,8000,\r\n\r\np1,bad,60,40,7,0,8000,15\r\n"
    );
    let (series, issues) = read_ok(&content);
    assert_eq!(
        series[0].values[&Signal::RespRate],
        vec![Some(15.0), None],
        "no stray \\r in the last cell"
    );
    assert_eq!(issues.len(), 1);
    assert_eq!(issues[0].line, 5, "physical line, counting the blank line");
}

#[test]
fn illegal_participant_ids_are_reported() {
    let long = "x".repeat(65);
    let content = format!(
        "{HEADER}\n\
         p 1,2024-01-01,60,40,7,0,8000,15\n\
         p/1,2024-01-01,60,40,7,0,8000,15\n\
         ,2024-01-01,60,40,7,0,8000,15\n\
         {long},2024-01-01,60,40,7,0,8000,15\n\
         Ok_id-9,2024-01-01,60,40,7,0,8000,15\n\
         \"p,1\",2024-01-01,60,40,7,0,8000,15\n"
    );
    let (series, issues) = read_ok(&content);
    assert_eq!(series.len(), 1);
    assert_eq!(series[0].participant, "Ok_id-9");
    let lines: Vec<u64> = issues.iter().map(|i| i.line).collect();
    assert_eq!(lines, vec![2, 3, 4, 5, 7]);
    assert!(
        issues
            .iter()
            .all(|i| i.column == Some((1, "participant".to_owned())))
    );
}

#[test]
fn wrong_field_count_and_invalid_utf8_are_reported() {
    let mut content =
        format!("{HEADER}\np1,2024-01-01,60\np1,2024-01-02,60,40,7,0,8000,15\n").into_bytes();
    content.extend_from_slice(b"p1,2024-01-03,6\xff0,40,7,0,8000,15\n");
    let (_dir, path) = file_with("daily.csv", &content);
    let (series, issues) = read_daily(&path, BadRowPolicy::Quarantine).expect("read");
    assert_eq!(total_rows(&series), 1);
    assert_eq!(issues.len(), 2);
    assert!(
        issues[0].reason.contains("3 fields, header has 8"),
        "{}",
        issues[0]
    );
    assert_eq!(issues[0].column, None);
    assert!(issues[1].reason.contains("UTF-8"), "{}", issues[1]);
}

#[test]
fn abort_policy_stops_at_first_bad_row() {
    let content = format!(
        "{HEADER}\n\
         p1,2024-01-01,60,40,7,0,8000,15\n\
         p1,2024-01-02,600,40,7,0,8000,15\n\
         p1,2024-01-01,60,40,7,0,8000,15\n"
    );
    let (_dir, path) = file_with("daily.csv", content.as_bytes());
    match read_daily(&path, BadRowPolicy::Abort) {
        Err(CohortError::Aborted(issue)) => {
            assert_eq!(issue.line, 3);
            assert_eq!(issue.column, Some((3, "resting_hr_bpm".to_owned())));
        }
        other => panic!("expected Aborted, got {other:?}"),
    }
}

#[test]
fn quarantine_file_holds_exactly_the_bad_rows() {
    let content = format!(
        "{HEADER}\n\
         p1,2024-01-01,60,40,7,0,8000,15\n\
         p1,2024-01-32,60,40,7,0,8000,15\n\
         p1,2024-01-03,60,x,7,0,8000,999\n\
         p1,2024-01-01,60,40,7,0,8000,15\n"
    );
    let (dir, path) = file_with("daily.csv", content.as_bytes());
    let (_, issues) = read_daily(&path, BadRowPolicy::Quarantine).expect("read");
    assert_eq!(issues.len(), 4);
    let out = dir.path().join("quarantine.csv");
    let written = write_quarantine(&path, &issues, &out).expect("quarantine");
    assert_eq!(written, 3, "three distinct bad rows");
    let text = std::fs::read_to_string(&out).expect("read quarantine");
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(
        lines[0],
        format!("{HEADER},quarantine_line,quarantine_reason")
    );
    // Reasons with a comma are quoted, as RFC 4180 requires.
    assert!(
        lines[1].starts_with("p1,2024-01-32,60,")
            && lines[1].contains(",3,\"date: unparsable date"),
        "{}",
        lines[1]
    );
    assert!(lines[2].ends_with(",4,hrv_rmssd_ms: non-numeric value `x`; resp_rate_brpm: value 999 outside the plausible range 4–60 breaths/min of resp_rate_brpm"), "{}", lines[2]);
    assert!(lines[3].contains(",5,date: duplicate day"), "{}", lines[3]);
}

#[test]
fn participants_and_events_files_are_validated() {
    let dir = tempfile::tempdir().expect("tempdir");
    std::fs::write(
        dir.path().join("daily.csv"),
        format!("{HEADER}\np1,2024-01-01,60,40,7,0,8000,15\n"),
    )
    .expect("write");
    std::fs::write(
        dir.path().join("participants.csv"),
        "participant,age_band,sex\np1,18-34,female\np2,,\"male, reported\"\np1,35-49,male\np$,18-34,male\n",
    )
    .expect("write");
    std::fs::write(
        dir.path().join("events.csv"),
        "participant,kind,start,end,symptom_onset\n\
         p1,acute_illness,2024-01-03,2024-01-10,2024-01-05\n\
         p1,late_night_alcohol,2024-02-01,2024-02-01,\n\
         p1,training_block,2024-02-10,2024-02-01,\n\
         p1,,2024-02-10,2024-02-11,\n\
         p2,acute_illness,2024-02-10,2024-02-12,someday\n",
    )
    .expect("write");
    let cohort = read_cohort(dir.path(), BadRowPolicy::Quarantine).expect("read");
    assert_eq!(cohort.groups.len(), 2);
    assert_eq!(
        cohort.groups["p1"]["age_band"], "18-34",
        "first of duplicate participants kept"
    );
    assert!(
        !cohort.groups["p2"].contains_key("age_band"),
        "empty group cells are left out"
    );
    assert_eq!(cohort.groups["p2"]["sex"], "male, reported");
    assert_eq!(
        cohort.events,
        vec![
            Event {
                participant: "p1".into(),
                kind: "acute_illness".into(),
                start: date("2024-01-03"),
                end: date("2024-01-10"),
                symptom_onset: Some(date("2024-01-05"))
            },
            Event {
                participant: "p1".into(),
                kind: "late_night_alcohol".into(),
                start: date("2024-02-01"),
                end: date("2024-02-01"),
                symptom_onset: None
            },
        ]
    );
    let described: Vec<String> = cohort.issues.iter().map(ToString::to_string).collect();
    assert_eq!(described.len(), 5, "{described:#?}");
    assert!(
        described[0].starts_with("participants.csv:4:1 (participant): duplicate participant `p1`")
    );
    assert!(described[1].starts_with("participants.csv:5:1 (participant): participant id `p$`"));
    assert!(described[2].starts_with("events.csv:4:4 (end): end 2024-02-01 is before start"));
    assert!(described[3].starts_with("events.csv:5:2 (kind): empty event kind"));
    assert!(described[4].starts_with("events.csv:6:5 (symptom_onset): unparsable date `someday`"));
}

#[test]
fn optional_files_may_be_absent_but_daily_is_required() {
    let dir = tempfile::tempdir().expect("tempdir");
    let err = read_cohort(dir.path(), BadRowPolicy::Quarantine).expect_err("no daily.csv");
    assert!(matches!(err, CohortError::Io { .. }), "{err}");
    std::fs::write(
        dir.path().join("daily.csv"),
        format!("{HEADER}\np1,2024-01-01,60,40,7,0,8000,15\n"),
    )
    .expect("write");
    let cohort = read_cohort(dir.path(), BadRowPolicy::Quarantine).expect("read");
    assert!(cohort.groups.is_empty() && cohort.events.is_empty() && cohort.issues.is_empty());
}

fn sample_cohort() -> Cohort {
    let mut values = BTreeMap::new();
    values.insert(Signal::RestingHr, vec![Some(61.25), None, Some(59.0)]);
    values.insert(Signal::SkinTempDelta, vec![Some(-0.1234), Some(0.0), None]);
    values.insert(Signal::Steps, vec![None, Some(12034.0), Some(0.0)]);
    let p1 = ParticipantSeries {
        participant: "p1".into(),
        dates: vec![date("2024-01-01"), date("2024-01-02"), date("2024-01-05")],
        values,
    };
    let mut groups = BTreeMap::new();
    groups.insert(
        "p1".to_owned(),
        BTreeMap::from([
            ("sex".to_owned(), "female".to_owned()),
            ("site".to_owned(), "north, upper".to_owned()),
        ]),
    );
    Cohort {
        participants: vec![p1],
        groups,
        events: vec![Event {
            participant: "p1".into(),
            kind: "acute_illness".into(),
            start: date("2024-01-02"),
            end: date("2024-01-05"),
            symptom_onset: Some(date("2024-01-03")),
        }],
        issues: Vec::new(),
    }
}

#[test]
fn write_then_read_round_trips_exactly() {
    let dir = tempfile::tempdir().expect("tempdir");
    let cohort = sample_cohort();
    write_cohort(dir.path(), &cohort).expect("write");
    let back = read_cohort(dir.path(), BadRowPolicy::Abort).expect("read back");
    assert_eq!(back, cohort);
    let daily = std::fs::read_to_string(dir.path().join("daily.csv")).expect("read");
    assert_eq!(
        daily,
        "participant,date,resting_hr_bpm,skin_temp_delta_c,steps\n\
         p1,2024-01-01,61.25,-0.1234,\n\
         p1,2024-01-02,,0,12034\n\
         p1,2024-01-05,59,,0\n"
    );
}

#[test]
fn daily_writer_fixed_decimals_and_refusals() {
    let mut writer = DailyWriter::new(
        Vec::new(),
        &[Signal::Steps, Signal::SkinTempDelta, Signal::RestingHr],
        NumberFormat::Fixed,
    )
    .expect("header");
    assert_eq!(
        writer.signals(),
        &[Signal::RestingHr, Signal::SkinTempDelta, Signal::Steps],
        "column order of daily.csv"
    );
    writer
        .write_row(
            "p1",
            date("2024-03-01"),
            &[Some(60.04), Some(-0.004), Some(8123.6)],
        )
        .expect("row");
    writer
        .write_row("p1", date("2024-03-02"), &[Some(59.96), Some(-1.005), None])
        .expect("row");
    assert!(
        writer
            .write_row("p 1", date("2024-03-03"), &[None, None, None])
            .is_err(),
        "illegal id refused"
    );
    assert!(
        writer
            .write_row("p1", date("2024-03-03"), &[Some(300.0), None, None])
            .is_err(),
        "out of range refused"
    );
    assert!(
        writer
            .write_row("p1", date("2024-03-03"), &[Some(f64::NAN), None, None])
            .is_err(),
        "NaN refused"
    );
    assert!(
        writer
            .write_row("p1", date("2024-03-03"), &[None, None])
            .is_err(),
        "wrong width refused"
    );
    let bytes = writer.finish().expect("finish");
    let text = String::from_utf8(bytes).expect("utf8");
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(
        lines[0],
        "participant,date,resting_hr_bpm,skin_temp_delta_c,steps"
    );
    assert_eq!(lines[1], "p1,2024-03-01,60.0,0.00,8124", "no negative zero");
    assert!(
        lines[2] == "p1,2024-03-02,60.0,-1.00," || lines[2] == "p1,2024-03-02,60.0,-1.01,",
        "{}",
        lines[2]
    );
    assert_eq!(lines.len(), 3);
}

#[test]
fn read_events_and_participants_standalone() {
    let (_dir, path) = file_with(
        "events.csv",
        b"participant,kind,start,end\np1,acute_illness,2024-01-01,2024-01-02\n",
    );
    let (events, issues) =
        read_events(&path, BadRowPolicy::Abort).expect("symptom_onset column is optional");
    assert!(issues.is_empty());
    assert_eq!(events[0].symptom_onset, None);
    let (_dir, path) = file_with("participants.csv", b"participant\np1\n");
    let (groups, _) =
        read_participants(&path, BadRowPolicy::Abort).expect("no group columns is fine");
    assert!(groups["p1"].is_empty());
    let path = Path::new("/nonexistent/participants.csv");
    assert!(matches!(
        read_participants(path, BadRowPolicy::Abort),
        Err(CohortError::Io { .. })
    ));
}
