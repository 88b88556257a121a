#!/usr/bin/env bash
# Benchmark (not a test): GP hyperparameter fits of one device-year (365 days) and three
# device-years (1,095 days), Plimsoll's engines (state space, as training uses, and dense)
# against scikit-learn's GaussianProcessRegressor.fit on the same data, kernel, start and
# optimiser tolerances. Prints one summary table with the ratio sklearn/ours for each length
# and start.
#
#   scripts/bench-gp.sh [RUST_REPEATS] [SKLEARN_REPEATS] [SKLEARN_REPEATS_3Y]
#
# SKLEARN_REPEATS_3Y defaults to half of SKLEARN_REPEATS (one sklearn fit of three years takes
# tens of seconds).
# Installs scikit-learn into .venv-bench/ (gitignored) on first use. CARGO_TARGET_DIR is
# honoured as usual. Exits non-zero if the engines do not reach the same optimum.
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
rust_repeats="${1:-25}"
sklearn_repeats="${2:-7}"
sklearn_repeats_3y="${3:-$(( sklearn_repeats / 2 > 0 ? sklearn_repeats / 2 : 1 ))}"
venv="$root/.venv-bench"
out="$(mktemp -d "${TMPDIR:-/tmp}/plimsoll-bench-gp.XXXXXX")"
trap 'rm -rf "$out"' EXIT

if [[ ! -x "$venv/bin/python" ]] || ! "$venv/bin/python" -c 'import sklearn, threadpoolctl' 2>/dev/null; then
    echo "creating $venv with scikit-learn" >&2
    python3 -m venv "$venv"
    "$venv/bin/pip" install --quiet --upgrade pip
    "$venv/bin/pip" install --quiet scikit-learn threadpoolctl
fi
echo "scikit-learn $("$venv/bin/python" -c 'import sklearn; print(sklearn.__version__)') in $venv" >&2

cd "$root"
cargo build --release --quiet -p plimsoll-device --example bench_fit
target_dir="${CARGO_TARGET_DIR:-$root/target}"
"$target_dir/release/examples/bench_fit" "$out" "$rust_repeats" | tee "$out/ours.jsonl"

# Some machines set OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE to work around old OpenBLAS builds;
# they slow a current numpy, so the baseline runs without them (the BLAS it then uses is
# printed in the table header).
env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE \
    "$venv/bin/python" "$root/scripts/bench_gp_sklearn.py" "$out" "$out/ours.jsonl" "$sklearn_repeats" "$sklearn_repeats_3y"
