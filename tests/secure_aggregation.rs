//! Secure aggregation over gRPC: a real aggregator on loopback and devices that run the
//! protocol through `SecureStep`, some of them dropping out at each phase, one lying about
//! its share. The references are FedAvg computed in clear on the same updates
//! (`plimsoll_server::study::fedavg`, McMahan et al. 2017) and the plain sum of the same
//! encoded inputs.

use std::sync::Arc;

use plimsoll_device::client::{FlagSharing, authorized};
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_server::secagg::{self, shamir};
use plimsoll_server::secure_round::{DeviceMessage, SecureNext, SecureTask, decode_slots};
use plimsoll_server::study::SecureAggregation;
use plimsoll_server::wire::{device_message_to_pb, secure_next_from_pb, secure_task_from_pb};

use crate::support::{TestServer, study_config};

const STUDY: &str = "secure";

/// Where a test device stops taking part.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Stop {
    /// Runs to the end.
    Never,
    /// Advertises its keys, then never sends its shares.
    BeforeShares,
    /// Sends its shares, then never its masked input.
    BeforeMasked,
    /// Sends its masked input, then never its unmasking shares.
    BeforeUnmasking,
}

/// A test device's round: the task's description and its fixed (not trained) update.
struct TestDevice {
    credential: DeviceCredential,
    task: SecureTask,
    round_id: u64,
    plain: Vec<f64>,
}

/// Fetches `credential`'s task and checks it asks for a secure round.
async fn fetch(server: &TestServer, credential: &DeviceCredential) -> (u64, SecureTask) {
    let r = authorized(
        credential,
        pb::FetchTaskRequest {
            study_id: STUDY.into(),
            device_id: credential.device_id,
            wait_ms: 5_000,
        },
    );
    let work = server
        .client()
        .fetch_task(r)
        .await
        .unwrap()
        .into_inner()
        .work;
    let Some(pb::fetch_task_response::Work::Task(task)) = work else {
        panic!("expected a task, got {work:?}");
    };
    let secure = secure_task_from_pb(task.secure.expect("a secure task")).unwrap();
    (task.round_id, secure)
}

/// One `SecureStep` call.
async fn step(
    server: &TestServer,
    d: &TestDevice,
    message: Option<&DeviceMessage>,
) -> Result<SecureNext, tonic::Status> {
    let r = authorized(
        &d.credential,
        pb::SecureStepRequest {
            study_id: STUDY.into(),
            device_id: d.credential.device_id,
            round_id: d.round_id,
            wait_ms: 5_000,
            message: message.map(device_message_to_pb),
            stage: 0,
        },
    );
    let answer = server.client().secure_step(r).await?.into_inner();
    Ok(secure_next_from_pb(answer).unwrap())
}

/// Runs `d` through the round until `stop`; with `lie`, its first revealed share is off by
/// one. Returns the final answer (`None` when it stopped early).
async fn run(server: &TestServer, d: &TestDevice, stop: Stop, lie: bool) -> Option<SecureNext> {
    let encoded = d.task.codec().unwrap().encode(&d.plain).unwrap();
    let params = d.task.params().unwrap();
    let (mut device, keys) =
        secagg::Device::new(d.credential.device_id, params, &mut rand::rng()).unwrap();
    let mut message = Some(DeviceMessage::Keys(keys));
    loop {
        let next = step(server, d, message.as_ref()).await.unwrap();
        message = match next {
            SecureNext::Broadcast(_) if stop == Stop::BeforeShares => return None,
            SecureNext::Relay(_) if stop == Stop::BeforeMasked => return None,
            SecureNext::Request(_) if stop == Stop::BeforeUnmasking => return None,
            SecureNext::Broadcast(b) => Some(DeviceMessage::ShareKeys(
                device.share_keys(&b, &mut rand::rng()).unwrap(),
            )),
            SecureNext::Relay(r) => Some(DeviceMessage::Masked(
                device.masked_input(&r, &encoded).unwrap(),
            )),
            SecureNext::Request(r) => {
                let mut response = device.unmask(&r).unwrap();
                if lie {
                    let s = &mut response.shares[0].share[0];
                    *s = (*s + 1) % shamir::P;
                }
                Some(DeviceMessage::Unmasking(response))
            }
            SecureNext::Wait(_) => None,
            done @ SecureNext::Finished { .. } => return Some(done),
            SecureNext::Start(task) => panic!("a training round offered a session: {task:?}"),
        };
    }
}

