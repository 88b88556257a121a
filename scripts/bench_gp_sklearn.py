"""scikit-learn side of scripts/bench-gp.sh: times GaussianProcessRegressor.fit on the data and
from the starts that device-sim/examples/bench_fit.rs wrote (one and three device-years), then
prints the summary table against the Rust engines' JSON lines.

Usage: bench_gp_sklearn.py DATA_DIR OURS_JSONL [REPEATS [REPEATS_3Y]]

BLAS and OpenMP run single-threaded (threadpoolctl), like the Rust engine, unless
SKLEARN_THREADS says otherwise: on a 2-core machine shared with other work, sklearn's fits were
faster that way (27 ms per likelihood evaluation against 50-100 ms with two threads, measured).

DATA_DIR holds bench_gp_data_N.csv (day,y; y already centred by the fixed population mean) for
N = 365 and 1095 days, and bench_gp_starts.json (log hyperparameters in our kernel order, which
is also sklearn's theta order for the kernel below). OURS_JSONL is the Rust example's stdout.

The kernel is the default Plimsoll kernel written in scikit-learn's terms:

    C(c0) + C(c1) * Matern(l1, nu=1.5) + C(c2) * ExpSineSquared(l2, 7, fixed) + WhiteKernel(n)

with normalize_y=False (zero mean on the centred y, matching our fit with the mean fixed),
alpha=0.0 (noise only through WhiteKernel, so both sides factorise the same matrix), the default
optimizer "fmin_l_bfgs_b" and n_restarts_optimizer=0. The timed fits use a subclass that counts
log_marginal_likelihood calls (one Python attribute increment per evaluation of tens of
milliseconds, so the count costs nothing measurable).
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
#: Series lengths (days) that bench_fit.rs writes.
LENGTHS = (365, 1095)
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
    n_evals = None
    for _ in range(repeats):
        CountingGPR.n_evals = 0
        gpr = regressor(CountingGPR, theta)
        started = time.perf_counter()
        gpr.fit(x, y)
        times.append((time.perf_counter() - started) * 1e3)
        # With an optimizer, fit calls log_marginal_likelihood only through the optimiser's
        # objective (the value at the optimum comes from the optimiser), so every call counts.
        assert n_evals in (None, CountingGPR.n_evals), "repeated fits took different paths"
        n_evals = CountingGPR.n_evals
    theta_opt = gpr.kernel_.theta
    bounds = gpr.kernel_.bounds
    on_bound = [
        i
        for i in range(theta_opt.size)
        if not (bounds[i, 0] + 1e-3 < theta_opt[i] < bounds[i, 1] - 1e-3)
    ]
    return {
        "median_ms": statistics.median(times),
        "min_ms": min(times),
        "repeats": repeats,
        "n_evals": n_evals,
        "nlml": -float(gpr.log_marginal_likelihood_value_),
        "theta": theta_opt.tolist(),
        "interior": not on_bound,
        "on_bound": on_bound,
        "kernel": str(gpr.kernel_),
    }


def main():
    data_dir = pathlib.Path(sys.argv[1])
    ours_path = pathlib.Path(sys.argv[2])
    repeats = int(sys.argv[3]) if len(sys.argv) > 3 else DEFAULT_REPEATS
    repeats_3y = int(sys.argv[4]) if len(sys.argv) > 4 else max(1, repeats // 2)

    starts = json.loads((data_dir / "bench_gp_starts.json").read_text())
    names = starts["param_names"]
    ours = {}
    for line in ours_path.read_text().splitlines():
        rec = json.loads(line)
        if rec.get("what") == "fit":
            ours[(rec["n_days"], rec["start"], rec["engine"])] = rec

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
            }
        )
    )

    results = []
    for n_days in LENGTHS:
        data = np.loadtxt(data_dir / f"bench_gp_data_{n_days}.csv", delimiter=",", skiprows=1)
        x, y = data[:, :1], data[:, 1]
        for start in ("generic", "shared_prior"):
            with threadpoolctl.threadpool_limits(limits=THREADS):
                res = fit_sklearn(
                    x, y, starts[start], repeats if n_days <= 365 else repeats_3y
                )
            print(
                json.dumps(
                    {"what": "fit", "engine": "sklearn", "n_days": n_days, "start": start, **res}
                )
            )
            results.append((n_days, int(y.size), start, res))

    print()
    print("GP hyperparameter fits of one device-year (365 days) and three device-years (1,095")
    print("days), ~8 % of days missing, default kernel (Constant + Matern-3/2 + Periodic(7, fixed)")
    print("+ White), mean fixed, 6 log hyperparameters, same start and L-BFGS tolerances.")
    print(f"Baseline: {baseline} (numpy {np.__version__}, scipy {scipy.__version__};")
    print(f"{'; '.join(blas)}).")
    print("plimsoll = state-space likelihood (gp_ss, what training uses); plimsoll-dense = the")
    print("dense engine, for reference.")
    print()
    header = (
        f"{'days (n)':<11} {'start':<13} {'engine':<15} {'median ms':>10} {'min ms':>9} "
        f"{'evals':>6} {'ms/eval':>8} {'final NLML':>15} {'sklearn/ours':>13} {'(of minima)':>12}"
    )
    print(header)
    print("-" * len(header))
    all_same = True
    summary = []
    for n_days, n_obs, start, sk in results:
        label = f"{n_days} ({n_obs})"
        first = True
        for engine in ("sklearn", "plimsoll", "plimsoll-dense"):
            rec = sk if engine == "sklearn" else ours[(n_days, start, engine)]
            shown = ""
            if engine != "sklearn":
                ratio = sk["median_ms"] / rec["median_ms"]
                ratio_min = sk["min_ms"] / rec["min_ms"]
                shown = f"{ratio:>12.1f}x {ratio_min:>11.1f}x"
                diff = abs(sk["nlml"] - rec["nlml"])
                same = diff <= SAME_OPTIMUM_REL * abs(sk["nlml"]) and rec["converged"]
                all_same &= same
                if engine == "plimsoll":
                    summary.append((n_days, start, ratio, ratio_min))
            print(
                f"{label if first else '':<11} {start if first else '':<13} {engine:<15} "
                f"{rec['median_ms']:>10.1f} {rec['min_ms']:>9.1f} {rec['n_evals']:>6} "
                f"{rec['median_ms'] / rec['n_evals']:>8.3f} {rec['nlml']:>15.7f} {shown}"
                + ("" if engine == "sklearn" or same else "  <-- NOT the same optimum")
            )
            first = False
        if not sk["interior"]:
            print(
                f"{'':<25} sklearn stopped on a bound of "
                + ", ".join(names[i] for i in sk["on_bound"])
                + " (accepted when the NLML agrees: a flat direction of the likelihood)"
            )
    print()
    print(
        f"Median and minimum of {repeats} sklearn fits at 365 days and {repeats_3y} at 1,095 days;"
    )
    print("the ratio of minima is the steadier one when other work shares the machine.")
    print()
    for n_days, start, ratio, ratio_min in summary:
        print(
            f"plimsoll (state space) vs sklearn, {n_days} days, {start} start: "
            f"{ratio:.0f}x median, {ratio_min:.0f}x of minima"
        )
    if not all_same:
        print("WARNING: the engines did not reach the same optimum; ratios not valid.")
        sys.exit(1)


if __name__ == "__main__":
    main()
