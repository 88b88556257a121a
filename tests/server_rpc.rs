//! The aggregator over real gRPC on loopback: health, reflection, the round
//! protocol, restart from the database, and one test per bad-input case
//! (each checks the status code, that the message names the field, and that
//! the shared prior is untouched).

use plimsoll_device::client::{FlagSharing, authorized};
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::{self, DeviceCredential};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use tonic::Code;
use tonic::transport::Channel;

use crate::support::{TestServer, study_config};

const STUDY: &str = "rpc-study";

async fn enroll(server: &TestServer, label: &str) -> DeviceCredential {
    server
        .enroll(STUDY, label, &["resting_hr_bpm"], FlagSharing::Withheld)
        .await
}

async fn task(client: &mut AggregatorClient<Channel>, device: &DeviceCredential) -> pb::Task {
    let request = pb::FetchTaskRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        wait_ms: 2_000,
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

fn update(values: Vec<f64>, n_days: u32) -> pb::SignalUpdate {
    pb::SignalUpdate {
        signal: "resting_hr_bpm".into(),
        values,
        n_days,
        local_loss: 1.0,
    }
}

/// A submission for `device`, carrying its credential.
fn submission(
    device: &DeviceCredential,
    round_id: u64,
    updates: Vec<pb::SignalUpdate>,
) -> tonic::Request<pb::SubmitUpdateRequest> {
    authorized(
        device,
        pb::SubmitUpdateRequest {
            study_id: STUDY.into(),
            device_id: device.device_id,
            round_id,
            updates,
        },
    )
}

/// Two enrolled devices with round 1 open; returns (server, client, ids, task).
async fn two_devices(
    dir: &std::path::Path,
) -> (
    TestServer,
    AggregatorClient<Channel>,
    [DeviceCredential; 2],
    pb::Task,
) {
    let server = TestServer::start(
        &dir.join("agg.db"),
        vec![study_config(STUDY, &[Signal::RestingHr], 2, 3)],
    )
    .await;
    let mut client = server.client();
    let a = enroll(&server, "p-a").await;
    let b = enroll(&server, "p-b").await;
    let t = task(&mut client, &a).await;
    (server, client, [a, b], t)
}

async fn latest_prior(
    client: &mut AggregatorClient<Channel>,
    device: &DeviceCredential,
) -> pb::PublishedPrior {
    let request = pb::GetPriorRequest {
        study_id: STUDY.into(),
        version: 0,
    };
    client
        .get_prior(authorized(device, request))
        .await
        .unwrap()
        .into_inner()
}

/// Sends `req`, expects `code` with `field` named in the message, and checks
/// the prior did not change.
async fn expect_refused(
    client: &mut AggregatorClient<Channel>,
    req: tonic::Request<pb::SubmitUpdateRequest>,
    code: Code,
    field: &str,
) {
    // The prior is read with the credential the request carries.
    let device = req.metadata().get(auth::METADATA_KEY).unwrap();
    let device = DeviceCredential::parse(device.to_str().unwrap()).unwrap();
    let before = latest_prior(client, &device).await;
    let err = client
        .submit_update(req)
        .await
        .expect_err("must be refused");
    assert_eq!(err.code(), code, "message: {}", err.message());
    assert!(
        err.message().contains(field),
        "message `{}` should name `{field}`",
        err.message()
    );
    assert_eq!(
        latest_prior(client, &device).await,
        before,
        "the shared prior must be untouched"
    );
}

#[tokio::test]
async fn health_and_reflection_are_served() {
    let dir = tempfile::tempdir().unwrap();
    let server = TestServer::start(
        &dir.path().join("agg.db"),
        vec![study_config(STUDY, &[Signal::RestingHr], 1, 1)],
    )
    .await;
    let mut health = tonic_health::pb::health_client::HealthClient::new(server.channel());
    let resp = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: "plimsoll.v1.Aggregator".into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        resp.status,
        tonic_health::pb::health_check_response::ServingStatus::Serving as i32
    );
    server.stop().await;
}

