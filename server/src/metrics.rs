//! Operator metrics in the OpenMetrics text format (which Prometheus scrapes),
//! served on a listener of their own (`serve --metrics-listen ADDR`, path
//! `/metrics`) through the `prometheus-client` crate.
//!
//! Two sources:
//! - **Calls**, counted in this process since it started, by a tower layer
//!   around every gRPC service ([`RpcMetricsLayer`]):
//!   `plimsoll_rpc_requests_total{service,method,code}` and the latency
//!   histogram `plimsoll_rpc_duration_seconds{service,method}`. The code is
//!   the gRPC status: the `grpc-status` header of a trailers-only response
//!   (how tonic answers every refusal of a unary call), `OK` otherwise. A
//!   submission refused with INVALID_ARGUMENT is therefore
//!   `{method="SubmitUpdate",code="INVALID_ARGUMENT"}`. Paths of no served
//!   service are counted under `service="unknown"` so a caller cannot grow
//!   the label set.
//! - **The database**, read at each scrape (so the figures are the study's,
//!   whichever process changed them, and survive restarts):
//!   `plimsoll_rounds_opened_total`, `plimsoll_rounds_closed_total`,
//!   `plimsoll_rounds_abandoned_total` (counters: the database's totals only
//!   grow), `plimsoll_devices_enrolled`, `plimsoll_devices_revoked`,
//!   `plimsoll_review_backlog_episodes` and
//!   `plimsoll_review_backlog_oldest_seconds` (gauges), each per `study`.
//!
//! Nothing here carries a participant label, a date or a value: counts and
//! durations only.

use std::future::Future;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::pin::Pin;
use std::sync::{Arc, Mutex};
use std::task::{Context, Poll};
use std::time::Instant;

use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{Histogram, exponential_buckets};
use prometheus_client::registry::Registry;
use tonic::Code;
use tonic::codegen::http;

use crate::error::Result;
use crate::params;
use crate::store::Store;

/// Services whose paths are counted by name.
const SERVICES: [&str; 3] = [
    "plimsoll.v1.Aggregator",
    "grpc.health.v1.Health",
    "grpc.reflection.v1.ServerReflection",
];

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct RpcLabels {
    service: String,
    method: String,
    code: &'static str,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct MethodLabels {
    service: String,
    method: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct StudyLabels {
    study: String,
}

/// The aggregator's metrics registry.
pub struct Metrics {
    registry: Registry,
    rpc_requests: Family<RpcLabels, Counter>,
    rpc_seconds: Family<MethodLabels, Histogram>,
    rounds_opened: Family<StudyLabels, Counter>,
    rounds_closed: Family<StudyLabels, Counter>,
    rounds_abandoned: Family<StudyLabels, Counter>,
    devices_enrolled: Family<StudyLabels, Gauge>,
    devices_revoked: Family<StudyLabels, Gauge>,
    backlog: Family<StudyLabels, Gauge>,
    backlog_oldest: Family<StudyLabels, Gauge<f64, std::sync::atomic::AtomicU64>>,
}

impl std::fmt::Debug for Metrics {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Metrics").finish_non_exhaustive()
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics::new()
    }
}

/// Canonical name of a gRPC status code (as in the gRPC specification's
/// status-code table).
pub fn code_name(code: Code) -> &'static str {
    match code {
        Code::Ok => "OK",
        Code::Cancelled => "CANCELLED",
        Code::Unknown => "UNKNOWN",
        Code::InvalidArgument => "INVALID_ARGUMENT",
        Code::DeadlineExceeded => "DEADLINE_EXCEEDED",
        Code::NotFound => "NOT_FOUND",
        Code::AlreadyExists => "ALREADY_EXISTS",
        Code::PermissionDenied => "PERMISSION_DENIED",
        Code::ResourceExhausted => "RESOURCE_EXHAUSTED",
        Code::FailedPrecondition => "FAILED_PRECONDITION",
        Code::Aborted => "ABORTED",
        Code::OutOfRange => "OUT_OF_RANGE",
        Code::Unimplemented => "UNIMPLEMENTED",
        Code::Internal => "INTERNAL",
        Code::Unavailable => "UNAVAILABLE",
        Code::DataLoss => "DATA_LOSS",
        Code::Unauthenticated => "UNAUTHENTICATED",
    }
}

