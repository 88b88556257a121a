//! The coordinator's side of a secure-aggregation round: the protocol of
//! [`crate::secagg`] driven by `SecureStep` calls, phase deadlines and the
//! decoding of the round's sum into the next prior.
//!
//! # What a device's input is
//! FedAvg needs, per signal, `Σ n_k θ_k`, `Σ n_k` and, for the round's
//! contribution record, `Σ n_k ℓ_k` and the device count. So each device
//! encodes, per slot (one per study signal, in the study's order),
//! `[n·θ_1, …, n·θ_p, n, n·ℓ, 1]` (zeros for a signal it does not train) in
//! fixed point ([`crate::secagg::FixedPoint`]); the sum over the round's
//! devices decodes into exactly what [`crate::rounds`]' FedAvg computes in
//! clear: `θ = Σ n·θ / Σ n` (McMahan et al. 2017, the weighted average with
//! `n_k / n`), up to the fixed-point error (each encoded value is off by at
//! most 2^−(k+1)).
//!
//! # Phases and deadlines
//! Phase 0 (keys) includes local training, so it has the round's deadline;
//! each later phase has `secure_aggregation.phase_deadline_ms`. A phase closes
//! as soon as every device expected in it has answered, or at its deadline with
//! whoever answered. A round whose phase closes with fewer than the threshold,
//! whose masked inputs number fewer than the study's quorum, or whose shares
//! do not reconstruct ([`SecAggError::InconsistentShares`]) fails: nothing is
//! published and the round is run again with a fresh selection. Nothing of a
//! secure round is stored but its members (the protocol's state lives in
//! memory), so after a restart the open round is run again from the start.
//!
//! # Finishing outside the coordinator's lock
//! Rebuilding the dropped devices' masks and every Shamir secret costs O(N²) for a round of
//! N devices (seconds at N = 1,000, `examples/secagg_cost.rs`), and every call of every study
//! waits on the coordinator's lock. So when the last phase closes, [`SecureRound::advance`]
//! hands the protocol's state out as a [`FinishJob`] and the round enters a *finishing* phase
//! in which devices are told to wait. The coordinator runs the job after releasing its lock
//! and takes the lock again to publish: the job sends its outcome to the round, whose next
//! `advance` returns it as [`Advance::Done`] or [`Advance::Failed`]. A job that is dropped
//! without running, or an outcome that has not come by the finishing phase's deadline, fails
//! the round, which is then run again as any failed round is.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::mpsc;

use crate::detection::{DetectionStage, DetectionStats, HISTOGRAM_EDGES, MOMENT_SIGNALS};
use crate::secagg::{
    self, AdvertiseKeys, FixedPoint, KeysBroadcast, MaskedInput, RoundParams, SecAggError,
    ShareKeys, SharesRelay, UnmaskingRequest, UnmaskingResponse,
};
use crate::study::{Contribution, SignalParams};

/// Values per slot besides the parameters: `n`, `n·ℓ` and the count 1.
pub const EXTRA_PER_SLOT: usize = 3;

/// One signal's slot in the input vector.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Slot {
    pub signal: String,
    pub n_values: usize,
}

/// What a device of a secure round needs to know (sent with its task, or, for a
/// calibration stage, by `SecureStep`).
#[derive(Debug, Clone, PartialEq)]
pub struct SecureTask {
    pub members: Vec<u64>,
    pub threshold: u32,
    pub frac_bits: u32,
    /// Training: one slot per study signal. Empty for a calibration stage.
    pub slots: Vec<Slot>,
    /// A calibration stage's secure sum (`None`: a training round).
    pub stage: Option<DetectionStage>,
    /// For a stage: the session (a failed session is followed by a new one); the device
    /// names it in `SecureStep.round_id`.
    pub session: u64,
    /// For the histogram stage of a study that calibrates per group: the group levels,
    /// one block each after the study's total block.
    pub group_levels: Vec<String>,
    /// The receiving device's block among `group_levels` (a per-device field).
    pub group_slot: Option<usize>,
    /// A training round of a study with differential privacy: each device sends its clipped,
    /// rounded and noised change instead of `n·θ` ([`Self::private_input`]).
    pub dp: Option<crate::privacy::DistributedNoise>,
}

impl SecureTask {
    /// The input vector's length.
    pub fn vector_len(&self) -> usize {
        match self.stage {
            Some(stage) => stage_block_len(stage) * (1 + self.group_levels.len()),
            None => vector_len(&self.slots),
        }
    }

