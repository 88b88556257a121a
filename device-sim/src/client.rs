//! A device's side of the federated protocol: enrol, fetch tasks, train
//! locally, submit, then compute the personalised posterior and write it to
//! the device's output folder.
//!
//! Privacy: what leaves the device is exactly the `plimsoll.v1` requests —
//! the participant's pseudonymous label, the names of its signals, the
//! participant's consent choice about sharing flags, and per round and
//! signal a parameter vector, a day count and a scalar loss. After training,
//! for the detector's calibration ([`calibrate_detection`]): sums of same-day
//! residual cross-products and pair counts (6×6), then episode counts on a
//! fixed 150-threshold grid with the number of scored days; never a daily
//! value or a score. With consent, and only then, one flag packet per episode
//! at or above the study's review level (see [`crate::packets`] for exactly
//! what it holds), sent through a [`FlagSender`].
//!
//! Identity: the device enrols with the study's enrollment code and a
//! 256-bit secret it draws itself ([`new_device_secret`]); every later call
//! carries that credential ([`DeviceCredential`]) in its metadata.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, anyhow};
use chrono::NaiveDate;
use plimsoll_proto::auth::DeviceCredential;
pub use plimsoll_proto::auth::authorized;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use rand::{RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tokio::sync::Semaphore;
use tonic::transport::Channel;

use crate::cohort::ParticipantSeries;
use crate::detect::DetectConfig;
use crate::detect::calibration::{
    StudyCalibration, cohort_correlation, device_histogram, device_moments,
};
use crate::detect::joint::TargetPattern;
use crate::device_report::detect_and_write;
use crate::flags::FlagLevel;
use crate::packets::build_packet;
use crate::personal::{DayBand, posterior_bands, standardised, write_posterior_csv};
use crate::prior::PriorParams;
use crate::retry::{Backoff, retry};
use crate::signal::Signal;
use crate::training::{LocalSeries, LocalUpdate, train_local};
use crate::wire;

/// Fewest observed days of a signal for the device to take part in its prior.
pub const MIN_DAYS_TO_ENROLL: usize = 7;

/// How a device runs.
#[derive(Debug, Clone)]
pub struct DeviceOptions {
    pub study_id: String,
    /// The study's enrollment code, as handed out by the study team.
    pub enrollment_code: String,
    /// Folder the device writes its outputs into (created if missing).
    pub out_dir: PathBuf,
    /// Long-poll length for FetchTask, milliseconds.
    pub wait_ms: u32,
    /// Seed of the device's window sampling.
    pub seed: u64,
    /// The device's secret from an earlier run (enrolling again with it is
    /// a retry that returns the same device id); `None` draws a new one.
    pub device_secret: Option<String>,
    /// The device's sensor model, declared at enrolment when the study lists models.
    pub sensor_model: Option<String>,
    /// The participant's level of the study's group column, declared at enrolment.
    pub group_label: Option<String>,
}

/// The participant's choice, recorded at enrolment, about sharing flag
/// packets with the study's clinical reviewers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum FlagSharing {
    /// Nothing about flags leaves the device (the default).
    #[default]
    Withheld,
    /// One packet per episode (at or above the study's review level) may be
    /// sent to the aggregator.
    Consented,
}

impl FlagSharing {
    pub fn consented(self) -> bool {
        self == FlagSharing::Consented
    }
}

/// A new device secret: 32 bytes from the thread-local CSPRNG (ChaCha12
/// seeded by the operating system), as 64 lower-case hex characters.
pub fn new_device_secret() -> String {
    let mut bytes = [0u8; 32];
    rand::rng().fill_bytes(&mut bytes);
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// What a device enrols with.
#[derive(Clone)]
pub struct EnrollmentRequest<'a> {
    pub study_id: &'a str,
    /// The study's enrollment code.
    pub enrollment_code: &'a str,
    /// Pseudonymous participant label.
    pub participant: &'a str,
    /// Signal column names the device contributes.
    pub signals: Vec<String>,
    pub sharing: FlagSharing,
    /// The device's secret ([`new_device_secret`]); the same secret makes a
    /// repeated enrolment a retry.
    pub device_secret: &'a str,
    /// The device's sensor model, when the study lists models (empty otherwise).
    pub sensor_model: &'a str,
    /// The participant's level of the study's group column (empty when it has none).
    pub group_label: &'a str,
}

