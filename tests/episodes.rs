//! Episodes end to end: a simulated participant's multi-day departure is detected on the
//! device under a calibration computed from quiet participants' scores (what a study's
//! calibration phase sums), sent as one packet over real gRPC, sent again as it grows, and
//! reviewed: one queue row, replaced not duplicated, the reviewer's action kept on the
//! episode, the reason stating the study's odds, the direction shown.

use std::collections::BTreeMap;

use chrono::NaiveDate;
use plimsoll_device::client::{FlagSender, FlagSharing};
use plimsoll_device::cohort::ParticipantSeries;
use plimsoll_device::detect::DetectConfig;
use plimsoll_device::detect::calibration::{EpisodeHistogram, StudyCalibration};
use plimsoll_device::detect::joint::{Correlation, ResidualMoments};
use plimsoll_device::episode_flags::{EpisodeDetection, SignalDirection, detect_episodes};
use plimsoll_device::flags::FlagLevel;
use plimsoll_device::packets::build_packet;
use plimsoll_device::prior::PriorParams;
use plimsoll_device::signal::Signal;
use plimsoll_server::review::{accounts, db, serve_review};
use plimsoll_server::service::now_ms;
use plimsoll_server::store::Store;
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

use crate::review_support::{PASSWORD, REVIEWER, csrf_of, form, http, login};
use crate::support::{TestServer, study_config};

const STUDY: &str = "episodes";
const SIGNALS: [Signal; 2] = [Signal::RestingHr, Signal::HrvRmssd];

/// Days of the simulated illness (day indices) and its size: resting HR +9 bpm, HRV −14 ms.
const ILL_FROM: usize = 80;
const ILL_TO: usize = 86;

fn first_day() -> NaiveDate {
    "2024-01-01".parse().unwrap()
}

/// `n_days` of resting HR (mean 62 bpm, day-to-day SD 2) and HRV (mean 45 ms, SD 5) with a
/// personal offset, optionally with the illness; seeded.
fn participant(label: &str, seed: u64, n_days: usize, ill: bool) -> ParticipantSeries {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let noise = Normal::new(0.0, 1.0).unwrap();
    let (hr_offset, hrv_offset) = (noise.sample(&mut rng) * 4.0, noise.sample(&mut rng) * 8.0);
    let mut hr = Vec::new();
    let mut hrv = Vec::new();
    for d in 0..n_days {
        let sick = ill && (ILL_FROM..=ILL_TO).contains(&d);
        hr.push(Some(
            62.0 + hr_offset + 2.0 * noise.sample(&mut rng) + if sick { 9.0 } else { 0.0 },
        ));
        hrv.push(Some(f64::max(
            45.0 + hrv_offset + 5.0 * noise.sample(&mut rng) - if sick { 14.0 } else { 0.0 },
            5.0,
        )));
    }
    ParticipantSeries {
        participant: label.into(),
        dates: (0..n_days)
            .map(|d| first_day() + chrono::Duration::days(d as i64))
            .collect(),
        values: BTreeMap::from([(SIGNALS[0], hr), (SIGNALS[1], hrv)]),
    }
}

fn priors() -> Vec<PriorParams> {
    SIGNALS.into_iter().map(PriorParams::initial).collect()
}

/// The study's calibration from 40 quiet participants × 150 days, as a calibration phase
/// would compute it: residual moments summed for the correlation, then episode histograms
/// summed at the learned correlation; Alert at 0.05 and Watch at 0.15 episodes per
/// participant-month (low budgets so the ill participant's quiet days raise no Alert).
fn calibration() -> StudyCalibration {
    let cfg = DetectConfig::default();
    let cohort: Vec<ParticipantSeries> = (0..40)
        .map(|i| participant(&format!("q-{i}"), 1_000 + i, 150, false))
        .collect();
    let mut moments = ResidualMoments::default();
    let first = StudyCalibration::uncalibrated();
    for p in &cohort {
        let d = detect_episodes(p, &priors(), &first, &cfg).unwrap();
        moments.merge(&d.scores.moments);
    }
    let correlation: Correlation = moments.correlation(200.0);
    let mut histogram = EpisodeHistogram::default();
    let mut with_r = first.clone();
    with_r.correlation = correlation.clone();
    for p in &cohort {
        let d = detect_episodes(p, &priors(), &with_r, &cfg).unwrap();
        histogram.merge(&EpisodeHistogram::from_days(&d.scores.days, cfg.grouping()));
    }
    StudyCalibration::from_histogram(correlation, histogram, 0.05, 0.15)
}

