//! Device identity over real gRPC on loopback, one test per refusal:
//! enrolment without the study's code, calls without a valid credential,
//! a device acting for another device or study, taking over an enrolled
//! participant label, and a revoked device. Each checks the status code and
//! that the message names the RPC and the field.

use plimsoll_device::client::{FlagSharing, authorized, new_device_secret};
use plimsoll_device::packets::to_pb;
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::service::now_ms;
use plimsoll_server::store::Store;
use tonic::Code;
use tonic::transport::Channel;

use crate::review_support::scenario_packet;
use crate::support::{TestServer, study_config};

const STUDY: &str = "identity";
const OTHER: &str = "identity-other";
const HR: [&str; 1] = ["resting_hr_bpm"];

fn assert_refused(result: Result<impl std::fmt::Debug, tonic::Status>, code: Code, names: &[&str]) {
    let err = result.expect_err("must be refused");
    assert_eq!(err.code(), code, "{}", err.message());
    for name in names {
        assert!(
            err.message().contains(name),
            "message `{}` should name `{name}`",
            err.message()
        );
    }
}

fn enroll_request(code: &str, label: &str, secret: &str) -> pb::EnrollRequest {
    pb::EnrollRequest {
        study_id: STUDY.into(),
        participant_label: label.into(),
        signals: vec![HR[0].into()],
        enrollment_code: code.into(),
        device_secret: secret.into(),
        ..Default::default()
    }
}

async fn devices_enrolled(client: &mut AggregatorClient<Channel>) -> u32 {
    client
        .get_study(pb::GetStudyRequest {
            study_id: STUDY.into(),
        })
        .await
        .unwrap()
        .into_inner()
        .devices_enrolled
}

fn fetch(device: &DeviceCredential, device_id: u64) -> tonic::Request<pb::FetchTaskRequest> {
    authorized(
        device,
        pb::FetchTaskRequest {
            study_id: STUDY.into(),
            device_id,
            wait_ms: 5_000,
        },
    )
}

fn submission(device: &DeviceCredential, round_id: u64) -> tonic::Request<pb::SubmitUpdateRequest> {
    authorized(
        device,
        pb::SubmitUpdateRequest {
            study_id: STUDY.into(),
            device_id: device.device_id,
            round_id,
            updates: vec![pb::SignalUpdate {
                signal: HR[0].into(),
                values: vec![0.5; 7],
                n_days: 10,
                local_loss: 1.0,
            }],
        },
    )
}

async fn task_round(client: &mut AggregatorClient<Channel>, device: &DeviceCredential) -> u64 {
    match client
        .fetch_task(fetch(device, device.device_id))
        .await
        .unwrap()
        .into_inner()
        .work
    {
        Some(pb::fetch_task_response::Work::Task(t)) => t.round_id,
        other => panic!("expected a task, got {other:?}"),
    }
}

async fn start(dir: &std::path::Path, devices: u32) -> TestServer {
    TestServer::start(
        &dir.join("agg.db"),
        vec![
            // Two signals, so a flag packet (which shows both) is valid;
            // devices contribute resting heart rate only.
            study_config(STUDY, &[Signal::RestingHr, Signal::HrvRmssd], devices, 3),
            study_config(OTHER, &[Signal::RestingHr, Signal::HrvRmssd], 1, 1),
        ],
    )
    .await
}

#[tokio::test]
async fn enrolment_needs_the_study_enrollment_code() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path(), 2).await;
    let mut client = server.client();
    let secret = new_device_secret();
    let code = server.code(STUDY).to_owned();

    for wrong in ["", "   ", server.code(OTHER), "AAAAA-AAAAA-AAAAA-AAAAA"] {
        assert_refused(
            client.enroll(enroll_request(wrong, "p-1", &secret)).await,
            Code::Unauthenticated,
            &["Enroll", "enrollment_code"],
        );
    }
    assert_eq!(
        devices_enrolled(&mut client).await,
        0,
        "nothing was enrolled"
    );

    // Hyphens, spaces and letter case do not matter.
    let typed = code.replace('-', " ").to_lowercase();
    let id = client
        .enroll(enroll_request(&typed, "p-1", &secret))
        .await
        .unwrap()
        .into_inner()
        .device_id;
    assert_eq!(devices_enrolled(&mut client).await, 1);

    // A new code replaces the old one; enrolled devices carry on.
    let fresh = server.coordinator.new_enrollment_code(STUDY).unwrap();
    assert_refused(
        client
            .enroll(enroll_request(&code, "p-2", &new_device_secret()))
            .await,
        Code::Unauthenticated,
        &["enrollment_code"],
    );
    client
        .enroll(enroll_request(&fresh, "p-2", &new_device_secret()))
        .await
        .unwrap();
    let me = DeviceCredential {
        device_id: id,
        secret,
    };
    task_round(&mut client, &me).await;
    server.stop().await;
}

