//! The personalised posterior a device computes locally under the shared
//! prior, and its per-day CSV output (mean, 50% and 95% bands).

use std::io::Write;
use std::path::Path;

use chrono::{Duration, NaiveDate};
use statrs::distribution::{ContinuousCDF, Normal};

use crate::cohort::ParticipantSeries;
use crate::gp;
use crate::prior::PriorParams;
use crate::signal::Signal;

/// Posterior summary of one day, in the signal's own units.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DayBand {
    pub date: NaiveDate,
    pub observed: Option<f64>,
    /// Posterior predictive mean of an observation on this day.
    pub mean: f64,
    /// Predictive SD of an observation (latent variance plus day-to-day noise).
    pub sd: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
}

/// Standard-normal quantiles for the central 50% and 95% bands.
fn band_quantiles() -> (f64, f64) {
    let n = Normal::standard();
    (n.inverse_cdf(0.75), n.inverse_cdf(0.975))
}

/// Standardised observations of one signal as `(day index, z)`.
pub fn standardised(
    series: &ParticipantSeries,
    signal: Signal,
    origin: NaiveDate,
) -> (Vec<f64>, Vec<f64>) {
    let (centre, scale) = signal.reference();
    let (t, y) = series.observations(signal, origin);
    (t, y.into_iter().map(|v| (v - centre) / scale).collect())
}

/// Posterior bands for every calendar day from the first to the last date of
/// the series, conditioned on all of the participant's observations of
/// `prior.signal` (a retrospective fit; the prospective, one-step-ahead
/// version is the flagging module's job).
pub fn posterior_bands(
    series: &ParticipantSeries,
    prior: &PriorParams,
) -> gp::Result<Vec<DayBand>> {
    let (Some(&first), Some(&last)) = (series.dates.first(), series.dates.last()) else {
        return Ok(Vec::new());
    };
    let signal = prior.signal;
    let (t, z) = standardised(series, signal, first);
    let model = prior.model();
    let n_days = (last - first).num_days() + 1;
    let t_star: Vec<f64> = (0..n_days).map(|d| d as f64).collect();
    let pred = if t.is_empty() {
        // No data: the prior predictive (population mean, full prior variance).
        let diag = model.kernel.diag(&t_star, true);
        gp::Predictive {
            mean: vec![model.mean; t_star.len()],
            var_latent: diag.iter().map(|v| v - model.kernel.noise_var()).collect(),
            var_obs: diag.iter().copied().collect(),
        }
    } else {
        model.posterior(&t, &z)?.predict(&t_star)
    };
    let observed: std::collections::HashMap<i64, f64> = {
        let (t_obs, y_obs) = series.observations(signal, first);
        t_obs.into_iter().map(|t| t as i64).zip(y_obs).collect()
    };
    let (centre, scale) = signal.reference();
    let (q50, q95) = band_quantiles();
    Ok((0..n_days)
        .map(|d| {
            let i = d as usize;
            let mean = centre + scale * pred.mean[i];
            let sd = scale * pred.var_obs[i].max(0.0).sqrt();
            DayBand {
                date: first + Duration::days(d),
                observed: observed.get(&d).copied(),
                mean,
                sd,
                lo50: mean - q50 * sd,
                hi50: mean + q50 * sd,
                lo95: mean - q95 * sd,
                hi95: mean + q95 * sd,
            }
        })
        .collect())
}

/// Writes `posterior.csv`: `date,signal,observed,mean,sd,lo50,hi50,lo95,hi95`
/// (signal units; `observed` empty on days without a value).
pub fn write_posterior_csv(path: &Path, bands: &[(Signal, Vec<DayBand>)]) -> std::io::Result<()> {
    let mut out = std::io::BufWriter::new(std::fs::File::create(path)?);
    writeln!(out, "date,signal,observed,mean,sd,lo50,hi50,lo95,hi95")?;
    for (signal, days) in bands {
        for b in days {
            let obs = b.observed.map(|v| format!("{v}")).unwrap_or_default();
            writeln!(
                out,
                "{},{},{obs},{:.4},{:.4},{:.4},{:.4},{:.4},{:.4}",
                b.date, signal, b.mean, b.sd, b.lo50, b.hi50, b.lo95, b.hi95
            )?;
        }
    }
    out.flush()
}
