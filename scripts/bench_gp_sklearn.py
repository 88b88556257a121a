"""scikit-learn side of scripts/bench-gp.sh: times GaussianProcessRegressor.fit on the data and
from the starts that device-sim/examples/bench_fit.rs wrote, then prints the summary table
against the Rust engine's JSON lines.

Usage: bench_gp_sklearn.py DATA_DIR OURS_JSONL [REPEATS]

BLAS and OpenMP run single-threaded (threadpoolctl), like the Rust engine, unless
SKLEARN_THREADS says otherwise: on a 2-core machine shared with other work, sklearn's fits were
faster that way (27 ms per likelihood evaluation against 50-100 ms with two threads, measured).

DATA_DIR holds bench_gp_data.csv (day,y; y already centred by the fixed population mean) and
bench_gp_starts.json (log hyperparameters in our kernel order, which is also sklearn's theta
order for the kernel below). OURS_JSONL is the Rust example's stdout.

The kernel is the default Plimsoll kernel written in scikit-learn's terms:

    C(c0) + C(c1) * Matern(l1, nu=1.5) + C(c2) * ExpSineSquared(l2, 7, fixed) + WhiteKernel(n)

with normalize_y=False (zero mean on the centred y, matching our fit with the mean fixed),
alpha=0.0 (noise only through WhiteKernel, so both sides factorise the same matrix), the default
optimizer "fmin_l_bfgs_b" and n_restarts_optimizer=0. Timings use the plain class; evaluations
are counted in one extra fit by a subclass that counts log_marginal_likelihood calls.
"""

import json
import os
import pathlib
import statistics
import sys
import time

import numpy as np
import scipy
import sklearn
import threadpoolctl
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel as C
from sklearn.gaussian_process.kernels import ExpSineSquared, Matern, WhiteKernel

DEFAULT_REPEATS = 7
THREADS = int(os.environ.get("SKLEARN_THREADS", "1"))
#: Relative NLML agreement required to call two optima "the same" (both optimisers stop at
#: ftol = 2.2e-9 relative decrease, so they may differ by about that much).
SAME_OPTIMUM_REL = 1e-6


def kernel(theta):
    k = (
        C(1.0)
        + C(1.0) * Matern(1.0, nu=1.5)
        + C(1.0) * ExpSineSquared(1.0, 7.0, periodicity_bounds="fixed")
        + WhiteKernel(1.0)
    )
    return k.clone_with_theta(np.asarray(theta, dtype=float))


class CountingGPR(GaussianProcessRegressor):
    """Counts objective evaluations made by fit (one per log_marginal_likelihood call)."""

    n_evals = 0

    def log_marginal_likelihood(self, *args, **kwargs):
        CountingGPR.n_evals += 1
        return super().log_marginal_likelihood(*args, **kwargs)


def regressor(cls, theta):
    return cls(
        kernel=kernel(theta),
        alpha=0.0,
        optimizer="fmin_l_bfgs_b",
        n_restarts_optimizer=0,
        normalize_y=False,
    )


def fit_sklearn(x, y, theta, repeats):
    times = []
    gpr = None
    for _ in range(repeats):
        gpr = regressor(GaussianProcessRegressor, theta)
        started = time.perf_counter()
        gpr.fit(x, y)
        times.append((time.perf_counter() - started) * 1e3)
    CountingGPR.n_evals = 0
    counted = regressor(CountingGPR, theta).fit(x, y)
    # With an optimizer, fit calls log_marginal_likelihood only through the optimiser's
    # objective (the value at the optimum comes from the optimiser), so every call counts.
    n_evals = CountingGPR.n_evals
    theta_opt = gpr.kernel_.theta
    bounds = gpr.kernel_.bounds
    interior = bool(np.all((theta_opt > bounds[:, 0] + 1e-3) & (theta_opt < bounds[:, 1] - 1e-3)))
    assert np.allclose(counted.kernel_.theta, theta_opt), "counting run took another path"
    return {
        "median_ms": statistics.median(times),
        "min_ms": min(times),
        "repeats": repeats,
        "n_evals": n_evals,
        "nlml": -float(gpr.log_marginal_likelihood_value_),
        "theta": theta_opt.tolist(),
        "interior": interior,
        "kernel": str(gpr.kernel_),
    }


