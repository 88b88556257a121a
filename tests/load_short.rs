//! A short version of the aggregator load test (the full one is
//! `server/examples/load.rs`): 1,000 devices enrol, fetch and submit one
//! update each concurrently over real gRPC on loopback. Checks correctness
//! under concurrency only — every update accepted exactly once and the
//! round's average exact — never timing.

use plimsoll_device::client::{authorized, new_device_secret};
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;

use crate::support::{TestServer, study_config};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_thousand_concurrent_devices_complete_one_round() {
    const N: usize = 1_000;
    let dir = tempfile::tempdir().unwrap();
    let server = TestServer::start(
        &dir.path().join("agg.db"),
        vec![study_config("load", &[Signal::RestingHr], N as u32, 1)],
    )
    .await;
    // Four HTTP/2 connections shared by all devices (as behind a gateway);
    // a thousand separate connections would test the OS's listen backlog.
    let channels: Vec<_> = (0..4).map(|_| server.channel()).collect();
    let code = server.code("load").to_owned();
    let mut tasks = tokio::task::JoinSet::new();
    for i in 0..N {
        let code = code.clone();
        let mut c =
            plimsoll_proto::v1::aggregator_client::AggregatorClient::new(channels[i % 4].clone());
        tasks.spawn(async move {
            let secret = new_device_secret();
            let id = c
                .enroll(pb::EnrollRequest {
                    study_id: "load".into(),
                    participant_label: format!("dev-{i:04}"),
                    signals: vec!["resting_hr_bpm".into()],
                    enrollment_code: code,
                    device_secret: secret.clone(),
                    ..Default::default()
                })
                .await
                .unwrap()
                .into_inner()
                .device_id;
            let me = DeviceCredential {
                device_id: id,
                secret,
            };
            let request = pb::FetchTaskRequest {
                study_id: "load".into(),
                device_id: id,
                wait_ms: 10_000,
            };
            let task = match c
                .fetch_task(authorized(&me, request))
                .await
                .unwrap()
                .into_inner()
                .work
            {
                Some(pb::fetch_task_response::Work::Task(t)) => t,
                other => panic!("device {i}: expected a task, got {other:?}"),
            };
            // Values 0..9 cycling; each device weighs 10 days.
            let request = pb::SubmitUpdateRequest {
                study_id: "load".into(),
                device_id: id,
                round_id: task.round_id,
                updates: vec![pb::SignalUpdate {
                    signal: "resting_hr_bpm".into(),
                    values: vec![(i % 10) as f64; 7],
                    n_days: 10,
                    local_loss: 1.0,
                }],
            };
            c.submit_update(authorized(&me, request))
                .await
                .unwrap()
                .into_inner()
        });
    }
    let mut closed = 0;
    while let Some(r) = tasks.join_next().await {
        closed += usize::from(r.unwrap().round_closed);
    }
    assert_eq!(closed, 1, "exactly one submission closes the round");
    let prior = server.coordinator.prior("load", None).unwrap();
    assert_eq!(prior.version, 1);
    assert_eq!(prior.contributions[0].n_devices as usize, N);
    // Mean of 0..9 repeated 100 times, equal weights: 4.5.
    assert!((prior.params[0].values[0] - 4.5).abs() < 1e-12);
    server.stop().await;
}