#[tokio::test]
async fn a_round_closes_with_the_day_weighted_average() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, b], t) = two_devices(dir.path()).await;
    let mut va = vec![0.0; 7];
    let mut vb = vec![0.0; 7];
    va[0] = 1.0;
    vb[0] = 4.0;
    client
        .submit_update(submission(&a, t.round_id, vec![update(va, 10)]))
        .await
        .unwrap();
    let r = client
        .submit_update(submission(&b, t.round_id, vec![update(vb, 30)]))
        .await
        .unwrap()
        .into_inner();
    assert!(r.round_closed);
    let prior = latest_prior(&mut client, &a).await;
    assert_eq!(prior.version, 1);
    // FedAvg by hand: (1·10 + 4·30) / 40 = 3.25.
    assert!((prior.params[0].values[0] - 3.25).abs() < 1e-12);
    assert_eq!(prior.contributions[0].n_days, 40);
    let study = client
        .get_study(pb::GetStudyRequest {
            study_id: STUDY.into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(study.rounds_completed, 1);
    assert_eq!(study.current_round, 2);
    server.stop().await;
}

#[tokio::test]
async fn restart_resumes_from_the_database() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, b], t) = two_devices(dir.path()).await;
    client
        .submit_update(submission(&a, t.round_id, vec![update(vec![1.0; 7], 5)]))
        .await
        .unwrap();
    client
        .submit_update(submission(&b, t.round_id, vec![update(vec![3.0; 7], 5)]))
        .await
        .unwrap();
    // Round 2 is open; device a submits, then the server stops.
    let t2 = task(&mut client, &a).await;
    assert_eq!(t2.round_id, 2);
    client
        .submit_update(submission(&a, 2, vec![update(vec![0.0; 7], 5)]))
        .await
        .unwrap();
    server.stop().await;

    let server = TestServer::start(&dir.path().join("agg.db"), vec![]).await;
    let mut client = server.client();
    let prior = latest_prior(&mut client, &a).await;
    assert_eq!(prior.version, 1, "the completed round survives the restart");
    assert_eq!(prior.params[0].values, vec![2.0; 7]);
    // The open round resumes: a's submission is remembered, b still has its task.
    let err = client
        .submit_update(submission(&a, 2, vec![update(vec![9.0; 7], 5)]))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::AlreadyExists);
    let tb = task(&mut client, &b).await;
    assert_eq!(tb.round_id, 2);
    let r = client
        .submit_update(submission(&b, 2, vec![update(vec![2.0; 7], 5)]))
        .await
        .unwrap()
        .into_inner();
    assert!(r.round_closed);
    assert_eq!(
        latest_prior(&mut client, &a).await.params[0].values,
        vec![1.0; 7]
    );
    assert_eq!(
        server.coordinator.integrity_check().unwrap(),
        vec!["ok".to_string()]
    );
    server.stop().await;
}

#[tokio::test]
async fn nan_parameter_is_invalid_argument() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], t) = two_devices(dir.path()).await;
    let mut v = vec![0.0; 7];
    v[3] = f64::NAN;
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![update(v, 10)]),
        Code::InvalidArgument,
        "updates[0].values[3]",
    )
    .await;
    server.stop().await;
}

#[tokio::test]
async fn infinite_parameter_is_invalid_argument() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], t) = two_devices(dir.path()).await;
    let mut v = vec![0.0; 7];
    v[6] = f64::INFINITY;
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![update(v, 10)]),
        Code::InvalidArgument,
        "updates[0].values[6]",
    )
    .await;
    server.stop().await;
}

#[tokio::test]
async fn wrong_length_parameters_are_invalid_argument() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], t) = two_devices(dir.path()).await;
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![update(vec![0.0; 3], 10)]),
        Code::InvalidArgument,
        "updates[0].values",
    )
    .await;
    server.stop().await;
}

#[tokio::test]
async fn zero_day_count_and_empty_update_are_invalid_argument() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], t) = two_devices(dir.path()).await;
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![update(vec![0.0; 7], 0)]),
        Code::InvalidArgument,
        "updates[0].n_days",
    )
    .await;
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![]),
        Code::InvalidArgument,
        "updates",
    )
    .await;
    server.stop().await;
}

