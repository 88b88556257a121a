//! Benchmark (not a test): hyperparameter fits of one and three device-years with the default
//! kernel (Constant + Matérn-3/2 + Periodic(7 days, fixed) + White, see
//! `plimsoll_device::prior`), timed from two starts, on data it generates and writes for the
//! scikit-learn side of `scripts/bench-gp.sh` to fit too.
//!
//! ```text
//! cargo run --release -p plimsoll-device --example bench_fit -- OUT_DIR [REPEATS]
//! ```
//!
//! Data, for each length `N` in [`LENGTHS`] (365 and 1,095 days): `N` whole days with each day
//! missing independently with probability 8 %, drawn from the default model at the population
//! parameters [`POPULATION`] (standardised units) for a participant whose personal offset is one
//! between-person SD above the population mean. The series is centred by the population mean,
//! which stays fixed (scikit-learn has no fitted constant mean), so both sides fit the same six
//! kernel log hyperparameters on the same numbers with a zero mean. Written to
//! `OUT_DIR/bench_gp_data_N.csv` (`day,y`) and the starts to `OUT_DIR/bench_gp_starts.json`.
//!
//! Starts (log hyperparameters, kernel order):
//! - `generic`: all zeros, i.e. every variance 1 and every length scale 1 — what scikit-learn's
//!   default-constructed kernels start from, and what a device with no prior would use;
//! - `shared_prior`: the population parameters perturbed by ±0.3 in log space (≈ ±35 %),
//!   alternating in sign: what a cohort prior estimated from finitely many other participants
//!   would hand this device. Deliberately not this participant's optimum.
//!
//! A "fit" is what `GaussianProcessRegressor.fit` does: L-BFGS on the NLML from the start, then
//! conditioning once at the optimum. Stopping rules are scipy L-BFGS-B's defaults (memory 10,
//! projected-gradient tolerance 1e-5, relative decrease `ftol = 1e7·ε`), so both optimisers
//! stop at the same tolerances. Two engines of ours: `plimsoll` is the one training uses, the
//! state-space likelihood and gradient of `plimsoll_device::gp_ss` (conditioning = one Kalman
//! filter pass); `plimsoll-dense` is the dense engine (`GpRegression::nlml_grad`, conditioning
//! = `posterior`), shown for reference with fewer repeats at three years. Each fit is repeated
//! and the median wall time reported; one JSON line per (length, start, engine) goes to stdout.

use std::path::PathBuf;
use std::time::Instant;

use plimsoll_device::gp::{
    GpRegression, Kernel, LbfgsConfig, OptimResult, cholesky_with_jitter, lbfgs,
};
use plimsoll_device::gp_ss;
use plimsoll_device::prior::{N_PARAMS, WEEK_DAYS, model_from};
use plimsoll_device::prospective::{DailyFilter, StateSpacePrior, whole_days};
use plimsoll_device::training::{LocalSeries, fit_single};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use serde_json::json;

/// Series lengths in days: one and three device-years.
const LENGTHS: [usize; 2] = [365, 1095];
const MISSING_PROB: f64 = 0.08;
const SEED: u64 = 20_250_101;
const DEFAULT_REPEATS: usize = 25;
/// The dense engine's repeats at three years are `REPEATS / DENSE_3Y_DIVISOR` (at least 1):
/// one dense fit there takes seconds.
const DENSE_3Y_DIVISOR: usize = 5;

/// Population parameters in wire order `[μ0, log τ², log σ_f², log ℓ_f, log σ_w², log ℓ_w,
/// log σ_n²]` (standardised units): between-person SD 0.6, a three-week trend of SD 0.5, a
/// weekly rhythm of SD 0.3 and day-to-day noise SD 0.5.
const POPULATION: [f64; N_PARAMS] = [
    0.0,
    -1.021_651_247_531_981_5, // ln 0.36
    -1.386_294_361_119_890_6, // ln 0.25
    3.044_522_437_723_423,    // ln 21
    -2.407_945_608_651_872,   // ln 0.09
    -0.223_143_551_314_209_7, // ln 0.8
    -1.386_294_361_119_890_6, // ln 0.25
];

/// Perturbation of the shared-prior start, log space, kernel parameters only.
const PRIOR_OFFSET: [f64; N_PARAMS - 1] = [0.3, -0.3, 0.3, -0.3, 0.3, -0.3];

