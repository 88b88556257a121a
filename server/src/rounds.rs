//! The round coordinator: enrolment, device selection, task hand-out,
//! validation of submissions, FedAvg aggregation and deadline handling,
//! and the two stages of the detector's calibration after training.
//!
//! In-memory state mirrors the database; every change is written to the
//! database first (one transaction each) and applied in memory only after the
//! write succeeded, so a failed write leaves both unchanged and a restart
//! rebuilds the same state from the database.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::Path;
use std::sync::Mutex;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tokio::sync::watch;

use plimsoll_proto::auth::{DeviceCredential, check_secret};

use crate::aggregate::UpdateInput;
use crate::db::Dialect;
use crate::detection::{DetectionStage, DetectionStats, StageView, StatsOutcome};
use crate::error::{AggregatorError, Result};
use crate::packets::FlagPacket;
use crate::secrets::{constant_time_eq, enrollment_code_hash, new_enrollment_code, secret_hash};
use crate::secure_round::{
    Advance, DeviceMessage, EndedSum, FinishJob, SecureNext, SecureRound, SecureTask, Slot,
    decode_private_slots, decode_slots, decode_stage,
};
use crate::store::StoredEpisode;
use crate::store::{Closing, CompletedStage, NewDevice, Store, StoredOpenRound, StudyStamp};
use crate::study::{
    Contribution, PriorVersion, SensorTerms, SignalParams, SignalUpdate, StudyConfig, StudyStatus,
    SubmitOutcome, Work, valid_id,
};

/// Suggested pause before a device asks again when it has nothing to do.
pub(crate) const RETRY_AFTER_MS: u32 = 250;

#[derive(Debug)]
struct Device {
    signals: Vec<String>,
    consent_share_flags: bool,
    /// A revoked device is never selected again and every call it makes is
    /// refused (the refusal itself reads the database, so a revocation made
    /// by another process counts at once; this flag follows it).
    revoked: bool,
    /// The sensor model declared at enrolment (studies with sensor models).
    sensor_model: Option<String>,
    /// The level of the study's group column reported at enrolment.
    group: Option<String>,
}

#[derive(Debug)]
struct OpenRound {
    round_id: u64,
    deadline_ms: i64,
    members: BTreeSet<u64>,
    submissions: BTreeMap<u64, Vec<SignalUpdate>>,
    /// The protocol's state in a study with secure aggregation (memory only).
    secure: Option<SecureRound>,
}

#[derive(Debug)]
struct StudyRuntime {
    config: StudyConfig,
    devices: BTreeMap<u64, Device>,
    /// How many of `devices` are revoked (kept with [`StudyRuntime::mark_revoked`], so that
    /// counting the active devices, which every enrolment does, costs O(1)).
    revoked: usize,
    labels: HashMap<String, u64>,
    latest: PriorVersion,
    rounds_completed: u32,
    last_round_id: u64,
    open: Option<OpenRound>,
    /// Which calibration stages are complete (by [`DetectionStage::index`]);
    /// the database holds the rest of their state.
    detection_complete: [bool; 2],
    /// Rounds training runs ([`StudyConfig::round_limit`], computed once: with differential
    /// privacy it is where the budget ends).
    round_limit: u32,
    /// The last secure round to end: its id, the devices whose input is in its sum and
    /// what happened.
    last_secure: Option<EndedSum>,
    /// Secure aggregation of the calibration stages, per stage (by
    /// [`DetectionStage::index`]). Memory only: after a restart a stage's sums start again.
    stage_secure: [StageSecure; 2],
    /// Secure sums whose last phase closed: their costly end, to be run by the coordinator
    /// outside its lock ([`Coordinator::run_finish_jobs`]).
    finish_jobs: Vec<FinishJob>,
    /// On a shared (PostgreSQL) store: the study's stamp when this process last read it, and
    /// when (see [`sync_study`]).
    stamp: Option<StudyStamp>,
    synced_ms: i64,
}

impl StudyRuntime {
    /// Enrolled devices that were not revoked.
    fn active_devices(&self) -> usize {
        self.devices.len() - self.revoked
    }

    /// Adds a device read from the store.
    fn add_device(&mut self, d: crate::store::StoredDevice) {
        self.labels.insert(d.label, d.device_id);
        let old = self.devices.insert(
            d.device_id,
            Device {
                signals: d.signals,
                consent_share_flags: d.consent_share_flags,
                revoked: d.revoked,
                sensor_model: d.sensor_model,
                group: d.group,
            },
        );
        let was_revoked = old.is_some_and(|o| o.revoked);
        self.revoked = self.revoked + usize::from(d.revoked) - usize::from(was_revoked);
    }

    /// The device terms of [`crate::store::StudyStamp`] computed from the devices held in memory.
    fn device_terms(&self) -> [i64; 3] {
        let consenting = self
            .devices
            .iter()
            .filter(|(_, d)| d.consent_share_flags)
            .map(|(&id, _)| id as i64)
            .sum();
        [self.devices.len() as i64, self.revoked as i64, consenting]
    }

    /// Marks device `id` revoked in memory (the database already says so).
    fn mark_revoked(&mut self, id: u64) {
        if let Some(d) = self.devices.get_mut(&id)
            && !d.revoked
        {
            d.revoked = true;
            self.revoked += 1;
        }
    }

    fn training_done(&self) -> bool {
        self.rounds_completed >= self.round_limit
    }
}

/// One `Enroll` request, as the coordinator checks it.
#[derive(Clone, Copy)]
pub struct Enrollment<'a> {
    pub study_id: &'a str,
    pub label: &'a str,
    pub signals: &'a [String],
    pub consent_share_flags: bool,
    /// The study's enrollment code as typed (normalised before comparing).
    pub enrollment_code: &'a str,
    /// The secret the device drew (64 lower-case hex characters).
    pub device_secret: &'a str,
    /// The device's sensor model (empty: none declared).
    pub sensor_model: &'a str,
    /// The participant's level of the study's group column (empty: none reported).
    pub group_label: &'a str,
}

impl std::fmt::Debug for Enrollment<'_> {
    // The code and the secret never reach a log.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Enrollment")
            .field("study_id", &self.study_id)
            .field("label", &self.label)
            .field("signals", &self.signals)
            .field("consent_share_flags", &self.consent_share_flags)
            .field("sensor_model", &self.sensor_model)
            .field("group_label", &self.group_label)
            .finish_non_exhaustive()
    }
}

/// One `SubmitUpdate` call, as [`Coordinator::submit_batch`] checks it.
#[derive(Debug)]
pub struct Submission {
    pub study_id: String,
    pub device_id: u64,
    pub round_id: u64,
    pub updates: Vec<SignalUpdate>,
    /// The call's credential (`Debug` never prints the secret).
    pub credential: DeviceCredential,
}

#[derive(Debug)]
struct State {
    store: Store,
    studies: BTreeMap<String, StudyRuntime>,
}

impl State {
    /// [`Coordinator::authenticate`] under the lock already held.
    fn authenticate(
        &mut self,
        study_id: &str,
        claimed: Option<u64>,
        credential: &DeviceCredential,
    ) -> Result<()> {
        self.store.refresh_identities()?;
        self.authenticate_refreshed(study_id, claimed, credential)
    }

    /// [`State::authenticate`] without first checking the identity cache against the
    /// database, for a batch of checks after one [`Store::refresh_identities`].
    fn authenticate_refreshed(
        &mut self,
        study_id: &str,
        claimed: Option<u64>,
        credential: &DeviceCredential,
    ) -> Result<()> {
        let id = credential.device_id;
        let identity = self.store.device_identity(id)?;
        let Some(identity) = identity else {
            return Err(AggregatorError::Unauthenticated(format!(
                "authorization: no device {id} is enrolled"
            )));
        };
        let presented = secret_hash(&credential.secret);
        if !identity
            .credential_hash
            .as_deref()
            .is_some_and(|stored| constant_time_eq(stored, &presented))
        {
            return Err(AggregatorError::Unauthenticated(format!(
                "authorization: the secret does not match device {id}"
            )));
        }
        if identity.revoked_ms.is_some() {
            if let Some(rt) = self.studies.get_mut(&identity.study_id) {
                rt.mark_revoked(id);
            }
            return Err(AggregatorError::PermissionDenied(format!(
                "authorization: device {id} was revoked by the study team"
            )));
        }
        if identity.study_id != study_id {
            return Err(AggregatorError::PermissionDenied(format!(
                "study_id: device {id} is not enrolled in study `{study_id}`"
            )));
        }
        if let Some(claimed) = claimed
            && claimed != id
        {
            return Err(AggregatorError::PermissionDenied(format!(
                "device_id: {claimed} is not the authenticated device {id}"
            )));
        }
        Ok(())
    }
}

/// The aggregator's state machine, shared by the gRPC service and the
/// deadline ticker. Methods are synchronous and short; callers on an async
/// runtime hold the lock only for one operation.
#[derive(Debug)]
pub struct Coordinator {
    state: Mutex<State>,
    changed: watch::Sender<u64>,
}

impl Coordinator {
    /// Opens the database at `path` and resumes every study from it.
    pub fn open(path: &Path) -> Result<Coordinator> {
        Self::from_store(Store::open(path)?)
    }

    /// Builds the coordinator from an opened store, rebuilding in-memory state.
    pub fn from_store(mut store: Store) -> Result<Coordinator> {
        let mut studies = BTreeMap::new();
        for config in store.studies()? {
            let id = config.study_id.clone();
            // (`load_runtime` reads the open round's stored submissions, every process's.)
            let mut runtime = load_runtime(&store, config)?;
            // A crash between the last accepted submission and the closing
            // transaction leaves a complete round open: finish it now.
            if runtime
                .open
                .as_ref()
                .is_some_and(|r| !r.members.is_empty() && r.submissions.len() == r.members.len())
            {
                let now = crate::service::now_ms();
                close_round(&mut store, &mut runtime, now)?;
                open_next(&mut store, &mut runtime, now, None)?;
            }
            // A secure round's protocol state lived in memory only: run it again.
            if runtime.config.secure_aggregation.is_some()
                && let Some(open) = runtime.open.take()
            {
                tracing::info!(study = %id, round_id = open.round_id, "restart: running the secure round again");
                let now = crate::service::now_ms();
                open_next(&mut store, &mut runtime, now, Some(open.round_id))?;
            }
            studies.insert(id, runtime);
        }
        let (changed, _) = watch::channel(0);
        Ok(Coordinator {
            state: Mutex::new(State { store, studies }),
            changed,
        })
    }

    /// A receiver woken whenever any round opens or closes.
    pub fn subscribe(&self) -> watch::Receiver<u64> {
        self.changed.subscribe()
    }

    fn notify(&self) {
        self.changed.send_modify(|n| *n += 1);
    }

