//! Flag packets: what a device shares about one episode, built from plain
//! data the device already has (the episode, its per-day rows and the shared
//! prior), and their `plimsoll.v1` form.
//!
//! # What leaves a device
//!
//! Only when the participant consented at enrolment (`consent_share_flags`),
//! and only one packet per episode along the study's pattern at or above the
//! study's review level (Alert unless the study says Watch), sent again under
//! the same episode key as the episode grows (the aggregator keeps the
//! latest version). Each holds exactly:
//!
//! - the episode: its key (`ep-<first alarm day>`), start, end so far,
//!   whether it is ongoing, peak day and peak score, the first day of the
//!   peak's window, its number of alarm days, its highest level, its
//!   direction (the study's pattern), each involved signal's direction,
//!   window departure and share of the score, and the plain-language reason
//!   (with the study's odds);
//! - the window: the [`WINDOW_DAYS_BEFORE`] days before the episode's start
//!   through the last day the device has scored (at most
//!   [`MAX_WINDOW_DAYS`] days);
//! - for the involved signals first, then each of the participant's other
//!   signals that has a shared prior, over that window: per observed day the
//!   date, the measured value, the personal baseline's predictive mean and
//!   SD, the 50% and 95% band edges, the scaled residual `z`, its two-sided
//!   tail probability, whether the day entered the personal baseline, and
//!   whether it was scored or an alarm day (days without a measurement have
//!   no row); and one population-only band per signal, computed from the
//!   shared prior alone;
//! - with the request: the study id and the device id the aggregator
//!   assigned at enrolment (which it links to the pseudonymous label).
//!
//! Nothing else: no day outside the window, no personal model parameters,
//! no timestamps finer than a date, no name or other identifier, no episode
//! in the opposite direction. Without consent nothing is sent
//! ([`crate::client::FlagSender`] cannot be made) and the aggregator refuses
//! packets from the device anyway.
//!
//! Besides packets and training updates, every device sends for the
//! detector's calibration ([`crate::client::calibrate_detection`]) the sums
//! of same-day residual cross-products and pair counts (6×6), and the
//! episode counts on a fixed 150-threshold grid with the number of scored
//! days: never a daily value or a score.

use std::collections::BTreeMap;

use anyhow::{Context, bail};
use chrono::NaiveDate;
use plimsoll_proto::v1 as pb;

use crate::episode_flags::{EpisodeDirection, EpisodeFlag, SignalDirection};
use crate::flags::FlagLevel;
use crate::prior::PriorParams;
use crate::signal::Signal;

/// Days of context before the flagged stretch.
pub const WINDOW_DAYS_BEFORE: i64 = 28;

/// Longest window the aggregator accepts, in days (inclusive).
pub const MAX_WINDOW_DAYS: i64 = 120;

/// Standard-normal quantiles of the central 50% and 95% bands.
const Z50: f64 = 0.674_489_750_196_081_7;
const Z95: f64 = 1.959_963_984_540_054;

/// How a day entered the prospective scoring.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PacketDayStatus {
    BuildingBaseline,
    Normal,
    Flagged,
}

/// One scored, observed day of one signal (signal units).
#[derive(Debug, Clone, PartialEq)]
pub struct DayRow {
    pub signal: Signal,
    pub date: NaiveDate,
    pub observed: f64,
    pub mean: f64,
    pub sd: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
    pub z: f64,
    pub tail_p: f64,
    pub conditioned: bool,
    pub status: PacketDayStatus,
}

/// The population-only band of a signal (signal units).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PopulationBand {
    pub mean: f64,
    pub lo50: f64,
    pub hi50: f64,
    pub lo95: f64,
    pub hi95: f64,
}

/// A packet ready to send.
#[derive(Debug, Clone, PartialEq)]
pub struct FlagPacket {
    pub flag: EpisodeFlag,
    pub window_start: NaiveDate,
    pub window_end: NaiveDate,
    /// The involved signals first (in the episode's order), then the others
    /// in [`Signal::ALL`] order.
    pub signals: Vec<(Signal, PopulationBand, Vec<DayRow>)>,
}

