//! Shared helpers of the flag-packet and review tests: a study with flag
//! packets sent over real gRPC by consenting devices, reviewer accounts, the
//! review server on a loopback ephemeral port, and a minimal HTTP/1.1 client
//! (enough for the review pages and for WebDriver).

use std::net::SocketAddr;
use std::path::Path;

use chrono::NaiveDate;
use plimsoll_device::client::{FlagSender, FlagSharing, authorized};
use plimsoll_device::detect::calibration::{
    Calibrated, DAYS_PER_MONTH, EpisodeHistogram, N_EDGES, StudyCalibration,
};
use plimsoll_device::detect::joint::{Correlation, TargetPattern};
use plimsoll_device::episode_flags::{
    Departure, EpisodeDirection, EpisodeFlag, SignalDirection, target_reason,
};
use plimsoll_device::flags::FlagLevel;
use plimsoll_device::packets::{DayRow, FlagPacket, PacketDayStatus, build_packet};
use plimsoll_device::prior::PriorParams;
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1 as pb;
use plimsoll_server::review::limits::LoginLimits;
use plimsoll_server::review::{RunningReview, accounts, serve_review_limited};
use plimsoll_server::service::now_ms;
use plimsoll_server::store::Store;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

use crate::support::{TestServer, study_config};

pub const STUDY: &str = "review-study";
pub const OTHER_STUDY: &str = "other-study";
pub const REVIEWER: &str = "reviewer-one";
pub const PASSWORD: &str = "correct horse battery";
pub const OUTSIDER: &str = "reviewer-two";

pub fn day(s: &str) -> NaiveDate {
    s.parse().expect("ISO date")
}

/// A scored row with a symmetric band around `mean` of SD `sd`.
pub fn row(signal: Signal, date: NaiveDate, observed: f64, mean: f64, sd: f64) -> DayRow {
    let z = (observed - mean) / sd;
    DayRow {
        signal,
        date,
        observed,
        mean,
        sd,
        lo50: mean - 0.674_489_75 * sd,
        hi50: mean + 0.674_489_75 * sd,
        lo95: mean - 1.959_964 * sd,
        hi95: mean + 1.959_964 * sd,
        z,
        tail_p: (2.0 * (1.0 - normal_cdf(z.abs()))).clamp(0.0, 1.0),
        conditioned: true,
        status: PacketDayStatus::Normal,
    }
}

/// Φ via the Abramowitz & Stegun 26.2.17 approximation (|error| < 7.5e-8),
/// good enough for made-up test rows.
fn normal_cdf(x: f64) -> f64 {
    let t = 1.0 / (1.0 + 0.231_641_9 * x.abs());
    let poly = t
        * (0.319_381_530
            + t * (-0.356_563_782
                + t * (1.781_477_937 + t * (-1.821_255_978 + t * 1.330_274_429))));
    let upper = (-(x * x) / 2.0).exp() / (2.0 * std::f64::consts::PI).sqrt() * poly;
    if x >= 0.0 { 1.0 - upper } else { upper }
}

/// A made-up study calibration over 1,000 participant-months: episodes peaking at 4.0 or
/// more started 25 times (once in 40 participant-months), Alert at 4.0, Watch at 3.0.
pub fn study_calibration() -> StudyCalibration {
    let episodes = (0..N_EDGES)
        .map(|i| if i >= 40 { 25 } else { 2_000 })
        .collect();
    StudyCalibration {
        correlation: Correlation::identity(),
        budget_per_month: 0.025,
        moment_devices: 0,
        histogram_devices: 0,
        histogram_group: None,
        pattern: TargetPattern::ACUTE_ILLNESS,
        alert: Calibrated {
            threshold: 4.0,
            rate: 0.025,
            capped: false,
        },
        watch: Calibrated {
            threshold: 3.0,
            rate: 0.2,
            capped: false,
        },
        histogram: EpisodeHistogram {
            episodes,
            scored_days: (1_000.0 * DAYS_PER_MONTH) as u64,
        },
    }
}

/// A target episode with its reason written under [`study_calibration`].
#[allow(clippy::too_many_arguments)]
pub fn episode(
    level: FlagLevel,
    start: &str,
    peak: &str,
    end: &str,
    peak_score: f64,
    alarm_days: usize,
    ongoing: bool,
    involved: &[(Signal, f64, f64)],
) -> EpisodeFlag {
    let mut flag = EpisodeFlag {
        key: format!("ep-{start}"),
        direction: EpisodeDirection::Target,
        level,
        start: day(start),
        first_alarm: day(start),
        peak: day(peak),
        peak_score,
        end: day(end),
        ongoing,
        alarm_days,
        peak_window_start: day(start),
        involved: involved
            .iter()
            .map(|&(signal, departure, contribution)| Departure {
                signal,
                direction: SignalDirection::of(departure),
                departure,
                contribution,
            })
            .collect(),
        reason: String::new(),
    };
    flag.reason = target_reason(&flag, &study_calibration(), &TargetPattern::ACUTE_ILLNESS);
    flag
}