/// `(service, method)` of a gRPC path `/package.Service/Method`; paths of
/// other services become `("unknown", "unknown")`.
fn rpc_of(path: &str) -> (String, String) {
    let mut parts = path.trim_start_matches('/').splitn(2, '/');
    match (parts.next(), parts.next()) {
        (Some(service), Some(method))
            if SERVICES.contains(&service)
                && !method.is_empty()
                && method.len() <= 64
                && method.bytes().all(|b| b.is_ascii_alphanumeric()) =>
        {
            (service.to_owned(), method.to_owned())
        }
        _ => ("unknown".to_owned(), "unknown".to_owned()),
    }
}

/// Raises `counter` to `total` (a database total that only grows).
fn raise_to(counter: &Counter, total: u64) {
    let now = counter.get();
    if total > now {
        counter.inc_by(total - now);
    }
}

impl Metrics {
    pub fn new() -> Metrics {
        let mut registry = Registry::with_prefix("plimsoll");
        // Latency buckets from 0.25 ms doubling to about 8 s.
        let rpc_seconds = Family::<MethodLabels, Histogram>::new_with_constructor(|| {
            Histogram::new(exponential_buckets(0.000_25, 2.0, 16))
        });
        let m = Metrics {
            rpc_requests: Family::default(),
            rpc_seconds,
            rounds_opened: Family::default(),
            rounds_closed: Family::default(),
            rounds_abandoned: Family::default(),
            devices_enrolled: Family::default(),
            devices_revoked: Family::default(),
            backlog: Family::default(),
            backlog_oldest: Family::default(),
            registry: Registry::default(),
        };
        registry.register(
            "rpc_requests",
            "gRPC calls answered by this process, by service, method and status code",
            m.rpc_requests.clone(),
        );
        registry.register(
            "rpc_duration_seconds",
            "Time from a gRPC call's arrival to its response headers",
            m.rpc_seconds.clone(),
        );
        registry.register(
            "rounds_opened",
            "Training rounds opened in the study (database total)",
            m.rounds_opened.clone(),
        );
        registry.register(
            "rounds_closed",
            "Training rounds closed with a published prior (database total)",
            m.rounds_closed.clone(),
        );
        registry.register(
            "rounds_abandoned",
            "Training rounds abandoned without a prior (database total)",
            m.rounds_abandoned.clone(),
        );
        registry.register(
            "devices_enrolled",
            "Devices enrolled in the study, revoked ones included",
            m.devices_enrolled.clone(),
        );
        registry.register(
            "devices_revoked",
            "Devices of the study that were revoked",
            m.devices_revoked.clone(),
        );
        registry.register(
            "review_backlog_episodes",
            "Episodes sent for review without any review action yet",
            m.backlog.clone(),
        );
        registry.register(
            "review_backlog_oldest_seconds",
            "Age of the oldest episode waiting for review (0 when none waits)",
            m.backlog_oldest.clone(),
        );
        Metrics { registry, ..m }
    }

    /// Counts one answered call.
    pub fn observe_rpc(&self, path: &str, code: Code, seconds: f64) {
        let (service, method) = rpc_of(path);
        self.rpc_seconds
            .get_or_create(&MethodLabels {
                service: service.clone(),
                method: method.clone(),
            })
            .observe(seconds);
        self.rpc_requests
            .get_or_create(&RpcLabels {
                service,
                method,
                code: code_name(code),
            })
            .inc();
    }

