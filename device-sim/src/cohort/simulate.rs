//! Cohort simulator: generates `daily.csv`, `participants.csv`,
//! `events.csv` and a copy of the effective scenario from a [`Scenario`],
//! one participant at a time (memory does not grow with cohort size).
//!
//! Each participant has its own ChaCha8 stream, `seed_from_u64(seed)` with
//! `set_stream(participant index)`, so output is identical for identical
//! `(scenario, seed)` and participants could be generated in parallel. The
//! model of one signal is documented on [`SignalModel`]; coupling, cycles,
//! missing data, artifacts and events on their scenario types.
//!
//! Event windows written to `events.csv` are exactly the days on which the
//! event changes a signal: its own effect days, plus the following day when
//! it changes sleep on its last day and sleep→RMSSD coupling is on. An
//! illness or stressor is only kept if its whole window fits before the
//! participant's dropout and the end of the study, and it starts at least
//! `min_days_between_events` after the previous one ended, so windows never
//! overlap. Artifacts are written as events too, over the days that carry a
//! spiked or stuck value.

use std::collections::BTreeMap;
use std::f64::consts::PI;
use std::io::Write;
use std::path::{Path, PathBuf};

use chrono::{Datelike, Days, NaiveDate, Weekday};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Poisson, StandardNormal};

use super::scenario::{
    GroupLevel, IllnessModel, SignalModel, StressorModel, StressorShape, ValueScale,
};
use super::writer::{DailyWriter, EventsWriter, NumberFormat, ParticipantsWriter, decimals};
use super::{
    CohortError, DAILY_FILE, EVENTS_FILE, Event, KIND_ARTIFACT_SPIKE, KIND_ARTIFACT_STUCK,
    PARTICIPANTS_FILE, SCENARIO_FILE, Scenario,
};
use crate::signal::Signal;

/// Overrides of the scenario's own seed and size.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct SimulateOptions {
    /// Seed; when neither this nor the scenario sets one, a random seed is
    /// drawn and reported in the summary and in the written scenario.
    pub seed: Option<u64>,
    pub participants: Option<usize>,
    pub days: Option<usize>,
}

/// What was generated, for the command line to print.
#[derive(Debug, Clone, PartialEq)]
pub struct SimulationSummary {
    /// group column -> value -> participants (levels with none included).
    pub participants_per_group: BTreeMap<String, BTreeMap<String, usize>>,
    /// Event kind -> number of events written (artifacts included).
    pub events_by_kind: BTreeMap<String, usize>,
    /// Fraction of the `participants × days` grid without a value for the
    /// signal (absent days, dropout and empty cells all count).
    pub missing_rate: BTreeMap<Signal, f64>,
    pub n_participants: usize,
    pub n_days: usize,
    /// The effective seed.
    pub seed: u64,
}

