//! Conversions between `plimsoll.v1` wire messages and the aggregator's own
//! types, and the one mapping from `AggregatorError` to `tonic::Status`.

use plimsoll_proto::v1 as pb;
use tonic::Status;

use crate::detection::{DetectionStage, DetectionStats, StageView};
use crate::error::{AggregatorError, Result};
use crate::packets::{
    DayStatus, EpisodeFacts, FlagKind, FlagLevel, FlagPacket, PatternDirection, PopulationBand,
    SignalDeparture, SignalDirection, SignalWindow, WindowDay,
};
use crate::study::{
    Contribution, LocalTraining, Optimizer, PriorVersion, SignalParams, SignalUpdate, StudyStatus,
    Work,
};

/// The only place an aggregator error becomes a gRPC status.
pub fn to_status(err: AggregatorError) -> Status {
    match err {
        AggregatorError::InvalidArgument { .. } => Status::invalid_argument(err.to_string()),
        AggregatorError::NotFound(m) => Status::not_found(m),
        AggregatorError::FailedPrecondition(m) => Status::failed_precondition(m),
        AggregatorError::AlreadyExists(m) => Status::already_exists(m),
        AggregatorError::Unauthenticated(m) => Status::unauthenticated(m),
        AggregatorError::PermissionDenied(m) => Status::permission_denied(m),
        AggregatorError::Database(e) => {
            tracing::error!(error = %e, "database error");
            Status::internal("the aggregator's database failed; the request was not applied")
        }
        AggregatorError::Unapplied(m) => {
            tracing::error!(error = %m, "database error in a group commit");
            Status::internal("the aggregator's database failed; the request was not applied")
        }
        AggregatorError::Superseded(m) => Status::aborted(m),
        AggregatorError::Corrupt(m) => {
            tracing::error!(error = %m, "corrupt state");
            Status::internal("the aggregator's stored state is inconsistent")
        }
    }
}

pub fn training_to_pb(t: &LocalTraining) -> pb::LocalTraining {
    pb::LocalTraining {
        optimizer: match t.optimizer {
            Optimizer::Adam => pb::Optimizer::Adam,
            Optimizer::Sgd => pb::Optimizer::Sgd,
        } as i32,
        local_steps: t.local_steps,
        learning_rate: t.learning_rate,
        window_days: t.window_days,
        hyperprior_weight_per_day: t.hyperprior_weight_per_day,
    }
}

pub fn params_to_pb(p: &SignalParams) -> pb::SignalParameters {
    pb::SignalParameters {
        signal: p.signal.clone(),
        values: p.values.clone(),
    }
}

pub fn work_to_pb(work: Work) -> pb::FetchTaskResponse {
    use pb::fetch_task_response::Work as W;
    let w = match work {
        Work::Task {
            round_id,
            shared,
            training,
            deadline_unix_ms,
            secure,
        } => W::Task(pb::Task {
            round_id,
            shared: shared.iter().map(params_to_pb).collect(),
            training: Some(training_to_pb(&training)),
            deadline_unix_ms,
            secure: secure.as_ref().map(secure_task_to_pb),
        }),
        Work::Wait {
            retry_after_ms,
            reason,
        } => W::Wait(pb::Wait {
            retry_after_ms,
            reason,
        }),
        Work::Done { prior_version } => W::Done(pb::Done { prior_version }),
    };
    pb::FetchTaskResponse { work: Some(w) }
}

pub fn updates_from_pb(updates: Vec<pb::SignalUpdate>) -> Vec<SignalUpdate> {
    updates
        .into_iter()
        .map(|u| SignalUpdate {
            signal: u.signal,
            values: u.values,
            n_days: u.n_days,
            local_loss: u.local_loss,
        })
        .collect()
}

