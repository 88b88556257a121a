//! `plimsoll import-omh`: open mHealth data points to `daily.csv`, read back by the cohort
//! reader. Each example data point's shape is written from the published open mHealth schema
//! named beside it (github.com/openmhealth/schemas, `schema/omh/…`); what is written from
//! memory says so.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::{AtomicUsize, Ordering};

use plimsoll_device::cohort::{BadRowPolicy, NaiveDate, ParticipantSeries, read_cohort};
use plimsoll_device::omh_import::{
    ImportError, ImportOptions, ImportReport, SKIP_DUPLICATE, SKIP_NOT_AT_REST, import_omh,
};
use plimsoll_device::signal::Signal;
use serde_json::{Value, json};

const BIN: &str = env!("CARGO_BIN_EXE_plimsoll");

/// A data point: header as in `schema/omh/header-1.0.json` (`schema_id` with namespace, name,
/// version; `creation_date_time`; `user_id`), body as given.
fn point(name: &str, version: &str, user_id: Option<&str>, body: Value) -> Value {
    static NEXT_ID: AtomicUsize = AtomicUsize::new(1);
    let n = NEXT_ID.fetch_add(1, Ordering::Relaxed);
    let mut header = json!({
        "id": format!("0d3b9f43-8a63-4a4c-9a5e-{n:012}"),
        "schema_id": {"namespace": "omh", "name": name, "version": version},
        "creation_date_time": "2024-03-04T09:00:00+01:00",
    });
    if let Some(id) = user_id {
        header["user_id"] = json!(id);
    }
    json!({"header": header, "body": body})
}

fn at(date_time: &str) -> Value {
    json!({"date_time": date_time})
}

fn interval(start: &str, end: &str) -> Value {
    json!({"time_interval": {"start_date_time": start, "end_date_time": end}})
}

/// `schema/omh/heart-rate-3.0.json`: `heart_rate` unit-value in "beats/min",
/// `temporal_relationship_to_physical_activity` (values such as "at rest", "during exercise").
fn heart_rate(bpm: f64, relation: &str, frame: Value) -> Value {
    point(
        "heart-rate",
        "3.0",
        Some("p01"),
        json!({
            "heart_rate": {"value": bpm, "unit": "beats/min"},
            "effective_time_frame": frame,
            "temporal_relationship_to_physical_activity": relation,
        }),
    )
}

/// From memory (no published schema file was at hand): `heart_rate_variability` unit-value in
/// "ms" and `algorithm` naming the statistic ("RMSSD", "SDNN", …).
fn hrv(ms: f64, algorithm: &str, frame: Value) -> Value {
    point(
        "heart-rate-variability",
        "1.0",
        Some("p01"),
        json!({
            "heart_rate_variability": {"value": ms, "unit": "ms"},
            "algorithm": algorithm,
            "effective_time_frame": frame,
        }),
    )
}

/// `schema/omh/sleep-duration-2.0.json`: `sleep_duration` duration unit-value ("sec", "min",
/// "h"), `effective_time_frame` a time interval.
fn sleep(value: f64, unit: &str, frame: Value) -> Value {
    point(
        "sleep-duration",
        "2.0",
        Some("p01"),
        json!({
            "sleep_duration": {"value": value, "unit": unit},
            "effective_time_frame": frame,
        }),
    )
}

/// `schema/omh/body-temperature-4.0.json`: `body_temperature` temperature unit-value,
/// `measurement_location` (e.g. "wrist"), `temporal_relationship_to_sleep`. The unit codes
/// "C", "F", "K" are from memory of the temperature unit-value schema.
fn temperature(value: f64, unit: &str, frame: Value) -> Value {
    point(
        "body-temperature",
        "4.0",
        Some("p01"),
        json!({
            "body_temperature": {"value": value, "unit": unit},
            "measurement_location": "wrist",
            "effective_time_frame": frame,
        }),
    )
}

/// `schema/omh/step-count-3.0.json`: `step_count` unit-value in "steps", a time interval.
fn steps(count: f64, frame: Value) -> Value {
    point(
        "step-count",
        "3.0",
        Some("p01"),
        json!({
            "step_count": {"value": count, "unit": "steps"},
            "effective_time_frame": frame,
        }),
    )
}

