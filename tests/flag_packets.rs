//! Flag packets over real gRPC on loopback: a consenting device's packet (one
//! episode) is stored; a device without consent cannot make a sender, and the
//! aggregator refuses packets from it anyway (FAILED_PRECONDITION naming the
//! field); malformed packets are INVALID_ARGUMENT naming the RPC and field;
//! resending is idempotent; an older version of an episode never replaces a
//! newer one.

use plimsoll_device::client::{FlagSender, FlagSharing, authorized};
use plimsoll_device::packets::to_pb;
use plimsoll_device::signal::Signal;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::packets::SignalDirection;
use plimsoll_server::review::db;
use plimsoll_server::store::Store;
use tonic::Code;
use tonic::transport::Channel;

use crate::review_support::scenario_packet;
use crate::support::{TestServer, study_config};

const STUDY: &str = "packets";

async fn start(dir: &std::path::Path) -> TestServer {
    TestServer::start(
        &dir.join("agg.db"),
        vec![study_config(
            STUDY,
            &[Signal::RestingHr, Signal::HrvRmssd],
            2,
            1,
        )],
    )
    .await
}

const COLUMNS: [&str; 2] = ["resting_hr_bpm", "hrv_rmssd_ms"];

async fn submit(
    client: &mut AggregatorClient<Channel>,
    device: &DeviceCredential,
    packet: pb::FlagPacket,
) -> Result<u64, tonic::Status> {
    let request = pb::SubmitFlagPacketRequest {
        study_id: STUDY.into(),
        device_id: device.device_id,
        packet: Some(packet),
    };
    client
        .submit_flag_packet(authorized(device, request))
        .await
        .map(|r| r.into_inner().packet_id)
}

fn stored(dir: &std::path::Path) -> Vec<db::QueueEntry> {
    let store = Store::open(&crate::support::db_location(&dir.join("agg.db"))).unwrap();
    db::queue(&store, STUDY, &db::QueueFilter::default()).unwrap()
}

#[tokio::test]
async fn consenting_device_packet_is_stored_and_resending_is_idempotent() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path()).await;
    let mut client = server.client();
    let id = server
        .enroll(STUDY, "p-1", &COLUMNS, FlagSharing::Consented)
        .await;
    let mut sender = FlagSender::new(server.channel(), STUDY, id.clone(), FlagSharing::Consented)
        .expect("a consenting device has a sender");
    let packet = scenario_packet();
    let first = sender.send(&packet).await.unwrap();
    let again = sender.send(&packet).await.unwrap();
    assert_eq!(first, again, "an identical resend returns the same id");

    let rows = stored(dir.path());
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0].participant, "p-1");
    assert_eq!(
        rows[0].signal, None,
        "an episode names its signals in `involved`"
    );
    assert_eq!(
        rows[0].involved,
        [
            ("resting_hr_bpm".to_owned(), SignalDirection::Up),
            ("hrv_rmssd_ms".to_owned(), SignalDirection::Down)
        ]
    );
    assert_eq!(rows[0].revisions, 1);
    let store = Store::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap();
    let record = db::flag(&store, first).unwrap().unwrap();
    // The involved signals come first, and the window is the 28 days before
    // the episode's start through the last scored day.
    let names: Vec<&str> = record
        .packet
        .signals
        .iter()
        .map(|w| w.signal.as_str())
        .collect();
    assert_eq!(names, ["resting_hr_bpm", "hrv_rmssd_ms"]);
    assert_eq!(record.packet.window_start.to_string(), "2024-03-11");
    assert_eq!(record.packet.window_end.to_string(), "2024-04-11");
    // What the device built is what the aggregator stored (up to the last
    // bit of a float: the store keeps JSON, and serde_json's default parser
    // is correct to within 1 ulp, not exact).
    let sent = plimsoll_server::wire::flag_packet_from_pb(Some(to_pb(&packet))).unwrap();
    assert_eq!(record.packet.reason, sent.reason);
    assert_eq!(record.packet.signals.len(), sent.signals.len());
    for (got, want) in record.packet.signals.iter().zip(&sent.signals) {
        assert_eq!(got.days.len(), want.days.len());
        for (g, w) in got.days.iter().zip(&want.days) {
            assert_eq!(
                (g.date, g.status, g.conditioned),
                (w.date, w.status, w.conditioned)
            );
            for (a, b) in [
                (g.observed, w.observed),
                (g.lo95, w.lo95),
                (g.hi50, w.hi50),
                (g.z, w.z),
            ] {
                assert!((a - b).abs() <= 1e-12 * b.abs().max(1.0), "{a} vs {b}");
            }
        }
    }

    // An older version of the episode (ending earlier) does not replace it.
    let mut older = to_pb(&packet);
    older.last_day = "2024-04-10".into();
    older.date = "2024-04-10".into();
    let err = submit(&mut client, &id, older).await.unwrap_err();
    assert_eq!(err.code(), Code::FailedPrecondition, "{err:?}");
    assert!(
        err.message()
            .starts_with("SubmitFlagPacket: packet.last_day"),
        "{}",
        err.message()
    );
    // Another episode of the device peaking on the same day is refused: an
    // alarm day belongs to one episode.
    let mut other = to_pb(&packet);
    other.episode_key = "ep-2024-04-09".into();
    let err = submit(&mut client, &id, other).await.unwrap_err();
    assert_eq!(err.code(), Code::AlreadyExists, "{err:?}");
    assert!(
        err.message()
            .starts_with("SubmitFlagPacket: packet.episode_key"),
        "{}",
        err.message()
    );
    assert_eq!(stored(dir.path()).len(), 1);
    server.stop().await;
}