/// Generates a cohort into `out_dir` (created if needed): `daily.csv`,
/// `participants.csv`, `events.csv` and `scenario.toml` (the scenario with
/// the effective seed, participants and days written in, so that
/// re-simulating it reproduces the same bytes). `on_participant(done, total)`
/// is called after each participant.
pub fn simulate_to_dir(
    scenario: &Scenario,
    opts: &SimulateOptions,
    out_dir: &Path,
    on_participant: &mut dyn FnMut(usize, usize),
) -> Result<SimulationSummary, CohortError> {
    let seed = opts
        .seed
        .or(scenario.seed)
        .unwrap_or_else(|| rand::random::<u64>() >> 1);
    let mut effective = scenario.clone();
    effective.seed = Some(seed);
    if let Some(n) = opts.participants {
        effective.participants = n;
    }
    if let Some(n) = opts.days {
        effective.days = n;
    }
    effective.validate().map_err(|msg| CohortError::Scenario {
        path: PathBuf::from("<options>"),
        msg,
    })?;
    std::fs::create_dir_all(out_dir).map_err(|e| CohortError::io(out_dir, e))?;

    let scenario_path = out_dir.join(SCENARIO_FILE);
    let text = format!(
        "# Effective scenario written by the Plimsoll simulator: simulating it again\n\
         # with this seed reproduces the cohort in this folder byte for byte.\n{}",
        effective.to_toml_string()?
    );
    std::fs::write(&scenario_path, text).map_err(|e| CohortError::io(&scenario_path, e))?;

    let plan = Plan::new(&effective);
    let n = effective.participants;
    let group_columns: Vec<&str> = effective.groups.iter().map(|g| g.column.as_str()).collect();
    let mut daily = DailyWriter::create(
        &out_dir.join(DAILY_FILE),
        &plan.signals,
        NumberFormat::Fixed,
    )?;
    let mut participants =
        ParticipantsWriter::create(&out_dir.join(PARTICIPANTS_FILE), &group_columns)?;
    let mut events = EventsWriter::create(&out_dir.join(EVENTS_FILE))?;

    let mut summary = SimulationSummary {
        participants_per_group: effective
            .groups
            .iter()
            .map(|g| {
                (
                    g.column.clone(),
                    g.levels.iter().map(|l| (l.value.clone(), 0)).collect(),
                )
            })
            .collect(),
        events_by_kind: BTreeMap::new(),
        missing_rate: BTreeMap::new(),
        n_participants: n,
        n_days: effective.days,
        seed,
    };
    let mut written_cells = vec![0u64; plan.signals.len()];
    let mut work = Workspace::new(&plan);
    let width = n.to_string().len().max(4);
    for index in 0..n {
        let id = format!("p{:0width$}", index + 1);
        let levels = simulate_participant(
            &plan,
            seed,
            index,
            &id,
            &mut work,
            &mut daily,
            &mut written_cells,
        )?;
        let values: Vec<&str> = levels
            .iter()
            .zip(&effective.groups)
            .map(|(&level, group)| group.levels[level].value.as_str())
            .collect();
        participants.write_row(&id, &values)?;
        for (group, value) in group_columns.iter().zip(&values) {
            if let Some(count) = summary
                .participants_per_group
                .get_mut(*group)
                .and_then(|m| m.get_mut(*value))
            {
                *count += 1;
            }
        }
        for event in &work.events {
            events.write_event(event)?;
            *summary
                .events_by_kind
                .entry(event.kind.clone())
                .or_default() += 1;
        }
        on_participant(index + 1, n);
    }
    daily
        .finish()?
        .flush()
        .map_err(|e| CohortError::io(&out_dir.join(DAILY_FILE), e))?;
    participants.finish()?;
    events.finish()?;

    let grid = (n * effective.days) as f64;
    for (signal, written) in plan.signals.iter().zip(written_cells) {
        summary
            .missing_rate
            .insert(*signal, 1.0 - written as f64 / grid);
    }
    Ok(summary)
}

/// Everything about a scenario that is the same for every participant.
struct Plan<'a> {
    scenario: &'a Scenario,
    signals: Vec<Signal>,
    models: Vec<&'a SignalModel>,
    n_days: usize,
    dates: Vec<NaiveDate>,
    /// `[signal slot][day]`: weekend plus seasonal term, in model space.
    calendar: Vec<Vec<f64>>,
    /// Per group: cumulative normalised shares.
    cumulative_shares: Vec<Vec<f64>>,
    sleep_slot: Option<usize>,
    rhr_slot: Option<usize>,
    hrv_slot: Option<usize>,
}

