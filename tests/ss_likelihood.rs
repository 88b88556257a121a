//! The state-space NLML and its gradient (`plimsoll_device::gp_ss`) against the dense engine
//! and against central differences, on the series shapes a device meets (gaps, late starts, a
//! single day, three years), and the training objectives that use it.
//!
//! Reference for every "dense" value: `prior::model_from(θ).nlml_grad(t, z)`, i.e. Rasmussen &
//! Williams (2006) eq. 2.30 (value) and eq. 5.9 (gradient) on the full covariance, itself
//! checked against scikit-learn 1.9.1 in `tests/gp_reference.rs` and against central
//! differences in `gp::model`'s unit tests.

use plimsoll_device::gp::GpRegression;
use plimsoll_device::gp_ss;
use plimsoll_device::prior::{N_PARAMS, PriorParams, gradient_to_wire, hyperpriors, model_from};
use plimsoll_device::prospective::StateSpacePrior;
use plimsoll_device::signal::Signal;
use plimsoll_device::training::{
    LikelihoodEngine, LocalSeries, likelihood_engine, per_day_objective, pooled_objective,
};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// NLML agreement with the dense engine, relative. Both are exact in real arithmetic; in
/// floating point the dense Cholesky of a ~1000 × 1000 matrix and the filter differ by rounding
/// of order n·ε·cond, ~1e-11 here.
const VALUE_REL_TOL: f64 = 1e-8;
/// Gradient agreement with the dense engine, relative to max(|g|, GRAD_FLOOR · n).
const GRAD_REL_TOL: f64 = 1e-6;
/// Absolute floor per observation for gradient components that are ~0 (the NLML is O(n), so a
/// component below 1e-6 · n is zero for the optimiser).
const GRAD_FLOOR_PER_OBS: f64 = 1e-6;

/// Wire-order values from natural-scale numbers.
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

/// Parameter vectors: the round-1 prior, the benchmark population, the federated test's truth,
/// and two extremes (short trend, long weekly length and little noise; long trend, short
/// weekly length and much noise).
fn parameter_vectors() -> Vec<[f64; N_PARAMS]> {
    vec![
        PriorParams::initial(Signal::RestingHr).values,
        values(0.0, 0.36, 0.25, 21.0, 0.09, 0.8, 0.25),
        values(1.2, 1.5, 0.4, 20.0, 0.1, 0.8, 0.12),
        values(-0.7, 0.2, 0.6, 3.0, 0.05, 4.0, 0.02),
        values(0.4, 0.9, 0.1, 150.0, 0.3, 0.3, 0.8),
    ]
}

/// A named series: whole days as `f64` (the training format) and standardised values drawn from
/// the state-space prior of `truth`.
struct Case {
    name: &'static str,
    t: Vec<f64>,
    z: Vec<f64>,
}

fn draw(name: &'static str, days: Vec<i64>, rng: &mut ChaCha8Rng) -> Case {
    let truth = values(0.5, 0.5, 0.3, 25.0, 0.08, 1.0, 0.2);
    let z = StateSpacePrior::from_values(&truth)
        .unwrap()
        .sample(&days, rng)
        .unwrap();
    Case {
        name,
        t: days.iter().map(|&d| d as f64).collect(),
        z,
    }
}

fn cases() -> Vec<Case> {
    let mut rng = ChaCha8Rng::seed_from_u64(20_260_311);
    // 120 days, ~15 % missing at random plus a 20-day gap (device not worn).
    let gaps: Vec<i64> = (0..120)
        .filter(|d| !(40..60).contains(d))
        .filter(|_| rng.random::<f64>() > 0.15)
        .collect();
    // First observation on day 37 (a late start: the filter starts from the stationary prior
    // at any day, and the weekly slot is day mod 7), then every day but Sundays of slot 3.
    let late: Vec<i64> = (37..130).filter(|d| d % 7 != 3).collect();
    // One device-year and three device-years with 8 % missing.
    let year: Vec<i64> = (0..365).filter(|_| rng.random::<f64>() > 0.08).collect();
    let three_years: Vec<i64> = (0..1095).filter(|_| rng.random::<f64>() > 0.08).collect();
    vec![
        draw("gaps", gaps, &mut rng),
        draw("late start", late, &mut rng),
        draw("single day", vec![12], &mut rng),
        draw("two days a week apart", vec![3, 10], &mut rng),
        draw("one year", year, &mut rng),
        draw("three years", three_years, &mut rng),
    ]
}