#[tokio::test]
async fn stale_round_is_failed_precondition() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, b], t) = two_devices(dir.path()).await;
    client
        .submit_update(submission(&a, t.round_id, vec![update(vec![0.0; 7], 10)]))
        .await
        .unwrap();
    client
        .submit_update(submission(&b, t.round_id, vec![update(vec![0.0; 7], 10)]))
        .await
        .unwrap();
    // Round 1 is closed; a different late submission for it is refused.
    expect_refused(
        &mut client,
        submission(&a, 1, vec![update(vec![5.0; 7], 10)]),
        Code::FailedPrecondition,
        "round_id",
    )
    .await;
    server.stop().await;
}

#[tokio::test]
async fn future_round_is_failed_precondition() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], _) = two_devices(dir.path()).await;
    expect_refused(
        &mut client,
        submission(&a, 99, vec![update(vec![0.0; 7], 10)]),
        Code::FailedPrecondition,
        "round_id",
    )
    .await;
    server.stop().await;
}

/// A request naming another device than its credential's is refused, and
/// so is one naming a study the device is not enrolled in.
#[tokio::test]
async fn a_device_may_submit_only_its_own_updates() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, b], t) = two_devices(dir.path()).await;
    let mut as_b = submission(&a, t.round_id, vec![update(vec![0.0; 7], 10)]);
    as_b.get_mut().device_id = b.device_id;
    expect_refused(&mut client, as_b, Code::PermissionDenied, "device_id").await;
    let mut unknown = submission(&a, t.round_id, vec![update(vec![0.0; 7], 10)]);
    unknown.get_mut().device_id = 4242;
    expect_refused(&mut client, unknown, Code::PermissionDenied, "device_id").await;
    let mut other = submission(&a, t.round_id, vec![update(vec![0.0; 7], 10)]);
    other.get_mut().study_id = "no-such-study".into();
    let err = client.submit_update(other).await.unwrap_err();
    assert_eq!(err.code(), Code::PermissionDenied);
    assert!(err.message().contains("study_id"), "{}", err.message());
    // Device b's own slot in the round is still free.
    let r = client
        .submit_update(submission(&b, t.round_id, vec![update(vec![1.0; 7], 10)]))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.accepted_in_round, 1);
    server.stop().await;
}

#[tokio::test]
async fn duplicate_submission_is_already_exists_unless_identical() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], t) = two_devices(dir.path()).await;
    let first = || submission(&a, t.round_id, vec![update(vec![0.5; 7], 10)]);
    client.submit_update(first()).await.unwrap();
    // An identical retry is answered as before (idempotent), not double-counted.
    let again = client.submit_update(first()).await.unwrap().into_inner();
    assert_eq!(again.accepted_in_round, 1);
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![update(vec![0.7; 7], 10)]),
        Code::AlreadyExists,
        "device",
    )
    .await;
    server.stop().await;
}

#[tokio::test]
async fn unknown_signal_is_invalid_argument() {
    let dir = tempfile::tempdir().unwrap();
    let (server, mut client, [a, _], t) = two_devices(dir.path()).await;
    let mut u = update(vec![0.0; 7], 10);
    u.signal = "steps".into();
    expect_refused(
        &mut client,
        submission(&a, t.round_id, vec![u]),
        Code::InvalidArgument,
        "updates[0].signal",
    )
    .await;
    server.stop().await;
}

/// Three devices, quorum two, a 300 ms deadline: the straggler is excluded
/// and the round closes with the two that submitted; the straggler's late
/// submission is refused.
#[tokio::test]
async fn stragglers_are_excluded_and_the_round_closes_with_quorum() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = study_config(STUDY, &[Signal::RestingHr], 3, 2);
    config.min_quorum = 2;
    config.round_deadline_ms = 300;
    let server = TestServer::start(&dir.path().join("agg.db"), vec![config]).await;
    let mut client = server.client();
    let ids = [
        enroll(&server, "p-a").await,
        enroll(&server, "p-b").await,
        enroll(&server, "p-c").await,
    ];
    let t = task(&mut client, &ids[0]).await;
    client
        .submit_update(submission(
            &ids[0],
            t.round_id,
            vec![update(vec![1.0; 7], 10)],
        ))
        .await
        .unwrap();
    client
        .submit_update(submission(
            &ids[1],
            t.round_id,
            vec![update(vec![3.0; 7], 10)],
        ))
        .await
        .unwrap();
    // Long-poll as device a: it is woken when the deadline closes the round
    // and round 2 opens (no sleeping in the test).
    let next = task(&mut client, &ids[0]).await;
    assert_eq!(next.round_id, t.round_id + 1);
    let prior = latest_prior(&mut client, &ids[0]).await;
    assert_eq!(prior.version, 1);
    assert_eq!(
        prior.params[0].values,
        vec![2.0; 7],
        "the straggler did not enter the average"
    );
    assert_eq!(prior.contributions[0].n_devices, 2);
    let late = client
        .submit_update(submission(
            &ids[2],
            t.round_id,
            vec![update(vec![50.0; 7], 10)],
        ))
        .await
        .unwrap_err();
    assert_eq!(late.code(), Code::FailedPrecondition);
    server.stop().await;
}