/// One secure round run honestly by every device of `credentials`: device `k` fetches its
/// task, takes `input(k, &task, current)` as its plain input (`current`: the signal's shared
/// parameters) and runs to the end; every device must end with its input in the sum.
async fn honest_round<F>(server: &Arc<TestServer>, credentials: &[DeviceCredential], input: F)
where
    F: Fn(usize, &SecureTask, &[f64]) -> Vec<f64> + Send + Sync + 'static,
{
    let input = Arc::new(input);
    let mut tasks = tokio::task::JoinSet::new();
    for (k, credential) in credentials.iter().enumerate() {
        let (server, credential, input) = (server.clone(), credential.clone(), input.clone());
        tasks.spawn(async move {
            let (round_id, task) = fetch(&server, &credential).await;
            let current = server.coordinator.prior(STUDY, None).unwrap().params[0]
                .values
                .clone();
            let plain = input(k, &task, &current);
            let d = TestDevice {
                credential,
                task,
                round_id,
                plain,
            };
            run(&server, &d, Stop::Never, false).await
        });
    }
    while let Some(joined) = tasks.join_next().await {
        let answer = joined.unwrap();
        assert!(
            matches!(answer, Some(SecureNext::Finished { included: true, .. })),
            "{answer:?}"
        );
    }
}

/// A study of one signal with `n` devices, every one selected each round.
fn secure_study(n: u32, rounds: u32, phase_ms: u64) -> plimsoll_server::StudyConfig {
    let mut config = study_config(STUDY, &[Signal::RestingHr], n, rounds);
    config.min_quorum = 2;
    config.secure_aggregation = Some(SecureAggregation {
        phase_deadline_ms: phase_ms,
        ..Default::default()
    });
    config
}

/// Device `k`'s update: the initial parameters moved by small amounts, `20 + 3k` days and a
/// per-day loss of `0.4 + 0.05k`.
fn update(initial: &[f64], k: usize) -> (Vec<f64>, u32, f64) {
    let values = initial
        .iter()
        .enumerate()
        .map(|(j, v)| v + 0.01 * (k as f64 + 1.0) * (j as f64 - 3.0))
        .collect();
    (values, 20 + 3 * k as u32, 0.4 + 0.05 * k as f64)
}

/// Enrols `n` devices and fetches their tasks; device `k` gets [`update`]`(k)`.
async fn devices(server: &TestServer, n: usize) -> (Vec<TestDevice>, Vec<(Vec<f64>, u32, f64)>) {
    let initial = server.coordinator.prior(STUDY, None).unwrap().params[0]
        .values
        .clone();
    let mut credentials = Vec::new();
    for k in 0..n {
        credentials.push(
            server
                .enroll(
                    STUDY,
                    &format!("p{k}"),
                    &["resting_hr_bpm"],
                    FlagSharing::Withheld,
                )
                .await,
        );
    }
    let mut out = Vec::new();
    let mut updates = Vec::new();
    for (k, credential) in credentials.into_iter().enumerate() {
        let (round_id, task) = fetch(server, &credential).await;
        let u = update(&initial, k);
        let plain = task
            .plain_input(&[("resting_hr_bpm", &u.0, u.1, u.2)])
            .unwrap();
        updates.push(u);
        out.push(TestDevice {
            credential,
            task,
            round_id,
            plain,
        });
    }
    (out, updates)
}

