//! The detector's federated calibration over real gRPC on loopback
//! (`SubmitDetectionStats`, `GetDetectionCalibration`): published sums equal
//! the per-device sums computed directly, bad submissions are refused naming
//! the RPC and the field and change nothing, a resubmission replaces, calls
//! without a valid credential are refused, submissions survive a restart, and
//! a stage completes when every device has submitted (or at its deadline with
//! a quorum). End to end, every device of a federated run ends with the
//! calibration computed in process from the same per-device statistics.

use std::path::PathBuf;

use plimsoll_device::client::{CALIBRATION_FILE, FlagSharing, authorized};
use plimsoll_device::cohort::{BadRowPolicy, Scenario, SimulateOptions, read_cohort};
use plimsoll_device::demo::{cohort_signals, run_federated};
use plimsoll_device::detect::DetectConfig;
use plimsoll_device::detect::calibration::{
    EpisodeHistogram, N_EDGES, StudyCalibration, cohort_correlation, device_histogram,
    device_moments,
};
use plimsoll_device::detect::joint::{N_SIGNALS, ResidualMoments};
use plimsoll_device::prior::PriorParams;
use plimsoll_device::signal::Signal;
use plimsoll_device::wire::{histogram_to_pb, moments_from_pb, moments_to_pb};
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::service::now_ms;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::Code;
use tonic::transport::Channel;

use crate::support::{TestServer, study_config};

const STUDY: &str = "calib-study";

type Stats = pb::submit_detection_stats_request::Stats;