    /// The lock, with `study_id` re-read first when another process may have moved it on
    /// (a shared store; see [`sync_study`]). A study another process created is read in.
    fn lock_synced(
        &self,
        study_id: &str,
        max_age_ms: i64,
    ) -> Result<std::sync::MutexGuard<'_, State>> {
        let mut state = self.lock();
        if shared(&state.store) {
            let State { store, studies } = &mut *state;
            let now = crate::service::now_ms();
            let changed = match studies.get_mut(study_id) {
                Some(rt) => sync_study(store, rt, now, max_age_ms)?,
                None => match store.study_config(study_id)? {
                    Some(config) => {
                        studies.insert(study_id.to_owned(), load_runtime(store, config)?);
                        true
                    }
                    None => false,
                },
            };
            if changed {
                self.notify();
            }
        }
        Ok(state)
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, State> {
        // A panic while holding the lock cannot leave the database half
        // written (transactions), and memory is only changed after writes, so
        // the state behind a poisoned lock is still consistent.
        self.state.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Creates a study; its initial prior becomes version 0. Returns the
    /// study's new enrollment code, which is stored only as a hash: show it
    /// once to the study team.
    pub fn create_study(&self, config: StudyConfig, now_ms: i64) -> Result<String> {
        config
            .validate()
            .map_err(|reason| AggregatorError::invalid("study config", reason))?;
        let mut state = self.lock();
        if state.studies.contains_key(&config.study_id) {
            return Err(AggregatorError::AlreadyExists(format!(
                "study `{}` already exists",
                config.study_id
            )));
        }
        let initial = PriorVersion {
            version: 0,
            round_id: 0,
            params: config
                .signals
                .iter()
                .map(|s| SignalParams {
                    signal: s.signal.clone(),
                    values: s.initial.clone(),
                })
                .collect(),
            contributions: Vec::new(),
            created_unix_ms: now_ms,
            sensor_terms: Vec::new(),
        };
        let code = new_enrollment_code();
        state
            .store
            .create_study(&config, &initial, &enrollment_code_hash(&code), now_ms)?;
        let id = config.study_id.clone();
        state.studies.insert(
            id,
            StudyRuntime {
                round_limit: config.round_limit(),
                config,
                devices: BTreeMap::new(),
                revoked: 0,
                labels: HashMap::new(),
                latest: initial,
                last_secure: None,
                stage_secure: Default::default(),
                finish_jobs: Vec::new(),
                rounds_completed: 0,
                last_round_id: 0,
                open: None,
                detection_complete: [false; 2],
                stamp: None,
                synced_ms: 0,
            },
        );
        Ok(code)
    }

    /// Gives a study a new enrollment code (the old one stops working) and
    /// returns it. Devices already enrolled are not affected.
    pub fn new_enrollment_code(&self, study_id: &str) -> Result<String> {
        let mut state = self.lock();
        study(&state.studies, study_id)?;
        let code = new_enrollment_code();
        state
            .store
            .set_enrollment_code_hash(study_id, &enrollment_code_hash(&code))?;
        Ok(code)
    }

    /// Revokes the device with this id or participant label: every later
    /// call it makes is refused and it is never selected for a round again.
    /// An update it submitted before stays in its round. Returns the id.
    pub fn revoke(&self, study_id: &str, device: &str, now_ms: i64) -> Result<u64> {
        let mut state = self.lock_synced(study_id, 0)?;
        let State { store, studies } = &mut *state;
        let rt = study_mut(studies, study_id)?;
        let id = store.resolve_device(study_id, device)?;
        store.revoke_device(id, now_ms)?;
        rt.mark_revoked(id);
        tracing::warn!(study = %study_id, device_id = id, "device revoked");
        // The revoked device may have been the last one a calibration stage
        // was waiting for.
        let mut completed = false;
        for stage in DetectionStage::ALL {
            completed |= complete_stage_if_due(store, rt, stage, now_ms)?;
        }
        drop(state);
        if completed {
            self.notify();
        }
        Ok(id)
    }

    /// Checks the credential of a call about `study_id`: the secret must
    /// match the device it names, the device must not be revoked and must
    /// belong to the study, and `claimed` (the request's `device_id`, when
    /// it has one) must be that device.
    pub fn authenticate(
        &self,
        study_id: &str,
        claimed: Option<u64>,
        credential: &DeviceCredential,
    ) -> Result<()> {
        self.lock().authenticate(study_id, claimed, credential)
    }

    /// Identifiers of all studies.
    pub fn study_ids(&self) -> Vec<String> {
        self.lock().studies.keys().cloned().collect()
    }

    pub fn status(&self, study_id: &str) -> Result<StudyStatus> {
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let rt = study(&state.studies, study_id)?;
        Ok(StudyStatus {
            config: rt.config.clone(),
            rounds_completed: rt.rounds_completed,
            current_round: rt.open.as_ref().map_or(0, |r| r.round_id),
            devices_enrolled: rt.active_devices() as u32,
            prior_version: rt.latest.version,
        })
    }

    /// The open round's id and the devices selected for it (including those that already
    /// submitted), or `None` when no round is open. Lets an in-process scheduler wake only
    /// the devices a round selected, as a push service would.
    pub fn open_round_members(&self, study_id: &str) -> Result<Option<(u64, Vec<u64>)>> {
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let rt = study(&state.studies, study_id)?;
        Ok(rt
            .open
            .as_ref()
            .map(|r| (r.round_id, r.members.iter().copied().collect())))
    }

    /// Starts a study that is still waiting for enrolments with the devices enrolled so far:
    /// its `start_when_enrolled` becomes the number of active devices (stored first, then in
    /// memory) and the first round opens. For an operator, or an in-process run, whose
    /// remaining participants will not enrol. Returns the new threshold.
    ///
    /// # Errors
    /// No such study; the study already started (FAILED_PRECONDITION); fewer active devices
    /// than its `min_quorum` (FAILED_PRECONDITION); the database.
    pub fn start_with_enrolled(&self, study_id: &str, now_ms: i64) -> Result<u32> {
        let mut state = self.lock_synced(study_id, 0)?;
        let State { store, studies } = &mut *state;
        let rt = study_mut(studies, study_id)?;
        if rt.last_round_id != 0 {
            return Err(AggregatorError::FailedPrecondition(format!(
                "study `{study_id}` has already started (round {})",
                rt.last_round_id
            )));
        }
        refresh_revocations(store, rt)?;
        let active = rt.active_devices() as u32;
        if active < rt.config.min_quorum {
            return Err(AggregatorError::FailedPrecondition(format!(
                "study `{study_id}` has {active} active devices, fewer than its min_quorum {}",
                rt.config.min_quorum
            )));
        }
        let mut config = rt.config.clone();
        config.start_when_enrolled = active;
        store.update_study_config(&config)?;
        rt.config = config;
        let opened = open_next(store, rt, now_ms, None)?;
        drop(state);
        if opened {
            self.notify();
        }
        Ok(active)
    }

    /// Enrols a participant's device, checking the study's enrollment code.
    /// The same label with the same device secret gets the same id back (and
    /// its recorded consent to share flags updated); with another secret it
    /// is refused.
    pub fn enroll(&self, request: &Enrollment<'_>, now_ms: i64) -> Result<u64> {
        let &Enrollment {
            study_id,
            label,
            signals,
            consent_share_flags,
            enrollment_code,
            device_secret,
            sensor_model,
            group_label,
        } = request;
        self.check_enrollment_code(study_id, enrollment_code)?;
        if !valid_id(label) {
            return Err(AggregatorError::invalid(
                "participant_label",
                format!("`{label}` must match [A-Za-z0-9_-]{{1,64}}"),
            ));
        }
        if signals.is_empty() {
            return Err(AggregatorError::invalid(
                "signals",
                "at least one signal is needed",
            ));
        }
        let mut state = self.lock_synced(study_id, 0)?;
        let State { store, studies } = &mut *state;
        let rt = study_mut(studies, study_id)?;
        let mut seen = BTreeSet::new();
        for (i, s) in signals.iter().enumerate() {
            if rt.config.layout(s).is_none() {
                return Err(AggregatorError::invalid(
                    format!("signals[{i}]"),
                    format!("`{s}` is not a signal of study `{study_id}`"),
                ));
            }
            if !seen.insert(s) {
                return Err(AggregatorError::invalid(
                    format!("signals[{i}]"),
                    format!("`{s}` repeated"),
                ));
            }
        }
        check_secret(device_secret).map_err(|e| AggregatorError::invalid("device_secret", e))?;
        let sensor_model = check_declared(
            "sensor_model",
            sensor_model,
            rt.config.sensor_models.as_ref().map(|m| &m.models[..]),
            "sensor models",
        )?;
        let group = check_declared(
            "group_label",
            group_label,
            rt.config.subgroups.as_ref().map(|g| &g.levels[..]),
            "group levels",
        )?;
        let credential_hash = secret_hash(device_secret);
        if let Some(&id) = rt.labels.get(label) {
            // The operator may have revoked the device from another process since it was cached.
            store.refresh_identities()?;
            let identity = store
                .device_identity(id)?
                .ok_or_else(|| AggregatorError::Corrupt(format!("device {id} vanished")))?;
            if identity.revoked_ms.is_some() {
                return Err(AggregatorError::PermissionDenied(format!(
                    "participant_label: `{label}` belongs to device {id}, which was revoked"
                )));
            }
            match identity.credential_hash {
                Some(stored) if constant_time_eq(&stored, &credential_hash) => {}
                Some(_) => {
                    return Err(AggregatorError::AlreadyExists(format!(
                        "participant_label: `{label}` is already enrolled by another device \
                         (a different device_secret)"
                    )));
                }
                // Enrolled before credentials existed: this secret claims it.
                None => store.claim_device_credential(id, &credential_hash)?,
            }
            let device = rt.devices.get_mut(&id).expect("labels and devices agree");
            for (field, declared, stored) in [
                ("sensor_model", &sensor_model, &device.sensor_model),
                ("group_label", &group, &device.group),
            ] {
                if declared != stored {
                    return Err(AggregatorError::invalid(
                        field,
                        format!(
                            "`{label}` was enrolled with {}; it is fixed at the first enrolment",
                            stored
                                .as_deref()
                                .map_or("none".to_owned(), |s| format!("`{s}`"))
                        ),
                    ));
                }
            }
            if device.consent_share_flags != consent_share_flags {
                store.set_consent(id, consent_share_flags)?;
                device.consent_share_flags = consent_share_flags;
            }
            return Ok(id);
        }
        let id = store.insert_device(
            &NewDevice {
                study_id,
                label,
                signals,
                consent_share_flags,
                credential_hash: &credential_hash,
                sensor_model: sensor_model.as_deref(),
                group: group.as_deref(),
            },
            now_ms,
        )?;
        rt.labels.insert(label.to_owned(), id);
        rt.devices.insert(
            id,
            Device {
                signals: signals.to_vec(),
                consent_share_flags,
                revoked: false,
                sensor_model,
                group,
            },
        );
        let opened = open_next(store, rt, now_ms, None)?;
        drop(state);
        if opened {
            self.notify();
        }
        Ok(id)
    }

    fn check_enrollment_code(&self, study_id: &str, code: &str) -> Result<()> {
        let state = self.lock();
        study(&state.studies, study_id)?;
        if code.trim().is_empty() {
            return Err(AggregatorError::Unauthenticated(format!(
                "enrollment_code: missing; enrolling in study `{study_id}` needs the code \
                 the study team handed out"
            )));
        }
        match state.store.enrollment_code_hash(study_id)? {
            None => Err(AggregatorError::FailedPrecondition(format!(
                "enrollment_code: study `{study_id}` has no enrollment code yet; its operator \
                 issues one with `plimsoll-aggregator enrollment-code {study_id}`"
            ))),
            Some(stored) if constant_time_eq(&stored, &enrollment_code_hash(code)) => Ok(()),
            Some(_) => Err(AggregatorError::Unauthenticated(format!(
                "enrollment_code: does not match study `{study_id}`"
            ))),
        }
    }

    /// What `device_id` should do now.
    pub fn work_for(&self, study_id: &str, device_id: u64) -> Result<Work> {
        let mut state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        if shared(&state.store)
            && let Some(rt) = state.studies.get(study_id)
            && !rt.devices.contains_key(&device_id)
        {
            // Enrolled through another process since this one last read the study.
            let State { store, studies } = &mut *state;
            let rt = studies.get_mut(study_id).expect("checked above");
            if sync_study(store, rt, crate::service::now_ms(), 0)? {
                self.notify();
            }
        }
        let rt = study(&state.studies, study_id)?;
        let device = rt
            .devices
            .get(&device_id)
            .ok_or_else(|| unknown_device(study_id, device_id))?;
        if rt.training_done() {
            return Ok(Work::Done {
                prior_version: rt.latest.version,
            });
        }
        let Some(open) = &rt.open else {
            return Ok(Work::Wait {
                retry_after_ms: RETRY_AFTER_MS,
                reason: format!(
                    "waiting for {} enrolled devices before round 1 ({} so far)",
                    rt.config.start_when_enrolled,
                    rt.active_devices()
                ),
            });
        };
        if !open.members.contains(&device_id) {
            return Ok(Work::Wait {
                retry_after_ms: RETRY_AFTER_MS,
                reason: format!("not selected for round {}", open.round_id),
            });
        }
        if let Some(secure) = &open.secure
            && !secure.accepts_keys_from(device_id)
        {
            return Ok(Work::Wait {
                retry_after_ms: RETRY_AFTER_MS,
                reason: format!(
                    "secure round {} is past its keys for this device; continue with SecureStep",
                    open.round_id
                ),
            });
        }
        // On a shared store the update may have come in through another process.
        if open.submissions.contains_key(&device_id)
            || (shared(&state.store)
                && state
                    .store
                    .submission(study_id, open.round_id, device_id)?
                    .is_some())
        {
            return Ok(Work::Wait {
                retry_after_ms: RETRY_AFTER_MS,
                reason: format!(
                    "update for round {} received; waiting for the round to close",
                    open.round_id
                ),
            });
        }
        let shared = rt
            .latest
            .params_for(device.sensor_model.as_deref())
            .into_iter()
            .filter(|p| device.signals.contains(&p.signal))
            .collect();
        Ok(Work::Task {
            round_id: open.round_id,
            shared,
            training: rt.config.training.clone(),
            deadline_unix_ms: open.deadline_ms,
            secure: open.secure.as_ref().map(|s| s.task().clone()),
        })
    }

    /// Authenticates, validates and records a batch of `SubmitUpdate` calls, answering each as
    /// it would be answered alone, in order. The new submissions that pass every check are
    /// written in **one** transaction (a group commit: under load the calls that arrived
    /// together share one commit), and only then applied in memory; a round they complete is
    /// closed and the next one opened, as for a single call. If that transaction fails, none
    /// of them is recorded and each gets the error, so a device's retry starts from a clean
    /// state.
    pub fn submit_batch(&self, batch: Vec<Submission>, now_ms: i64) -> Vec<Result<SubmitOutcome>> {
        let mut state = self.lock();
        let mut answers: Vec<Option<Result<SubmitOutcome>>> = Vec::with_capacity(batch.len());
        // New submissions that passed every check, by position in `batch`.
        let mut fresh: Vec<usize> = Vec::new();
        let shared = shared(&state.store);
        // Whether devices waiting on a change must be woken: a round closed, or this process
        // re-read a study another process moved on.
        let mut closed = false;
        // Every credential of the batch is checked against one look at the identity cache.
        let refreshed = state.store.refresh_identities().map_err(|e| e.to_string());
        for s in &batch {
            let check = |state: &mut State| {
                match &refreshed {
                    Ok(()) => {
                        state.authenticate_refreshed(&s.study_id, Some(s.device_id), &s.credential)
                    }
                    Err(why) => Err(AggregatorError::Unapplied(why.clone())),
                }
                .and_then(|()| check_submission(state, s, &batch, &fresh, now_ms))
            };
            let mut answer = check(&mut state);
            // On a shared store a round or device this process has not seen yet may be
            // another process's doing: re-read the study and check again.
            if shared
                && matches!(
                    answer,
                    Err(AggregatorError::FailedPrecondition(_) | AggregatorError::NotFound(_))
                )
            {
                let State { store, studies } = &mut *state;
                let synced = match studies.get_mut(&s.study_id) {
                    Some(rt) => sync_study(store, rt, crate::service::now_ms(), 0)
                        .inspect_err(|e| {
                            tracing::warn!(study = %s.study_id, error = %e, "re-reading the study failed; answering from this process's picture");
                        })
                        .unwrap_or(false),
                    None => false,
                };
                if synced {
                    closed = true;
                    answer = check(&mut state);
                }
            }
            match answer {
                Ok(None) => {
                    fresh.push(answers.len());
                    answers.push(None);
                }
                Ok(Some(outcome)) => answers.push(Some(Ok(outcome))),
                Err(e) => answers.push(Some(Err(e))),
            }
        }
        if !fresh.is_empty() {
            let State { store, studies } = &mut *state;
            let rows: Vec<_> = fresh
                .iter()
                .map(|&i| {
                    let s = &batch[i];
                    (
                        s.study_id.as_str(),
                        s.round_id,
                        s.device_id,
                        s.updates.as_slice(),
                    )
                })
                .collect();
            match store.insert_updates(&rows, now_ms) {
                Err(AggregatorError::FailedPrecondition(why)) => {
                    // Another process closed the round first: nothing was recorded.
                    for &i in &fresh {
                        answers[i] = Some(Err(AggregatorError::FailedPrecondition(why.clone())));
                    }
                }
                Err(e) => {
                    let message = e.to_string();
                    for &i in &fresh {
                        answers[i] = Some(Err(AggregatorError::Unapplied(message.clone())));
                    }
                }
                Ok(()) => {
                    drop(rows);
                    let mut batch: Vec<Option<Submission>> = batch.into_iter().map(Some).collect();
                    for (k, &i) in fresh.iter().enumerate() {
                        let s = batch[i].take().expect("each submission is applied once");
                        let rt = studies.get_mut(&s.study_id).expect("checked above");
                        let open = rt.open.as_mut().expect("checked above");
                        open.submissions.insert(s.device_id, s.updates);
                        let mut accepted = open.submissions.len() as u32;
                        if shared {
                            // Other processes take submissions to the same round: count the
                            // stored ones once, at this batch's last submission to the study.
                            let later = fresh[k + 1..].iter().any(|&j| {
                                batch[j].as_ref().is_some_and(|o| o.study_id == s.study_id)
                            });
                            if later {
                                answers[i] = Some(Ok(SubmitOutcome {
                                    accepted_in_round: accepted,
                                    round_closed: false,
                                }));
                                continue;
                            }
                            match store.count_updates(&s.study_id, open.round_id) {
                                Ok(n) => accepted = n,
                                Err(e) => {
                                    answers[i] = Some(Err(e));
                                    continue;
                                }
                            }
                        }
                        let complete = accepted as usize >= open.members.len();
                        let mut answer = Ok(SubmitOutcome {
                            accepted_in_round: accepted,
                            round_closed: false,
                        });
                        if complete {
                            answer = close_round(store, rt, now_ms).and_then(|closed_here| {
                                open_next(store, rt, now_ms, None)?;
                                Ok(SubmitOutcome {
                                    accepted_in_round: accepted,
                                    // Two processes completing a round at once: the one
                                    // that closed it says so.
                                    round_closed: closed_here,
                                })
                            });
                            closed = true;
                        }
                        answers[i] = Some(answer);
                    }
                }
            }
        }
        drop(state);
        if closed {
            self.notify();
        }
        answers
            .into_iter()
            .map(|a| a.expect("every submission is answered"))
            .collect()
    }

    /// Closes or retries rounds whose deadline has passed. Returns true when
    /// anything changed.
    pub fn tick(&self, now_ms: i64) -> Result<bool> {
        let mut state = self.lock();
        let State { store, studies } = &mut *state;
        let mut changed = false;
        if shared(store) {
            // A study another process created: its deadlines are this one's too.
            for id in store.study_ids()? {
                if !studies.contains_key(&id)
                    && let Some(config) = store.study_config(&id)?
                {
                    studies.insert(id, load_runtime(store, config)?);
                    changed = true;
                }
            }
        }
        for rt in studies.values_mut() {
            // Another process may have moved the study on (and may have stopped: its
            // deadlines are this one's to keep).
            changed |= sync_study(store, rt, now_ms, 0)?;
            for stage in DetectionStage::ALL {
                let due = rt.stage_secure[stage.index()]
                    .running
                    .iter()
                    .any(|s| now_ms > s.deadline_ms());
                if due {
                    changed |= advance_stage_sessions(store, rt, stage, now_ms, true)?;
                }
                if rt.detection_complete[stage.index()] {
                    continue;
                }
                let due = stage_deadline_ms(store, rt, stage)?.is_some_and(|d| now_ms > d);
                if due {
                    changed |= complete_stage_if_due(store, rt, stage, now_ms)?;
                }
            }
            if rt.open.as_ref().is_some_and(|o| o.secure.is_some()) {
                let due = rt
                    .open
                    .as_ref()
                    .and_then(|o| o.secure.as_ref())
                    .is_some_and(|s| now_ms > s.deadline_ms());
                if due {
                    advance_secure(store, rt, now_ms, true)?;
                    changed = true;
                }
                continue;
            }
            let Some(open) = &rt.open else { continue };
            if now_ms <= open.deadline_ms {
                continue;
            }
            if shared(store) {
                refresh_submissions(store, rt)?;
            }
            let Some(open) = &rt.open else { continue };
            let round_id = open.round_id;
            if open.submissions.len() as u32 >= rt.config.min_quorum {
                tracing::info!(study = %rt.config.study_id, round_id, "deadline passed; closing with quorum");
                close_round(store, rt, now_ms)?;
                open_next(store, rt, now_ms, None)?;
            } else {
                tracing::warn!(
                    study = %rt.config.study_id,
                    round_id,
                    received = open.submissions.len(),
                    quorum = rt.config.min_quorum,
                    "deadline passed without quorum; retrying the round"
                );
                let previous = rt.open.take();
                if let Err(e) = open_next(store, rt, now_ms, Some(round_id)) {
                    rt.open = previous;
                    return Err(e);
                }
            }
            changed = true;
        }
        let jobs = take_finish_jobs(studies);
        drop(state);
        changed |= self.run_finish_jobs(jobs, now_ms)?;
        if changed {
            self.notify();
        }
        Ok(changed)
    }

    /// Runs `jobs` (each study's [`FinishJob`]s, the costly end of secure sums) without the
    /// lock, so that other calls go on meanwhile, then takes the lock and publishes their
    /// outcomes (`crate::secure_round`, "Finishing outside the coordinator's lock"). Returns
    /// whether anything changed.
    fn run_finish_jobs(&self, jobs: Vec<(String, Vec<FinishJob>)>, now_ms: i64) -> Result<bool> {
        if jobs.is_empty() {
            return Ok(false);
        }
        let mut ids = Vec::with_capacity(jobs.len());
        for (study_id, study_jobs) in jobs {
            for job in study_jobs {
                job.run();
            }
            ids.push(study_id);
        }
        let mut state = self.lock();
        let State { store, studies } = &mut *state;
        let mut changed = false;
        for id in ids {
            let Some(rt) = studies.get_mut(&id) else {
                continue;
            };
            changed |= advance_secure(store, rt, now_ms, false)?;
            for stage in DetectionStage::ALL {
                changed |= advance_stage_sessions(store, rt, stage, now_ms, false)?;
            }
        }
        Ok(changed)
    }

    /// One `SecureStep` call of `device_id`: authenticates, takes the device's `message` for the current
    /// phase of secure round `round_id` (if any), closes the phase when every expected device
    /// has answered (after the last phase, computing the sum with the lock released and
    /// publishing the prior) and says what the device should do next.
    ///
    /// # Errors
    /// Authentication; a study without secure aggregation or a round that has not opened
    /// (FAILED_PRECONDITION); a message the protocol refuses (INVALID_ARGUMENT naming the
    /// field, or FAILED_PRECONDITION for a later phase's message); the database.
    pub fn secure_step(
        &self,
        study_id: &str,
        device_id: u64,
        credential: &DeviceCredential,
        sum: SecureSum,
        message: Option<DeviceMessage>,
        now_ms: i64,
    ) -> Result<SecureNext> {
        let mut message = message;
        loop {
            let (answer, jobs) = self.secure_step_locked(
                study_id,
                device_id,
                credential,
                sum,
                message.take(),
                now_ms,
            )?;
            if jobs.is_empty() {
                return Ok(answer);
            }
            // This call closed a sum's last phase: it computes the sum outside the lock, then
            // asks again what the device is told now that the sum is published (or failed).
            if self.run_finish_jobs(vec![(study_id.to_owned(), jobs)], now_ms)? {
                self.notify();
            }
        }
    }

    /// [`Coordinator::secure_step`] under the lock: everything but running [`FinishJob`]s,
    /// which it returns beside the answer when this call closed a sum's last phase.
    fn secure_step_locked(
        &self,
        study_id: &str,
        device_id: u64,
        credential: &DeviceCredential,
        sum: SecureSum,
        message: Option<DeviceMessage>,
        now_ms: i64,
    ) -> Result<(SecureNext, Vec<FinishJob>)> {
        let (round_id, stage) = match sum {
            SecureSum::Round(id) => (id, None),
            SecureSum::Stage(stage, session) => (session, Some(stage)),
        };
        let mut state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        state.authenticate(study_id, Some(device_id), credential)?;
        let State { store, studies } = &mut *state;
        let rt = study_mut(studies, study_id)?;
        if rt.config.secure_aggregation.is_none() {
            return Err(AggregatorError::FailedPrecondition(format!(
                "study `{study_id}` does not use secure aggregation; send updates with SubmitUpdate"
            )));
        }
        if let Some(stage) = stage {
            let (answer, changed) =
                secure_stage_step(store, rt, device_id, round_id, stage, message, now_ms)?;
            let jobs = std::mem::take(&mut rt.finish_jobs);
            drop(state);
            if changed {
                self.notify();
            }
            return Ok((answer, jobs));
        }
        if round_id > rt.last_round_id {
            return Err(AggregatorError::FailedPrecondition(format!(
                "round_id: round {round_id} has not opened (latest is {})",
                rt.last_round_id
            )));
        }
        let Some(secure) = rt
            .open
            .as_mut()
            .filter(|o| o.round_id == round_id)
            .and_then(|o| o.secure.as_mut())
        else {
            return Ok((finished_for(rt, round_id, device_id), Vec::new()));
        };
        if let Some(done) = take_message(secure, device_id, message)? {
            return Ok((done, Vec::new()));
        }
        let changed = advance_secure(store, rt, now_ms, false)?;
        let jobs = std::mem::take(&mut rt.finish_jobs);
        let answer = match rt
            .open
            .as_ref()
            .filter(|o| o.round_id == round_id)
            .and_then(|o| o.secure.as_ref())
        {
            Some(secure) => secure.next_for(device_id),
            None => finished_for(rt, round_id, device_id),
        };
        drop(state);
        if changed {
            self.notify();
        }
        Ok((answer, jobs))
    }

    /// A published prior; version `None` is the latest.
    pub fn prior(&self, study_id: &str, version: Option<u32>) -> Result<PriorVersion> {
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let rt = study(&state.studies, study_id)?;
        match version {
            None => Ok(rt.latest.clone()),
            Some(v) if v == rt.latest.version => Ok(rt.latest.clone()),
            Some(v) => state
                .store
                .priors(study_id)?
                .into_iter()
                .find(|p| p.version == v)
                .ok_or_else(|| {
                    AggregatorError::NotFound(format!(
                        "version: study `{study_id}` has no prior version {v}"
                    ))
                }),
        }
    }

    /// [`Coordinator::prior`] as device `device_id` uses it: its sensor model's terms in
    /// `params` where the version has them. Returns the prior and the model whose terms it
    /// carries (`None`: pooled).
    pub fn prior_for_device(
        &self,
        study_id: &str,
        version: Option<u32>,
        device_id: u64,
    ) -> Result<(PriorVersion, Option<String>)> {
        let mut prior = self.prior(study_id, version)?;
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let model = study(&state.studies, study_id)?
            .devices
            .get(&device_id)
            .and_then(|d| d.sensor_model.clone())
            .filter(|m| prior.has_terms(m));
        prior.params = prior.params_for(model.as_deref());
        Ok((prior, model))
    }

    /// Every published prior, oldest first (for convergence reports).
    pub fn prior_history(&self, study_id: &str) -> Result<Vec<PriorVersion>> {
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        study(&state.studies, study_id)?;
        state.store.priors(study_id)
    }

    /// Stores a flag packet (one episode) from a device whose participant
    /// consented to share flags, replacing the stored version of the same
    /// episode; returns the episode's id and how many versions it has had.
    /// Refused (FAILED_PRECONDITION naming `consent_share_flags`) without
    /// consent, before any validation.
    pub fn submit_flag_packet(
        &self,
        study_id: &str,
        device_id: u64,
        packet: &FlagPacket,
        now_ms: i64,
    ) -> Result<StoredEpisode> {
        let mut state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let State { store, studies } = &mut *state;
        let rt = study(studies, study_id)?;
        check_flag_consent(rt, study_id, device_id)?;
        packet.validate(&rt.config)?;
        store.upsert_flag_packet(study_id, device_id, packet, now_ms)
    }

    /// Stores a device's data-completeness summary (replacing its earlier
    /// one) after checking it against the signals the device enrolled.
    pub fn submit_data_summary(
        &self,
        study_id: &str,
        device_id: u64,
        summary: &crate::coverage::DataSummary,
        now_ms: i64,
    ) -> Result<()> {
        let mut state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let State { store, studies } = &mut *state;
        let rt = study(studies, study_id)?;
        let device = rt
            .devices
            .get(&device_id)
            .ok_or_else(|| unknown_device(study_id, device_id))?;
        summary.validate(&device.signals)?;
        store.upsert_data_summary(study_id, device_id, summary, now_ms)
    }

    /// `Ok` when `device_id` is enrolled in `study_id` with consent to share
    /// flags; FAILED_PRECONDITION naming `consent_share_flags` otherwise.
    pub fn require_flag_consent(&self, study_id: &str, device_id: u64) -> Result<()> {
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let rt = study(&state.studies, study_id)?;
        check_flag_consent(rt, study_id, device_id)
    }

    /// Validates and stores a device's contribution to a calibration stage
    /// (the stage is the one `stats` belongs to), replacing its earlier one
    /// while the stage is open, and completes the stage when this was the
    /// last expected submission (completion rule: [`complete_stage_if_due`]).
    /// Once the stage is complete an identical resubmission is answered as
    /// before and a different one is refused (FAILED_PRECONDITION naming
    /// `stage`): the published sum never changes.
    pub fn submit_detection_stats(
        &self,
        study_id: &str,
        device_id: u64,
        stats: &DetectionStats,
        now_ms: i64,
    ) -> Result<StatsOutcome> {
        stats.validate()?;
        let stage = stats.stage();
        let mut state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let State { store, studies } = &mut *state;
        let rt = study_mut(studies, study_id)?;
        if !rt.devices.contains_key(&device_id) {
            return Err(unknown_device(study_id, device_id));
        }
        if let Some(done) = store.completed_stage(study_id, stage)? {
            let mine = store
                .detection_submissions(study_id, stage)?
                .into_iter()
                .find(|(d, _)| *d == device_id);
            if mine.is_some_and(|(_, s)| &s == stats) {
                return Ok(StatsOutcome {
                    devices_submitted: done.n_devices,
                    stage_complete: true,
                });
            }
            return Err(AggregatorError::FailedPrecondition(format!(
                "stage: {} of study `{study_id}` is complete and its sum is published; it \
                 takes no new or changed submission",
                stage.as_str()
            )));
        }
        if rt.config.secure_aggregation.is_some() {
            return Err(AggregatorError::FailedPrecondition(format!(
                "study `{study_id}` uses secure aggregation: send the {} statistics with SecureStep",
                stage.as_str()
            )));
        }
        stage_open(store, rt, stage)?;
        let mut submitters = store.detection_submitters(study_id, stage)?;
        submitters.insert(device_id);
        let completed = due_completion(store, rt, stage, &submitters, now_ms)?
            .then(|| summed(store, rt, stage, Some((device_id, stats)), now_ms))
            .transpose()?;
        let stage_complete =
            match store.put_detection_stats(study_id, device_id, stats, completed.as_ref(), now_ms)
            {
                Ok(()) => completed.is_some(),
                // Another process published the stage's sum first (a shared store): nothing
                // was stored, and the device is answered as any late submission is.
                Err(e) if e.is_unique_violation() => {
                    rt.detection_complete[stage.index()] = true;
                    return Err(AggregatorError::FailedPrecondition(format!(
                        "stage: {} of study `{study_id}` was completed by another aggregator \
                     process; it takes no new or changed submission",
                        stage.as_str()
                    )));
                }
                Err(e) => return Err(e),
            };
        if stage_complete {
            rt.detection_complete[stage.index()] = true;
            tracing::info!(study = %study_id, stage = stage.as_str(), devices = submitters.len(), "calibration stage complete");
        }
        drop(state);
        if stage_complete {
            self.notify();
        }
        Ok(StatsOutcome {
            devices_submitted: submitters.len() as u32,
            stage_complete,
        })
    }

    /// A calibration stage as `device_id` sees it; the sum only once the
    /// stage is complete.
    pub fn detection_stage(
        &self,
        study_id: &str,
        device_id: u64,
        stage: DetectionStage,
    ) -> Result<StageView> {
        let state = self.lock_synced(study_id, SYNC_MAX_AGE_MS)?;
        let rt = study(&state.studies, study_id)?;
        let store = &state.store;
        let devices_expected = rt.active_devices() as u32;
        if let Some(done) = store.completed_stage(study_id, stage)? {
            let submitters = store.detection_submitters(study_id, stage)?;
            let min_group = rt
                .config
                .subgroups
                .as_ref()
                .map_or(u32::MAX, |g| g.min_devices_per_group);
            let own_group = rt
                .devices
                .get(&device_id)
                .and_then(|d| d.group.as_ref())
                .and_then(|g| done.group_sums.get(g).map(|s| (g, s)))
                .filter(|(_, (n, _))| *n >= min_group);
            let (sum, group) = match own_group {
                Some((g, (n, sum))) => (sum.clone(), Some((g.clone(), *n))),
                None => (done.sum, None),
            };
            return Ok(StageView {
                stage,
                open: false,
                complete: true,
                devices_submitted: done.n_devices,
                devices_expected,
                device_submitted: submitters.contains(&device_id),
                deadline_ms: stage_deadline_ms(store, rt, stage)?,
                completed_ms: Some(done.completed_ms),
                sum: Some(sum),
                group,
            });
        }
        let deadline_ms = stage_deadline_ms(store, rt, stage)?;
        let submitters = store.detection_submitters(study_id, stage)?;
        Ok(StageView {
            stage,
            open: deadline_ms.is_some(),
            complete: false,
            devices_submitted: submitters.len() as u32,
            devices_expected,
            device_submitted: submitters.contains(&device_id),
            deadline_ms,
            completed_ms: None,
            sum: None,
            group: None,
        })
    }

    /// SQLite's integrity report (`["ok"]` when sound).
    pub fn integrity_check(&self) -> Result<Vec<String>> {
        self.lock().store.integrity_check()
    }
}

fn study<'a>(studies: &'a BTreeMap<String, StudyRuntime>, id: &str) -> Result<&'a StudyRuntime> {
    studies
        .get(id)
        .ok_or_else(|| AggregatorError::NotFound(format!("study_id: no study `{id}`")))
}

