//! The detector of `plimsoll_device::detect`: the guarded baseline and departure score against
//! a dense GP refit, the joint score against its closed form, the calibration on scores of a
//! known distribution, and the episode grouping rule on a worked example.

use std::collections::BTreeMap;

use chrono::{Duration, NaiveDate};
use plimsoll_device::cohort::ParticipantSeries;
use plimsoll_device::detect::calibration::{EpisodeHistogram, edges};
use plimsoll_device::detect::episodes::{Grouping, episode_counts, group};
use plimsoll_device::detect::joint::{
    Correlation, JointWeights, N_SIGNALS, TargetPattern, joint_score, signal_index,
};
use plimsoll_device::detect::{DayScore, DetectConfig, score_participant};
use plimsoll_device::flags::FlagLevel;
use plimsoll_device::prior::PriorParams;
use plimsoll_device::prospective::{DailyFilter, StateSpacePrior};
use plimsoll_device::signal::Signal;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use statrs::distribution::{ContinuousCDF, Normal};

fn date(day: i64) -> NaiveDate {
    NaiveDate::from_ymd_opt(2024, 1, 1).expect("valid") + Duration::days(day)
}

/// A resting-HR prior of plausible size (standardised units, wire order).
fn hr_prior() -> PriorParams {
    PriorParams {
        signal: Signal::RestingHr,
        values: [
            -0.3,
            0.55f64.ln(),
            0.08f64.ln(),
            4.0f64.ln(),
            0.01f64.ln(),
            1.0f64.ln(),
            0.06f64.ln(),
        ],
    }
}

/// One participant with resting HR only: a draw from `prior` on days with gaps, plus a step of
/// `step` standardised units on days 40..46.
fn one_signal_series(prior: &PriorParams, seed: u64, step: f64) -> ParticipantSeries {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let days: Vec<i64> = (0..70).filter(|d| ![12, 13, 14, 30].contains(d)).collect();
    let model = StateSpacePrior::new(prior).expect("valid prior");
    let z = model.sample(&days, &mut rng).expect("days increase");
    let (centre, scale) = prior.signal.reference();
    let column = days
        .iter()
        .zip(&z)
        .map(|(&d, &z)| {
            let bump = if (40..46).contains(&d) { step } else { 0.0 };
            Some(centre + scale * (z + bump))
        })
        .collect();
    ParticipantSeries {
        participant: format!("p{seed}"),
        dates: days.iter().map(|&d| date(d)).collect(),
        values: BTreeMap::from([(prior.signal, column)]),
    }
}

/// Detector settings with protection and clipping switched off, so the baseline conditions on
/// every released day and the reference below is a plain dense refit.
fn unprotected(guard_days: usize, scale_prior_days: f64) -> DetectConfig {
    DetectConfig {
        guard_days,
        windows: vec![1, 3, 5],
        scale_prior_days,
        clip_z: 1e9,
        protect_score: f64::MAX,
        ..DetectConfig::default()
    }
}