#[tokio::test]
async fn device_without_consent_sends_nothing_and_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path()).await;
    let mut client = server.client();
    let id = server
        .enroll(STUDY, "p-2", &COLUMNS, FlagSharing::Withheld)
        .await;
    // Device side: no sender can be made without consent.
    assert!(FlagSender::new(server.channel(), STUDY, id.clone(), FlagSharing::Withheld).is_none());
    // Server side: a packet sent anyway (bypassing the device code) is refused.
    let err = submit(&mut client, &id, to_pb(&scenario_packet()))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::FailedPrecondition, "{err:?}");
    assert!(
        err.message().contains("consent_share_flags"),
        "{}",
        err.message()
    );
    // Consent is checked before content: a malformed packet gets the same answer.
    let err = submit(&mut client, &id, pb::FlagPacket::default())
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::FailedPrecondition, "{err:?}");
    assert!(stored(dir.path()).is_empty(), "nothing was stored");

    // Withdrawing consent by enrolling again stops packets from then on.
    let consenting = server
        .enroll(STUDY, "p-3", &COLUMNS, FlagSharing::Consented)
        .await;
    let again = server
        .enroll_with_secret(
            STUDY,
            "p-3",
            &COLUMNS,
            FlagSharing::Withheld,
            &consenting.secret,
        )
        .await;
    assert_eq!(consenting, again);
    let err = submit(&mut client, &again, to_pb(&scenario_packet()))
        .await
        .unwrap_err();
    assert_eq!(err.code(), Code::FailedPrecondition);
    assert!(stored(dir.path()).is_empty());
    server.stop().await;
}

/// One malformed packet per case; each is INVALID_ARGUMENT naming `field`.
#[tokio::test]
async fn malformed_packets_are_refused_naming_the_field() {
    let dir = tempfile::tempdir().unwrap();
    let server = start(dir.path()).await;
    let mut client = server.client();
    let id = server
        .enroll(STUDY, "p-4", &COLUMNS, FlagSharing::Consented)
        .await;
    let good = to_pb(&scenario_packet());
    type Edit = fn(&mut pb::FlagPacket);
    let cases: [(&str, Edit); 19] = [
        ("packet.window_end", |p| p.window_end = "2024-08-30".into()),
        ("packet.window_start", |p| {
            p.window_start = "11/03/2024".into()
        }),
        ("packet.date", |p| p.date = "2024-02-30".into()),
        ("packet.signals[0].days[3].observed", |p| {
            p.signals[0].days[3].observed = f64::NAN
        }),
        ("packet.signals[1].days[0].sd", |p| {
            p.signals[1].days[0].sd = 0.0
        }),
        ("packet.signal", |p| p.signal = "blood_glucose".into()),
        ("packet.signals[1].signal", |p| {
            p.signals[1].signal = "resting_hr_bpm".into()
        }),
        ("packet.level", |p| p.level = 0),
        ("packet.score", |p| p.score = f64::INFINITY),
        // Episodes (part 4 of the design): every new field is checked.
        ("packet.kind", |p| p.kind = pb::FlagKind::Cusum as i32),
        // The study sends Alerts only (the default review level).
        ("packet.level", |p| p.level = pb::FlagLevel::Watch as i32),
        ("packet.episode_key", |p| p.episode_key.clear()),
        ("packet.episode_key", |p| p.episode_key = "legacy-7".into()),
        ("packet.episode_key", |p| p.episode_key = "ep 1".into()),
        ("packet.direction", |p| {
            p.direction = pb::PatternDirection::Mirror as i32
        }),
        ("packet.involved", |p| p.involved.clear()),
        ("packet.involved[1].direction", |p| {
            p.involved[1].direction = pb::SignalDirection::Up as i32
        }),
        ("packet.involved[0].signal", |p| {
            p.involved[0].signal = "steps".into()
        }),
        ("packet.alarm_days", |p| p.alarm_days = 0),
    ];
    for (field, edit) in cases {
        let mut p = good.clone();
        edit(&mut p);
        let err = submit(&mut client, &id, p).await.unwrap_err();
        assert_eq!(err.code(), Code::InvalidArgument, "{field}: {err:?}");
        assert!(
            err.message()
                .starts_with(&format!("SubmitFlagPacket: {field}")),
            "message should name {field}: {}",
            err.message()
        );
    }
    assert!(stored(dir.path()).is_empty());
    server.stop().await;
}