/// scipy's `fmin_l_bfgs_b` defaults as `scipy.optimize.minimize(method="L-BFGS-B")` applies
/// them: `maxcor = 10`, `gtol = 1e-5`, `ftol = factr · ε = 1e7 · 2.22e-16`.
fn scipy_like_config() -> LbfgsConfig {
    LbfgsConfig {
        memory: 10,
        max_iters: 15_000,
        grad_tol: 1e-5,
        f_rel_tol: 1e7 * f64::EPSILON,
    }
}

/// One participant's `n_days`: days with 8 % missing, `z = μ0 + τ + (f + w + ε)(t)`, returned
/// centred by μ0. The one-year series is the one earlier versions of this benchmark used.
fn participant_series(n_days: usize) -> Result<LocalSeries, Box<dyn std::error::Error>> {
    let mut rng = ChaCha8Rng::seed_from_u64(SEED + (n_days / 365 - 1) as u64);
    let t: Vec<f64> = (0..n_days)
        .filter(|_| rng.random::<f64>() >= MISSING_PROB)
        .map(|d| d as f64)
        .collect();
    // The time-varying part f + w + ε is the default model without its Constant term; the
    // personal offset τ is added after the draw.
    let p = &POPULATION;
    let varying = Kernel::sum(
        Kernel::sum(
            Kernel::Matern32 {
                log_var: p[2],
                log_len: p[3],
            },
            Kernel::Periodic {
                log_var: p[4],
                log_len: p[5],
                period_days: WEEK_DAYS,
            },
        ),
        Kernel::White { log_var: p[6] },
    );
    let (chol, _) = cholesky_with_jitter(varying.cov(&t))?;
    let eps = nalgebra::DVector::from_iterator(
        t.len(),
        (0..t.len()).map(|_| rng.sample::<f64, _>(StandardNormal)),
    );
    let draw = chol.l() * eps;
    let offset = (0.5 * POPULATION[1]).exp();
    let z = draw.iter().map(|v| offset + v).collect();
    Ok(LocalSeries { t, z })
}

/// Which of our engines a fit uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Engine {
    /// `gp_ss`: Kalman filter with sensitivity recursions (what training uses).
    StateSpace,
    /// `GpRegression::nlml_grad`: dense Cholesky.
    Dense,
}

impl Engine {
    fn name(self) -> &'static str {
        match self {
            Engine::StateSpace => "plimsoll",
            Engine::Dense => "plimsoll-dense",
        }
    }
}

/// Wire-order parameters for the six kernel log hyperparameters `x` and the fixed zero mean.
fn wire(x: &[f64]) -> [f64; N_PARAMS] {
    let mut values = [0.0; N_PARAMS];
    values[1..].copy_from_slice(x);
    values
}