    /// A device's input in a private round: per slot, its change from `current` (the
    /// round's parameters of the signals it trains) over every signal at once, clipped,
    /// in whole units of `2^−frac_bits` with its noise share
    /// ([`crate::privacy::DistributedNoise::device_units`]), then `n`, `n·ℓ` and 1.
    ///
    /// # Errors
    /// Not a private round, or as [`Self::plain_input`].
    pub fn private_input<R: rand::Rng + ?Sized>(
        &self,
        current: &[(&str, &[f64])],
        updates: &[(&str, &[f64], u32, f64)],
        rng: &mut R,
    ) -> Result<Vec<f64>, String> {
        let Some(noise) = self.dp else {
            return Err("the round is not private".into());
        };
        let mut plain = self.plain_input(updates)?;
        let mut delta = Vec::new();
        for slot in &self.slots {
            match (
                updates.iter().find(|u| u.0 == slot.signal),
                current.iter().find(|c| c.0 == slot.signal),
            ) {
                (Some(u), Some(c)) if c.1.len() == slot.n_values => {
                    delta.extend(u.1.iter().zip(c.1).map(|(v, c)| v - c));
                }
                (Some(_), _) => {
                    return Err(format!(
                        "{}: no current parameters of its length",
                        slot.signal
                    ));
                }
                (None, _) => delta.extend(std::iter::repeat_n(0.0, slot.n_values)),
            }
        }
        let units = noise.device_units(&delta, self.frac_bits, rng);
        let gamma = f64::from(self.frac_bits).exp2().recip();
        let (mut at, mut from) = (0, 0);
        for slot in &self.slots {
            for j in 0..slot.n_values {
                plain[at + j] = units[from + j] * gamma;
            }
            at += slot.n_values + EXTRA_PER_SLOT;
            from += slot.n_values;
        }
        Ok(plain)
    }

    /// A device's plain stage input: its statistics and a count of 1 in the total block,
    /// and again in its group's block ([`Self::group_slot`]); zeros elsewhere.
    ///
    /// # Errors
    /// Not a stage task, or statistics of another stage.
    pub fn stage_input(&self, stats: &DetectionStats) -> Result<Vec<f64>, String> {
        let Some(stage) = self.stage else {
            return Err("a training round takes an update, not calibration statistics".into());
        };
        if stats.stage() != stage {
            return Err(format!(
                "{} statistics for the {} stage",
                stats.stage().as_str(),
                stage.as_str()
            ));
        }
        let mut block = match stats {
            DetectionStats::ResidualMoments {
                cross_products,
                pair_days,
            } => cross_products
                .iter()
                .copied()
                .chain(pair_days.iter().map(|&d| d as f64))
                .collect::<Vec<f64>>(),
            DetectionStats::EpisodeHistogram {
                episodes,
                scored_days,
            } => episodes
                .iter()
                .map(|&e| e as f64)
                .chain([*scored_days as f64])
                .collect(),
        };
        block.push(1.0);
        let mut out = vec![0.0; self.vector_len()];
        out[..block.len()].copy_from_slice(&block);
        if let Some(g) = self.group_slot {
            let at = block.len() * (1 + g);
            out.get_mut(at..at + block.len())
                .ok_or_else(|| format!("group slot {g} outside the task's layout"))?
                .copy_from_slice(&block);
        }
        Ok(out)
    }

    /// The round's parameters as both sides build them.
    ///
    /// # Errors
    /// As [`RoundParams::with_threshold`].
    pub fn params(&self) -> Result<RoundParams, SecAggError> {
        RoundParams::with_threshold(&self.members, self.vector_len(), self.threshold as usize)
    }

    /// The round's fixed-point codec.
    ///
    /// # Errors
    /// As [`FixedPoint::new`].
    pub fn codec(&self) -> Result<FixedPoint, SecAggError> {
        FixedPoint::new(self.frac_bits, self.members.len() as u64)
    }

