//! Sensor models and participant groups over real gRPC on loopback: what a device must
//! declare at enrolment (refusals name the RPC and the field), a sensor model's own prior
//! terms averaged over that model's devices with the pooled terms for a model below the
//! study's device minimum (worked example by hand), and the per-group sums of the
//! histogram calibration stage with the whole study's sum for a group below its minimum.

use plimsoll_device::client::{EnrollmentRequest, FlagSharing, authorized, new_device_secret};
use plimsoll_device::prior::PriorParams;
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::study::{SensorModels, Subgroups};
use tonic::Code;
use tonic::transport::Channel;

use crate::support::{TestServer, study_config};

const STUDY: &str = "subgroup-study";

fn config() -> plimsoll_server::StudyConfig {
    let mut c = study_config(STUDY, &[Signal::RestingHr], 5, 1);
    c.sensor_models = Some(SensorModels {
        models: vec!["band-a".into(), "ring-c".into()],
        params: vec!["mean_z".into(), "log_noise_var".into()],
        min_devices: 3,
        column: None,
    });
    c.subgroups = Some(Subgroups {
        column: "age_band".into(),
        levels: vec!["young".into(), "old".into()],
        calibrate_per_group: true,
        min_devices_per_group: 3,
    });
    c
}

async fn enroll(
    client: &mut AggregatorClient<Channel>,
    code: &str,
    label: &str,
    sensor_model: &str,
    group_label: &str,
    secret: &str,
) -> Result<DeviceCredential, anyhow::Error> {
    plimsoll_device::client::enroll(
        client,
        EnrollmentRequest {
            study_id: STUDY,
            enrollment_code: code,
            participant: label,
            signals: vec!["resting_hr_bpm".into()],
            sharing: FlagSharing::Withheld,
            device_secret: secret,
            sensor_model,
            group_label,
        },
    )
    .await
}

/// The raw gRPC refusal of an enrolment (no client retries).
async fn refused(
    client: &mut AggregatorClient<Channel>,
    code: &str,
    sensor_model: &str,
    group_label: &str,
) -> tonic::Status {
    client
        .enroll(pb::EnrollRequest {
            study_id: STUDY.into(),
            participant_label: "p-refused".into(),
            signals: vec!["resting_hr_bpm".into()],
            consent_share_flags: false,
            enrollment_code: code.into(),
            device_secret: new_device_secret(),
            sensor_model: sensor_model.into(),
            group_label: group_label.into(),
        })
        .await
        .unwrap_err()
}

fn with_coords(mean_z: f64, log_noise_var: f64, other: f64) -> Vec<f64> {
    let mut v = PriorParams::initial(Signal::RestingHr).values.to_vec();
    v[0] = mean_z;
    for x in &mut v[1..6] {
        *x = other;
    }
    v[6] = log_noise_var;
    v
}

