//! Prospective prediction and flags: the Kalman filter against dense GP refits, its likelihood
//! against the dense NLML, the cold start, and the null calibration of the residuals and flags.

use std::collections::BTreeMap;

use chrono::{Duration, NaiveDate};
use plimsoll_device::cohort::ParticipantSeries;
use plimsoll_device::flags::{
    DayStatus, FlagConfig, FlagKind, FlagLevel, detect, multi_signal_score,
};
use plimsoll_device::prior::PriorParams;
use plimsoll_device::prospective::{
    DailyFilter, StateSpacePrior, filter_nlml, one_step_ahead, tail_probability,
};
use plimsoll_device::signal::Signal;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Wire-order values `[μ0, log τ², log σ_f², log ℓ_f, log σ_w², log ℓ_w, log σ_n²]` from
/// natural-scale numbers.
fn values(mean: f64, tau2: f64, sf2: f64, lf: f64, sw2: f64, lw: f64, sn2: f64) -> [f64; 7] {
    [
        mean,
        tau2.ln(),
        sf2.ln(),
        lf.ln(),
        sw2.ln(),
        lw.ln(),
        sn2.ln(),
    ]
}

/// Plausible shared priors for the six signals (standardised units).
fn cohort_priors() -> Vec<PriorParams> {
    let v = [
        (
            Signal::RestingHr,
            values(-0.3, 0.55, 0.08, 25.0, 0.01, 1.0, 0.06),
        ),
        (
            Signal::HrvRmssd,
            values(0.1, 0.6, 0.1, 20.0, 0.02, 1.0, 0.15),
        ),
        (Signal::Sleep, values(0.0, 0.3, 0.1, 14.0, 0.15, 0.8, 0.6)),
        (
            Signal::SkinTempDelta,
            values(0.0, 0.1, 0.1, 10.0, 0.01, 1.0, 0.3),
        ),
        (Signal::Steps, values(0.1, 0.5, 0.15, 21.0, 0.2, 0.7, 0.5)),
        (
            Signal::RespRate,
            values(0.0, 0.5, 0.03, 30.0, 0.005, 1.0, 0.08),
        ),
    ];
    v.into_iter()
        .map(|(signal, values)| PriorParams { signal, values })
        .collect()
}

/// A participant of `n_days` calendar days drawn from the priors, with realistic gaps:
/// device-off spells (start with probability 3 % a day, 1–7 days long) that remove whole rows,
/// and each remaining cell missing with probability 5 %.
fn simulate_participant(
    id: &str,
    priors: &[PriorParams],
    n_days: i64,
    rng: &mut ChaCha8Rng,
) -> ParticipantSeries {
    let start = NaiveDate::from_ymd_opt(2024, 1, 1).unwrap();
    let mut days = Vec::new();
    let mut d = 0;
    while d < n_days {
        if rng.random::<f64>() < 0.03 {
            d += rng.random_range(1..=7);
            continue;
        }
        days.push(d);
        d += 1;
    }
    let mut values = BTreeMap::new();
    for prior in priors {
        let z = StateSpacePrior::new(prior)
            .unwrap()
            .sample(&days, rng)
            .unwrap();
        let (centre, scale) = prior.signal.reference();
        let column = z
            .iter()
            .map(|z| (rng.random::<f64>() >= 0.05).then_some(centre + scale * z))
            .collect();
        values.insert(prior.signal, column);
    }
    ParticipantSeries {
        participant: id.to_owned(),
        dates: days.iter().map(|&d| start + Duration::days(d)).collect(),
        values,
    }
}

/// Parameter settings for the exactness checks: typical; a short trend and rough weekly
/// rhythm; a long trend, nearly flat weekly profile (near-singular weekly covariance) and
/// small noise; a large between-person variance.
fn settings() -> Vec<PriorParams> {
    [
        values(0.3, 0.4, 0.25, 20.0, 0.08, 0.9, 0.2),
        values(-1.0, 0.2, 0.6, 2.0, 0.3, 0.3, 0.5),
        values(0.0, 0.5, 0.1, 200.0, 0.05, 20.0, 0.01),
        values(2.0, 3.0, 0.05, 7.0, 0.02, 1.5, 0.05),
    ]
    .into_iter()
    .map(|values| PriorParams {
        signal: Signal::RestingHr,
        values,
    })
    .collect()
}

