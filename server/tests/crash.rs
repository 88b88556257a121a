//! Crash safety: the aggregator process is killed at several points of a
//! round — before aggregation (SIGKILL with submissions pending), during the
//! aggregation write (an injected abort inside the closing transaction), and
//! after it (SIGKILL right after the round closed) — and restarted on the same
//! database. Each time the database passes its integrity check, no completed
//! round is lost, the open round completes and devices carry on. The same
//! scenario runs on SQLite and on PostgreSQL (the test cluster `scripts/test`
//! starts).
//!
//! This lives in the server package (not `tests/`) because it runs the real
//! `plimsoll-aggregator` binary as a child process.

use std::path::Path;
use std::process::{Child, Command, Stdio};

mod common;

use common::{BIN, create_study, listening_line};
use plimsoll_proto::auth::{DeviceCredential, authorized};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use tonic::transport::Channel;

const STUDY: &str = "crash-study";

struct Aggregator {
    child: Child,
    client: AggregatorClient<Channel>,
}

/// Starts `plimsoll-aggregator serve` on an ephemeral loopback port and
/// connects to the address it prints.
async fn start(db: &Path, fault: Option<&str>) -> Aggregator {
    let mut cmd = Command::new(BIN);
    cmd.args([
        "--db",
        db.to_str().unwrap(),
        "serve",
        "--listen",
        "127.0.0.1:0",
    ])
    .stdout(Stdio::piped())
    .stderr(Stdio::null());
    if let Some(f) = fault {
        cmd.env("PLIMSOLL_FAULT_INJECT", f);
    }
    let mut child = cmd.spawn().expect("start the aggregator binary");
    let (_, addr) = listening_line(&mut child);
    let channel = tonic::transport::Endpoint::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap();
    Aggregator {
        child,
        client: AggregatorClient::new(channel),
    }
}

impl Aggregator {
    fn sigkill(mut self) {
        // `Child::kill` sends SIGKILL on Unix: no shutdown code runs.
        self.child.kill().unwrap();
        self.child.wait().unwrap();
    }
}

/// SQLite's `PRAGMA integrity_check`, or on PostgreSQL the invariants a crash must not
/// break (`Store::integrity_check`).
fn integrity_ok(db: &Path) {
    let store = plimsoll_server::store::Store::open(db).unwrap();
    assert_eq!(store.integrity_check().unwrap(), ["ok"]);
}

async fn enroll(c: &mut AggregatorClient<Channel>, code: &str, label: &str) -> DeviceCredential {
    // A fixed secret per label: this test is about crashes, not secrecy.
    let secret = format!(
        "{:0>64}",
        label
            .bytes()
            .map(|b| format!("{b:02x}"))
            .collect::<String>()
    );
    let device_id = c
        .enroll(pb::EnrollRequest {
            study_id: STUDY.into(),
            participant_label: label.into(),
            signals: vec!["resting_hr_bpm".into()],
            enrollment_code: code.into(),
            device_secret: secret.clone(),
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner()
        .device_id;
    DeviceCredential { device_id, secret }
}

async fn task_round(c: &mut AggregatorClient<Channel>, device: &DeviceCredential) -> u64 {
    let request = pb::FetchTaskRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        wait_ms: 5_000,
    };
    let work = c
        .fetch_task(authorized(device, request))
        .await
        .unwrap()
        .into_inner()
        .work;
    match work {
        Some(pb::fetch_task_response::Work::Task(t)) => t.round_id,
        other => panic!("expected a task, got {other:?}"),
    }
}

fn submission(
    device: &DeviceCredential,
    round_id: u64,
    value: f64,
) -> tonic::Request<pb::SubmitUpdateRequest> {
    let request = pb::SubmitUpdateRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        round_id,
        updates: vec![pb::SignalUpdate {
            signal: "resting_hr_bpm".into(),
            values: vec![value; 3],
            n_days: 10,
            local_loss: 1.0,
        }],
    };
    authorized(device, request)
}

async fn study(c: &mut AggregatorClient<Channel>) -> pb::Study {
    c.get_study(pb::GetStudyRequest {
        study_id: STUDY.into(),
    })
    .await
    .unwrap()
    .into_inner()
}

