//! Bounded load test on loopback: N simulated devices (default 10,000) enrol,
//! fetch their task and submit one update each in a single round. Prints
//! updates per second, p50/p99 submit latency, and the process's peak memory
//! (server and clients share the process, so it is an upper bound on the
//! server's), with the ratio against the 20,000 updates/s target. The same run is then
//! repeated over TLS (a development certificate, rustls on both ends) and printed beside it,
//! with the TLS run's rate as a ratio of the plaintext one (the named baseline).
//!
//! An unmeasured warm-up run with a fifth of the devices comes first.
//!
//! The aggregator runs on a runtime of its own (threads named `aggregator`, two workers) and the
//! simulated devices on another, so the CPU time each side spends per update is read from the
//! threads' own counters (`/proc/self/task/*/stat`) and printed too: on a shared machine it is
//! steadier than the wall-clock rate. The devices' runtime has one thread (the main one): they
//! stand for separate machines, and on two workers the handovers of their calls between threads
//! took 10–20 µs per update from the cores the aggregator shares with them, work no device
//! fleet puts on the aggregator's machine (measured: 39–45 µs of the devices' CPU per update on
//! one thread against 51–65 µs on two workers, plaintext runs). Each of CONCURRENCY tasks takes
//! the next device until none is left, so CONCURRENCY calls are in flight.
//!
//! With `--postgres URL` (a PostgreSQL server the run may create databases on), the runs are
//! instead: SQLite (the named baseline), PostgreSQL behind one aggregator, and PostgreSQL behind
//! two aggregators (replicas, each with its own gRPC server; devices alternate between them for
//! every call), all in plaintext, each on a fresh database, with each run's rate as a ratio of
//! SQLite's.
//!
//! `cargo run --release -p plimsoll-server --example load -- [DEVICES] [CONCURRENCY] [--postgres URL]`

use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use plimsoll_proto::auth::{DeviceCredential, authorized};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::secrets::random_token;
use plimsoll_server::tls::write_dev_certificate;
use plimsoll_server::{
    Coordinator, LocalTraining, SignalLayout, StudyConfig, TlsIdentity, serve_with, service::now_ms,
};
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint};

/// The aggregator's goal: 20,000 updates/s with p99 submit latency under 50 ms.
const TARGET_UPDATES_PER_S: f64 = 20_000.0;

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

/// Thread-name prefix of the aggregator's runtime.
const SERVER_THREADS: &str = "aggregator";

/// CPU seconds (user + system) used so far by this process's threads, split
/// into (aggregator threads, all others), from `/proc/self/task/*/stat`.
/// Threads that ended are not counted, so read it around a phase, not across runs.
fn cpu_seconds() -> (f64, f64) {
    // Clock ticks per second; 100 on every Linux this runs on (`getconf CLK_TCK`, common practice).
    const TICKS: f64 = 100.0;
    let (mut server, mut other) = (0.0, 0.0);
    let Ok(tasks) = std::fs::read_dir("/proc/self/task") else {
        return (f64::NAN, f64::NAN);
    };
    for task in tasks.flatten() {
        let Ok(stat) = std::fs::read_to_string(task.path().join("stat")) else {
            continue;
        };
        // `pid (comm) state …`: comm may hold spaces, so split after the last ')'.
        let (Some(open), Some(close)) = (stat.find('('), stat.rfind(')')) else {
            continue;
        };
        let comm = &stat[open + 1..close];
        let fields: Vec<&str> = stat[close + 2..].split_whitespace().collect();
        // Fields 14 and 15 of proc(5) (utime, stime) are 11 and 12 after the comm.
        let ticks: f64 = fields.get(11..13).map_or(0.0, |f| {
            f.iter().filter_map(|v| v.parse::<f64>().ok()).sum()
        });
        if comm.starts_with(SERVER_THREADS) {
            server += ticks / TICKS;
        } else {
            other += ticks / TICKS;
        }
    }
    (server, other)
}

/// What one run measured.
struct Measured {
    enroll_s: f64,
    submit_s: f64,
    p50_ms: f64,
    p99_ms: f64,
    /// CPU seconds of the aggregator's and the devices' threads in the submit phase.
    server_cpu_s: f64,
    client_cpu_s: f64,
}

/// Where a run keeps the aggregator's state.
#[derive(Clone, Copy)]
enum Store<'a> {
    Sqlite,
    /// A fresh database on this PostgreSQL server, behind this many aggregators.
    Postgres {
        admin_url: &'a str,
        replicas: usize,
    },
}