#[tokio::test]
async fn a_participant_label_cannot_be_taken_over() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path(), 2).await;
    let mut client = server.client();
    let code = server.code(STUDY).to_owned();
    let secret = new_device_secret();
    let first = client
        .enroll(enroll_request(&code, "p-1", &secret))
        .await
        .unwrap()
        .into_inner()
        .device_id;
    // The same secret again is a retry (e.g. after a lost answer).
    let retry = client
        .enroll(enroll_request(&code, "p-1", &secret))
        .await
        .unwrap()
        .into_inner()
        .device_id;
    assert_eq!(first, retry);
    // Anyone else with the study code cannot take the label over.
    assert_refused(
        client
            .enroll(enroll_request(&code, "p-1", &new_device_secret()))
            .await,
        Code::AlreadyExists,
        &["Enroll", "participant_label"],
    );
    // A secret that is not 256 bits of lower-case hex is refused outright.
    for bad in ["", "abc", &"G".repeat(64), &secret.to_uppercase()] {
        assert_refused(
            client.enroll(enroll_request(&code, "p-9", bad)).await,
            Code::InvalidArgument,
            &["Enroll", "device_secret"],
        );
    }
    assert_eq!(devices_enrolled(&mut client).await, 1);
    server.stop().await;
}

/// Every call but GetStudy and Enroll needs a credential: missing,
/// malformed, wrong secret or unknown device is UNAUTHENTICATED.
#[tokio::test]
async fn calls_without_a_valid_credential_are_unauthenticated() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path(), 1).await;
    let mut client = server.client();
    let me = server
        .enroll(STUDY, "p-1", &HR, FlagSharing::Consented)
        .await;
    let wrong_secret = DeviceCredential {
        device_id: me.device_id,
        secret: new_device_secret(),
    };
    let unknown = DeviceCredential {
        device_id: 999,
        secret: me.secret.clone(),
    };
    let round = task_round(&mut client, &me).await;

    let packet = pb::SubmitFlagPacketRequest {
        study_id: STUDY.into(),
        device_id: me.device_id,
        packet: Some(to_pb(&scenario_packet())),
    };
    let prior = pb::GetPriorRequest {
        study_id: STUDY.into(),
        version: 0,
    };
    let fetch_msg = || fetch(&me, me.device_id).into_inner();
    let submit_msg = || submission(&me, round).into_inner();

    // No credential at all, then a malformed one.
    let mut malformed = tonic::Request::new(fetch_msg());
    malformed
        .metadata_mut()
        .insert("authorization", "Basic cDpx".parse().unwrap());
    assert_refused(
        client.fetch_task(malformed).await,
        Code::Unauthenticated,
        &["FetchTask", "authorization", "Bearer"],
    );
    assert_refused(
        client.fetch_task(fetch_msg()).await,
        Code::Unauthenticated,
        &["FetchTask", "authorization"],
    );
    assert_refused(
        client.submit_update(submit_msg()).await,
        Code::Unauthenticated,
        &["SubmitUpdate", "authorization"],
    );
    assert_refused(
        client.get_prior(prior.clone()).await,
        Code::Unauthenticated,
        &["GetPrior", "authorization"],
    );
    assert_refused(
        client.submit_flag_packet(packet.clone()).await,
        Code::Unauthenticated,
        &["SubmitFlagPacket", "authorization"],
    );
    // A well-formed credential that is wrong.
    for bad in [&wrong_secret, &unknown] {
        assert_refused(
            client.fetch_task(authorized(bad, fetch_msg())).await,
            Code::Unauthenticated,
            &["FetchTask", "authorization"],
        );
        assert_refused(
            client.submit_update(authorized(bad, submit_msg())).await,
            Code::Unauthenticated,
            &["SubmitUpdate", "authorization"],
        );
        assert_refused(
            client.get_prior(authorized(bad, prior.clone())).await,
            Code::Unauthenticated,
            &["GetPrior", "authorization"],
        );
        assert_refused(
            client
                .submit_flag_packet(authorized(bad, packet.clone()))
                .await,
            Code::Unauthenticated,
            &["SubmitFlagPacket", "authorization"],
        );
    }
    // Nothing was applied: the device's own submission still goes through.
    let r = client
        .submit_update(authorized(&me, submit_msg()))
        .await
        .unwrap()
        .into_inner();
    assert!(r.round_closed);
    client
        .submit_flag_packet(authorized(&me, packet))
        .await
        .unwrap();
    client.get_prior(authorized(&me, prior)).await.unwrap();
    server.stop().await;
}

