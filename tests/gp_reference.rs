//! GP engine against an outside reference (scikit-learn's `GaussianProcessRegressor`, values in
//! `reference/sklearn_gp.json`, produced by `reference/gen_sklearn_reference.py`), plus
//! randomised property checks of the public API.
//!
//! To regenerate the reference: `python3 -m venv venv && venv/bin/pip install scikit-learn`,
//! then `venv/bin/python tests/reference/gen_sklearn_reference.py >
//! tests/reference/sklearn_gp.json`. The library versions used are recorded in the JSON and
//! quoted in every failure message.

use nalgebra::{DMatrix, SymmetricEigen};
use plimsoll_device::gp::{
    GpError, GpRegression, Kernel, LbfgsConfig, cholesky_with_jitter, lbfgs,
};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Deserialize;

const REFERENCE_JSON: &str = include_str!("reference/sklearn_gp.json");

/// Relative tolerance against scikit-learn (both sides factorise the same matrix in double
/// precision, so agreement is expected to ~1e-12; 1e-6 leaves room for BLAS differences).
const REL_TOL: f64 = 1e-6;
/// Absolute floor for values near zero (e.g. gradient components close to a stationary point).
const ABS_FLOOR: f64 = 1e-9;

#[derive(Debug, Deserialize)]
struct Reference {
    versions: Versions,
    settings: Settings,
    t_train: Vec<f64>,
    y_train: Vec<f64>,
    t_test: Vec<f64>,
    cases: Vec<Case>,
}

#[derive(Debug, Deserialize)]
struct Versions {
    numpy: String,
    scipy: String,
    #[serde(rename = "scikit-learn")]
    scikit_learn: String,
}

#[derive(Debug, Deserialize)]
struct Settings {
    optimizer: Option<String>,
    normalize_y: bool,
    alpha: f64,
}

#[derive(Debug, Deserialize)]
struct Case {
    name: String,
    sklearn_kernel: String,
    theta_names: Vec<String>,
    theta: Vec<f64>,
    log_marginal_likelihood: f64,
    log_marginal_likelihood_gradient: Vec<f64>,
    predictive_mean: Vec<f64>,
    predictive_std: Vec<f64>,
    /// Maximum-likelihood fit by sklearn's own optimiser (scipy L-BFGS-B) from `theta`.
    fit: Option<Fit>,
}

#[derive(Debug, Deserialize)]
struct Fit {
    theta: Vec<f64>,
    log_marginal_likelihood: f64,
    sklearn_kernel: String,
}

fn reference() -> Reference {
    serde_json::from_str(REFERENCE_JSON).expect("reference/sklearn_gp.json parses")
}

fn close(ours: f64, theirs: f64) -> bool {
    (ours - theirs).abs() <= (REL_TOL * theirs.abs()).max(ABS_FLOOR)
}

