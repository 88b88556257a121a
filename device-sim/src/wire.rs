//! Conversions between `plimsoll.v1` messages and the device's own types.
//! The only device-side module that names generated protobuf types besides
//! the gRPC client itself.

use plimsoll_proto::v1 as pb;

use crate::detect::calibration::{EpisodeHistogram, N_EDGES};
use crate::detect::joint::{N_SIGNALS, ResidualMoments};
use crate::prior::PriorParams;
use crate::signal::Signal;
use crate::training::{LocalOptimizer, LocalSettings, LocalUpdate};

/// A training task, decoded and checked.
#[derive(Debug, Clone, PartialEq)]
pub struct TrainingTask {
    pub round_id: u64,
    pub shared: Vec<PriorParams>,
    pub settings: LocalSettings,
    pub deadline_unix_ms: i64,
    /// Present in a study with secure aggregation: send the update with `SecureStep`.
    pub secure: Option<plimsoll_server::secure_round::SecureTask>,
}

/// Why a message from the aggregator could not be used.
#[derive(Debug, thiserror::Error)]
pub enum WireError {
    #[error("{field}: {reason}")]
    Invalid { field: String, reason: String },
}

fn invalid(field: impl Into<String>, reason: impl Into<String>) -> WireError {
    WireError::Invalid {
        field: field.into(),
        reason: reason.into(),
    }
}

/// A study's `review_level`: WATCH or ALERT.
pub fn review_level_from_pb(level: i32) -> Result<crate::flags::FlagLevel, WireError> {
    match pb::FlagLevel::try_from(level) {
        Ok(pb::FlagLevel::Watch) => Ok(crate::flags::FlagLevel::Watch),
        Ok(pb::FlagLevel::Alert) => Ok(crate::flags::FlagLevel::Alert),
        _ => Err(invalid(
            "review_level",
            format!("unknown or unspecified flag level {level}"),
        )),
    }
}

pub fn params_from_pb(field: &str, p: &pb::SignalParameters) -> Result<PriorParams, WireError> {
    let signal: Signal = p
        .signal
        .parse()
        .map_err(|e| invalid(format!("{field}.signal"), format!("{e}")))?;
    PriorParams::from_slice(signal, &p.values).ok_or_else(|| {
        invalid(
            format!("{field}.values"),
            format!(
                "expected {} finite values, got {:?}",
                crate::prior::N_PARAMS,
                p.values
            ),
        )
    })
}

pub fn task_from_pb(task: pb::Task) -> Result<TrainingTask, WireError> {
    let training = task
        .training
        .ok_or_else(|| invalid("task.training", "missing"))?;
    let optimizer = match pb::Optimizer::try_from(training.optimizer) {
        Ok(pb::Optimizer::Adam) => LocalOptimizer::Adam,
        Ok(pb::Optimizer::Sgd) => LocalOptimizer::Sgd,
        _ => {
            return Err(invalid(
                "task.training.optimizer",
                format!("unsupported value {}", training.optimizer),
            ));
        }
    };
    let shared = task
        .shared
        .iter()
        .enumerate()
        .map(|(i, p)| params_from_pb(&format!("task.shared[{i}]"), p))
        .collect::<Result<Vec<_>, _>>()?;
    let secure = match task.secure {
        Some(s) => Some(
            plimsoll_server::wire::secure_task_from_pb(s).map_err(|e| match e {
                plimsoll_server::error::AggregatorError::InvalidArgument { field, reason } => {
                    invalid(field, reason)
                }
                other => invalid("task.secure", other.to_string()),
            })?,
        ),
        None => None,
    };
    Ok(TrainingTask {
        round_id: task.round_id,
        shared,
        settings: LocalSettings {
            optimizer,
            steps: training.local_steps as usize,
            learning_rate: training.learning_rate,
            window_days: training.window_days,
            hyperprior_weight_per_day: training.hyperprior_weight_per_day,
        },
        deadline_unix_ms: task.deadline_unix_ms,
        secure,
    })
}

pub fn update_to_pb(signal: Signal, u: &LocalUpdate) -> pb::SignalUpdate {
    pb::SignalUpdate {
        signal: signal.column().to_owned(),
        values: u.values.to_vec(),
        n_days: u.n_days,
        local_loss: u.loss_at_received,
    }
}

pub fn prior_from_pb(p: &pb::PublishedPrior) -> Result<Vec<PriorParams>, WireError> {
    p.params
        .iter()
        .enumerate()
        .map(|(i, sp)| params_from_pb(&format!("prior.params[{i}]"), sp))
        .collect()
}

/// A device's residual moments on the wire: 6×6 row-major, signals in [`Signal::ALL`]
/// order (the proto's fixed order).
pub fn moments_to_pb(m: &ResidualMoments) -> pb::ResidualMomentSums {
    pb::ResidualMomentSums {
        cross_products: m.cross.iter().flatten().copied().collect(),
        pair_days: m.count.iter().flatten().copied().collect(),
    }
}

/// Summed moments published by the aggregator.
pub fn moments_from_pb(
    field: &str,
    m: &pb::ResidualMomentSums,
) -> Result<ResidualMoments, WireError> {
    let n = N_SIGNALS * N_SIGNALS;
    if m.cross_products.len() != n || m.pair_days.len() != n {
        return Err(invalid(
            field,
            format!(
                "expected {n} cross-products and {n} pair counts, got {} and {}",
                m.cross_products.len(),
                m.pair_days.len()
            ),
        ));
    }
    if let Some(i) = m.cross_products.iter().position(|v| !v.is_finite()) {
        return Err(invalid(
            format!("{field}.cross_products[{i}]"),
            "not finite",
        ));
    }
    let mut out = ResidualMoments::default();
    for j in 0..N_SIGNALS {
        for k in 0..N_SIGNALS {
            out.cross[j][k] = m.cross_products[j * N_SIGNALS + k];
            out.count[j][k] = m.pair_days[j * N_SIGNALS + k];
        }
    }
    Ok(out)
}

/// A device's episode histogram on the wire.
pub fn histogram_to_pb(h: &EpisodeHistogram) -> pb::EpisodeCounts {
    pb::EpisodeCounts {
        episodes: h.episodes.clone(),
        scored_days: h.scored_days,
    }
}

/// The summed histogram published by the aggregator.
pub fn histogram_from_pb(
    field: &str,
    h: &pb::EpisodeCounts,
) -> Result<EpisodeHistogram, WireError> {
    if h.episodes.len() != N_EDGES {
        return Err(invalid(
            format!("{field}.episodes"),
            format!("expected {N_EDGES} counts, got {}", h.episodes.len()),
        ));
    }
    Ok(EpisodeHistogram {
        episodes: h.episodes.clone(),
        scored_days: h.scored_days,
    })
}
