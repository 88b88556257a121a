//! The aggregator's /metrics listener checked against an outside parser:
//! the text must parse with the Python `prometheus_client` package's strict
//! OpenMetrics parser (`prometheus_client.openmetrics.parser`, version
//! pinned in `scripts/install-python-tools.sh`), and the parsed figures must
//! match what the test did over real gRPC on loopback.

use std::path::PathBuf;
use std::process::Command;

use plimsoll_device::client::{FlagSharing, authorized};
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1 as pb;
use plimsoll_server::metrics::{CONTENT_TYPE, serve_metrics};
use plimsoll_server::store::Store;
use serde_json::Value;

use crate::review_support::http;
use crate::support::{TestServer, study_config};

const STUDY: &str = "metrics-study";

const INSTALL_HINT: &str = "the Python reference tools are missing: run scripts/install-python-tools.sh (scripts/test does)";

/// The test environment's Python, made by `scripts/install-python-tools.sh`.
pub fn python_tools() -> PathBuf {
    let python = std::env::var_os("PLIMSOLL_PYTHON_TOOLS")
        .map(PathBuf::from)
        .unwrap_or_else(|| {
            PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../target/python-tools/bin/python")
        });
    assert!(
        python.is_file(),
        "{INSTALL_HINT} (looked for {})",
        python.display()
    );
    python
}

/// Parses OpenMetrics text with the reference parser; one JSON object per sample.
fn parse_with_reference(python: &PathBuf, text: &str) -> Vec<Value> {
    const SCRIPT: &str = r#"
import json, sys
from prometheus_client.openmetrics.parser import text_string_to_metric_families
samples = []
for family in text_string_to_metric_families(sys.stdin.read()):
    for s in family.samples:
        samples.append({"family": family.name, "type": family.type, "name": s.name,
                        "labels": s.labels, "value": s.value})
print(json.dumps(samples))
"#;
    let mut child = Command::new(python)
        .args(["-c", SCRIPT])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("starting {}: {e}; {INSTALL_HINT}", python.display()));
    use std::io::Write;
    child
        .stdin
        .take()
        .unwrap()
        .write_all(text.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "the reference parser refused the text: {}\n{text}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice::<Vec<Value>>(&out.stdout).unwrap()
}

/// The value of the sample `name` whose labels include all of `labels`.
fn sample(samples: &[Value], name: &str, labels: &[(&str, &str)]) -> f64 {
    let found: Vec<f64> = samples
        .iter()
        .filter(|s| s["name"] == name)
        .filter(|s| labels.iter().all(|(k, v)| s["labels"][*k] == *v))
        .map(|s| s["value"].as_f64().unwrap())
        .collect();
    assert_eq!(found.len(), 1, "{name} {labels:?}: {found:?}");
    found[0]
}