/// A study of one round over resting HR with `devices` devices whose round
/// has closed, so the residual-moments stage is open.
async fn trained(db: &std::path::Path, devices: u32) -> (TestServer, Vec<DeviceCredential>) {
    let server = TestServer::start(
        db,
        vec![study_config(STUDY, &[Signal::RestingHr], devices, 1)],
    )
    .await;
    let mut creds = Vec::new();
    for i in 0..devices {
        creds.push(
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
    let mut client = server.client();
    for c in &creds {
        let update = pb::SubmitUpdateRequest {
            study_id: STUDY.into(),
            device_id: c.device_id,
            round_id: 1,
            updates: vec![pb::SignalUpdate {
                signal: "resting_hr_bpm".into(),
                values: PriorParams::initial(Signal::RestingHr).values.to_vec(),
                n_days: 10,
                local_loss: 1.0,
            }],
        };
        client.submit_update(authorized(c, update)).await.unwrap();
    }
    assert_eq!(
        server.coordinator.status(STUDY).unwrap().rounds_completed,
        1
    );
    (server, creds)
}

/// Moments of `n_days` days of correlated random residuals (some missing).
fn random_moments(seed: u64, n_days: usize) -> ResidualMoments {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut m = ResidualMoments::default();
    for _ in 0..n_days {
        let common: f64 = rng.random::<f64>() - 0.5;
        let day: [Option<f64>; N_SIGNALS] = std::array::from_fn(|_| {
            (rng.random::<f64>() > 0.2).then(|| common + rng.random::<f64>() - 0.5)
        });
        m.add_day(&day);
    }
    m
}

/// A histogram of `scored_days` with non-increasing episode counts.
fn random_histogram(seed: u64, scored_days: u64) -> EpisodeHistogram {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut episodes = vec![0; N_EDGES];
    let mut level = scored_days / 4;
    for e in episodes.iter_mut() {
        *e = level;
        level = level.saturating_sub(rng.random_range(0..3));
    }
    EpisodeHistogram {
        episodes,
        scored_days,
    }
}

fn submit_request(
    c: &DeviceCredential,
    stats: Stats,
) -> tonic::Request<pb::SubmitDetectionStatsRequest> {
    authorized(
        c,
        pb::SubmitDetectionStatsRequest {
            study_id: STUDY.into(),
            device_id: c.device_id,
            stats: Some(stats),
        },
    )
}

async fn submit(
    client: &mut AggregatorClient<Channel>,
    c: &DeviceCredential,
    stats: Stats,
) -> Result<pb::SubmitDetectionStatsResponse, tonic::Status> {
    client
        .submit_detection_stats(submit_request(c, stats))
        .await
        .map(|r| r.into_inner())
}

fn moments(m: &ResidualMoments) -> Stats {
    Stats::ResidualMoments(moments_to_pb(m))
}

fn histogram(h: &EpisodeHistogram) -> Stats {
    Stats::EpisodeHistogram(histogram_to_pb(h))
}

/// The stage as `c` sees it now (no long-poll).
async fn view(
    client: &mut AggregatorClient<Channel>,
    c: &DeviceCredential,
    stage: pb::DetectionStage,
) -> pb::DetectionCalibration {
    let request = pb::GetDetectionCalibrationRequest {
        study_id: STUDY.into(),
        device_id: c.device_id,
        stage: stage as i32,
        wait_ms: 0,
    };
    client
        .get_detection_calibration(authorized(c, request))
        .await
        .unwrap()
        .into_inner()
}

fn published_moments(v: &pb::DetectionCalibration) -> ResidualMoments {
    match &v.sum {
        Some(pb::detection_calibration::Sum::ResidualMoments(m)) => {
            moments_from_pb("sum", m).unwrap()
        }
        other => panic!("expected moment sums, got {other:?}"),
    }
}

fn published_histogram(v: &pb::DetectionCalibration) -> EpisodeHistogram {
    match &v.sum {
        Some(pb::detection_calibration::Sum::EpisodeHistogram(h)) => EpisodeHistogram {
            episodes: h.episodes.clone(),
            scored_days: h.scored_days,
        },
        other => panic!("expected a histogram, got {other:?}"),
    }
}

/// Element-wise agreement of two moment sums: counts exactly, cross-products
/// to 1e-12 relative (the aggregator may add in another order; common
/// practice for floating-point sums).
fn assert_moments_eq(got: &ResidualMoments, want: &ResidualMoments) {
    assert_eq!(got.count, want.count);
    for j in 0..N_SIGNALS {
        for k in 0..N_SIGNALS {
            let (g, w) = (got.cross[j][k], want.cross[j][k]);
            assert!(
                (g - w).abs() <= 1e-12 * w.abs().max(1.0),
                "cross[{j}][{k}]: {g} vs {w}"
            );
        }
    }
}

fn sum_moments<'a>(parts: impl IntoIterator<Item = &'a ResidualMoments>) -> ResidualMoments {
    let mut s = ResidualMoments::default();
    for p in parts {
        s.merge(p);
    }
    s
}

/// Sums equal the per-device sums computed directly with the device's own
/// `merge` (the definition of the aggregate; common practice), no partial
/// sum is published, the histogram stage opens only after the moments stage,
/// and each stage completes exactly when the last device submits.
#[tokio::test]
async fn published_sums_equal_the_per_device_sums_and_complete_when_all_submitted() {
    let dir = tempfile::tempdir().unwrap();
    let (server, creds) = trained(&dir.path().join("agg.db"), 3).await;
    let mut client = server.client();
    let per_device: Vec<ResidualMoments> = (0..3)
        .map(|i| random_moments(100 + i, 60 + 10 * i as usize))
        .collect();

    // Before the moments stage completes, the histogram stage is closed.
    let err = submit(&mut client, &creds[0], histogram(&random_histogram(1, 50)))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::FailedPrecondition, "{}", err.message());
    assert!(
        err.message().starts_with("SubmitDetectionStats: stage"),
        "{}",
        err.message()
    );

    for i in 0..2 {
        let r = submit(&mut client, &creds[i], moments(&per_device[i]))
            .await
            .unwrap();
        assert_eq!(r.devices_submitted, i as u32 + 1);
        assert!(!r.stage_complete);
    }
    let partial = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert!(partial.open && !partial.complete && partial.device_submitted);
    assert_eq!(
        (partial.devices_submitted, partial.devices_expected),
        (2, 3)
    );
    assert!(partial.sum.is_none(), "a partial sum is never published");
    assert!(partial.deadline_unix_ms > 0);

    let r = submit(&mut client, &creds[2], moments(&per_device[2]))
        .await
        .unwrap();
    assert!(
        r.stage_complete,
        "the last expected device completes the stage"
    );
    let done = view(&mut client, &creds[1], pb::DetectionStage::ResidualMoments).await;
    assert!(done.complete && !done.open);
    assert_eq!(done.devices_submitted, 3);
    assert_moments_eq(&published_moments(&done), &sum_moments(&per_device));

    // Stage 2.
    let hists: Vec<EpisodeHistogram> = (0..3).map(|i| random_histogram(7 + i, 80 + i)).collect();
    let opened = view(&mut client, &creds[0], pb::DetectionStage::EpisodeHistogram).await;
    assert!(opened.open && !opened.complete);
    for (c, h) in creds.iter().zip(&hists) {
        submit(&mut client, c, histogram(h)).await.unwrap();
    }
    let mut want = EpisodeHistogram::default();
    for h in &hists {
        want.merge(h);
    }
    let done = view(&mut client, &creds[2], pb::DetectionStage::EpisodeHistogram).await;
    assert!(done.complete);
    assert_eq!(published_histogram(&done), want);
    server.stop().await;
}