/// Days with gaps (including multi-week ones) and a negative start, and a series drawn from
/// the prior.
fn gappy_series(prior: &PriorParams, seed: u64) -> (Vec<f64>, Vec<f64>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut days = Vec::new();
    let mut d: i64 = -9;
    while days.len() < 90 {
        days.push(d);
        d += match rng.random_range(0..10) {
            0 => rng.random_range(2..5),
            1 if days.len() % 30 == 1 => 17,
            _ => 1,
        };
    }
    let z = StateSpacePrior::new(prior)
        .unwrap()
        .sample(&days, &mut rng)
        .unwrap();
    (days.iter().map(|&d| d as f64).collect(), z)
}

/// The one-step-ahead predictive at every day equals a dense refit on the truncated series
/// (`posterior(t[..i], z[..i]).predict(&[t[i]])`, mean and `var_obs`): tolerance 1e-8
/// relative (mean relative to max(|mean|, predictive SD)).
#[test]
fn one_step_ahead_matches_dense_refit() {
    for (s, prior) in settings().iter().enumerate() {
        let (t, z) = gappy_series(prior, 100 + s as u64);
        let steps = one_step_ahead(prior, &t, &z).unwrap();
        let model = prior.model();
        for i in 0..t.len() {
            let dense = model.posterior(&t[..i], &z[..i]).unwrap().predict(&[t[i]]);
            let (m, v) = (dense.mean[0], dense.var_obs[0]);
            let scale = m.abs().max(v.sqrt());
            assert!(
                (steps[i].mean - m).abs() <= 1e-8 * scale,
                "setting {s}, day {i}: mean {} vs dense {m}",
                steps[i].mean
            );
            assert!(
                (steps[i].var_obs - v).abs() <= 1e-8 * v,
                "setting {s}, day {i}: var {} vs dense {v}",
                steps[i].var_obs
            );
        }
    }
}

/// The prediction-error decomposition equals the dense NLML (R&W 2006 eq. 2.30) to 1e-8
/// relative.
#[test]
fn filter_nlml_equals_dense_nlml() {
    for (s, prior) in settings().iter().enumerate() {
        let (t, z) = gappy_series(prior, 200 + s as u64);
        let filter = filter_nlml(prior, &t, &z).unwrap();
        let dense = prior.model().nlml(&t, &z).unwrap();
        assert!(
            (filter - dense).abs() <= 1e-8 * dense.abs().max(1.0),
            "setting {s}: filter {filter} vs dense {dense}"
        );
    }
}

/// Day one: the prior predictive, mean μ0 and variance τ² + σ_f² + σ_w² + σ_n² (1e-12).
#[test]
fn first_day_is_the_prior_predictive() {
    for prior in settings() {
        let v = prior.values;
        let var = v[1].exp() + v[2].exp() + v[4].exp() + v[6].exp();
        let filter = DailyFilter::new(&StateSpacePrior::new(&prior).unwrap());
        for day in [-3, 0, 41] {
            let p = filter.predict(day).unwrap();
            assert!((p.mean - v[0]).abs() < 1e-12);
            assert!((p.var_obs - var).abs() < 1e-12 * var);
        }
        let steps = one_step_ahead(&prior, &[5.0, 6.0], &[1.0, 2.0]).unwrap();
        assert!((steps[0].mean - v[0]).abs() < 1e-12 && (steps[0].var_obs - var).abs() < 1e-12);
    }
}