fn study_mut<'a>(
    studies: &'a mut BTreeMap<String, StudyRuntime>,
    id: &str,
) -> Result<&'a mut StudyRuntime> {
    studies
        .get_mut(id)
        .ok_or_else(|| AggregatorError::NotFound(format!("study_id: no study `{id}`")))
}

fn check_flag_consent(rt: &StudyRuntime, study_id: &str, device_id: u64) -> Result<()> {
    let device = rt
        .devices
        .get(&device_id)
        .ok_or_else(|| unknown_device(study_id, device_id))?;
    if device.consent_share_flags {
        Ok(())
    } else {
        Err(AggregatorError::FailedPrecondition(format!(
            "consent_share_flags: device {device_id} enrolled without the participant's consent \
             to share flags; no flag packet is accepted from it"
        )))
    }
}

fn unknown_device(study_id: &str, device_id: u64) -> AggregatorError {
    AggregatorError::NotFound(format!(
        "device_id: device {device_id} is not enrolled in study `{study_id}`"
    ))
}

/// When `stage` opened plus the study's round deadline: the instant after
/// which the stage completes with a quorum. `None` while the stage is not
/// open: the residual-moments stage opens when the last round's prior is
/// published, the episode-histogram stage when the moments stage completes.
fn stage_deadline_ms(
    store: &Store,
    rt: &StudyRuntime,
    stage: DetectionStage,
) -> Result<Option<i64>> {
    let opened_ms = match stage {
        DetectionStage::ResidualMoments => rt.training_done().then_some(rt.latest.created_unix_ms),
        DetectionStage::EpisodeHistogram => {
            if !rt.detection_complete[DetectionStage::ResidualMoments.index()] {
                return Ok(None);
            }
            store
                .completed_stage(&rt.config.study_id, DetectionStage::ResidualMoments)?
                .map(|c| c.completed_ms)
        }
    };
    Ok(opened_ms.map(|t| t.saturating_add(rt.config.round_deadline_ms as i64)))
}

