//! A device written in Python (`device-sim/python/plimsoll_device.py`, stubs
//! generated from `proto/` by `grpc_tools.protoc` here) takes part in every
//! round of a study beside two Rust clients, over TLS on loopback: the gRPC
//! contract is language-neutral. The Python packages (grpcio, grpcio-tools)
//! are pinned in `scripts/install-python-tools.sh`.

use std::path::Path;
use std::process::Stdio;
use std::sync::Arc;

use plimsoll_device::client::{
    AggregatorAddress, EnrollmentRequest, FlagSharing, authorized, connect_to, enroll,
    new_device_secret,
};
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::service::now_ms;
use plimsoll_server::tls::write_dev_certificate;
use plimsoll_server::{Coordinator, TlsIdentity, serve_with};

use crate::metrics::python_tools;
use crate::support::study_config;

const STUDY: &str = "polyglot";

/// Takes part in every round as `label` until the study is done; returns the rounds taken part in.
async fn rust_device(address: AggregatorAddress, code: String, label: &str, days: u32) -> u32 {
    let mut client = AggregatorClient::new(connect_to(&address).unwrap());
    let secret = new_device_secret();
    let me = enroll(
        &mut client,
        EnrollmentRequest {
            study_id: STUDY,
            enrollment_code: &code,
            participant: label,
            signals: vec!["resting_hr_bpm".into(), "hrv_rmssd_ms".into()],
            sharing: FlagSharing::Withheld,
            device_secret: &secret,
            sensor_model: "",
            group_label: "",
        },
    )
    .await
    .unwrap();
    let mut rounds = 0;
    loop {
        let request = pb::FetchTaskRequest {
            study_id: STUDY.into(),
            device_id: me.device_id,
            wait_ms: 2_000,
        };
        let work = client
            .fetch_task(authorized(&me, request))
            .await
            .unwrap()
            .into_inner()
            .work;
        match work {
            Some(pb::fetch_task_response::Work::Task(task)) => {
                let updates = task
                    .shared
                    .iter()
                    .map(|p| pb::SignalUpdate {
                        signal: p.signal.clone(),
                        values: p.values.clone(),
                        n_days: days,
                        local_loss: 1.2,
                    })
                    .collect();
                let request = pb::SubmitUpdateRequest {
                    study_id: STUDY.into(),
                    device_id: me.device_id,
                    round_id: task.round_id,
                    updates,
                };
                client
                    .submit_update(authorized(&me, request))
                    .await
                    .unwrap();
                rounds += 1;
            }
            Some(pb::fetch_task_response::Work::Wait(_)) => {}
            Some(pb::fetch_task_response::Work::Done(_)) => return rounds,
            None => panic!("FetchTask answered without work"),
        }
    }
}

/// Generates the Python stubs from the project's proto into `out`.
fn generate_stubs(python: &Path, out: &Path) {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let status = std::process::Command::new(python)
        .current_dir(&root)
        .args(["-m", "grpc_tools.protoc", "-I", "proto"])
        .arg(format!("--python_out={}", out.display()))
        .arg(format!("--grpc_python_out={}", out.display()))
        .arg("proto/plimsoll/v1/aggregator.proto")
        .status()
        .unwrap();
    assert!(
        status.success(),
        "grpc_tools.protoc failed on proto/plimsoll/v1/aggregator.proto"
    );
}

#[tokio::test]
async fn a_python_device_takes_part_in_every_round_beside_rust_devices_over_tls() {
    let python = python_tools();
    let dir = tempfile::tempdir().unwrap();
    let stubs = dir.path().join("stubs");
    std::fs::create_dir_all(&stubs).unwrap();
    generate_stubs(&python, &stubs);

    let files = write_dev_certificate(
        &dir.path().join("certs"),
        &["localhost".into(), "127.0.0.1".into()],
        7,
    )
    .unwrap();
    let identity = TlsIdentity::load(&files.cert, &files.key).unwrap();
    let coordinator = Arc::new(
        Coordinator::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap(),
    );
    // Three devices, all needed for a round; two rounds.
    let code = coordinator
        .create_study(
            study_config(STUDY, &[Signal::RestingHr, Signal::HrvRmssd], 3, 2),
            now_ms(),
        )
        .unwrap();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let server = serve_with(coordinator.clone(), listener, Some(&identity))
        .await
        .unwrap();
    let port = server.addr.port();

    let script =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../device-sim/python/plimsoll_device.py");
    // The Python device runs in its own process beside the Rust devices (it
    // gives up by itself after its --timeout-s, should this test fail first).
    let py = std::process::Command::new(&python)
        .arg(&script)
        .args(["--target", &format!("localhost:{port}")])
        .arg("--ca")
        .arg(&files.ca)
        .args(["--study", STUDY, "--participant", "py-1", "--days", "40"])
        .arg("--stubs")
        .arg(&stubs)
        .env("PLIMSOLL_ENROLLMENT_CODE", &code)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let address = || AggregatorAddress {
        url: format!("https://localhost:{port}"),
        ca_pem: Some(std::fs::read(&files.ca).unwrap()),
        insecure_plaintext: false,
    };
    // Without the Python device no round can close (all three are needed):
    // bounded, so a failing Python device fails the test instead of hanging it.
    let rust = tokio::time::timeout(std::time::Duration::from_secs(120), async {
        tokio::join!(
            rust_device(address(), code.clone(), "rs-1", 20),
            rust_device(address(), code.clone(), "rs-2", 30),
        )
    })
    .await;
    let mut py = py;
    if rust.is_err() {
        let _ = py.kill();
    }
    let out = tokio::task::spawn_blocking(move || py.wait_with_output())
        .await
        .unwrap()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    let (a, b) =
        rust.unwrap_or_else(|_| panic!("the rounds did not finish; Python device: {stderr}"));
    assert!(out.status.success(), "Python device failed: {stderr}");
    let report: serde_json::Value = serde_json::from_slice(&out.stdout)
        .unwrap_or_else(|e| panic!("{e}: {}", String::from_utf8_lossy(&out.stdout)));

    assert_eq!((a, b), (2, 2), "each Rust device took part in both rounds");
    assert_eq!(
        report["rounds"], 2,
        "the Python device took part in both rounds: {report}"
    );
    let status = coordinator.status(STUDY).unwrap();
    assert_eq!(status.devices_enrolled, 3);
    assert_eq!(report["prior_version"], status.prior_version, "{report}");
    assert_eq!(
        report["signals"],
        serde_json::json!(["resting_hr_bpm", "hrv_rmssd_ms"]),
        "{report}"
    );
    // Every published round counted all three devices and their days (40 + 20 + 30).
    let history = coordinator.prior_history(STUDY).unwrap();
    let rounds: Vec<_> = history.iter().filter(|p| p.round_id > 0).collect();
    assert_eq!(rounds.len(), 2);
    for prior in rounds {
        for c in &prior.contributions {
            assert_eq!((c.n_devices, c.n_days), (3, 90), "{c:?}");
        }
    }
    server.shutdown().await.unwrap();
}
