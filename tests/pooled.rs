//! The bounded device pool of `plimsoll evaluate` ([`plimsoll_device::scheduler`]) over real
//! gRPC on loopback: a cohort larger than the pool trains through every round with no more
//! devices at work than the pool allows, and a device whose credential is revoked after
//! enrolment is dropped and counted while the others finish the study.

use std::path::PathBuf;
use std::sync::Arc;

use plimsoll_device::cohort::{self, BadRowPolicy, Cohort, Scenario, SimulateOptions};
use plimsoll_device::demo::cohort_signals;
use plimsoll_device::scheduler::{
    Channels, Declared, PhaseBars, PoolOptions, StudyEntry, enroll_all, run_federated_pooled,
    train_enrolled,
};
use plimsoll_server::Coordinator;
use plimsoll_server::service::now_ms;

use crate::support::study_config;

/// `participants` × 60 days simulated from the quick demo scenario and read back.
fn small_cohort(participants: usize, dir: &std::path::Path) -> Arc<Cohort> {
    let scenario = Scenario::from_path(
        &PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/quick.toml"),
    )
    .unwrap();
    let sim = SimulateOptions {
        seed: Some(11),
        participants: Some(participants),
        days: Some(60),
    };
    cohort::simulate_to_dir(&scenario, &sim, dir, &mut |_, _| {}).unwrap();
    Arc::new(cohort::read_cohort(dir, BadRowPolicy::Quarantine).unwrap())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_cohort_larger_than_the_pool_trains_through_every_round() {
    let dir = tempfile::tempdir().unwrap();
    let cohort = small_cohort(12, &dir.path().join("cohort"));
    let n = cohort.participants.len();
    assert_eq!(n, 12);
    let rounds = 4;
    let mut config = study_config("pooled", &cohort_signals(&cohort), n as u32, rounds);
    // Half the cohort per round.
    config.fraction_per_round = 0.5;
    config.min_quorum = 3;
    let pool = PoolOptions {
        workers: 3,
        connections: 2,
        ..PoolOptions::default()
    };
    let members: Vec<usize> = (0..n).collect();
    let run = run_federated_pooled(
        &cohort,
        &members,
        config,
        &dir.path().join("agg.db"),
        &pool,
        &PhaseBars::default(),
    )
    .await
    .unwrap();
    assert_eq!(run.enrolled, n);
    assert!(run.dropped.is_empty(), "dropped: {:?}", run.dropped);
    // Version 0 (the initial prior) and one per round.
    assert_eq!(run.history.len(), rounds as usize + 1);
    // Every selected device (6 of 12 per round) submitted once per round.
    assert_eq!(run.updates, u64::from(rounds) * 6);
    for v in run.history.iter().skip(1) {
        let devices: u32 = v.contributions.iter().map(|c| c.n_devices).max().unwrap();
        assert_eq!(devices, 6, "round {}", v.round_id);
    }
    assert!(
        (1..=pool.workers).contains(&run.peak_active),
        "{} devices at work at once with a pool of {}",
        run.peak_active,
        pool.workers
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_revoked_device_is_dropped_and_the_others_finish() {
    let dir = tempfile::tempdir().unwrap();
    let cohort = small_cohort(6, &dir.path().join("cohort"));
    let n = cohort.participants.len();
    let rounds = 3;
    let mut config = study_config("revoked", &cohort_signals(&cohort), n as u32, rounds);
    // The round that selected the revoked device closes at its deadline with a quorum.
    config.min_quorum = 3;
    config.round_deadline_ms = 300;
    let coordinator = Arc::new(
        Coordinator::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap(),
    );
    let code = coordinator.create_study(config, now_ms()).unwrap();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let server = plimsoll_server::serve(coordinator.clone(), listener)
        .await
        .unwrap();
    let pool = PoolOptions {
        workers: 2,
        connections: 2,
        ..PoolOptions::default()
    };
    let channels = Channels::connect(server.addr, pool.connections).unwrap();
    let members: Vec<usize> = (0..n).collect();
    let enrolment = enroll_all(
        &channels,
        StudyEntry {
            study_id: "revoked",
            enrollment_code: &code,
            declared: &Declared::default(),
        },
        &cohort,
        &members,
        &pool,
        None,
    )
    .await
    .unwrap();
    assert_eq!(enrolment.devices.len(), n);
    assert!(enrolment.dropped.is_empty());
    // Every device was enrolled, so round 1 is open with all of them selected; the study
    // team now revokes one.
    let label = cohort.participants[2].participant.clone();
    let (_, selected) = coordinator
        .open_round_members("revoked")
        .unwrap()
        .expect("round 1 is open");
    assert_eq!(selected.len(), n);
    let revoked = coordinator.revoke("revoked", &label, now_ms()).unwrap();

    let training = train_enrolled(
        &coordinator,
        &channels,
        "revoked",
        &cohort,
        &enrolment.devices,
        &pool,
        None,
    )
    .await
    .unwrap();
    assert_eq!(training.dropped.len(), 1, "{:?}", training.dropped);
    let dropped = &training.dropped[0];
    assert_eq!(dropped.participant, label);
    assert_eq!(dropped.device_id, Some(revoked));
    assert!(
        dropped.reason.contains("FetchTask") && dropped.reason.contains("revoked"),
        "{}",
        dropped.reason
    );
    let status = coordinator.status("revoked").unwrap();
    assert_eq!(status.rounds_completed, rounds);
    // The other five submitted in every round.
    assert_eq!(training.updates, u64::from(rounds) * (n as u64 - 1));
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_device_that_cannot_enrol_is_dropped_and_the_study_starts_without_it() {
    let dir = tempfile::tempdir().unwrap();
    let mut cohort = (*small_cohort(6, &dir.path().join("cohort"))).clone();
    let n = cohort.participants.len();
    // The aggregator refuses this label (letters, digits, `_` and `-` only), so the device
    // never enrols, and the study waiting for all six would never start.
    cohort.participants[1].participant = "label with spaces".into();
    let cohort = Arc::new(cohort);
    let rounds = 2;
    let mut config = study_config("unenrolled", &cohort_signals(&cohort), n as u32, rounds);
    config.min_quorum = 3;
    let members: Vec<usize> = (0..n).collect();
    let run = run_federated_pooled(
        &cohort,
        &members,
        config,
        &dir.path().join("agg.db"),
        &PoolOptions::default(),
        &PhaseBars::default(),
    )
    .await
    .unwrap();
    assert_eq!(run.enrolled, n - 1);
    assert_eq!(run.dropped.len(), 1, "{:?}", run.dropped);
    let dropped = &run.dropped[0];
    assert_eq!(dropped.participant, "label with spaces");
    assert_eq!(dropped.device_id, None);
    assert!(
        dropped.reason.contains("participant_label"),
        "{}",
        dropped.reason
    );
    // Every round ran with the five that enrolled.
    assert_eq!(run.history.len(), rounds as usize + 1);
    assert_eq!(run.updates, u64::from(rounds) * (n as u64 - 1));
}

#[test]
fn a_study_cannot_be_started_early_below_its_quorum_or_twice() {
    let dir = tempfile::tempdir().unwrap();
    let coordinator =
        Coordinator::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap();
    let mut config = study_config("early", &[plimsoll_device::signal::Signal::RestingHr], 4, 2);
    config.min_quorum = 2;
    let code = coordinator.create_study(config, now_ms()).unwrap();
    let enrol = |label: &str, secret: &str| {
        coordinator
            .enroll(
                &plimsoll_server::Enrollment {
                    study_id: "early",
                    label,
                    signals: &["resting_hr_bpm".to_owned()],
                    consent_share_flags: false,
                    enrollment_code: &code,
                    device_secret: &secret.repeat(32),
                    sensor_model: "",
                    group_label: "",
                },
                now_ms(),
            )
            .unwrap()
    };
    enrol("p-1", "ab");
    let err = coordinator
        .start_with_enrolled("early", now_ms())
        .unwrap_err();
    assert!(err.to_string().contains("min_quorum 2"), "{err}");
    assert_eq!(coordinator.status("early").unwrap().current_round, 0);
    enrol("p-2", "cd");
    assert_eq!(
        coordinator.start_with_enrolled("early", now_ms()).unwrap(),
        2
    );
    assert_eq!(coordinator.status("early").unwrap().current_round, 1);
    let err = coordinator
        .start_with_enrolled("early", now_ms())
        .unwrap_err();
    assert!(err.to_string().contains("already started"), "{err}");
    // The new threshold is stored: a restarted aggregator keeps it.
    drop(coordinator);
    let reopened =
        Coordinator::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap();
    assert_eq!(
        reopened.status("early").unwrap().config.start_when_enrolled,
        2
    );
}