/// The completion rule of a calibration stage, given the devices that have
/// submitted to it: every enrolled device that is not revoked has
/// submitted, or the stage's deadline has passed and at least
/// `min_quorum` devices have. Revocations are read from the database first
/// (another process may have revoked a device).
fn due_completion(
    store: &Store,
    rt: &mut StudyRuntime,
    stage: DetectionStage,
    submitters: &BTreeSet<u64>,
    now_ms: i64,
) -> Result<bool> {
    if submitters.is_empty() || rt.detection_complete[stage.index()] {
        return Ok(false);
    }
    let Some(deadline_ms) = stage_deadline_ms(store, rt, stage)? else {
        return Ok(false);
    };
    refresh_revocations(store, rt)?;
    let everyone = rt
        .devices
        .iter()
        .filter(|(_, d)| !d.revoked)
        .all(|(id, _)| submitters.contains(id));
    let quorum = now_ms > deadline_ms && submitters.len() as u32 >= rt.config.min_quorum;
    Ok(everyone || quorum)
}

/// The element-by-element sum of a stage's stored submissions, with
/// `pending` (a device's submission not stored yet) in place of that
/// device's stored one; for the histogram stage of a study that calibrates
/// per group, also the sum per level of its group column.
fn summed(
    store: &Store,
    rt: &StudyRuntime,
    stage: DetectionStage,
    pending: Option<(u64, &DetectionStats)>,
    now_ms: i64,
) -> Result<CompletedStage> {
    let per_group = stage == DetectionStage::EpisodeHistogram
        && rt
            .config
            .subgroups
            .as_ref()
            .is_some_and(|g| g.calibrate_per_group);
    let mut sum = DetectionStats::zero(stage);
    let mut n_devices = 0u32;
    let mut group_sums: BTreeMap<String, (u32, DetectionStats)> = BTreeMap::new();
    let stored = store.detection_submissions(&rt.config.study_id, stage)?;
    let all = stored
        .iter()
        .filter(|(d, _)| pending.is_none_or(|(p, _)| p != *d))
        .map(|(d, s)| (*d, s))
        .chain(pending);
    for (device, stats) in all {
        sum.add(stats);
        n_devices += 1;
        if per_group && let Some(g) = rt.devices.get(&device).and_then(|d| d.group.as_ref()) {
            let entry = group_sums
                .entry(g.clone())
                .or_insert_with(|| (0, DetectionStats::zero(stage)));
            entry.0 += 1;
            entry.1.add(stats);
        }
    }
    Ok(CompletedStage {
        completed_ms: now_ms,
        n_devices,
        sum,
        group_sums,
    })
}