/// `step-count` 2.0, from memory: `step_count` a plain number.
fn steps_plain(count: f64, frame: Value) -> Value {
    point(
        "step-count",
        "2.0",
        Some("p01"),
        json!({"step_count": count, "effective_time_frame": frame}),
    )
}

/// `schema/omh/respiratory-rate-2.0.json`: `respiratory_rate` unit-value in "breaths/min".
fn respiratory_rate(brpm: f64, frame: Value) -> Value {
    point(
        "respiratory-rate",
        "2.0",
        Some("p01"),
        json!({
            "respiratory_rate": {"value": brpm, "unit": "breaths/min"},
            "effective_time_frame": frame,
        }),
    )
}

fn day(text: &str) -> NaiveDate {
    NaiveDate::parse_from_str(text, "%Y-%m-%d").unwrap()
}

fn write_array(path: &Path, points: &[Value]) {
    std::fs::write(path, serde_json::to_string_pretty(points).unwrap()).unwrap();
}

fn write_lines(path: &Path, points: &[Value]) {
    let lines: Vec<String> = points.iter().map(|p| p.to_string()).collect();
    std::fs::write(path, lines.join("\n") + "\n").unwrap();
}

fn import(inputs: &[&Path], participant: Option<&str>, out: &Path) -> ImportReport {
    import_omh(&ImportOptions {
        inputs: inputs.iter().map(|p| p.to_path_buf()).collect(),
        participant: participant.map(str::to_owned),
        out: out.to_path_buf(),
        overwrite: false,
    })
    .unwrap()
}

/// Reads `daily.csv` back with the project's cohort reader: no issue, one participant.
fn read_back(out: &Path) -> ParticipantSeries {
    let cohort = read_cohort(out.parent().unwrap(), BadRowPolicy::Abort).unwrap();
    assert!(cohort.issues.is_empty(), "{:?}", cohort.issues);
    assert_eq!(cohort.participants.len(), 1);
    cohort.participants.into_iter().next().unwrap()
}

fn value(series: &ParticipantSeries, signal: Signal, date: &str) -> Option<f64> {
    let i = series.dates.iter().position(|d| *d == day(date))?;
    series.values.get(&signal)?[i]
}

fn close(actual: Option<f64>, expected: f64, tolerance: f64) {
    let a = actual.unwrap_or_else(|| panic!("no value, expected {expected}"));
    assert!(
        (a - expected).abs() <= tolerance,
        "{a} vs {expected} (tolerance {tolerance})"
    );
}

#[test]
fn every_schema_maps_with_its_unit_conversion_and_reads_back() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("points.json");
    let night1 = interval("2024-03-01T23:10:00+01:00", "2024-03-02T06:40:00+01:00");
    let night2 = interval("2024-03-02T23:00:00+01:00", "2024-03-03T06:00:00+01:00");
    write_array(
        &input,
        &[
            heart_rate(62.0, "at rest", at("2024-03-02T07:00:00+01:00")),
            hrv(45.0, "RMSSD", night1.clone()),
            sleep(450.0, "min", night1.clone()),
            temperature(98.6, "F", night1.clone()),
            steps(
                8000.0,
                interval("2024-03-02T00:00:00+01:00", "2024-03-03T00:00:00+01:00"),
            ),
            respiratory_rate(14.5, night1),
            sleep(25_200.0, "sec", night2.clone()),
            temperature(309.15, "K", night2),
        ],
    );
    let out = dir.path().join("cohort/daily.csv");
    let report = import(&[&input], None, &out);
    assert_eq!(report.participant, "p01");
    assert_eq!((report.points_read, report.points_used), (8, 8));
    assert!(report.refused.is_empty(), "{:?}", report.refused);
    assert_eq!(report.days_written, 2);
    // Nights: 98.6 °F = 37.0 °C, 309.15 K = 36.0 °C; reference = their median, 36.5 °C.
    let (reference, nights) = report.skin_temp_reference.unwrap();
    assert!((reference - 36.5).abs() < 1e-9, "{reference}");
    assert_eq!(nights, 2);

    let series = read_back(&out);
    assert_eq!(series.participant, "p01");
    assert_eq!(series.dates, vec![day("2024-03-02"), day("2024-03-03")]);
    close(value(&series, Signal::RestingHr, "2024-03-02"), 62.0, 1e-9);
    close(value(&series, Signal::HrvRmssd, "2024-03-02"), 45.0, 1e-9);
    // 450 min = 7.5 h; 25 200 s = 7 h.
    close(value(&series, Signal::Sleep, "2024-03-02"), 7.5, 1e-9);
    close(value(&series, Signal::Sleep, "2024-03-03"), 7.0, 1e-9);
    close(
        value(&series, Signal::SkinTempDelta, "2024-03-02"),
        0.5,
        1e-9,
    );
    close(
        value(&series, Signal::SkinTempDelta, "2024-03-03"),
        -0.5,
        1e-9,
    );
    close(value(&series, Signal::Steps, "2024-03-02"), 8000.0, 0.0);
    close(value(&series, Signal::RespRate, "2024-03-02"), 14.5, 1e-9);
    assert_eq!(value(&series, Signal::Steps, "2024-03-03"), None);
}