/// The band the shared prior alone gives any day of a participant with no
/// history. The prior's marginal is stationary (see [`crate::prior`]):
///
/// ```text
/// y ~ N(μ0, s²)   with   s² = τ² + σ_f² + σ_w² + σ_n²    (signal units)
/// band_q = μ0 ± z_q · s,   z_50 = 0.6745, z_95 = 1.9600
/// ```
///
/// (Matérn and periodic kernels both equal their variance at lag 0.)
pub fn population_band(prior: &PriorParams) -> PopulationBand {
    let s = prior.summary();
    let sd = (s.between_sd.powi(2)
        + s.trend_sd.powi(2)
        + s.weekly_amplitude.powi(2)
        + s.noise_sd.powi(2))
    .sqrt();
    let m = s.population_mean;
    PopulationBand {
        mean: m,
        lo50: m - Z50 * sd,
        hi50: m + Z50 * sd,
        lo95: m - Z95 * sd,
        hi95: m + Z95 * sd,
    }
}

/// Builds the packet for the target episode `flag` from the participant's
/// scored rows (any order, any signals) and the shared priors.
///
/// The window runs from [`WINDOW_DAYS_BEFORE`] days before the episode's
/// start to the last scored day, cut to [`MAX_WINDOW_DAYS`]. Signals
/// without a prior, and rows outside the window, are left out.
pub fn build_packet(
    flag: &EpisodeFlag,
    rows: &[DayRow],
    priors: &[PriorParams],
) -> anyhow::Result<FlagPacket> {
    if flag.direction != EpisodeDirection::Target {
        bail!(
            "episode {} is in the opposite direction: recorded only, never sent",
            flag.key
        );
    }
    if flag.start > flag.end || flag.peak < flag.start || flag.peak > flag.end {
        bail!(
            "episode days out of order: start {} peak {} end {}",
            flag.start,
            flag.peak,
            flag.end
        );
    }
    let window_start =
        flag.start.min(flag.peak_window_start) - chrono::Duration::days(WINDOW_DAYS_BEFORE);
    let latest = rows.iter().map(|r| r.date).max().unwrap_or(flag.end);
    let window_end = latest
        .max(flag.end)
        .min(window_start + chrono::Duration::days(MAX_WINDOW_DAYS - 1));
    if flag.end > window_end {
        bail!(
            "the episode ({} to {}) is longer than a {MAX_WINDOW_DAYS}-day window allows",
            flag.start,
            flag.end
        );
    }
    let mut by_signal: BTreeMap<Signal, Vec<DayRow>> = BTreeMap::new();
    for r in rows {
        if r.date >= window_start && r.date <= window_end {
            by_signal.entry(r.signal).or_default().push(r.clone());
        }
    }
    let involved: Vec<Signal> = flag.involved.iter().map(|d| d.signal).collect();
    let mut order = involved.clone();
    order.extend(
        Signal::ALL
            .iter()
            .copied()
            .filter(|s| !involved.contains(s)),
    );
    let mut signals = Vec::new();
    for signal in order {
        let Some(prior) = priors.iter().find(|p| p.signal == signal) else {
            if involved.contains(&signal) {
                bail!("no shared prior for the involved signal {signal}");
            }
            continue;
        };
        let mut days = by_signal.remove(&signal).unwrap_or_default();
        if days.is_empty() && !involved.contains(&signal) {
            continue;
        }
        days.sort_by_key(|d| d.date);
        days.dedup_by_key(|d| d.date);
        signals.push((signal, population_band(prior), days));
    }
    if signals.is_empty() {
        bail!("no signal with a shared prior has a day in the window");
    }
    Ok(FlagPacket {
        flag: flag.clone(),
        window_start,
        window_end,
        signals,
    })
}

