//! The device's side of a secure-aggregation round: the update is encoded
//! ([`SecureTask::plain_input`], fixed point), masked and sent through the
//! four phases of `SecureStep` (protocol in `plimsoll_server::secagg`), so the
//! aggregator sees only the round's sum. The keys and seeds of a round live
//! in memory and are dropped with it; a device restarted mid-round sits the
//! round out.

use anyhow::{Context, anyhow, bail};
use plimsoll_proto::auth::{DeviceCredential, authorized};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::detection::{DetectionStage, DetectionStats};
use plimsoll_server::secagg;
use plimsoll_server::secure_round::{DeviceMessage, SecureNext, SecureTask};
use plimsoll_server::wire::{device_message_to_pb, secure_next_from_pb};
use tonic::transport::Channel;

use crate::retry::{Backoff, retry};
use crate::signal::Signal;
use crate::training::LocalUpdate;

/// How long one `SecureStep` call may wait for the next phase.
const STEP_WAIT_MS: u32 = 5_000;

/// The plain input of `updates` in `task`'s layout.
///
/// # Errors
/// An update for a signal the round has no slot for.
pub fn plain_input(
    task: &SecureTask,
    updates: &[(Signal, LocalUpdate)],
) -> anyhow::Result<Vec<f64>> {
    task.plain_input(&rows(updates))
        .map_err(|e| anyhow!("secure round input: {e}"))
}

/// `updates` as the rows [`SecureTask::plain_input`] takes: signal, values, days, loss.
fn rows(updates: &[(Signal, LocalUpdate)]) -> Vec<(&str, &[f64], u32, f64)> {
    updates
        .iter()
        .map(|(s, u)| (s.column(), &u.values[..], u.n_days, u.loss_at_received))
        .collect()
}

/// A device's result of one round: the parameters it received and its trained updates.
#[derive(Debug, Clone, Copy)]
pub struct RoundUpdate<'a> {
    /// The round's shared parameters of the device's signals.
    pub current: &'a [(Signal, Vec<f64>)],
    pub updates: &'a [(Signal, LocalUpdate)],
}

/// The noised input of `updates` (changes from `current`) in a private round.
///
/// # Errors
/// As [`plain_input`], or a trained signal without current parameters.
pub fn private_input(
    task: &SecureTask,
    current: &[(Signal, Vec<f64>)],
    updates: &[(Signal, LocalUpdate)],
) -> anyhow::Result<Vec<f64>> {
    let current: Vec<(&str, &[f64])> = current
        .iter()
        .map(|(s, v)| (s.column(), v.as_slice()))
        .collect();
    task.private_input(&current, &rows(updates), &mut rand::rng())
        .map_err(|e| anyhow!("private secure round input: {e}"))
}

/// Runs round `round_id`'s protocol for `updates`: advertises fresh keys, then answers each
/// phase until the aggregator says the device's part is over. Returns whether the device's
/// input is in the round's sum (false when it missed a phase or the round is run again).
///
/// # Errors
/// A call still failing after `backoff`'s retries, or a protocol step the device refuses
/// (for example an aggregator asking for both shares of one peer).
#[allow(clippy::too_many_arguments)]
pub async fn secure_submit(
    client: &AggregatorClient<Channel>,
    credential: &DeviceCredential,
    study_id: &str,
    round_id: u64,
    task: &SecureTask,
    update: RoundUpdate<'_>,
    backoff: &Backoff,
    seed: u64,
) -> anyhow::Result<bool> {
    let RoundUpdate { current, updates } = update;
    let input = if task.dp.is_some() {
        private_input(task, current, updates)?
    } else {
        plain_input(task, updates)?
    };
    let encoded = task
        .codec()?
        .encode(&input)
        .context("encoding the update in fixed point")?;
    let call = Call {
        client,
        credential,
        study_id,
        stage: pb::DetectionStage::Unspecified,
        backoff,
        seed,
    };
    run_protocol(&call, round_id, task, &encoded).await
}