/// `GaussianProcessRegressor.fit` in our engine: L-BFGS on the NLML over the six kernel log
/// hyperparameters (mean fixed at 0 on centred data), then conditioning at the optimum.
fn fit(
    engine: Engine,
    series: &LocalSeries,
    start: &[f64],
) -> Result<OptimResult, Box<dyn std::error::Error>> {
    match engine {
        Engine::StateSpace => {
            let days = whole_days(&series.t)?;
            let objective = |x: &[f64]| {
                let (value, grad) = gp_ss::nlml_grad(&wire(x), &days, &series.z)?;
                // The mean is fixed, as in scikit-learn.
                Ok((value, grad[1..].to_vec()))
            };
            let result = lbfgs(objective, start, &scipy_like_config())?;
            let mut filter = DailyFilter::new(&StateSpacePrior::from_values(&wire(&result.x))?);
            for (&day, &z) in days.iter().zip(&series.z) {
                filter.update(day, z)?;
            }
            std::hint::black_box(filter);
            Ok(result)
        }
        Engine::Dense => {
            let mut template: GpRegression = model_from(&POPULATION);
            template.mean = 0.0;
            let objective = |x: &[f64]| {
                let mut model = template.clone();
                model.kernel.set_params(x);
                let (value, mut grad) = model.nlml_grad(&series.t, &series.z)?;
                grad.pop(); // the mean is fixed, as in scikit-learn
                Ok((value, grad))
            };
            let result = lbfgs(objective, start, &scipy_like_config())?;
            let mut model = template;
            model.kernel.set_params(&result.x);
            std::hint::black_box(model.posterior(&series.t, &series.z)?);
            Ok(result)
        }
    }
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Runs `f` `repeats` times; returns the median and minimum wall time in ms and the last
/// result.
fn time<T>(
    repeats: usize,
    mut f: impl FnMut() -> Result<T, Box<dyn std::error::Error>>,
) -> Result<(f64, f64, T), Box<dyn std::error::Error>> {
    let mut times = Vec::with_capacity(repeats);
    let mut last = None;
    for _ in 0..repeats {
        let started = Instant::now();
        let out = f()?;
        times.push(started.elapsed().as_secs_f64() * 1e3);
        last = Some(out);
    }
    let min = times.iter().copied().fold(f64::INFINITY, f64::min);
    Ok((median(times), min, last.expect("repeats > 0")))
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let mut args = std::env::args().skip(1);
    let out_dir = args.next().map_or_else(
        || std::env::temp_dir().join("plimsoll-bench-gp"),
        PathBuf::from,
    );
    let repeats: usize = match args.next() {
        Some(r) => r.parse()?,
        None => DEFAULT_REPEATS,
    };
    assert!(repeats > 0, "REPEATS must be positive");
    std::fs::create_dir_all(&out_dir)?;

    let generic = vec![0.0; N_PARAMS - 1];
    let shared_prior: Vec<f64> = POPULATION[1..]
        .iter()
        .zip(PRIOR_OFFSET)
        .map(|(p, o)| p + o)
        .collect();
    let names = model_from(&POPULATION).kernel.param_names();
    std::fs::write(
        out_dir.join("bench_gp_starts.json"),
        serde_json::to_string_pretty(&json!({
            "param_names": names,
            "generic": generic,
            "shared_prior": shared_prior,
        }))?,
    )?;

    for n_days in LENGTHS {
        let series = participant_series(n_days)?;
        let mut csv = String::from("day,y\n");
        for (d, y) in series.t.iter().zip(&series.z) {
            // `{:?}` prints the shortest string that parses back to the same f64.
            csv.push_str(&format!("{d:?},{y:?}\n"));
        }
        let csv_path = out_dir.join(format!("bench_gp_data_{n_days}.csv"));
        std::fs::write(&csv_path, csv)?;
        println!(
            "{}",
            json!({
                "what": "data",
                "n_obs": series.n_days(),
                "n_days": n_days,
                "csv": csv_path,
                "population": POPULATION,
            })
        );

        for (name, start) in [("generic", &generic), ("shared_prior", &shared_prior)] {
            for engine in [Engine::StateSpace, Engine::Dense] {
                let engine_repeats = if engine == Engine::Dense && n_days > 365 {
                    (repeats / DENSE_3Y_DIVISOR).max(1)
                } else {
                    repeats
                };
                let (median_ms, min_ms, res) =
                    time(engine_repeats, || fit(engine, &series, start))?;
                println!(
                    "{}",
                    json!({
                        "what": "fit",
                        "engine": engine.name(),
                        "n_days": n_days,
                        "start": name,
                        "repeats": engine_repeats,
                        "median_ms": median_ms,
                        "min_ms": min_ms,
                        "n_evals": res.n_evals,
                        "iterations": res.iterations,
                        "converged": res.converged,
                        "nlml": res.f,
                        "theta": res.x,
                    })
                );
            }
        }

        // For information: the fit a device actually runs (`training::fit_single`: per-day
        // objective, the mean fitted as a seventh parameter, default tolerances), from the
        // shared prior start with the population mean. Not comparable with scikit-learn's fit.
        let mut start = POPULATION;
        start[1..].copy_from_slice(&shared_prior);
        let (median_ms, min_ms, res) = time(repeats, || {
            Ok(fit_single(&start, &series, 0.0, &LbfgsConfig::default())?)
        })?;
        println!(
            "{}",
            json!({
                "what": "fit_single",
                "engine": "plimsoll",
                "n_days": n_days,
                "start": "shared_prior",
                "repeats": repeats,
                "median_ms": median_ms,
                "min_ms": min_ms,
                "n_evals": res.n_evals,
                "converged": res.converged,
                "nlml": res.f * series.n_days() as f64,
                "params_wire_order": res.x,
            })
        );
    }
    Ok(())
}