async fn latest(
    c: &mut AggregatorClient<Channel>,
    device: &DeviceCredential,
) -> pb::PublishedPrior {
    let request = pb::GetPriorRequest {
        study_id: STUDY.into(),
        version: 0,
    };
    c.get_prior(authorized(device, request))
        .await
        .unwrap()
        .into_inner()
}

#[tokio::test]
async fn killed_aggregator_resumes_without_losing_rounds() {
    let dir = tempfile::tempdir().unwrap();
    killed_and_resumed(&dir.path().join("agg.db"), dir.path()).await;
}

#[tokio::test]
async fn killed_aggregator_resumes_without_losing_rounds_on_postgres() {
    let Some(url) = plimsoll_server::db::test_database("crash") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    killed_and_resumed(Path::new(&url), dir.path()).await;
}

async fn killed_and_resumed(db: &Path, dir: &Path) {
    let db = db.to_path_buf();
    let code = create_study(&db, dir, STUDY, 3, 2);

    // 1. Killed before aggregation: one of two submissions is in.
    let mut agg = start(&db, None).await;
    let a = enroll(&mut agg.client, &code, "dev-a").await;
    let b = enroll(&mut agg.client, &code, "dev-b").await;
    let r1 = task_round(&mut agg.client, &a).await;
    agg.client
        .submit_update(submission(&a, r1, 1.0))
        .await
        .unwrap();
    agg.sigkill();
    integrity_ok(&db);
    let mut agg = start(&db, None).await;
    let s = study(&mut agg.client).await;
    assert_eq!(
        (s.rounds_completed, s.current_round, s.devices_enrolled),
        (0, r1, 2)
    );
    // The device retries its submission (idempotent), the other one submits.
    agg.client
        .submit_update(submission(&a, r1, 1.0))
        .await
        .unwrap();
    assert_eq!(task_round(&mut agg.client, &b).await, r1);
    let closed = agg
        .client
        .submit_update(submission(&b, r1, 3.0))
        .await
        .unwrap()
        .into_inner();
    assert!(closed.round_closed);
    assert_eq!(
        latest(&mut agg.client, &a).await.params[0].values,
        vec![2.0; 3]
    );

    // 2. Killed right after the aggregation write of round 2.
    let r2 = task_round(&mut agg.client, &a).await;
    agg.client
        .submit_update(submission(&a, r2, 4.0))
        .await
        .unwrap();
    agg.client
        .submit_update(submission(&b, r2, 6.0))
        .await
        .unwrap();
    agg.sigkill();
    integrity_ok(&db);

    // 3. Killed during the aggregation write of round 3 (abort inside the
    //    closing transaction, before it commits).
    let mut agg = start(&db, Some("close-round-before-commit")).await;
    let s = study(&mut agg.client).await;
    assert_eq!(s.rounds_completed, 2, "round 2 survived the kill");
    assert_eq!(
        latest(&mut agg.client, &a).await.params[0].values,
        vec![5.0; 3]
    );
    let r3 = task_round(&mut agg.client, &a).await;
    agg.client
        .submit_update(submission(&a, r3, 7.0))
        .await
        .unwrap();
    // This submission completes the round; the server dies while closing it.
    let died = agg.client.submit_update(submission(&b, r3, 9.0)).await;
    assert!(
        died.is_err(),
        "the injected fault must kill the server mid-write"
    );
    let _ = agg.child.wait();
    integrity_ok(&db);

    let mut agg = start(&db, None).await;
    // The round was not half-applied: both submissions were kept, and the
    // restarted server completes the round while loading its state.
    let prior = latest(&mut agg.client, &a).await;
    assert_eq!(prior.version, 3);
    assert_eq!(prior.params[0].values, vec![8.0; 3]);
    let request = pb::FetchTaskRequest {
        study_id: STUDY.into(),
        device_id: a.device_id,
        wait_ms: 0,
    };
    let done = agg
        .client
        .fetch_task(authorized(&a, request))
        .await
        .unwrap()
        .into_inner()
        .work;
    assert!(
        matches!(done, Some(pb::fetch_task_response::Work::Done(_))),
        "{done:?}"
    );
    agg.sigkill();
    integrity_ok(&db);
}
