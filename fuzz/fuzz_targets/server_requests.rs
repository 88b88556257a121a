//! libFuzzer target for the aggregator's handling of decoded requests. Each
//! input is a short script of calls against a fresh aggregator (in-memory
//! SQLite, one study with two signals, two enrolled devices, round 1 open):
//! every step picks an RPC and a credential, and its body is decoded from
//! the fuzzer's bytes with prost, as tonic decodes it off the wire. The
//! calls go through the real `plimsoll.v1.Aggregator` service methods.
//!
//! Checked after every call; a violation panics, which libFuzzer reports:
//!
//! 1. no handler panics, and no call ends in INTERNAL (a worker panic or a
//!    database failure would);
//! 2. a call without a valid credential for the device and study it names
//!    never succeeds (except GetStudy and Enroll, which need none);
//! 3. the published prior keeps its layout: one vector per signal, of the
//!    layout's length, every value finite;
//! 4. rounds completed never exceed rounds planned, and prior versions
//!    never go backwards;
//! 5. at the end, SQLite's integrity check passes.

#![no_main]

use std::sync::{Arc, OnceLock};

use libfuzzer_sys::fuzz_target;
use plimsoll_proto::auth::{self, DeviceCredential};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_server::Aggregator;
use plimsoll_server::service::AggregatorService;
use plimsoll_server::store::Store;
use plimsoll_server::{Coordinator, Enrollment, LocalTraining, SignalLayout, StudyConfig};
use prost::Message;
use tonic::{Code, Request, Status};

const STUDY: &str = "fz";
const SIGNALS: [&str; 2] = ["resting_hr_bpm", "steps"];
const PARAMS: usize = 7;
const ROUNDS: u32 = 4;

fn runtime() -> &'static tokio::runtime::Runtime {
    static RT: OnceLock<tokio::runtime::Runtime> = OnceLock::new();
    RT.get_or_init(|| {
        tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .expect("runtime")
    })
}

struct World {
    coordinator: Arc<Coordinator>,
    service: AggregatorService,
    code: String,
    devices: [DeviceCredential; 2],
}

fn world() -> World {
    let coordinator = Arc::new(Coordinator::from_store(Store::in_memory().unwrap()).unwrap());
    let code = coordinator
        .create_study(
            StudyConfig {
                study_id: STUDY.into(),
                title: "fuzz".into(),
                signals: SIGNALS
                    .iter()
                    .map(|s| SignalLayout {
                        signal: (*s).into(),
                        param_names: (0..PARAMS).map(|i| format!("p{i}")).collect(),
                        reference_center: 1.0,
                        reference_scale: 1.0,
                        initial: vec![0.0; PARAMS],
                    })
                    .collect(),
                rounds: ROUNDS,
                training: LocalTraining::default(),
                fraction_per_round: 1.0,
                min_quorum: 1,
                start_when_enrolled: 2,
                round_deadline_ms: 600_000,
                selection_seed: 1,
                aggregation: Default::default(),
                alert_budget_per_participant_month: plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
                review_level: plimsoll_server::packets::FlagLevel::Alert,
                sensor_models: None,
                subgroups: None,
                dp: None,
            },
            0,
        )
        .unwrap();
    let signals: Vec<String> = SIGNALS.iter().map(|s| (*s).into()).collect();
    let devices = [0u8, 1].map(|i| {
        let secret = format!("{i:02x}").repeat(32);
        let device_id = coordinator
            .enroll(
                &Enrollment {
                    study_id: STUDY,
                    label: &format!("p-{i}"),
                    signals: &signals,
                    // The first device consented to share flag packets.
                    consent_share_flags: i == 0,
                    enrollment_code: &code,
                    device_secret: &secret,
                    sensor_model: "",
                    group_label: "",
                },
                1,
            )
            .unwrap();
        DeviceCredential { device_id, secret }
    });
    World {
        service: AggregatorService::new(coordinator.clone()),
        coordinator,
        code,
        devices,
    }
}

/// The credential a step presents — none, one of the two devices, a wrong
/// secret, or a malformed header — and the device it validly names.
fn credential(world: &World, choice: u8) -> (Option<String>, Option<u64>) {
    match choice % 5 {
        0 => (None, None),
        c @ (1 | 2) => {
            let d = &world.devices[usize::from(c - 1)];
            (Some(d.header_value()), Some(d.device_id))
        }
        3 => {
            let wrong = DeviceCredential {
                device_id: world.devices[0].device_id,
                secret: "ff".repeat(32),
            };
            (Some(wrong.header_value()), None)
        }
        _ => (Some("Bearer 1.zz".to_owned()), None),
    }
}