    /// Reads the database's figures (rounds, devices, review backlog) for every study.
    pub fn refresh_from(&self, store: &Store, now_ms: i64) -> Result<()> {
        for study in store.studies()? {
            let label = StudyLabels {
                study: study.study_id.clone(),
            };
            let rows = store.db().query_map(
                "SELECT state, COUNT(*) FROM rounds WHERE study_id = ?1 GROUP BY state",
                &params![study.study_id],
                |r| Ok((r.get::<String>(0)?, r.get::<i64>(1)?)),
            )?;
            let (mut opened, mut closed, mut abandoned) = (0u64, 0u64, 0u64);
            for (state, n) in rows {
                let n = n.max(0) as u64;
                opened += n;
                match state.as_str() {
                    "closed" => closed += n,
                    "abandoned" => abandoned += n,
                    _ => {}
                }
            }
            raise_to(&self.rounds_opened.get_or_create(&label), opened);
            raise_to(&self.rounds_closed.get_or_create(&label), closed);
            raise_to(&self.rounds_abandoned.get_or_create(&label), abandoned);
            let devices = store.devices(&study.study_id)?;
            self.devices_enrolled
                .get_or_create(&label)
                .set(devices.len() as i64);
            self.devices_revoked
                .get_or_create(&label)
                .set(devices.iter().filter(|d| d.revoked).count() as i64);
            let backlog = crate::review::db::backlog(store, &study.study_id)?;
            self.backlog.get_or_create(&label).set(backlog.new as i64);
            let oldest = match backlog.oldest_new_ms {
                Some(at) if backlog.new > 0 => (now_ms - at).max(0) as f64 / 1000.0,
                _ => 0.0,
            };
            self.backlog_oldest.get_or_create(&label).set(oldest);
        }
        Ok(())
    }

    /// The registry in the OpenMetrics text format.
    pub fn encode(&self) -> String {
        let mut out = String::new();
        prometheus_client::encoding::text::encode(&mut out, &self.registry)
            .expect("writing to a String cannot fail");
        out
    }
}

/// A tower layer that counts every gRPC call and its latency in [`Metrics`].
#[derive(Debug, Clone)]
pub struct RpcMetricsLayer {
    metrics: Arc<Metrics>,
}

impl RpcMetricsLayer {
    pub fn new(metrics: Arc<Metrics>) -> RpcMetricsLayer {
        RpcMetricsLayer { metrics }
    }
}

impl<S> tower::Layer<S> for RpcMetricsLayer {
    type Service = RpcMetricsService<S>;

    fn layer(&self, inner: S) -> Self::Service {
        RpcMetricsService {
            inner,
            metrics: self.metrics.clone(),
        }
    }
}

/// The service [`RpcMetricsLayer`] wraps around each gRPC service.
#[derive(Debug, Clone)]
pub struct RpcMetricsService<S> {
    inner: S,
    metrics: Arc<Metrics>,
}

impl<S, ReqBody, ResBody> tower::Service<http::Request<ReqBody>> for RpcMetricsService<S>
where
    S: tower::Service<http::Request<ReqBody>, Response = http::Response<ResBody>>,
    S::Future: Send + 'static,
{
    type Response = S::Response;
    type Error = S::Error;
    type Future = Pin<Box<dyn Future<Output = std::result::Result<S::Response, S::Error>> + Send>>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<std::result::Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, req: http::Request<ReqBody>) -> Self::Future {
        let path = req.uri().path().to_owned();
        let started = Instant::now();
        let metrics = self.metrics.clone();
        let answer = self.inner.call(req);
        Box::pin(async move {
            let response = answer.await;
            let code = match &response {
                Ok(r) => r
                    .headers()
                    .get("grpc-status")
                    .and_then(|v| v.to_str().ok())
                    .and_then(|v| v.parse::<i32>().ok())
                    .map_or(Code::Ok, Code::from_i32),
                Err(_) => Code::Unknown,
            };
            metrics.observe_rpc(&path, code, started.elapsed().as_secs_f64());
            response
        })
    }
}

/// A running metrics listener.
#[derive(Debug)]
pub struct RunningMetrics {
    pub addr: SocketAddr,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<std::io::Result<()>>,
}

impl RunningMetrics {
    /// Stops serving and waits.
    pub async fn shutdown(mut self) -> anyhow::Result<()> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        self.task.await??;
        Ok(())
    }
}

