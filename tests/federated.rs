//! Federated training end to end over real gRPC on loopback: the FedAvg prior
//! against the centralised optimum, and personalisation under one prior.

use std::collections::BTreeMap;

use chrono::NaiveDate;
use nalgebra::DVector;
use plimsoll_device::cohort::{Cohort, ParticipantSeries};
use plimsoll_device::demo::run_federated;
use plimsoll_device::gp::{LbfgsConfig, cholesky_with_jitter};
use plimsoll_device::personal::posterior_bands;
use plimsoll_device::prior::{N_PARAMS, PriorParams, model_from};
use plimsoll_device::signal::Signal;
use plimsoll_device::training::{LocalSeries, fit_centralised, pooled_objective};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

use crate::support::study_config;

fn start_date() -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 3, 2).unwrap()
}

/// A cohort of one signal from standardised series (day index → value).
fn cohort_from(signal: Signal, series: &[(Vec<f64>, Vec<f64>)]) -> Cohort {
    let (centre, scale) = signal.reference();
    let participants = series
        .iter()
        .enumerate()
        .map(|(i, (t, z))| {
            let dates: Vec<NaiveDate> = t
                .iter()
                .map(|d| start_date() + chrono::Duration::days(*d as i64))
                .collect();
            let values = z.iter().map(|v| Some(centre + scale * v)).collect();
            ParticipantSeries {
                participant: format!("p{i:03}"),
                dates,
                values: BTreeMap::from([(signal, values)]),
            }
        })
        .collect();
    Cohort {
        participants,
        groups: BTreeMap::new(),
        events: Vec::new(),
        issues: Vec::new(),
    }
}

/// Draws one participant's standardised series from the prior model itself
/// (`z ~ N(μ0, K)`, K including the between-person constant and the noise),
/// on `n_days` with about 10% of days missing at random.
fn draw_series(
    truth: &[f64; N_PARAMS],
    n_days: usize,
    rng: &mut ChaCha8Rng,
) -> (Vec<f64>, Vec<f64>) {
    let t: Vec<f64> = (0..n_days)
        .filter(|_| rng.random::<f64>() > 0.1)
        .map(|d| d as f64)
        .collect();
    let model = model_from(truth);
    let (chol, _) = cholesky_with_jitter(model.kernel.cov(&t)).unwrap();
    let e = DVector::from_iterator(
        t.len(),
        (0..t.len()).map(|_| rng.sample::<f64, _>(StandardNormal)),
    );
    let z = chol.l() * e;
    (t, z.iter().map(|v| v + model.mean).collect())
}

/// Correctness bar of FedAvg (McMahan et al. 2017): on an IID cohort of 100
/// devices × 180 days the federated prior's pooled objective is within 1% of
/// the centralised optimum found by full-batch L-BFGS on the same objective
/// (Nocedal & Wright 2006, Alg. 7.4) in the same engine.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn federated_prior_is_within_one_percent_of_the_centralised_optimum() {
    let signal = Signal::RestingHr;
    // Far from the initial prior on purpose, so the bar measures learning:
    // the starting objective is checked to be well outside 1% below.
    let truth = [
        1.2,
        1.5f64.ln(),
        0.4f64.ln(),
        20.0f64.ln(),
        0.1f64.ln(),
        0.8f64.ln(),
        0.12f64.ln(),
    ];
    let mut rng = ChaCha8Rng::seed_from_u64(20261201);
    let series: Vec<(Vec<f64>, Vec<f64>)> = (0..100)
        .map(|_| draw_series(&truth, 180, &mut rng))
        .collect();
    let local: Vec<LocalSeries> = series
        .iter()
        .map(|(t, z)| LocalSeries {
            t: t.clone(),
            z: z.clone(),
        })
        .collect();

    let start = PriorParams::initial(signal).values;
    let central = fit_centralised(&start, &local, 0.0, &LbfgsConfig::default()).unwrap();
    let (f_start, _) = pooled_objective(&start, &local, 0.0).unwrap();

    // Default local training (plain SGD, 2 steps per round, full series).
    let config = study_config("fed-vs-central", &[signal], 100, 40);
    let dir = tempfile::tempdir().unwrap();
    let run = run_federated(
        &cohort_from(signal, &series),
        config,
        &dir.path().join("agg.db"),
        &dir.path().join("devices"),
        None,
    )
    .await
    .unwrap();
    let fed = &run.history.last().unwrap().params[0].values;
    let (f_fed, _) = pooled_objective(fed, &local, 0.0).unwrap();
    let gap = (f_fed - central.f) / central.f.abs();
    eprintln!(
        "pooled objective (nats/day): start {f_start:.5}, centralised {:.5} ({} evals), federated {f_fed:.5}; relative gap {gap:.2e}",
        central.f, central.n_evals
    );
    assert!(
        (f_start - central.f) / central.f.abs() > 0.05,
        "the initial prior must start far (>5%) from the optimum for the bar to mean anything"
    );
    assert!(
        gap.abs() <= 0.01,
        "federated objective {f_fed} is not within 1% of the centralised {}",
        central.f
    );
    assert_eq!(run.reports.len(), 100);
    assert!(run.reports.iter().all(|r| r.rounds_trained == 40));
}