fn days_of(t: &[f64]) -> Vec<i64> {
    t.iter().map(|&d| d as i64).collect()
}

/// Dense NLML and wire-order gradient, after checking that the dense engine needed no jitter
/// (with jitter it computes the likelihood of another matrix).
fn dense(values: &[f64; N_PARAMS], t: &[f64], z: &[f64]) -> (f64, [f64; N_PARAMS]) {
    let model: GpRegression = model_from(values);
    assert_eq!(model.posterior(t, z).unwrap().jitter(), 0.0);
    let (value, grad) = model.nlml_grad(t, z).unwrap();
    (value, gradient_to_wire(&grad))
}

/// Source: the dense engine (module docs). Tolerances [`VALUE_REL_TOL`], [`GRAD_REL_TOL`].
#[test]
fn nlml_and_gradient_equal_the_dense_engine() {
    let (mut worst_value, mut worst_grad) = (0.0f64, 0.0f64);
    for case in cases() {
        let days = days_of(&case.t);
        for theta in parameter_vectors() {
            let (dense_value, dense_grad) = dense(&theta, &case.t, &case.z);
            let (value, grad) = gp_ss::nlml_grad(&theta, &days, &case.z).unwrap();
            let rel = (value - dense_value).abs() / dense_value.abs();
            worst_value = worst_value.max(rel);
            assert!(
                rel <= VALUE_REL_TOL,
                "{}: NLML {value} vs dense {dense_value} (rel {rel:e}) at {theta:?}",
                case.name
            );
            let floor = GRAD_FLOOR_PER_OBS * case.t.len() as f64;
            for j in 0..N_PARAMS {
                let err = (grad[j] - dense_grad[j]).abs() / dense_grad[j].abs().max(floor);
                worst_grad = worst_grad.max(err);
                assert!(
                    err <= GRAD_REL_TOL,
                    "{}: ∂NLML/∂θ[{j}] {} vs dense {} (scaled error {err:e}) at {theta:?}",
                    case.name,
                    grad[j],
                    dense_grad[j]
                );
            }
        }
    }
    eprintln!(
        "state space vs dense: worst NLML relative difference {worst_value:.1e}, worst gradient scaled difference {worst_grad:.1e}"
    );
}

/// Source: central differences of the state-space NLML itself (h = 1e-5 in log space;
/// truncation O(h²) ≈ 1e-10 relative, rounding ≈ ε·|NLML|/h ≈ 1e-11·n). Tolerance 1e-6
/// relative to max(|g|, 1e-6·n).
#[test]
fn gradient_matches_central_differences() {
    let h = 1e-5;
    for case in cases().into_iter().filter(|c| c.t.len() <= 400) {
        let days = days_of(&case.t);
        for theta in parameter_vectors().into_iter().take(3) {
            let (_, grad) = gp_ss::nlml_grad(&theta, &days, &case.z).unwrap();
            let floor = GRAD_FLOOR_PER_OBS * case.t.len() as f64;
            for j in 0..N_PARAMS {
                let at = |x: f64| {
                    let mut w = theta;
                    w[j] = x;
                    gp_ss::nlml(&w, &days, &case.z).unwrap()
                };
                let fd = (at(theta[j] + h) - at(theta[j] - h)) / (2.0 * h);
                assert!(
                    (fd - grad[j]).abs() <= 1e-6 * grad[j].abs().max(floor),
                    "{}: ∂NLML/∂θ[{j}] analytic {} vs central difference {fd}",
                    case.name,
                    grad[j]
                );
            }
        }
    }
}