/// Nine devices, t = 6: one drops after advertising its keys, one after sending its shares,
/// one after sending its masked input. The prior published is exactly the decoded plain sum
/// of the seven masked inputs (bit for bit), equals FedAvg in clear over those seven to the
/// fixed-point error, and no individual update is stored.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_secure_round_survives_drops_at_each_phase_and_publishes_fedavg_of_the_sum() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let server = TestServer::start(&db, vec![secure_study(9, 1, 400)]).await;
    let (devs, updates) = devices(&server, 9).await;
    assert_eq!(devs[0].task.members.len(), 9);
    assert_eq!(devs[0].task.threshold, 6, "t = n − ⌊n/3⌋");

    // A plain SubmitUpdate is refused in a secure study.
    let refused = server
        .client()
        .submit_update(authorized(
            &devs[0].credential,
            pb::SubmitUpdateRequest {
                study_id: STUDY.into(),
                device_id: devs[0].credential.device_id,
                round_id: devs[0].round_id,
                updates: vec![pb::SignalUpdate {
                    signal: "resting_hr_bpm".into(),
                    values: updates[0].0.clone(),
                    n_days: updates[0].1,
                    local_loss: updates[0].2,
                }],
            },
        ))
        .await
        .unwrap_err();
    assert_eq!(refused.code(), tonic::Code::FailedPrecondition);
    assert!(refused.message().contains("SecureStep"), "{refused:?}");
    // A malformed key names its field.
    let bad = server
        .client()
        .secure_step(authorized(
            &devs[0].credential,
            pb::SecureStepRequest {
                study_id: STUDY.into(),
                device_id: devs[0].credential.device_id,
                round_id: devs[0].round_id,
                wait_ms: 0,
                message: Some(pb::secure_step_request::Message::Keys(pb::SecAggKeys {
                    c_public: vec![0; 31],
                    s_public: vec![0; 32],
                })),
                stage: 0,
            },
        ))
        .await
        .unwrap_err();
    assert_eq!(bad.code(), tonic::Code::InvalidArgument);
    assert!(bad.message().contains("keys.c_public: 31 bytes"), "{bad:?}");

    let stops = [
        Stop::BeforeShares,
        Stop::BeforeMasked,
        Stop::BeforeUnmasking,
        Stop::Never,
        Stop::Never,
        Stop::Never,
        Stop::Never,
        Stop::Never,
        Stop::Never,
    ];
    let server = Arc::new(server);
    let devs = Arc::new(devs);
    let mut tasks = tokio::task::JoinSet::new();
    for (k, stop) in stops.into_iter().enumerate() {
        let (server, devs) = (server.clone(), devs.clone());
        tasks.spawn(async move { (k, run(&server, &devs[k], stop, false).await) });
    }
    let mut finished = Vec::new();
    while let Some(joined) = tasks.join_next().await {
        let (k, answer) = joined.unwrap();
        match answer {
            Some(SecureNext::Finished { included, reason }) => {
                assert!(included, "device {k}: {reason}");
                finished.push(k);
            }
            None => assert_ne!(stops[k], Stop::Never),
            other => panic!("device {k}: {other:?}"),
        }
    }
    assert_eq!(finished.len(), 6);

    // The seven masked inputs (the last dropout's too: its self-mask was reconstructed).
    let in_sum: Vec<usize> = (2..9).collect();
    let codec = devs[0].task.codec().unwrap();
    let mut ring = vec![0u64; devs[0].task.vector_len()];
    for &k in &in_sum {
        for (r, e) in ring.iter_mut().zip(codec.encode(&devs[k].plain).unwrap()) {
            *r = r.wrapping_add(e);
        }
    }
    let decoded = codec.decode_sum(&ring, in_sum.len() as u64).unwrap();
    let (expected, expected_contrib) = decode_slots(&devs[0].task.slots, &decoded);

    let prior = server.coordinator.prior(STUDY, None).unwrap();
    assert_eq!(prior.version, 1);
    assert_eq!(prior.params[0].values, expected[0].values, "bit for bit");
    assert_eq!(prior.contributions, expected_contrib);
    assert_eq!(prior.contributions[0].n_devices, 7);
    let days: u32 = in_sum.iter().map(|&k| updates[k].1).sum();
    assert_eq!(prior.contributions[0].n_days, u64::from(days));

    // FedAvg in clear over the same seven updates, to the fixed-point error: each encoded
    // value is within 2^−25 and |Σ n| ≥ 1, so 7 · 2^−25 · max|n θ| / Σ n bounds it loosely.
    let clear: Vec<(&[f64], u32)> = in_sum
        .iter()
        .map(|&k| (updates[k].0.as_slice(), updates[k].1))
        .collect();
    let fedavg = plimsoll_server::study::fedavg(&clear).unwrap();
    for (a, b) in prior.params[0].values.iter().zip(&fedavg) {
        assert!((a - b).abs() < 1e-6, "{a} vs FedAvg in clear {b}");
    }
    let loss: f64 = in_sum
        .iter()
        .map(|&k| updates[k].2 * f64::from(updates[k].1))
        .sum::<f64>()
        / f64::from(days);
    assert!((prior.contributions[0].mean_local_loss - loss).abs() < 1e-6);

    // The aggregator stored no individual update.
    let store = plimsoll_server::store::Store::open(&crate::support::db_location(&db)).unwrap();
    for d in devs.iter() {
        assert_eq!(
            store.submission(STUDY, 1, d.credential.device_id).unwrap(),
            None
        );
    }
}