/// 42 days of resting heart rate and HRV for one participant, with three
/// missing days, a baseline phase, and over the last four days resting HR
/// rising and HRV falling (alarm days); plus the Alert episode they form.
pub fn scenario() -> (EpisodeFlag, Vec<DayRow>) {
    let start = day("2024-03-01");
    let missing = [9, 10, 23];
    let mut rows = Vec::new();
    for i in 0..42i64 {
        if missing.contains(&i) {
            continue;
        }
        let date = start + chrono::Duration::days(i);
        let wiggle = ((i as f64) * 1.3).sin() * 1.6;
        let sd = if i < 14 { 4.0 - 0.1 * i as f64 } else { 2.6 };
        let rising = i >= 38;
        let observed = if rising {
            61.5 + 3.0 * (i - 36) as f64
        } else {
            61.5 + wiggle
        };
        let mut hr = row(Signal::RestingHr, date, observed, 61.5, sd);
        if i < 7 {
            hr.status = PacketDayStatus::BuildingBaseline;
        } else if rising {
            hr.status = PacketDayStatus::Flagged;
            hr.conditioned = false;
        }
        rows.push(hr);
        let hrv_obs = if rising {
            33.0 - 2.0 * (i - 37) as f64
        } else {
            41.0 - wiggle * 2.0
        };
        let mut hrv = row(Signal::HrvRmssd, date, hrv_obs, 41.0, 6.0);
        if rising {
            hrv.status = PacketDayStatus::Flagged;
            hrv.conditioned = false;
        }
        rows.push(hrv);
    }
    let flag = episode(
        FlagLevel::Alert,
        "2024-04-08",
        "2024-04-11",
        "2024-04-11",
        4.6,
        4,
        true,
        &[(Signal::RestingHr, 3.4, 2.9), (Signal::HrvRmssd, -2.4, 1.7)],
    );
    (flag, rows)
}

/// The shared priors the packets' population bands come from.
pub fn priors() -> Vec<PriorParams> {
    [Signal::RestingHr, Signal::HrvRmssd]
        .into_iter()
        .map(PriorParams::initial)
        .collect()
}

/// The scenario's packet.
pub fn scenario_packet() -> FlagPacket {
    let (flag, rows) = scenario();
    build_packet(&flag, &rows, &priors()).expect("packet builds")
}

/// A running aggregator (gRPC) and review server over one database, with:
/// study [`STUDY`] (review level Watch) holding one Alert episode (resting
/// HR up, HRV down) and one Watch episode (HRV down, one day) from a
/// consenting device; study [`OTHER_STUDY`] holding one episode; reviewer [`REVIEWER`] assigned to [`STUDY`] only and
/// [`OUTSIDER`] assigned to [`OTHER_STUDY`] only (both with [`PASSWORD`]).
pub struct ReviewFixture {
    pub grpc: TestServer,
    pub review: RunningReview,
    /// Packet ids in STUDY: (alert, watch); then the one in OTHER_STUDY.
    pub packets: (u64, u64, u64),
}

impl ReviewFixture {
    pub async fn start(dir: &Path) -> ReviewFixture {
        ReviewFixture::start_limited(dir, LoginLimits::default()).await
    }

