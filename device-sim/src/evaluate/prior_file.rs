//! The shared prior as a JSON file (`prior.json`): written by `plimsoll evaluate` after the
//! federated rounds, read back with `--prior` so that a later evaluation (or another cohort)
//! can reuse a prior without training again.
//!
//! ```text
//! {
//!   "schema": "plimsoll.prior.v1",
//!   "param_names": ["mean_z", "log_between_var", "log_trend_var", "log_trend_len_days",
//!                   "log_weekly_var", "log_weekly_len", "log_noise_var"],
//!   "source": "federated: 80 rounds …",
//!   "priors": { "resting_hr_bpm": [7 numbers in that order], … }
//! }
//! ```
//!
//! Per signal (keyed by its `daily.csv` column), the 7 values in wire order of
//! [`crate::prior`], in standardised units `(y − centre) / scale` ([`Signal::reference`]).
//!
//! A sensor-aware prior adds `"sensor_column"` (the `participants.csv` column naming each
//! participant's sensor model) and `"sensor_priors"`: model → signal → 7 values, for the
//! models that have terms of their own; participants of other models use `priors`.

use std::collections::BTreeMap;
use std::path::Path;

use anyhow::{Context, bail};
use serde::{Deserialize, Serialize};

use super::run::CohortPriors;
use crate::prior::{PARAM_NAMES, PriorParams};
use crate::signal::Signal;

/// Schema identifier of `prior.json`.
pub const PRIOR_SCHEMA: &str = "plimsoll.prior.v1";

/// The file's contents.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PriorFile {
    pub schema: String,
    pub param_names: Vec<String>,
    /// Where the prior came from, in words.
    pub source: String,
    /// Signal column → parameters in wire order.
    pub priors: BTreeMap<String, Vec<f64>>,
    /// Column of `participants.csv` naming each participant's sensor model.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sensor_column: Option<String>,
    /// Sensor model → signal column → parameters, for models with terms of their own.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub sensor_priors: BTreeMap<String, BTreeMap<String, Vec<f64>>>,
}

fn by_column(priors: &[PriorParams]) -> BTreeMap<String, Vec<f64>> {
    priors
        .iter()
        .map(|p| (p.signal.column().to_owned(), p.values.to_vec()))
        .collect()
}

/// Writes `priors` to `path`.
///
/// # Errors
/// An I/O error, with the path.
pub fn write_prior_file(path: &Path, priors: &CohortPriors, source: &str) -> anyhow::Result<()> {
    let file = PriorFile {
        schema: PRIOR_SCHEMA.into(),
        param_names: PARAM_NAMES.iter().map(|n| (*n).to_owned()).collect(),
        source: source.into(),
        priors: by_column(&priors.pooled),
        sensor_column: priors.sensor_column.clone(),
        sensor_priors: priors
            .by_sensor
            .iter()
            .map(|(m, p)| (m.clone(), by_column(p)))
            .collect(),
    };
    let text = serde_json::to_string_pretty(&file)?;
    std::fs::write(path, text + "\n").with_context(|| format!("writing {}", path.display()))
}

/// Reads a prior file and returns its priors (in signal order) and its `source`.
///
/// # Errors
/// Unreadable or unparsable JSON, another schema, parameter names other than the wire order,
/// an unknown signal, or a vector that is not 7 finite numbers; each message names the file.
pub fn read_prior_file(path: &Path) -> anyhow::Result<(CohortPriors, String)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let file: PriorFile =
        serde_json::from_str(&text).with_context(|| format!("parsing {}", path.display()))?;
    if file.schema != PRIOR_SCHEMA {
        bail!(
            "{}: schema `{}`, expected `{PRIOR_SCHEMA}`",
            path.display(),
            file.schema
        );
    }
    if file.param_names != PARAM_NAMES {
        bail!(
            "{}: param_names {:?}, expected {:?}",
            path.display(),
            file.param_names,
            PARAM_NAMES
        );
    }
    let parse = |at: &str, map: &BTreeMap<String, Vec<f64>>| -> anyhow::Result<Vec<PriorParams>> {
        let mut priors = Vec::with_capacity(map.len());
        for (column, values) in map {
            let signal: Signal = column.parse().map_err(|_| {
                anyhow::anyhow!("{}: {at}unknown signal `{column}`", path.display())
            })?;
            let prior = PriorParams::from_slice(signal, values).with_context(|| {
                format!(
                    "{}: {at}`{column}` needs {} finite numbers, got {values:?}",
                    path.display(),
                    PARAM_NAMES.len()
                )
            })?;
            priors.push(prior);
        }
        priors.sort_by_key(|p| p.signal);
        Ok(priors)
    };
    let pooled = parse("", &file.priors)?;
    if pooled.is_empty() {
        bail!("{}: no prior in the file", path.display());
    }
    let mut by_sensor = BTreeMap::new();
    for (model, map) in &file.sensor_priors {
        by_sensor.insert(
            model.clone(),
            parse(&format!("sensor_priors.{model}: "), map)?,
        );
    }
    if !by_sensor.is_empty() && file.sensor_column.is_none() {
        bail!(
            "{}: sensor_priors without sensor_column (the participants.csv column naming each participant's sensor model)",
            path.display()
        );
    }
    Ok((
        CohortPriors {
            pooled,
            sensor_column: file.sensor_column,
            by_sensor,
        },
        file.source,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip_and_errors() {
        let dir = std::env::temp_dir().join(format!("plimsoll-prior-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("prior.json");
        let priors = vec![
            PriorParams::initial(Signal::RestingHr),
            PriorParams::initial(Signal::Sleep),
        ];
        write_prior_file(&path, &CohortPriors::pooled(priors.clone()), "test").unwrap();
        let (back, source) = read_prior_file(&path).unwrap();
        let back = back.pooled;
        // serde_json's default float parser may be off by one ulp (its `float_roundtrip`
        // feature is not enabled in this workspace), hence a relative tolerance of 1e-15.
        assert_eq!(back.len(), priors.len());
        for (b, p) in back.iter().zip(&priors) {
            assert_eq!(b.signal, p.signal);
            for (x, y) in b.values.iter().zip(&p.values) {
                assert!((x - y).abs() <= 1e-15 * y.abs().max(1.0), "{x} vs {y}");
            }
        }
        assert_eq!(source, "test");
        let text = std::fs::read_to_string(&path).unwrap();
        std::fs::write(&path, text.replace("resting_hr_bpm", "pulse")).unwrap();
        let err = read_prior_file(&path).unwrap_err().to_string();
        assert!(err.contains("unknown signal `pulse`"), "{err}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