#[test]
fn overnight_measures_take_the_local_day_of_waking_daytime_ones_the_local_start() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("tokyo.json");
    write_array(
        &input,
        &[
            // Ends 07:00 +09:00 on 2 March, which is 22:00 UTC on 1 March.
            sleep(
                7.5,
                "h",
                interval("2024-03-01T23:30:00+09:00", "2024-03-02T07:00:00+09:00"),
            ),
            hrv(
                52.0,
                "RMSSD",
                interval("2024-03-01T23:30:00+09:00", "2024-03-02T07:00:00+09:00"),
            ),
            // Starts 20:00 −07:00 on 1 March, which is 03:00 UTC on 2 March.
            steps(
                3000.0,
                interval("2024-03-01T20:00:00-07:00", "2024-03-01T23:00:00-07:00"),
            ),
            // A date_time keeps its own day: 06:30 +09:00 on 3 March is 21:30 UTC on 2 March.
            respiratory_rate(13.0, at("2024-03-03T06:30:00+09:00")),
        ],
    );
    let out = dir.path().join("out/daily.csv");
    import(&[&input], Some("p01"), &out);
    let series = read_back(&out);
    assert_eq!(
        series.dates,
        vec![day("2024-03-01"), day("2024-03-02"), day("2024-03-03")]
    );
    close(value(&series, Signal::Sleep, "2024-03-02"), 7.5, 1e-9);
    close(value(&series, Signal::HrvRmssd, "2024-03-02"), 52.0, 1e-9);
    close(value(&series, Signal::Steps, "2024-03-01"), 3000.0, 0.0);
    close(value(&series, Signal::RespRate, "2024-03-03"), 13.0, 1e-9);
    assert_eq!(value(&series, Signal::Sleep, "2024-03-01"), None);
}

#[test]
fn steps_are_summed_and_rates_averaged_per_day() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("day.json");
    let morning = interval("2024-03-02T06:00:00+01:00", "2024-03-02T12:00:00+01:00");
    let afternoon = interval("2024-03-02T12:00:00+01:00", "2024-03-02T18:00:00+01:00");
    let evening = interval("2024-03-02T18:00:00+01:00", "2024-03-02T23:59:00+01:00");
    write_array(
        &input,
        &[
            steps(3000.0, morning),
            steps(4500.0, afternoon),
            steps_plain(1200.0, evening),
            steps(
                999.0,
                interval("2024-03-03T06:00:00+01:00", "2024-03-03T07:00:00+01:00"),
            ),
            heart_rate(60.0, "at rest", at("2024-03-02T07:00:00+01:00")),
            heart_rate(64.0, "at rest", at("2024-03-02T21:00:00+01:00")),
        ],
    );
    let out = dir.path().join("c/daily.csv");
    let report = import(&[&input], None, &out);
    assert_eq!(report.points_used, 6);
    let series = read_back(&out);
    close(value(&series, Signal::Steps, "2024-03-02"), 8700.0, 0.0);
    close(value(&series, Signal::Steps, "2024-03-03"), 999.0, 0.0);
    close(value(&series, Signal::RestingHr, "2024-03-02"), 62.0, 1e-9);
}

