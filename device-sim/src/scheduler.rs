//! Federated training of a large in-process cohort with bounded work: every participant's
//! device enrols over gRPC through a pool of at most [`PoolOptions::workers`] devices at a
//! time, then a scheduler watches the coordinator ([`Coordinator::subscribe`], as a push
//! service would wake a phone) and dispatches only the devices selected for the open round
//! into the same bounded pool; each does `FetchTask`, local training and `SubmitUpdate`
//! over gRPC. Unselected devices hold no task and no connection. Calls go round-robin over
//! a few HTTP/2 connections ([`Channels`]).
//!
//! A device whose call still fails after the retries of [`crate::retry`] (or is refused, e.g.
//! because its credential was revoked) is *dropped*: it is recorded with the reason and never
//! dispatched again, and the run goes on (a round it was selected for closes at its deadline
//! with a quorum, or is retried without it, by the coordinator's usual rules).
//!
//! Devices here only train: nothing is written per device and the detector's calibration
//! protocol is not run (`plimsoll evaluate` computes detection in process). The per-device
//! path with every step a real device takes is [`crate::client::run_device_with`].

use std::collections::{BTreeMap, BTreeSet};
use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use anyhow::{Context, anyhow, bail};
use indicatif::ProgressBar;
use plimsoll_proto::auth::DeviceCredential;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::study::PriorVersion;
use plimsoll_server::{Coordinator, StudyConfig};
use tokio::sync::Semaphore;
use tonic::transport::Channel;

use crate::client::{
    EnrollmentRequest, FlagSharing, MIN_DAYS_TO_ENROLL, authorized, connect_lazy, enroll,
    local_training_series, new_device_secret, seed_of, train_and_submit,
};
use crate::cohort::Cohort;
use crate::retry::{Backoff, retry};
use crate::wire;

/// How much work runs at once.
#[derive(Debug, Clone, PartialEq)]
pub struct PoolOptions {
    /// Devices working at once (enrolling, or fetching, training and submitting in a round).
    pub workers: usize,
    /// HTTP/2 connections to the aggregator, used round-robin.
    pub connections: usize,
    /// Local trainings running at once (on the blocking pool).
    pub cpu: usize,
    /// Retries of `FetchTask` and `SubmitUpdate` (enrolment uses [`Backoff::default`]).
    pub backoff: Backoff,
}

impl Default for PoolOptions {
    /// 32 devices at once over 4 connections, one training per core.
    fn default() -> Self {
        PoolOptions {
            workers: 32,
            connections: 4,
            cpu: std::thread::available_parallelism().map_or(2, |n| n.get()),
            backoff: Backoff::default(),
        }
    }
}

/// A few lazy plaintext loopback channels to one aggregator, handed out round-robin.
#[derive(Debug)]
pub struct Channels {
    channels: Vec<Channel>,
    next: AtomicUsize,
}

impl Channels {
    /// `n` (at least 1) separate HTTP/2 connections to `http://addr`.
    pub fn connect(addr: SocketAddr, n: usize) -> anyhow::Result<Channels> {
        let channels = (0..n.max(1))
            .map(|_| connect_lazy(addr))
            .collect::<anyhow::Result<Vec<_>>>()
            .with_context(|| format!("connecting to the aggregator at {addr}"))?;
        Ok(Channels {
            channels,
            next: AtomicUsize::new(0),
        })
    }

    /// The next channel in turn.
    pub fn next(&self) -> Channel {
        let i = self.next.fetch_add(1, Ordering::Relaxed) % self.channels.len();
        self.channels[i].clone()
    }
}

/// A device the pool enrolled.
#[derive(Debug, Clone)]
pub struct EnrolledDevice {
    /// Index of its participant in the cohort.
    pub index: usize,
    pub credential: DeviceCredential,
}

