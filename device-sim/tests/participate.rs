//! `plimsoll participate`, the real binary, as two participants' devices
//! taking part in a study run by an aggregator over TLS: both train through
//! every round and write their outputs locally; a second run resumes with
//! the kept secret (same device id); a wrong enrollment code is refused.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Arc;

use plimsoll_device::cohort::{
    BadRowPolicy, Scenario, SimulateOptions, read_cohort, simulate_to_dir,
};
use plimsoll_device::demo::{cohort_signals, initial_layouts};
use plimsoll_server::service::now_ms;
use plimsoll_server::tls::write_dev_certificate;
use plimsoll_server::{Coordinator, LocalTraining, StudyConfig, TlsIdentity, serve_with};

const BIN: &str = env!("CARGO_BIN_EXE_plimsoll");
const STUDY: &str = "remote";
const ROUNDS: u32 = 3;

struct Run {
    ok: bool,
    stdout: String,
    stderr: String,
}

/// Runs `plimsoll participate` off the async workers (the aggregator runs
/// on them).
async fn participate(
    url: &str,
    ca: &Path,
    code: &str,
    participant: &str,
    data: &Path,
    out: &Path,
) -> Run {
    let mut cmd = Command::new(BIN);
    cmd.args(["participate", "--aggregator", url, "--ca"])
        .arg(ca)
        .args(["--study", STUDY, "--participant", participant, "--data"])
        .arg(data)
        .arg("--out")
        .arg(out)
        .env("PLIMSOLL_ENROLLMENT_CODE", code);
    let out = tokio::task::spawn_blocking(move || cmd.output().unwrap())
        .await
        .unwrap();
    Run {
        ok: out.status.success(),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

fn device_id(stdout: &str) -> u64 {
    stdout
        .split_whitespace()
        .nth(1)
        .and_then(|id| id.parse().ok())
        .unwrap_or_else(|| panic!("no device id in `{stdout}`"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_devices_take_part_over_tls_and_resume() {
    let dir = tempfile::tempdir().unwrap();
    let scenario = Scenario::from_path(
        &PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/quick.toml"),
    )
    .unwrap();
    let cohort_dir = dir.path().join("cohort");
    let sim = SimulateOptions {
        seed: Some(11),
        participants: Some(2),
        days: Some(90),
    };
    simulate_to_dir(&scenario, &sim, &cohort_dir, &mut |_, _| {}).unwrap();
    let cohort = read_cohort(&cohort_dir, BadRowPolicy::Quarantine).unwrap();
    let labels: Vec<String> = cohort
        .participants
        .iter()
        .map(|p| p.participant.clone())
        .collect();
    let data = cohort_dir.join("daily.csv");

    let files = write_dev_certificate(&dir.path().join("certs"), &["localhost".into()], 2).unwrap();
    let identity = TlsIdentity::load(&files.cert, &files.key).unwrap();
    let coordinator = Arc::new(Coordinator::open(&dir.path().join("agg.db")).unwrap());
    let code = coordinator
        .create_study(
            StudyConfig {
                study_id: STUDY.into(),
                title: "remote devices".into(),
                signals: initial_layouts(&cohort_signals(&cohort)),
                rounds: ROUNDS,
                training: LocalTraining::default(),
                fraction_per_round: 1.0,
                min_quorum: 2,
                start_when_enrolled: 2,
                round_deadline_ms: 120_000,
                selection_seed: 5,
                aggregation: Default::default(),
                alert_budget_per_participant_month:
                    plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
                review_level: plimsoll_server::packets::FlagLevel::Alert,
                sensor_models: None,
                subgroups: None,
                dp: None,
                secure_aggregation: None,
                // A direction of the study's own, which the devices must take.
                alert_direction: Some(
                    [
                        ("resting_hr_bpm".to_owned(), 1.0),
                        ("hrv_rmssd_ms".to_owned(), -1.0),
                    ]
                    .into(),
                ),
            },
            now_ms(),
        )
        .unwrap();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let server = serve_with(coordinator.clone(), listener, Some(&identity))
        .await
        .unwrap();
    let url = format!("https://localhost:{}", server.addr.port());

    let outs: Vec<PathBuf> = labels.iter().map(|l| dir.path().join(l)).collect();
    let (a, b) = tokio::join!(
        participate(&url, &files.ca, &code, &labels[0], &data, &outs[0]),
        participate(&url, &files.ca, &code, &labels[1], &data, &outs[1]),
    );
    for (run, out) in [(&a, &outs[0]), (&b, &outs[1])] {
        assert!(run.ok, "{}\n{}", run.stdout, run.stderr);
        assert!(
            run.stdout.contains(&format!("{ROUNDS} rounds trained")),
            "{}",
            run.stdout
        );
        assert!(run.stdout.contains("not a diagnosis"), "{}", run.stdout);
        assert!(
            run.stdout.contains(
                "alerting in the study's direction (up: resting heart rate; down: overnight HRV (RMSSD))"
            ),
            "{}",
            run.stdout
        );
        let calibration: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(out.join("calibration.json")).unwrap())
                .unwrap();
        assert_eq!(
            calibration["pattern"]["weights"],
            serde_json::json!([1.0, -1.0, 0.0, 0.0, 0.0, 0.0]),
            "the device calibrated in the study's direction"
        );
        for file in [
            "device-secret",
            "posterior.csv",
            "prospective.csv",
            "flags.csv",
            "report.html",
        ] {
            assert!(
                out.join(file).exists(),
                "{file} missing in {}",
                out.display()
            );
        }
    }
    assert_eq!(coordinator.status(STUDY).unwrap().rounds_completed, ROUNDS);

    // A second run of the first device resumes with its kept secret.
    let again = participate(&url, &files.ca, &code, &labels[0], &data, &outs[0]).await;
    assert!(again.ok, "{}", again.stderr);
    assert_eq!(device_id(&again.stdout), device_id(&a.stdout));
    assert!(
        again.stdout.contains("0 rounds trained"),
        "{}",
        again.stdout
    );
    assert_eq!(coordinator.status(STUDY).unwrap().devices_enrolled, 2);

    // A wrong code is refused, naming the field.
    let wrong = participate(
        &url,
        &files.ca,
        "WRONG",
        &labels[1],
        &data,
        &dir.path().join("x"),
    )
    .await;
    assert!(!wrong.ok);
    assert!(wrong.stderr.contains("enrollment_code"), "{}", wrong.stderr);
    server.shutdown().await.unwrap();
}

#[test]
fn study_config_writes_a_valid_configuration_once() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("study.json");
    let run = |args: &[&str]| {
        Command::new(BIN)
            .arg("study-config")
            .args(args)
            .arg("--out")
            .arg(&out)
            .output()
            .unwrap()
    };
    let first = run(&[
        "--study", "pilot-1", "--signal", "steps", "--signal", "sleep_h",
    ]);
    assert!(
        first.status.success(),
        "{}",
        String::from_utf8_lossy(&first.stderr)
    );
    let config: StudyConfig =
        serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap();
    config.validate().unwrap();
    assert_eq!(config.study_id, "pilot-1");
    assert_eq!(
        config.signals,
        initial_layouts(&[
            plimsoll_device::signal::Signal::Steps,
            plimsoll_device::signal::Signal::Sleep
        ])
    );
    let again = run(&["--study", "pilot-2"]);
    assert!(
        !again.status.success(),
        "an existing file is never overwritten"
    );
    let unknown = run(&["--study", "pilot-3", "--signal", "glucose"]);
    assert!(String::from_utf8_lossy(&unknown.stderr).contains("glucose"));

    // The alerting direction: written as given, checked against the study's signals.
    std::fs::remove_file(&out).unwrap();
    let directed = run(&[
        "--study",
        "pilot-4",
        "--alert-direction",
        "resting_hr_bpm=1",
        "--alert-direction",
        "steps=-0.5",
    ]);
    assert!(
        directed.status.success(),
        "{}",
        String::from_utf8_lossy(&directed.stderr)
    );
    let config: StudyConfig =
        serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap();
    let want: std::collections::BTreeMap<String, f64> = [
        ("resting_hr_bpm".to_owned(), 1.0),
        ("steps".to_owned(), -0.5),
    ]
    .into();
    assert_eq!(config.alert_direction, Some(want));
    for (args, says) in [
        (&["--alert-direction", "glucose=1"][..], "glucose"),
        (&["--alert-direction", "steps"][..], "COLUMN=WEIGHT"),
        (&["--alert-direction", "steps=up"][..], "not a number"),
        (&["--alert-direction", "steps=0"][..], "non-zero"),
        (
            &["--signal", "sleep_h", "--alert-direction", "steps=1"][..],
            "not one of the study's signals",
        ),
    ] {
        let _ = std::fs::remove_file(&out);
        let mut all = vec!["--study", "pilot-5"];
        all.extend_from_slice(args);
        let bad = run(&all);
        assert!(!bad.status.success(), "{args:?} was accepted");
        let stderr = String::from_utf8_lossy(&bad.stderr);
        assert!(stderr.contains(says), "{args:?}: {stderr}");
    }
}
