//! The tonic service for `plimsoll.v1.Aggregator`, plus health and reflection,
//! and the task that closes rounds whose deadline passed.

use std::net::SocketAddr;
use std::sync::{Arc, OnceLock};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use plimsoll_proto::auth::{self, DeviceCredential};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_server::{Aggregator, AggregatorServer};
use tokio::net::TcpListener;
use tokio::sync::{mpsc, oneshot};
use tonic::transport::server::TcpIncoming;
use tonic::{Request, Response, Status};

use crate::error::AggregatorError;
use crate::rounds::{Coordinator, Enrollment, SecureSum, Submission};
use crate::study::{SubmitOutcome, Work};
use crate::tls::TlsIdentity;
use crate::wire;

/// Longest long-poll a device may ask for.
const MAX_WAIT_MS: u32 = 10_000;

/// Milliseconds since the Unix epoch.
pub fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

/// Most `SubmitUpdate` calls written in one transaction.
const MAX_SUBMIT_BATCH: usize = 512;

/// A `SubmitUpdate` call waiting for its batch, and where its answer goes.
type QueuedSubmission = (
    Submission,
    oneshot::Sender<crate::error::Result<SubmitOutcome>>,
);

/// gRPC front of a [`Coordinator`].
#[derive(Debug, Clone)]
pub struct AggregatorService {
    coordinator: Arc<Coordinator>,
    /// Queue of the task that writes `SubmitUpdate` calls in batches, started by the first call
    /// (so a service can be built outside a runtime).
    submissions: Arc<OnceLock<mpsc::UnboundedSender<QueuedSubmission>>>,
}

impl AggregatorService {
    pub fn new(coordinator: Arc<Coordinator>) -> Self {
        AggregatorService {
            coordinator,
            submissions: Arc::default(),
        }
    }

    /// Hands `submission` to the batch writer and waits for its answer.
    async fn submit(&self, submission: Submission) -> Result<SubmitOutcome, Status> {
        const RPC: &str = "SubmitUpdate";
        let queue = self.submissions.get_or_init(|| {
            let (tx, rx) = mpsc::unbounded_channel();
            tokio::spawn(write_submissions(self.coordinator.clone(), rx));
            tx
        });
        let (tx, rx) = oneshot::channel();
        let gone = || Status::unavailable(format!("{RPC}: the aggregator is shutting down"));
        queue.send((submission, tx)).map_err(|_| gone())?;
        rx.await
            .map_err(|_| gone())?
            .map_err(|e| in_rpc(RPC, wire::to_status(e)))
    }
}

impl AggregatorService {
    /// A long-poll of RPC `rpc`: runs the coordinator call `call()` makes (off the async
    /// threads) until `settled` accepts its answer or `wait_ms` (capped at [`MAX_WAIT_MS`])
    /// has passed, sleeping between calls until the coordinator publishes a change.
    async fn long_poll<T, F>(
        &self,
        rpc: &'static str,
        wait_ms: u32,
        mut call: impl FnMut() -> F,
        settled: impl Fn(&T) -> bool,
    ) -> Result<T, Status>
    where
        T: Send + 'static,
        F: FnOnce() -> crate::error::Result<T> + Send + 'static,
    {
        let wait = Duration::from_millis(u64::from(wait_ms.min(MAX_WAIT_MS)));
        let until = tokio::time::Instant::now() + wait;
        let mut changes = self.coordinator.subscribe();
        loop {
            changes.borrow_and_update();
            let answer = blocking(rpc, call()).await?;
            if settled(&answer) || tokio::time::Instant::now() >= until {
                return Ok(answer);
            }
            // Sleep until something changes, or the long-poll ends.
            let _ = tokio::time::timeout_at(until, changes.changed()).await;
        }
    }
}

/// Writes queued `SubmitUpdate` calls: takes every call waiting (up to [`MAX_SUBMIT_BATCH`]),
/// checks and records them with one [`Coordinator::submit_batch`] off the async threads, answers
/// each, and repeats. While one batch is written the next one gathers, so under load calls
/// share a commit and the worker hand-off; a lone call is written at once. Ends when every
/// service clone is gone.
async fn write_submissions(
    coordinator: Arc<Coordinator>,
    mut queue: mpsc::UnboundedReceiver<QueuedSubmission>,
) {
    let mut waiting = Vec::with_capacity(MAX_SUBMIT_BATCH);
    while queue.recv_many(&mut waiting, MAX_SUBMIT_BATCH).await > 0 {
        let (batch, replies): (Vec<_>, Vec<_>) = waiting.drain(..).unzip();
        let c = coordinator.clone();
        match tokio::task::spawn_blocking(move || c.submit_batch(batch, now_ms())).await {
            Ok(answers) => {
                for (answer, reply) in answers.into_iter().zip(replies) {
                    // A caller that went away needs no answer.
                    let _ = reply.send(answer);
                }
            }
            Err(e) => {
                tracing::error!(error = %e, "SubmitUpdate batch writer failed");
                // Dropping the replies answers each waiting call UNAVAILABLE.
            }
        }
    }
}