/// A device taken out of the run because its calls kept failing.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DroppedDevice {
    pub participant: String,
    /// `None` when it failed to enrol.
    pub device_id: Option<u64>,
    /// The last error, with its context chain.
    pub reason: String,
}

/// Which of a cohort's group columns (`participants.csv`) simulated devices declare at
/// enrolment: the study's sensor-model column and its group column.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Declared {
    pub sensor_column: Option<String>,
    pub group_column: Option<String>,
}

impl Declared {
    /// The columns `config` asks devices for.
    pub fn from_config(config: &StudyConfig) -> Declared {
        Declared {
            sensor_column: config.sensor_models.as_ref().and_then(|m| m.column.clone()),
            group_column: config.subgroups.as_ref().map(|g| g.column.clone()),
        }
    }

    /// `participant`'s sensor model and group level (empty when the column is not asked for
    /// or the participant has no value in it; the aggregator then refuses the enrolment if
    /// the study needs one).
    pub fn values(&self, cohort: &Cohort, participant: &str) -> (String, String) {
        let of = |column: &Option<String>| {
            column
                .as_ref()
                .and_then(|c| cohort.groups.get(participant)?.get(c).cloned())
                .unwrap_or_default()
        };
        (of(&self.sensor_column), of(&self.group_column))
    }
}

/// Outcome of [`enroll_all`].
#[derive(Debug, Default)]
pub struct Enrolment {
    pub devices: Vec<EnrolledDevice>,
    pub dropped: Vec<DroppedDevice>,
}

/// The study a pool enrols in: its id, its enrollment code and what its devices declare.
#[derive(Debug, Clone, Copy)]
pub struct StudyEntry<'a> {
    pub study_id: &'a str,
    pub enrollment_code: &'a str,
    pub declared: &'a Declared,
}

/// Enrols the devices of `cohort.participants[i]` for every `i` in `members` (without consent
/// to share flags), at most `pool.workers` at a time. A participant without a signal of
/// [`MIN_DAYS_TO_ENROLL`] observed days, or whose enrolment still fails after its retries, is
/// dropped.
///
/// # Errors
/// Only a failure of the pool itself (a panicked task); refused devices are dropped.
pub async fn enroll_all(
    channels: &Channels,
    study: StudyEntry<'_>,
    cohort: &Arc<Cohort>,
    members: &[usize],
    pool: &PoolOptions,
    progress: Option<&ProgressBar>,
) -> anyhow::Result<Enrolment> {
    let StudyEntry {
        study_id,
        enrollment_code,
        declared,
    } = study;
    let mut tasks = tokio::task::JoinSet::new();
    let mut out = Enrolment::default();
    let mut queue = members.iter().copied();
    loop {
        // Keep at most `workers` enrolments in flight; start the next when one ends.
        while tasks.len() < pool.workers.max(1) {
            let Some(index) = queue.next() else { break };
            let channel = channels.next();
            let (cohort, study_id, code) = (
                cohort.clone(),
                study_id.to_owned(),
                enrollment_code.to_owned(),
            );
            let (sensor_model, group_label) =
                declared.values(&cohort, &cohort.participants[index].participant);
            tasks.spawn(async move {
                let series = &cohort.participants[index];
                let signals: Vec<String> = local_training_series(series)
                    .iter()
                    .map(|(s, _)| s.column().to_owned())
                    .collect();
                let result = if signals.is_empty() {
                    Err(anyhow!(
                        "participant {} has no signal with {MIN_DAYS_TO_ENROLL} observed days",
                        series.participant
                    ))
                } else {
                    let secret = new_device_secret();
                    let mut client = AggregatorClient::new(channel);
                    enroll(
                        &mut client,
                        EnrollmentRequest {
                            study_id: &study_id,
                            enrollment_code: &code,
                            participant: &series.participant,
                            signals,
                            sharing: FlagSharing::Withheld,
                            device_secret: &secret,
                            sensor_model: &sensor_model,
                            group_label: &group_label,
                        },
                    )
                    .await
                };
                (index, result)
            });
        }
        let Some(joined) = tasks.join_next().await else {
            break;
        };
        let (index, result) = joined.context("an enrolling device's task failed")?;
        match result {
            Ok(credential) => out.devices.push(EnrolledDevice { index, credential }),
            Err(e) => out.dropped.push(DroppedDevice {
                participant: cohort.participants[index].participant.clone(),
                device_id: None,
                reason: format!("{e:#}"),
            }),
        }
        if let Some(pb) = progress {
            pb.inc(1);
        }
    }
    out.devices.sort_by_key(|d| d.index);
    Ok(out)
}