/// Completes `stage` when its completion rule holds now; true when it did.
fn complete_stage_if_due(
    store: &mut Store,
    rt: &mut StudyRuntime,
    stage: DetectionStage,
    now_ms: i64,
) -> Result<bool> {
    if rt.detection_complete[stage.index()] {
        return Ok(false);
    }
    let study_id = rt.config.study_id.clone();
    let submitters = store.detection_submitters(&study_id, stage)?;
    if !due_completion(store, rt, stage, &submitters, now_ms)? {
        return Ok(false);
    }
    let completed = summed(store, rt, stage, None, now_ms)?;
    match store.complete_stage(&study_id, &completed) {
        // Another process published the stage's sum first (a shared store).
        Err(e) if e.is_unique_violation() => {}
        other => other?,
    }
    rt.detection_complete[stage.index()] = true;
    tracing::info!(study = %study_id, stage = stage.as_str(), devices = completed.n_devices, "calibration stage complete");
    Ok(true)
}

/// Checks a submission's shape before anything is stored.
fn validate_updates(
    config: &StudyConfig,
    device_signals: &[String],
    updates: &[SignalUpdate],
) -> Result<()> {
    if updates.is_empty() {
        return Err(AggregatorError::invalid(
            "updates",
            "at least one signal update is needed",
        ));
    }
    let mut seen = BTreeSet::new();
    for (i, u) in updates.iter().enumerate() {
        let layout = config
            .layout(&u.signal)
            .filter(|_| device_signals.contains(&u.signal))
            .ok_or_else(|| {
                AggregatorError::invalid(
                    format!("updates[{i}].signal"),
                    format!("`{}` is not a signal this device enrolled with", u.signal),
                )
            })?;
        if !seen.insert(&u.signal) {
            return Err(AggregatorError::invalid(
                format!("updates[{i}].signal"),
                format!("`{}` appears twice", u.signal),
            ));
        }
        if u.values.len() != layout.param_names.len() {
            return Err(AggregatorError::invalid(
                format!("updates[{i}].values"),
                format!(
                    "expected {} values ({}), got {}",
                    layout.param_names.len(),
                    layout.param_names.join(", "),
                    u.values.len()
                ),
            ));
        }
        if let Some(j) = u.values.iter().position(|v| !v.is_finite()) {
            return Err(AggregatorError::invalid(
                format!("updates[{i}].values[{j}]"),
                format!("{} ({}) is not finite", u.values[j], layout.param_names[j]),
            ));
        }
        if u.n_days == 0 {
            return Err(AggregatorError::invalid(
                format!("updates[{i}].n_days"),
                "must be at least 1",
            ));
        }
        if !u.local_loss.is_finite() {
            return Err(AggregatorError::invalid(
                format!("updates[{i}].local_loss"),
                format!("{} is not finite", u.local_loss),
            ));
        }
    }
    Ok(())
}

/// The checks of one submission against the state and the earlier new submissions of its batch
/// (`fresh`, positions in `batch`): `Some(outcome)` when it is a retry answered without writing
/// anything, `None` when it is new and must be recorded.
fn check_submission(
    state: &mut State,
    s: &Submission,
    batch: &[Submission],
    fresh: &[usize],
    now_ms: i64,
) -> Result<Option<SubmitOutcome>> {
    let State { store, studies } = state;
    let (study_id, device_id, round_id, updates) =
        (s.study_id.as_str(), s.device_id, s.round_id, &s.updates);
    let rt = study_mut(studies, study_id)?;
    let device = rt
        .devices
        .get(&device_id)
        .ok_or_else(|| unknown_device(study_id, device_id))?;
    validate_updates(&rt.config, &device.signals, updates)?;
    if rt.config.secure_aggregation.is_some() {
        return Err(AggregatorError::FailedPrecondition(format!(
            "study `{study_id}` uses secure aggregation: send the update with SecureStep"
        )));
    }

    let open_id = rt.open.as_ref().map(|r| r.round_id);
    if open_id != Some(round_id) {
        // A retry of a submission that was accepted before its round closed
        // is answered as it was the first time (idempotent submission).
        if round_id <= rt.last_round_id
            && store.submission(study_id, round_id, device_id)?.as_ref() == Some(updates)
        {
            return Ok(Some(SubmitOutcome {
                accepted_in_round: 0,
                round_closed: true,
            }));
        }
        return Err(AggregatorError::FailedPrecondition(match open_id {
            _ if round_id > rt.last_round_id => {
                format!(
                    "round_id: round {round_id} has not opened (latest is {})",
                    rt.last_round_id
                )
            }
            Some(cur) => {
                format!("round_id: round {round_id} is closed; the open round is {cur}")
            }
            None => format!("round_id: round {round_id} is closed and no round is open"),
        }));
    }
    let open = rt.open.as_ref().expect("checked above");
    if !open.members.contains(&device_id) {
        return Err(AggregatorError::FailedPrecondition(format!(
            "device_id: device {device_id} was not selected for round {round_id}"
        )));
    }
    // The same device earlier in this batch counts as an accepted submission.
    let earlier = fresh
        .iter()
        .map(|&i| &batch[i])
        .find(|e| e.study_id == study_id && e.device_id == device_id)
        .map(|e| &e.updates);
    // On a shared store the device may have sent it through another process.
    let stored = if shared(store) && !open.submissions.contains_key(&device_id) && earlier.is_none()
    {
        store.submission(study_id, round_id, device_id)?
    } else {
        None
    };
    if let Some(previous) = open
        .submissions
        .get(&device_id)
        .or(earlier)
        .or(stored.as_ref())
    {
        if previous == updates {
            return Ok(Some(SubmitOutcome {
                accepted_in_round: open.submissions.len() as u32,
                round_closed: false,
            }));
        }
        return Err(AggregatorError::AlreadyExists(format!(
            "device {device_id} already submitted a different update for round {round_id}"
        )));
    }
    if now_ms > open.deadline_ms {
        return Err(AggregatorError::FailedPrecondition(format!(
            "round_id: the deadline of round {round_id} has passed"
        )));
    }
    Ok(None)
}

/// Whether other aggregator processes may serve the same studies from this store (a
/// PostgreSQL store: replicas). Each then re-reads what the others may have changed
/// ([`sync_study`]) and the database decides every race ([`Store::close_round`],
/// [`Store::open_new_round`], [`Store::insert_updates`]).
fn shared(store: &Store) -> bool {
    store.dialect() == Dialect::Postgres
}

/// A study's in-memory state, read from the store.
fn load_runtime(store: &Store, config: StudyConfig) -> Result<StudyRuntime> {
    // One snapshot on a shared store: read in separate statements, a round another process
    // opened between them could show in `last_round_id` but not as the open round, and this
    // process would then try to open the round after it.
    store.read_snapshot(|store| read_runtime(store, config))
}

fn read_runtime(store: &Store, config: StudyConfig) -> Result<StudyRuntime> {
    let id = config.study_id.clone();
    // The stamp first: what changes while the rest is read then shows as a stamp that
    // differs at the next sync, never as a change the stamp already counts but this
    // picture misses.
    let stamp = if shared(store) {
        Some(store.study_stamp(&id)?)
    } else {
        None
    };
    let latest = store
        .priors(&id)?
        .pop()
        .ok_or_else(|| AggregatorError::Corrupt(format!("study {id} has no prior")))?;
    let open = store.open_round(&id)?.map(|r| OpenRound {
        round_id: r.round_id,
        deadline_ms: r.deadline_ms,
        members: r.members.into_iter().collect(),
        submissions: r.submissions.into_iter().collect(),
        secure: None,
    });
    let mut detection_complete = [false; 2];
    for stage in DetectionStage::ALL {
        detection_complete[stage.index()] = store.completed_stage(&id, stage)?.is_some();
    }
    let mut rt = StudyRuntime {
        revoked: 0,
        rounds_completed: store.rounds_completed(&id)?,
        last_round_id: store.last_round_id(&id)?,
        round_limit: config.round_limit(),
        config,
        devices: BTreeMap::new(),
        labels: HashMap::new(),
        latest,
        open,
        detection_complete,
        last_secure: None,
        stage_secure: Default::default(),
        finish_jobs: Vec::new(),
        stamp,
        synced_ms: crate::service::now_ms(),
    };
    for d in store.devices(&id)? {
        rt.add_device(d);
    }
    Ok(rt)
}