pub fn status_to_pb(s: &StudyStatus) -> pb::Study {
    pb::Study {
        study_id: s.config.study_id.clone(),
        title: s.config.title.clone(),
        signals: s
            .config
            .signals
            .iter()
            .map(|l| pb::SignalLayout {
                signal: l.signal.clone(),
                param_names: l.param_names.clone(),
                reference_center: l.reference_center,
                reference_scale: l.reference_scale,
            })
            .collect(),
        rounds_planned: s.config.round_limit(),
        rounds_completed: s.rounds_completed,
        current_round: s.current_round,
        devices_enrolled: s.devices_enrolled,
        prior_version: s.prior_version,
        secure_aggregation: s.config.secure_aggregation.is_some(),
        alert_direction: s
            .config
            .alert_direction
            .iter()
            .flatten()
            .map(|(k, v)| (k.clone(), *v))
            .collect(),
        min_quorum: s.config.min_quorum,
        alert_budget_per_participant_month: s.config.alert_budget_per_participant_month,
        sensor_models: s
            .config
            .sensor_models
            .as_ref()
            .map(|m| m.models.clone())
            .unwrap_or_default(),
        group_column: s
            .config
            .subgroups
            .as_ref()
            .map(|g| g.column.clone())
            .unwrap_or_default(),
        group_levels: s
            .config
            .subgroups
            .as_ref()
            .map(|g| g.levels.clone())
            .unwrap_or_default(),
        review_level: level_to_pb(s.config.review_level) as i32,
    }
}

fn level_to_pb(level: FlagLevel) -> pb::FlagLevel {
    match level {
        FlagLevel::Watch => pb::FlagLevel::Watch,
        FlagLevel::Alert => pb::FlagLevel::Alert,
    }
}

/// The statistics of a `SubmitDetectionStats` request (exactly one stage's
/// message must be set). Their values are checked by
/// [`DetectionStats::validate`].
pub fn detection_stats_from_pb(
    stats: Option<pb::submit_detection_stats_request::Stats>,
) -> Result<DetectionStats> {
    use pb::submit_detection_stats_request::Stats;
    match stats {
        Some(Stats::ResidualMoments(m)) => Ok(DetectionStats::ResidualMoments {
            cross_products: m.cross_products,
            pair_days: m.pair_days,
        }),
        Some(Stats::EpisodeHistogram(h)) => Ok(DetectionStats::EpisodeHistogram {
            episodes: h.episodes,
            scored_days: h.scored_days,
        }),
        None => Err(AggregatorError::invalid(
            "stats",
            "missing: set residual_moments or episode_histogram",
        )),
    }
}

/// The stage named in a `GetDetectionCalibration` request.
pub fn detection_stage_from_pb(stage: i32) -> Result<DetectionStage> {
    match pb::DetectionStage::try_from(stage) {
        Ok(pb::DetectionStage::ResidualMoments) => Ok(DetectionStage::ResidualMoments),
        Ok(pb::DetectionStage::EpisodeHistogram) => Ok(DetectionStage::EpisodeHistogram),
        _ => Err(AggregatorError::invalid(
            "stage",
            format!("unknown or unspecified detection stage {stage}"),
        )),
    }
}

fn detection_stage_to_pb(stage: DetectionStage) -> pb::DetectionStage {
    match stage {
        DetectionStage::ResidualMoments => pb::DetectionStage::ResidualMoments,
        DetectionStage::EpisodeHistogram => pb::DetectionStage::EpisodeHistogram,
    }
}

pub fn stage_view_to_pb(v: StageView) -> pb::DetectionCalibration {
    use pb::detection_calibration::Sum;
    pb::DetectionCalibration {
        stage: detection_stage_to_pb(v.stage) as i32,
        open: v.open,
        complete: v.complete,
        devices_submitted: v.devices_submitted,
        devices_expected: v.devices_expected,
        device_submitted: v.device_submitted,
        deadline_unix_ms: v.deadline_ms.unwrap_or(0),
        completed_unix_ms: v.completed_ms.unwrap_or(0),
        sum: v.sum.map(|s| match s {
            DetectionStats::ResidualMoments {
                cross_products,
                pair_days,
            } => Sum::ResidualMoments(pb::ResidualMomentSums {
                cross_products,
                pair_days,
            }),
            DetectionStats::EpisodeHistogram {
                episodes,
                scored_days,
            } => Sum::EpisodeHistogram(pb::EpisodeCounts {
                episodes,
                scored_days,
            }),
        }),
        group_devices: v.group.as_ref().map_or(0, |g| g.1),
        group_label: v.group.map(|g| g.0).unwrap_or_default(),
    }
}

fn contribution_to_pb(c: &Contribution) -> pb::SignalContribution {
    pb::SignalContribution {
        signal: c.signal.clone(),
        n_devices: c.n_devices,
        n_days: c.n_days,
        mean_local_loss: c.mean_local_loss,
    }
}