/// Cold start on simulated participants: the first 14 observed days say "building baseline"
/// and raise no flag; the day-1 band is the population band (mean μ0, SD of the prior
/// predictive, in signal units); by the 28th observed day the band is narrower for every
/// participant and signal, and on average less than 0.75 of the day-1 width for resting HR
/// (whose between-person SD dominates its prior).
#[test]
fn cold_start_band_is_the_population_band_and_narrows() {
    let priors = cohort_priors();
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let cfg = FlagConfig::default();
    let mut rhr_ratio = Vec::new();
    for p in 0..20 {
        let series = simulate_participant(&format!("p{p}"), &priors, 60, &mut rng);
        let det = detect(&series, &priors, &cfg).unwrap();
        assert!(det.flags.iter().all(|f| {
            f.signal.is_none_or(|s| {
                det.days
                    .iter()
                    .filter(|d| d.signal == s && d.date < f.date)
                    .count()
                    >= 14
            })
        }));
        for prior in &priors {
            let days: Vec<_> = det
                .days
                .iter()
                .filter(|d| d.signal == prior.signal)
                .collect();
            let (centre, scale) = prior.signal.reference();
            let v = prior.values;
            let pop_sd = scale * (v[1].exp() + v[2].exp() + v[4].exp() + v[6].exp()).sqrt();
            assert!((days[0].mean - (centre + scale * v[0])).abs() < 1e-9 * scale);
            assert!((days[0].sd - pop_sd).abs() < 1e-9 * pop_sd);
            assert!(
                (days[0].hi95 - days[0].lo95 - 2.0 * 1.959_963_984_540_054 * pop_sd).abs()
                    < 1e-9 * pop_sd
            );
            assert!(
                days[..14]
                    .iter()
                    .all(|d| d.status == DayStatus::BuildingBaseline)
            );
            assert!(
                days[14..]
                    .iter()
                    .all(|d| d.status != DayStatus::BuildingBaseline)
            );
            assert!(days[27].sd < days[0].sd, "{} p{p}", prior.signal);
            if prior.signal == Signal::RestingHr {
                rhr_ratio.push(days[27].sd / days[0].sd);
            }
        }
    }
    let mean_ratio = rhr_ratio.iter().sum::<f64>() / rhr_ratio.len() as f64;
    assert!(
        mean_ratio < 0.75,
        "resting HR day-28 / day-1 band width {mean_ratio}"
    );
}

/// Under the null (data drawn from the prior itself) the one-step residuals are N(0, 1):
/// 300 participant-years of resting HR with gaps; mean within 4 standard errors of 0,
/// variance within 4 standard errors of 1 (SE of a normal variance ≈ √(2/n)), lag-1
/// correlation within 4/√n of 0, and the 95 % band covers 95 % ± 4 SE.
#[test]
fn null_residuals_are_standard_normal_and_white() {
    let priors = cohort_priors();
    let prior = priors[0];
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    let (mut n, mut s1, mut s2, mut lag, mut covered) = (0usize, 0.0, 0.0, 0.0, 0usize);
    for p in 0..300 {
        let series = simulate_participant(&format!("p{p}"), &[prior], 365, &mut rng);
        let origin = series.dates[0];
        let (t, y) = series.observations(Signal::RestingHr, origin);
        let (centre, scale) = Signal::RestingHr.reference();
        let z: Vec<f64> = y.iter().map(|y| (y - centre) / scale).collect();
        let steps = one_step_ahead(&prior, &t, &z).unwrap();
        let r: Vec<f64> = steps.iter().zip(&z).map(|(s, z)| s.residual(*z)).collect();
        for (i, &x) in r.iter().enumerate() {
            n += 1;
            s1 += x;
            s2 += x * x;
            if i > 0 {
                lag += x * r[i - 1];
            }
            covered += usize::from(tail_probability(x) > 0.05);
        }
    }
    let nf = n as f64;
    let mean = s1 / nf;
    let var = s2 / nf - mean * mean;
    assert!(mean.abs() < 4.0 / nf.sqrt(), "mean {mean}");
    assert!(
        (var - 1.0).abs() < 4.0 * (2.0 / nf).sqrt(),
        "variance {var}"
    );
    assert!((lag / nf).abs() < 4.0 / nf.sqrt(), "lag-1 {}", lag / nf);
    let coverage = covered as f64 / nf;
    assert!(
        (coverage - 0.95).abs() < 4.0 * (0.95 * 0.05 / nf).sqrt(),
        "coverage {coverage}"
    );
}