/// How stale (ms) a replica's picture of a study may be when it answers a device; races are
/// decided by the database, so staleness only delays what a device is told.
const SYNC_MAX_AGE_MS: i64 = 100;

/// On a shared store, re-reads the study when another process may have moved it on: when
/// the last read is older than `max_age_ms` and the stored stamp changed. The open round's
/// in-memory protocol state (secure aggregation) is kept while the round stays the same.
/// Returns true when the picture changed.
fn sync_study(store: &Store, rt: &mut StudyRuntime, now_ms: i64, max_age_ms: i64) -> Result<bool> {
    if !shared(store) || now_ms - rt.synced_ms < max_age_ms {
        return Ok(false);
    }
    let study_id = rt.config.study_id.clone();
    let stamp = store.study_stamp(&study_id)?;
    rt.synced_ms = now_ms;
    let Some(held) = rt.stamp else {
        reload_runtime(store, rt)?;
        return Ok(true);
    };
    if held == stamp {
        return Ok(false);
    }
    // Only devices enrolled (the common change while a cohort enrols, here or through
    // another process): read just the devices after the newest one held. Ids may commit out
    // of order (two processes enrolling at once), leaving a gap below it: then read the ids
    // and the devices from the lowest missing one on. The device terms recomputed from memory
    // must then equal the stored ones; anything else (a revocation, a consent change, a
    // round) re-reads the whole study.
    if held.with_devices(stamp.devices()) == stamp {
        let after = rt.devices.keys().next_back().copied().unwrap_or(0);
        for d in store.devices_after(&study_id, after)? {
            rt.add_device(d);
        }
        if rt.device_terms()[0] != stamp.devices()[0] {
            let missing = store
                .device_ids(&study_id)?
                .into_iter()
                .find(|id| !rt.devices.contains_key(id));
            if let Some(first) = missing {
                for d in store.devices_after(&study_id, first - 1)? {
                    rt.add_device(d);
                }
            }
        }
        if rt.device_terms() == stamp.devices() {
            rt.stamp = Some(stamp);
            return Ok(true);
        }
    }
    reload_runtime(store, rt)?;
    Ok(true)
}

/// Replaces a study's in-memory state with the stored one (keeping the protocol state of
/// a secure round that is still the open one).
fn reload_runtime(store: &Store, rt: &mut StudyRuntime) -> Result<()> {
    let config = store
        .study_config(&rt.config.study_id)?
        .unwrap_or_else(|| rt.config.clone());
    let mut fresh = load_runtime(store, config)?;
    if let (Some(old), Some(new)) = (rt.open.as_mut(), fresh.open.as_mut())
        && old.round_id == new.round_id
    {
        new.secure = old.secure.take();
    }
    fresh.last_secure = rt.last_secure.take();
    fresh.stage_secure = std::mem::take(&mut rt.stage_secure);
    tracing::debug!(study = %rt.config.study_id, round = fresh.last_round_id, "re-read the study from the shared store");
    *rt = fresh;
    Ok(())
}

/// On a shared store, the open round's submissions as stored by every process.
fn refresh_submissions(store: &Store, rt: &mut StudyRuntime) -> Result<()> {
    let Some(open) = rt.open.as_mut() else {
        return Ok(());
    };
    if let Some(stored) = store.open_round(&rt.config.study_id)?
        && stored.round_id == open.round_id
    {
        open.submissions = stored.submissions.into_iter().collect();
    }
    Ok(())
}

/// [`maybe_open_round`], where another process opening the round first is no error: this
/// one re-reads the study instead.
fn open_next(
    store: &mut Store,
    rt: &mut StudyRuntime,
    now_ms: i64,
    abandon: Option<u64>,
) -> Result<bool> {
    match maybe_open_round(store, rt, now_ms, abandon) {
        Err(AggregatorError::Superseded(why)) => {
            tracing::info!(study = %rt.config.study_id, %why, "another aggregator process moved the study on");
            reload_runtime(store, rt)?;
            Ok(true)
        }
        other => other,
    }
}

/// Marks the devices revoked in the database as revoked in memory (revocations may come from
/// another process, the operator's command line, while this one runs).
fn refresh_revocations(store: &Store, rt: &mut StudyRuntime) -> Result<()> {
    for id in store.revoked_devices(&rt.config.study_id)? {
        rt.mark_revoked(id);
    }
    Ok(())
}

/// Opens the next round when none is open, rounds remain and enough devices
/// are enrolled. `abandon` names a round being retried for lack of quorum.
fn maybe_open_round(
    store: &mut Store,
    rt: &mut StudyRuntime,
    now_ms: i64,
    abandon: Option<u64>,
) -> Result<bool> {
    // The enrolment threshold starts the study; after that a revocation
    // never stops it (a round short of quorum is retried as usual).
    let too_few = |rt: &StudyRuntime| {
        rt.last_round_id == 0 && (rt.active_devices() as u32) < rt.config.start_when_enrolled
    };
    // Cheap checks first: the in-memory count can only overstate the
    // active devices, so the database is read only when a round may open.
    if rt.open.is_some() || rt.training_done() || too_few(rt) {
        return Ok(false);
    }
    // Revocations may come from another process (the operator's command
    // line) while this one runs: read them before choosing members.
    refresh_revocations(store, rt)?;
    if too_few(rt) {
        return Ok(false);
    }
    let round_id = rt.last_round_id + 1;
    let active = rt
        .devices
        .iter()
        .filter(|(_, d)| !d.revoked)
        .map(|(&id, _)| id)
        .collect();
    let members = select_members(&rt.config, active, round_id);
    let secure = match rt.config.secure_aggregation {
        Some(sa) => {
            let slots = rt
                .config
                .signals
                .iter()
                .map(|l| Slot {
                    signal: l.signal.clone(),
                    n_values: l.param_names.len(),
                })
                .collect();
            let deadline = now_ms + rt.config.round_deadline_ms as i64;
            let dim = rt.config.signals.iter().map(|l| l.param_names.len()).sum();
            let threshold = crate::secagg::default_threshold(members.len().max(2));
            let opened = rt
                .config
                .dp
                .as_ref()
                .map(|dp| {
                    crate::privacy::DistributedNoise::for_round(dp, threshold, dim, sa.frac_bits)
                })
                .transpose()
                .and_then(|dp| {
                    let task = SecureTask {
                        members: members.clone(),
                        threshold: 0,
                        frac_bits: sa.frac_bits,
                        slots,
                        stage: None,
                        session: round_id,
                        group_levels: Vec::new(),
                        group_slot: None,
                        dp,
                    };
                    SecureRound::open(task, deadline, sa.phase_deadline_ms)
                        .map_err(|e| e.to_string())
                });
            match opened {
                Ok(round) => Some(round),
                Err(e) => {
                    tracing::warn!(study = %rt.config.study_id, round_id, error = %e, "no secure round can open");
                    return Ok(false);
                }
            }
        }
        None => None,
    };
    let round = StoredOpenRound {
        round_id,
        deadline_ms: now_ms + rt.config.round_deadline_ms as i64,
        members,
        submissions: Vec::new(),
    };
    store.open_new_round(
        &rt.config.study_id,
        &round,
        rt.latest.version,
        abandon,
        now_ms,
    )?;
    tracing::info!(study = %rt.config.study_id, round_id, members = round.members.len(), "round opened");
    rt.last_round_id = round_id;
    rt.open = Some(OpenRound {
        round_id,
        deadline_ms: round.deadline_ms,
        members: round.members.into_iter().collect(),
        submissions: BTreeMap::new(),
        secure,
    });
    Ok(true)
}

#[cfg(test)]
mod shard_tests {
    /// 9 devices at most 4 per session: 3 of 3; 10 at most 4: 4, 3, 3; 4 at most 4: one;
    /// 5 at most 4: 3 and 2 (never a session of one).
    #[test]
    fn shards_are_few_and_even() {
        let ids: Vec<u64> = (1..=10).collect();
        let sizes =
            |n: usize| -> Vec<usize> { super::shards(&ids[..n], 4).iter().map(Vec::len).collect() };
        assert_eq!(sizes(9), vec![3, 3, 3]);
        assert_eq!(sizes(10), vec![4, 3, 3]);
        assert_eq!(sizes(4), vec![4]);
        assert_eq!(sizes(5), vec![3, 2]);
        assert_eq!(
            super::shards(&ids, 4).concat(),
            ids,
            "every device once, in order"
        );
    }
}

/// Every study's [`FinishJob`]s, taken out of their runtimes.
fn take_finish_jobs(studies: &mut BTreeMap<String, StudyRuntime>) -> Vec<(String, Vec<FinishJob>)> {
    studies
        .iter_mut()
        .filter(|(_, rt)| !rt.finish_jobs.is_empty())
        .map(|(id, rt)| (id.clone(), std::mem::take(&mut rt.finish_jobs)))
        .collect()
}

/// Which secure sum a `SecureStep` call is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SecureSum {
    /// Training round `id`.
    Round(u64),
    /// A calibration stage's session (0: join the current one).
    Stage(DetectionStage, u64),
}

/// `Ok` when calibration `stage` accepts contributions now; FAILED_PRECONDITION naming
/// `stage` and what it waits for otherwise.
fn stage_open(store: &Store, rt: &StudyRuntime, stage: DetectionStage) -> Result<()> {
    if stage_deadline_ms(store, rt, stage)?.is_some() {
        return Ok(());
    }
    Err(AggregatorError::FailedPrecondition(format!(
        "stage: {} of study `{}` is not open yet ({})",
        stage.as_str(),
        rt.config.study_id,
        match stage {
            DetectionStage::ResidualMoments => format!(
                "it opens when training ends; {} of {} rounds completed",
                rt.rounds_completed, rt.config.rounds
            ),
            DetectionStage::EpisodeHistogram =>
                "it opens when the residual_moments stage is complete".to_owned(),
        }
    )))
}

/// The secure sums of one calibration stage. The stage's devices are split into shards of
/// at most `secure_aggregation.max_session_devices` (the protocol's cost grows with the
/// square of a session's size), each summed in its own session; the stage completes with
/// the total of its shards' sums. A failed shard is run again as a new session.
#[derive(Debug, Default)]
struct StageSecure {
    /// Shard sessions still running.
    running: Vec<SecureRound>,
    /// The sum of the shards completed so far.
    summed: Option<crate::secure_round::StageSum>,
    /// Every ended session, by its number.
    ended: BTreeMap<u64, EndedSum>,
    /// Sessions opened so far (the next one's number is one more).
    opened: u64,
}

impl StageSecure {
    /// Opens a session for `members` of `stage`.
    fn open_session(
        &mut self,
        config: &StudyConfig,
        stage: DetectionStage,
        members: Vec<u64>,
        keys_deadline_ms: i64,
    ) -> Result<()> {
        let sa = config
            .secure_aggregation
            .expect("only a study with secure aggregation has secure sessions");
        let per_group = stage == DetectionStage::EpisodeHistogram
            && config
                .subgroups
                .as_ref()
                .is_some_and(|g| g.calibrate_per_group);
        let group_levels = match (&config.subgroups, per_group) {
            (Some(g), true) => g.levels.clone(),
            _ => Vec::new(),
        };
        let number = self.opened + 1;
        let task = SecureTask {
            members,
            threshold: 0,
            frac_bits: sa.frac_bits,
            slots: Vec::new(),
            stage: Some(stage),
            session: number,
            group_levels,
            group_slot: None,
            dp: None,
        };
        let session = SecureRound::open(task, keys_deadline_ms, sa.phase_deadline_ms)
            .map_err(|e| AggregatorError::FailedPrecondition(format!("stage: {e}")))?;
        tracing::info!(study = %config.study_id, stage = stage.as_str(), session = number, members = session.task().members.len(), "secure calibration session opened");
        self.opened = number;
        self.running.push(session);
        Ok(())
    }
}