    /// A device's plain input, before encoding: per slot `[n·θ…, n, n·ℓ, 1]` for the
    /// signals in `updates` (signal, values, days, per-day loss), zeros elsewhere.
    ///
    /// # Errors
    /// An update for a signal without a slot, or with the wrong number of values.
    pub fn plain_input(&self, updates: &[(&str, &[f64], u32, f64)]) -> Result<Vec<f64>, String> {
        let mut out = Vec::with_capacity(self.vector_len());
        for slot in &self.slots {
            match updates.iter().find(|u| u.0 == slot.signal) {
                Some(&(_, values, n_days, loss)) => {
                    if values.len() != slot.n_values {
                        return Err(format!(
                            "{}: {} values, the round's slot has {}",
                            slot.signal,
                            values.len(),
                            slot.n_values
                        ));
                    }
                    let n = f64::from(n_days);
                    out.extend(values.iter().map(|v| n * v));
                    out.extend([n, n * loss, 1.0]);
                }
                None => out.extend(std::iter::repeat_n(0.0, slot.n_values + EXTRA_PER_SLOT)),
            }
        }
        if let Some(u) = updates
            .iter()
            .find(|u| !self.slots.iter().any(|s| s.signal == u.0))
        {
            return Err(format!("{}: not a signal of the round", u.0));
        }
        Ok(out)
    }
}

fn vector_len(slots: &[Slot]) -> usize {
    slots.iter().map(|s| s.n_values + EXTRA_PER_SLOT).sum()
}

/// Values of one stage block: the statistics and the device count.
pub fn stage_block_len(stage: DetectionStage) -> usize {
    match stage {
        DetectionStage::ResidualMoments => 2 * MOMENT_SIGNALS * MOMENT_SIGNALS + 1,
        DetectionStage::EpisodeHistogram => HISTOGRAM_EDGES + 2,
    }
}

/// A stage's decoded sum: the devices and statistics of the total block and, per group
/// level, of its block (counts are whole numbers: decoded sums are rounded).
pub type StageSum = (u32, DetectionStats, BTreeMap<String, (u32, DetectionStats)>);

/// Splits a decoded stage sum into the study's total and the per-group sums.
pub fn decode_stage(stage: DetectionStage, group_levels: &[String], sum: &[f64]) -> StageSum {
    let len = stage_block_len(stage);
    let count = |x: f64| x.round().max(0.0) as u64;
    let block = |b: &[f64]| -> (u32, DetectionStats) {
        let n = count(b[len - 1]) as u32;
        let stats = match stage {
            DetectionStage::ResidualMoments => {
                let m = MOMENT_SIGNALS * MOMENT_SIGNALS;
                DetectionStats::ResidualMoments {
                    cross_products: b[..m].to_vec(),
                    pair_days: b[m..2 * m].iter().map(|&x| count(x)).collect(),
                }
            }
            DetectionStage::EpisodeHistogram => DetectionStats::EpisodeHistogram {
                episodes: b[..HISTOGRAM_EDGES].iter().map(|&x| count(x)).collect(),
                scored_days: count(b[HISTOGRAM_EDGES]),
            },
        };
        (n, stats)
    };
    let (n, total) = block(&sum[..len]);
    let groups = group_levels
        .iter()
        .enumerate()
        .map(|(g, level)| {
            let at = len * (1 + g);
            (level.clone(), block(&sum[at..at + len]))
        })
        .filter(|(_, (n, _))| *n > 0)
        .collect();
    (n, total, groups)
}

/// A device's message in one phase.
#[derive(Debug, Clone)]
pub enum DeviceMessage {
    Keys(AdvertiseKeys),
    ShareKeys(ShareKeys),
    Masked(MaskedInput),
    Unmasking(UnmaskingResponse),
}

impl DeviceMessage {
    fn phase(&self) -> Phase {
        match self {
            Self::Keys(_) => Phase::Keys,
            Self::ShareKeys(_) => Phase::Sharing,
            Self::Masked(_) => Phase::Masking,
            Self::Unmasking(_) => Phase::Unmasking,
        }
    }
}

/// What a device should do next.
#[derive(Debug, Clone, PartialEq)]
pub enum SecureNext {
    /// Send `ShareKeys` for these keys.
    Broadcast(KeysBroadcast),
    /// Send the masked input.
    Relay(SharesRelay),
    /// Send the unmasking shares.
    Request(UnmaskingRequest),
    /// The phase is open: ask again.
    Wait(String),
    /// The device's part is over.
    Finished { included: bool, reason: String },
    /// A calibration stage's session to join: send keys for it.
    Start(SecureTask),
}

/// A secure sum that has ended: its round (or stage session), the devices whose inputs are
/// in it (none when it failed) and what happened, in words.
#[derive(Debug, Clone, PartialEq)]
pub struct EndedSum {
    pub id: u64,
    pub included: BTreeSet<u64>,
    pub reason: String,
}