impl std::fmt::Debug for EnrollmentRequest<'_> {
    // The code and the secret never reach a log.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("EnrollmentRequest")
            .field("study_id", &self.study_id)
            .field("participant", &self.participant)
            .field("signals", &self.signals)
            .field("sharing", &self.sharing)
            .field("sensor_model", &self.sensor_model)
            .field("group_label", &self.group_label)
            .finish_non_exhaustive()
    }
}

/// Enrols a participant's device; returns its credential. Retried on
/// transient failures: the secret makes a retry after a lost answer return
/// the same device id.
pub async fn enroll(
    client: &mut AggregatorClient<Channel>,
    e: EnrollmentRequest<'_>,
) -> anyhow::Result<DeviceCredential> {
    let request = pb::EnrollRequest {
        study_id: e.study_id.to_owned(),
        participant_label: e.participant.to_owned(),
        signals: e.signals,
        consent_share_flags: e.sharing.consented(),
        enrollment_code: e.enrollment_code.to_owned(),
        device_secret: e.device_secret.to_owned(),
        sensor_model: e.sensor_model.to_owned(),
        group_label: e.group_label.to_owned(),
    };
    let device_id = retry(&Backoff::default(), seed_of(e.participant), || {
        let mut c = client.clone();
        let r = request.clone();
        async move { c.enroll(r).await }
    })
    .await
    .with_context(|| format!("Enroll for participant {}", e.participant))?
    .into_inner()
    .device_id;
    Ok(DeviceCredential {
        device_id,
        secret: e.device_secret.to_owned(),
    })
}

/// Sends flag packets for one enrolled device. It exists only for a device
/// whose participant consented ([`FlagSender::new`] returns `None`
/// otherwise), so code that has no sender cannot send a packet.
#[derive(Debug, Clone)]
pub struct FlagSender {
    client: AggregatorClient<Channel>,
    study_id: String,
    credential: DeviceCredential,
}

impl FlagSender {
    /// A sender for the device of `credential`, or `None` when the
    /// participant's recorded choice is [`FlagSharing::Withheld`].
    pub fn new(
        channel: Channel,
        study_id: &str,
        credential: DeviceCredential,
        sharing: FlagSharing,
    ) -> Option<FlagSender> {
        sharing.consented().then(|| FlagSender {
            client: AggregatorClient::new(channel),
            study_id: study_id.to_owned(),
            credential,
        })
    }

    /// Sends one packet; returns the aggregator's id for its episode.
    /// Resending the same packet, or a newer version of the same episode
    /// (same key), returns the same id.
    pub async fn send(&mut self, packet: &crate::packets::FlagPacket) -> anyhow::Result<u64> {
        crate::packets::check(packet)?;
        let device_id = self.credential.device_id;
        let request = authorized(
            &self.credential,
            pb::SubmitFlagPacketRequest {
                study_id: self.study_id.clone(),
                device_id,
                packet: Some(crate::packets::to_pb(packet)),
            },
        );
        let response = self
            .client
            .submit_flag_packet(request)
            .await
            .with_context(|| {
                format!(
                    "SubmitFlagPacket for device {device_id} (episode {})",
                    packet.flag.key
                )
            })?;
        Ok(response.into_inner().packet_id)
    }
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
    /// Episodes flagged on the device (along the study's pattern, all
    /// levels; episodes in the opposite direction are recorded only).
    pub flags: usize,
    /// Of those, Alerts.
    pub alerts: usize,
    /// Flag packets (one per episode) sent to reviewers (0 without consent).
    pub packets_sent: usize,
    /// The study's detector calibration as this device computed it from the published
    /// sums (also written as `calibration.json` in the device's folder).
    pub calibration: StudyCalibration,
}

/// File in the device's output folder holding its [`StudyCalibration`] (JSON).
pub const CALIBRATION_FILE: &str = "calibration.json";