#[tokio::test]
async fn a_multi_day_departure_is_one_episode_row_updated_in_place_and_reviewed() {
    let calibration = calibration();
    assert!(calibration.is_calibrated());
    assert!(!calibration.alert.capped, "{:?}", calibration.alert);
    let cfg = DetectConfig::default();
    let ill_full = participant("p-ill", 7, 120, true);
    // The device's view two days into the illness, and after it.
    let mut ill_early = ill_full.clone();
    ill_early.dates.truncate(ILL_FROM + 3);
    for v in ill_early.values.values_mut() {
        v.truncate(ILL_FROM + 3);
    }
    let early = detect_episodes(&ill_early, &priors(), &calibration, &cfg).unwrap();
    let full = detect_episodes(&ill_full, &priors(), &calibration, &cfg).unwrap();
    let illness = |d: &EpisodeDetection| {
        let ill_start = first_day() + chrono::Duration::days(ILL_FROM as i64);
        let sent: Vec<_> = d.for_review(FlagLevel::Alert).collect();
        // Common practice (episode grouping): one departure, one episode to review.
        assert_eq!(sent.len(), 1, "{:#?}", d.episodes);
        assert!(sent[0].first_alarm >= ill_start, "{:#?}", sent[0]);
        sent[0].clone()
    };
    let (v1, v2) = (illness(&early), illness(&full));
    assert_eq!(v1.key, v2.key, "the key is stable as the episode grows");
    assert!(v1.ongoing && !v2.ongoing, "{v1:#?} {v2:#?}");
    assert!(v2.end > v1.end && v2.alarm_days > v1.alarm_days);
    assert!(v2.alarm_days >= 3, "several alarm days, one episode");
    // Direction: the acute-illness pattern, resting HR up and HRV down.
    let direction = |s: Signal| {
        v2.involved
            .iter()
            .find(|d| d.signal == s)
            .map(|d| d.direction)
    };
    assert_eq!(direction(Signal::RestingHr), Some(SignalDirection::Up));
    assert_eq!(direction(Signal::HrvRmssd), Some(SignalDirection::Down));
    // Honest odds: the study's rate for this peak, not a nominal-only figure.
    assert!(
        v2.reason.contains("On this study's calibration data")
            && v2.reason.contains("participant-months"),
        "{}",
        v2.reason
    );
    assert!(!v2.reason.contains("UNCALIBRATED"), "{}", v2.reason);
    println!(
        "calibration: {:?} {:?}; reason: {}",
        calibration.alert, calibration.watch, v2.reason
    );
    assert!(!v2.reason.contains("million"), "{}", v2.reason);

    // The aggregator and the review pages.
    let dir = tempfile::tempdir().unwrap();
    let db_path = dir.path().join("agg.db");
    let server = TestServer::start(&db_path, vec![study_config(STUDY, &SIGNALS, 1, 1)]).await;
    let columns: Vec<&str> = SIGNALS.iter().map(|s| s.column()).collect();
    let device = server
        .enroll(STUDY, "p-ill", &columns, FlagSharing::Consented)
        .await;
    let mut sender =
        FlagSender::new(server.channel(), STUDY, device, FlagSharing::Consented).unwrap();
    let first = sender
        .send(&build_packet(&v1, &early.rows, &priors()).unwrap())
        .await
        .unwrap();
    {
        let mut store = Store::open(&crate::support::db_location(&db_path)).unwrap();
        accounts::add_reviewer(&mut store, REVIEWER, PASSWORD, now_ms()).unwrap();
        accounts::assign(&mut store, REVIEWER, STUDY).unwrap();
    }
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let review = serve_review(&crate::support::db_location(&db_path), listener)
        .await
        .unwrap();
    let addr = review.addr;
    let cookie = login(addr, REVIEWER, PASSWORD).await;
    let page = http(addr, "GET", &format!("/flag/{first}"), Some(&cookie), None).await;
    assert_eq!(page.status, 200);
    let r = http(
        addr,
        "POST",
        &format!("/flag/{first}/action"),
        Some(&cookie),
        Some((
            "application/x-www-form-urlencoded",
            form(&[
                ("csrf", &csrf_of(&page.body)),
                ("action", "acknowledge"),
                ("note", "phoned; watching"),
            ]),
        )),
    )
    .await;
    assert_eq!(r.status, 303, "{}", r.body);

    // The episode grows: the same key, a new version.
    let second = sender
        .send(&build_packet(&v2, &full.rows, &priors()).unwrap())
        .await
        .unwrap();
    assert_eq!(first, second, "the new version replaces the old one");
    let store = Store::open(&crate::support::db_location(&db_path)).unwrap();
    let rows = db::queue(&store, STUDY, &db::QueueFilter::default()).unwrap();
    assert_eq!(rows.len(), 1, "one queue row per episode: {rows:#?}");
    assert_eq!(rows[0].revisions, 2);
    assert_eq!(rows[0].end, v2.end);
    assert!(!rows[0].ongoing);
    assert!(rows[0].updated_since_review);
    let record = db::flag(&store, first).unwrap().unwrap();
    assert_eq!(record.packet.episode.alarm_days as usize, v2.alarm_days);
    assert_eq!(
        record.history.len(),
        1,
        "the review action stays on the episode"
    );
    assert_eq!(record.status(), db::ReviewStatus::Acknowledged);

    let queue = http(
        addr,
        "GET",
        &format!("/study/{STUDY}/flags"),
        Some(&cookie),
        None,
    )
    .await;
    assert_eq!(
        queue
            .body
            .matches("<tr><td><span class=\"badge level-")
            .count(),
        1
    );
    assert!(
        queue.body.contains("Updated since review"),
        "{}",
        queue.body
    );
    assert!(queue.body.contains("Resting heart rate ↑ up"));
    assert!(queue.body.contains("Overnight HRV (RMSSD) ↓ down"));
    let page = http(addr, "GET", &format!("/flag/{first}"), Some(&cookie), None).await;
    assert!(page.body.contains("phoned; watching"), "history kept");
    assert!(page.body.contains("version 2 of this episode"));
    assert!(page.body.contains("On this study&#39;s calibration data"));
    assert!(page.body.contains("id=\"departures\""));
    assert!(page.body.contains("Decision support, not a diagnosis"));
    review.shutdown().await.unwrap();
    server.stop().await;
}