/// A published prior; `sensor_model` names the model whose terms `p.params` carries.
pub fn prior_to_pb(
    study_id: &str,
    p: &PriorVersion,
    sensor_model: Option<&str>,
) -> pb::PublishedPrior {
    pb::PublishedPrior {
        study_id: study_id.to_owned(),
        version: p.version,
        round_id: p.round_id,
        params: p.params.iter().map(params_to_pb).collect(),
        contributions: p.contributions.iter().map(contribution_to_pb).collect(),
        created_unix_ms: p.created_unix_ms,
        sensor_model: sensor_model.unwrap_or_default().to_owned(),
        sensor_terms: p
            .sensor_terms
            .iter()
            .map(|t| pb::SensorModelParameters {
                sensor_model: t.sensor_model.clone(),
                signal: t.signal.clone(),
                values: t.values.clone(),
                n_devices: t.n_devices,
            })
            .collect(),
    }
}

/// An ISO 8601 calendar date (`YYYY-MM-DD`).
fn date_from_pb(field: &str, text: &str) -> Result<chrono::NaiveDate> {
    chrono::NaiveDate::parse_from_str(text, "%Y-%m-%d").map_err(|e| {
        AggregatorError::invalid(
            field,
            format!("`{text}` is not an ISO 8601 date (YYYY-MM-DD): {e}"),
        )
    })
}

fn band_from_pb(field: &str, b: Option<pb::PopulationBand>) -> Result<PopulationBand> {
    let b = b.ok_or_else(|| AggregatorError::invalid(field, "missing"))?;
    Ok(PopulationBand {
        mean: b.mean,
        lo50: b.lo50,
        hi50: b.hi50,
        lo95: b.lo95,
        hi95: b.hi95,
    })
}

/// Decodes a data summary: dates parsed (an empty signal `last_day` is none).
/// The consistency checks are [`crate::coverage::DataSummary::validate`]'s.
pub fn data_summary_from_pb(
    r: &pb::SubmitDataSummaryRequest,
) -> Result<crate::coverage::DataSummary> {
    let mut signals = Vec::with_capacity(r.signals.len());
    for (i, c) in r.signals.iter().enumerate() {
        signals.push(crate::coverage::SignalCoverage {
            signal: c.signal.clone(),
            days_with_data: c.days_with_data,
            last_day: if c.last_day.is_empty() {
                None
            } else {
                Some(date_from_pb(
                    &format!("signals[{i}].last_day"),
                    &c.last_day,
                )?)
            },
        });
    }
    Ok(crate::coverage::DataSummary {
        first_day: date_from_pb("first_day", &r.first_day)?,
        last_day: date_from_pb("last_day", &r.last_day)?,
        signals,
    })
}