/// The detector's federated calibration, run by a device after training (the
/// `SubmitDetectionStats` / `GetDetectionCalibration` protocol):
///
/// 1. scores its own days against the final `priors` with independent signals and sends
///    the residual moments (sums of cross-products and pair counts);
/// 2. waits for the stage to complete and takes the cohort's correlation from the summed
///    moments ([`cohort_correlation`]);
/// 3. scores again with it and sends its episode histogram (episode counts per grid
///    threshold and scored days);
/// 4. waits, and sets the Alert and Watch thresholds from the summed histogram at the
///    study's false-alarm budget (`Study.alert_budget_per_participant_month`).
///
/// Scoring runs on the blocking pool under a `cpu` permit. Every call carries the device's
/// credential; submissions are retried on transient failures (a repeat replaces the same
/// submission). Long-polls for `wait_ms` per call until a stage completes.
///
/// # Errors
/// A refused call, a detection error, or sums of the wrong shape.
pub async fn calibrate_detection(
    channel: Channel,
    credential: &DeviceCredential,
    study_id: &str,
    series: Arc<ParticipantSeries>,
    priors: Arc<Vec<PriorParams>>,
    wait_ms: u32,
    cpu: Arc<Semaphore>,
) -> anyhow::Result<StudyCalibration> {
    use pb::detection_calibration::Sum;
    use pb::submit_detection_stats_request::Stats;
    let mut client = AggregatorClient::new(channel);
    let device_id = credential.device_id;
    let seed = seed_of(&series.participant) ^ 0xca1b;
    let study = retry(&Backoff::default(), seed, || {
        let mut c = client.clone();
        let r = pb::GetStudyRequest {
            study_id: study_id.to_owned(),
        };
        async move { c.get_study(r).await }
    })
    .await
    .with_context(|| format!("GetStudy `{study_id}`"))?
    .into_inner();
    let budget = study.alert_budget_per_participant_month;
    if !(budget.is_finite() && budget > 0.0) {
        return Err(anyhow!(
            "study `{study_id}` states no usable false-alarm budget ({budget})"
        ));
    }
    let mut cfg = DetectConfig::default();
    if !study.alert_direction.is_empty() {
        cfg.pattern = TargetPattern::from_weights(&study.alert_direction)
            .map_err(|e| anyhow!("GetStudy `{study_id}`: alert_direction: {e}"))?;
    }
    let pattern = cfg.pattern;

    let moments = {
        let (series, priors, cfg) = (series.clone(), priors.clone(), cfg.clone());
        let permit = cpu.clone().acquire_owned().await?;
        tokio::task::spawn_blocking(move || {
            let _permit = permit;
            device_moments(&series, &priors, &cfg)
        })
        .await??
    };
    contribute(
        &mut client,
        credential,
        study_id,
        study.secure_aggregation,
        Stats::ResidualMoments(wire::moments_to_pb(&moments)),
        seed,
    )
    .await?;
    let published = await_stage(
        &mut client,
        credential,
        study_id,
        pb::DetectionStage::ResidualMoments,
        wait_ms,
    )
    .await?;
    let moment_devices = published.devices_submitted;
    let Some(Sum::ResidualMoments(sum)) = published.sum else {
        return Err(anyhow!(
            "GetDetectionCalibration for device {device_id}: the complete residual_moments stage carries no moment sums"
        ));
    };
    let summed = wire::moments_from_pb("residual_moments", &sum)?;
    let correlation = cohort_correlation(&summed);

    let histogram = {
        let (series, priors, cfg, corr) =
            (series.clone(), priors.clone(), cfg, correlation.clone());
        let permit = cpu.clone().acquire_owned().await?;
        tokio::task::spawn_blocking(move || {
            let _permit = permit;
            device_histogram(&series, &priors, &corr, &cfg)
        })
        .await??
    };
    contribute(
        &mut client,
        credential,
        study_id,
        study.secure_aggregation,
        Stats::EpisodeHistogram(wire::histogram_to_pb(&histogram)),
        seed ^ 1,
    )
    .await?;
    let published = await_stage(
        &mut client,
        credential,
        study_id,
        pb::DetectionStage::EpisodeHistogram,
        wait_ms,
    )
    .await?;
    let Some(Sum::EpisodeHistogram(sum)) = published.sum else {
        return Err(anyhow!(
            "GetDetectionCalibration for device {device_id}: the complete episode_histogram stage carries no histogram"
        ));
    };
    let summed = wire::histogram_from_pb("episode_histogram", &sum)?;
    // Under per-group calibration the sum is over this device's group only.
    let (histogram_devices, histogram_group) = if published.group_label.is_empty() {
        (published.devices_submitted, None)
    } else {
        (published.group_devices, Some(published.group_label))
    };
    let mut calibration = StudyCalibration::new(
        correlation,
        summed,
        budget,
        moment_devices,
        histogram_devices,
    )
    .in_direction(pattern);
    calibration.histogram_group = histogram_group;
    Ok(calibration)
}