#[test]
fn a_heart_rate_not_at_rest_is_skipped_not_refused() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("hr.json");
    let t = at("2024-03-02T17:00:00+01:00");
    write_array(
        &input,
        &[
            heart_rate(150.0, "during exercise", t.clone()),
            heart_rate(58.0, "at rest", at("2024-03-02T06:50:00+01:00")),
            hrv(80.0, "SDNN", t),
        ],
    );
    let out = dir.path().join("c/daily.csv");
    let report = import(&[&input], None, &out);
    assert_eq!(report.points_read, 3);
    assert_eq!(report.points_used, 1);
    assert_eq!(report.points_skipped(), 2);
    assert_eq!(report.skipped.get(SKIP_NOT_AT_REST), Some(&1));
    assert!(report.refused.is_empty(), "{:?}", report.refused);
    let series = read_back(&out);
    close(value(&series, Signal::RestingHr, "2024-03-02"), 58.0, 1e-9);
    assert!(!series.values.contains_key(&Signal::HrvRmssd));
}

#[test]
fn refused_points_name_file_position_field_and_reason_and_good_points_stay() {
    let dir = tempfile::tempdir().unwrap();
    let array = dir.path().join("bad.json");
    let t = at("2024-03-02T07:00:00+01:00");
    let mut unknown_unit = heart_rate(61.0, "at rest", t.clone());
    unknown_unit["body"]["heart_rate"]["unit"] = json!("bpm");
    let mut missing_field = sleep(7.0, "h", t.clone());
    missing_field["body"]
        .as_object_mut()
        .unwrap()
        .remove("sleep_duration");
    let mut bad_time = respiratory_rate(14.0, t.clone());
    bad_time["body"]["effective_time_frame"]["date_time"] = json!("2024-03-02 07:00");
    let mut unknown_schema = heart_rate(61.0, "at rest", t.clone());
    unknown_schema["header"]["schema_id"]["name"] = json!("blood-pressure");
    write_array(
        &array,
        &[
            heart_rate(61.0, "at rest", t.clone()),
            unknown_unit,
            missing_field,
            heart_rate(300.0, "at rest", t.clone()),
            bad_time,
            unknown_schema,
            // Two sleeps ending the same day sum to 30 h: both refused at the day level.
            sleep(
                15.0,
                "h",
                interval("2024-03-03T00:00:00+01:00", "2024-03-03T15:00:00+01:00"),
            ),
            sleep(
                15.0,
                "h",
                interval("2024-03-03T00:00:00+01:00", "2024-03-03T15:00:00+01:00"),
            ),
        ],
    );
    let lines = dir.path().join("more.ndjson");
    let mut nan_like = respiratory_rate(14.0, t.clone());
    nan_like["body"]["respiratory_rate"]["value"] = json!("NaN");
    write_lines(&lines, &[respiratory_rate(15.0, t.clone()), nan_like]);
    let out = dir.path().join("c/daily.csv");
    let report = import(&[&array, &lines], None, &out);
    let text: Vec<String> = report.refused.iter().map(|i| i.to_string()).collect();
    let expect = |prefix: String, words: &str| {
        assert!(
            text.iter()
                .any(|t| t.starts_with(&prefix) && t.contains(words)),
            "no issue `{prefix}…{words}` in {text:#?}"
        );
    };
    let a = array.display();
    expect(
        format!("{a} [1] /body/heart_rate/unit: "),
        "unknown unit `bpm`",
    );
    expect(format!("{a} [2] /body/sleep_duration: "), "missing field");
    expect(
        format!("{a} [3] /body/heart_rate/value: "),
        "outside 25–220",
    );
    expect(
        format!("{a} [4] /body/effective_time_frame/date_time: "),
        "unparsable timestamp",
    );
    expect(
        format!("{a} [5] /header/schema_id/name: "),
        "unknown schema",
    );
    expect(
        format!("{a} [6] /body/sleep_duration/value: "),
        "day's total",
    );
    expect(
        format!("{a} [7] /body/sleep_duration/value: "),
        "day's total",
    );
    expect(
        format!("{}:2 /body/respiratory_rate/value: ", lines.display()),
        "expected a number",
    );
    assert_eq!(report.refused.len(), 8, "{text:#?}");
    assert_eq!(report.points_read, 10);
    assert_eq!(report.points_used, 2);
    let series = read_back(&out);
    close(value(&series, Signal::RestingHr, "2024-03-02"), 61.0, 1e-9);
    close(value(&series, Signal::RespRate, "2024-03-02"), 15.0, 1e-9);
    assert!(!series.values.contains_key(&Signal::Sleep));
}