/// Four devices (t = 3), all answering every phase; one lies about a share. With four
/// shares of each secret the server sees they lie on no single polynomial: the round fails
/// safely (nothing published, every device told it is not in a sum) and runs again; the
/// honest rerun publishes.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_lying_share_fails_the_round_safely_and_the_round_runs_again() {
    let dir = tempfile::tempdir().unwrap();
    let server =
        TestServer::start(&dir.path().join("agg.db"), vec![secure_study(4, 1, 2_000)]).await;
    let (devs, _) = devices(&server, 4).await;
    let server = Arc::new(server);
    let devs = Arc::new(devs);
    let mut tasks = tokio::task::JoinSet::new();
    for k in 0..4 {
        let (server, devs) = (server.clone(), devs.clone());
        tasks.spawn(async move { run(&server, &devs[k], Stop::Never, k == 1).await });
    }
    while let Some(joined) = tasks.join_next().await {
        match joined.unwrap() {
            Some(SecureNext::Finished { included, reason }) => {
                assert!(!included, "{reason}");
                assert!(reason.contains("failed and is run again"), "{reason}");
                assert!(reason.contains("inconsistent"), "{reason}");
            }
            other => panic!("{other:?}"),
        }
    }
    let status = server.coordinator.status(STUDY).unwrap();
    assert_eq!(
        status.prior_version, 0,
        "nothing published from a failed round"
    );
    assert_eq!(status.current_round, 2, "the round runs again");

    // The rerun, everyone honest, with the same inputs.
    let credentials: Vec<DeviceCredential> = devs.iter().map(|d| d.credential.clone()).collect();
    let plains: Vec<Vec<f64>> = devs.iter().map(|d| d.plain.clone()).collect();
    honest_round(&server, &credentials, move |k, _, _| plains[k].clone()).await;
    let prior = server.coordinator.prior(STUDY, None).unwrap();
    assert_eq!((prior.version, prior.round_id), (1, 2));
    assert_eq!(prior.contributions[0].n_devices, 4);
}

/// A restart in the middle of a secure round runs the round again (its protocol state was
/// in memory only); a late message for the old round is told it is not in any sum; and a
/// study asking for a robust rule or per-sensor-model terms with secure aggregation is
/// refused.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_restart_runs_the_secure_round_again_and_robust_rules_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let server = TestServer::start(&db, vec![secure_study(3, 1, 2_000)]).await;
    let (devs, _) = devices(&server, 3).await;
    let (_, keys) = secagg::Device::new(
        devs[0].credential.device_id,
        devs[0].task.params().unwrap(),
        &mut rand::rng(),
    )
    .unwrap();
    let first = step(&server, &devs[0], Some(&DeviceMessage::Keys(keys)))
        .await
        .unwrap();
    assert!(matches!(first, SecureNext::Wait(_)), "{first:?}");
    server.stop().await;

    let coordinator =
        Arc::new(plimsoll_server::Coordinator::open(&crate::support::db_location(&db)).unwrap());
    let status = coordinator.status(STUDY).unwrap();
    assert_eq!(
        status.current_round, 2,
        "round 1 is run again after the restart"
    );
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let running = plimsoll_server::serve(coordinator.clone(), listener)
        .await
        .unwrap();
    let channel = plimsoll_device::client::connect_lazy(running.addr).unwrap();
    let late = pb::aggregator_client::AggregatorClient::new(channel)
        .secure_step(authorized(
            &devs[1].credential,
            pb::SecureStepRequest {
                study_id: STUDY.into(),
                device_id: devs[1].credential.device_id,
                round_id: 1,
                wait_ms: 0,
                message: None,
                stage: 0,
            },
        ))
        .await
        .unwrap()
        .into_inner();
    let late = secure_next_from_pb(late).unwrap();
    assert!(
        matches!(
            late,
            SecureNext::Finished {
                included: false,
                ..
            }
        ),
        "{late:?}"
    );
    running.shutdown().await.unwrap();

    let mut robust = secure_study(3, 1, 2_000);
    robust.study_id = "robust".into();
    robust.aggregation.rule = plimsoll_server::aggregate::AggregationRule::Median;
    let e = robust.validate().unwrap_err();
    assert!(e.contains("cannot run"), "{e}");
    let mut models = secure_study(3, 1, 2_000);
    models.sensor_models = Some(plimsoll_server::study::SensorModels {
        models: vec!["a".into(), "b".into()],
        params: vec!["mean_z".into()],
        min_devices: 1,
        column: None,
    });
    let e = models.validate().unwrap_err();
    assert!(e.contains("sensor_models"), "{e}");
}