def main():
    data_dir = pathlib.Path(sys.argv[1])
    ours_path = pathlib.Path(sys.argv[2])
    repeats = int(sys.argv[3]) if len(sys.argv) > 3 else DEFAULT_REPEATS

    data = np.loadtxt(data_dir / "bench_gp_data.csv", delimiter=",", skiprows=1)
    x, y = data[:, :1], data[:, 1]
    starts = json.loads((data_dir / "bench_gp_starts.json").read_text())
    ours = {}
    for line in ours_path.read_text().splitlines():
        rec = json.loads(line)
        if rec.get("what") == "fit":
            ours[rec["start"]] = rec

    with threadpoolctl.threadpool_limits(limits=THREADS):
        blas = sorted(
            {
                f"{i['internal_api']} {i.get('version') or ''} {i.get('architecture') or ''}".strip()
                + f" threads={i['num_threads']}"
                for i in threadpoolctl.threadpool_info()
            }
        )
    baseline = f"scikit-learn {sklearn.__version__} GaussianProcessRegressor.fit"
    print(
        json.dumps(
            {
                "what": "baseline",
                "name": baseline,
                "numpy": np.__version__,
                "scipy": scipy.__version__,
                "blas": blas,
                "n_obs": int(y.size),
            }
        )
    )

    rows = []
    for start in ("generic", "shared_prior"):
        with threadpoolctl.threadpool_limits(limits=THREADS):
            res = fit_sklearn(x, y, starts[start], repeats)
        print(json.dumps({"what": "fit", "engine": "sklearn", "start": start, **res}))
        rows.append((start, res, ours[start]))

    print()
    print(f"GP hyperparameter fit, one device-year: n = {y.size} observed days of 365, default")
    print("kernel (Constant + Matern-3/2 + Periodic(7, fixed) + White), mean fixed, 6 log")
    print(f"hyperparameters. Baseline: {baseline} (numpy {np.__version__},")
    print(f"scipy {scipy.__version__}; {'; '.join(blas)}).")
    print()
    header = (
        f"{'start':<13} {'engine':<9} {'median ms':>10} {'min ms':>9} {'evals':>6} "
        f"{'ms/eval':>8} {'final NLML':>15} {'sklearn/ours':>13} {'(of minima)':>12}"
    )
    print(header)
    print("-" * len(header))
    all_same = True
    for start, sk, us in rows:
        ratio = sk["median_ms"] / us["median_ms"]
        ratio_min = sk["min_ms"] / us["min_ms"]
        diff = abs(sk["nlml"] - us["nlml"])
        same = diff <= SAME_OPTIMUM_REL * abs(sk["nlml"])
        all_same &= same and sk["interior"] and us["converged"]
        for engine, rec, shown in (
            ("sklearn", sk, ""),
            ("plimsoll", us, f"{ratio:>12.1f}x {ratio_min:>11.1f}x"),
        ):
            print(
                f"{start if engine == 'sklearn' else '':<13} {engine:<9} "
                f"{rec['median_ms']:>10.1f} {rec['min_ms']:>9.1f} {rec['n_evals']:>6} "
                f"{rec['median_ms'] / rec['n_evals']:>8.2f} {rec['nlml']:>15.7f} {shown}"
            )
        print(
            f"{'':<13} |NLML difference| = {diff:.1e}"
            f"{'' if same else '  <-- NOT the same optimum'}"
            f"{'' if sk['interior'] else '  <-- sklearn optimum on a bound'}"
        )
    # Both starts should end at the same optimum, so the sklearn fits agree with each other too.
    print()
    print(
        f"Median and minimum of {repeats} sklearn fits and {rows[0][2]['repeats']} Plimsoll fits; "
        "the ratio of minima is the"
    )
    print("steadier one when other work shares the machine.")
    if not all_same:
        print("WARNING: the two engines did not reach the same interior optimum; ratios not valid.")
        sys.exit(1)


if __name__ == "__main__":
    main()