fn request<T>(header: &Option<String>, message: T) -> Request<T> {
    let mut request = Request::new(message);
    if let Some(h) = header {
        request
            .metadata_mut()
            .insert(auth::METADATA_KEY, h.parse().unwrap());
    }
    request
}

/// Fills in valid identifiers when `fix` is set, so that steps get past
/// the credential check and reach validation.
fn fix_ids(fix: bool, study_id: &mut String, device_id: Option<&mut u64>, who: Option<u64>) {
    if fix {
        *study_id = STUDY.into();
        if let (Some(d), Some(w)) = (device_id, who) {
            *d = w;
        }
    }
}

fn check_outcome<T>(rpc: &str, result: &Result<tonic::Response<T>, Status>, authorised: bool) {
    match result {
        Ok(_) => assert!(authorised, "{rpc} succeeded without a valid credential"),
        Err(status) => assert_ne!(
            status.code(),
            Code::Internal,
            "{rpc} failed internally: {}",
            status.message()
        ),
    }
}

fn check_state(world: &World, last_version: &mut u32) {
    let status = world.coordinator.status(STUDY).unwrap();
    assert!(status.rounds_completed <= ROUNDS);
    let prior = world.coordinator.prior(STUDY, None).unwrap();
    assert!(prior.version >= *last_version, "prior version went backwards");
    *last_version = prior.version;
    assert_eq!(prior.params.len(), SIGNALS.len());
    for p in &prior.params {
        assert_eq!(p.values.len(), PARAMS, "{}", p.signal);
        assert!(p.values.iter().all(|v| v.is_finite()), "{:?}", p.values);
    }
}

async fn step(world: &World, head: [u8; 3], body: &[u8]) {
    let [rpc, cred, fix] = head;
    let fix = fix & 1 == 1;
    let (header, who) = credential(world, cred);
    let s = &world.service;
    match rpc % 6 {
        0 => {
            let Ok(m) = pb::GetStudyRequest::decode(body) else { return };
            let r = s.get_study(Request::new(m)).await;
            check_outcome("GetStudy", &r, true);
        }
        1 => {
            let Ok(mut m) = pb::EnrollRequest::decode(body) else { return };
            if fix {
                m.study_id = STUDY.into();
                m.enrollment_code = world.code.clone();
            }
            let r = s.enroll(Request::new(m)).await;
            check_outcome("Enroll", &r, true);
        }
        2 => {
            let Ok(mut m) = pb::FetchTaskRequest::decode(body) else { return };
            m.wait_ms = 0; // no long-poll inside a fuzz run
            fix_ids(fix, &mut m.study_id, Some(&mut m.device_id), who);
            let ok = who.is_some() && m.study_id == STUDY && Some(m.device_id) == who;
            let r = s.fetch_task(request(&header, m)).await;
            check_outcome("FetchTask", &r, ok);
        }
        3 => {
            let Ok(mut m) = pb::SubmitUpdateRequest::decode(body) else { return };
            fix_ids(fix, &mut m.study_id, Some(&mut m.device_id), who);
            if fix && m.round_id == 0 {
                m.round_id = world.coordinator.status(STUDY).unwrap().current_round;
            }
            let ok = who.is_some() && m.study_id == STUDY && Some(m.device_id) == who;
            let r = s.submit_update(request(&header, m)).await;
            check_outcome("SubmitUpdate", &r, ok);
        }
        4 => {
            let Ok(mut m) = pb::GetPriorRequest::decode(body) else { return };
            fix_ids(fix, &mut m.study_id, None, who);
            let ok = who.is_some() && m.study_id == STUDY;
            let r = s.get_prior(request(&header, m)).await;
            check_outcome("GetPrior", &r, ok);
        }
        _ => {
            let Ok(mut m) = pb::SubmitFlagPacketRequest::decode(body) else { return };
            fix_ids(fix, &mut m.study_id, Some(&mut m.device_id), who);
            let ok = who.is_some() && m.study_id == STUDY && Some(m.device_id) == who;
            let r = s.submit_flag_packet(request(&header, m)).await;
            check_outcome("SubmitFlagPacket", &r, ok);
        }
    }
}

fuzz_target!(|data: &[u8]| {
    let world = world();
    let mut last_version = 0;
    // Steps: 3 header bytes, a length byte, then that many body bytes.
    let mut rest = data;
    let mut steps = 0;
    while rest.len() >= 4 && steps < 16 {
        let head = [rest[0], rest[1], rest[2]];
        let len = usize::from(rest[3]).min(rest.len() - 4);
        let body = &rest[4..4 + len];
        rest = &rest[4 + len..];
        runtime().block_on(step(&world, head, body));
        check_state(&world, &mut last_version);
        steps += 1;
    }
    assert_eq!(world.coordinator.integrity_check().unwrap(), vec!["ok".to_string()]);
});
