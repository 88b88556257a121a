//! Bounded load test on loopback: N simulated devices (default 10,000) enrol,
//! fetch their task and submit one update each in a single round. Prints
//! updates per second, p50/p99 submit latency, and the process's peak memory
//! (server and clients share the process, so it is an upper bound on the
//! server's), with the ratio against the 5,000 updates/s target. The same run is then
//! repeated over TLS (a development certificate, rustls on both ends) and printed beside it,
//! with the TLS run's rate as a ratio of the plaintext one (the named baseline).
//!
//! `cargo run --release -p plimsoll-server --example load -- [DEVICES] [CONCURRENCY]`

use std::sync::Arc;
use std::time::{Duration, Instant};

use plimsoll_proto::auth::{DeviceCredential, authorized};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::secrets::random_token;
use plimsoll_server::tls::write_dev_certificate;
use plimsoll_server::{
    Coordinator, LocalTraining, SignalLayout, StudyConfig, TlsIdentity, serve_with, service::now_ms,
};
use tokio::sync::Semaphore;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint};

const TARGET_UPDATES_PER_S: f64 = 5_000.0;

fn peak_rss_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .map(str::to_owned)
        })
        .and_then(|l| {
            l.split_whitespace()
                .nth(1)
                .and_then(|kb| kb.parse::<f64>().ok())
        })
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

/// What one run measured.
struct Measured {
    enroll_s: f64,
    submit_s: f64,
    p50_ms: f64,
    p99_ms: f64,
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let n: usize = args.get(1).map_or(Ok(10_000), |s| s.parse())?;
    let concurrency: usize = args.get(2).map_or(Ok(256), |s| s.parse())?;
    println!("devices {n}, concurrency {concurrency}, 8 HTTP/2 connections, loopback");
    let plain = run(n, concurrency, false).await?;
    let tls = run(n, concurrency, true).await?;
    println!("transport   enrolments/s   updates/s   ratio to target   p50 ms   p99 ms");
    for (name, m) in [("plaintext", &plain), ("TLS", &tls)] {
        let rate = n as f64 / m.submit_s;
        println!(
            "{name:<9}   {:>12.0}   {rate:>9.0}   {:>14.2}×   {:>6.2}   {:>6.2}",
            n as f64 / m.enroll_s,
            rate / TARGET_UPDATES_PER_S,
            m.p50_ms,
            m.p99_ms,
        );
    }
    println!(
        "TLS updates/s as a share of plaintext (the baseline of this run): {:.2}×",
        plain.submit_s / tls.submit_s
    );
    println!(
        "peak RSS of the whole process (both runs, server and clients) {:.0} MB",
        peak_rss_mb()
    );
    Ok(())
}