/// Our kernel for each reference case (parameters still unset) and, for each of our parameters
/// in `Kernel::params` order, the name of the sklearn `theta` entry it corresponds to.
///
/// Mapping rules: our leaf `X { log_var, log_len }` is sklearn's `C(var) * X(len)`, so its
/// `log_var` is the preceding `ConstantKernel`'s `constant_value`; `White` is `WhiteKernel`;
/// `Periodic` is `C * ExpSineSquared` with `periodicity` fixed. sklearn orders a kernel's own
/// hyperparameters alphabetically (RationalQuadratic: `alpha` before `length_scale`), whereas
/// ours lists `log_len` before `log_alpha`: the `rq_white` case checks that permutation.
fn our_kernel(case: &str) -> (Kernel, Vec<&'static str>) {
    let se = || Kernel::SquaredExp {
        log_var: 0.0,
        log_len: 0.0,
    };
    let white = || Kernel::White { log_var: 0.0 };
    let weekly = || Kernel::Periodic {
        log_var: 0.0,
        log_len: 0.0,
        period_days: 7.0,
    };
    match case {
        "se_white" => (
            Kernel::sum(se(), white()),
            vec![
                "k1__k1__constant_value",
                "k1__k2__length_scale",
                "k2__noise_level",
            ],
        ),
        "matern12_white" => (
            Kernel::sum(
                Kernel::Matern12 {
                    log_var: 0.0,
                    log_len: 0.0,
                },
                white(),
            ),
            vec![
                "k1__k1__constant_value",
                "k1__k2__length_scale",
                "k2__noise_level",
            ],
        ),
        "const_matern32_periodic_white" => (
            Kernel::sum(
                Kernel::sum(
                    Kernel::sum(
                        Kernel::Constant { log_var: 0.0 },
                        Kernel::Matern32 {
                            log_var: 0.0,
                            log_len: 0.0,
                        },
                    ),
                    weekly(),
                ),
                white(),
            ),
            vec![
                "k1__k1__k1__constant_value",
                "k1__k1__k2__k1__constant_value",
                "k1__k1__k2__k2__length_scale",
                "k1__k2__k1__constant_value",
                "k1__k2__k2__length_scale",
                "k2__noise_level",
            ],
        ),
        "rq_white" => (
            Kernel::sum(
                Kernel::RationalQuadratic {
                    log_var: 0.0,
                    log_len: 0.0,
                    log_alpha: 0.0,
                },
                white(),
            ),
            vec![
                "k1__k1__constant_value",
                "k1__k2__length_scale",
                "k1__k2__alpha",
                "k2__noise_level",
            ],
        ),
        "matern52_white" => (
            Kernel::sum(
                Kernel::Matern52 {
                    log_var: 0.0,
                    log_len: 0.0,
                },
                white(),
            ),
            vec![
                "k1__k1__constant_value",
                "k1__k2__length_scale",
                "k2__noise_level",
            ],
        ),
        "locally_periodic_white" => (
            Kernel::sum(
                Kernel::sum(
                    Kernel::Constant { log_var: 0.0 },
                    Kernel::product(se(), weekly()),
                ),
                white(),
            ),
            vec![
                "k1__k1__constant_value",
                "k1__k2__k1__k1__k1__constant_value",
                "k1__k2__k1__k1__k2__length_scale",
                "k1__k2__k1__k2__constant_value",
                "k1__k2__k2__length_scale",
                "k2__noise_level",
            ],
        ),
        other => panic!("reference case {other} has no Rust counterpart"),
    }
}

/// For each of our parameters, the index of the matching entry of sklearn's `theta`; fails
/// unless the mapping is a bijection.
fn theta_permutation(case: &Case, sklearn_names: &[&str]) -> Vec<usize> {
    let perm: Vec<usize> = sklearn_names
        .iter()
        .map(|name| {
            case.theta_names
                .iter()
                .position(|n| n == name)
                .unwrap_or_else(|| panic!("{}: sklearn has no hyperparameter {name}", case.name))
        })
        .collect();
    let mut sorted = perm.clone();
    sorted.sort_unstable();
    assert_eq!(
        sorted,
        (0..case.theta.len()).collect::<Vec<_>>(),
        "{}: parameter mapping to sklearn theta {:?} is not one-to-one",
        case.name,
        case.theta_names
    );
    perm
}

#[test]
fn reference_settings_and_cases_are_as_expected() {
    let r = reference();
    // alpha = 0: sklearn adds nothing to the diagonal beyond WhiteKernel, so the matrices match.
    assert_eq!(r.settings.alpha, 0.0);
    assert!(!r.settings.normalize_y, "sklearn must use a zero mean");
    assert!(
        r.settings.optimizer.is_none(),
        "hyperparameters must not be refitted"
    );
    assert_eq!(r.t_train.len(), r.y_train.len());
    assert!(r.t_train.len() >= 50);
    let names: Vec<&str> = r.cases.iter().map(|c| c.name.as_str()).collect();
    assert_eq!(
        names,
        [
            "se_white",
            "matern12_white",
            "const_matern32_periodic_white",
            "rq_white",
            "matern52_white",
            "locally_periodic_white"
        ]
    );
}

