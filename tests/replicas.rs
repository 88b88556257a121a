//! Two aggregator processes' worth of coordinators, each behind its own gRPC server on
//! loopback, on one PostgreSQL database: devices reach either, each round closes exactly
//! once with every accepted submission, and a replica that stops mid-round leaves the round
//! to the other (its deadline included). Skipped, loudly, without a PostgreSQL test cluster
//! (`scripts/test` starts one and requires it).

use std::path::Path;

use plimsoll_device::client::{FlagSharing, authorized};
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use tonic::transport::Channel;

use crate::support::{TestServer, fresh_postgres_database, study_config};

const STUDY: &str = "replica-study";

/// Replica A creates the study; replica B opens the same database and knows its code.
async fn two_replicas(url: &str, config: plimsoll_server::StudyConfig) -> [TestServer; 2] {
    let a = TestServer::start(Path::new(url), vec![config]).await;
    let mut b = TestServer::start(Path::new(url), vec![]).await;
    b.codes = a.codes.clone();
    [a, b]
}

async fn task(client: &mut AggregatorClient<Channel>, device: &DeviceCredential) -> pb::Task {
    let request = pb::FetchTaskRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        wait_ms: 5_000,
    };
    let r = client
        .fetch_task(authorized(device, request))
        .await
        .unwrap()
        .into_inner();
    match r.work {
        Some(pb::fetch_task_response::Work::Task(t)) => t,
        other => panic!("expected a task, got {other:?}"),
    }
}

async fn submit(
    client: &mut AggregatorClient<Channel>,
    device: &DeviceCredential,
    round_id: u64,
    value: f64,
    n_days: u32,
) -> pb::SubmitUpdateResponse {
    let request = pb::SubmitUpdateRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        round_id,
        updates: vec![pb::SignalUpdate {
            signal: "resting_hr_bpm".into(),
            values: vec![value; 7],
            n_days,
            local_loss: 1.0,
        }],
    };
    client
        .submit_update(authorized(device, request))
        .await
        .unwrap_or_else(|e| panic!("device {} round {round_id}: {e}", device.device_id))
        .into_inner()
}

async fn prior(
    client: &mut AggregatorClient<Channel>,
    device: &DeviceCredential,
    version: u32,
) -> pb::PublishedPrior {
    let request = pb::GetPriorRequest {
        study_id: STUDY.into(),
        version,
    };
    client
        .get_prior(authorized(device, request))
        .await
        .unwrap()
        .into_inner()
}

/// Eight devices enrol alternately through A and B; every round each device fetches its
/// task from one replica and submits through the other, all at once, so the last
/// submissions race to close the round on both. Each of the five rounds closes exactly once
/// (one `round_closed` answer, one prior per round) with the day-weighted average of all
/// eight updates, worked by hand (FedAvg: McMahan et al. 2017, Algorithm 1).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_replicas_serve_one_study_and_each_round_closes_once() {
    let Some(url) = fresh_postgres_database("replicas_share") else {
        return;
    };
    let n = 8u32;
    let rounds = 5u32;
    let servers = two_replicas(&url, study_config(STUDY, &[Signal::RestingHr], n, rounds)).await;
    let mut devices = Vec::new();
    for i in 0..n {
        let server = &servers[i as usize % 2];
        devices.push(
            server
                .enroll(
                    STUDY,
                    &format!("p-{i}"),
                    &["resting_hr_bpm"],
                    FlagSharing::Withheld,
                )
                .await,
        );
    }
    let clients = [servers[0].client(), servers[1].client()];
    for r in 1..=rounds {
        let calls = devices.iter().enumerate().map(|(i, d)| {
            let mut fetch = clients[(i + r as usize) % 2].clone();
            let mut send = clients[(i + r as usize + 1) % 2].clone();
            let d = d.clone();
            async move {
                let t = task(&mut fetch, &d).await;
                assert_eq!(
                    t.round_id,
                    u64::from(r),
                    "device {i} fetched round {}",
                    t.round_id
                );
                submit(
                    &mut send,
                    &d,
                    t.round_id,
                    f64::from(i as u32 + r),
                    i as u32 + 1,
                )
                .await
            }
        });
        let answers = futures_join_all(calls).await;
        let closers = answers.iter().filter(|a| a.round_closed).count();
        assert_eq!(
            closers, 1,
            "round {r}: exactly one submission closes the round"
        );
        // FedAvg by hand: Σ (i + r)(i + 1) / Σ (i + 1) over i = 0..n.
        let (num, den) = (0..n).fold((0.0, 0.0), |(num, den), i| {
            (
                num + f64::from(i + r) * f64::from(i + 1),
                den + f64::from(i + 1),
            )
        });
        for (k, client) in clients.iter().enumerate() {
            let p = prior(&mut client.clone(), &devices[k], r).await;
            assert_eq!(p.version, r);
            assert!(
                (p.params[0].values[0] - num / den).abs() < 1e-12,
                "round {r} through replica {k}: {} against {}",
                p.params[0].values[0],
                num / den
            );
            assert_eq!(p.contributions[0].n_devices, n, "every update counted once");
        }
    }
    let store = plimsoll_server::store::Store::open(Path::new(&url)).unwrap();
    assert_eq!(store.priors(STUDY).unwrap().len(), rounds as usize + 1);
    assert_eq!(store.rounds_completed(STUDY).unwrap(), rounds);
    assert_eq!(store.integrity_check().unwrap(), ["ok"]);
    for s in servers {
        s.stop().await;
    }
}