/// `refused` is INVALID_ARGUMENT, names the RPC first and then `field`.
fn assert_refused(refused: tonic::Status, field: &str) {
    assert_eq!(
        refused.code(),
        Code::InvalidArgument,
        "{}",
        refused.message()
    );
    assert!(
        refused.message().starts_with("SubmitDetectionStats: ")
            && refused.message().contains(field),
        "message `{}` should name the RPC and `{field}`",
        refused.message()
    );
}

/// Wrong lengths, non-finite values, negative counts (a negative int64 is the
/// same varint as a uint64 above 2⁶³) and impossible counts are refused with
/// the RPC and the field named, and the stored state is unchanged: the
/// device's earlier valid submission is the one that enters the sum (common
/// practice: validate before any write).
#[tokio::test]
async fn bad_submissions_are_refused_naming_rpc_and_field_and_store_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let (server, creds) = trained(&dir.path().join("agg.db"), 2).await;
    let mut client = server.client();
    let good = random_moments(5, 40);
    submit(&mut client, &creds[0], moments(&good))
        .await
        .unwrap();

    let mut short = moments_to_pb(&good);
    short.cross_products.pop();
    let err = submit(&mut client, &creds[0], Stats::ResidualMoments(short))
        .await
        .unwrap_err();
    assert_refused(err, "residual_moments.cross_products");

    let mut nan = moments_to_pb(&good);
    nan.cross_products[8] = f64::NAN;
    let err = submit(&mut client, &creds[0], Stats::ResidualMoments(nan))
        .await
        .unwrap_err();
    assert_refused(err, "residual_moments.cross_products[8]");

    let mut negative = moments_to_pb(&good);
    negative.pair_days[3] = (-1i64) as u64;
    let err = submit(&mut client, &creds[0], Stats::ResidualMoments(negative))
        .await
        .unwrap_err();
    assert_refused(err, "residual_moments.pair_days[3]");

    let mut asymmetric = moments_to_pb(&good);
    asymmetric.cross_products[1] += 1.0;
    let err = submit(&mut client, &creds[0], Stats::ResidualMoments(asymmetric))
        .await
        .unwrap_err();
    assert_refused(err, "residual_moments.cross_products[1]");

    let err = client
        .submit_detection_stats(authorized(
            &creds[0],
            pb::SubmitDetectionStatsRequest {
                study_id: STUDY.into(),
                device_id: creds[0].device_id,
                stats: None,
            },
        ))
        .await
        .unwrap_err();
    assert_refused(err, "stats");

    let v = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert_eq!(v.devices_submitted, 1, "no refused submission was stored");

    // Complete the stage: the sum holds device 0's valid submission.
    let other = random_moments(6, 30);
    submit(&mut client, &creds[1], moments(&other))
        .await
        .unwrap();
    let done = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert_moments_eq(&published_moments(&done), &sum_moments([&good, &other]));

    // Histogram: wrong length, negative count, more episodes than days.
    let h = random_histogram(3, 60);
    let mut wrong = histogram_to_pb(&h);
    wrong.episodes.truncate(149);
    let err = submit(&mut client, &creds[0], Stats::EpisodeHistogram(wrong))
        .await
        .unwrap_err();
    assert_refused(err, "episode_histogram.episodes");
    let mut negative = histogram_to_pb(&h);
    negative.scored_days = (-5i64) as u64;
    let err = submit(&mut client, &creds[0], Stats::EpisodeHistogram(negative))
        .await
        .unwrap_err();
    assert_refused(err, "episode_histogram.scored_days");
    let mut too_many = histogram_to_pb(&h);
    too_many.episodes[10] = 61;
    let err = submit(&mut client, &creds[0], Stats::EpisodeHistogram(too_many))
        .await
        .unwrap_err();
    assert_refused(err, "episode_histogram.episodes[10]");
    let v = view(&mut client, &creds[0], pb::DetectionStage::EpisodeHistogram).await;
    assert_eq!(v.devices_submitted, 0);
    assert!(!v.device_submitted);
    server.stop().await;
}