/// A device may act only for itself and only in its own study.
#[tokio::test]
async fn a_device_may_act_only_for_itself() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path(), 2).await;
    let mut client = server.client();
    let a = server
        .enroll(STUDY, "p-a", &HR, FlagSharing::Consented)
        .await;
    let b = server
        .enroll(STUDY, "p-b", &HR, FlagSharing::Consented)
        .await;
    let elsewhere = server
        .enroll(OTHER, "q-1", &HR, FlagSharing::Consented)
        .await;
    let round = task_round(&mut client, &a).await;

    assert_refused(
        client.fetch_task(fetch(&a, b.device_id)).await,
        Code::PermissionDenied,
        &["FetchTask", "device_id"],
    );
    let mut for_b = submission(&a, round);
    for_b.get_mut().device_id = b.device_id;
    assert_refused(
        client.submit_update(for_b).await,
        Code::PermissionDenied,
        &["SubmitUpdate", "device_id"],
    );
    let packet_for_b = pb::SubmitFlagPacketRequest {
        study_id: STUDY.into(),
        device_id: b.device_id,
        packet: Some(to_pb(&scenario_packet())),
    };
    assert_refused(
        client
            .submit_flag_packet(authorized(&a, packet_for_b))
            .await,
        Code::PermissionDenied,
        &["SubmitFlagPacket", "device_id"],
    );
    // A device of another study, with its own valid credential.
    let mut foreign = submission(&elsewhere, round);
    foreign.get_mut().device_id = elsewhere.device_id;
    assert_refused(
        client.submit_update(foreign).await,
        Code::PermissionDenied,
        &["SubmitUpdate", "study_id"],
    );
    assert_refused(
        client
            .get_prior(authorized(
                &elsewhere,
                pb::GetPriorRequest {
                    study_id: STUDY.into(),
                    version: 0,
                },
            ))
            .await,
        Code::PermissionDenied,
        &["GetPrior", "study_id"],
    );
    // b's slot is untouched: its own submission is the first in the round.
    let r = client
        .submit_update(submission(&b, round))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.accepted_in_round, 1);
    server.stop().await;
}