/// End to end under the null: 150 participant-years of all six signals. The rate of
/// single-day Alerts per scored signal-day and of multi-signal Alerts per scored day are
/// within 4 Poisson SDs (plus 1) of their calibrated rate r = 1/365/13, and the same-day
/// directional score S has mean ≈ 0 and variance ≈ 1 (4 SE).
#[test]
fn null_flag_rates_match_the_calibration() {
    let priors = cohort_priors();
    let cfg = FlagConfig::default();
    let r = cfg.target.unwrap().alert_rate_per_stream();
    let mut rng = ChaCha8Rng::seed_from_u64(13);
    let (mut signal_days, mut single_alerts) = (0usize, 0usize);
    let (mut multi_days, mut multi_alerts) = (0usize, 0usize);
    let (mut s_n, mut s_1, mut s_2) = (0usize, 0.0, 0.0);
    for p in 0..150 {
        let series = simulate_participant(&format!("p{p}"), &priors, 365, &mut rng);
        let det = detect(&series, &priors, &cfg).unwrap();
        signal_days += det
            .days
            .iter()
            .filter(|d| d.status != DayStatus::BuildingBaseline)
            .count();
        single_alerts += det
            .flags
            .iter()
            .filter(|f| f.kind == FlagKind::SingleDay && f.level == FlagLevel::Alert)
            .count();
        multi_alerts += det
            .flags
            .iter()
            .filter(|f| f.kind == FlagKind::MultiSignal && f.level == FlagLevel::Alert)
            .count();
        let mut by_date: BTreeMap<NaiveDate, Vec<(Signal, f64)>> = BTreeMap::new();
        for d in det
            .days
            .iter()
            .filter(|d| d.status != DayStatus::BuildingBaseline)
        {
            by_date.entry(d.date).or_default().push((d.signal, d.z));
        }
        for residuals in by_date.values() {
            let score = multi_signal_score(residuals).unwrap();
            if score.n_directional >= cfg.multi_signal_min_signals {
                multi_days += 1;
                let s = score.directional.unwrap();
                s_n += 1;
                s_1 += s;
                s_2 += s * s;
            }
        }
    }
    let within = |count: usize, expected: f64| {
        (count as f64 - expected).abs() <= 4.0 * expected.sqrt() + 1.0
    };
    let expected_single = r * signal_days as f64;
    assert!(
        within(single_alerts, expected_single),
        "single-day alerts {single_alerts} vs {expected_single:.1}"
    );
    let expected_multi = r * multi_days as f64;
    assert!(
        within(multi_alerts, expected_multi),
        "multi-signal alerts {multi_alerts} vs {expected_multi:.1}"
    );
    let nf = s_n as f64;
    let mean = s_1 / nf;
    let var = s_2 / nf - mean * mean;
    assert!(mean.abs() < 4.0 / nf.sqrt(), "S mean {mean}");
    assert!(
        (var - 1.0).abs() < 4.0 * (2.0 / nf).sqrt(),
        "S variance {var}"
    );
}

/// The multi-signal statistics under their own null (independent N(0, 1) residuals of all six
/// signals): S is N(0, 1) (mean, variance, and the Alert threshold's tail rate) and the
/// chi-square p-value is uniform (P(p < 0.05) = 0.05), each within 4 standard errors, from
/// 400,000 simulated days.
#[test]
fn multi_signal_null_distribution() {
    let cfg = FlagConfig::default();
    let threshold = cfg.multi_signal_score.watch;
    let rate = 1.0 - statrs_normal_cdf(threshold);
    let mut rng = ChaCha8Rng::seed_from_u64(14);
    let n = 400_000;
    let (mut s1, mut s2, mut over, mut small_p) = (0.0, 0.0, 0usize, 0usize);
    let mut residuals: Vec<(Signal, f64)> = Signal::ALL.iter().map(|&s| (s, 0.0)).collect();
    for _ in 0..n {
        for r in residuals.iter_mut() {
            r.1 = rng.sample(StandardNormal);
        }
        let score = multi_signal_score(&residuals).unwrap();
        assert_eq!((score.n_signals, score.n_directional), (6, 4));
        let s = score.directional.unwrap();
        s1 += s;
        s2 += s * s;
        over += usize::from(s >= threshold);
        small_p += usize::from(score.chi_square_p < 0.05);
    }
    let nf = n as f64;
    assert!((s1 / nf).abs() < 4.0 / nf.sqrt());
    assert!((s2 / nf - 1.0).abs() < 4.0 * (2.0 / nf).sqrt());
    let over_rate = over as f64 / nf;
    assert!(
        (over_rate - rate).abs() < 4.0 * (rate / nf).sqrt(),
        "{over_rate} vs {rate}"
    );
    let p_rate = small_p as f64 / nf;
    assert!(
        (p_rate - 0.05).abs() < 4.0 * (0.05 * 0.95 / nf).sqrt(),
        "{p_rate}"
    );
}

/// Φ(x) via the tail function of the filter module (Φ(x) = 1 − tail(x)/2 for x ≥ 0).
fn statrs_normal_cdf(x: f64) -> f64 {
    assert!(x >= 0.0);
    1.0 - tail_probability(x) / 2.0
}