/// Replica A opens round 1, takes two of its four devices' submissions and stops (as a
/// process that dies would: it answers nothing more). A third device submits through B; the
/// fourth never does. B's own deadline check closes the round A opened, with quorum, and the
/// prior holds all three updates: nothing A accepted is lost.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_stopped_replica_leaves_its_round_and_deadline_to_the_other() {
    let Some(url) = fresh_postgres_database("replicas_failover") else {
        return;
    };
    let mut config = study_config(STUDY, &[Signal::RestingHr], 4, 2);
    config.min_quorum = 2;
    config.round_deadline_ms = 3_000;
    let [a, b] = two_replicas(&url, config).await;
    let mut devices = Vec::new();
    for i in 0..4 {
        devices.push(
            a.enroll(
                STUDY,
                &format!("p-{i}"),
                &["resting_hr_bpm"],
                FlagSharing::Withheld,
            )
            .await,
        );
    }
    let (mut ca, mut cb) = (a.client(), b.client());
    let t = task(&mut ca, &devices[0]).await;
    assert_eq!(t.round_id, 1);
    for (i, d) in devices.iter().enumerate().take(2) {
        let r = submit(&mut ca, d, 1, (i + 1) as f64, 10).await;
        assert!(!r.round_closed);
    }
    a.stop().await;
    let r = submit(&mut cb, &devices[2], 1, 3.0, 10).await;
    assert!(
        !r.round_closed,
        "three of four: only the deadline closes it"
    );
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    loop {
        let status = b.coordinator.status(STUDY).unwrap();
        if status.rounds_completed == 1 {
            break;
        }
        assert!(
            std::time::Instant::now() < deadline,
            "round 1 never closed: {status:?}"
        );
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    let p = prior(&mut cb, &devices[0], 1).await;
    // (1 + 2 + 3)·10 / 30 = 2: A's two submissions are in the prior.
    assert!(
        (p.params[0].values[0] - 2.0).abs() < 1e-12,
        "{:?}",
        p.params[0].values
    );
    assert_eq!(p.contributions[0].n_devices, 3);
    let t2 = task(&mut cb, &devices[3]).await;
    assert_eq!(t2.round_id, 2, "B opened the next round");
    b.stop().await;
}

/// `join_all` without another dependency: runs the futures concurrently on the runtime.
/// A device that submitted through B and asks A for work at once, before A has read the
/// submission by any sync, is told to wait, not handed the same round's task again (a
/// second task would have it train again and send a second update).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_submission_through_one_replica_counts_at_the_other_at_once() {
    let Some(url) = fresh_postgres_database("replicas_seen") else {
        return;
    };
    let servers = two_replicas(&url, study_config(STUDY, &[Signal::RestingHr], 2, 1)).await;
    let mut devices = Vec::new();
    for (i, server) in servers.iter().enumerate() {
        devices.push(
            server
                .enroll(
                    STUDY,
                    &format!("p-{i}"),
                    &["resting_hr_bpm"],
                    FlagSharing::Withheld,
                )
                .await,
        );
    }
    let [mut a, mut b] = [servers[0].client(), servers[1].client()];
    let t = task(&mut a, &devices[0]).await;
    submit(&mut b, &devices[0], t.round_id, 1.0, 30).await;
    let request = pb::FetchTaskRequest {
        study_id: STUDY.into(),
        device_id: devices[0].device_id,
        wait_ms: 0,
    };
    let work = a
        .fetch_task(authorized(&devices[0], request))
        .await
        .unwrap()
        .into_inner()
        .work;
    match work {
        Some(pb::fetch_task_response::Work::Wait(w)) => assert!(
            w.reason.contains("received"),
            "unexpected reason: {}",
            w.reason
        ),
        other => panic!("expected to wait, got {other:?}"),
    }
}

async fn futures_join_all<F>(futures: impl Iterator<Item = F>) -> Vec<F::Output>
where
    F: std::future::Future + Send + 'static,
    F::Output: Send + 'static,
{
    let handles: Vec<_> = futures.map(tokio::spawn).collect();
    let mut out = Vec::with_capacity(handles.len());
    for h in handles {
        out.push(h.await.expect("task"));
    }
    out
}
