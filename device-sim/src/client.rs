//! A device's side of the federated protocol: enrol, fetch tasks, train
//! locally, submit, then compute the personalised posterior and write it to
//! the device's output folder.
//!
//! Privacy: what leaves the device is exactly the `plimsoll.v1` requests —
//! the participant's pseudonymous label, the names of its signals, and per
//! round and signal a parameter vector, a day count and a scalar loss.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, anyhow};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tokio::sync::Semaphore;
use tonic::transport::Channel;

use crate::cohort::ParticipantSeries;
use crate::personal::{DayBand, posterior_bands, standardised, write_posterior_csv};
use crate::signal::Signal;
use crate::training::{LocalSeries, LocalUpdate, train_local};
use crate::wire;

/// Fewest observed days of a signal for the device to take part in its prior.
pub const MIN_DAYS_TO_ENROLL: usize = 7;

/// How a device runs.
#[derive(Debug, Clone)]
pub struct DeviceOptions {
    pub study_id: String,
    /// Folder the device writes its outputs into (created if missing).
    pub out_dir: PathBuf,
    /// Long-poll length for FetchTask, milliseconds.
    pub wait_ms: u32,
    /// Seed of the device's window sampling.
    pub seed: u64,
}

/// What a device did, for the caller's report.
#[derive(Debug, Clone)]
pub struct DeviceReport {
    pub participant: String,
    pub device_id: u64,
    pub rounds_trained: u32,
    pub prior_version: u32,
    pub bands: Vec<(Signal, Vec<DayBand>)>,
    pub posterior_csv: PathBuf,
}

/// Runs one device to the end of the study. CPU-heavy work runs on the
/// blocking pool, at most `cpu.available_permits()` at a time.
pub async fn run_device(
    channel: Channel,
    series: ParticipantSeries,
    opts: DeviceOptions,
    cpu: Arc<Semaphore>,
) -> anyhow::Result<DeviceReport> {
    let participant = series.participant.clone();
    let mut client = AggregatorClient::new(channel);
    let origin = *series
        .dates
        .first()
        .ok_or_else(|| anyhow!("participant {participant} has no days"))?;
    let local: Vec<(Signal, LocalSeries)> = series
        .signals()
        .into_iter()
        .map(|s| {
            let (t, z) = standardised(&series, s, origin);
            (s, LocalSeries { t, z })
        })
        .filter(|(_, l)| l.n_days() >= MIN_DAYS_TO_ENROLL)
        .collect();
    if local.is_empty() {
        return Err(anyhow!(
            "participant {participant} has no signal with {MIN_DAYS_TO_ENROLL} observed days"
        ));
    }
    let device_id = client
        .enroll(pb::EnrollRequest {
            study_id: opts.study_id.clone(),
            participant_label: participant.clone(),
            signals: local.iter().map(|(s, _)| s.column().to_owned()).collect(),
        })
        .await
        .with_context(|| format!("Enroll for participant {participant}"))?
        .into_inner()
        .device_id;
    let local = Arc::new(local);
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut rounds_trained = 0;
    let prior_version = loop {
        let response = client
            .fetch_task(pb::FetchTaskRequest {
                study_id: opts.study_id.clone(),
                device_id,
                wait_ms: opts.wait_ms,
            })
            .await
            .with_context(|| format!("FetchTask for device {device_id}"))?
            .into_inner();
        use pb::fetch_task_response::Work;
        match response.work {
            Some(Work::Task(task)) => {
                let task = wire::task_from_pb(task).context("task from the aggregator")?;
                let round_id = task.round_id;
                let seed: u64 = rand::Rng::random(&mut rng);
                let permit = cpu.clone().acquire_owned().await?;
                let data = local.clone();
                let updates = tokio::task::spawn_blocking(move || {
                    let _permit = permit;
                    train_all(&task, &data, seed)
                })
                .await??;
                let request = pb::SubmitUpdateRequest {
                    study_id: opts.study_id.clone(),
                    device_id,
                    round_id,
                    updates: updates
                        .iter()
                        .map(|(s, u)| wire::update_to_pb(*s, u))
                        .collect(),
                };
                client.submit_update(request).await.with_context(|| {
                    format!("SubmitUpdate for device {device_id}, round {round_id}")
                })?;
                rounds_trained += 1;
            }
            Some(Work::Wait(wait)) => {
                if opts.wait_ms == 0 {
                    tokio::time::sleep(Duration::from_millis(u64::from(wait.retry_after_ms))).await;
                }
            }
            Some(Work::Done(done)) => break done.prior_version,
            None => return Err(anyhow!("FetchTask answered without work")),
        }
    };
    let prior = client
        .get_prior(pb::GetPriorRequest {
            study_id: opts.study_id.clone(),
            version: prior_version,
        })
        .await
        .context("GetPrior")?
        .into_inner();
    let priors = wire::prior_from_pb(&prior).context("published prior")?;
    let permit = cpu.clone().acquire_owned().await?;
    let out_dir = opts.out_dir.clone();
    let (bands, posterior_csv) = tokio::task::spawn_blocking(move || -> anyhow::Result<_> {
        let _permit = permit;
        let mut bands = Vec::new();
        for p in priors.iter() {
            if series.values.contains_key(&p.signal) {
                bands.push((p.signal, posterior_bands(&series, p)?));
            }
        }
        std::fs::create_dir_all(&out_dir)
            .with_context(|| format!("creating {}", out_dir.display()))?;
        let path = out_dir.join("posterior.csv");
        write_posterior_csv(&path, &bands)
            .with_context(|| format!("writing {}", path.display()))?;
        Ok((bands, path))
    })
    .await??;
    Ok(DeviceReport {
        participant,
        device_id,
        rounds_trained,
        prior_version,
        bands,
        posterior_csv,
    })
}

/// One round of local training for every signal in the task.
fn train_all(
    task: &wire::TrainingTask,
    local: &[(Signal, LocalSeries)],
    seed: u64,
) -> anyhow::Result<Vec<(Signal, LocalUpdate)>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = Vec::new();
    for shared in &task.shared {
        let Some((_, series)) = local.iter().find(|(s, _)| *s == shared.signal) else {
            continue;
        };
        let update =
            train_local(&shared.values, series, &task.settings, &mut rng).with_context(|| {
                format!(
                    "local training of {} in round {}",
                    shared.signal, task.round_id
                )
            })?;
        out.push((shared.signal, update));
    }
    Ok(out)
}

/// Connects a lazy channel to `http://addr`.
pub fn connect_lazy(addr: std::net::SocketAddr) -> anyhow::Result<Channel> {
    Ok(
        tonic::transport::Endpoint::from_shared(format!("http://{addr}"))?
            .connect_timeout(Duration::from_secs(5))
            .connect_lazy(),
    )
}