/// A device revoked by the operator — here through a second database
/// connection, as `plimsoll-aggregator device revoke` does beside a running
/// aggregator — is refused at once, cannot enrol again, and is not selected
/// for later rounds.
#[tokio::test]
async fn a_revoked_device_is_refused_and_never_selected_again() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let mut config = study_config(STUDY, &[Signal::RestingHr], 3, 3);
    config.min_quorum = 2;
    config.round_deadline_ms = 400;
    let server = TestServer::start(&db, vec![config]).await;
    let mut client = server.client();
    let a = server
        .enroll(STUDY, "p-a", &HR, FlagSharing::Withheld)
        .await;
    let b = server
        .enroll(STUDY, "p-b", &HR, FlagSharing::Withheld)
        .await;
    let c = server
        .enroll(STUDY, "p-c", &HR, FlagSharing::Withheld)
        .await;
    let r1 = task_round(&mut client, &a).await;

    {
        let mut operator = Store::open(&crate::support::db_location(&db)).unwrap();
        let id = operator.resolve_device(STUDY, "p-c").unwrap();
        assert_eq!(id, c.device_id);
        operator.revoke_device(id, now_ms()).unwrap();
    }
    assert_refused(
        client.fetch_task(fetch(&c, c.device_id)).await,
        Code::PermissionDenied,
        &["FetchTask", "revoked"],
    );
    assert_refused(
        client.submit_update(submission(&c, r1)).await,
        Code::PermissionDenied,
        &["SubmitUpdate", "revoked"],
    );
    let mut again = pb::EnrollRequest {
        study_id: STUDY.into(),
        participant_label: "p-c".into(),
        signals: vec![HR[0].into()],
        enrollment_code: server.code(STUDY).into(),
        device_secret: c.secret.clone(),
        ..Default::default()
    };
    assert_refused(
        client.enroll(again.clone()).await,
        Code::PermissionDenied,
        &["Enroll", "participant_label", "revoked"],
    );
    again.device_secret = new_device_secret();
    assert_refused(
        client.enroll(again.clone()).await,
        Code::PermissionDenied,
        &["Enroll", "participant_label", "revoked"],
    );

    // A device whose identity the aggregator holds in memory (its credential was just checked)
    // and that is then revoked from another connection cannot enrol again at once either.
    let d = server
        .enroll(STUDY, "p-d", &HR, FlagSharing::Withheld)
        .await;
    client
        .get_prior(authorized(
            &d,
            pb::GetPriorRequest {
                study_id: STUDY.into(),
                ..Default::default()
            },
        ))
        .await
        .unwrap();
    Store::open(&crate::support::db_location(&db))
        .unwrap()
        .revoke_device(d.device_id, now_ms())
        .unwrap();
    assert_refused(
        client
            .enroll(pb::EnrollRequest {
                participant_label: "p-d".into(),
                device_secret: d.secret.clone(),
                ..again
            })
            .await,
        Code::PermissionDenied,
        &["Enroll", "participant_label", "revoked"],
    );

    // Round 1 closes at its deadline with a and b (quorum 2). Round 2 is
    // drawn from the active devices only, so a and b alone complete it.
    client.submit_update(submission(&a, r1)).await.unwrap();
    client.submit_update(submission(&b, r1)).await.unwrap();
    let r2 = task_round(&mut client, &a).await;
    assert_eq!(r2, r1 + 1);
    client.submit_update(submission(&a, r2)).await.unwrap();
    let closed = client
        .submit_update(submission(&b, r2))
        .await
        .unwrap()
        .into_inner();
    assert!(
        closed.round_closed,
        "round 2 must not wait for the revoked device"
    );
    assert_eq!(devices_enrolled(&mut client).await, 2);
    server.stop().await;
}

/// The database keeps only SHA-256 hashes: neither a device secret nor the
/// enrollment code appears in its files.
#[tokio::test]
async fn the_database_keeps_no_secret_in_clear() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let server = start(dir.path(), 1).await;
    let code = server.code(STUDY).to_owned();
    let me = server
        .enroll(STUDY, "p-1", &HR, FlagSharing::Withheld)
        .await;
    let mut client = server.client();
    task_round(&mut client, &me).await;
    server.stop().await;
    let mut bytes = Vec::new();
    let location = crate::support::db_location(&db);
    if let Some(url) = location
        .to_str()
        .filter(|l| plimsoll_server::db::is_postgres_url(l))
    {
        // On PostgreSQL: every row of every table, as text.
        let pg = plimsoll_server::db::Db::postgres(url).unwrap();
        let tables = pg
            .query_map(
                "SELECT table_name FROM information_schema.tables WHERE table_schema = 'public'",
                &plimsoll_server::params![],
                |r| r.get::<String>(0),
            )
            .unwrap();
        for table in tables {
            let rows = pg
                .query_map(
                    &format!("SELECT CAST(t AS TEXT) FROM {table} t"),
                    &plimsoll_server::params![],
                    |r| r.get::<String>(0),
                )
                .unwrap();
            for row in rows {
                bytes.extend(row.into_bytes());
            }
        }
    }
    for entry in std::fs::read_dir(dir.path()).unwrap() {
        let path = entry.unwrap().path();
        if path
            .to_string_lossy()
            .starts_with(db.to_string_lossy().as_ref())
        {
            bytes.extend(std::fs::read(&path).unwrap());
        }
    }
    assert!(bytes.len() > 1000, "read the stored state");
    let contains = |needle: &str| bytes.windows(needle.len()).any(|w| w == needle.as_bytes());
    assert!(!contains(&me.secret), "device secret stored in clear");
    assert!(!contains(&code), "enrollment code stored in clear");
    assert!(
        !contains(&code.replace('-', "")),
        "enrollment code stored in clear"
    );
}