#[test]
fn a_repeated_data_point_is_counted_once_and_a_reused_id_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let first = dir.path().join("export-1.json");
    let second = dir.path().join("export-2.json");
    let walk = steps(
        5000.0,
        interval("2024-03-02T08:00:00+01:00", "2024-03-02T20:00:00+01:00"),
    );
    let mut reused = steps(
        700.0,
        interval("2024-03-02T20:00:00+01:00", "2024-03-02T22:00:00+01:00"),
    );
    reused["header"]["id"] = walk["header"]["id"].clone();
    write_array(&first, std::slice::from_ref(&walk));
    // The second export overlaps the first: the same point again, and another under its id.
    write_array(&second, &[walk, reused]);
    let out = dir.path().join("c/daily.csv");
    let report = import(&[&first, &second], None, &out);
    assert_eq!(report.skipped.get(SKIP_DUPLICATE), Some(&1));
    assert_eq!(report.refused.len(), 1, "{:?}", report.refused);
    let issue = report.refused[0].to_string();
    let expected = format!(
        "{} [1] /header/id: header.id `{}` already used by {} [0]",
        second.display(),
        report_id(&first),
        first.display()
    );
    assert!(issue.starts_with(&expected), "{issue}");
    close(
        value(&read_back(&out), Signal::Steps, "2024-03-02"),
        5000.0,
        0.0,
    );
}

fn report_id(file: &Path) -> String {
    let points: Value = serde_json::from_str(&std::fs::read_to_string(file).unwrap()).unwrap();
    points[0]["header"]["id"].as_str().unwrap().to_owned()
}

#[test]
fn newline_delimited_lines_stand_alone_even_when_the_first_is_broken() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("lines.json");
    let good = heart_rate(59.0, "at rest", at("2024-03-02T07:00:00+01:00"));
    std::fs::write(&input, format!("{{\"header\": {{\n\n{good}\n")).unwrap();
    let out = dir.path().join("c/daily.csv");
    let report = import(&[&input], None, &out);
    assert_eq!((report.points_read, report.points_used), (2, 1));
    let issue = report.refused[0].to_string();
    assert!(
        issue.starts_with(&format!("{}:1: line is not JSON", input.display())),
        "{issue}"
    );
    close(
        value(&read_back(&out), Signal::RestingHr, "2024-03-02"),
        59.0,
        1e-9,
    );
}

#[test]
fn a_folder_of_array_line_and_single_object_files_is_read_in_name_order() {
    let dir = tempfile::tempdir().unwrap();
    let folder = dir.path().join("export");
    std::fs::create_dir(&folder).unwrap();
    let t = |d: u32| at(&format!("2024-03-{d:02}T07:00:00+01:00"));
    write_array(
        &folder.join("a-array.json"),
        &[
            heart_rate(60.0, "at rest", t(1)),
            heart_rate(61.0, "at rest", t(2)),
        ],
    );
    write_lines(
        &folder.join("b-lines.json"),
        &[
            heart_rate(62.0, "at rest", t(3)),
            heart_rate(63.0, "at rest", t(4)),
        ],
    );
    std::fs::write(
        folder.join("c-single.json"),
        serde_json::to_string_pretty(&heart_rate(64.0, "at rest", t(5))).unwrap(),
    )
    .unwrap();
    std::fs::write(folder.join("notes.txt"), "not a data point").unwrap();
    let out = dir.path().join("c/daily.csv");
    let report = import(&[&folder], None, &out);
    assert_eq!(report.files, 3);
    assert_eq!((report.points_read, report.points_used), (5, 5));
    let series = read_back(&out);
    for (d, bpm) in [(1, 60.0), (2, 61.0), (3, 62.0), (4, 63.0), (5, 64.0)] {
        close(
            value(&series, Signal::RestingHr, &format!("2024-03-{d:02}")),
            bpm,
            1e-9,
        );
    }
}

