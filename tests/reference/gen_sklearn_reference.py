"""Generate sklearn_gp.json: reference values from scikit-learn's GaussianProcessRegressor
for tests/gp_reference.rs (Plimsoll GP engine).

Run:  python3 -m venv venv && venv/bin/pip install scikit-learn
      venv/bin/python tests/reference/gen_sklearn_reference.py > tests/reference/sklearn_gp.json

Settings shared by every case:
  * optimizer=None (hyperparameters are used exactly as given, no fitting),
  * normalize_y=False (zero prior mean; the Rust side uses GpRegression { mean: 0.0 }),
  * alpha=0.0 (no extra diagonal term: observation noise is a WhiteKernel, which the Rust side
    models as Kernel::White, so both sides factorise exactly the same matrix).

For each kernel the JSON records the log marginal likelihood and its gradient with respect to
sklearn's `theta` (natural logs of the non-fixed hyperparameters, in sklearn's order, named in
`theta_names`), and the predictive mean and standard deviation at `t_test`. sklearn's
predictive std includes the WhiteKernel variance (WhiteKernel.diag is the noise level), i.e. it
is the std of a new observation.

For the cases in FIT_CASES it also records a maximum-likelihood fit by sklearn's default
optimizer (scipy's L-BFGS-B, started from the given theta, no restarts): the fitted theta and
log marginal likelihood. The script checks that the optimum is interior to the (wide) bounds,
so an unconstrained optimiser started at the same point should reach the same value.
"""

import json
import platform
import sys

import numpy as np
import scipy
import sklearn
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import (
    ConstantKernel as C,
    ExpSineSquared,
    Matern,
    RBF,
    RationalQuadratic,
    WhiteKernel,
)

SEED = 20240601
FIT_CASES = ("se_white", "matern12_white", "matern52_white")


def make_data():
    """About 60 integer days out of 0..89 with two gaps, and a smooth + weekly + noisy signal."""
    rng = np.random.default_rng(SEED)
    days = np.arange(90)
    in_gap = ((days >= 30) & (days <= 41)) | ((days >= 60) & (days <= 66))
    candidates = days[~in_gap]
    t = np.sort(rng.choice(candidates, size=60, replace=False)).astype(float)
    y = (
        0.8 * np.sin(2 * np.pi * t / 45.0)
        + 0.4 * np.sin(2 * np.pi * t / 7.0)
        + 0.02 * (t - 45.0)
        + 0.3 * rng.standard_normal(t.size)
    )
    # Test days: at a training day, inside both gaps, between days, and beyond the end.
    t_test = np.array(
        [float(t[5]), 33.0, 36.5, 40.0, 63.0, 65.5, float(t[-1]) + 1.0, 95.0, 104.0, 130.0]
    )
    return t, y, t_test


def cases():
    fixed = "fixed"
    return {
        "se_white": C(2.0) * RBF(10.0) + WhiteKernel(0.3),
        "matern12_white": C(1.5) * Matern(8.0, nu=0.5) + WhiteKernel(0.2),
        "const_matern32_periodic_white": C(0.5)
        + C(1.0) * Matern(15.0, nu=1.5)
        + C(0.5) * ExpSineSquared(1.2, 7.0, periodicity_bounds=fixed)
        + WhiteKernel(0.1),
        "rq_white": C(1.2) * RationalQuadratic(length_scale=6.0, alpha=0.8) + WhiteKernel(0.25),
        "matern52_white": C(1.7) * Matern(12.0, nu=2.5) + WhiteKernel(0.15),
        "locally_periodic_white": C(0.8)
        + C(1.3) * RBF(20.0) * C(0.9) * ExpSineSquared(1.0, 7.0, periodicity_bounds=fixed)
        + WhiteKernel(0.1),
    }


def main():
    t, y, t_test = make_data()
    X, X_test = t[:, None], t_test[:, None]
    out = {
        "generator": "tests/reference/gen_sklearn_reference.py",
        "seed": SEED,
        "versions": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "scikit-learn": sklearn.__version__,
        },
        "settings": {"optimizer": None, "normalize_y": False, "alpha": 0.0},
        "t_train": t.tolist(),
        "y_train": y.tolist(),
        "t_test": t_test.tolist(),
        "cases": [],
    }
    for name, kernel in cases().items():
        gpr = GaussianProcessRegressor(kernel=kernel, alpha=0.0, optimizer=None, normalize_y=False)
        gpr.fit(X, y)
        theta = gpr.kernel_.theta
        lml, lml_grad = gpr.log_marginal_likelihood(theta, eval_gradient=True)
        mean, std = gpr.predict(X_test, return_std=True)
        fit = None
        if name in FIT_CASES:
            fitted = GaussianProcessRegressor(
                kernel=kernel, alpha=0.0, normalize_y=False, n_restarts_optimizer=0
            ).fit(X, y)
            bounds = fitted.kernel_.bounds  # natural logs, one row per theta entry
            margin = np.log(10.0)
            assert np.all(fitted.kernel_.theta > bounds[:, 0] + margin), name
            assert np.all(fitted.kernel_.theta < bounds[:, 1] - margin), name
            fit = {
                "theta": fitted.kernel_.theta.tolist(),
                "log_marginal_likelihood": float(fitted.log_marginal_likelihood_value_),
                "sklearn_kernel": repr(fitted.kernel_),
            }
        out["cases"].append(
            {
                "name": name,
                "sklearn_kernel": repr(gpr.kernel_),
                "theta_names": [h.name for h in gpr.kernel_.hyperparameters if not h.fixed],
                "theta": theta.tolist(),
                "log_marginal_likelihood": float(lml),
                "log_marginal_likelihood_gradient": lml_grad.tolist(),
                "predictive_mean": mean.tolist(),
                "predictive_std": std.tolist(),
                "fit": fit,
            }
        )
    json.dump(out, sys.stdout, indent=1)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