/// `members` (sorted) in the fewest shards of at most `max` devices (`max` ≥ 4), of sizes
/// that differ by at most one, so each holds at least 2 when there are at least 2 members.
fn shards(members: &[u64], max: usize) -> Vec<Vec<u64>> {
    let count = members.len().div_ceil(max.max(4)).max(1);
    let (base, extra) = (members.len() / count, members.len() % count);
    let mut out = Vec::with_capacity(count);
    let mut at = 0;
    for k in 0..count {
        let size = base + usize::from(k < extra);
        out.push(members[at..at + size].to_vec());
        at += size;
    }
    out
}

/// One `SecureStep` call for calibration `stage` (the secure replacement of
/// `SubmitDetectionStats`): `session` 0 asks to join the device's shard session (the stage's
/// shards are opened here, over every active device, on the first call), another names the
/// session a message belongs to. Returns the answer and whether anything changed.
fn secure_stage_step(
    store: &mut Store,
    rt: &mut StudyRuntime,
    device_id: u64,
    session: u64,
    stage: DetectionStage,
    message: Option<DeviceMessage>,
    now_ms: i64,
) -> Result<(SecureNext, bool)> {
    let i = stage.index();
    let ended = |rt: &StudyRuntime, session: u64| {
        let found = rt.stage_secure[i].ended.get(&session);
        EndedSum::answer(found, session, device_id, || {
            format!("{} session {session} is over", stage.as_str())
        })
    };
    if rt.detection_complete[i] {
        // Asking to join a complete stage is asking about the device's last session.
        let last = rt.stage_secure[i]
            .ended
            .values()
            .rev()
            .find(|e| e.included.contains(&device_id))
            .map_or(session, |e| e.id);
        return Ok((ended(rt, if session == 0 { last } else { session }), false));
    }
    stage_open(store, rt, stage)?;
    let mut changed = false;
    let secure = &rt.stage_secure[i];
    if secure.running.is_empty() && secure.summed.is_none() && secure.opened == 0 {
        refresh_revocations(store, rt)?;
        let sa = rt.config.secure_aggregation.expect("checked by the caller");
        let members: Vec<u64> = rt
            .devices
            .iter()
            .filter(|(_, d)| !d.revoked)
            .map(|(&id, _)| id)
            .collect();
        let stage_deadline = stage_deadline_ms(store, rt, stage)?.unwrap_or(now_ms);
        let keys_deadline = stage_deadline.max(now_ms + sa.phase_deadline_ms as i64);
        for shard in shards(&members, sa.max_session_devices as usize) {
            rt.stage_secure[i].open_session(&rt.config, stage, shard, keys_deadline)?;
        }
        changed = true;
    }
    if session == 0 {
        let mine = rt.stage_secure[i]
            .running
            .iter()
            .find(|s| s.task().members.binary_search(&device_id).is_ok());
        return Ok(match mine {
            Some(s) if s.accepts_keys_from(device_id) => {
                let mut task = s.task().clone();
                let group = rt.devices.get(&device_id).and_then(|d| d.group.as_ref());
                task.group_slot = group.and_then(|g| task.group_levels.iter().position(|l| l == g));
                (SecureNext::Start(task), changed)
            }
            Some(s) => (
                SecureNext::Wait(format!(
                    "{} session {} runs without this device; wait for it to end",
                    stage.as_str(),
                    s.task().session
                )),
                changed,
            ),
            None => (
                SecureNext::Wait(format!(
                    "no {} session of this device is running; wait for the stage to complete",
                    stage.as_str()
                )),
                changed,
            ),
        });
    }
    let Some(current) = rt.stage_secure[i]
        .running
        .iter_mut()
        .find(|s| s.task().session == session)
    else {
        return Ok((ended(rt, session), changed));
    };
    if let Some(done) = take_message(current, device_id, message)? {
        return Ok((done, changed));
    }
    changed |= advance_stage_sessions(store, rt, stage, now_ms, false)?;
    let answer = match rt.stage_secure[i]
        .running
        .iter()
        .find(|s| s.task().session == session)
    {
        Some(current) => current.next_for(device_id),
        None => ended(rt, session),
    };
    Ok((answer, changed))
}

/// [`advance_secure`] for calibration `stage`'s shard sessions: a shard's decoded sum is
/// added to the stage's; once no shard runs, the total completes the stage (stored as a
/// plain stage's would be, without any device's statistics); a failed shard is run again
/// as a new session with its members that are still active.
fn advance_stage_sessions(
    store: &mut Store,
    rt: &mut StudyRuntime,
    stage: DetectionStage,
    now_ms: i64,
    deadline_passed: bool,
) -> Result<bool> {
    let i = stage.index();
    let min_quorum = rt.config.min_quorum as usize;
    let mut changed = false;
    let mut k = 0;
    while k < rt.stage_secure[i].running.len() {
        let session = &mut rt.stage_secure[i].running[k];
        let number = session.task().session;
        let due = deadline_passed && now_ms > session.deadline_ms();
        match session.advance(now_ms, due, min_quorum) {
            Advance::None => k += 1,
            Advance::Next => {
                changed = true;
                k += 1;
            }
            Advance::Finish(job) => {
                rt.finish_jobs.push(job);
                changed = true;
                k += 1;
            }
            Advance::Done { sum, included } => {
                let (n, total, groups) = decode_stage(stage, &session.task().group_levels, &sum);
                let secure = &mut rt.stage_secure[i];
                secure.running.remove(k);
                let summed = secure
                    .summed
                    .get_or_insert_with(|| (0, DetectionStats::zero(stage), BTreeMap::new()));
                summed.0 += n;
                summed.1.add(&total);
                for (level, (gn, gs)) in groups {
                    let entry = summed
                        .2
                        .entry(level)
                        .or_insert_with(|| (0, DetectionStats::zero(stage)));
                    entry.0 += gn;
                    entry.1.add(&gs);
                }
                secure.ended.insert(
                    number,
                    EndedSum {
                        id: number,
                        included,
                        reason: format!(
                            "{} session {number} summed {n} devices' statistics",
                            stage.as_str()
                        ),
                    },
                );
                changed = true;
            }
            Advance::Failed(why) => {
                tracing::warn!(study = %rt.config.study_id, stage = stage.as_str(), session = number, reason = %why, "secure calibration session failed; its shard runs again");
                let failed = rt.stage_secure[i].running.remove(k);
                rt.stage_secure[i].ended.insert(
                    number,
                    EndedSum {
                        id: number,
                        included: BTreeSet::new(),
                        reason: format!(
                            "{} session {number} failed and its devices are summed again in a new one: {why}",
                            stage.as_str()
                        ),
                    },
                );
                refresh_revocations(store, rt)?;
                let members: Vec<u64> = failed
                    .task()
                    .members
                    .iter()
                    .copied()
                    .filter(|id| rt.devices.get(id).is_some_and(|d| !d.revoked))
                    .collect();
                let phase = rt
                    .config
                    .secure_aggregation
                    .map_or(0, |sa| sa.phase_deadline_ms as i64);
                if let Err(e) =
                    rt.stage_secure[i].open_session(&rt.config, stage, members, now_ms + phase)
                {
                    // Too few devices left in the shard: the stage goes on without it.
                    tracing::warn!(study = %rt.config.study_id, stage = stage.as_str(), error = %e, "a failed shard cannot run again");
                }
                changed = true;
            }
        }
    }
    let secure = &mut rt.stage_secure[i];
    if secure.running.is_empty()
        && let Some((n_devices, sum, group_sums)) = secure.summed.take()
    {
        let completed = CompletedStage {
            completed_ms: now_ms,
            n_devices,
            sum,
            group_sums,
        };
        store.complete_stage(&rt.config.study_id, &completed)?;
        rt.detection_complete[i] = true;
        tracing::info!(study = %rt.config.study_id, stage = stage.as_str(), devices = n_devices, "calibration stage complete (secure sums)");
        changed = true;
    }
    Ok(changed)
}

/// Gives `device`'s `message` (if any) to `session` ([`SecureRound::receive`]): `Some`
/// when the device's part is over (the message came too late); a refusal names the field.
fn take_message(
    session: &mut SecureRound,
    device: u64,
    message: Option<DeviceMessage>,
) -> Result<Option<SecureNext>> {
    let Some(message) = message else {
        return Ok(None);
    };
    let field = secure_field(&message);
    session
        .receive(device, message)
        .map_err(|e| secagg_refusal(field, e))
}

/// The `SecureStep` field a message came in, for refusals.
fn secure_field(message: &DeviceMessage) -> &'static str {
    match message {
        DeviceMessage::Keys(_) => "keys",
        DeviceMessage::ShareKeys(_) => "share_keys",
        DeviceMessage::Masked(_) => "masked_input",
        DeviceMessage::Unmasking(_) => "unmasking",
    }
}

/// A protocol refusal of a device's message in `field`.
fn secagg_refusal(field: &str, e: crate::secagg::SecAggError) -> AggregatorError {
    use crate::secagg::SecAggError as E;
    match e {
        E::WrongPhase { .. } | E::TooFewDevices { .. } => {
            AggregatorError::FailedPrecondition(format!("{field}: {e}"))
        }
        other => AggregatorError::invalid(field, other.to_string()),
    }
}

/// The answer to a device asking about secure round `round_id` after it closed or failed.
fn finished_for(rt: &StudyRuntime, round_id: u64, device_id: u64) -> SecureNext {
    EndedSum::answer(rt.last_secure.as_ref(), round_id, device_id, || {
        format!("round {round_id} is over")
    })
}

/// Closes the open secure round's phase when it is complete (or, with `deadline_passed`,
/// with whoever answered); after the last phase publishes the decoded FedAvg result and
/// opens the next round; a failed round is run again. Returns whether anything changed.
fn advance_secure(
    store: &mut Store,
    rt: &mut StudyRuntime,
    now_ms: i64,
    deadline_passed: bool,
) -> Result<bool> {
    let min_quorum = rt.config.min_quorum as usize;
    // DP-FedAvg's fixed denominator, as in `close_private_round`.
    let expected = (rt.config.fraction_per_round * rt.active_devices() as f64).max(1.0);
    let Some(open) = rt.open.as_mut() else {
        return Ok(false);
    };
    let round_id = open.round_id;
    let Some(secure) = open.secure.as_mut() else {
        return Ok(false);
    };
    match secure.advance(now_ms, deadline_passed, min_quorum) {
        Advance::None => Ok(false),
        Advance::Next => Ok(true),
        Advance::Finish(job) => {
            rt.finish_jobs.push(job);
            Ok(true)
        }
        Advance::Done { sum, included } => {
            let (params, contributions) = if rt.config.dp.is_some() {
                decode_private_slots(&secure.task().slots, &sum, &rt.latest.params, expected)
            } else {
                decode_slots(&secure.task().slots, &sum)
            };
            // A signal no device trained keeps its parameters, as in FedAvg in clear.
            let params = rt
                .latest
                .params
                .iter()
                .map(|current| {
                    params
                        .iter()
                        .find(|p| p.signal == current.signal)
                        .cloned()
                        .unwrap_or_else(|| current.clone())
                })
                .collect();
            // A secure round stores no individual update: nothing to count.
            if publish(store, rt, params, contributions, Vec::new(), 0, now_ms)? != Closing::Closed
            {
                reload_runtime(store, rt)?;
                return Ok(true);
            }
            let reason = format!(
                "round {round_id} closed: the sum of {} devices' inputs made prior version {}",
                included.len(),
                rt.latest.version
            );
            rt.last_secure = Some(EndedSum {
                id: round_id,
                included,
                reason,
            });
            open_next(store, rt, now_ms, None)?;
            Ok(true)
        }
        Advance::Failed(why) => {
            tracing::warn!(study = %rt.config.study_id, round_id, reason = %why, "secure round failed; running it again");
            let previous = rt.open.take();
            if let Err(e) = open_next(store, rt, now_ms, Some(round_id)) {
                rt.open = previous;
                return Err(e);
            }
            rt.last_secure = Some(EndedSum {
                id: round_id,
                included: BTreeSet::new(),
                reason: format!("round {round_id} failed and is run again: {why}"),
            });
            Ok(true)
        }
    }
}