    /// [`ReviewFixture::start`] with failed sign-ins limited by `limits`.
    pub async fn start_limited(dir: &Path, limits: LoginLimits) -> ReviewFixture {
        let db = dir.join("agg.db");
        let signals = [Signal::RestingHr, Signal::HrvRmssd];
        let mut study = study_config(STUDY, &signals, 2, 3);
        study.review_level = plimsoll_server::packets::FlagLevel::Watch;
        let grpc =
            TestServer::start(&db, vec![study, study_config(OTHER_STUDY, &signals, 1, 1)]).await;
        let mut client = grpc.client();
        let columns: Vec<&str> = signals.iter().map(|s| s.column()).collect();
        let device = grpc
            .enroll(STUDY, "p-017", &columns, FlagSharing::Consented)
            .await;
        let mut sender = FlagSender::new(
            grpc.channel(),
            STUDY,
            device.clone(),
            FlagSharing::Consented,
        )
        .unwrap();
        let alert = sender.send(&scenario_packet()).await.unwrap();

        let (_, rows) = scenario();
        let watch_flag = episode(
            FlagLevel::Watch,
            "2024-03-25",
            "2024-03-25",
            "2024-03-25",
            3.2,
            1,
            false,
            &[(Signal::HrvRmssd, -3.2, 3.2)],
        );
        let watch_rows: Vec<DayRow> = rows
            .iter()
            .cloned()
            .map(|mut r| {
                if r.signal == Signal::HrvRmssd && r.date == day("2024-03-25") {
                    r.observed = 26.0;
                    r.z = -2.5;
                    r.status = PacketDayStatus::Flagged;
                }
                r
            })
            .collect();
        let watch = sender
            .send(&build_packet(&watch_flag, &watch_rows, &priors()).unwrap())
            .await
            .unwrap();

        // p-017's data summary over the real RPC (p-018 sends none): 42 days
        // from 2024-03-01 to 2024-04-11, resting HR on 40, HRV on 36.
        let summary = pb::SubmitDataSummaryRequest {
            study_id: STUDY.into(),
            device_id: device.device_id,
            first_day: "2024-03-01".into(),
            last_day: "2024-04-11".into(),
            signals: vec![
                pb::SignalCoverage {
                    signal: Signal::RestingHr.column().into(),
                    days_with_data: 40,
                    last_day: "2024-04-11".into(),
                },
                pb::SignalCoverage {
                    signal: Signal::HrvRmssd.column().into(),
                    days_with_data: 36,
                    last_day: "2024-04-10".into(),
                },
            ],
        };
        client
            .submit_data_summary(authorized(&device, summary))
            .await
            .unwrap();

        // A second device, without consent, so rounds can run: three rounds
        // with made-up updates give the overview a convergence chart.
        let quiet = grpc
            .enroll(STUDY, "p-018", &columns, FlagSharing::Withheld)
            .await;
        for round in 0..3u32 {
            for (k, id) in [&device, &quiet].into_iter().enumerate() {
                let request = pb::FetchTaskRequest {
                    study_id: STUDY.into(),
                    device_id: id.device_id,
                    wait_ms: 2_000,
                };
                let task = match client
                    .fetch_task(authorized(id, request))
                    .await
                    .unwrap()
                    .into_inner()
                    .work
                {
                    Some(pb::fetch_task_response::Work::Task(t)) => t,
                    other => panic!("expected a task in round {round}, got {other:?}"),
                };
                let updates = task
                    .shared
                    .iter()
                    .enumerate()
                    .map(|(j, p)| pb::SignalUpdate {
                        signal: p.signal.clone(),
                        values: p.values.iter().map(|v| v * 0.9 + 0.01 * k as f64).collect(),
                        n_days: 40,
                        local_loss: 1.4 + 0.2 * j as f64 + 0.5 * 0.5f64.powi(round as i32),
                    })
                    .collect();
                let request = pb::SubmitUpdateRequest {
                    study_id: STUDY.into(),
                    device_id: id.device_id,
                    round_id: task.round_id,
                    updates,
                };
                client.submit_update(authorized(id, request)).await.unwrap();
            }
        }

        let other_device = grpc
            .enroll(OTHER_STUDY, "q-001", &columns, FlagSharing::Consented)
            .await;
        let mut other_sender = FlagSender::new(
            grpc.channel(),
            OTHER_STUDY,
            other_device,
            FlagSharing::Consented,
        )
        .unwrap();
        let other = other_sender.send(&scenario_packet()).await.unwrap();

        {
            let mut store = Store::open(&crate::support::db_location(&db)).unwrap();
            accounts::add_reviewer(&mut store, REVIEWER, PASSWORD, now_ms()).unwrap();
            accounts::assign(&mut store, REVIEWER, STUDY).unwrap();
            accounts::add_reviewer(&mut store, OUTSIDER, PASSWORD, now_ms()).unwrap();
            accounts::assign(&mut store, OUTSIDER, OTHER_STUDY).unwrap();
        }
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let review =
            serve_review_limited(&crate::support::db_location(&db), listener, None, limits)
                .await
                .unwrap();
        ReviewFixture {
            grpc,
            review,
            packets: (alert, watch, other),
        }
    }

    pub fn addr(&self) -> SocketAddr {
        self.review.addr
    }

    pub async fn stop(self) {
        self.review.shutdown().await.unwrap();
        self.grpc.stop().await;
    }
}

/// One HTTP response, body as text.
#[derive(Debug)]
pub struct HttpResponse {
    pub status: u16,
    pub headers: Vec<(String, String)>,
    pub body: String,
}

impl HttpResponse {
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(k, _)| k.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.as_str())
    }
}

/// `application/x-www-form-urlencoded` encoding of one value.
pub fn urlencode(s: &str) -> String {
    let mut out = String::new();
    for b in s.bytes() {
        match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b'~' => {
                out.push(b as char)
            }
            b' ' => out.push('+'),
            _ => out.push_str(&format!("%{b:02X}")),
        }
    }
    out
}

pub fn form(fields: &[(&str, &str)]) -> String {
    fields
        .iter()
        .map(|(k, v)| format!("{}={}", urlencode(k), urlencode(v)))
        .collect::<Vec<_>>()
        .join("&")
}