/// One load run: a fresh aggregator, `n` devices enrolling and submitting one update each.
async fn run(n: usize, concurrency: usize, tls: bool) -> anyhow::Result<Measured> {
    let dir = tempfile::tempdir()?;
    let coordinator = Arc::new(Coordinator::open(&dir.path().join("load.db"))?);
    let code = coordinator.create_study(
        StudyConfig {
            study_id: "load".into(),
            title: "load test".into(),
            signals: vec![SignalLayout {
                signal: "resting_hr_bpm".into(),
                param_names: (0..7).map(|i| format!("p{i}")).collect(),
                reference_center: 65.0,
                reference_scale: 10.0,
                initial: vec![0.0; 7],
            }],
            rounds: 1,
            training: LocalTraining::default(),
            fraction_per_round: 1.0,
            min_quorum: n as u32,
            start_when_enrolled: n as u32,
            round_deadline_ms: 600_000,
            selection_seed: 1,
            aggregation: Default::default(),
            alert_budget_per_participant_month:
                plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
            review_level: plimsoll_server::packets::FlagLevel::Alert,
        },
        now_ms(),
    )?;
    let certs = if tls {
        let files = write_dev_certificate(&dir.path().join("certs"), &["localhost".into()], 7)?;
        let identity = TlsIdentity::load(&files.cert, &files.key)?;
        Some((std::fs::read(&files.ca)?, identity))
    } else {
        None
    };
    let server = serve_with(
        coordinator.clone(),
        tokio::net::TcpListener::bind("127.0.0.1:0").await?,
        certs.as_ref().map(|(_, identity)| identity),
    )
    .await?;
    // A few HTTP/2 connections, many streams each, as a fleet behind a
    // gateway would look; every call is a real gRPC request on loopback.
    let port = server.addr.port();
    let channels: Vec<Channel> = (0..8)
        .map(|_| -> anyhow::Result<Channel> {
            Ok(match &certs {
                Some((ca, _)) => Endpoint::from_shared(format!("https://localhost:{port}"))?
                    .tls_config(
                        ClientTlsConfig::new()
                            .ca_certificate(Certificate::from_pem(ca))
                            .domain_name("localhost"),
                    )?
                    .connect_lazy(),
                None => Endpoint::from_shared(format!("http://{}", server.addr))?.connect_lazy(),
            })
        })
        .collect::<Result<_, _>>()?;
    let gate = Arc::new(Semaphore::new(concurrency));

    let t0 = Instant::now();
    let mut set = tokio::task::JoinSet::new();
    for i in 0..n {
        let mut c = AggregatorClient::new(channels[i % channels.len()].clone());
        let gate = gate.clone();
        let code = code.clone();
        set.spawn(async move {
            let _p = gate.acquire_owned().await?;
            let secret = random_token();
            let r = c
                .enroll(pb::EnrollRequest {
                    study_id: "load".into(),
                    participant_label: format!("dev-{i:05}"),
                    signals: vec!["resting_hr_bpm".into()],
                    enrollment_code: code,
                    device_secret: secret.clone(),
                    ..Default::default()
                })
                .await?;
            anyhow::Ok(DeviceCredential {
                device_id: r.into_inner().device_id,
                secret,
            })
        });
    }
    let mut ids = Vec::with_capacity(n);
    while let Some(r) = set.join_next().await {
        ids.push(r??);
    }
    let enroll_s = t0.elapsed().as_secs_f64();

    let first = pb::FetchTaskRequest {
        study_id: "load".into(),
        device_id: ids[0].device_id,
        wait_ms: 5_000,
    };
    let round_id = match AggregatorClient::new(channels[0].clone())
        .fetch_task(authorized(&ids[0], first))
        .await?
        .into_inner()
        .work
    {
        Some(pb::fetch_task_response::Work::Task(t)) => t.round_id,
        other => anyhow::bail!("no task: {other:?}"),
    };

    let t1 = Instant::now();
    let mut set = tokio::task::JoinSet::new();
    for (i, id) in ids.into_iter().enumerate() {
        let mut c = AggregatorClient::new(channels[i % channels.len()].clone());
        let gate = gate.clone();
        set.spawn(async move {
            let _p = gate.acquire_owned().await?;
            let start = Instant::now();
            let request = pb::SubmitUpdateRequest {
                study_id: "load".into(),
                device_id: id.device_id,
                round_id,
                updates: vec![pb::SignalUpdate {
                    signal: "resting_hr_bpm".into(),
                    values: vec![(i % 7) as f64; 7],
                    n_days: 180,
                    local_loss: 1.0,
                }],
            };
            c.submit_update(authorized(&id, request)).await?;
            anyhow::Ok(start.elapsed())
        });
    }
    let mut latencies: Vec<Duration> = Vec::with_capacity(n);
    while let Some(r) = set.join_next().await {
        latencies.push(r??);
    }
    let submit_s = t1.elapsed().as_secs_f64();
    latencies.sort();
    let pct =
        |q: f64| latencies[((q * (n - 1) as f64).round() as usize).min(n - 1)].as_secs_f64() * 1e3;
    let status = coordinator.status("load")?;
    server.shutdown().await?;
    anyhow::ensure!(status.rounds_completed == 1, "the round did not close");
    Ok(Measured {
        enroll_s,
        submit_s,
        p50_ms: pct(0.50),
        p99_ms: pct(0.99),
    })
}