/// The guarded forecast of every day equals a dense GP posterior (Rasmussen & Williams 2006,
/// Algorithm 2.1, through the project's dense engine, itself checked against scikit-learn in
/// `gp_reference.rs`) conditioned on the observed days at least `guard + 1` days earlier; the
/// personal scale is the conjugate update `√((ν₀ + Σ u²)/(ν₀ + n))` of the released days' raw
/// residuals `u` (Gelman et al., *Bayesian Data Analysis* 3rd ed., §2.6, normal model with
/// known mean); and the day's score is `max_w Σ r / √n` over the windows (one signal, weight
/// +1: the window-limited GLR of Willsky & Jones 1976, IEEE TAC 21:108, for i.i.d. residuals).
#[test]
fn baseline_and_score_match_a_dense_refit() {
    let prior = hr_prior();
    let model = prior.model();
    let (centre, scale) = prior.signal.reference();
    for (guard, nu0) in [(3usize, 14.0), (0, 5.0), (7, 1e12)] {
        let series = one_signal_series(&prior, 11 + guard as u64, 2.0);
        let cfg = unprotected(guard, nu0);
        let filter = DailyFilter::new(&StateSpacePrior::new(&prior).expect("valid"));
        let out = score_participant(
            &series,
            vec![(prior.signal, filter)],
            &Correlation::identity(),
            &cfg,
        )
        .expect("scores");
        let (t, y) = series.observations(prior.signal, series.dates[0]);
        let z: Vec<f64> = y.iter().map(|y| (y - centre) / scale).collect();
        let mut raw = Vec::new();
        let mut residuals = Vec::new();
        for i in 0..t.len() {
            let cut = t
                .iter()
                .take_while(|&&d| d <= t[i] - guard as f64 - 1.0)
                .count();
            let post = model
                .posterior(&t[..cut], &z[..cut])
                .expect("dense posterior");
            let pred = post.predict(&[t[i]]);
            let (m, v) = (pred.mean[0], pred.var_obs[0]);
            let u = (z[i] - m) / v.sqrt();
            let sum_sq: f64 = raw[..cut].iter().map(|u: &f64| u * u).sum();
            let s_p = ((nu0 + sum_sq) / (nu0 + cut as f64)).sqrt();
            raw.push(u);
            residuals.push(u / s_p);
            let got = &out.signal_days[i];
            assert!(
                (got.mean - (centre + scale * m)).abs() < 1e-7 * scale,
                "guard {guard}, day {}: mean {} vs dense {}",
                t[i],
                got.mean,
                centre + scale * m
            );
            assert!(
                (got.sd / (scale * v.sqrt() * s_p) - 1.0).abs() < 1e-7,
                "guard {guard}, day {}: sd {} vs dense {}",
                t[i],
                got.sd,
                scale * v.sqrt() * s_p
            );
        }
        for (i, day) in out.days.iter().enumerate() {
            let reference = cfg
                .windows
                .iter()
                .filter_map(|&w| {
                    let inside: Vec<f64> = (0..=i)
                        .filter(|&k| t[k] > t[i] - w as f64)
                        .map(|k| residuals[k])
                        .collect();
                    (!inside.is_empty())
                        .then(|| inside.iter().sum::<f64>() / (inside.len() as f64).sqrt())
                })
                .fold(f64::NEG_INFINITY, f64::max);
            let got = day.score.expect("every day has the signal");
            assert!(
                (got - reference).abs() < 1e-7,
                "guard {guard}, day {}: score {got} vs reference {reference}",
                t[i]
            );
        }
        // The step of 2 standardised units over days 40..46 is found (power, not only equality).
        let peak = out
            .days
            .iter()
            .filter(|d| (40..46).contains(&(d.date - date(0)).num_days()))
            .filter_map(|d| d.score)
            .fold(f64::NEG_INFINITY, f64::max);
        assert!(peak > 3.0, "guard {guard}: peak score in the step {peak}");
    }
}

/// A protected day never enters the baseline: with a large departure on days 40..46 the
/// forecasts of days 44..50 do not follow it (with protection off they do).
#[test]
fn protected_days_stay_out_of_the_baseline() {
    let prior = hr_prior();
    let series = one_signal_series(&prior, 5, 6.0);
    let run = |protect_score: f64| {
        let cfg = DetectConfig {
            protect_score,
            ..unprotected(3, 14.0)
        };
        let filter = DailyFilter::new(&StateSpacePrior::new(&prior).expect("valid"));
        score_participant(
            &series,
            vec![(prior.signal, filter)],
            &Correlation::identity(),
            &cfg,
        )
        .expect("scores")
    };
    let (protected, open) = (run(3.0), run(f64::MAX));
    let (centre, scale) = prior.signal.reference();
    let level_before = protected
        .signal_days
        .iter()
        .find(|d| d.date == date(40))
        .expect("day 40")
        .mean;
    for day in 46..50 {
        let p = protected.signal_days.iter().find(|d| d.date == date(day));
        let o = open.signal_days.iter().find(|d| d.date == date(day));
        let (Some(p), Some(o)) = (p, o) else { continue };
        // Common practice: the guarded forecast stays near the pre-step level (within 1
        // standardised unit of the 6-unit step) when the step days are protected.
        assert!(
            ((p.mean - level_before) / scale).abs() < 1.0,
            "day {day}: protected forecast {} moved from {level_before}",
            p.mean
        );
        assert!(
            (o.mean - centre) / scale > (p.mean - centre) / scale + 1.0,
            "day {day}: unprotected forecast {} should follow the step above {}",
            o.mean,
            p.mean
        );
    }
}