/// Content type of the OpenMetrics text format.
pub const CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// Serves `GET /metrics` on `listener`: `metrics` refreshed from the
/// database at `db` (a connection of its own) at each scrape.
pub async fn serve_metrics(
    listener: tokio::net::TcpListener,
    metrics: Arc<Metrics>,
    db: &Path,
) -> anyhow::Result<RunningMetrics> {
    use axum::response::IntoResponse;
    let addr = listener.local_addr()?;
    let store = Arc::new(Mutex::new(Store::open(db)?));
    let db: PathBuf = db.to_owned();
    let scrape = move || {
        let metrics = metrics.clone();
        let store = store.clone();
        let db = db.clone();
        async move {
            let read = tokio::task::spawn_blocking(move || {
                let store = store.lock().unwrap_or_else(|p| p.into_inner());
                metrics
                    .refresh_from(&store, crate::service::now_ms())
                    .map(|()| metrics.encode())
            })
            .await;
            match read {
                Ok(Ok(text)) => {
                    ([(axum::http::header::CONTENT_TYPE, CONTENT_TYPE)], text).into_response()
                }
                Ok(Err(e)) => {
                    tracing::error!(db = %db.display(), error = %e, "metrics: reading the database failed");
                    (
                        axum::http::StatusCode::INTERNAL_SERVER_ERROR,
                        format!("reading {}: {e}\n", db.display()),
                    )
                        .into_response()
                }
                Err(e) => (
                    axum::http::StatusCode::INTERNAL_SERVER_ERROR,
                    format!("metrics worker failed: {e}\n"),
                )
                    .into_response(),
            }
        }
    };
    let app = axum::Router::new().route("/metrics", axum::routing::get(scrape));
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let task = tokio::spawn(async move {
        axum::serve(listener, app)
            .with_graceful_shutdown(async {
                let _ = rx.await;
            })
            .await
    });
    tracing::info!(%addr, "metrics listening (GET /metrics)");
    Ok(RunningMetrics {
        addr,
        shutdown: Some(tx),
        task,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn paths_map_to_bounded_labels() {
        assert_eq!(
            rpc_of("/plimsoll.v1.Aggregator/SubmitUpdate"),
            ("plimsoll.v1.Aggregator".into(), "SubmitUpdate".into())
        );
        assert_eq!(
            rpc_of("/grpc.health.v1.Health/Check"),
            ("grpc.health.v1.Health".into(), "Check".into())
        );
        for odd in [
            "/evil.Service/X",
            "/plimsoll.v1.Aggregator/",
            "/",
            "/plimsoll.v1.Aggregator/a b",
        ] {
            assert_eq!(rpc_of(odd), ("unknown".into(), "unknown".into()), "{odd}");
        }
    }

    #[test]
    fn counts_and_latencies_appear_in_the_text() {
        let m = Metrics::new();
        m.observe_rpc("/plimsoll.v1.Aggregator/SubmitUpdate", Code::Ok, 0.002);
        m.observe_rpc(
            "/plimsoll.v1.Aggregator/SubmitUpdate",
            Code::InvalidArgument,
            0.001,
        );
        m.observe_rpc(
            "/plimsoll.v1.Aggregator/SubmitUpdate",
            Code::InvalidArgument,
            0.001,
        );
        let text = m.encode();
        assert!(text.contains(
            r#"plimsoll_rpc_requests_total{service="plimsoll.v1.Aggregator",method="SubmitUpdate",code="INVALID_ARGUMENT"} 2"#
        ), "{text}");
        assert!(text.contains(
            r#"plimsoll_rpc_duration_seconds_count{service="plimsoll.v1.Aggregator",method="SubmitUpdate"} 3"#
        ), "{text}");
        assert!(text.ends_with("# EOF\n"), "OpenMetrics ends with # EOF");
    }

    #[test]
    fn database_totals_only_raise_counters() {
        let c = Counter::default();
        raise_to(&c, 3);
        raise_to(&c, 2);
        assert_eq!(c.get(), 3);
        raise_to(&c, 5);
        assert_eq!(c.get(), 5);
    }
}