/// Outcome of [`train_enrolled`].
#[derive(Debug, Default)]
pub struct Training {
    /// Updates accepted by the aggregator, over all devices and rounds.
    pub updates: u64,
    pub dropped: Vec<DroppedDevice>,
    /// Most devices that were working (holding a pool slot) at the same time.
    pub peak_active: usize,
}

/// What one dispatched device did in one round.
enum RoundOutcome {
    /// Trained and submitted.
    Submitted,
    /// Nothing to do (the round closed first, or the update was already in).
    Idle,
}

/// Runs the study's rounds with the devices in `devices` (from [`enroll_all`] on the same
/// `cohort`): whenever the coordinator publishes a change, each device selected for a newly
/// opened round is dispatched once into a pool of `pool.workers`; it fetches its task, trains
/// on the blocking pool (at most `pool.cpu` at once) and submits, each call retried with
/// `pool.backoff`. Returns when the study has completed its rounds.
///
/// # Errors
/// The coordinator's state cannot be read or a pool task panicked. Device failures are not
/// errors: those devices are dropped.
pub async fn train_enrolled(
    coordinator: &Coordinator,
    channels: &Channels,
    study_id: &str,
    cohort: &Arc<Cohort>,
    devices: &[EnrolledDevice],
    pool: &PoolOptions,
    progress: Option<&ProgressBar>,
) -> anyhow::Result<Training> {
    let by_id: BTreeMap<u64, &EnrolledDevice> = devices
        .iter()
        .map(|d| (d.credential.device_id, d))
        .collect();
    let permits = Arc::new(Semaphore::new(pool.workers.max(1)));
    let cpu = Arc::new(Semaphore::new(pool.cpu.max(1)));
    // (working now, most at once)
    let active = Arc::new((AtomicUsize::new(0), AtomicUsize::new(0)));
    let mut watch = coordinator.subscribe();
    let mut tasks = tokio::task::JoinSet::new();
    let mut out = Training::default();
    let mut dropped: BTreeSet<u64> = BTreeSet::new();
    let mut dispatched_round = 0u64;
    loop {
        let status = coordinator
            .status(study_id)
            .with_context(|| format!("reading the state of study `{study_id}`"))?;
        if let Some(pb) = progress {
            pb.set_position(u64::from(status.rounds_completed.min(status.config.rounds)));
        }
        if status.rounds_completed >= status.config.rounds && tasks.is_empty() {
            break;
        }
        if let Some((round_id, members)) = coordinator
            .open_round_members(study_id)
            .with_context(|| format!("reading the open round of study `{study_id}`"))?
            && round_id != dispatched_round
        {
            dispatched_round = round_id;
            for id in members {
                let Some(&device) = by_id.get(&id) else {
                    continue;
                };
                if dropped.contains(&id) {
                    continue;
                }
                let job = DeviceRound {
                    channel: channels.next(),
                    study_id: study_id.to_owned(),
                    credential: device.credential.clone(),
                    cohort: cohort.clone(),
                    index: device.index,
                    backoff: pool.backoff,
                    cpu: cpu.clone(),
                    seed: round_seed(device.index, round_id),
                };
                let (permits, active) = (permits.clone(), active.clone());
                tasks.spawn(async move {
                    // The task holds no connection until its permit comes up.
                    let result = match permits.acquire_owned().await {
                        Ok(_permit) => {
                            let now = active.0.fetch_add(1, Ordering::SeqCst) + 1;
                            active.1.fetch_max(now, Ordering::SeqCst);
                            let result = job.run().await;
                            active.0.fetch_sub(1, Ordering::SeqCst);
                            result
                        }
                        Err(e) => Err(anyhow!(e)),
                    };
                    (id, result)
                });
            }
        } else if status.current_round == 0
            && status.rounds_completed == 0
            && status.devices_enrolled < status.config.start_when_enrolled
            && tasks.is_empty()
        {
            bail!(
                "study `{study_id}` starts with {} enrolled devices but only {} are; \
                 the devices that failed to enrol are listed with their reasons above",
                status.config.start_when_enrolled,
                status.devices_enrolled
            );
        }
        tokio::select! {
            joined = tasks.join_next(), if !tasks.is_empty() => {
                let Some(joined) = joined else { continue };
                let (id, result) = joined.context("a training device's task failed")?;
                match result {
                    Ok(RoundOutcome::Submitted) => out.updates += 1,
                    Ok(RoundOutcome::Idle) => {}
                    Err(e) => {
                        dropped.insert(id);
                        let participant = by_id
                            .get(&id)
                            .map(|d| cohort.participants[d.index].participant.clone())
                            .unwrap_or_default();
                        tracing::warn!(device_id = id, %participant, "device dropped: {e:#}");
                        out.dropped.push(DroppedDevice {
                            participant,
                            device_id: Some(id),
                            reason: format!("{e:#}"),
                        });
                    }
                }
            }
            changed = watch.changed() => {
                changed.context("the coordinator stopped publishing changes")?;
            }
        }
    }
    out.peak_active = active.1.load(Ordering::SeqCst);
    Ok(out)
}