/// Log marginal likelihood and its gradient with respect to log hyperparameters, from
/// `GaussianProcessRegressor.log_marginal_likelihood(theta, eval_gradient=True)` (scikit-learn
/// version in the JSON). Ours is the negative: NLML = -LML, ∇NLML = -∇LML.
#[test]
fn nlml_and_gradient_match_sklearn() {
    let r = reference();
    let source = format!(
        "scikit-learn {} (numpy {}, scipy {})",
        r.versions.scikit_learn, r.versions.numpy, r.versions.scipy
    );
    for case in &r.cases {
        let (mut kernel, sklearn_names) = our_kernel(&case.name);
        let perm = theta_permutation(case, &sklearn_names);
        let params: Vec<f64> = perm.iter().map(|&i| case.theta[i]).collect();
        kernel.set_params(&params);
        let model = GpRegression { kernel, mean: 0.0 };

        let (nlml, grad) = model.nlml_grad(&r.t_train, &r.y_train).unwrap();
        assert!(
            close(nlml, -case.log_marginal_likelihood),
            "{} [{}]: NLML {nlml} vs -LML {} from {source}",
            case.name,
            case.sklearn_kernel,
            -case.log_marginal_likelihood
        );
        assert_eq!(grad.len(), params.len() + 1, "kernel params then the mean");
        for (ours_idx, &sk_idx) in perm.iter().enumerate() {
            let theirs = -case.log_marginal_likelihood_gradient[sk_idx];
            assert!(
                close(grad[ours_idx], theirs),
                "{}: dNLML/d{} = {} vs {theirs} from {source}",
                case.name,
                case.theta_names[sk_idx],
                grad[ours_idx]
            );
        }
    }
}

/// Predictive mean and standard deviation from `GaussianProcessRegressor.predict(X,
/// return_std=True)` (scikit-learn version in the JSON) at days inside both gaps, at a training
/// day and beyond the end. sklearn's std includes the WhiteKernel variance (its `diag` is the
/// noise level), so it is compared with `sqrt(var_obs)`, not with `var_latent`.
#[test]
fn predictions_match_sklearn() {
    let r = reference();
    let source = format!("scikit-learn {}", r.versions.scikit_learn);
    for case in &r.cases {
        let (mut kernel, sklearn_names) = our_kernel(&case.name);
        let perm = theta_permutation(case, &sklearn_names);
        let params: Vec<f64> = perm.iter().map(|&i| case.theta[i]).collect();
        kernel.set_params(&params);
        let model = GpRegression { kernel, mean: 0.0 };
        let pred = model
            .posterior(&r.t_train, &r.y_train)
            .unwrap()
            .predict(&r.t_test);
        for (a, day) in r.t_test.iter().enumerate() {
            assert!(
                close(pred.mean[a], case.predictive_mean[a]),
                "{}: mean at day {day}: {} vs {} from {source}",
                case.name,
                pred.mean[a],
                case.predictive_mean[a]
            );
            let std_obs = pred.var_obs[a].sqrt();
            assert!(
                close(std_obs, case.predictive_std[a]),
                "{}: std at day {day}: {std_obs} vs {} from {source}",
                case.name,
                case.predictive_std[a]
            );
            assert!(pred.var_latent[a] < pred.var_obs[a]);
        }
    }
}