impl EndedSum {
    /// What `device` asking about sum `id` is told once it is over: `ended`'s outcome when
    /// `ended` is that sum, otherwise not included, for the reason `over`.
    pub fn answer(
        ended: Option<&EndedSum>,
        id: u64,
        device: u64,
        over: impl FnOnce() -> String,
    ) -> SecureNext {
        match ended {
            Some(e) if e.id == id => SecureNext::Finished {
                included: e.included.contains(&device),
                reason: e.reason.clone(),
            },
            _ => SecureNext::Finished {
                included: false,
                reason: over(),
            },
        }
    }
}

/// The round's phase, as the coordinator tracks it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Phase {
    Keys,
    Sharing,
    Masking,
    Unmasking,
    /// Every message is in; the sum is being computed outside the coordinator's lock.
    Finishing,
}

impl Phase {
    fn name(self) -> &'static str {
        match self {
            Phase::Keys => "AdvertiseKeys",
            Phase::Sharing => "ShareKeys",
            Phase::Masking => "MaskedInput",
            Phase::Unmasking => "Unmasking",
            Phase::Finishing => "Finishing",
        }
    }
}

/// How a phase change ended.
#[derive(Debug)]
pub enum Advance {
    /// Nothing to do yet.
    None,
    /// The next phase opened.
    Next,
    /// The round's sum, decoded from fixed point, and the devices in it.
    Done {
        sum: Vec<f64>,
        included: BTreeSet<u64>,
    },
    /// The round failed; run it again.
    Failed(String),
    /// The last phase closed: run this job outside the coordinator's lock, then call
    /// [`SecureRound::advance`] again for its outcome (module docs).
    Finish(FinishJob),
}

/// What a device of a finishing round is told.
const FINISHING: &str = "every unmasking share is in; the aggregator is computing the round's sum";

/// The costly end of a secure round (rebuilding masks and secrets, decoding the sum), taken
/// out of the round so that it runs without the coordinator's lock.
#[derive(Debug)]
pub struct FinishJob {
    server: secagg::Server,
    codec: FixedPoint,
    outcome: mpsc::Sender<Advance>,
}

impl FinishJob {
    /// Computes the round's sum and sends it (or why it failed) to the round.
    pub fn run(mut self) {
        let outcome = match self.server.finish(&mut rand::rng()) {
            Err(e) => Advance::Failed(e.to_string()),
            Ok((sum, u3)) => match self.codec.decode_sum(&sum, u3.len() as u64) {
                Ok(sum) => Advance::Done {
                    sum,
                    included: u3.into_iter().collect(),
                },
                Err(e) => Advance::Failed(e.to_string()),
            },
        };
        // A round that was dropped meanwhile needs no outcome.
        let _ = self.outcome.send(outcome);
    }
}

/// One secure round in memory.
#[derive(Debug)]
pub struct SecureRound {
    task: SecureTask,
    server: secagg::Server,
    codec: FixedPoint,
    phase: Phase,
    phase_deadline_ms: i64,
    phase_length_ms: i64,
    /// Devices expected to answer in the current phase.
    expected: BTreeSet<u64>,
    /// Devices that answered in the current phase.
    answered: BTreeSet<u64>,
    broadcast: Option<KeysBroadcast>,
    relays: BTreeMap<u64, SharesRelay>,
    request: Option<UnmaskingRequest>,
    /// Where the [`FinishJob`]'s outcome arrives (in the finishing phase).
    outcome: Option<mpsc::Receiver<Advance>>,
}

impl SecureRound {
    /// Opens a round for `task`'s members (at least 2; the threshold is set here).
    ///
    /// # Errors
    /// Fewer than 2 members or an invalid codec.
    pub fn open(
        mut task: SecureTask,
        round_deadline_ms: i64,
        phase_length_ms: u64,
    ) -> Result<Self, SecAggError> {
        task.members.sort_unstable();
        task.threshold = secagg::default_threshold(task.members.len().max(2)) as u32;
        let params = task.params()?;
        let codec = task.codec()?;
        Ok(Self {
            expected: task.members.iter().copied().collect(),
            server: secagg::Server::new(params),
            codec,
            task,
            phase: Phase::Keys,
            phase_deadline_ms: round_deadline_ms,
            phase_length_ms: phase_length_ms as i64,
            answered: BTreeSet::new(),
            broadcast: None,
            relays: BTreeMap::new(),
            request: None,
            outcome: None,
        })
    }

    pub fn task(&self) -> &SecureTask {
        &self.task
    }

    /// Whether `device` may still start the round (get the task and advertise keys).
    pub fn accepts_keys_from(&self, device: u64) -> bool {
        self.phase == Phase::Keys && !self.answered.contains(&device)
    }

