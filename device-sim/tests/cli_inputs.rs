//! The `plimsoll` binary on bad input and setup mistakes: `--on-bad-row`
//! (quarantine files, issues in `evaluation.json`, abort naming the line),
//! errors naming their path, a header-only file, a target kind absent from
//! `events.csv`, `simulate` into a folder that holds files, and `demo` run
//! outside the repository (built-in scenario, settings checked before
//! simulating, an earlier run's device folders cleared, the caution sidecar).

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use plimsoll_device::cohort::{Scenario, SimulateOptions, simulate_to_dir};

const BIN: &str = env!("CARGO_BIN_EXE_plimsoll");

fn run(args: &[&str], cwd: &Path) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(cwd)
        .env("NO_COLOR", "1")
        .output()
        .expect("plimsoll runs")
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

fn quick_scenario() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/quick.toml")
}

/// A small simulated cohort in `dir`.
fn small_cohort(dir: &Path, participants: usize, days: usize) {
    let scenario = Scenario::from_path(&quick_scenario()).unwrap();
    let sim = SimulateOptions {
        seed: Some(5),
        participants: Some(participants),
        days: Some(days),
    };
    simulate_to_dir(&scenario, &sim, dir, &mut |_, _| {}).unwrap();
}

/// Appends two bad rows to `daily.csv` (an impossible date, then a resting
/// heart rate of 999 bpm); returns their line numbers.
fn append_bad_rows(cohort: &Path) -> [u64; 2] {
    let path = cohort.join("daily.csv");
    let mut content = std::fs::read_to_string(&path).unwrap();
    let header: Vec<&str> = content.lines().next().unwrap().split(',').collect();
    let lines = content.lines().count() as u64;
    let hr = header.iter().position(|c| *c == "resting_hr_bpm").unwrap();
    let mut bad_date = vec![""; header.len()];
    bad_date[0] = "zz-1";
    bad_date[1] = "2024-13-01";
    let mut bad_hr = vec![""; header.len()];
    bad_hr[0] = "zz-1";
    bad_hr[1] = "2024-09-03";
    bad_hr[hr] = "999";
    content.push_str(&format!("{}\n{}\n", bad_date.join(","), bad_hr.join(",")));
    std::fs::write(&path, content).unwrap();
    [lines + 1, lines + 2]
}

