//! Benchmark (not a test): throughput of the detector ([`plimsoll_device::detect`]: guarded
//! baseline, window-limited departure test, joint score) in device-years per second, against
//! the plain one-step filter it builds on and the dense per-day refit the filter replaces.
//!
//! ```text
//! cargo run --release -p plimsoll-device --example bench_prospective -- [DEVICE_YEARS] [DENSE_YEARS]
//! ```
//!
//! A device-year is one participant with all six signals over 365 calendar days, drawn from
//! plausible shared priors with realistic gaps: device-off spells (starting with probability
//! 3 % a day, 1–7 days long) remove whole days, and each remaining value is missing with
//! probability 5 % (about 320 observed days per signal). Defaults: 400 device-years for
//! `detect`, 1 for the dense baseline.
//!
//! Reported, one line each and a JSON summary line:
//! - `score_participant` (the new detection, what devices and the evaluation run), single-
//!   threaded, and its ratio against the plain filter below (the named baseline of the same
//!   run);
//! - the plain filter: [`one_step_ahead`] over every signal, single-threaded;
//! - `detect`, single-threaded;
//! - `detect` on all cores (participants split over `std::thread::scope` workers);
//! - the baseline: for each signal and observed day, a dense GP conditioned on all earlier
//!   observed days (`prior.model().posterior(&t[..i], &z[..i]).predict(&[t[i]])`), the direct
//!   way to get the same one-step-ahead predictive, single-threaded, on a smaller sample;
//! - the speed-up of single-threaded `detect` over that baseline, and the largest relative
//!   difference between the filter's and the dense one-step predictive on the baseline sample.

use std::collections::BTreeMap;
use std::time::Instant;

use chrono::{Duration, NaiveDate};
use plimsoll_device::cohort::ParticipantSeries;
use plimsoll_device::detect::joint::Correlation;
use plimsoll_device::detect::{DetectConfig, score_participant};
use plimsoll_device::flags::{FlagConfig, FlagLevel, detect};
use plimsoll_device::prior::PriorParams;
use plimsoll_device::prospective::{DailyFilter, StateSpacePrior, one_step_ahead};
use plimsoll_device::signal::Signal;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::json;

const N_DAYS: i64 = 365;
const SEED: u64 = 20_250_401;

/// Plausible shared priors (standardised units, wire order).
fn priors() -> Vec<PriorParams> {
    let v = |m: f64, t2: f64, f2: f64, lf: f64, w2: f64, lw: f64, n2: f64| {
        [m, t2.ln(), f2.ln(), lf.ln(), w2.ln(), lw.ln(), n2.ln()]
    };
    [
        (
            Signal::RestingHr,
            v(-0.3, 0.55, 0.08, 25.0, 0.01, 1.0, 0.06),
        ),
        (Signal::HrvRmssd, v(0.1, 0.6, 0.1, 20.0, 0.02, 1.0, 0.15)),
        (Signal::Sleep, v(0.0, 0.3, 0.1, 14.0, 0.15, 0.8, 0.6)),
        (
            Signal::SkinTempDelta,
            v(0.0, 0.1, 0.1, 10.0, 0.01, 1.0, 0.3),
        ),
        (Signal::Steps, v(0.1, 0.5, 0.15, 21.0, 0.2, 0.7, 0.5)),
        (Signal::RespRate, v(0.0, 0.5, 0.03, 30.0, 0.005, 1.0, 0.08)),
    ]
    .into_iter()
    .map(|(signal, values)| PriorParams { signal, values })
    .collect()
}

fn simulate(id: usize, priors: &[PriorParams], rng: &mut ChaCha8Rng) -> ParticipantSeries {
    let start = NaiveDate::from_ymd_opt(2024, 1, 1).expect("valid date");
    let mut days = Vec::new();
    let mut d = 0;
    while d < N_DAYS {
        if rng.random::<f64>() < 0.03 {
            d += rng.random_range(1..=7);
            continue;
        }
        days.push(d);
        d += 1;
    }
    let mut values = BTreeMap::new();
    for prior in priors {
        let model = StateSpacePrior::new(prior).expect("valid prior");
        let z = model.sample(&days, rng).expect("increasing days");
        let (centre, scale) = prior.signal.reference();
        let column = z
            .iter()
            .map(|z| (rng.random::<f64>() >= 0.05).then_some(centre + scale * z))
            .collect();
        values.insert(prior.signal, column);
    }
    ParticipantSeries {
        participant: format!("p{id:05}"),
        dates: days.iter().map(|&d| start + Duration::days(d)).collect(),
        values,
    }
}