fn main() -> anyhow::Result<()> {
    let mut args: Vec<String> = std::env::args().skip(1).collect();
    let postgres = match args.iter().position(|a| a == "--postgres") {
        Some(i) => {
            anyhow::ensure!(i + 1 < args.len(), "--postgres needs a URL");
            let url = args.remove(i + 1);
            args.remove(i);
            Some(url)
        }
        None => None,
    };
    let n: usize = args.first().map_or(Ok(10_000), |s| s.parse())?;
    let concurrency: usize = args.get(1).map_or(Ok(256), |s| s.parse())?;
    let runtime = |name: &str| {
        tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .thread_name(name)
            .enable_all()
            .build()
    };
    let server_rt = runtime(SERVER_THREADS)?;
    let client_rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    println!("devices {n}, concurrency {concurrency}, 8 HTTP/2 connections, loopback");
    // An unmeasured warm-up run (its own aggregator, a fifth of the devices): without it the
    // first measured run carried the process's start-up costs (thread pools, allocator growth,
    // page faults) and came out slower whichever transport went first.
    client_rt.block_on(run(
        server_rt.handle(),
        n.div_ceil(5),
        concurrency,
        false,
        Store::Sqlite,
    ))?;
    if let Some(admin_url) = &postgres {
        return compare_stores(&server_rt, &client_rt, n, concurrency, admin_url);
    }
    let plain = client_rt.block_on(run(
        server_rt.handle(),
        n,
        concurrency,
        false,
        Store::Sqlite,
    ))?;
    let tls = client_rt.block_on(run(server_rt.handle(), n, concurrency, true, Store::Sqlite))?;
    println!(
        "transport   enrolments/s   updates/s   ratio to target   p50 ms   p99 ms   \
         aggregator CPU µs/update   devices CPU µs/update"
    );
    for (name, m) in [("plaintext", &plain), ("TLS", &tls)] {
        let rate = n as f64 / m.submit_s;
        println!(
            "{name:<9}   {:>12.0}   {rate:>9.0}   {:>14.2}×   {:>6.2}   {:>6.2}   {:>24.0}   {:>21.0}",
            n as f64 / m.enroll_s,
            rate / TARGET_UPDATES_PER_S,
            m.p50_ms,
            m.p99_ms,
            m.server_cpu_s / n as f64 * 1e6,
            m.client_cpu_s / n as f64 * 1e6,
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

/// SQLite, then PostgreSQL behind one and behind two aggregators, in plaintext.
fn compare_stores(
    server_rt: &tokio::runtime::Runtime,
    client_rt: &tokio::runtime::Runtime,
    n: usize,
    concurrency: usize,
    admin_url: &str,
) -> anyhow::Result<()> {
    let admin = plimsoll_server::db::Db::postgres(admin_url)?;
    let setting = |name: &str| -> anyhow::Result<String> {
        Ok(admin.query_row(
            "SELECT setting FROM pg_settings WHERE name = ?1",
            &plimsoll_server::params![name],
            |r| r.get::<String>(0),
        )?)
    };
    let version = admin.query_row("SELECT version()", &plimsoll_server::params![], |r| {
        r.get::<String>(0)
    })?;
    println!(
        "PostgreSQL: {version}; fsync {}, synchronous_commit {}",
        setting("fsync")?,
        setting("synchronous_commit")?
    );
    let mut rows = Vec::new();
    for (name, store) in [
        ("SQLite (baseline)", Store::Sqlite),
        (
            "PostgreSQL, 1 aggregator",
            Store::Postgres {
                admin_url,
                replicas: 1,
            },
        ),
        (
            "PostgreSQL, 2 aggregators",
            Store::Postgres {
                admin_url,
                replicas: 2,
            },
        ),
    ] {
        let m = client_rt
            .block_on(run(server_rt.handle(), n, concurrency, false, store))
            .map_err(|e| e.context(format!("run \"{name}\"")))?;
        println!(
            "  {name}: enrolled in {:.1} s, submitted in {:.1} s",
            m.enroll_s, m.submit_s
        );
        rows.push((name, m));
    }
    println!(
        "store                        enrolments/s   updates/s   ratio to SQLite   p50 ms   p99 ms   \
         aggregator CPU µs/update"
    );
    let baseline = n as f64 / rows[0].1.submit_s;
    for (name, m) in &rows {
        let rate = n as f64 / m.submit_s;
        println!(
            "{name:<27}   {:>12.0}   {rate:>9.0}   {:>14.2}×   {:>6.2}   {:>6.2}   {:>24.0}",
            n as f64 / m.enroll_s,
            rate / baseline,
            m.p50_ms,
            m.p99_ms,
            m.server_cpu_s / n as f64 * 1e6,
        );
    }
    println!(
        "(aggregator CPU counts the aggregators' threads only; PostgreSQL's own processes are not \
         in it)"
    );
    Ok(())
}

/// A fresh, empty database on the PostgreSQL server at `admin_url`; its URL.
fn fresh_database(admin_url: &str) -> anyhow::Result<String> {
    let name = format!(
        "plimsoll_load_{}_{}",
        std::process::id(),
        random_token()[..12].to_owned()
    );
    plimsoll_server::db::Db::postgres(admin_url)?
        .execute_batch(&format!("CREATE DATABASE {name}"))?;
    let (base, _) = admin_url
        .rsplit_once('/')
        .ok_or_else(|| anyhow::anyhow!("--postgres: a URL ending in a database name"))?;
    Ok(format!("{base}/{name}"))
}

/// Runs `call(i)` for every `i` in `0..n` with at most `concurrency` calls in flight: each of
/// `concurrency` tasks takes the next `i` until none is left. Answers in the order of `i`.
async fn in_flight<T, F, Fut>(n: usize, concurrency: usize, call: F) -> anyhow::Result<Vec<T>>
where
    T: Send + 'static,
    F: Fn(usize) -> Fut + Send + Sync + 'static,
    Fut: std::future::Future<Output = anyhow::Result<T>> + Send + 'static,
{
    let next = Arc::new(AtomicUsize::new(0));
    let call = Arc::new(call);
    let mut set = tokio::task::JoinSet::new();
    for _ in 0..concurrency.clamp(1, n.max(1)) {
        let (next, call) = (next.clone(), call.clone());
        set.spawn(async move {
            let mut done = Vec::new();
            loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                if i >= n {
                    return anyhow::Ok(done);
                }
                done.push((i, call(i).await?));
            }
        });
    }
    let mut all: Vec<Option<T>> = (0..n).map(|_| None).collect();
    while let Some(r) = set.join_next().await {
        for (i, answer) in r?? {
            all[i] = Some(answer);
        }
    }
    Ok(all
        .into_iter()
        .map(|a| a.expect("every index taken once"))
        .collect())
}

/// One load run: a fresh aggregator (or several on one PostgreSQL database), `n` devices
/// enrolling and submitting one update each.
async fn run(
    server_rt: &tokio::runtime::Handle,
    n: usize,
    concurrency: usize,
    tls: bool,
    store: Store<'_>,
) -> anyhow::Result<Measured> {
    let dir = tempfile::tempdir()?;
    let (location, replicas) = match store {
        Store::Sqlite => (dir.path().join("load.db"), 1),
        Store::Postgres {
            admin_url,
            replicas,
        } => (
            std::path::PathBuf::from(fresh_database(admin_url)?),
            replicas,
        ),
    };
    let coordinator = Arc::new(Coordinator::open(&location)?);
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
            sensor_models: None,
            subgroups: None,
            dp: None,
            secure_aggregation: None,
            alert_direction: None,
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
    // The first aggregator serves the study it created; the others open the same database.
    let mut coordinators = vec![coordinator.clone()];
    for _ in 1..replicas {
        coordinators.push(Arc::new(Coordinator::open(&location)?));
    }
    let mut servers = Vec::new();
    for served in coordinators {
        let identity = certs.as_ref().map(|(_, identity)| identity.clone());
        servers.push(
            server_rt
                .spawn(async move {
                    serve_with(
                        served,
                        tokio::net::TcpListener::bind("127.0.0.1:0").await?,
                        identity.as_ref(),
                    )
                    .await
                })
                .await??,
        );
    }
    // A few HTTP/2 connections, many streams each, as a fleet behind a
    // gateway would look; every call is a real gRPC request on loopback. With replicas the
    // connections alternate between them, so consecutive devices reach different ones.
    let channels: Vec<Channel> = (0..8)
        .map(|k| -> anyhow::Result<Channel> {
            let server = &servers[k % servers.len()];
            let port = server.addr.port();
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
    let t0 = Instant::now();
    let (to, code_for_all) = (channels.clone(), code.clone());
    let enrolled = in_flight(n, concurrency, move |i| {
        let mut c = AggregatorClient::new(to[i % to.len()].clone());
        let code = code_for_all.clone();
        async move {
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
        }
    })
    .await?;
    let ids: Arc<Vec<DeviceCredential>> = Arc::new(enrolled);
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

    let cpu0 = cpu_seconds();
    let t1 = Instant::now();
    let (to, all_ids) = (channels.clone(), ids.clone());
    let mut latencies = in_flight(n, concurrency, move |i| {
        let mut c = AggregatorClient::new(to[i % to.len()].clone());
        let ids = all_ids.clone();
        async move {
            let id = &ids[i];
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
            c.submit_update(authorized(id, request)).await?;
            anyhow::Ok(start.elapsed())
        }
    })
    .await?;
    let submit_s = t1.elapsed().as_secs_f64();
    let cpu1 = cpu_seconds();
    latencies.sort();
    let pct =
        |q: f64| latencies[((q * (n - 1) as f64).round() as usize).min(n - 1)].as_secs_f64() * 1e3;
    // With replicas the round may have closed in another process: this one sees it within its
    // sync interval (100 ms), so look again for a little while before calling it a failure.
    let mut status = coordinator.status("load")?;
    for _ in 0..50 {
        if status.rounds_completed == 1 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
        status = coordinator.status("load")?;
    }
    for server in servers {
        server.shutdown().await?;
    }
    anyhow::ensure!(status.rounds_completed == 1, "the round did not close");
    Ok(Measured {
        enroll_s,
        submit_s,
        p50_ms: pct(0.50),
        p99_ms: pct(0.99),
        server_cpu_s: cpu1.0 - cpu0.0,
        client_cpu_s: cpu1.1 - cpu0.1,
    })
}