/// Runs a blocking coordinator call of RPC `rpc` off the async worker
/// threads; a refusal's message starts with the RPC's name.
async fn blocking<T: Send + 'static>(
    rpc: &'static str,
    f: impl FnOnce() -> crate::error::Result<T> + Send + 'static,
) -> Result<T, Status> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(|e| Status::internal(format!("{rpc}: worker failed: {e}")))?
        .map_err(|e| in_rpc(rpc, wire::to_status(e)))
}

/// `status` with its message prefixed by the RPC's name.
fn in_rpc(rpc: &str, status: Status) -> Status {
    Status::new(status.code(), format!("{rpc}: {}", status.message()))
}

/// The device credential in a call's metadata (UNAUTHENTICATED when it is
/// missing or malformed; whether it is valid is the coordinator's check).
fn credential<T>(rpc: &str, req: &Request<T>) -> Result<DeviceCredential, Status> {
    let refuse = |reason: String| {
        in_rpc(
            rpc,
            wire::to_status(AggregatorError::Unauthenticated(format!(
                "authorization: {reason}"
            ))),
        )
    };
    let value = req.metadata().get(auth::METADATA_KEY).ok_or_else(|| {
        refuse(
            "missing; every call but GetStudy and Enroll carries \
             `authorization: Bearer <device_id>.<device_secret>`"
                .into(),
        )
    })?;
    let value = value
        .to_str()
        .map_err(|_| refuse("not printable ASCII".into()))?;
    DeviceCredential::parse(value).map_err(refuse)
}

#[tonic::async_trait]
impl Aggregator for AggregatorService {
    async fn get_study(
        &self,
        req: Request<pb::GetStudyRequest>,
    ) -> Result<Response<pb::Study>, Status> {
        let c = self.coordinator.clone();
        let id = req.into_inner().study_id;
        let status = blocking("GetStudy", move || c.status(&id)).await?;
        Ok(Response::new(wire::status_to_pb(&status)))
    }

    async fn enroll(
        &self,
        req: Request<pb::EnrollRequest>,
    ) -> Result<Response<pb::EnrollResponse>, Status> {
        let c = self.coordinator.clone();
        let r = req.into_inner();
        let device_id = blocking("Enroll", move || {
            c.enroll(
                &Enrollment {
                    study_id: &r.study_id,
                    label: &r.participant_label,
                    signals: &r.signals,
                    consent_share_flags: r.consent_share_flags,
                    enrollment_code: &r.enrollment_code,
                    device_secret: &r.device_secret,
                    sensor_model: &r.sensor_model,
                    group_label: &r.group_label,
                },
                now_ms(),
            )
        })
        .await?;
        Ok(Response::new(pb::EnrollResponse { device_id }))
    }

    async fn fetch_task(
        &self,
        req: Request<pb::FetchTaskRequest>,
    ) -> Result<Response<pb::FetchTaskResponse>, Status> {
        let cred = credential("FetchTask", &req)?;
        let r = req.into_inner();
        let c = self.coordinator.clone();
        let (study_id, device_id) = (r.study_id.clone(), r.device_id);
        blocking("FetchTask", move || {
            c.authenticate(&study_id, Some(device_id), &cred)
        })
        .await?;
        let work = self
            .long_poll(
                "FetchTask",
                r.wait_ms,
                || {
                    let (c, study_id) = (self.coordinator.clone(), r.study_id.clone());
                    move || c.work_for(&study_id, r.device_id)
                },
                |work| !matches!(work, Work::Wait { .. }),
            )
            .await?;
        Ok(Response::new(wire::work_to_pb(work)))
    }