/// Runs `detect` over every participant; returns the number of flags and of Alert-level flags
/// (so the work is used, and as a sanity check of the calibration).
fn run_detect(
    cohort: &[ParticipantSeries],
    priors: &[PriorParams],
    cfg: &FlagConfig,
) -> (usize, usize) {
    cohort.iter().fold((0, 0), |(n, n_alert), s| {
        let flags = detect(s, priors, cfg).expect("detect").flags;
        let alerts = flags.iter().filter(|f| f.level == FlagLevel::Alert).count();
        (n + flags.len(), n_alert + alerts)
    })
}

/// Runs the detector of `plimsoll_device::detect` over every participant; returns the number
/// of days whose score reached 3 (so the work is used).
fn run_score(cohort: &[ParticipantSeries], priors: &[PriorParams], cfg: &DetectConfig) -> usize {
    let corr = Correlation::identity();
    cohort
        .iter()
        .map(|s| {
            let predictors = priors
                .iter()
                .map(|p| {
                    let model = StateSpacePrior::new(p).expect("valid prior");
                    (p.signal, DailyFilter::new(&model))
                })
                .collect();
            score_participant(s, predictors, &corr, cfg)
                .expect("scores")
                .days
                .iter()
                .filter(|d| d.score.is_some_and(|x| x >= 3.0))
                .count()
        })
        .sum()
}

/// The plain one-step filter over every signal of every participant; returns the number of
/// one-step predictions.
fn run_filter(cohort: &[ParticipantSeries], priors: &[PriorParams]) -> usize {
    cohort
        .iter()
        .map(|s| {
            let origin = s.dates[0];
            priors
                .iter()
                .map(|p| {
                    let (t, y) = s.observations(p.signal, origin);
                    let (centre, scale) = p.signal.reference();
                    let z: Vec<f64> = y.iter().map(|y| (y - centre) / scale).collect();
                    one_step_ahead(p, &t, &z).expect("filter").len()
                })
                .sum::<usize>()
        })
        .sum()
}