/// The joint score of two signals with correlation ρ in the direction (+1, −1) is the z-score
/// of their difference, `(x₁ − x₂)/√(2(1 − ρ))` (matched filter `aᵀR⁻¹x/√(aᵀR⁻¹a)`, Kay 1998,
/// *Fundamentals of Statistical Signal Processing II*, §4.3, worked by hand for 2 × 2); the
/// precomputed table gives the same as the direct solve for every subset of signals.
#[test]
fn joint_score_matches_its_closed_form_and_the_table() {
    let hr = signal_index(Signal::RestingHr);
    let hrv = signal_index(Signal::HrvRmssd);
    for rho in [-0.4, 0.0, 0.3, 0.7] {
        let mut m = Correlation::identity().matrix;
        m[hr][hrv] = rho;
        m[hrv][hr] = rho;
        let corr = Correlation::new(m);
        let mut x = [None; N_SIGNALS];
        x[hr] = Some(1.3);
        x[hrv] = Some(-0.4);
        let pattern = TargetPattern::ACUTE_ILLNESS;
        let got = joint_score(&x, &corr, &pattern).expect("pattern signals present");
        let want = (1.3 - -0.4) / (2.0 * (1.0 - rho)).sqrt();
        assert!(
            (got.score - want).abs() < 1e-12,
            "ρ {rho}: {} vs {want}",
            got.score
        );
        let sum: f64 = got.contributions.iter().sum();
        assert!((sum - got.score).abs() < 1e-12);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let mut m = [[0.0; N_SIGNALS]; N_SIGNALS];
    for (j, row) in m.iter_mut().enumerate() {
        for (k, cell) in row.iter_mut().enumerate() {
            *cell = if j == k {
                1.0
            } else {
                rng.random_range(-0.3..0.3)
            };
        }
    }
    let corr = Correlation::new(m);
    let table = JointWeights::new(&corr, &TargetPattern::ACUTE_ILLNESS);
    for mask in 0..1usize << N_SIGNALS {
        let x: [Option<f64>; N_SIGNALS] = std::array::from_fn(|j| {
            (mask & (1 << j) != 0).then(|| rng.sample::<f64, _>(StandardNormal))
        });
        let direct = joint_score(&x, &corr, &TargetPattern::ACUTE_ILLNESS);
        let fast = table.score(&x);
        match (direct, fast) {
            (None, None) => {}
            (Some(a), Some(b)) => {
                assert!((a.score - b.score).abs() < 1e-12, "mask {mask}");
                for j in 0..N_SIGNALS {
                    assert!((a.contributions[j] - b.contributions[j]).abs() < 1e-12);
                }
            }
            (a, b) => panic!("mask {mask}: direct {a:?} vs table {b:?}"),
        }
    }
}

fn day_scores(scores: &[f64]) -> Vec<DayScore> {
    scores
        .iter()
        .enumerate()
        .map(|(i, &s)| DayScore {
            date: date(i as i64),
            score: Some(s),
            mirror: Some(-s),
            window_start: date(i as i64),
            contributions: [0.0; N_SIGNALS],
            departures: [None; N_SIGNALS],
        })
        .collect()
}

/// On i.i.d. N(0, 1) scores with single-day episodes, the calibrated threshold for a budget of
/// 0.3 episodes per participant-month is the grid edge just above the normal quantile
/// `Φ⁻¹(1 − 0.3/30.4375) = 2.33`: P(Z > 2.3) = 0.01072 gives 0.326 per month, P(Z > 2.4) =
/// 0.00820 gives 0.250 (Abramowitz & Stegun 1964, Table 26.1; the same from statrs 0.19's
/// `Normal::cdf`, used below), so the threshold is 2.4 and its rate 0.250 within sampling error.
#[test]
fn calibration_recovers_the_normal_quantile() {
    let mut rng = ChaCha8Rng::seed_from_u64(20_240_101);
    let single = Grouping {
        merge_gap_days: 0,
        max_episode_days: 1,
    };
    let mut total = EpisodeHistogram::default();
    let n_people = 2_000;
    for _ in 0..n_people {
        let scores: Vec<f64> = (0..365).map(|_| rng.sample(StandardNormal)).collect();
        total.merge(&EpisodeHistogram::from_days(&day_scores(&scores), single));
    }
    let normal = Normal::new(0.0, 1.0).expect("valid");
    let c = total.threshold_for(0.3);
    assert!(!c.capped);
    assert!(
        (c.threshold - 2.4).abs() < 1e-9,
        "threshold {}",
        c.threshold
    );
    let expected = (1.0 - normal.cdf(2.4)) * 30.4375;
    // 730,000 days: the rate's binomial relative SD at p = 0.0082 is about 1.2 %; allow 5 %.
    assert!(
        (c.rate / expected - 1.0).abs() < 0.05,
        "rate {} vs {expected}",
        c.rate
    );
    // Every edge's rate against the normal tail (where at least 200 days are expected).
    for (i, &h) in edges().iter().enumerate() {
        let want = (1.0 - normal.cdf(h)) * 30.4375;
        if want * (total.scored_days as f64 / 30.4375) < 200.0 {
            continue;
        }
        assert!(
            (total.rate(i) / want - 1.0).abs() < 0.1,
            "edge {h}: {} vs {want}",
            total.rate(i)
        );
    }
    // Stated odds: the rate of an episode peaking at 3.05 is the rate at edge 3.0.
    let at3 = total.rate_at(3.05);
    let want3 = (1.0 - normal.cdf(3.0)) * 30.4375;
    assert!(
        (at3 / want3 - 1.0).abs() < 0.15,
        "rate at 3: {at3} vs {want3}"
    );
}

/// The grouping rule on a worked example (common practice for alarm grouping; the rule is the
/// module docs' "Episodes"): alarm days 3 days apart join, 4 apart do not, and a persisting
/// alarm is split at 14 days from its first alarm day.
#[test]
fn episodes_group_by_the_stated_rule() {
    let mut scores = vec![0.0; 60];
    for (d, s) in [(2, 2.5), (5, 3.6), (6, 2.6), (10, 2.7)] {
        scores[d] = s;
    }
    for s in scores.iter_mut().take(50).skip(20) {
        *s = 2.6;
    }
    scores[30] = 4.0;
    let days = day_scores(&scores);
    let rule = Grouping {
        merge_gap_days: 3,
        max_episode_days: 14,
    };
    let episodes = group(&days, 2.4, 3.5, rule);
    let spans: Vec<(i64, i64, usize)> = episodes
        .iter()
        .map(|e| {
            (
                (e.first_alarm - date(0)).num_days(),
                (e.last_alarm - date(0)).num_days(),
                e.alarm_days,
            )
        })
        .collect();
    // Days 2, 5, 6 (gaps 3, 1); day 10 (gap 4: new); days 20..49 split at 14 days: 20..33,
    // 34..47, 48..49.
    assert_eq!(
        spans,
        vec![
            (2, 6, 3),
            (10, 10, 1),
            (20, 33, 14),
            (34, 47, 14),
            (48, 49, 2)
        ]
    );
    assert_eq!(episodes[0].level, FlagLevel::Alert);
    assert_eq!(episodes[0].peak, date(5));
    assert_eq!(episodes[1].level, FlagLevel::Watch);
    assert_eq!(episodes[2].peak, date(30));
    // The last scored day (59) is more than the merge gap after day 49: closed.
    assert!(!episodes.iter().any(|e| e.ongoing));
    let counts = episode_counts(&days, &[2.4, 3.5, 5.0], rule);
    assert_eq!(counts, vec![5, 2, 0]);
    // Cut the series on day 50: the last episode is still open.
    let open = group(&days[..51], 2.4, 3.5, rule);
    assert!(open.last().expect("episodes").ongoing);
}

/// `--detector` files: a partial file keeps the other defaults; an unknown key or a wrong type
/// is refused naming the file, line and column; an unusable value names the setting (common
/// practice for configuration errors).
#[test]
fn detector_settings_files_are_read_and_checked() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("detector.toml");
    std::fs::write(&path, "guard_days = 5\nwindows = [1, 2]\n").expect("write");
    let cfg = DetectConfig::from_toml_file(&path).expect("valid settings");
    assert_eq!(cfg.guard_days, 5);
    assert_eq!(cfg.windows, vec![1, 2]);
    assert_eq!(cfg.clip_z, DetectConfig::default().clip_z);

    std::fs::write(&path, "guard_days = 5\ngaurd = 2\n").expect("write");
    let err = format!("{:#}", DetectConfig::from_toml_file(&path).unwrap_err());
    assert!(
        err.contains("detector.toml") && err.contains("line 2"),
        "{err}"
    );
    assert!(err.contains("gaurd"), "{err}");

    std::fs::write(&path, "clip_z = \"high\"\n").expect("write");
    let err = format!("{:#}", DetectConfig::from_toml_file(&path).unwrap_err());
    assert!(err.contains("line 1, column 10"), "{err}");

    std::fs::write(&path, "windows = [0, 3]\n").expect("write");
    let err = format!("{:#}", DetectConfig::from_toml_file(&path).unwrap_err());
    assert!(err.contains("windows"), "{err}");
}