#[test]
fn evaluate_quarantines_bad_rows_lists_them_and_warns_of_absent_kinds() {
    let root = tempfile::tempdir().unwrap();
    let cohort = root.path().join("cohort");
    small_cohort(&cohort, 6, 70);
    let bad = append_bad_rows(&cohort);
    let out = root.path().join("eval");
    let o = run(
        &[
            "evaluate",
            cohort.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--rounds",
            "1",
            "--target-kind",
            "acute_illness",
            "--target-kind",
            "sneezing_fit",
        ],
        root.path(),
    );
    let (stdout, stderr) = (text(&o.stdout), text(&o.stderr));
    assert!(o.status.success(), "{stdout}\n{stderr}");

    // The quarantine file beside the outputs holds exactly the two bad rows.
    let quarantine = out.join("quarantine").join("daily.csv");
    let copied = std::fs::read_to_string(&quarantine)
        .unwrap_or_else(|e| panic!("{}: {e}\n{stdout}", quarantine.display()));
    let rows: Vec<&str> = copied.lines().skip(1).collect();
    assert_eq!(rows.len(), 2, "{copied}");
    assert!(rows[0].contains(&format!(",{},", bad[0])), "{copied}");
    assert!(rows[1].contains(&format!(",{},", bad[1])), "{copied}");
    assert!(stdout.contains("2 bad rows of"), "{stdout}");

    // evaluation.json lists the issues themselves, not only their count.
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("evaluation.json")).unwrap())
            .unwrap();
    assert_eq!(json["input_issues"], 2);
    let issues = json["issues"].as_array().unwrap();
    let listed: Vec<(u64, &str)> = issues
        .iter()
        .map(|i| {
            (
                i["line"].as_u64().unwrap(),
                i["column_name"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(listed, [(bad[0], "date"), (bad[1], "resting_hr_bpm")]);
    assert!(issues.iter().all(|i| i["file"] == "daily.csv"));
    assert_eq!(json["issues_not_listed"], 0);

    // A target kind no event has is named, with the kinds present.
    assert!(
        stderr.contains("--target-kind sneezing_fit: no event of this kind"),
        "{stderr}"
    );
    assert!(stderr.contains("kinds present: "), "{stderr}");
    assert!(stderr.contains("acute_illness"), "{stderr}");
    assert!(!stderr.contains("--target-kind acute_illness:"), "{stderr}");

    // The plot carries the one caution (proto::caution::TEXT), wrapped.
    let svg = std::fs::read_to_string(out.join("evaluation.svg")).unwrap();
    assert!(svg.contains("qualified clinician"), "caution in the SVG");
    assert!(svg.contains("Local protocols and regulations govern any action."));

    // Under `abort` the same cohort stops at the first bad row, naming it.
    let o = run(
        &[
            "evaluate",
            cohort.to_str().unwrap(),
            "--out",
            root.path().join("eval-abort").to_str().unwrap(),
            "--on-bad-row",
            "abort",
        ],
        root.path(),
    );
    let stderr = text(&o.stderr);
    assert!(!o.status.success());
    assert!(
        stderr.contains(&format!("daily.csv:{}:2 (date)", bad[0])),
        "{stderr}"
    );
    assert!(!root.path().join("eval-abort").exists(), "nothing written");
}

#[test]
fn errors_name_their_path_and_a_header_only_file_has_no_rows() {
    let root = tempfile::tempdir().unwrap();
    let cohort = root.path().join("cohort");
    small_cohort(&cohort, 2, 30);
    let afile = root.path().join("afile");
    std::fs::write(&afile, "not a folder").unwrap();
    let out = afile.join("x");
    let o = run(
        &[
            "evaluate",
            cohort.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
        root.path(),
    );
    let stderr = text(&o.stderr);
    assert!(!o.status.success());
    assert!(stderr.contains(out.to_str().unwrap()), "{stderr}");

    let header_only = root.path().join("header-only");
    std::fs::create_dir(&header_only).unwrap();
    std::fs::write(
        header_only.join("daily.csv"),
        "participant,date,resting_hr_bpm\n",
    )
    .unwrap();
    let o = run(&["evaluate", header_only.to_str().unwrap()], root.path());
    let stderr = text(&o.stderr);
    assert!(!o.status.success());
    assert!(stderr.contains("daily.csv: no rows"), "{stderr}");
    assert!(!stderr.contains("empty"), "{stderr}");
}

#[test]
fn simulate_refuses_a_folder_with_files_unless_forced() {
    let root = tempfile::tempdir().unwrap();
    let out = root.path().join("cohort");
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("daily.csv"), "precious\n").unwrap();
    let scenario = quick_scenario();
    let args = |force: bool| {
        let mut a = vec![
            "simulate".to_owned(),
            scenario.to_str().unwrap().to_owned(),
            "--out".to_owned(),
            out.to_str().unwrap().to_owned(),
            "--participants".to_owned(),
            "2".to_owned(),
            "--days".to_owned(),
            "20".to_owned(),
        ];
        if force {
            a.push("--force".to_owned());
        }
        a
    };
    let refused = run(
        &args(false).iter().map(String::as_str).collect::<Vec<_>>(),
        root.path(),
    );
    assert!(!refused.status.success());
    assert!(
        text(&refused.stderr).contains("--force"),
        "{}",
        text(&refused.stderr)
    );
    assert_eq!(
        std::fs::read_to_string(out.join("daily.csv")).unwrap(),
        "precious\n",
        "untouched"
    );
    let forced = run(
        &args(true).iter().map(String::as_str).collect::<Vec<_>>(),
        root.path(),
    );
    assert!(forced.status.success(), "{}", text(&forced.stderr));
    assert_ne!(
        std::fs::read_to_string(out.join("daily.csv")).unwrap(),
        "precious\n"
    );
    // An empty folder needs no --force.
    let empty = root.path().join("empty");
    std::fs::create_dir(&empty).unwrap();
    let o = run(
        &[
            "simulate",
            scenario.to_str().unwrap(),
            "--out",
            empty.to_str().unwrap(),
            "--participants",
            "2",
            "--days",
            "20",
        ],
        root.path(),
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
}

#[test]
fn demo_runs_outside_the_repository_checks_settings_first_and_clears_old_devices() {
    // A working folder with no demo-data/ in it.
    let root = tempfile::tempdir().unwrap();
    let out = root.path().join("demo");

    let o = run(
        &[
            "demo",
            "--out",
            "demo",
            "--rounds",
            "0",
            "--review-port",
            "0",
        ],
        root.path(),
    );
    assert!(!o.status.success());
    assert!(
        text(&o.stderr).contains("rounds must be at least 1"),
        "{}",
        text(&o.stderr)
    );
    assert!(!out.join("cohort").exists(), "refused before simulating");

    // Folders an earlier demo left, and one it did not write.
    let stale = out.join("devices").join("p-stale");
    std::fs::create_dir_all(&stale).unwrap();
    std::fs::write(stale.join("posterior.csv"), "old\n").unwrap();
    let foreign = out.join("devices").join("notes");
    std::fs::create_dir_all(&foreign).unwrap();
    std::fs::write(foreign.join("mine.txt"), "keep\n").unwrap();

    let o = run(
        &[
            "demo",
            "--out",
            "demo",
            "--participants",
            "4",
            "--rounds",
            "2",
            "--review-port",
            "0",
        ],
        root.path(),
    );
    let stdout = text(&o.stdout);
    assert!(o.status.success(), "{stdout}\n{}", text(&o.stderr));
    assert!(
        stdout.contains("built-in") || stdout.contains("Simulated 4 participants"),
        "{stdout}"
    );
    assert!(!stale.exists(), "the earlier demo's device folder is gone");
    assert!(foreign.join("mine.txt").exists(), "other files stay");
    assert!(stdout.contains("left in place"), "{stdout}");
    let devices: Vec<PathBuf> = std::fs::read_dir(out.join("devices"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p != &foreign)
        .collect();
    assert_eq!(devices.len(), 4, "{devices:?}");
    for d in &devices {
        let caution = std::fs::read_to_string(d.join("CAUTION.txt")).unwrap();
        assert!(caution.contains("not a diagnosis"), "{caution}");
        assert!(caution.contains("qualified clinician"), "{caution}");
        assert!(caution.contains("flags.csv"), "{caution}");
    }
}

/// The demo with secure aggregation runs end to end over gRPC (every round through the four
/// phases of `SecureStep`) and says what the aggregator saw, also with differential privacy.
#[test]
fn demo_with_secure_aggregation_states_what_the_aggregator_saw() {
    let root = tempfile::tempdir().unwrap();
    let o = run(
        &[
            "demo",
            "--out",
            "demo",
            "--participants",
            "4",
            "--rounds",
            "3",
            "--secure-aggregation",
            "--review-port",
            "0",
        ],
        root.path(),
    );
    let stdout = text(&o.stdout);
    assert!(o.status.success(), "{stdout}\n{}", text(&o.stderr));
    let line = stdout
        .lines()
        .find(|l| {
            l.starts_with("Privacy: secure aggregation in 3 rounds and both calibration stages")
        })
        .unwrap_or_else(|| panic!("{stdout}"));
    assert!(line.contains("over 4–4 devices"), "{line}");
    assert!(
        stdout.contains("Detector calibrated over gRPC from 4 devices' sums"),
        "{stdout}"
    );

    // With differential privacy, the devices add the noise (distributed discrete Gaussian).
    let o = run(
        &[
            "demo",
            "--out",
            "demo2",
            "--participants",
            "4",
            "--rounds",
            "2",
            "--secure-aggregation",
            "--dp-epsilon",
            "8",
            "--review-port",
            "0",
        ],
        root.path(),
    );
    let stdout = text(&o.stdout);
    assert!(o.status.success(), "{stdout}\n{}", text(&o.stderr));
    assert!(stdout.contains("Privacy: user-level DP-FedAvg"), "{stdout}");
    assert!(
        stdout.contains("Privacy: secure aggregation in 2 rounds"),
        "{stdout}"
    );
}

/// The demo with a differentially private prior runs end to end over gRPC and states the
/// privacy spent; an ε no noise can reach is refused before simulating.
#[test]
fn demo_with_differential_privacy_states_epsilon() {
    let root = tempfile::tempdir().unwrap();
    let o = run(
        &[
            "demo",
            "--out",
            "demo",
            "--participants",
            "4",
            "--rounds",
            "3",
            "--dp-epsilon",
            "8",
            "--review-port",
            "0",
        ],
        root.path(),
    );
    let stdout = text(&o.stdout);
    assert!(o.status.success(), "{stdout}\n{}", text(&o.stderr));
    let line = stdout
        .lines()
        .find(|l| l.starts_with("Privacy: user-level DP-FedAvg"))
        .unwrap_or_else(|| panic!("{stdout}"));
    assert!(line.contains("of 8 after 3 rounds"), "{line}");

    let o = run(
        &[
            "demo",
            "--out",
            "demo2",
            "--dp-epsilon",
            "0",
            "--review-port",
            "0",
        ],
        root.path(),
    );
    assert!(!o.status.success());
    assert!(
        text(&o.stderr).contains("--dp-epsilon 0: the ε budget must be positive"),
        "{}",
        text(&o.stderr)
    );
    assert!(!root.path().join("demo2").join("cohort").exists());
}