impl<'a> Plan<'a> {
    fn new(scenario: &'a Scenario) -> Self {
        let signals = scenario.signals();
        let models: Vec<&SignalModel> = signals
            .iter()
            .map(|s| {
                scenario
                    .signals
                    .get(*s)
                    .expect("scenario.signals() lists set models")
            })
            .collect();
        let n_days = scenario.days;
        let dates: Vec<NaiveDate> = (0..n_days)
            .map(|t| {
                scenario
                    .start_date
                    .checked_add_days(Days::new(t as u64))
                    .expect("date in range")
            })
            .collect();
        let calendar = models
            .iter()
            .map(|m| {
                dates
                    .iter()
                    .map(|date| {
                        let weekend = matches!(date.weekday(), Weekday::Sat | Weekday::Sun);
                        let phase = 2.0
                            * PI
                            * (f64::from(date.ordinal()) - f64::from(m.seasonal_peak_day_of_year))
                            / 365.25;
                        let season = m.seasonal_amplitude * phase.cos();
                        let week = if weekend { m.weekend_effect } else { 0.0 };
                        to_model(m.scale, week) + to_model(m.scale, season)
                    })
                    .collect()
            })
            .collect();
        let cumulative_shares = scenario
            .groups
            .iter()
            .map(|g| {
                let total: f64 = g.levels.iter().map(|l| l.share).sum();
                let mut acc = 0.0;
                g.levels
                    .iter()
                    .map(|l| {
                        acc += l.share / total;
                        acc
                    })
                    .collect()
            })
            .collect();
        let slot = |s: Signal| signals.iter().position(|x| *x == s);
        Plan {
            scenario,
            sleep_slot: slot(Signal::Sleep),
            rhr_slot: slot(Signal::RestingHr),
            hrv_slot: slot(Signal::HrvRmssd),
            signals,
            models,
            n_days,
            dates,
            calendar,
            cumulative_shares,
        }
    }
}

/// An effect in signal units (linear) or as a fraction (log), in model space.
fn to_model(scale: ValueScale, effect: f64) -> f64 {
    match scale {
        ValueScale::Linear => effect,
        // Fractions at or below −1 are rejected by validation; the floor only
        // guards sums of several effects.
        ValueScale::Log => (1.0 + effect).max(0.01).ln(),
    }
}

/// Per-participant buffers reused across participants.
struct Workspace {
    /// `[slot * n_days + day]` event effects, model space.
    event_effect: Vec<f64>,
    /// Luteal intensity in [0, 1] per day.
    luteal: Vec<f64>,
    worn: Vec<bool>,
    /// `[slot * n_days + day]`: 0, or 1 + index into `stuck_runs`.
    stuck: Vec<u32>,
    stuck_runs: Vec<StuckRun>,
    row: Vec<Option<f64>>,
    events: Vec<Event>,
}

#[derive(Clone, Copy)]
struct StuckRun {
    first_written: Option<usize>,
    last_written: usize,
}

impl Workspace {
    fn new(plan: &Plan<'_>) -> Self {
        let cells = plan.signals.len() * plan.n_days;
        Workspace {
            event_effect: vec![0.0; cells],
            luteal: vec![0.0; plan.n_days],
            worn: vec![true; plan.n_days],
            stuck: vec![0; cells],
            stuck_runs: Vec::new(),
            row: vec![None; plan.signals.len()],
            events: Vec::new(),
        }
    }
}

fn normal(rng: &mut ChaCha8Rng) -> f64 {
    rng.sample::<f64, _>(StandardNormal)
}

fn poisson(rng: &mut ChaCha8Rng, mean: f64) -> usize {
    if mean <= 0.0 {
        return 0;
    }
    Poisson::new(mean).map_or(0, |d| d.sample(rng) as usize)
}

fn uniform_days(rng: &mut ChaCha8Rng, range: [u32; 2]) -> usize {
    rng.random_range(range[0]..=range[1]) as usize
}

/// Index of the level drawn from cumulative shares.
fn pick(rng: &mut ChaCha8Rng, cumulative: &[f64]) -> usize {
    let u: f64 = rng.random();
    cumulative
        .iter()
        .position(|c| u < *c)
        .unwrap_or(cumulative.len() - 1)
}