/// A device's seed for one round's local training.
fn round_seed(index: usize, round_id: u64) -> u64 {
    (0x5eed_0000 + index as u64) ^ round_id.wrapping_mul(0x9e37_79b9_7f4a_7c15)
}

/// One selected device's work in one round.
struct DeviceRound {
    channel: Channel,
    study_id: String,
    credential: DeviceCredential,
    cohort: Arc<Cohort>,
    index: usize,
    backoff: Backoff,
    cpu: Arc<Semaphore>,
    seed: u64,
}

impl DeviceRound {
    async fn run(self) -> anyhow::Result<RoundOutcome> {
        let client = AggregatorClient::new(self.channel);
        let device_id = self.credential.device_id;
        let participant = &self.cohort.participants[self.index].participant;
        let request = pb::FetchTaskRequest {
            study_id: self.study_id.clone(),
            device_id,
            wait_ms: 0,
        };
        let credential = &self.credential;
        let response = retry(&self.backoff, seed_of(participant) ^ self.seed, || {
            let mut c = client.clone();
            let r = authorized(credential, request.clone());
            async move { c.fetch_task(r).await }
        })
        .await
        .with_context(|| format!("FetchTask for device {device_id} ({participant})"))?
        .into_inner();
        use pb::fetch_task_response::Work;
        let task = match response.work {
            Some(Work::Task(task)) => {
                wire::task_from_pb(task).context("task from the aggregator")?
            }
            Some(Work::Wait(_) | Work::Done(_)) => return Ok(RoundOutcome::Idle),
            None => bail!("FetchTask for device {device_id} answered without work"),
        };
        let round_id = task.round_id;
        let local = Arc::new(local_training_series(&self.cohort.participants[self.index]));
        train_and_submit(
            &client,
            credential,
            &self.study_id,
            task,
            local,
            &self.cpu,
            self.seed,
            &self.backoff,
        )
        .await
        .with_context(|| format!("device {device_id} ({participant}), round {round_id}"))?;
        Ok(RoundOutcome::Submitted)
    }
}