/// The calibration stages under secure aggregation: six devices in two groups send known
/// statistics through each stage's secure sums, in two sessions of three (at most four
/// devices per session). The published sums equal the element-wise
/// sums of the same statistics (`DetectionStats::add`; integer counts exactly, residual
/// cross-products to the fixed-point error), each device's histogram sum is its group's
/// when the study calibrates per group, no device's statistics are stored, and a plain
/// `SubmitDetectionStats` is refused.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn calibration_stages_are_summed_securely_per_group() {
    use plimsoll_device::client::{EnrollmentRequest, enroll, new_device_secret};
    use plimsoll_server::detection::{DetectionStage, DetectionStats, HISTOGRAM_EDGES};

    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("agg.db");
    let mut config = secure_study(6, 1, 2_000);
    config.secure_aggregation = Some(SecureAggregation {
        phase_deadline_ms: 2_000,
        max_session_devices: 4,
        ..Default::default()
    });
    config.subgroups = Some(plimsoll_server::study::Subgroups {
        column: "site".into(),
        levels: vec!["north".into(), "south".into()],
        calibrate_per_group: true,
        min_devices_per_group: 2,
    });
    let server = TestServer::start(&db, vec![config]).await;
    let mut credentials = Vec::new();
    for k in 0..6 {
        credentials.push(
            enroll(
                &mut server.client(),
                EnrollmentRequest {
                    study_id: STUDY,
                    enrollment_code: server.code(STUDY),
                    participant: &format!("p{k}"),
                    signals: vec!["resting_hr_bpm".into()],
                    sharing: FlagSharing::Withheld,
                    device_secret: &new_device_secret(),
                    sensor_model: "",
                    group_label: if k % 2 == 0 { "north" } else { "south" },
                },
            )
            .await
            .unwrap(),
        );
    }
    // The one training round, securely.
    let initial = server.coordinator.prior(STUDY, None).unwrap().params[0]
        .values
        .clone();
    let server = Arc::new(server);
    honest_round(&server, &credentials, move |k, task, _| {
        let u = update(&initial, k);
        task.plain_input(&[("resting_hr_bpm", &u.0, u.1, u.2)])
            .unwrap()
    })
    .await;

    // Moments of a made-up residual series (valid by construction): day d, signal i has
    // residual sin(d + i + k); every pair is observed on all 30 + k days.
    let moments = |k: usize| {
        let days = 30 + k;
        let r = |d: usize, i: usize| ((d + i + k) as f64).sin();
        DetectionStats::ResidualMoments {
            cross_products: (0..36)
                .map(|ij| (0..days).map(|d| r(d, ij / 6) * r(d, ij % 6)).sum())
                .collect(),
            pair_days: vec![days as u64; 36],
        }
    };
    let histogram = |k: usize| DetectionStats::EpisodeHistogram {
        episodes: (0..HISTOGRAM_EDGES as u64)
            .map(|i| (40u64 + k as u64).saturating_sub(i / 4))
            .collect(),
        scored_days: 90 + 10 * k as u64,
    };

    // A plain submission is refused.
    let refused = server
        .coordinator
        .submit_detection_stats(STUDY, credentials[0].device_id, &moments(0), now())
        .unwrap_err();
    assert!(refused.to_string().contains("SecureStep"), "{refused}");

    for stage in DetectionStage::ALL {
        let stats = |k| match stage {
            DetectionStage::ResidualMoments => moments(k),
            DetectionStage::EpisodeHistogram => histogram(k),
        };
        let mut tasks = tokio::task::JoinSet::new();
        for (k, credential) in credentials.iter().enumerate() {
            let (server, credential, s) = (server.clone(), credential.clone(), stats(k));
            tasks.spawn(async move {
                let client = server.client();
                plimsoll_device::secure::secure_stage_submit(
                    &client,
                    &credential,
                    STUDY,
                    &s,
                    &plimsoll_device::retry::Backoff::default(),
                    k as u64,
                )
                .await
                .unwrap()
            });
        }
        while let Some(j) = tasks.join_next().await {
            assert!(j.unwrap(), "every device's statistics are in the sum");
        }
        let mut total = DetectionStats::zero(stage);
        for k in 0..6 {
            total.add(&stats(k));
        }
        let view = server
            .coordinator
            .detection_stage(STUDY, credentials[1].device_id, stage)
            .unwrap();
        assert!(view.complete);
        assert_eq!(view.devices_submitted, 6);
        let sum = view.sum.unwrap();
        match (stage, &sum, &total) {
            (
                DetectionStage::ResidualMoments,
                DetectionStats::ResidualMoments {
                    cross_products: a,
                    pair_days: n,
                },
                DetectionStats::ResidualMoments {
                    cross_products: b,
                    pair_days: m,
                },
            ) => {
                assert_eq!(n, m, "pair counts exactly");
                for (x, y) in a.iter().zip(b) {
                    assert!((x - y).abs() < 1e-6, "{x} vs {y}");
                }
            }
            (DetectionStage::EpisodeHistogram, _, _) => {
                // Device 1 is in "south" with devices 3 and 5 (in both sessions): its sum
                // is theirs.
                let mut south = histogram(1);
                south.add(&histogram(3));
                south.add(&histogram(5));
                assert_eq!(sum, south);
                assert_eq!(view.group, Some(("south".into(), 3)));
            }
            other => panic!("{other:?}"),
        }
        let store = plimsoll_server::store::Store::open(&crate::support::db_location(&db)).unwrap();
        assert!(
            store
                .detection_submissions(STUDY, stage)
                .unwrap()
                .is_empty(),
            "no device's statistics are stored"
        );
    }
}