    /// The current phase's deadline.
    pub fn deadline_ms(&self) -> i64 {
        self.phase_deadline_ms
    }

    /// Takes `device`'s message. `Ok(Some(finished))` when the message came too late for
    /// its phase (the device's part is over); `Ok(None)` when it was taken or was a resend.
    ///
    /// # Errors
    /// A message for a later phase than the current one, or one the protocol refuses
    /// (malformed, unexpected device); the phase's state is unchanged.
    pub fn receive(
        &mut self,
        device: u64,
        message: DeviceMessage,
    ) -> Result<Option<SecureNext>, SecAggError> {
        let phase = message.phase();
        // A resend of an answered phase's message (its answer was lost) changes nothing.
        if phase < self.phase && self.expected.contains(&device) {
            return Ok(None);
        }
        if phase < self.phase {
            return Ok(Some(SecureNext::Finished {
                included: false,
                reason: format!(
                    "phase {} closed before this message arrived; this device's input is not in the round's sum",
                    phase.name()
                ),
            }));
        }
        if phase > self.phase {
            return Err(SecAggError::WrongPhase {
                phase: phase_of(self.phase),
                what: "a message for a later phase",
            });
        }
        if self.answered.contains(&device) {
            return Ok(None);
        }
        if !self.expected.contains(&device) {
            return Ok(Some(SecureNext::Finished {
                included: false,
                reason: format!(
                    "not part of phase {} (an earlier message was missing)",
                    phase.name()
                ),
            }));
        }
        match message {
            DeviceMessage::Keys(m) => self.server.receive_keys(m)?,
            DeviceMessage::ShareKeys(m) => self.server.receive_shares(m)?,
            DeviceMessage::Masked(m) => self.server.receive_masked(m)?,
            DeviceMessage::Unmasking(m) => self.server.receive_unmasking(m)?,
        }
        self.answered.insert(device);
        Ok(None)
    }

    /// What `device` should do now.
    pub fn next_for(&self, device: u64) -> SecureNext {
        if !self.expected.contains(&device) {
            return SecureNext::Finished {
                included: false,
                reason: format!(
                    "not part of phase {} (an earlier message was missing or late)",
                    self.phase.name()
                ),
            };
        }
        if self.phase != Phase::Finishing && self.answered.contains(&device) {
            return SecureNext::Wait(format!(
                "waiting for phase {} to close ({} of {} answered)",
                self.phase.name(),
                self.answered.len(),
                self.expected.len()
            ));
        }
        match self.phase {
            Phase::Finishing => SecureNext::Wait(FINISHING.into()),
            Phase::Keys => SecureNext::Wait("send this device's keys first".into()),
            Phase::Sharing => SecureNext::Broadcast(
                self.broadcast
                    .clone()
                    .expect("the broadcast exists once sharing is open"),
            ),
            Phase::Masking => SecureNext::Relay(
                self.relays
                    .get(&device)
                    .cloned()
                    .expect("every member of U2 has a relay"),
            ),
            Phase::Unmasking => SecureNext::Request(
                self.request
                    .clone()
                    .expect("the request exists once unmasking is open"),
            ),
        }
    }

    /// Closes the current phase when every expected device answered, or, with
    /// `deadline_passed`, with whoever did; after the last phase, hands out the
    /// [`FinishJob`] that computes the sum, and once its outcome has arrived returns it.
    /// `min_quorum` is the study's quorum for the masked inputs.
    pub fn advance(&mut self, now_ms: i64, deadline_passed: bool, min_quorum: usize) -> Advance {
        if self.phase == Phase::Finishing {
            return self.finished(deadline_passed);
        }
        let complete = self.answered.len() == self.expected.len();
        if !complete && !deadline_passed {
            return Advance::None;
        }
        let result = match self.phase {
            Phase::Keys => self.server.close_advertise().map(|b| {
                self.expected = b.keys.iter().map(|k| k.device).collect();
                self.broadcast = Some(b);
                Phase::Sharing
            }),
            Phase::Sharing => self.server.close_sharing().map(|relays| {
                self.expected = relays.keys().copied().collect();
                self.relays = relays;
                Phase::Masking
            }),
            Phase::Masking => {
                if self.answered.len() < min_quorum {
                    return Advance::Failed(format!(
                        "{} masked inputs arrived, below the study's quorum of {min_quorum}",
                        self.answered.len()
                    ));
                }
                self.server.close_masking().map(|r| {
                    self.expected = r.u3.iter().copied().collect();
                    self.request = Some(r);
                    Phase::Unmasking
                })
            }
            Phase::Unmasking => return self.start_finishing(now_ms),
            Phase::Finishing => unreachable!("answered above"),
        };
        match result {
            Ok(next) => {
                self.phase = next;
                self.answered.clear();
                self.phase_deadline_ms = now_ms + self.phase_length_ms;
                Advance::Next
            }
            Err(e) => Advance::Failed(e.to_string()),
        }
    }