/// While a stage is open a resubmission replaces the device's earlier one and
/// an identical repeat is a no-op; once complete, an identical repeat is
/// answered as before and a changed one is refused (common practice:
/// idempotent retries, immutable published aggregates).
#[tokio::test]
async fn a_resubmission_replaces_until_the_stage_completes() {
    let dir = tempfile::tempdir().unwrap();
    let (server, creds) = trained(&dir.path().join("agg.db"), 2).await;
    let mut client = server.client();
    let first = random_moments(1, 20);
    let second = random_moments(2, 25);
    let other = random_moments(3, 30);
    submit(&mut client, &creds[0], moments(&first))
        .await
        .unwrap();
    let r = submit(&mut client, &creds[0], moments(&second))
        .await
        .unwrap();
    assert_eq!(
        r.devices_submitted, 1,
        "a resubmission replaces, it does not add"
    );
    let r = submit(&mut client, &creds[0], moments(&second))
        .await
        .unwrap();
    assert_eq!(r.devices_submitted, 1);
    submit(&mut client, &creds[1], moments(&other))
        .await
        .unwrap();
    let done = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert_moments_eq(&published_moments(&done), &sum_moments([&second, &other]));

    let again = submit(&mut client, &creds[0], moments(&second))
        .await
        .unwrap();
    assert!(again.stage_complete);
    assert_eq!(again.devices_submitted, 2);
    let err = submit(&mut client, &creds[0], moments(&first))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::FailedPrecondition);
    assert!(
        err.message().starts_with("SubmitDetectionStats: stage"),
        "{}",
        err.message()
    );
    let after = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert_eq!(after.sum, done.sum, "a published sum never changes");
    server.stop().await;
}

/// Both RPCs check the device credential first, like every device RPC
/// (DEVELOPERS.md, service invariant): none or a wrong secret is
/// UNAUTHENTICATED, another device's id is PERMISSION_DENIED.
#[tokio::test]
async fn calls_without_a_valid_credential_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let (server, creds) = trained(&dir.path().join("agg.db"), 2).await;
    let mut client = server.client();
    let m = random_moments(1, 10);
    let bare = pb::SubmitDetectionStatsRequest {
        study_id: STUDY.into(),
        device_id: creds[0].device_id,
        stats: Some(moments(&m)),
    };
    let err = client
        .submit_detection_stats(bare.clone())
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::Unauthenticated);
    assert!(
        err.message()
            .starts_with("SubmitDetectionStats: authorization"),
        "{}",
        err.message()
    );
    let forged = DeviceCredential {
        device_id: creds[0].device_id,
        secret: "0".repeat(64),
    };
    let err = client
        .submit_detection_stats(authorized(&forged, bare.clone()))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::Unauthenticated);
    let err = client
        .submit_detection_stats(authorized(&creds[1], bare))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::PermissionDenied);
    assert!(err.message().contains("device_id"), "{}", err.message());

    let get = pb::GetDetectionCalibrationRequest {
        study_id: STUDY.into(),
        device_id: creds[0].device_id,
        stage: pb::DetectionStage::ResidualMoments as i32,
        wait_ms: 0,
    };
    let err = client
        .get_detection_calibration(get.clone())
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::Unauthenticated);
    assert!(
        err.message()
            .starts_with("GetDetectionCalibration: authorization"),
        "{}",
        err.message()
    );
    let err = client
        .get_detection_calibration(authorized(&forged, get))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::Unauthenticated);
    let v = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert_eq!(v.devices_submitted, 0, "nothing was stored");
    server.stop().await;
}