/// Two devices, `A·sin(t/10)` and `−A·sin(t/10)` plus noise, share one prior.
/// The best single shared mean function is about zero for both, yet each
/// device's personalised posterior mean fits its own data with an RMSE under
/// 1.5× the noise SD.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn one_prior_personalises_to_opposite_series() {
    let signal = Signal::RestingHr;
    let (_, scale) = signal.reference();
    let amplitude = 1.5; // standardised units (15 bpm)
    let noise_sd = 0.3; // standardised units (3 bpm)
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let t: Vec<f64> = (0..180).map(f64::from).collect();
    let series: Vec<(Vec<f64>, Vec<f64>)> = [1.0, -1.0]
        .iter()
        .map(|sign| {
            let z = t
                .iter()
                .map(|d| {
                    sign * amplitude * (d / 10.0).sin()
                        + noise_sd * rng.sample::<f64, _>(StandardNormal)
                })
                .collect();
            (t.clone(), z)
        })
        .collect();
    // The best single mean function for both (least squares) is the pointwise average.
    let shared_best_rms = (t
        .iter()
        .enumerate()
        .map(|(i, _)| ((series[0].1[i] + series[1].1[i]) / 2.0).powi(2))
        .sum::<f64>()
        / t.len() as f64)
        .sqrt();
    assert!(
        shared_best_rms < 0.25 * amplitude,
        "best shared mean RMS {shared_best_rms}"
    );

    let config = study_config("personal", &[signal], 2, 60);
    let dir = tempfile::tempdir().unwrap();
    let cohort = cohort_from(signal, &series);
    let run = run_federated(
        &cohort,
        config,
        &dir.path().join("agg.db"),
        &dir.path().join("devices"),
        None,
    )
    .await
    .unwrap();
    let prior =
        PriorParams::from_slice(signal, &run.history.last().unwrap().params[0].values).unwrap();
    let summary = prior.summary();
    let (centre, _) = signal.reference();
    assert!(
        (summary.population_mean - centre).abs() < 0.5 * amplitude * scale,
        "population mean {} should be near {centre}",
        summary.population_mean
    );
    for (p, participant) in cohort.participants.iter().enumerate() {
        let bands = posterior_bands(participant, &prior).unwrap();
        let sq: Vec<f64> = bands
            .iter()
            .filter_map(|b| b.observed.map(|o| (o - b.mean).powi(2)))
            .collect();
        let rmse = (sq.iter().sum::<f64>() / sq.len() as f64).sqrt();
        eprintln!(
            "participant {p}: posterior-mean RMSE {rmse:.2} bpm (noise SD {:.2} bpm)",
            noise_sd * scale
        );
        assert!(
            rmse < 1.5 * noise_sd * scale,
            "participant {p}: RMSE {rmse}"
        );
        // Without personalisation the population mean misses by about A/√2.
        let pop_sq: Vec<f64> = bands
            .iter()
            .filter_map(|b| b.observed.map(|o| (o - summary.population_mean).powi(2)))
            .collect();
        let pop_rmse = (pop_sq.iter().sum::<f64>() / pop_sq.len() as f64).sqrt();
        assert!(
            pop_rmse > 3.0 * noise_sd * scale,
            "population-only RMSE {pop_rmse}"
        );
    }
}