/// Individual parameters of one signal, in model space.
#[derive(Clone, Copy)]
struct Personal {
    baseline: f64,
    trend_per_day: f64,
    bias: f64,
    noise_sd: f64,
    ar_coef: f64,
    ar_innovation_sd: f64,
    missing_alone: f64,
    cycle_effect: f64,
}

/// A candidate illness or stressor for one participant.
struct Planned {
    start: usize,
    end: usize,
    onset: Option<usize>,
    kind: String,
    /// `[(slot, day, effect in model space)]`.
    effects: Vec<(usize, usize, f64)>,
}

/// Generates one participant, writes its daily rows and fills
/// `work.events`. Returns the chosen level of each group.
fn simulate_participant<W: Write>(
    plan: &Plan<'_>,
    seed: u64,
    index: usize,
    id: &str,
    work: &mut Workspace,
    daily: &mut DailyWriter<W>,
    written_cells: &mut [u64],
) -> Result<Vec<usize>, CohortError> {
    let sc = plan.scenario;
    let n_days = plan.n_days;
    let n_signals = plan.signals.len();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(index as u64);

    // Groups, latent fitness and trend.
    let levels: Vec<usize> = plan
        .cumulative_shares
        .iter()
        .map(|c| pick(&mut rng, c))
        .collect();
    let my_levels: Vec<&GroupLevel> = levels
        .iter()
        .zip(&sc.groups)
        .map(|(&l, g)| &g.levels[l])
        .collect();
    let fitness = normal(&mut rng);
    let trend = normal(&mut rng);
    let optical_noise: f64 = my_levels.iter().map(|l| l.optical_noise_scale).product();
    let optical_missing: f64 = my_levels
        .iter()
        .map(|l| l.optical_missing_probability)
        .sum::<f64>()
        .min(1.0);
    let cycle_probability = my_levels
        .iter()
        .filter_map(|l| l.cycle_probability)
        .fold(None, |acc: Option<f64>, p| Some(acc.unwrap_or(1.0) * p))
        .unwrap_or(0.0);
    let has_cycle = sc.menstrual_cycle.is_some() && rng.random::<f64>() < cycle_probability;

    let personal: Vec<Personal> = plan
        .signals
        .iter()
        .zip(&plan.models)
        .map(|(&signal, m)| {
            let rho = m.fitness_correlation;
            let z = rho * fitness + (1.0 - rho * rho).sqrt() * normal(&mut rng);
            let centre = match m.scale {
                ValueScale::Linear => m.mean,
                ValueScale::Log => m.mean.ln(),
            };
            let shift: f64 = my_levels
                .iter()
                .map(|l| to_model(m.scale, l.baseline_shift.or(signal, 0.0)))
                .sum();
            let bias: f64 = my_levels
                .iter()
                .map(|l| to_model(m.scale, l.device_bias.or(signal, 0.0)))
                .sum();
            let device_noise: f64 = my_levels
                .iter()
                .map(|l| l.device_noise_scale.or(signal, 1.0))
                .product();
            let cycle_effect = sc
                .menstrual_cycle
                .as_ref()
                .map_or(0.0, |c| to_model(m.scale, c.luteal_effect.or(signal, 0.0)));
            Personal {
                baseline: centre + shift + m.between_sd * z,
                trend_per_day: to_model(m.scale, (m.fitness_trend_per_year * trend).max(-0.9))
                    / 365.0,
                bias,
                noise_sd: m.noise_sd * device_noise * if m.optical { optical_noise } else { 1.0 },
                ar_coef: m.ar1,
                ar_innovation_sd: (1.0 - m.ar1 * m.ar1).sqrt() * m.day_sd,
                missing_alone: 1.0
                    - (1.0 - sc.missing.single_signal_probability)
                        * (1.0 - if m.optical { optical_missing } else { 0.0 }),
                cycle_effect,
            }
        })
        .collect();

    // Menstrual cycle: luteal intensity per day.
    work.luteal.iter_mut().for_each(|x| *x = 0.0);
    if let (true, Some(cycle)) = (has_cycle, &sc.menstrual_cycle) {
        let draw_length = |rng: &mut ChaCha8Rng| {
            (cycle.length_mean_days + cycle.length_sd_days * normal(rng))
                .round()
                .clamp(f64::from(cycle.luteal_days) + 7.0, 45.0) as usize
        };
        let mut length = draw_length(&mut rng);
        let mut cycle_start = -(rng.random_range(0..length) as i64);
        while cycle_start < n_days as i64 {
            let ovulation = length - cycle.luteal_days as usize;
            let transition = cycle.transition_days as usize;
            for c in ovulation..length {
                let day = cycle_start + c as i64;
                if (0..n_days as i64).contains(&day) {
                    let ramp = ((c - ovulation + 1) as f64 / (transition + 1) as f64).min(1.0);
                    work.luteal[day as usize] = ramp;
                }
            }
            cycle_start += length as i64;
            length = draw_length(&mut rng);
        }
    }

    // Dropout and non-wear gaps.
    let active_days = if rng.random::<f64>() < sc.missing.dropout_probability {
        let earliest = (n_days / 10).max(1).min(n_days);
        rng.random_range(earliest..=n_days)
    } else {
        n_days
    };
    work.worn
        .iter_mut()
        .enumerate()
        .for_each(|(t, w)| *w = t < active_days);
    let years = active_days as f64 / 365.0;
    for _ in 0..poisson(&mut rng, sc.missing.gap_rate_per_year * years) {
        let start = rng.random_range(0..active_days.max(1));
        let length = uniform_days(&mut rng, sc.missing.gap_days);
        work.worn[start..(start + length).min(n_days)]
            .iter_mut()
            .for_each(|w| *w = false);
    }

    // Illnesses and stressors: candidates, then non-overlapping ones kept.
    work.event_effect.iter_mut().for_each(|x| *x = 0.0);
    let mut candidates: Vec<Planned> = Vec::new();
    for illness in &sc.illness {
        for _ in 0..poisson(&mut rng, illness.rate_per_year * years) {
            candidates.push(plan_illness(plan, illness, &mut rng, active_days));
        }
    }
    for stressor in &sc.stressor {
        for _ in 0..poisson(&mut rng, stressor.rate_per_year * years) {
            candidates.push(plan_stressor(plan, stressor, &mut rng, active_days));
        }
    }
    // Sleep changed on an event's last day can move RMSSD the next night
    // through the coupling, so that night is still a day the event changes.
    if let (Some(sleep), Some(_), true) = (
        plan.sleep_slot,
        plan.hrv_slot,
        sc.sleep_coupling.hrv_per_hour_lost != 0.0,
    ) {
        for c in &mut candidates {
            if c.effects
                .iter()
                .any(|&(slot, day, _)| slot == sleep && day == c.end)
            {
                c.end += 1;
            }
        }
    }
    candidates.sort_by_key(|c| c.start);
    work.events.clear();
    let mut free_from = 0usize;
    for candidate in candidates {
        if candidate.start < free_from || candidate.end >= active_days {
            continue;
        }
        free_from = candidate.end + 1 + sc.min_days_between_events as usize;
        for &(slot, day, effect) in &candidate.effects {
            work.event_effect[slot * n_days + day] += effect;
        }
        work.events.push(Event {
            participant: id.to_owned(),
            kind: candidate.kind,
            start: plan.dates[candidate.start],
            end: plan.dates[candidate.end],
            symptom_onset: candidate.onset.map(|d| plan.dates[d]),
        });
    }

    // Stuck runs.
    work.stuck.iter_mut().for_each(|x| *x = 0);
    work.stuck_runs.clear();
    for _ in 0..poisson(&mut rng, sc.artifacts.stuck_rate_per_year * years) {
        let slot = rng.random_range(0..n_signals);
        let start = rng.random_range(0..active_days.max(1));
        let length = uniform_days(&mut rng, sc.artifacts.stuck_days);
        work.stuck_runs.push(StuckRun {
            first_written: None,
            last_written: 0,
        });
        let run = work.stuck_runs.len() as u32;
        for day in start..(start + length).min(n_days) {
            let cell = &mut work.stuck[slot * n_days + day];
            if *cell == 0 {
                *cell = run;
            }
        }
    }

    // Day loop.
    let mut ar: Vec<f64> = plan
        .models
        .iter()
        .map(|m| m.day_sd * normal(&mut rng))
        .collect();
    let mut last_value: Vec<Option<f64>> = vec![None; n_signals];
    let mut previous_deficit = 0.0;
    let coupling = &sc.sleep_coupling;
    let spike = &sc.artifacts;
    for t in 0..active_days {
        for (slot, p) in personal.iter().enumerate() {
            if t > 0 {
                ar[slot] = p.ar_coef * ar[slot] + p.ar_innovation_sd * normal(&mut rng);
            }
        }
        let day_present = work.worn[t] && rng.random::<f64>() >= sc.missing.day_probability;
        let latent = |slot: usize| {
            let p = &personal[slot];
            p.baseline
                + ar[slot]
                + plan.calendar[slot][t]
                + p.trend_per_day * t as f64
                + p.cycle_effect * work.luteal[t]
                + work.event_effect[slot * n_days + t]
        };
        let deficit = plan
            .sleep_slot
            .map_or(0.0, |s| (personal[s].baseline - latent(s)).max(0.0));
        let mut any = false;
        for slot in 0..n_signals {
            let model = plan.models[slot];
            let p = &personal[slot];
            let mut x = latent(slot);
            if Some(slot) == plan.rhr_slot {
                x += coupling.resting_hr_bpm_per_hour_lost * deficit;
            }
            if Some(slot) == plan.hrv_slot {
                let fraction = coupling.hrv_per_hour_lost * previous_deficit;
                x += match model.scale {
                    ValueScale::Log => to_model(ValueScale::Log, fraction),
                    ValueScale::Linear => fraction * p.baseline,
                };
            }
            let mut y = x + p.bias + p.noise_sd * normal(&mut rng);
            let spiked = rng.random::<f64>() < spike.spike_probability;
            if spiked {
                let size =
                    rng.random_range(spike.spike_size_day_sd[0]..=spike.spike_size_day_sd[1]);
                let sign = if rng.random::<bool>() { 1.0 } else { -1.0 };
                y += sign * size * model.day_sd;
            }
            let missing = !day_present || rng.random::<f64>() < p.missing_alone;
            let signal = plan.signals[slot];
            let run = work.stuck[slot * n_days + t];
            // A run repeats the last written value; before any value was
            // written there is nothing to repeat and the day is normal.
            let stuck = run > 0 && last_value[slot].is_some();
            let value = if stuck {
                last_value[slot]
            } else {
                let natural = match model.scale {
                    ValueScale::Linear => y,
                    ValueScale::Log => y.exp(),
                };
                Some(round_clamp(signal, natural))
            };
            work.row[slot] = if missing { None } else { value };
            if let Some(v) = work.row[slot] {
                any = true;
                last_value[slot] = Some(v);
                written_cells[slot] += 1;
                if stuck {
                    let r = &mut work.stuck_runs[run as usize - 1];
                    r.first_written.get_or_insert(t);
                    r.last_written = t;
                } else if spiked {
                    work.events.push(Event {
                        participant: id.to_owned(),
                        kind: KIND_ARTIFACT_SPIKE.to_owned(),
                        start: plan.dates[t],
                        end: plan.dates[t],
                        symptom_onset: None,
                    });
                }
            }
        }
        previous_deficit = deficit;
        if any {
            daily.write_row(id, plan.dates[t], &work.row)?;
        }
    }
    for run in &work.stuck_runs {
        if let Some(first) = run.first_written {
            work.events.push(Event {
                participant: id.to_owned(),
                kind: KIND_ARTIFACT_STUCK.to_owned(),
                start: plan.dates[first],
                end: plan.dates[run.last_written],
                symptom_onset: None,
            });
        }
    }
    work.events
        .sort_by(|a, b| (a.start, a.end, &a.kind).cmp(&(b.start, b.end, &b.kind)));
    Ok(levels)
}