/// A coordinator reopened on the same SQLite file keeps the submissions and
/// a published sum (common practice: state survives a restart).
#[tokio::test]
async fn a_restart_keeps_the_submitted_stats() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let (server, creds) = trained(&db, 2).await;
    let mut client = server.client();
    let a = random_moments(11, 50);
    let b = random_moments(12, 50);
    submit(&mut client, &creds[0], moments(&a)).await.unwrap();
    server.stop().await;

    let server = TestServer::start(&db, vec![]).await;
    let mut client = server.client();
    let v = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert!(v.device_submitted && v.open);
    assert_eq!(v.devices_submitted, 1);
    let r = submit(&mut client, &creds[1], moments(&b)).await.unwrap();
    assert!(r.stage_complete);
    let before = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments).await;
    assert_moments_eq(&published_moments(&before), &sum_moments([&a, &b]));
    server.stop().await;

    let server = TestServer::start(&db, vec![]).await;
    let mut client = server.client();
    let after = view(&mut client, &creds[1], pb::DetectionStage::ResidualMoments).await;
    assert!(after.complete);
    assert_eq!(after.sum, before.sum);
    assert!(
        view(&mut client, &creds[1], pb::DetectionStage::EpisodeHistogram)
            .await
            .open
    );
    assert_eq!(
        server.coordinator.integrity_check().unwrap(),
        vec!["ok".to_string()]
    );
    server.stop().await;
}

/// Past its deadline a stage completes with a quorum of the study's
/// `min_quorum` devices, not before and not without it (the round rule of
/// the aggregator, reused). The deadline check is driven directly through
/// `Coordinator::tick` with a time after the deadline: no sleeping.
#[tokio::test]
async fn past_the_deadline_a_quorum_completes_the_stage() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = study_config(STUDY, &[Signal::RestingHr], 3, 1);
    config.min_quorum = 2;
    let server = TestServer::start(&dir.path().join("agg.db"), vec![config]).await;
    let mut creds = Vec::new();
    for i in 0..3 {
        creds.push(
            server
                .enroll(
                    STUDY,
                    &format!("q-{i}"),
                    &["resting_hr_bpm"],
                    FlagSharing::Withheld,
                )
                .await,
        );
    }
    let mut client = server.client();
    for c in &creds {
        let update = pb::SubmitUpdateRequest {
            study_id: STUDY.into(),
            device_id: c.device_id,
            round_id: 1,
            updates: vec![pb::SignalUpdate {
                signal: "resting_hr_bpm".into(),
                values: PriorParams::initial(Signal::RestingHr).values.to_vec(),
                n_days: 10,
                local_loss: 1.0,
            }],
        };
        client.submit_update(authorized(c, update)).await.unwrap();
    }
    let a = random_moments(21, 30);
    let b = random_moments(22, 30);
    submit(&mut client, &creds[0], moments(&a)).await.unwrap();
    let deadline = view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments)
        .await
        .deadline_unix_ms;
    // One submission is short of the quorum even after the deadline.
    server.coordinator.tick(deadline + 1).unwrap();
    assert!(
        !view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments)
            .await
            .complete
    );
    submit(&mut client, &creds[1], moments(&b)).await.unwrap();
    // Two of three before the deadline: still waiting for the third.
    server.coordinator.tick(now_ms()).unwrap();
    assert!(
        !view(&mut client, &creds[0], pb::DetectionStage::ResidualMoments)
            .await
            .complete
    );
    assert!(server.coordinator.tick(deadline + 1).unwrap());
    let done = view(&mut client, &creds[2], pb::DetectionStage::ResidualMoments).await;
    assert!(done.complete && !done.device_submitted);
    assert_eq!(done.devices_submitted, 2);
    assert_moments_eq(&published_moments(&done), &sum_moments([&a, &b]));
    server.stop().await;
}