/// Sends calibration statistics through the stage's secure sum: joins the stage's current
/// session (a new one opens after a failed one; at most [`MAX_STAGE_SESSIONS`] are tried)
/// until the device's statistics are in the stage's sum or the stage is complete without
/// them. Returns whether they are in it.
///
/// # Errors
/// As [`secure_submit`], and statistics the aggregator's checks refuse.
pub async fn secure_stage_submit(
    client: &AggregatorClient<Channel>,
    credential: &DeviceCredential,
    study_id: &str,
    stats: &DetectionStats,
    backoff: &Backoff,
    seed: u64,
) -> anyhow::Result<bool> {
    stats.validate().context("calibration statistics")?;
    let stage = match stats.stage() {
        DetectionStage::ResidualMoments => pb::DetectionStage::ResidualMoments,
        DetectionStage::EpisodeHistogram => pb::DetectionStage::EpisodeHistogram,
    };
    let call = Call {
        client,
        credential,
        study_id,
        stage,
        backoff,
        seed,
    };
    let mut sessions = 0;
    loop {
        match call.step(0, None).await? {
            SecureNext::Start(task) => {
                sessions += 1;
                let plain = task.stage_input(stats).map_err(|e| anyhow!("{e}"))?;
                let encoded = task
                    .codec()?
                    .encode(&plain)
                    .context("encoding the statistics in fixed point")?;
                if run_protocol(&call, task.session, &task, &encoded).await? {
                    return Ok(true);
                }
                if sessions >= MAX_STAGE_SESSIONS {
                    bail!(
                        "{}: {sessions} secure sessions ended without this device's statistics",
                        stage.as_str_name()
                    );
                }
            }
            SecureNext::Wait(_) => {}
            SecureNext::Finished { included, .. } => return Ok(included),
            other => bail!("SecureStep asked for {other:?} before a session started"),
        }
    }
}

/// Secure sessions a device joins for one calibration stage before giving up.
pub const MAX_STAGE_SESSIONS: usize = 5;

/// What every `SecureStep` call of one device and one sum shares.
struct Call<'a> {
    client: &'a AggregatorClient<Channel>,
    credential: &'a DeviceCredential,
    study_id: &'a str,
    stage: pb::DetectionStage,
    backoff: &'a Backoff,
    seed: u64,
}

impl Call<'_> {
    /// One `SecureStep` call for round (or session) `round_id`, retried.
    async fn step(
        &self,
        round_id: u64,
        message: Option<&DeviceMessage>,
    ) -> anyhow::Result<SecureNext> {
        let request = pb::SecureStepRequest {
            study_id: self.study_id.to_owned(),
            device_id: self.credential.device_id,
            round_id,
            wait_ms: STEP_WAIT_MS,
            message: message.map(device_message_to_pb),
            stage: self.stage as i32,
        };
        let response = retry(self.backoff, self.seed, || {
            let mut c = self.client.clone();
            let r = authorized(self.credential, request.clone());
            async move { c.secure_step(r).await }
        })
        .await
        .context("SecureStep")?
        .into_inner();
        secure_next_from_pb(response).context("SecureStep answer")
    }
}

/// Runs one secure sum of `encoded` (round or stage session `round_id` of `task`):
/// advertises fresh keys, then answers each phase until the aggregator says the device's
/// part is over. Returns whether the input is in the sum.
async fn run_protocol(
    call: &Call<'_>,
    round_id: u64,
    task: &SecureTask,
    encoded: &[u64],
) -> anyhow::Result<bool> {
    let device_id = call.credential.device_id;
    let (mut device, keys) = secagg::Device::new(device_id, task.params()?, &mut rand::rng())?;
    let mut message = Some(DeviceMessage::Keys(keys));
    loop {
        let next = call.step(round_id, message.as_ref()).await?;
        message = match next {
            SecureNext::Broadcast(b) => Some(DeviceMessage::ShareKeys(
                device.share_keys(&b, &mut rand::rng())?,
            )),
            SecureNext::Relay(r) => Some(DeviceMessage::Masked(device.masked_input(&r, encoded)?)),
            SecureNext::Request(r) => Some(DeviceMessage::Unmasking(device.unmask(&r)?)),
            SecureNext::Wait(_) => None,
            SecureNext::Finished { included, reason } => {
                tracing::debug!(device_id, round_id, included, %reason, "secure sum over");
                return Ok(included);
            }
            SecureNext::Start(_) => bail!("SecureStep offered a new session in the middle of one"),
        };
    }
}