fn now() -> i64 {
    plimsoll_server::service::now_ms()
}

/// Differential privacy under secure aggregation (the distributed discrete Gaussian): five
/// devices each send a change of norm 2 (clipped to C = 0.5 on the device) for 20 rounds.
/// Each published step is the clipped mean `[0.3, 0.4, 0, …]` plus noise whose standard
/// deviation is `√m · z (C + γ√d) / √t / (qN)` (m = 5 devices in every sum, t = 4, qN = 5,
/// γ = 2^−24, d = 7): the residuals' mean and variance over the 140 coordinates agree with
/// it (mean within 4 standard errors, variance ratio within [0.55, 1.45], about 3.7 standard
/// deviations of a χ² with 140 degrees of freedom).
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_private_secure_round_carries_the_noise_the_accountant_assumes() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = secure_study(5, 20, 2_000);
    config.dp = Some(plimsoll_server::privacy::DpSettings {
        noise_multiplier: 2.0,
        clip_norm: 0.5,
        epsilon_budget: 1e6,
        delta: 1e-3,
    });
    let server = TestServer::start(&dir.path().join("agg.db"), vec![config]).await;
    let mut credentials = Vec::new();
    for k in 0..5 {
        credentials.push(
            server
                .enroll(
                    STUDY,
                    &format!("p{k}"),
                    &["resting_hr_bpm"],
                    FlagSharing::Withheld,
                )
                .await,
        );
    }
    let server = Arc::new(server);
    // Direction (0.6, 0.8, 0, …) at norm 2: clipped to (0.3, 0.4, 0, …).
    let change = [1.2, 1.6, 0.0, 0.0, 0.0, 0.0, 0.0];
    let mut residuals = Vec::new();
    let mut before = server.coordinator.prior(STUDY, None).unwrap().params[0]
        .values
        .clone();
    for round in 1..=20u32 {
        honest_round(&server, &credentials, move |_, task, current| {
            let values: Vec<f64> = current.iter().zip(&change).map(|(c, d)| c + d).collect();
            task.private_input(
                &[("resting_hr_bpm", current)],
                &[("resting_hr_bpm", &values, 30, 0.5)],
                &mut rand::rng(),
            )
            .unwrap()
        })
        .await;
        let after = server.coordinator.prior(STUDY, None).unwrap();
        assert_eq!(after.version, round);
        assert_eq!(after.contributions[0].n_devices, 5);
        let clipped = [0.3, 0.4, 0.0, 0.0, 0.0, 0.0, 0.0];
        for j in 0..7 {
            residuals.push(after.params[0].values[j] - before[j] - clipped[j]);
        }
        before = after.params[0].values.clone();
    }
    let gamma = 2f64.powi(-24);
    let sd = 5f64.sqrt() * 2.0 * (0.5 + gamma * 7f64.sqrt()) / 2.0 / 5.0;
    let n = residuals.len() as f64;
    let mean = residuals.iter().sum::<f64>() / n;
    let var = residuals.iter().map(|r| r * r).sum::<f64>() / n;
    assert!(
        mean.abs() < 4.0 * sd / n.sqrt(),
        "mean residual {mean} (sd {sd})"
    );
    let ratio = var / (sd * sd);
    assert!((0.55..1.45).contains(&ratio), "variance ratio {ratio}");
}