/// End to end: a federated run where every device calibrates over gRPC ends
/// with each device holding the calibration computed in process from the
/// same per-device statistics (the path `plimsoll evaluate` takes in
/// process), and writing it as `calibration.json`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_device_ends_with_the_cohort_calibration() {
    let root = tempfile::tempdir().unwrap();
    let cohort_dir = root.path().join("cohort");
    let scenario = Scenario::from_path(
        &PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/quick.toml"),
    )
    .unwrap();
    let sim = SimulateOptions {
        seed: Some(5),
        participants: Some(6),
        days: Some(90),
    };
    plimsoll_device::cohort::simulate_to_dir(&scenario, &sim, &cohort_dir, &mut |_, _| {}).unwrap();
    let cohort = read_cohort(&cohort_dir, BadRowPolicy::Quarantine).unwrap();
    let signals = cohort_signals(&cohort);
    let config = study_config("e2e-calib", &signals, cohort.participants.len() as u32, 2);
    let budget = config.alert_budget_per_participant_month;
    let devices_dir = root.path().join("devices");
    let run = run_federated(
        &cohort,
        config,
        &root.path().join("agg.db"),
        &devices_dir,
        None,
    )
    .await
    .unwrap();

    let latest = run.history.last().unwrap();
    let priors: Vec<PriorParams> = latest
        .params
        .iter()
        .map(|p| PriorParams::from_slice(p.signal.parse().unwrap(), &p.values).unwrap())
        .collect();
    let cfg = DetectConfig::default();
    let mut summed = ResidualMoments::default();
    for series in &cohort.participants {
        summed.merge(&device_moments(series, &priors, &cfg).unwrap());
    }
    let correlation = cohort_correlation(&summed);
    let mut hist = EpisodeHistogram::default();
    for series in &cohort.participants {
        hist.merge(&device_histogram(series, &priors, &correlation, &cfg).unwrap());
    }
    let n = cohort.participants.len() as u32;
    let want = StudyCalibration::new(correlation, hist, budget, n, n);
    assert!(want.histogram.scored_days > 0);
    assert_eq!(run.reports.len(), cohort.participants.len());
    for report in &run.reports {
        let got = &report.calibration;
        assert_eq!(got.histogram, want.histogram, "{}", report.participant);
        assert_eq!(got.alert, want.alert);
        assert_eq!(got.watch, want.watch);
        assert_eq!((got.moment_devices, got.histogram_devices), (n, n));
        for j in 0..N_SIGNALS {
            for k in 0..N_SIGNALS {
                let (g, w) = (got.correlation.matrix[j][k], want.correlation.matrix[j][k]);
                // Same sums up to addition order (1e-12 relative), through an eigen-
                // decomposition: agreement to 1e-9 (common practice).
                assert!(
                    (g - w).abs() < 1e-9,
                    "{}: R[{j}][{k}] {g} vs {w}",
                    report.participant
                );
            }
        }
        let file = devices_dir.join(&report.participant).join(CALIBRATION_FILE);
        let written: StudyCalibration =
            serde_json::from_str(&std::fs::read_to_string(&file).unwrap()).unwrap();
        assert_eq!(&written, got);
    }
}

/// The aggregator's fixed lengths are the detector's, the signal order is
/// the one the proto's `ResidualMomentSums` comment states, and entry (j, k)
/// travels at index 6·j + k (one contract checked at both ends; common
/// practice).
#[test]
fn the_wire_layout_matches_the_detector() {
    assert_eq!(plimsoll_server::detection::MOMENT_SIGNALS, N_SIGNALS);
    assert_eq!(plimsoll_server::detection::HISTOGRAM_EDGES, N_EDGES);
    let order: Vec<&str> = Signal::ALL.iter().map(|s| s.column()).collect();
    assert_eq!(
        order,
        [
            "resting_hr_bpm",
            "hrv_rmssd_ms",
            "sleep_h",
            "skin_temp_delta_c",
            "steps",
            "resp_rate_brpm"
        ]
    );
    let m = random_moments(9, 40);
    let wire = moments_to_pb(&m);
    assert_eq!(wire.cross_products[2 * N_SIGNALS + 5], m.cross[2][5]);
    assert_eq!(wire.pair_days[5 * N_SIGNALS + 1], m.count[5][1]);
    assert_eq!(moments_from_pb("m", &wire).unwrap(), m);
}