/// [`close_round`] under differential privacy (DP-FedAvg, `crate::privacy`): each device's
/// change over every signal is one vector, clipped to `C`; the noised sum over `q × N`
/// is added to the current prior. Contributions are counted as usual.
fn close_private_round(
    store: &mut Store,
    rt: &mut StudyRuntime,
    dp: &crate::privacy::DpSettings,
    now_ms: i64,
) -> Result<Closing> {
    let open = rt.open.as_ref().expect("close_round needs an open round");
    // The concatenated layout: every signal's coordinates in the prior's order.
    let offsets: Vec<(usize, &SignalParams)> = rt
        .latest
        .params
        .iter()
        .scan(0, |at, p| {
            let start = *at;
            *at += p.values.len();
            Some((start, p))
        })
        .collect();
    let dim: usize = rt.latest.params.iter().map(|p| p.values.len()).sum();
    let deltas: Vec<Vec<f64>> = open
        .submissions
        .values()
        .map(|ups| {
            let mut d = vec![0.0; dim];
            for u in ups {
                if let Some(&(start, current)) = offsets.iter().find(|(_, p)| p.signal == u.signal)
                {
                    for (j, (v, c)) in u.values.iter().zip(&current.values).enumerate() {
                        d[start + j] = v - c;
                    }
                }
            }
            d
        })
        .collect();
    let expected = (rt.config.fraction_per_round * rt.active_devices() as f64).max(1.0);
    let step = crate::privacy::noised_mean(&deltas, dim, dp, expected, &mut rand::rng());
    let mut params = Vec::with_capacity(offsets.len());
    let mut contributions = Vec::new();
    for &(start, current) in &offsets {
        params.push(SignalParams {
            signal: current.signal.clone(),
            values: current
                .values
                .iter()
                .enumerate()
                .map(|(j, c)| c + step[start + j])
                .collect(),
        });
        let entries: Vec<&SignalUpdate> = open
            .submissions
            .values()
            .flat_map(|ups| ups.iter().filter(|u| u.signal == current.signal))
            .collect();
        contributions.extend(contribution(&current.signal, &entries));
    }
    let aggregated = open.submissions.len();
    publish(
        store,
        rt,
        params,
        contributions,
        Vec::new(),
        aggregated,
        now_ms,
    )
}

/// What one signal's accepted submissions contributed to a round: devices, summed day
/// counts (the FedAvg weights) and the day-weighted mean local loss; `None` without any.
/// Day counts are at least 1 (`validate_updates`), so the mean is defined.
fn contribution(signal: &str, entries: &[&SignalUpdate]) -> Option<Contribution> {
    if entries.is_empty() {
        return None;
    }
    let n_days: u64 = entries.iter().map(|u| u64::from(u.n_days)).sum();
    let loss = entries
        .iter()
        .map(|u| u.local_loss * f64::from(u.n_days))
        .sum::<f64>()
        / n_days as f64;
    Some(Contribution {
        signal: signal.to_owned(),
        n_devices: entries.len() as u32,
        n_days,
        mean_local_loss: loss,
    })
}

/// Publishes the open round's result as the next prior version (closing the round and
/// storing the prior in one transaction), then moves memory on: the new latest prior, one
/// more round completed, no round open.
fn publish(
    store: &mut Store,
    rt: &mut StudyRuntime,
    params: Vec<SignalParams>,
    contributions: Vec<Contribution>,
    sensor_terms: Vec<SensorTerms>,
    aggregated: usize,
    now_ms: i64,
) -> Result<Closing> {
    let open = rt.open.as_ref().expect("publish needs an open round");
    let prior = PriorVersion {
        version: rt.latest.version + 1,
        round_id: open.round_id,
        params,
        contributions,
        created_unix_ms: now_ms,
        sensor_terms,
    };
    let closing = store.close_round(
        &rt.config.study_id,
        open.round_id,
        &prior,
        aggregated,
        now_ms,
    )?;
    if closing != Closing::Closed {
        return Ok(closing);
    }
    tracing::info!(
        study = %rt.config.study_id,
        round_id = open.round_id,
        version = prior.version,
        devices = contributions_devices(&prior.contributions),
        epsilon = rt.config.epsilon_spent(rt.rounds_completed + 1),
        "round closed; prior published"
    );
    rt.latest = prior;
    rt.rounds_completed += 1;
    rt.open = None;
    if shared(store) {
        rt.stamp = None;
    }
    Ok(Closing::Closed)
}

/// Most devices behind any signal of a round (for the log).
fn contributions_devices(contributions: &[Contribution]) -> u32 {
    contributions.iter().map(|c| c.n_devices).max().unwrap_or(0)
}

/// A declared sensor model or group level: `None` when empty and the study asks for none;
/// refused when the study asks for one and it is missing or not in `allowed`, or when the
/// study asks for none and one is sent.
fn check_declared(
    field: &str,
    value: &str,
    allowed: Option<&[String]>,
    what: &str,
) -> Result<Option<String>> {
    match (value.is_empty(), allowed) {
        (true, None) => Ok(None),
        (false, None) => Err(AggregatorError::invalid(
            field,
            format!("`{value}`: the study collects no {what}; leave it empty"),
        )),
        (true, Some(list)) => Err(AggregatorError::invalid(
            field,
            format!("missing; the study's {what} are {}", list.join(", ")),
        )),
        (false, Some(list)) if list.iter().any(|v| v == value) => Ok(Some(value.to_owned())),
        (false, Some(list)) => Err(AggregatorError::invalid(
            field,
            format!(
                "`{value}` is not one of the study's {what} ({})",
                list.join(", ")
            ),
        )),
    }
}

/// Seeded random choice of `max(quorum, ceil(fraction × n))` devices; under differential
/// privacy, Poisson sampling instead: each device independently with probability
/// `fraction_per_round`, from the operating system's randomness (`crate::privacy`).
fn select_members(config: &StudyConfig, enrolled: Vec<u64>, round_id: u64) -> Vec<u64> {
    if config.dp.is_some() {
        let mut rng = rand::rng();
        return enrolled
            .into_iter()
            .filter(|_| rand::Rng::random_bool(&mut rng, config.fraction_per_round))
            .collect();
    }
    let n = enrolled.len();
    let wanted = ((config.fraction_per_round * n as f64).ceil() as usize)
        .max(config.min_quorum as usize)
        .min(n);
    let mut rng = ChaCha8Rng::seed_from_u64(
        config.selection_seed ^ round_id.wrapping_mul(0x9E37_79B9_7F4A_7C15),
    );
    let mut chosen: Vec<u64> = rand::seq::index::sample(&mut rng, n, wanted)
        .into_iter()
        .map(|i| enrolled[i])
        .collect();
    chosen.sort_unstable();
    chosen
}

/// Closes the open round with every stored submission and publishes the result. On a
/// shared store the submissions are re-read first (other processes take them too); if
/// another process stored one meanwhile the prior is computed again, and if another process
/// closed the round first this one re-reads the study instead. Returns whether this process
/// closed it.
fn close_round(store: &mut Store, rt: &mut StudyRuntime, now_ms: i64) -> Result<bool> {
    for _ in 0..8 {
        if shared(store) {
            refresh_submissions(store, rt)?;
        }
        match close_round_once(store, rt, now_ms)? {
            Closing::Closed => return Ok(true),
            Closing::NotOpen => {
                tracing::info!(study = %rt.config.study_id, "another aggregator process ended the round");
                reload_runtime(store, rt)?;
                return Ok(false);
            }
            Closing::Stale => continue,
        }
    }
    Err(AggregatorError::Superseded(format!(
        "study {}: submissions kept arriving through other aggregator processes while closing",
        rt.config.study_id
    )))
}

/// FedAvg per signal over the open round's submissions; publishes the result.
fn close_round_once(store: &mut Store, rt: &mut StudyRuntime, now_ms: i64) -> Result<Closing> {
    let open = rt.open.as_ref().expect("close_round needs an open round");
    if let Some(dp) = rt.config.dp {
        return close_private_round(store, rt, &dp, now_ms);
    }
    let mut params = Vec::with_capacity(rt.latest.params.len());
    let mut contributions = Vec::new();
    let mut sensor_terms = Vec::new();
    for current in &rt.latest.params {
        let entries: Vec<(u64, &SignalUpdate)> = open
            .submissions
            .iter()
            .flat_map(|(&id, ups)| {
                ups.iter()
                    .filter(|u| u.signal == current.signal)
                    .map(move |u| (id, u))
            })
            .collect();
        let device = |id: u64| rt.devices.get(&id);
        let inputs: Vec<UpdateInput<'_>> = entries
            .iter()
            .map(|&(id, u)| UpdateInput {
                values: &u.values,
                n_days: u.n_days,
                loss: u.local_loss,
                group: device(id).and_then(|d| d.group.as_deref()),
            })
            .collect();
        let combined = rt.config.aggregation.combine(
            &current.values,
            &inputs,
            rt.config.training.learning_rate,
        );
        let pooled = combined.as_ref().unwrap_or(&current.values);
        // Sensor models with enough enrolled devices keep terms of their own.
        let coords = rt.config.sensor_coordinates(&current.signal);
        if let Some(sm) = &rt.config.sensor_models {
            for model in &sm.models {
                let of_model = |d: &Device| d.sensor_model.as_deref() == Some(model.as_str());
                let enrolled = rt
                    .devices
                    .values()
                    .filter(|d| !d.revoked && of_model(d) && d.signals.contains(&current.signal))
                    .count();
                if enrolled < sm.min_devices as usize {
                    continue;
                }
                let model_updates: Vec<(&[f64], u32)> = entries
                    .iter()
                    .filter(|(id, _)| device(*id).is_some_and(of_model))
                    .map(|(_, u)| (u.values.as_slice(), u.n_days))
                    .collect();
                let previous = rt
                    .latest
                    .sensor_terms
                    .iter()
                    .find(|t| &t.sensor_model == model && t.signal == current.signal)
                    .map_or(&current.values, |t| &t.values);
                sensor_terms.push(SensorTerms {
                    sensor_model: model.clone(),
                    signal: current.signal.clone(),
                    values: crate::aggregate::sensor_terms(
                        pooled,
                        &coords,
                        &model_updates,
                        previous,
                    ),
                    n_devices: model_updates.len() as u32,
                });
            }
        }
        let entries: Vec<&SignalUpdate> = entries.into_iter().map(|(_, u)| u).collect();
        match combined {
            Some(values) => {
                contributions.extend(contribution(&current.signal, &entries));
                params.push(SignalParams {
                    signal: current.signal.clone(),
                    values,
                });
            }
            None => params.push(current.clone()),
        }
    }
    let aggregated = open.submissions.len();
    publish(
        store,
        rt,
        params,
        contributions,
        sensor_terms,
        aggregated,
        now_ms,
    )
}