/// Sends one request over a fresh connection (`Connection: close`) and reads
/// the whole response.
pub async fn http(
    addr: SocketAddr,
    method: &str,
    path: &str,
    cookie: Option<&str>,
    body: Option<(&str, String)>,
) -> HttpResponse {
    let stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    http_on(stream, &addr.to_string(), method, path, cookie, body).await
}

/// [`http`] over an open connection (plain TCP or TLS) to `host`.
pub async fn http_on(
    mut stream: impl tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin,
    host: &str,
    method: &str,
    path: &str,
    cookie: Option<&str>,
    body: Option<(&str, String)>,
) -> HttpResponse {
    let mut req = format!("{method} {path} HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n");
    if let Some(c) = cookie {
        req.push_str(&format!("Cookie: {c}\r\n"));
    }
    let body_bytes = match &body {
        Some((content_type, text)) => {
            req.push_str(&format!(
                "Content-Type: {content_type}\r\nContent-Length: {}\r\n",
                text.len()
            ));
            text.as_bytes().to_vec()
        }
        None => {
            if method == "POST" {
                req.push_str("Content-Length: 0\r\n");
            }
            Vec::new()
        }
    };
    req.push_str("\r\n");
    stream.write_all(req.as_bytes()).await.unwrap();
    stream.write_all(&body_bytes).await.unwrap();
    // Read the header block, then exactly Content-Length bytes (a server may
    // keep the connection open despite `Connection: close`), else to the end.
    let mut raw = Vec::new();
    let mut buf = [0u8; 16 * 1024];
    loop {
        if let Some(split) = raw.windows(4).position(|w| w == b"\r\n\r\n") {
            let head = String::from_utf8_lossy(&raw[..split]).to_ascii_lowercase();
            let length = head
                .lines()
                .find_map(|l| l.strip_prefix("content-length:"))
                .and_then(|v| v.trim().parse::<usize>().ok());
            if let Some(length) = length {
                while raw.len() < split + 4 + length {
                    let n = stream.read(&mut buf).await.unwrap();
                    assert!(n > 0, "connection closed before the whole body arrived");
                    raw.extend_from_slice(&buf[..n]);
                }
                break;
            }
            stream.read_to_end(&mut raw).await.unwrap();
            break;
        }
        let n = stream.read(&mut buf).await.unwrap();
        assert!(n > 0, "connection closed before the headers arrived");
        raw.extend_from_slice(&buf[..n]);
    }
    parse_response(&raw)
}

fn parse_response(raw: &[u8]) -> HttpResponse {
    let split = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .expect("response has a header block");
    let head = String::from_utf8_lossy(&raw[..split]).into_owned();
    let mut lines = head.split("\r\n");
    let status: u16 = lines
        .next()
        .and_then(|l| l.split(' ').nth(1))
        .and_then(|s| s.parse().ok())
        .expect("status line");
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(k, v)| (k.trim().to_owned(), v.trim().to_owned()))
        .collect();
    let mut body = raw[split + 4..].to_vec();
    let chunked = headers
        .iter()
        .any(|(k, v)| k.eq_ignore_ascii_case("transfer-encoding") && v.contains("chunked"));
    if chunked {
        body = dechunk(&body);
    }
    HttpResponse {
        status,
        headers,
        body: String::from_utf8_lossy(&body).into_owned(),
    }
}

fn dechunk(mut data: &[u8]) -> Vec<u8> {
    let mut out = Vec::new();
    loop {
        let Some(eol) = data.windows(2).position(|w| w == b"\r\n") else {
            return out;
        };
        let size_text = String::from_utf8_lossy(&data[..eol]);
        let size =
            usize::from_str_radix(size_text.split(';').next().unwrap().trim(), 16).unwrap_or(0);
        if size == 0 {
            return out;
        }
        let start = eol + 2;
        out.extend_from_slice(&data[start..start + size]);
        data = &data[start + size + 2..];
    }
}

/// Logs in; returns the `name=value` cookie pair.
pub async fn login(addr: SocketAddr, name: &str, password: &str) -> String {
    let r = http(
        addr,
        "POST",
        "/login",
        None,
        Some((
            "application/x-www-form-urlencoded",
            form(&[("name", name), ("password", password)]),
        )),
    )
    .await;
    assert_eq!(r.status, 303, "login as {name} should redirect: {}", r.body);
    let set = r.header("set-cookie").expect("login sets a cookie");
    set.split(';').next().unwrap().to_owned()
}

/// The CSRF token embedded in a page's forms.
pub fn csrf_of(page: &str) -> String {
    let marker = r#"name="csrf" value=""#;
    let at = page.find(marker).expect("page has a CSRF field") + marker.len();
    page[at..].split('"').next().unwrap().to_owned()
}