/// Our L-BFGS, started where sklearn's optimiser started, must reach the same maximum of the
/// marginal likelihood as `GaussianProcessRegressor.fit` (scipy L-BFGS-B; scikit-learn version
/// in the JSON; the generator checks the optimum is interior to sklearn's bounds). Tolerance
/// 1e-6 relative on the NLML (both optimisers stop at gradient/decrease tolerances), and 1e-3
/// on each log hyperparameter (a 0.1 % change in the hyperparameter itself).
#[test]
fn lbfgs_fit_reaches_sklearn_optimum() {
    let r = reference();
    let mut n_fits = 0;
    for case in &r.cases {
        let Some(fit) = &case.fit else { continue };
        n_fits += 1;
        let (mut kernel, sklearn_names) = our_kernel(&case.name);
        let perm = theta_permutation(case, &sklearn_names);
        let x0: Vec<f64> = perm.iter().map(|&i| case.theta[i]).collect();
        kernel.set_params(&x0);
        let template = GpRegression { kernel, mean: 0.0 };
        let objective = |x: &[f64]| {
            let mut model = template.clone();
            model.kernel.set_params(x);
            let (value, mut grad) = model.nlml_grad(&r.t_train, &r.y_train)?;
            grad.pop(); // the mean stays at sklearn's 0
            Ok((value, grad))
        };
        let res = lbfgs(objective, &x0, &LbfgsConfig::default()).unwrap();
        let theirs = -fit.log_marginal_likelihood;
        assert!(
            res.converged && (res.f - theirs).abs() <= 1e-6 * theirs.abs(),
            "{}: our optimum {} vs {theirs} ({}) from scikit-learn {}: {res:?}",
            case.name,
            res.f,
            fit.sklearn_kernel,
            r.versions.scikit_learn
        );
        for (ours_idx, &sk_idx) in perm.iter().enumerate() {
            assert!(
                (res.x[ours_idx] - fit.theta[sk_idx]).abs() <= 1e-3,
                "{}: fitted {} = {} vs {} from scikit-learn {}",
                case.name,
                case.theta_names[sk_idx],
                res.x[ours_idx],
                fit.theta[sk_idx],
                r.versions.scikit_learn
            );
        }
    }
    assert_eq!(n_fits, 3, "expected three fitted cases in the reference");
}

