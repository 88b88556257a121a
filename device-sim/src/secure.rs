//! The device's side of a secure-aggregation round: the update is encoded
//! ([`SecureTask::plain_input`], fixed point), masked and sent through the
//! four phases of `SecureStep` (protocol in `plimsoll_server::secagg`), so the
//! aggregator sees only the round's sum. The keys and seeds of a round live
//! in memory and are dropped with it; a device restarted mid-round sits the
//! round out.

use anyhow::{Context, anyhow};
use plimsoll_proto::auth::{DeviceCredential, authorized};
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
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
    let rows: Vec<(&str, &[f64], u32, f64)> = updates
        .iter()
        .map(|(s, u)| (s.column(), &u.values[..], u.n_days, u.loss_at_received))
        .collect();
    task.plain_input(&rows)
        .map_err(|e| anyhow!("secure round input: {e}"))
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
    updates: &[(Signal, LocalUpdate)],
    backoff: &Backoff,
    seed: u64,
) -> anyhow::Result<bool> {
    let device_id = credential.device_id;
    let encoded = task
        .codec()?
        .encode(&plain_input(task, updates)?)
        .context("encoding the update in fixed point")?;
    let (mut device, keys) = secagg::Device::new(device_id, task.params()?, &mut rand::rng())?;
    let mut message = Some(DeviceMessage::Keys(keys));
    loop {
        let request = pb::SecureStepRequest {
            study_id: study_id.to_owned(),
            device_id,
            round_id,
            wait_ms: STEP_WAIT_MS,
            message: message.as_ref().map(device_message_to_pb),
        };
        let response = retry(backoff, seed, || {
            let mut c = client.clone();
            let r = authorized(credential, request.clone());
            async move { c.secure_step(r).await }
        })
        .await
        .context("SecureStep")?
        .into_inner();
        let next = secure_next_from_pb(response).context("SecureStep answer")?;
        message = match next {
            SecureNext::Broadcast(b) => Some(DeviceMessage::ShareKeys(
                device.share_keys(&b, &mut rand::rng())?,
            )),
            SecureNext::Relay(r) => Some(DeviceMessage::Masked(device.masked_input(&r, &encoded)?)),
            SecureNext::Request(r) => Some(DeviceMessage::Unmasking(device.unmask(&r)?)),
            SecureNext::Wait(_) => None,
            SecureNext::Finished { included, reason } => {
                tracing::debug!(device_id, round_id, included, %reason, "secure round over");
                return Ok(included);
            }
        };
    }
}