/// Decodes a flag packet: dates parsed, enums known. The numeric and window
/// checks are [`FlagPacket::validate`]'s.
pub fn flag_packet_from_pb(p: Option<pb::FlagPacket>) -> Result<FlagPacket> {
    let p = p.ok_or_else(|| AggregatorError::invalid("packet", "missing"))?;
    let kind = match pb::FlagKind::try_from(p.kind) {
        Ok(pb::FlagKind::SingleDay) => FlagKind::SingleDay,
        Ok(pb::FlagKind::Cusum) => FlagKind::Cusum,
        Ok(pb::FlagKind::MultiSignal) => FlagKind::MultiSignal,
        Ok(pb::FlagKind::Episode) => FlagKind::Episode,
        _ => {
            return Err(AggregatorError::invalid(
                "packet.kind",
                format!("unknown or unspecified flag kind {}", p.kind),
            ));
        }
    };
    let level = match pb::FlagLevel::try_from(p.level) {
        Ok(pb::FlagLevel::Watch) => FlagLevel::Watch,
        Ok(pb::FlagLevel::Alert) => FlagLevel::Alert,
        _ => {
            return Err(AggregatorError::invalid(
                "packet.level",
                format!("unknown or unspecified flag level {}", p.level),
            ));
        }
    };
    let mut signals = Vec::with_capacity(p.signals.len());
    for (i, w) in p.signals.into_iter().enumerate() {
        let at = format!("packet.signals[{i}]");
        let mut days = Vec::with_capacity(w.days.len());
        for (j, d) in w.days.into_iter().enumerate() {
            let at = format!("{at}.days[{j}]");
            let status = match pb::DayStatus::try_from(d.status) {
                Ok(pb::DayStatus::BuildingBaseline) => DayStatus::BuildingBaseline,
                Ok(pb::DayStatus::Normal) => DayStatus::Normal,
                Ok(pb::DayStatus::Flagged) => DayStatus::Flagged,
                _ => {
                    return Err(AggregatorError::invalid(
                        format!("{at}.status"),
                        format!("unknown or unspecified day status {}", d.status),
                    ));
                }
            };
            days.push(WindowDay {
                date: date_from_pb(&format!("{at}.date"), &d.date)?,
                observed: d.observed,
                mean: d.mean,
                sd: d.sd,
                lo50: d.lo50,
                hi50: d.hi50,
                lo95: d.lo95,
                hi95: d.hi95,
                z: d.z,
                tail_p: d.tail_p,
                conditioned: d.conditioned,
                status,
            });
        }
        signals.push(SignalWindow {
            signal: w.signal,
            population: band_from_pb(&format!("{at}.population"), w.population)?,
            days,
        });
    }
    let direction = match pb::PatternDirection::try_from(p.direction) {
        Ok(pb::PatternDirection::Target) => PatternDirection::Target,
        Ok(pb::PatternDirection::Mirror) => PatternDirection::Mirror,
        _ => {
            return Err(AggregatorError::invalid(
                "packet.direction",
                format!("unknown or unspecified pattern direction {}", p.direction),
            ));
        }
    };
    let mut involved = Vec::with_capacity(p.involved.len());
    for (i, d) in p.involved.into_iter().enumerate() {
        let direction = match pb::SignalDirection::try_from(d.direction) {
            Ok(pb::SignalDirection::Up) => SignalDirection::Up,
            Ok(pb::SignalDirection::Down) => SignalDirection::Down,
            _ => {
                return Err(AggregatorError::invalid(
                    format!("packet.involved[{i}].direction"),
                    format!("unknown or unspecified signal direction {}", d.direction),
                ));
            }
        };
        involved.push(SignalDeparture {
            signal: d.signal,
            direction,
            departure: d.departure,
            contribution: d.contribution,
        });
    }
    let episode = EpisodeFacts {
        key: p.episode_key,
        ongoing: p.ongoing,
        direction: Some(direction),
        involved,
        peak_window_start: date_from_pb("packet.peak_window_start", &p.peak_window_start)?,
        alarm_days: p.alarm_days,
    };
    Ok(FlagPacket {
        signal: (!p.signal.is_empty()).then_some(p.signal),
        kind,
        level,
        first_day: date_from_pb("packet.first_day", &p.first_day)?,
        last_day: date_from_pb("packet.last_day", &p.last_day)?,
        date: date_from_pb("packet.date", &p.date)?,
        score: p.score,
        reason: p.reason,
        window_start: date_from_pb("packet.window_start", &p.window_start)?,
        window_end: date_from_pb("packet.window_end", &p.window_end)?,
        signals,
        episode,
    })
}

// ---- Secure aggregation (`SecureStep`) -------------------------------------------------------

use crate::secagg::{
    AdvertiseKeys, EncryptedShare, KeysBroadcast, MaskedInput, RevealedShare, SecretKind,
    ShareKeys, SharesRelay, UnmaskingRequest, UnmaskingResponse, shamir::LIMBS,
};
use crate::secure_round::{DeviceMessage, SecureNext, SecureTask, Slot};

pub fn secure_task_to_pb(t: &SecureTask) -> pb::SecureRound {
    pb::SecureRound {
        members: t.members.clone(),
        threshold: t.threshold,
        frac_bits: t.frac_bits,
        slots: t
            .slots
            .iter()
            .map(|s| pb::SecureSlot {
                signal: s.signal.clone(),
                n_values: s.n_values as u32,
            })
            .collect(),
        stage: t
            .stage
            .map_or(pb::DetectionStage::Unspecified, detection_stage_to_pb) as i32,
        session: t.session,
        group_levels: t.group_levels.clone(),
        group_slot: t.group_slot.map_or(0, |g| g as u32 + 1),
        dp_clip_norm: t.dp.map_or(0.0, |d| d.clip_norm),
        dp_noise_stddev_units: t.dp.map_or(0.0, |d| d.device_stddev_units),
    }
}