#[tokio::test]
async fn sensor_terms_per_model_pooled_fallback_and_per_group_calibration() {
    let dir = tempfile::tempdir().unwrap();
    let server = TestServer::start(&dir.path().join("agg.db"), vec![config()]).await;
    let code = server.code(STUDY).to_owned();
    let mut client = server.client();

    // What a device must declare.
    for (model, group, field) in [
        ("", "young", "sensor_model"),
        ("band-z", "young", "sensor_model"),
        ("band-a", "", "group_label"),
        ("band-a", "middle", "group_label"),
    ] {
        let err = refused(&mut client, &code, model, group).await;
        assert_eq!(err.code(), Code::InvalidArgument, "{}", err.message());
        assert!(
            err.message().starts_with(&format!("Enroll: {field}")),
            "{model}/{group}: {}",
            err.message()
        );
    }

    // Four band-a devices (enough for terms of their own: minimum 3), one ring-c (too few).
    let devices = [
        ("p-0", "band-a", "young"),
        ("p-1", "band-a", "young"),
        ("p-2", "band-a", "old"),
        ("p-3", "band-a", "old"),
        ("p-4", "ring-c", "young"),
    ];
    let mut creds = Vec::new();
    let mut secrets = Vec::new();
    for (label, model, group) in devices {
        let secret = new_device_secret();
        creds.push(
            enroll(&mut client, &code, label, model, group, &secret)
                .await
                .unwrap(),
        );
        secrets.push(secret);
    }
    // The sensor model is fixed at the first enrolment.
    let err = enroll(&mut client, &code, "p-0", "ring-c", "young", &secrets[0])
        .await
        .unwrap_err();
    assert!(
        format!("{err:#}").contains("sensor_model: `p-0` was enrolled with `band-a`"),
        "{err:#}"
    );

    // Round 1. mean_z: band-a 0.1, 0.2, 0.3, 0.4 over 10, 10, 20, 20 days, ring-c 2.0 over
    // 20 days; log_noise_var: band-a −1, −1, −2, −2, ring-c 0; the other coordinates 0.5
    // everywhere. By hand: band-a's mean_z = (1 + 2 + 6 + 8)/60 = 17/60, its noise
    // (−10 − 10 − 40 − 40)/60 = −5/3; pooled mean_z = (17 + 40)/80 = 57/80, pooled noise
    // (−100 + 0)/80 = −5/4.
    let submitted = [
        (0.1, -1.0, 10),
        (0.2, -1.0, 10),
        (0.3, -2.0, 20),
        (0.4, -2.0, 20),
        (2.0, 0.0, 20),
    ];
    for (c, &(mean_z, noise, n_days)) in creds.iter().zip(&submitted) {
        let update = pb::SubmitUpdateRequest {
            study_id: STUDY.into(),
            device_id: c.device_id,
            round_id: 1,
            updates: vec![pb::SignalUpdate {
                signal: "resting_hr_bpm".into(),
                values: with_coords(mean_z, noise, 0.5),
                n_days,
                local_loss: 1.0,
            }],
        };
        client.submit_update(authorized(c, update)).await.unwrap();
    }
    let prior_of = |c: &DeviceCredential| {
        let mut client = server.client();
        let request = authorized(
            c,
            pb::GetPriorRequest {
                study_id: STUDY.into(),
                version: 0,
            },
        );
        async move { client.get_prior(request).await.unwrap().into_inner() }
    };
    let close = |got: f64, want: f64| (got - want).abs() < 1e-12;
    let a = prior_of(&creds[0]).await;
    assert_eq!(a.version, 1);
    assert_eq!(a.sensor_model, "band-a");
    let v = &a.params[0].values;
    assert!(close(v[0], 17.0 / 60.0) && close(v[6], -5.0 / 3.0), "{v:?}");
    assert!(v[1..6].iter().all(|x| close(*x, 0.5)), "{v:?}");
    assert_eq!(a.sensor_terms.len(), 1, "only band-a has terms of its own");
    assert_eq!(
        (
            a.sensor_terms[0].sensor_model.as_str(),
            a.sensor_terms[0].n_devices
        ),
        ("band-a", 4)
    );
    // ring-c has one device, below the minimum of 3: the pooled terms.
    let c = prior_of(&creds[4]).await;
    assert_eq!(c.sensor_model, "", "pooled");
    let v = &c.params[0].values;
    assert!(close(v[0], 57.0 / 80.0) && close(v[6], -1.25), "{v:?}");

    // Calibration: moments, then histograms; per-group sums for `young` (3 devices), the
    // whole study's for `old` (2 devices, below the minimum of 3).
    for c in &creds {
        let request = pb::SubmitDetectionStatsRequest {
            study_id: STUDY.into(),
            device_id: c.device_id,
            stats: Some(pb::submit_detection_stats_request::Stats::ResidualMoments(
                pb::ResidualMomentSums {
                    cross_products: vec![0.0; 36],
                    pair_days: vec![0; 36],
                },
            )),
        };
        client
            .submit_detection_stats(authorized(c, request))
            .await
            .unwrap();
    }
    let n_bins = plimsoll_device::detect::calibration::N_EDGES;
    for (i, c) in creds.iter().enumerate() {
        let request = pb::SubmitDetectionStatsRequest {
            study_id: STUDY.into(),
            device_id: c.device_id,
            stats: Some(pb::submit_detection_stats_request::Stats::EpisodeHistogram(
                pb::EpisodeCounts {
                    episodes: vec![i as u64 + 1; n_bins],
                    scored_days: 100 * (i as u64 + 1),
                },
            )),
        };
        client
            .submit_detection_stats(authorized(c, request))
            .await
            .unwrap();
    }
    let histogram_of = |c: &DeviceCredential| {
        let mut client = server.client();
        let request = authorized(
            c,
            pb::GetDetectionCalibrationRequest {
                study_id: STUDY.into(),
                device_id: c.device_id,
                stage: pb::DetectionStage::EpisodeHistogram as i32,
                wait_ms: 0,
            },
        );
        async move {
            client
                .get_detection_calibration(request)
                .await
                .unwrap()
                .into_inner()
        }
    };
    let scored = |v: &pb::DetectionCalibration| match &v.sum {
        Some(pb::detection_calibration::Sum::EpisodeHistogram(h)) => (h.episodes[0], h.scored_days),
        other => panic!("{other:?}"),
    };
    // young: devices 0, 1, 4 → episodes 1 + 2 + 5 = 8, days 100 + 200 + 500 = 800.
    let young = histogram_of(&creds[0]).await;
    assert!(young.complete);
    assert_eq!(
        (young.group_label.as_str(), young.group_devices),
        ("young", 3)
    );
    assert_eq!(scored(&young), (8, 800));
    // old: below the minimum, the whole study's: 15 episodes, 1,500 days.
    let old = histogram_of(&creds[2]).await;
    assert_eq!((old.group_label.as_str(), old.group_devices), ("", 0));
    assert_eq!(scored(&old), (15, 1500));
    server.stop().await;
}