#[test]
fn the_participant_must_be_known_and_agree() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("p.json");
    let mut anonymous = heart_rate(60.0, "at rest", at("2024-03-01T07:00:00+01:00"));
    anonymous["header"]
        .as_object_mut()
        .unwrap()
        .remove("user_id");
    write_array(&input, std::slice::from_ref(&anonymous));
    let run = |participant: Option<&str>, out: &str| {
        import_omh(&ImportOptions {
            inputs: vec![input.clone()],
            participant: participant.map(str::to_owned),
            out: dir.path().join(out),
            overwrite: false,
        })
    };
    assert!(matches!(
        run(None, "a.csv"),
        Err(ImportError::Participant(_))
    ));
    assert_eq!(run(Some("p09"), "b.csv").unwrap().participant, "p09");

    write_array(
        &input,
        &[
            anonymous,
            heart_rate(61.0, "at rest", at("2024-03-02T07:00:00+01:00")),
        ],
    );
    let err = run(Some("p09"), "c.csv").unwrap_err();
    assert!(
        matches!(&err, ImportError::Participant(m) if m.contains("disagrees") && m.contains("p01")),
        "{err}"
    );
    assert!(!dir.path().join("c.csv").exists());
    assert_eq!(run(Some("p01"), "d.csv").unwrap().participant, "p01");
}

fn cli(args: &[&str]) -> std::process::Output {
    Command::new(BIN)
        .arg("import-omh")
        .args(args)
        .env("NO_COLOR", "1")
        .output()
        .expect("plimsoll runs")
}

#[test]
fn the_command_prints_a_summary_and_fails_only_when_nothing_is_usable() {
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.json");
    write_array(
        &good,
        &[
            heart_rate(60.0, "at rest", at("2024-03-01T07:00:00+01:00")),
            heart_rate(140.0, "during exercise", at("2024-03-01T18:00:00+01:00")),
            heart_rate(999.0, "at rest", at("2024-03-02T07:00:00+01:00")),
        ],
    );
    let out: PathBuf = dir.path().join("cohort/daily.csv");
    let o = cli(&[good.to_str().unwrap(), "--out", out.to_str().unwrap()]);
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(
        stdout.contains("3 data points read from 1 file: 1 used, 1 skipped, 1 refused"),
        "{stdout}"
    );
    assert!(
        stdout.contains("good.json [2] /body/heart_rate/value"),
        "{stdout}"
    );
    assert!(stdout.contains("for participant p01: 1 day"), "{stdout}");
    close(
        value(&read_back(&out), Signal::RestingHr, "2024-03-01"),
        60.0,
        1e-9,
    );

    // Refuses to replace the file without --force.
    let again = cli(&[good.to_str().unwrap(), "--out", out.to_str().unwrap()]);
    assert!(!again.status.success());

    let bad = dir.path().join("bad.json");
    write_array(
        &bad,
        &[heart_rate(
            999.0,
            "at rest",
            at("2024-03-02T07:00:00+01:00"),
        )],
    );
    let none = dir.path().join("none/daily.csv");
    let o = cli(&[bad.to_str().unwrap(), "--out", none.to_str().unwrap()]);
    assert!(!o.status.success());
    assert!(String::from_utf8_lossy(&o.stderr).contains("nothing usable"));
    assert!(!none.exists());

    let missing = dir.path().join("missing.json");
    let o = cli(&[missing.to_str().unwrap(), "--participant", "p01"]);
    assert!(!o.status.success());
    assert!(String::from_utf8_lossy(&o.stderr).contains("missing.json"));
}