/// A task's secure-round description, checked (the field named on refusal).
pub fn secure_task_from_pb(t: pb::SecureRound) -> Result<SecureTask> {
    let task = SecureTask {
        members: t.members,
        threshold: t.threshold,
        frac_bits: t.frac_bits,
        slots: t
            .slots
            .into_iter()
            .map(|s| Slot {
                signal: s.signal,
                n_values: s.n_values as usize,
            })
            .collect(),
        stage: match t.stage {
            0 => None,
            other => Some(detection_stage_from_pb(other).map_err(|_| {
                AggregatorError::invalid("task.secure.stage", format!("unknown value {other}"))
            })?),
        },
        session: t.session,
        group_slot: match t.group_slot {
            0 => None,
            g if g as usize <= t.group_levels.len() => Some(g as usize - 1),
            g => {
                return Err(AggregatorError::invalid(
                    "task.secure.group_slot",
                    format!("{g} outside the {} group levels", t.group_levels.len()),
                ));
            }
        },
        group_levels: t.group_levels,
        dp: match (t.dp_clip_norm, t.dp_noise_stddev_units) {
            (0.0, 0.0) => None,
            (c, s) if c.is_finite() && c > 0.0 && s.is_finite() && s > 0.0 => {
                Some(crate::privacy::DistributedNoise {
                    clip_norm: c,
                    device_stddev_units: s,
                })
            }
            (c, s) => {
                return Err(AggregatorError::invalid(
                    "task.secure.dp_clip_norm",
                    format!("clip norm {c} and noise {s} must both be positive and finite"),
                ));
            }
        },
    };
    task.params()
        .map_err(|e| AggregatorError::invalid("task.secure", e.to_string()))?;
    task.codec()
        .map_err(|e| AggregatorError::invalid("task.secure.frac_bits", e.to_string()))?;
    Ok(task)
}

/// Exactly 32 bytes, or a refusal naming `field`.
fn key32(field: &str, bytes: &[u8]) -> Result<[u8; 32]> {
    bytes
        .try_into()
        .map_err(|_| AggregatorError::invalid(field, format!("{} bytes, expected 32", bytes.len())))
}

fn ciphertext_to_pb(c: &EncryptedShare) -> pb::SecAggCiphertext {
    pb::SecAggCiphertext {
        sender: c.sender,
        recipient: c.recipient,
        ciphertext: c.ciphertext.clone(),
    }
}

fn ciphertext_from_pb(c: pb::SecAggCiphertext) -> EncryptedShare {
    EncryptedShare {
        sender: c.sender,
        recipient: c.recipient,
        ciphertext: c.ciphertext,
    }
}

/// A device's message as sent by authenticated device `device`.
pub fn device_message_from_pb(
    device: u64,
    message: pb::secure_step_request::Message,
) -> Result<DeviceMessage> {
    use pb::secure_step_request::Message as M;
    Ok(match message {
        M::Keys(k) => DeviceMessage::Keys(AdvertiseKeys {
            device,
            c_public: key32("keys.c_public", &k.c_public)?,
            s_public: key32("keys.s_public", &k.s_public)?,
        }),
        M::ShareKeys(m) => DeviceMessage::ShareKeys(ShareKeys {
            device,
            b_commitment: key32("share_keys.b_commitment", &m.b_commitment)?,
            shares: m.shares.into_iter().map(ciphertext_from_pb).collect(),
        }),
        M::MaskedInput(m) => DeviceMessage::Masked(MaskedInput {
            device,
            masked: m.masked,
        }),
        M::Unmasking(m) => DeviceMessage::Unmasking(UnmaskingResponse {
            device,
            shares: m
                .shares
                .into_iter()
                .enumerate()
                .map(|(i, s)| {
                    let kind = match pb::SecAggSecret::try_from(s.kind) {
                        Ok(pb::SecAggSecret::SelfMask) => SecretKind::SelfMask,
                        Ok(pb::SecAggSecret::PairwiseKey) => SecretKind::PairwiseKey,
                        _ => {
                            return Err(AggregatorError::invalid(
                                format!("unmasking.shares[{i}].kind"),
                                format!("unknown value {}", s.kind),
                            ));
                        }
                    };
                    let share: [u64; LIMBS] = s.share.as_slice().try_into().map_err(|_| {
                        AggregatorError::invalid(
                            format!("unmasking.shares[{i}].share"),
                            format!("{} elements, expected {LIMBS}", s.share.len()),
                        )
                    })?;
                    Ok(RevealedShare {
                        owner: s.owner,
                        kind,
                        share,
                    })
                })
                .collect::<Result<_>>()?,
        }),
    })
}