/// Source: the univariate normal density (closed form, from memory): one observation `z` has
/// variance `τ² + σ_f² + σ_w² + σ_n²`, so NLML = ½ ln(2π v) + (z − μ0)² / (2v), and
/// ∂/∂μ0 = −(z − μ0)/v, ∂/∂log x = x · (1/(2v) − (z − μ0)²/(2v²)) for each variance x, and 0
/// for both length scales. Tolerance 1e-13.
#[test]
fn single_day_has_the_closed_form() {
    let theta = values(0.3, 0.4, 0.25, 20.0, 0.08, 0.9, 0.2);
    let z = 1.1;
    let var = 0.4 + 0.25 + 0.08 + 0.2;
    let r = z - 0.3;
    let expected = 0.5 * (2.0 * std::f64::consts::PI * var).ln() + r * r / (2.0 * var);
    let dvar = |x: f64| x * (0.5 / var - r * r / (2.0 * var * var));
    let expected_grad = [
        -r / var,
        dvar(0.4),
        dvar(0.25),
        0.0,
        dvar(0.08),
        0.0,
        dvar(0.2),
    ];
    for day in [0, 5, 400] {
        let (value, grad) = gp_ss::nlml_grad(&theta, &[day], &[z]).unwrap();
        assert!((value - expected).abs() < 1e-13);
        for j in 0..N_PARAMS {
            assert!(
                (grad[j] - expected_grad[j]).abs() < 1e-13,
                "day {day}, θ[{j}]: {} vs {}",
                grad[j],
                expected_grad[j]
            );
        }
    }
}

/// The training objectives use the state-space engine on whole days and the dense one
/// otherwise. Source for the expected values: the definition in `training`'s module docs,
/// `NLML/n + λ Σ −log p_j`, with the dense NLML and the log-normal hyperpriors
/// (`prior::hyperpriors`, Gelman et al. 2013 §2.8); tolerances as above.
#[test]
fn training_objectives_use_the_state_space_engine_on_whole_days() {
    let cases = cases();
    let theta = parameter_vectors()[1];
    let weight = 0.05;
    let expected = |t: &[f64], z: &[f64]| {
        let n = t.len() as f64;
        let (value, grad) = dense(&theta, t, z);
        let mut value = value / n;
        let mut grad: Vec<f64> = grad.iter().map(|g| g / n).collect();
        for (j, prior) in hyperpriors().iter().enumerate() {
            if let Some(p) = prior {
                value += weight * p.neg_log_density(theta[j]);
                grad[j] += weight * p.grad(theta[j]);
            }
        }
        (value, grad)
    };
    let series: Vec<LocalSeries> = cases
        .iter()
        .filter(|c| c.t.len() <= 400)
        .map(|c| LocalSeries {
            t: c.t.clone(),
            z: c.z.clone(),
        })
        .collect();
    for s in &series {
        assert_eq!(likelihood_engine(s), LikelihoodEngine::StateSpace);
        let (value, grad) = per_day_objective(&theta, s, weight).unwrap();
        let (want, want_grad) = expected(&s.t, &s.z);
        assert!((value - want).abs() <= VALUE_REL_TOL * want.abs());
        for j in 0..N_PARAMS {
            assert!((grad[j] - want_grad[j]).abs() <= GRAD_REL_TOL * want_grad[j].abs().max(1e-6));
        }
    }

    // Pooled objective: weights n_k / Σ n, then the hyperprior once.
    let total: f64 = series.iter().map(|s| s.n_days() as f64).sum();
    let (pooled, _) = pooled_objective(&theta, &series, 0.0).unwrap();
    let want: f64 = series
        .iter()
        .map(|s| dense(&theta, &s.t, &s.z).0 / total)
        .sum();
    assert!((pooled - want).abs() <= VALUE_REL_TOL * want.abs());

    // Fractional days (not the daily format) take the dense engine, bit for bit.
    let fractional = LocalSeries {
        t: vec![0.0, 1.5, 3.0, 4.25],
        z: vec![0.1, -0.2, 0.4, 0.0],
    };
    assert_eq!(likelihood_engine(&fractional), LikelihoodEngine::Dense);
    let (value, grad) = per_day_objective(&theta, &fractional, 0.0).unwrap();
    let (dense_value, dense_grad) = dense(&theta, &fractional.t, &fractional.z);
    assert_eq!(value, dense_value / 4.0);
    let dense_grad: Vec<f64> = dense_grad.iter().map(|g| g / 4.0).collect();
    assert_eq!(grad, dense_grad);
    // Unsorted whole days too (the dense likelihood does not depend on the order).
    let unsorted = LocalSeries {
        t: vec![3.0, 1.0, 2.0],
        z: vec![0.1, -0.2, 0.4],
    };
    assert_eq!(likelihood_engine(&unsorted), LikelihoodEngine::Dense);
    assert!(per_day_objective(&theta, &unsorted, 0.0).is_ok());
}