    async fn secure_step(
        &self,
        req: Request<pb::SecureStepRequest>,
    ) -> Result<Response<pb::SecureStepResponse>, Status> {
        const RPC: &str = "SecureStep";
        let cred = credential(RPC, &req)?;
        let r = req.into_inner();
        let mut message = match r.message {
            Some(m) => Some(
                wire::device_message_from_pb(cred.device_id, m)
                    .map_err(|e| in_rpc(RPC, wire::to_status(e)))?,
            ),
            None => None,
        };
        let sum = match r.stage {
            0 => SecureSum::Round(r.round_id),
            s => SecureSum::Stage(
                wire::detection_stage_from_pb(s).map_err(|e| in_rpc(RPC, wire::to_status(e)))?,
                r.round_id,
            ),
        };
        // The message goes with the first call only; later ones ask what comes next.
        let next = self
            .long_poll(
                RPC,
                r.wait_ms,
                || {
                    let (c, study_id, cred, m) = (
                        self.coordinator.clone(),
                        r.study_id.clone(),
                        cred.clone(),
                        message.take(),
                    );
                    move || c.secure_step(&study_id, r.device_id, &cred, sum, m, now_ms())
                },
                |next| !matches!(next, crate::secure_round::SecureNext::Wait(_)),
            )
            .await?;
        Ok(Response::new(wire::secure_next_to_pb(
            next,
            crate::rounds::RETRY_AFTER_MS,
        )))
    }

    async fn submit_update(
        &self,
        req: Request<pb::SubmitUpdateRequest>,
    ) -> Result<Response<pb::SubmitUpdateResponse>, Status> {
        let credential = credential("SubmitUpdate", &req)?;
        let r = req.into_inner();
        let outcome = self
            .submit(Submission {
                study_id: r.study_id,
                device_id: r.device_id,
                round_id: r.round_id,
                updates: wire::updates_from_pb(r.updates),
                credential,
            })
            .await?;
        Ok(Response::new(pb::SubmitUpdateResponse {
            accepted_in_round: outcome.accepted_in_round,
            round_closed: outcome.round_closed,
        }))
    }

    async fn get_prior(
        &self,
        req: Request<pb::GetPriorRequest>,
    ) -> Result<Response<pb::PublishedPrior>, Status> {
        let cred = credential("GetPrior", &req)?;
        let c = self.coordinator.clone();
        let r = req.into_inner();
        let version = (r.version != 0).then_some(r.version);
        let study_id = r.study_id.clone();
        let (prior, model) = blocking("GetPrior", move || {
            c.authenticate(&study_id, None, &cred)?;
            c.prior_for_device(&study_id, version, cred.device_id)
        })
        .await?;
        Ok(Response::new(wire::prior_to_pb(
            &r.study_id,
            &prior,
            model.as_deref(),
        )))
    }

    async fn submit_flag_packet(
        &self,
        req: Request<pb::SubmitFlagPacketRequest>,
    ) -> Result<Response<pb::SubmitFlagPacketResponse>, Status> {
        let cred = credential("SubmitFlagPacket", &req)?;
        let c = self.coordinator.clone();
        let r = req.into_inner();
        let packet = wire::flag_packet_from_pb(r.packet);
        let stored = blocking("SubmitFlagPacket", move || {
            c.authenticate(&r.study_id, Some(r.device_id), &cred)?;
            // Consent is checked before the packet is even decoded, so a
            // device without consent is always told about consent first.
            c.require_flag_consent(&r.study_id, r.device_id)?;
            c.submit_flag_packet(&r.study_id, r.device_id, &packet?, now_ms())
        })
        .await?;
        Ok(Response::new(pb::SubmitFlagPacketResponse {
            packet_id: stored.packet_id,
            revisions: stored.revisions,
        }))
    }

    async fn submit_data_summary(
        &self,
        req: Request<pb::SubmitDataSummaryRequest>,
    ) -> Result<Response<pb::SubmitDataSummaryResponse>, Status> {
        let cred = credential("SubmitDataSummary", &req)?;
        let c = self.coordinator.clone();
        let r = req.into_inner();
        blocking("SubmitDataSummary", move || {
            c.authenticate(&r.study_id, Some(r.device_id), &cred)?;
            let summary = wire::data_summary_from_pb(&r)?;
            c.submit_data_summary(&r.study_id, r.device_id, &summary, now_ms())
        })
        .await?;
        Ok(Response::new(pb::SubmitDataSummaryResponse {}))
    }

    async fn submit_detection_stats(
        &self,
        req: Request<pb::SubmitDetectionStatsRequest>,
    ) -> Result<Response<pb::SubmitDetectionStatsResponse>, Status> {
        let cred = credential("SubmitDetectionStats", &req)?;
        let c = self.coordinator.clone();
        let r = req.into_inner();
        let outcome = blocking("SubmitDetectionStats", move || {
            c.authenticate(&r.study_id, Some(r.device_id), &cred)?;
            let stats = wire::detection_stats_from_pb(r.stats)?;
            c.submit_detection_stats(&r.study_id, r.device_id, &stats, now_ms())
        })
        .await?;
        Ok(Response::new(pb::SubmitDetectionStatsResponse {
            devices_submitted: outcome.devices_submitted,
            stage_complete: outcome.stage_complete,
        }))
    }