/// Without quorum at the deadline the round is retried under a new id and
/// nothing is applied: the prior stays at version 0.
#[tokio::test]
async fn a_round_without_quorum_is_retried_never_half_applied() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = study_config(STUDY, &[Signal::RestingHr], 2, 2);
    config.round_deadline_ms = 300;
    let server = TestServer::start(&dir.path().join("agg.db"), vec![config]).await;
    let mut client = server.client();
    let a = enroll(&server, "p-a").await;
    let _b = enroll(&server, "p-b").await;
    let t = task(&mut client, &a).await;
    client
        .submit_update(submission(&a, t.round_id, vec![update(vec![9.0; 7], 10)]))
        .await
        .unwrap();
    // Device a is woken when the failed round is replaced by a retry.
    let retry = task(&mut client, &a).await;
    assert_eq!(retry.round_id, t.round_id + 1);
    let prior = latest_prior(&mut client, &a).await;
    assert_eq!(
        prior.version, 0,
        "a round without quorum must not be applied"
    );
    assert_eq!(retry.shared[0].values, prior.params[0].values);
    server.stop().await;
}

/// `Coordinator::submit_batch` (what `SubmitUpdate` calls arriving together go through): each
/// call in a batch is answered as it would be alone, in order, and only the new, valid ones are
/// recorded. Expected answers follow the single-call rules tested above; the average is the
/// day-weighted mean (FedAvg, McMahan et al. 2017, computed by hand below).
#[tokio::test]
async fn a_batch_of_submissions_is_answered_call_by_call() {
    use plimsoll_server::AggregatorError;
    use plimsoll_server::rounds::Submission;
    use plimsoll_server::study::SignalUpdate;

    let dir = tempfile::tempdir().unwrap();
    let server = TestServer::start(
        &dir.path().join("agg.db"),
        vec![study_config(STUDY, &[Signal::RestingHr], 3, 2)],
    )
    .await;
    let mut client = server.client();
    let a = enroll(&server, "p-a").await;
    let b = enroll(&server, "p-b").await;
    let c = enroll(&server, "p-c").await;
    let round = task(&mut client, &a).await.round_id;
    let updates = |v: f64, days: u32| {
        vec![SignalUpdate {
            signal: "resting_hr_bpm".into(),
            values: vec![v; 7],
            n_days: days,
            local_loss: 1.0,
        }]
    };
    let call = |who: &DeviceCredential, v: f64, days: u32| Submission {
        study_id: STUDY.into(),
        device_id: who.device_id,
        round_id: round,
        updates: updates(v, days),
        credential: who.clone(),
    };
    let wrong_secret = DeviceCredential {
        device_id: b.device_id,
        secret: "0".repeat(64),
    };
    let batch = vec![
        call(&a, 1.0, 10),
        // The same call again in the same batch: answered, not counted twice.
        call(&a, 1.0, 10),
        // A different update from a device already in the batch.
        call(&a, 9.0, 10),
        Submission {
            credential: wrong_secret,
            ..call(&b, 2.0, 30)
        },
        call(&b, f64::NAN, 30),
        call(&b, 2.0, 30),
    ];
    let answers = server
        .coordinator
        .submit_batch(batch, plimsoll_server::service::now_ms());
    assert_eq!(answers.len(), 6);
    let ok = |i: usize| {
        answers[i]
            .as_ref()
            .unwrap_or_else(|e| panic!("call {i}: {e}"))
    };
    assert_eq!((ok(0).accepted_in_round, ok(0).round_closed), (1, false));
    assert!(!ok(1).round_closed);
    assert!(matches!(answers[2], Err(AggregatorError::AlreadyExists(_))));
    assert!(matches!(
        answers[3],
        Err(AggregatorError::Unauthenticated(_))
    ));
    assert!(matches!(
        answers[4],
        Err(AggregatorError::InvalidArgument { .. })
    ));
    assert_eq!((ok(5).accepted_in_round, ok(5).round_closed), (2, false));
    assert_eq!(server.coordinator.prior(STUDY, None).unwrap().version, 0);

    // The last member's call, alone in its batch, closes the round.
    let answers = server
        .coordinator
        .submit_batch(vec![call(&c, 4.0, 60)], plimsoll_server::service::now_ms());
    let closing = answers[0].as_ref().unwrap();
    assert_eq!((closing.accepted_in_round, closing.round_closed), (3, true));
    let prior = server.coordinator.prior(STUDY, None).unwrap();
    assert_eq!(prior.version, 1);
    assert_eq!(prior.contributions[0].n_devices, 3);
    // (10·1 + 30·2 + 60·4) / 100 = 3.1
    assert!((prior.params[0].values[0] - 3.1).abs() < 1e-12);
    server.stop().await;

    // What was recorded survives a restart: the same prior, and device a's retry of its
    // accepted call is still answered as accepted (its row is in the database).
    let reopened = plimsoll_server::Coordinator::open(&crate::support::db_location(
        &dir.path().join("agg.db"),
    ))
    .unwrap();
    assert_eq!(reopened.prior(STUDY, None).unwrap(), prior);
    let retry = reopened.submit_batch(vec![call(&a, 1.0, 10)], plimsoll_server::service::now_ms());
    assert!(retry[0].as_ref().unwrap().round_closed);
}