#[tokio::test]
async fn metrics_parse_with_the_reference_parser_and_count_what_happened() {
    let python = python_tools();
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    // Two devices, two rounds planned, both needed for a round to close.
    let server =
        TestServer::start(&db, vec![study_config(STUDY, &[Signal::RestingHr], 2, 2)]).await;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let metrics = serve_metrics(
        listener,
        server.server.metrics.clone(),
        &crate::support::db_location(&db),
    )
    .await
    .unwrap();
    let signals = ["resting_hr_bpm"];
    let a = server
        .enroll(STUDY, "p-a", &signals, FlagSharing::Withheld)
        .await;
    let b = server
        .enroll(STUDY, "p-b", &signals, FlagSharing::Withheld)
        .await;
    let mut client = server.client();
    let mut tasks = Vec::new();
    for device in [&a, &b] {
        let request = pb::FetchTaskRequest {
            study_id: STUDY.into(),
            device_id: device.device_id,
            wait_ms: 2_000,
        };
        match client
            .fetch_task(authorized(device, request))
            .await
            .unwrap()
            .into_inner()
            .work
        {
            Some(pb::fetch_task_response::Work::Task(t)) => tasks.push(t),
            other => panic!("expected a task, got {other:?}"),
        }
    }
    let submit =
        |device: &plimsoll_proto::auth::DeviceCredential, task: &pb::Task, poison: bool| {
            let mut values = task.shared[0].values.clone();
            if poison {
                values[0] = f64::NAN;
            }
            authorized(
                device,
                pb::SubmitUpdateRequest {
                    study_id: STUDY.into(),
                    device_id: device.device_id,
                    round_id: task.round_id,
                    updates: vec![pb::SignalUpdate {
                        signal: "resting_hr_bpm".into(),
                        values,
                        n_days: 30,
                        local_loss: 1.0,
                    }],
                },
            )
        };
    // One refused submission (a NaN parameter), then one accepted from each device.
    let refused = client.submit_update(submit(&a, &tasks[0], true)).await;
    assert_eq!(refused.unwrap_err().code(), tonic::Code::InvalidArgument);
    client
        .submit_update(submit(&a, &tasks[0], false))
        .await
        .unwrap();
    let last = client
        .submit_update(submit(&b, &tasks[1], false))
        .await
        .unwrap()
        .into_inner();
    assert!(
        last.round_closed,
        "both devices submitted: the round closed"
    );
    // Revoked through the database, as the operator's command line does.
    {
        let mut store = Store::open(&crate::support::db_location(&db)).unwrap();
        store
            .revoke_device(b.device_id, plimsoll_server::service::now_ms())
            .unwrap();
    }

    let response = http(metrics.addr, "GET", "/metrics", None, None).await;
    assert_eq!(response.status, 200, "{}", response.body);
    let content_type = response
        .headers
        .iter()
        .find(|(k, _)| k.eq_ignore_ascii_case("content-type"))
        .map(|(_, v)| v.as_str());
    assert_eq!(content_type, Some(CONTENT_TYPE));
    let samples = parse_with_reference(&python, &response.body);

    let aggregator = ("service", "plimsoll.v1.Aggregator");
    let rpc = |method: &str, code: &str| {
        sample(
            &samples,
            "plimsoll_rpc_requests_total",
            &[aggregator, ("method", method), ("code", code)],
        )
    };
    assert_eq!(rpc("SubmitUpdate", "INVALID_ARGUMENT"), 1.0);
    assert_eq!(rpc("SubmitUpdate", "OK"), 2.0);
    assert_eq!(rpc("Enroll", "OK"), 2.0);
    assert_eq!(rpc("FetchTask", "OK"), 2.0);
    assert_eq!(
        sample(
            &samples,
            "plimsoll_rpc_duration_seconds_count",
            &[aggregator, ("method", "SubmitUpdate")],
        ),
        3.0,
        "every call has a latency"
    );
    let study = [("study", STUDY)];
    assert_eq!(
        sample(&samples, "plimsoll_rounds_closed_total", &study),
        1.0
    );
    // Every round opened is closed or still open here (none was abandoned).
    let store = Store::open(&crate::support::db_location(&db)).unwrap();
    let opened_in_db = store.rounds_completed(STUDY).unwrap()
        + u32::from(store.open_round(STUDY).unwrap().is_some());
    drop(store);
    assert_eq!(
        sample(&samples, "plimsoll_rounds_opened_total", &study),
        opened_in_db as f64
    );
    assert_eq!(sample(&samples, "plimsoll_devices_enrolled", &study), 2.0);
    assert_eq!(sample(&samples, "plimsoll_devices_revoked", &study), 1.0);
    assert_eq!(
        sample(&samples, "plimsoll_review_backlog_episodes", &study),
        0.0
    );
    assert!(
        !response.body.contains("p-a") && !response.body.contains("p-b"),
        "no participant label in the metrics"
    );

    metrics.shutdown().await.unwrap();
    server.stop().await;
}