/// Sends one stage's statistics: through the stage's secure sum in a study with secure
/// aggregation, with `SubmitDetectionStats` otherwise.
async fn contribute(
    client: &mut AggregatorClient<Channel>,
    credential: &DeviceCredential,
    study_id: &str,
    secure: bool,
    stats: pb::submit_detection_stats_request::Stats,
    seed: u64,
) -> anyhow::Result<()> {
    if !secure {
        submit_stats(client, credential, study_id, stats, seed).await?;
        return Ok(());
    }
    let stats = plimsoll_server::wire::detection_stats_from_pb(Some(stats))?;
    crate::secure::secure_stage_submit(
        client,
        credential,
        study_id,
        &stats,
        &Backoff::default(),
        seed,
    )
    .await?;
    Ok(())
}

/// Sends one stage's statistics, retried on transient failures.
async fn submit_stats(
    client: &mut AggregatorClient<Channel>,
    credential: &DeviceCredential,
    study_id: &str,
    stats: pb::submit_detection_stats_request::Stats,
    seed: u64,
) -> anyhow::Result<pb::SubmitDetectionStatsResponse> {
    let request = pb::SubmitDetectionStatsRequest {
        study_id: study_id.to_owned(),
        device_id: credential.device_id,
        stats: Some(stats),
    };
    Ok(retry(&Backoff::default(), seed, || {
        let mut c = client.clone();
        let r = authorized(credential, request.clone());
        async move { c.submit_detection_stats(r).await }
    })
    .await
    .with_context(|| format!("SubmitDetectionStats for device {}", credential.device_id))?
    .into_inner())
}

/// Long-polls `GetDetectionCalibration` until `stage` is complete.
async fn await_stage(
    client: &mut AggregatorClient<Channel>,
    credential: &DeviceCredential,
    study_id: &str,
    stage: pb::DetectionStage,
    wait_ms: u32,
) -> anyhow::Result<pb::DetectionCalibration> {
    let request = pb::GetDetectionCalibrationRequest {
        study_id: study_id.to_owned(),
        device_id: credential.device_id,
        stage: stage as i32,
        wait_ms,
    };
    loop {
        let view = retry(&Backoff::default(), credential.device_id, || {
            let mut c = client.clone();
            let r = authorized(credential, request.clone());
            async move { c.get_detection_calibration(r).await }
        })
        .await
        .with_context(|| {
            format!(
                "GetDetectionCalibration ({}) for device {}",
                stage.as_str_name(),
                credential.device_id
            )
        })?
        .into_inner();
        if view.complete {
            return Ok(view);
        }
        if wait_ms == 0 {
            tokio::time::sleep(Duration::from_millis(250)).await;
        }
    }
}

/// Runs one device to the end of the study, enrolled without consent to
/// share flags. CPU-heavy work runs on the blocking pool, at most
/// `cpu.available_permits()` at a time.
pub async fn run_device(
    channel: Channel,
    series: ParticipantSeries,
    opts: DeviceOptions,
    cpu: Arc<Semaphore>,
) -> anyhow::Result<DeviceReport> {
    run_device_with(channel, series, opts, FlagSharing::Withheld, cpu).await
}