/// Progress bars of a pooled run, one per phase.
#[derive(Debug, Default)]
pub struct PhaseBars {
    pub enrolment: Option<ProgressBar>,
    pub rounds: Option<ProgressBar>,
}

/// Outcome of [`run_federated_pooled`].
#[derive(Debug)]
pub struct PooledRun {
    pub history: Vec<PriorVersion>,
    /// Devices enrolled.
    pub enrolled: usize,
    /// Devices dropped at enrolment or in a round.
    pub dropped: Vec<DroppedDevice>,
    /// Updates accepted over all rounds.
    pub updates: u64,
    /// Most devices working in a round at the same time.
    pub peak_active: usize,
    pub enrolment: Duration,
    pub rounds: Duration,
}

/// A fresh aggregator (database at `db_path`, real tonic server on a loopback port) running
/// `config` with the participants `members` of `cohort` as devices, through [`enroll_all`]
/// and [`train_enrolled`].
///
/// # Errors
/// The database cannot be opened, the server cannot start, the study cannot start (when some
/// devices could not enrol, it starts with the others through
/// [`Coordinator::start_with_enrolled`], which refuses fewer than `config.min_quorum`), or the
/// pool fails.
pub async fn run_federated_pooled(
    cohort: &Arc<Cohort>,
    members: &[usize],
    config: StudyConfig,
    db_path: &Path,
    pool: &PoolOptions,
    bars: &PhaseBars,
) -> anyhow::Result<PooledRun> {
    let coordinator = Arc::new(
        Coordinator::open(db_path).with_context(|| format!("opening {}", db_path.display()))?,
    );
    let study_id = config.study_id.clone();
    let declared = Declared::from_config(&config);
    let enrollment_code = coordinator
        .create_study(config, plimsoll_server::service::now_ms())
        .with_context(|| format!("creating study `{study_id}`"))?;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .context("binding a loopback port for the aggregator")?;
    let server = plimsoll_server::serve(coordinator.clone(), listener).await?;
    let channels = Channels::connect(server.addr, pool.connections)?;
    let t_enrol = Instant::now();
    let enrolment = enroll_all(
        &channels,
        StudyEntry {
            study_id: &study_id,
            enrollment_code: &enrollment_code,
            declared: &declared,
        },
        cohort,
        members,
        pool,
        bars.enrolment.as_ref(),
    )
    .await?;
    if let Some(b) = &bars.enrolment {
        b.finish();
    }
    let enrolment_time = t_enrol.elapsed();
    // Devices that could not enrol will not come later: start with those that did (the
    // coordinator refuses when they are fewer than the study's quorum).
    if !enrolment.dropped.is_empty() {
        let started = coordinator
            .start_with_enrolled(&study_id, plimsoll_server::service::now_ms())
            .with_context(|| {
                format!(
                    "starting study `{study_id}` without the {} devices that could not enrol (first: {} — {})",
                    enrolment.dropped.len(),
                    enrolment.dropped[0].participant,
                    enrolment.dropped[0].reason
                )
            })?;
        tracing::warn!(
            study = %study_id,
            started,
            dropped = enrolment.dropped.len(),
            "started without the devices that could not enrol"
        );
    }
    let t_rounds = Instant::now();
    let training = train_enrolled(
        &coordinator,
        &channels,
        &study_id,
        cohort,
        &enrolment.devices,
        pool,
        bars.rounds.as_ref(),
    )
    .await?;
    if let Some(b) = &bars.rounds {
        b.finish();
    }
    let rounds_time = t_rounds.elapsed();
    let history = coordinator.prior_history(&study_id)?;
    server.shutdown().await?;
    let mut dropped = enrolment.dropped;
    dropped.extend(training.dropped);
    Ok(PooledRun {
        history,
        enrolled: enrolment.devices.len(),
        dropped,
        updates: training.updates,
        peak_active: training.peak_active,
        enrolment: enrolment_time,
        rounds: rounds_time,
    })
}