fn main() {
    let mut args = std::env::args().skip(1);
    let n_years: usize = args
        .next()
        .map_or(400, |a| a.parse().expect("DEVICE_YEARS"));
    let n_dense: usize = args.next().map_or(1, |a| a.parse().expect("DENSE_YEARS"));
    let priors = priors();
    let cfg = FlagConfig::default();
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    let cohort: Vec<ParticipantSeries> = (0..n_years.max(n_dense))
        .map(|i| simulate(i, &priors, &mut rng))
        .collect();
    let observed: usize = cohort[..n_years]
        .iter()
        .flat_map(|s| s.values.values())
        .map(|c| c.iter().flatten().count())
        .sum();
    println!(
        "{n_years} device-years, {observed} observed signal-days ({:.0} per signal-year)",
        observed as f64 / (n_years * priors.len()) as f64
    );

    // Warm-up (page in code and data).
    run_detect(&cohort[..n_years.min(20)], &priors, &cfg);
    let detect_cfg = DetectConfig::default();
    run_score(&cohort[..n_years.min(20)], &priors, &detect_cfg);

    let t0 = Instant::now();
    let n_high = run_score(&cohort[..n_years], &priors, &detect_cfg);
    let score_s = t0.elapsed().as_secs_f64();
    let score_rate = n_years as f64 / score_s;
    let t0 = Instant::now();
    let n_steps = run_filter(&cohort[..n_years], &priors);
    let filter_s = t0.elapsed().as_secs_f64();
    let filter_rate = n_years as f64 / filter_s;
    println!(
        "score_participant (new detection), 1 thread: {score_s:.3} s, {score_rate:.0} device-years/s ({n_high} days scoring >= 3 on data drawn from the priors)"
    );
    println!(
        "plain one-step filter (baseline), 1 thread: {filter_s:.3} s, {filter_rate:.0} device-years/s ({n_steps} predictions)"
    );
    println!(
        "new detection costs {:.2}x the plain filter's time",
        filter_rate / score_rate
    );
    let n_threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let chunk = n_years.div_ceil(n_threads).max(1);
    let t0 = Instant::now();
    let n_high_par: usize = std::thread::scope(|scope| {
        let handles: Vec<_> = cohort[..n_years]
            .chunks(chunk)
            .map(|part| scope.spawn(|| run_score(part, &priors, &detect_cfg)))
            .collect();
        handles.into_iter().map(|h| h.join().expect("worker")).sum()
    });
    let score_par_s = t0.elapsed().as_secs_f64();
    let score_par_rate = n_years as f64 / score_par_s;
    assert_eq!(n_high, n_high_par);
    println!(
        "score_participant, {n_threads} threads: {score_par_s:.3} s, {score_par_rate:.0} device-years/s (target 2,000)"
    );

    let t0 = Instant::now();
    let (n_flags, n_alerts) = run_detect(&cohort[..n_years], &priors, &cfg);
    let single_s = t0.elapsed().as_secs_f64();
    let single_rate = n_years as f64 / single_s;
    println!(
        "detect, 1 thread:   {single_s:.3} s, {single_rate:.0} device-years/s ({n_flags} flags, {n_alerts} at Alert level, on data drawn from the priors: all false alarms)"
    );

    let t0 = Instant::now();
    let n_flags_par: (usize, usize) = std::thread::scope(|scope| {
        let handles: Vec<_> = cohort[..n_years]
            .chunks(chunk)
            .map(|part| scope.spawn(|| run_detect(part, &priors, &cfg)))
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("worker"))
            .fold((0, 0), |a, b| (a.0 + b.0, a.1 + b.1))
    });
    let par_s = t0.elapsed().as_secs_f64();
    let par_rate = n_years as f64 / par_s;
    assert_eq!((n_flags, n_alerts), n_flags_par);
    println!("detect, {n_threads} threads:  {par_s:.3} s, {par_rate:.0} device-years/s");

    // Baseline: dense refit per day, on n_dense device-years.
    let t0 = Instant::now();
    let mut max_rel_diff: f64 = 0.0;
    let mut dense_steps = Vec::new();
    for series in &cohort[..n_dense] {
        let origin = series.dates[0];
        for prior in &priors {
            let (t, y) = series.observations(prior.signal, origin);
            let (centre, scale) = prior.signal.reference();
            let z: Vec<f64> = y.iter().map(|y| (y - centre) / scale).collect();
            let model = prior.model();
            for i in 0..t.len() {
                let pred = model
                    .posterior(&t[..i], &z[..i])
                    .expect("dense posterior")
                    .predict(&[t[i]]);
                dense_steps.push((pred.mean[0], pred.var_obs[0]));
            }
        }
    }
    let dense_s = t0.elapsed().as_secs_f64();
    let dense_rate = n_dense as f64 / dense_s;
    let mut k = 0;
    for series in &cohort[..n_dense] {
        let origin = series.dates[0];
        for prior in &priors {
            let (t, y) = series.observations(prior.signal, origin);
            let (centre, scale) = prior.signal.reference();
            let z: Vec<f64> = y.iter().map(|y| (y - centre) / scale).collect();
            for step in one_step_ahead(prior, &t, &z).expect("filter") {
                let (m, v) = dense_steps[k];
                k += 1;
                max_rel_diff = max_rel_diff
                    .max((step.mean - m).abs() / m.abs().max(v.sqrt()))
                    .max((step.var_obs - v).abs() / v);
            }
        }
    }
    println!(
        "dense refit per day, 1 thread: {dense_s:.3} s for {n_dense} device-year(s), {dense_rate:.3} device-years/s"
    );
    println!(
        "speed-up of detect (1 thread) over the dense refit: {:.0}x; max relative difference filter vs dense: {max_rel_diff:.1e}",
        single_rate / dense_rate
    );
    println!(
        "{}",
        json!({
            "device_years": n_years,
            "score_single_thread_device_years_per_s": score_rate,
            "score_all_threads_device_years_per_s": score_par_rate,
            "plain_filter_single_thread_device_years_per_s": filter_rate,
            "false_alerts_per_device_year": n_alerts as f64 / n_years as f64,
            "threads": n_threads,
            "detect_single_thread_device_years_per_s": single_rate,
            "detect_all_threads_device_years_per_s": par_rate,
            "dense_refit_device_years": n_dense,
            "dense_refit_device_years_per_s": dense_rate,
            "speedup_single_thread": single_rate / dense_rate,
            "max_rel_diff_filter_vs_dense": max_rel_diff,
        })
    );
}