    /// Enters the finishing phase: the protocol's state leaves in a [`FinishJob`].
    fn start_finishing(&mut self, now_ms: i64) -> Advance {
        let placeholder = match self.task.params() {
            Ok(params) => secagg::Server::new(params),
            Err(e) => return Advance::Failed(e.to_string()),
        };
        let (outcome, arrives) = mpsc::channel();
        self.outcome = Some(arrives);
        self.phase = Phase::Finishing;
        self.phase_deadline_ms = now_ms + self.phase_length_ms;
        Advance::Finish(FinishJob {
            server: std::mem::replace(&mut self.server, placeholder),
            codec: self.codec,
            outcome,
        })
    }

    /// The finishing phase's outcome, once the job has sent it.
    fn finished(&mut self, deadline_passed: bool) -> Advance {
        let Some(arrives) = &self.outcome else {
            return Advance::Failed("the round's sum has no job computing it".into());
        };
        match arrives.try_recv() {
            Ok(outcome) => {
                self.outcome = None;
                outcome
            }
            Err(mpsc::TryRecvError::Empty) if !deadline_passed => Advance::None,
            Err(mpsc::TryRecvError::Empty) => {
                Advance::Failed("the round's sum was not computed before its deadline".into())
            }
            Err(mpsc::TryRecvError::Disconnected) => {
                Advance::Failed("the job computing the round's sum stopped without a result".into())
            }
        }
    }

    /// Whether the round is waiting for its [`FinishJob`]'s outcome.
    pub fn is_finishing(&self) -> bool {
        self.phase == Phase::Finishing
    }
}

/// The secagg phase a coordinator phase corresponds to, for error messages.
fn phase_of(phase: Phase) -> secagg::Phase {
    match phase {
        Phase::Keys => secagg::Phase::AdvertiseKeys,
        Phase::Sharing => secagg::Phase::ShareKeys,
        Phase::Masking => secagg::Phase::MaskedInput,
        Phase::Unmasking | Phase::Finishing => secagg::Phase::Unmasking,
    }
}

/// Splits a private round's decoded sum: each signal's parameters move by its noised,
/// clipped changes summed over the devices and divided by `expected` (the expected number
/// of devices, DP-FedAvg's fixed denominator), every coordinate whether or not a device
/// trained it; contributions as [`decode_slots`].
pub fn decode_private_slots(
    slots: &[Slot],
    sum: &[f64],
    current: &[SignalParams],
    expected: f64,
) -> (Vec<SignalParams>, Vec<Contribution>) {
    let (_, contributions) = decode_slots(slots, sum);
    let mut params = Vec::new();
    let mut at = 0;
    for slot in slots {
        let block = &sum[at..at + slot.n_values];
        at += slot.n_values + EXTRA_PER_SLOT;
        if let Some(c) = current.iter().find(|c| c.signal == slot.signal) {
            params.push(SignalParams {
                signal: slot.signal.clone(),
                values: c
                    .values
                    .iter()
                    .zip(block)
                    .map(|(v, s)| v + s / expected)
                    .collect(),
            });
        }
    }
    (params, contributions)
}