#[tokio::test]
async fn a_data_summary_is_kept_replaced_and_refused_when_it_cannot_be_true() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let server =
        TestServer::start(&db, vec![study_config(STUDY, &[Signal::RestingHr], 3, 2)]).await;
    let mut client = server.client();
    let a = enroll(&server, "p-a").await;
    let b = enroll(&server, "p-b").await;
    let summary = |device: &DeviceCredential, days: u32, last: &str| pb::SubmitDataSummaryRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        first_day: "2024-01-01".into(),
        last_day: "2024-01-31".into(),
        signals: vec![pb::SignalCoverage {
            signal: "resting_hr_bpm".into(),
            days_with_data: days,
            last_day: last.into(),
        }],
    };
    let refused = |r: Result<tonic::Response<pb::SubmitDataSummaryResponse>, tonic::Status>| {
        r.expect_err("must be refused")
    };
    // 32 days with data in a 31-day span.
    let e = refused(
        client
            .submit_data_summary(authorized(&a, summary(&a, 32, "2024-01-31")))
            .await,
    );
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(
        e.message().starts_with("SubmitDataSummary")
            && e.message().contains("signals[0].days_with_data"),
        "{}",
        e.message()
    );
    let e = refused(
        client
            .submit_data_summary(authorized(&a, summary(&a, 3, "2024-02-30")))
            .await,
    );
    assert!(
        e.message().contains("signals[0].last_day"),
        "{}",
        e.message()
    );
    // A device cannot send another device's summary.
    let e = refused(
        client
            .submit_data_summary(authorized(&b, summary(&a, 3, "2024-01-31")))
            .await,
    );
    assert_eq!(e.code(), Code::PermissionDenied, "{}", e.message());
    // Nothing was stored by the refusals.
    let store = plimsoll_server::store::Store::open(&crate::support::db_location(&db)).unwrap();
    assert!(store.data_summaries(STUDY).unwrap().is_empty());
    drop(store);

    client
        .submit_data_summary(authorized(&a, summary(&a, 20, "2024-01-30")))
        .await
        .unwrap();
    client
        .submit_data_summary(authorized(&a, summary(&a, 25, "2024-01-31")))
        .await
        .unwrap();
    let store = plimsoll_server::store::Store::open(&crate::support::db_location(&db)).unwrap();
    let kept = store.data_summaries(STUDY).unwrap();
    assert_eq!(kept.len(), 1, "the newer summary replaces the older");
    assert_eq!(kept[0].0, a.device_id);
    assert_eq!(kept[0].1.signals[0].days_with_data, 25);
    server.stop().await;
}