/// The wire form of a device's message (the sender is the call's credential).
pub fn device_message_to_pb(message: &DeviceMessage) -> pb::secure_step_request::Message {
    use pb::secure_step_request::Message as M;
    match message {
        DeviceMessage::Keys(k) => M::Keys(pb::SecAggKeys {
            c_public: k.c_public.to_vec(),
            s_public: k.s_public.to_vec(),
        }),
        DeviceMessage::ShareKeys(m) => M::ShareKeys(pb::SecAggShareKeys {
            b_commitment: m.b_commitment.to_vec(),
            shares: m.shares.iter().map(ciphertext_to_pb).collect(),
        }),
        DeviceMessage::Masked(m) => M::MaskedInput(pb::SecAggMaskedInput {
            masked: m.masked.clone(),
        }),
        DeviceMessage::Unmasking(m) => M::Unmasking(pb::SecAggUnmasking {
            shares: m
                .shares
                .iter()
                .map(|s| pb::SecAggRevealedShare {
                    owner: s.owner,
                    kind: match s.kind {
                        SecretKind::SelfMask => pb::SecAggSecret::SelfMask,
                        SecretKind::PairwiseKey => pb::SecAggSecret::PairwiseKey,
                    } as i32,
                    share: s.share.to_vec(),
                })
                .collect(),
        }),
    }
}

pub fn secure_next_to_pb(next: SecureNext, retry_after_ms: u32) -> pb::SecureStepResponse {
    use pb::secure_step_response::Next as N;
    let n = match next {
        SecureNext::Broadcast(b) => N::KeysBroadcast(pb::SecAggKeysBroadcast {
            keys: b
                .keys
                .iter()
                .map(|k| pb::SecAggAdvertised {
                    device: k.device,
                    c_public: k.c_public.to_vec(),
                    s_public: k.s_public.to_vec(),
                })
                .collect(),
        }),
        SecureNext::Relay(r) => N::SharesRelay(pb::SecAggSharesRelay {
            u2: r.u2,
            shares: r.shares.iter().map(ciphertext_to_pb).collect(),
        }),
        SecureNext::Request(r) => N::UnmaskingRequest(pb::SecAggUnmaskingRequest { u3: r.u3 }),
        SecureNext::Wait(reason) => N::Wait(pb::Wait {
            retry_after_ms,
            reason,
        }),
        SecureNext::Finished { included, reason } => {
            N::Finished(pb::SecAggFinished { included, reason })
        }
        SecureNext::Start(task) => N::Start(secure_task_to_pb(&task)),
    };
    pb::SecureStepResponse { next: Some(n) }
}

/// The aggregator's answer as a device reads it (the field named on refusal).
pub fn secure_next_from_pb(r: pb::SecureStepResponse) -> Result<SecureNext> {
    use pb::secure_step_response::Next as N;
    Ok(match r.next {
        Some(N::KeysBroadcast(b)) => SecureNext::Broadcast(KeysBroadcast {
            keys: b
                .keys
                .into_iter()
                .enumerate()
                .map(|(i, k)| {
                    Ok(AdvertiseKeys {
                        device: k.device,
                        c_public: key32(
                            &format!("keys_broadcast.keys[{i}].c_public"),
                            &k.c_public,
                        )?,
                        s_public: key32(
                            &format!("keys_broadcast.keys[{i}].s_public"),
                            &k.s_public,
                        )?,
                    })
                })
                .collect::<Result<_>>()?,
        }),
        Some(N::SharesRelay(r)) => SecureNext::Relay(SharesRelay {
            u2: r.u2,
            shares: r.shares.into_iter().map(ciphertext_from_pb).collect(),
        }),
        Some(N::UnmaskingRequest(r)) => SecureNext::Request(UnmaskingRequest { u3: r.u3 }),
        Some(N::Wait(w)) => SecureNext::Wait(w.reason),
        Some(N::Finished(f)) => SecureNext::Finished {
            included: f.included,
            reason: f.reason,
        },
        Some(N::Start(task)) => SecureNext::Start(secure_task_from_pb(task)?),
        None => return Err(AggregatorError::invalid("next", "missing")),
    })
}