/// Splits a decoded sum into per-signal FedAvg parameters and contributions; a signal no
/// device trained (`Σ n = 0`) gets no entry (the caller keeps its current parameters).
pub fn decode_slots(slots: &[Slot], sum: &[f64]) -> (Vec<SignalParams>, Vec<Contribution>) {
    let mut params = Vec::new();
    let mut contributions = Vec::new();
    let mut at = 0;
    for slot in slots {
        let block = &sum[at..at + slot.n_values + EXTRA_PER_SLOT];
        at += block.len();
        let (weighted, extra) = block.split_at(slot.n_values);
        let (n_days, weighted_loss, count) = (extra[0], extra[1], extra[2]);
        // Day counts are whole numbers ≥ 1 per device: a sum below 0.5 means no device.
        if n_days < 0.5 {
            continue;
        }
        params.push(SignalParams {
            signal: slot.signal.clone(),
            values: weighted.iter().map(|w| w / n_days).collect(),
        });
        contributions.push(Contribution {
            signal: slot.signal.clone(),
            n_devices: count.round() as u32,
            n_days: n_days.round() as u64,
            mean_local_loss: weighted_loss / n_days,
        });
    }
    (params, contributions)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn slots() -> Vec<Slot> {
        vec![
            Slot {
                signal: "a".into(),
                n_values: 2,
            },
            Slot {
                signal: "b".into(),
                n_values: 1,
            },
        ]
    }

    /// Drives `round` (members 1, 2, 3, every phase answered by all) up to the close of its
    /// last phase, with device `k`'s plain input `inputs[k − 1]`; returns what that `advance`
    /// returned.
    fn up_to_finishing(round: &mut SecureRound, inputs: &[Vec<f64>]) -> Advance {
        use crate::secagg::Device;
        let mut rng = rand::rng();
        let params = round.task().params().unwrap();
        let codec = round.task().codec().unwrap();
        let mut devices = Vec::new();
        for &id in &round.task().members.clone() {
            let (device, keys) = Device::new(id, params.clone(), &mut rng).unwrap();
            assert!(
                round
                    .receive(id, DeviceMessage::Keys(keys))
                    .unwrap()
                    .is_none()
            );
            devices.push(device);
        }
        assert!(matches!(round.advance(0, false, 3), Advance::Next));
        for d in &mut devices {
            let SecureNext::Broadcast(b) = round.next_for(d.id()) else {
                panic!("sharing is open")
            };
            let m = d.share_keys(&b, &mut rng).unwrap();
            round.receive(d.id(), DeviceMessage::ShareKeys(m)).unwrap();
        }
        assert!(matches!(round.advance(0, false, 3), Advance::Next));
        for (d, x) in devices.iter_mut().zip(inputs) {
            let SecureNext::Relay(r) = round.next_for(d.id()) else {
                panic!("masking is open")
            };
            let m = d.masked_input(&r, &codec.encode(x).unwrap()).unwrap();
            round.receive(d.id(), DeviceMessage::Masked(m)).unwrap();
        }
        assert!(matches!(round.advance(0, false, 3), Advance::Next));
        for d in &mut devices {
            let SecureNext::Request(r) = round.next_for(d.id()) else {
                panic!("unmasking is open")
            };
            let m = d.unmask(&r).unwrap();
            round.receive(d.id(), DeviceMessage::Unmasking(m)).unwrap();
        }
        round.advance(0, false, 3)
    }

    fn three_device_round() -> SecureRound {
        let task = SecureTask {
            members: vec![1, 2, 3],
            threshold: 2,
            frac_bits: 24,
            slots: vec![Slot {
                signal: "a".into(),
                n_values: 1,
            }],
            stage: None,
            session: 0,
            group_levels: Vec::new(),
            group_slot: None,
            dp: None,
        };
        SecureRound::open(task, 1_000, 500).unwrap()
    }

    /// The last phase's close hands the protocol's state out as a job; until the job has run,
    /// devices are told to wait and `advance` has nothing; then `advance` gives the sum, which
    /// is the plain sum of the three input vectors (one slot `[n·θ, n, n·ℓ, 1]`; by hand:
    /// [1, 2, 3, 4] + [5, 6, 7, 8] + [9, 10, 11, 12] = [15, 18, 21, 24]).
    #[test]
    fn the_sum_is_computed_by_a_job_outside_the_round() {
        let mut round = three_device_round();
        let inputs = vec![
            vec![1.0, 2.0, 3.0, 4.0],
            vec![5.0, 6.0, 7.0, 8.0],
            vec![9.0, 10.0, 11.0, 12.0],
        ];
        let Advance::Finish(job) = up_to_finishing(&mut round, &inputs) else {
            panic!("the last phase's close hands out a job")
        };
        assert!(round.is_finishing());
        assert_eq!(round.next_for(2), SecureNext::Wait(FINISHING.into()));
        assert!(matches!(round.advance(10, false, 3), Advance::None));
        job.run();
        let Advance::Done { sum, included } = round.advance(10, false, 3) else {
            panic!("the job's outcome is the round's")
        };
        assert_eq!(sum, vec![15.0, 18.0, 21.0, 24.0]);
        assert_eq!(included, BTreeSet::from([1, 2, 3]));
    }

    /// A job dropped without running, or one whose outcome misses the finishing deadline,
    /// fails the round (which the coordinator then runs again).
    #[test]
    fn a_lost_or_late_job_fails_the_round() {
        let inputs = vec![vec![1.0, 1.0, 0.0, 1.0]; 3];
        let mut round = three_device_round();
        let Advance::Finish(job) = up_to_finishing(&mut round, &inputs) else {
            panic!("a job")
        };
        drop(job);
        let Advance::Failed(why) = round.advance(10, false, 3) else {
            panic!("a lost job fails the round")
        };
        assert!(why.contains("without a result"), "{why}");

        let mut round = three_device_round();
        let Advance::Finish(_job) = up_to_finishing(&mut round, &inputs) else {
            panic!("a job")
        };
        assert_eq!(
            round.deadline_ms(),
            500,
            "the finishing phase has a phase's length"
        );
        let Advance::Failed(why) = round.advance(501, true, 3) else {
            panic!("a late job fails the round")
        };
        assert!(why.contains("deadline"), "{why}");
    }

    /// Two devices: FedAvg of a is (10·[1, 2] + 30·[3, −2]) / 40 = [2.5, −1] by hand; b is
    /// trained by the second device only; the mean loss is (10·0.5 + 30·1.5) / 40 = 1.25.
    #[test]
    fn the_decoded_sum_is_fedavg_by_hand() {
        let task = SecureTask {
            members: vec![1, 2],
            threshold: 2,
            frac_bits: 24,
            slots: slots(),
            stage: None,
            session: 0,
            group_levels: Vec::new(),
            group_slot: None,
            dp: None,
        };
        let x1 = task.plain_input(&[("a", &[1.0, 2.0], 10, 0.5)]).unwrap();
        let x2 = task
            .plain_input(&[("a", &[3.0, -2.0], 30, 1.5), ("b", &[0.25], 7, 2.0)])
            .unwrap();
        let sum: Vec<f64> = x1.iter().zip(&x2).map(|(a, b)| a + b).collect();
        let (params, contributions) = decode_slots(&task.slots, &sum);
        assert_eq!(params[0].values, vec![2.5, -1.0]);
        assert_eq!(params[1].values, vec![0.25]);
        assert_eq!(contributions[0].n_devices, 2);
        assert_eq!(contributions[0].n_days, 40);
        assert!((contributions[0].mean_local_loss - 1.25).abs() < 1e-12);
        assert_eq!(contributions[1].n_devices, 1);
        // No device trained a signal: no entry.
        let x = task.plain_input(&[("b", &[0.25], 7, 2.0)]).unwrap();
        assert_eq!(decode_slots(&task.slots, &x).0.len(), 1);
        assert!(task.plain_input(&[("c", &[0.0], 1, 0.0)]).is_err());
        assert!(task.plain_input(&[("a", &[0.0], 1, 0.0)]).is_err());
    }

    /// Two devices' histograms in groups "a" and "b": the total block is their element-wise
    /// sum ([`DetectionStats::add`]), each group block its own device's.
    #[test]
    fn stage_blocks_decode_into_the_total_and_the_group_sums() {
        let task = |slot| SecureTask {
            members: vec![1, 2],
            threshold: 2,
            frac_bits: 24,
            slots: Vec::new(),
            stage: Some(DetectionStage::EpisodeHistogram),
            session: 1,
            group_levels: vec!["a".into(), "b".into()],
            group_slot: Some(slot),
            dp: None,
        };
        let h = |k: u64| DetectionStats::EpisodeHistogram {
            episodes: (0..HISTOGRAM_EDGES as u64).map(|i| (i + k) % 7).collect(),
            scored_days: 100 + k,
        };
        let x1 = task(0).stage_input(&h(1)).unwrap();
        let x2 = task(1).stage_input(&h(2)).unwrap();
        assert_eq!(x1.len(), 3 * (HISTOGRAM_EDGES + 2));
        let sum: Vec<f64> = x1.iter().zip(&x2).map(|(a, b)| a + b).collect();
        let (n, total, groups) = decode_stage(
            DetectionStage::EpisodeHistogram,
            &task(0).group_levels,
            &sum,
        );
        let mut expected = h(1);
        expected.add(&h(2));
        assert_eq!((n, total), (2, expected));
        assert_eq!(groups["a"], (1, h(1)));
        assert_eq!(groups["b"], (1, h(2)));
        let moments = DetectionStats::zero(DetectionStage::ResidualMoments);
        assert!(task(0).stage_input(&moments).is_err());
    }
}