/// [`run_device`] with the participant's flag-sharing choice recorded at
/// enrolment. (Sending packets is separate: see [`FlagSender`].)
pub async fn run_device_with(
    channel: Channel,
    series: ParticipantSeries,
    opts: DeviceOptions,
    sharing: FlagSharing,
    cpu: Arc<Semaphore>,
) -> anyhow::Result<DeviceReport> {
    let participant = series.participant.clone();
    let mut client = AggregatorClient::new(channel.clone());
    if series.dates.is_empty() {
        return Err(anyhow!("participant {participant} has no days"));
    }
    let local = local_training_series(&series);
    if local.is_empty() {
        return Err(anyhow!(
            "participant {participant} has no signal with {MIN_DAYS_TO_ENROLL} observed days"
        ));
    }
    let secret = opts.device_secret.clone().unwrap_or_else(new_device_secret);
    let credential = enroll(
        &mut client,
        EnrollmentRequest {
            study_id: &opts.study_id,
            enrollment_code: &opts.enrollment_code,
            participant: &participant,
            signals: local.iter().map(|(s, _)| s.column().to_owned()).collect(),
            sharing,
            device_secret: &secret,
            sensor_model: opts.sensor_model.as_deref().unwrap_or_default(),
            group_label: opts.group_label.as_deref().unwrap_or_default(),
        },
    )
    .await?;
    let device_id = credential.device_id;
    let local = Arc::new(local);
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let backoff = Backoff::default();
    let mut rounds_trained = 0;
    let prior_version = loop {
        let request = pb::FetchTaskRequest {
            study_id: opts.study_id.clone(),
            device_id,
            wait_ms: opts.wait_ms,
        };
        let response = retry(&backoff, opts.seed ^ 0xfe7c, || {
            let mut c = client.clone();
            let r = authorized(&credential, request.clone());
            async move { c.fetch_task(r).await }
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
                train_and_submit(
                    &client,
                    &credential,
                    &opts.study_id,
                    task,
                    local.clone(),
                    &cpu,
                    seed,
                    &backoff,
                )
                .await
                .with_context(|| format!("device {device_id}, round {round_id}"))?;
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
    let request = pb::GetPriorRequest {
        study_id: opts.study_id.clone(),
        version: prior_version,
    };
    let prior = retry(&backoff, opts.seed ^ 0x9e1, || {
        let mut c = client.clone();
        let r = authorized(&credential, request.clone());
        async move { c.get_prior(r).await }
    })
    .await
    .context("GetPrior")?
    .into_inner();
    let priors = Arc::new(wire::prior_from_pb(&prior).context("published prior")?);
    let series = Arc::new(series);
    let calibration = calibrate_detection(
        channel.clone(),
        &credential,
        &opts.study_id,
        series.clone(),
        priors.clone(),
        opts.wait_ms,
        cpu.clone(),
    )
    .await?;
    std::fs::create_dir_all(&opts.out_dir)
        .with_context(|| format!("creating {}", opts.out_dir.display()))?;
    let calibration_path = opts.out_dir.join(CALIBRATION_FILE);
    std::fs::write(
        &calibration_path,
        serde_json::to_string_pretty(&calibration)? + "\n",
    )
    .with_context(|| format!("writing {}", calibration_path.display()))?;
    let summary = data_summary(&opts.study_id, device_id, &series, &local);
    let permit = cpu.clone().acquire_owned().await?;
    let out_dir = opts.out_dir.clone();
    let packet_priors = priors.clone();
    let study_calibration = calibration.clone();
    let (bands, posterior_csv, detection) =
        tokio::task::spawn_blocking(move || -> anyhow::Result<_> {
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
            let detection = detect_and_write(&out_dir, &series, &priors, &study_calibration)?;
            Ok((bands, path, detection))
        })
        .await??;
    // Every device reports its data completeness (counts and dates, no value) for the
    // study's lead; `data_summary` is the only place that fills the message.
    let request = authorized(&credential, summary);
    client
        .submit_data_summary(request)
        .await
        .with_context(|| format!("SubmitDataSummary for device {device_id}"))?;
    // With consent, one packet per episode at or above the study's review
    // level goes to the reviewers (sent again under the same key when a
    // later run finds it grown); without it `FlagSender::new` gives no
    // sender and nothing leaves the device.
    let mut packets_sent = 0;
    if let Some(mut sender) = FlagSender::new(channel, &opts.study_id, credential, sharing) {
        let review_level = study_review_level(&mut client, &opts.study_id).await?;
        for flag in detection.for_review(review_level) {
            let packet = build_packet(flag, &detection.rows, &packet_priors)?;
            sender.send(&packet).await?;
            packets_sent += 1;
        }
    }
    Ok(DeviceReport {
        participant,
        device_id,
        rounds_trained,
        prior_version,
        bands,
        posterior_csv,
        flags: detection.episodes.iter().filter(|e| e.alerted()).count(),
        alerts: detection.for_review(FlagLevel::Alert).count(),
        packets_sent,
        calibration,
    })
}

/// The study's lowest level sent for review, from `GetStudy`.
pub async fn study_review_level(
    client: &mut AggregatorClient<Channel>,
    study_id: &str,
) -> anyhow::Result<FlagLevel> {
    let request = pb::GetStudyRequest {
        study_id: study_id.to_owned(),
    };
    let study = retry(&Backoff::default(), seed_of(study_id), || {
        let mut c = client.clone();
        let r = request.clone();
        async move { c.get_study(r).await }
    })
    .await
    .with_context(|| format!("GetStudy for study {study_id}"))?
    .into_inner();
    wire::review_level_from_pb(study.review_level)
        .with_context(|| format!("GetStudy for study {study_id}"))
}

/// One round of local training for every signal in the task.
/// A device's local training series: every signal with at least [`MIN_DAYS_TO_ENROLL`]
/// observed days, standardised, days counted from the participant's first date (empty when
/// the series has no date).
/// The data-completeness summary of `series` for the signals the device
/// enrolled (`local`): per signal the days with a value and the last such
/// day, and the series' first and last day. It carries counts and dates
/// only; no value of any day is put in it.
pub(crate) fn data_summary(
    study_id: &str,
    device_id: u64,
    series: &ParticipantSeries,
    local: &[(Signal, LocalSeries)],
) -> pb::SubmitDataSummaryRequest {
    let day = |d: Option<&NaiveDate>| d.map_or_else(String::new, |d| d.to_string());
    let signals = local
        .iter()
        .map(|(signal, _)| {
            let values = series.values.get(signal).map_or(&[][..], Vec::as_slice);
            let observed = series
                .dates
                .iter()
                .zip(values)
                .filter(|(_, v)| v.is_some())
                .map(|(d, _)| d);
            let (days, last) = observed.fold((0u32, None), |(n, _), d| (n + 1, Some(d)));
            pb::SignalCoverage {
                signal: signal.column().to_owned(),
                days_with_data: days,
                last_day: day(last),
            }
        })
        .collect();
    pb::SubmitDataSummaryRequest {
        study_id: study_id.to_owned(),
        device_id,
        first_day: day(series.dates.first()),
        last_day: day(series.dates.last()),
        signals,
    }
}

pub(crate) fn local_training_series(series: &ParticipantSeries) -> Vec<(Signal, LocalSeries)> {
    let Some(&origin) = series.dates.first() else {
        return Vec::new();
    };
    series
        .signals()
        .into_iter()
        .map(|s| {
            let (t, z) = standardised(series, s, origin);
            (s, LocalSeries { t, z })
        })
        .filter(|(_, l)| l.n_days() >= MIN_DAYS_TO_ENROLL)
        .collect()
}

/// One round's work after the task arrived: trains on `local` on the blocking pool (holding
/// one of `cpu`'s permits) with `seed`, then submits the updates, retried with `backoff`. A
/// retry after a lost answer is safe: an identical submission is answered as the first one
/// was.
///
/// # Errors
/// The training's error, or `SubmitUpdate` still failing after the retries.
#[allow(clippy::too_many_arguments)]
pub(crate) async fn train_and_submit(
    client: &AggregatorClient<Channel>,
    credential: &DeviceCredential,
    study_id: &str,
    task: wire::TrainingTask,
    local: Arc<Vec<(Signal, LocalSeries)>>,
    cpu: &Arc<Semaphore>,
    seed: u64,
    backoff: &Backoff,
) -> anyhow::Result<()> {
    let round_id = task.round_id;
    let secure = task.secure.clone();
    let current: Vec<(Signal, Vec<f64>)> = task
        .shared
        .iter()
        .map(|p| (p.signal, p.values.to_vec()))
        .collect();
    let permit = cpu.clone().acquire_owned().await?;
    let updates = tokio::task::spawn_blocking(move || {
        let _permit = permit;
        train_all(&task, &local, seed)
    })
    .await
    .context("local training task")??;
    if let Some(secure) = &secure {
        crate::secure::secure_submit(
            client,
            credential,
            study_id,
            round_id,
            secure,
            crate::secure::RoundUpdate {
                current: &current,
                updates: &updates,
            },
            backoff,
            seed,
        )
        .await?;
        return Ok(());
    }
    let request = pb::SubmitUpdateRequest {
        study_id: study_id.to_owned(),
        device_id: credential.device_id,
        round_id,
        updates: updates
            .iter()
            .map(|(s, u)| wire::update_to_pb(*s, u))
            .collect(),
    };
    retry(backoff, seed, || {
        let mut c = client.clone();
        let r = authorized(credential, request.clone());
        async move { c.submit_update(r).await }
    })
    .await
    .context("SubmitUpdate")?;
    Ok(())
}

pub(crate) fn train_all(
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

/// Connects a lazy plaintext channel to `http://addr` (loopback use: the
/// demo and tests run the aggregator in the same process).
pub fn connect_lazy(addr: std::net::SocketAddr) -> anyhow::Result<Channel> {
    Ok(
        tonic::transport::Endpoint::from_shared(format!("http://{addr}"))?
            .connect_timeout(Duration::from_secs(5))
            .connect_lazy(),
    )
}

/// How a device reaches an aggregator elsewhere.
#[derive(Debug, Clone)]
pub struct AggregatorAddress {
    /// `https://host:port`, or `http://…` for loopback.
    pub url: String,
    /// PEM certificate(s) of the authority the aggregator's certificate is
    /// checked against (e.g. the `ca.pem` of a development certificate).
    pub ca_pem: Option<Vec<u8>>,
    /// Allow `http://` to a host that is not loopback (credentials and
    /// updates then cross the network unencrypted).
    pub insecure_plaintext: bool,
}

/// Connects a lazy channel to `address`. `https` needs a CA; `http` is
/// refused off loopback unless `insecure_plaintext` is set.
pub fn connect_to(address: &AggregatorAddress) -> anyhow::Result<Channel> {
    use tonic::transport::{Certificate, ClientTlsConfig, Endpoint};
    let endpoint = Endpoint::from_shared(address.url.clone())
        .with_context(|| format!("aggregator address `{}`", address.url))?
        .connect_timeout(Duration::from_secs(10));
    let uri = endpoint.uri().clone();
    let host = uri.host().unwrap_or_default();
    match uri.scheme_str() {
        Some("https") => {
            let ca = address.ca_pem.as_deref().ok_or_else(|| {
                anyhow!(
                    "`{}` uses TLS: give the aggregator's CA certificate",
                    address.url
                )
            })?;
            let tls = ClientTlsConfig::new().ca_certificate(Certificate::from_pem(ca));
            Ok(endpoint.tls_config(tls)?.connect_lazy())
        }
        Some("http") => {
            let loopback = host == "localhost"
                || host
                    .trim_matches(['[', ']'])
                    .parse::<std::net::IpAddr>()
                    .is_ok_and(|ip| ip.is_loopback());
            if !loopback && !address.insecure_plaintext {
                return Err(anyhow!(
                    "refusing plaintext to non-loopback host `{host}`: use https:// with the \
                     aggregator's CA certificate"
                ));
            }
            Ok(endpoint.connect_lazy())
        }
        _ => Err(anyhow!(
            "aggregator address `{}` must start with https:// (or http:// on loopback)",
            address.url
        )),
    }
}

/// A per-participant seed for retry jitter, so devices do not retry in step.
pub(crate) fn seed_of(label: &str) -> u64 {
    label.bytes().fold(0xcbf2_9ce4_8422_2325, |h, b| {
        (h ^ u64::from(b)).wrapping_mul(0x100_0000_01b3)
    })
}

#[cfg(test)]
mod tests {
    use std::collections::BTreeMap;

    use super::*;

    #[test]
    fn a_data_summary_counts_days_with_a_value_and_carries_no_value() {
        let day = |s: &str| s.parse::<NaiveDate>().unwrap();
        let dates = vec![
            day("2024-05-01"),
            day("2024-05-02"),
            day("2024-05-04"),
            day("2024-05-05"),
        ];
        let mut values = BTreeMap::new();
        values.insert(Signal::RestingHr, vec![Some(61.0), None, Some(63.5), None]);
        values.insert(Signal::Steps, vec![Some(4100.0); 4]);
        let series = ParticipantSeries {
            participant: "p-1".into(),
            dates,
            values,
        };
        let enrolled = |s| {
            (
                s,
                LocalSeries {
                    t: Vec::new(),
                    z: Vec::new(),
                },
            )
        };
        // Only the enrolled signals are summarised.
        let r = data_summary("s", 7, &series, &[enrolled(Signal::RestingHr)]);
        assert_eq!((r.study_id.as_str(), r.device_id), ("s", 7));
        assert_eq!(
            (r.first_day.as_str(), r.last_day.as_str()),
            ("2024-05-01", "2024-05-05")
        );
        assert_eq!(r.signals.len(), 1);
        assert_eq!(r.signals[0].signal, Signal::RestingHr.column());
        assert_eq!(r.signals[0].days_with_data, 2);
        assert_eq!(r.signals[0].last_day, "2024-05-04");
        // No value of the series appears anywhere in the encoded message.
        let text = format!("{r:?}");
        for v in ["61", "63.5", "4100"] {
            assert!(!text.contains(v), "{v} in {text}");
        }
    }
}