/// The per-device path end to end (every device enrols, trains, calibrates and detects over
/// gRPC): devices declare their sensor model and sex from the cohort's columns, models with
/// enough devices get terms of their own, and each device's thresholds come from its own
/// group's histograms when the group reaches the minimum (the whole study's otherwise).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn devices_declare_from_the_cohort_and_calibrate_per_group() {
    use plimsoll_device::cohort::{BadRowPolicy, Scenario, SimulateOptions, read_cohort};
    use plimsoll_device::demo::{cohort_signals, run_federated};

    let dir = tempfile::tempdir().unwrap();
    let scenario = Scenario::from_path(
        &std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR"))
            .join("../demo-data/fairness-stress.toml"),
    )
    .unwrap();
    let cohort_dir = dir.path().join("cohort");
    plimsoll_device::cohort::simulate_to_dir(
        &scenario,
        &SimulateOptions {
            seed: Some(9),
            participants: Some(16),
            days: Some(60),
        },
        &cohort_dir,
        &mut |_, _| {},
    )
    .unwrap();
    let cohort = read_cohort(&cohort_dir, BadRowPolicy::Abort).unwrap();
    let n = cohort.participants.len() as u32;
    let mut config = study_config("declared", &cohort_signals(&cohort), n, 2);
    config.min_quorum = n;
    config.sensor_models = Some(SensorModels {
        models: vec!["band-a".into(), "band-b".into(), "ring-c".into()],
        params: vec!["mean_z".into(), "log_noise_var".into()],
        min_devices: 5,
        column: Some("device_model".into()),
    });
    config.subgroups = Some(Subgroups {
        column: "sex".into(),
        levels: vec!["female".into(), "male".into()],
        calibrate_per_group: true,
        min_devices_per_group: 5,
    });
    let run = run_federated(
        &cohort,
        config,
        &dir.path().join("agg.db"),
        &dir.path().join("devices"),
        None,
    )
    .await
    .unwrap();
    assert_eq!(run.reports.len(), cohort.participants.len());
    let count = |column: &str, level: &str| {
        cohort
            .groups
            .values()
            .filter(|g| g.get(column).map(String::as_str) == Some(level))
            .count()
    };
    let last = run.history.last().unwrap();
    for model in ["band-a", "band-b", "ring-c"] {
        assert_eq!(
            last.has_terms(model),
            count("device_model", model) >= 5,
            "{model}: {} devices",
            count("device_model", model)
        );
    }
    for report in &run.reports {
        let sex = &cohort.groups[&report.participant]["sex"];
        let c = &report.calibration;
        if count("sex", sex) >= 5 {
            assert_eq!(c.histogram_group.as_deref(), Some(sex.as_str()));
            assert_eq!(c.histogram_devices as usize, count("sex", sex));
        } else {
            assert_eq!(c.histogram_group, None);
            assert_eq!(c.histogram_devices, n);
        }
    }
}
