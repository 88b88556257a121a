//! The two-sided tabular CUSUM of `plimsoll_device::flags` against published average run
//! lengths, by Monte Carlo with fixed seeds.
//!
//! Variant tested: two-sided tabular CUSUM on N(δ, 1) values, `C±` starting at 0 (no fast
//! initial response), alarm on the first sample at which either `C⁺` or `C⁻` exceeds `h`; the
//! run length counts samples up to and including the alarm. Reference values: Lucas & Crosier
//! (1982), "Fast initial response for CUSUM quality-control schemes", *Technometrics* 24,
//! Table 1 (two-sided, k = 0.5, no head start), also tabulated in Montgomery, *Introduction to
//! Statistical Quality Control*, §9.1: ARL 168 (h = 4) and 465 (h = 5) in control; 8.38
//! (h = 4) and 10.4 (h = 5) for a 1σ shift. (One-sided schemes have about twice the in-control
//! ARL.)
//!
//! Tolerance: 3 % relative. The run length is roughly geometric, so its SD is about its mean;
//! with 40,000 in-control runs the Monte Carlo standard error is 0.5 % (6 SEs of slack), and
//! with 20,000 shifted runs (SD ≈ 0.4 × mean) about 0.3 %.

use plimsoll_device::flags::{TabularCusum, decision_interval_for_arl, siegmund_arl};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Mean run length of the two-sided CUSUM over `runs` runs on N(shift, 1) data.
fn mc_arl(k: f64, h: f64, shift: f64, runs: usize, seed: u64) -> f64 {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut total = 0usize;
    for _ in 0..runs {
        let mut cusum = TabularCusum::new(k);
        let mut n = 0usize;
        loop {
            n += 1;
            let z: f64 = rng.sample(StandardNormal);
            cusum.update(shift + z);
            if cusum.exceeded(h).is_some() {
                break;
            }
        }
        total += n;
    }
    total as f64 / runs as f64
}

fn assert_close(what: &str, got: f64, published: f64, rel_tol: f64) {
    assert!(
        (got / published - 1.0).abs() <= rel_tol,
        "{what}: Monte Carlo ARL {got:.2} vs published {published} (tolerance {:.0} %)",
        rel_tol * 100.0
    );
}

#[test]
fn in_control_arl_matches_lucas_crosier() {
    assert_close(
        "h = 4, in control",
        mc_arl(0.5, 4.0, 0.0, 40_000, 1),
        168.0,
        0.03,
    );
    assert_close(
        "h = 5, in control",
        mc_arl(0.5, 5.0, 0.0, 40_000, 2),
        465.0,
        0.03,
    );
}

#[test]
fn one_sigma_shift_arl_matches_lucas_crosier() {
    assert_close(
        "h = 4, 1σ shift",
        mc_arl(0.5, 4.0, 1.0, 20_000, 3),
        8.38,
        0.03,
    );
    assert_close(
        "h = 5, 1σ shift",
        mc_arl(0.5, 5.0, 1.0, 20_000, 4),
        10.4,
        0.03,
    );
    // A downward shift is symmetric.
    assert_close(
        "h = 4, −1σ shift",
        mc_arl(0.5, 4.0, -1.0, 20_000, 5),
        8.38,
        0.03,
    );
}

/// The calibration chain used by `FlagConfig::from_target`: h chosen by Siegmund's
/// approximation for a target in-control ARL of 1,000 days gives a Monte Carlo ARL within 5 %
/// of the target (Siegmund's approximation error plus 4 Monte Carlo SEs at 20,000 runs).
#[test]
fn calibrated_decision_interval_achieves_its_target() {
    let h = decision_interval_for_arl(0.5, 1000.0);
    assert!((siegmund_arl(0.5, h, 0.0) - 1000.0).abs() < 1e-6);
    assert_close(
        "calibrated h, in control",
        mc_arl(0.5, h, 0.0, 20_000, 6),
        1000.0,
        0.05,
    );
}