/// Rounds to the written decimals and clamps into the plausible range, so
/// that what is written is exactly what a repeated (stuck) value repeats and
/// the reader accepts every written value.
fn round_clamp(signal: Signal, value: f64) -> f64 {
    let (low, high) = signal.plausible_range();
    let scale = 10_f64.powi(decimals(signal) as i32);
    let rounded = (value.clamp(low, high) * scale).round() / scale;
    rounded.clamp(low, high)
}

/// Draws one illness and its per-day effects.
fn plan_illness(
    plan: &Plan<'_>,
    ill: &IllnessModel,
    rng: &mut ChaCha8Rng,
    active_days: usize,
) -> Planned {
    let start = rng.random_range(0..active_days.max(1));
    let onset = start + uniform_days(rng, ill.presymptomatic_days);
    let peak = onset + uniform_days(rng, ill.peak_after_onset_days);
    let end = peak + uniform_days(rng, ill.recovery_days);
    let fever = (ill.fever_c_mean + ill.fever_c_sd * normal(rng)).clamp(0.1, 3.0);
    let severity = fever / ill.fever_c_mean;
    let mut effects = Vec::new();
    for day in start..=end.min(plan.n_days.saturating_sub(1)) {
        let u = if day <= peak {
            (day - start + 1) as f64 / (peak - start + 1) as f64
        } else {
            1.0 - (day - peak) as f64 / (end - peak + 1) as f64
        };
        for (slot, (&signal, model)) in plan.signals.iter().zip(&plan.models).enumerate() {
            let effect = match signal {
                Signal::RestingHr => ill.resting_hr_bpm_per_fever_c * fever * u,
                Signal::SkinTempDelta => ill.skin_temp_c_per_fever_c * fever * u,
                Signal::Sleep | Signal::Steps if day < onset => 0.0,
                _ => ill.effect_at_peak.or(signal, 0.0) * severity * u,
            };
            if effect != 0.0 {
                effects.push((slot, day, to_model(model.scale, effect)));
            }
        }
    }
    Planned {
        start,
        end,
        onset: Some(onset),
        kind: ill.kind.clone(),
        effects,
    }
}

/// Draws one stressor and its per-day effects.
fn plan_stressor(
    plan: &Plan<'_>,
    st: &StressorModel,
    rng: &mut ChaCha8Rng,
    active_days: usize,
) -> Planned {
    let start = rng.random_range(0..active_days.max(1));
    let length = uniform_days(rng, st.duration_days);
    let end = start + length - 1;
    let size = (1.0 + st.effect_sd_fraction * normal(rng)).max(0.0);
    let mut effects = Vec::new();
    for k in 0..length {
        let day = start + k;
        if day >= plan.n_days {
            break;
        }
        let u = match st.shape {
            StressorShape::Decay => (length - k) as f64 / length as f64,
            StressorShape::Plateau => ((k + 1) as f64 / 3.0).min(1.0),
        };
        for (slot, (&signal, model)) in plan.signals.iter().zip(&plan.models).enumerate() {
            let effect = st.peak_effect.or(signal, 0.0) * size * u;
            if effect != 0.0 {
                effects.push((slot, day, to_model(model.scale, effect)));
            }
        }
    }
    Planned {
        start,
        end,
        onset: None,
        kind: st.kind.clone(),
        effects,
    }
}