/// The packet as a `plimsoll.v1` message.
pub fn to_pb(packet: &FlagPacket) -> pb::FlagPacket {
    let f = &packet.flag;
    pb::FlagPacket {
        signal: String::new(),
        kind: pb::FlagKind::Episode as i32,
        level: match f.level {
            FlagLevel::Watch => pb::FlagLevel::Watch,
            FlagLevel::Alert => pb::FlagLevel::Alert,
        } as i32,
        first_day: f.start.to_string(),
        last_day: f.end.to_string(),
        date: f.peak.to_string(),
        score: f.peak_score,
        reason: f.reason.clone(),
        window_start: packet.window_start.to_string(),
        window_end: packet.window_end.to_string(),
        signals: packet
            .signals
            .iter()
            .map(|(signal, band, days)| pb::SignalWindow {
                signal: signal.column().to_owned(),
                population: Some(pb::PopulationBand {
                    mean: band.mean,
                    lo50: band.lo50,
                    hi50: band.hi50,
                    lo95: band.lo95,
                    hi95: band.hi95,
                }),
                days: days.iter().map(day_to_pb).collect(),
            })
            .collect(),
        episode_key: f.key.clone(),
        ongoing: f.ongoing,
        direction: match f.direction {
            EpisodeDirection::Target => pb::PatternDirection::Target,
            EpisodeDirection::Mirror => pb::PatternDirection::Mirror,
        } as i32,
        involved: f
            .involved
            .iter()
            .map(|d| pb::SignalDeparture {
                signal: d.signal.column().to_owned(),
                direction: match d.direction {
                    SignalDirection::Up => pb::SignalDirection::Up,
                    SignalDirection::Down => pb::SignalDirection::Down,
                } as i32,
                departure: d.departure,
                contribution: d.contribution,
            })
            .collect(),
        peak_window_start: f.peak_window_start.to_string(),
        alarm_days: u32::try_from(f.alarm_days).unwrap_or(u32::MAX),
    }
}

fn day_to_pb(d: &DayRow) -> pb::WindowDay {
    pb::WindowDay {
        date: d.date.to_string(),
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
        status: match d.status {
            PacketDayStatus::BuildingBaseline => pb::DayStatus::BuildingBaseline,
            PacketDayStatus::Normal => pb::DayStatus::Normal,
            PacketDayStatus::Flagged => pb::DayStatus::Flagged,
        } as i32,
    }
}

/// Checks a packet is within what the aggregator accepts before sending it.
pub fn check(packet: &FlagPacket) -> anyhow::Result<()> {
    let days = (packet.window_end - packet.window_start).num_days() + 1;
    if days > MAX_WINDOW_DAYS {
        bail!("window of {days} days exceeds {MAX_WINDOW_DAYS}");
    }
    for (signal, _, rows) in &packet.signals {
        for r in rows {
            let values = [
                r.observed, r.mean, r.sd, r.lo50, r.hi50, r.lo95, r.hi95, r.z,
            ];
            if values.iter().any(|v| !v.is_finite()) {
                return Err(anyhow::anyhow!("non-finite value"))
                    .with_context(|| format!("{signal} on {}", r.date));
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn population_band_adds_the_component_variances() {
        // Hand computation: resting HR, centre 65, scale 10; every log
        // variance ln 0.25 → each SD 5 bpm, total SD = sqrt(4 · 25) = 10 bpm;
        // mean_z 0 → μ0 = 65; 95% band 65 ± 19.6.
        let mut p = PriorParams::initial(Signal::RestingHr);
        p.values[0] = 0.0;
        for i in [1, 2, 4, 6] {
            p.values[i] = 0.25f64.ln();
        }
        let b = population_band(&p);
        assert!((b.mean - 65.0).abs() < 1e-12);
        assert!((b.hi95 - (65.0 + 19.599_639_845_400_54)).abs() < 1e-9);
        assert!((b.lo50 - (65.0 - 6.744_897_501_960_817)).abs() < 1e-9);
    }
}