    async fn get_detection_calibration(
        &self,
        req: Request<pb::GetDetectionCalibrationRequest>,
    ) -> Result<Response<pb::DetectionCalibration>, Status> {
        const RPC: &str = "GetDetectionCalibration";
        let cred = credential(RPC, &req)?;
        let r = req.into_inner();
        let c = self.coordinator.clone();
        let (study_id, device_id) = (r.study_id.clone(), r.device_id);
        let stage = blocking(RPC, move || {
            c.authenticate(&study_id, Some(device_id), &cred)?;
            wire::detection_stage_from_pb(r.stage)
        })
        .await?;
        let view = self
            .long_poll(
                RPC,
                r.wait_ms,
                || {
                    let (c, study_id) = (self.coordinator.clone(), r.study_id.clone());
                    move || c.detection_stage(&study_id, r.device_id, stage)
                },
                |view| view.complete,
            )
            .await?;
        Ok(Response::new(wire::stage_view_to_pb(view)))
    }
}

/// Closes rounds whose deadline passed, every `period`, until the coordinator
/// is dropped by everyone else.
pub async fn run_deadline_ticker(coordinator: Arc<Coordinator>, period: Duration) {
    let mut interval = tokio::time::interval(period);
    interval.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        interval.tick().await;
        if Arc::strong_count(&coordinator) == 1 {
            return;
        }
        let c = coordinator.clone();
        match tokio::task::spawn_blocking(move || c.tick(now_ms())).await {
            Ok(Ok(_)) => {}
            Ok(Err(e)) => tracing::error!(error = %e, "deadline check failed"),
            Err(e) => tracing::error!(error = %e, "deadline task failed"),
        }
    }
}

/// A running aggregator: its bound address and a handle to stop it.
#[derive(Debug)]
pub struct RunningServer {
    pub addr: SocketAddr,
    /// The calls this server answered, for a metrics listener
    /// ([`crate::metrics::serve_metrics`]).
    pub metrics: Arc<crate::metrics::Metrics>,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), tonic::transport::Error>>,
}

impl RunningServer {
    /// Stops accepting calls, finishes the ones in flight and waits.
    pub async fn shutdown(mut self) -> anyhow::Result<()> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        self.task.await??;
        Ok(())
    }
}

/// Serves the aggregator, health and reflection services on `listener`,
/// in plaintext (for loopback; see [`serve_with`]).
pub async fn serve(
    coordinator: Arc<Coordinator>,
    listener: TcpListener,
) -> anyhow::Result<RunningServer> {
    serve_with(coordinator, listener, None).await
}

/// [`serve`], over TLS when `tls` is given.
pub async fn serve_with(
    coordinator: Arc<Coordinator>,
    listener: TcpListener,
    tls: Option<&TlsIdentity>,
) -> anyhow::Result<RunningServer> {
    let addr = listener.local_addr()?;
    let (health_reporter, health_service) = tonic_health::server::health_reporter();
    health_reporter
        .set_serving::<AggregatorServer<AggregatorService>>()
        .await;
    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()?;
    tokio::spawn(run_deadline_ticker(
        coordinator.clone(),
        Duration::from_millis(100),
    ));
    let service = AggregatorServer::new(AggregatorService::new(coordinator));
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let mut builder = tonic::transport::Server::builder();
    if let Some(tls) = tls {
        builder = builder.tls_config(tls.grpc_config())?;
    }
    let metrics = Arc::new(crate::metrics::Metrics::new());
    let mut builder = builder.layer(crate::metrics::RpcMetricsLayer::new(metrics.clone()));
    // `TCP_NODELAY` on every accepted connection. The builder's own `tcp_nodelay` does not
    // apply to a listener handed in, and without it Nagle's algorithm held small answers back
    // until the peer's delayed acknowledgement: the load example's slowest calls sat at
    // 47–58 ms.
    let incoming = TcpIncoming::from(listener).with_nodelay(Some(true));
    let task = tokio::spawn(
        builder
            .add_service(health_service)
            .add_service(reflection)
            .add_service(service)
            .serve_with_incoming_shutdown(incoming, async {
                let _ = rx.await;
            }),
    );
    tracing::info!(%addr, tls = tls.is_some(), "aggregator listening");
    Ok(RunningServer {
        metrics,
        addr,
        shutdown: Some(tx),
        task,
    })
}