/// On the reference data, the analytic gradient (including ∂/∂mean, which sklearn lacks)
/// against central differences, step 1e-5, tolerance 1e-6 relative to max(|g|, 1e-2)
/// (truncation error O(h²) ≈ 1e-10).
#[test]
fn gradient_matches_finite_differences_on_reference_data() {
    let r = reference();
    for case in &r.cases {
        let (mut kernel, sklearn_names) = our_kernel(&case.name);
        let perm = theta_permutation(case, &sklearn_names);
        kernel.set_params(&perm.iter().map(|&i| case.theta[i]).collect::<Vec<_>>());
        let model = GpRegression { kernel, mean: 0.3 };
        let mut x = model.kernel.params();
        x.push(model.mean);
        let (_, grad) = model.nlml_grad(&r.t_train, &r.y_train).unwrap();
        let nlml_at = |x: &[f64]| {
            let mut m = model.clone();
            m.kernel.set_params(&x[..x.len() - 1]);
            m.mean = x[x.len() - 1];
            m.nlml(&r.t_train, &r.y_train).unwrap()
        };
        let h = 1e-5;
        for j in 0..x.len() {
            let (mut plus, mut minus) = (x.clone(), x.clone());
            plus[j] += h;
            minus[j] -= h;
            let fd = (nlml_at(&plus) - nlml_at(&minus)) / (2.0 * h);
            assert!(
                (fd - grad[j]).abs() <= 1e-6 * grad[j].abs().max(1e-2),
                "{} param {j}: analytic {} vs finite difference {fd}",
                case.name,
                grad[j]
            );
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Property checks on random kernels and irregular days (fixed seeds).

fn random_leaf(rng: &mut ChaCha8Rng) -> Kernel {
    let log_var = rng.random_range(-2.0..1.0);
    let log_len = rng.random_range(0.0..3.5);
    match rng.random_range(0..7) {
        0 => Kernel::Constant { log_var },
        1 => Kernel::SquaredExp { log_var, log_len },
        2 => Kernel::Matern12 { log_var, log_len },
        3 => Kernel::Matern32 { log_var, log_len },
        4 => Kernel::Matern52 { log_var, log_len },
        5 => Kernel::RationalQuadratic {
            log_var,
            log_len,
            log_alpha: rng.random_range(-1.0..2.0),
        },
        _ => Kernel::Periodic {
            log_var,
            log_len: rng.random_range(-0.5..1.0),
            period_days: rng.random_range(3.0..30.0),
        },
    }
}

/// A sum or product of two or three random leaves (no noise).
fn random_signal_kernel(rng: &mut ChaCha8Rng) -> Kernel {
    let mut k = random_leaf(rng);
    for _ in 0..rng.random_range(1..3) {
        let leaf = random_leaf(rng);
        k = if rng.random_bool(0.5) {
            Kernel::sum(k, leaf)
        } else {
            Kernel::product(k, leaf)
        };
    }
    k
}

/// Sorted irregular days in [0, 120) with gaps and occasional exact duplicates.
fn random_days(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    let mut t: Vec<f64> = (0..n)
        .map(|_| (rng.random_range(0.0..120.0_f64) * 4.0).round() / 4.0)
        .collect();
    t.sort_by(f64::total_cmp);
    t
}

fn with_noise(signal: Kernel, log_noise: f64) -> Kernel {
    Kernel::sum(signal, Kernel::White { log_var: log_noise })
}

/// A covariance must be symmetric and positive semi-definite (every valid kernel is; sums and
/// products of valid kernels are valid: R&W 2006 §4.2.4). Eigenvalue floor -1e-10·trace
/// allows for rounding.
#[test]
fn random_covariances_are_symmetric_and_psd() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    for _ in 0..40 {
        let kernel = random_signal_kernel(&mut rng);
        let t = random_days(&mut rng, 30);
        let k = kernel.cov(&t);
        assert_eq!(k, k.transpose(), "{kernel:?}");
        let trace = k.trace();
        let min_eig = SymmetricEigen::new(k).eigenvalues.min();
        assert!(
            min_eig >= -1e-10 * trace,
            "{kernel:?}: eigenvalue {min_eig:e}"
        );
        // The cross-covariance of the days with themselves is the covariance without noise.
        let noisy = with_noise(kernel.clone(), -1.0);
        let cross = noisy.cross_cov(&t, &t);
        let expected = noisy.cov(&t) - DMatrix::identity(t.len(), t.len()) * (-1.0f64).exp();
        assert!((cross - expected).abs().max() < 1e-12);
    }
}

/// Posterior variances are non-negative, match the dense formula k** - k*ᵀ K⁻¹ k*
/// (R&W 2006 eq. 2.26, computed here with nalgebra's general inverse; tolerance 1e-8 of the
/// prior variance), and never exceed the prior variance.
#[test]
fn posterior_variance_is_non_negative_and_matches_dense_formula() {
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    for _ in 0..30 {
        let kernel = with_noise(random_signal_kernel(&mut rng), rng.random_range(-6.0..0.0));
        let t = random_days(&mut rng, 25);
        let y: Vec<f64> = t
            .iter()
            .map(|d| (d / 9.0).sin() + rng.random_range(-0.3..0.3))
            .collect();
        let model = GpRegression {
            kernel: kernel.clone(),
            mean: 0.2,
        };
        let t_star: Vec<f64> = (0..40).map(|i| i as f64 * 3.7 - 10.0).collect();
        let pred = model.posterior(&t, &y).unwrap().predict(&t_star);

        let k_inv = kernel.cov(&t).try_inverse().unwrap();
        let k_star = kernel.cross_cov(&t_star, &t);
        let prior = kernel.diag(&t_star, false);
        let noise = kernel.noise_var();
        for a in 0..t_star.len() {
            let ks = k_star.row(a).transpose();
            let dense = prior[a] - (ks.transpose() * &k_inv * &ks)[(0, 0)];
            assert!(
                dense >= -1e-8 * prior[a],
                "{kernel:?}: dense variance {dense:e}"
            );
            assert!(pred.var_latent[a] >= 0.0);
            assert!((pred.var_latent[a] - dense.max(0.0)).abs() <= 1e-8 * prior[a]);
            assert!(pred.var_latent[a] <= prior[a] * (1.0 + 1e-12));
            assert!((pred.var_obs[a] - pred.var_latent[a] - noise).abs() <= 1e-12 * (1.0 + noise));
        }
    }
}

/// Conditioning on more data never increases the posterior variance at a fixed day
/// (for a Gaussian, Var[f | D ∪ {y}] = Var[f | D] - Cov²/Var ≤ Var[f | D]). Observations are
/// added one at a time in random order; slack 1e-10 of the prior variance for rounding.
#[test]
fn posterior_variance_shrinks_as_observations_are_added() {
    let mut rng = ChaCha8Rng::seed_from_u64(13);
    for _ in 0..15 {
        let kernel = with_noise(random_signal_kernel(&mut rng), rng.random_range(-5.0..-0.5));
        let model = GpRegression { kernel, mean: 0.0 };
        let t_all = random_days(&mut rng, 30);
        let mut order: Vec<usize> = (0..t_all.len()).collect();
        for i in (1..order.len()).rev() {
            order.swap(i, rng.random_range(0..=i));
        }
        let t_star = [5.0, 47.5, 60.0, 119.0, 140.0];
        let prior = model.kernel.diag(&t_star, false);
        let mut previous = prior.as_slice().to_vec();
        let mut t = Vec::new();
        for &i in &order {
            t.push(t_all[i]);
            let y = vec![0.0; t.len()];
            let var = model.posterior(&t, &y).unwrap().predict(&t_star).var_latent;
            for a in 0..t_star.len() {
                assert!(
                    var[a] <= previous[a] + 1e-10 * prior[a],
                    "{:?}: variance at day {} rose from {} to {} with {} observations",
                    model.kernel,
                    t_star[a],
                    previous[a],
                    var[a],
                    t.len()
                );
            }
            previous = var;
        }
    }
}

/// Duplicate days without a noise term make K singular (rank 3 of 4); the model still
/// factorises it through jitter, reports the jitter, and predicts the duplicated value.
#[test]
fn duplicate_days_without_noise_use_jitter() {
    let model = GpRegression {
        kernel: Kernel::Matern52 {
            log_var: 0.0,
            log_len: 2.0,
        },
        mean: 0.0,
    };
    let t = [0.0, 5.0, 5.0, 9.0];
    let y = [1.0, 2.0, 2.0, 0.5];
    let post = model.posterior(&t, &y).unwrap();
    assert!(
        post.jitter() > 0.0 && post.jitter() <= 1e-4,
        "jitter {}",
        post.jitter()
    );
    let pred = post.predict(&[5.0]);
    assert!((pred.mean[0] - 2.0).abs() < 1e-3, "{pred:?}");
    assert!(model.nlml_grad(&t, &y).unwrap().0.is_finite());
}

/// A symmetric matrix with eigenvalues 4 and -2 (not a covariance): the error names the
/// largest jitter tried, 1e-4 · mean(diag) = 1e-4.
#[test]
fn indefinite_matrix_error_names_the_jitter() {
    let k = DMatrix::from_row_slice(2, 2, &[1.0, 3.0, 3.0, 1.0]);
    let err = cholesky_with_jitter(k).unwrap_err();
    assert!(
        matches!(err, GpError::NotPositiveDefinite { n: 2, max_jitter } if max_jitter == 1e-4),
        "{err:?}"
    );
    assert!(err.to_string().contains("1e-4"), "{err}");
    // And the model surfaces non-finite inputs rather than factorising garbage.
    let model = GpRegression {
        kernel: Kernel::White { log_var: f64::NAN },
        mean: 0.0,
    };
    assert!(matches!(
        model.nlml(&[0.0], &[1.0]),
        Err(GpError::NonFinite(_))
    ));
}
