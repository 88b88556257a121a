#!/usr/bin/env bash
# Scale benchmark of `plimsoll evaluate`: simulates cohorts from demo-data/pilot.toml at
# several sizes, evaluates each (federated training over loopback gRPC with the bounded
# device pool, then detection and the report) under /usr/bin/time -v, and prints one table:
# wall time, peak memory and the phases per cell, with ratios against the smallest cell (the
# named baseline) and the same ratios divided by the growth in participant-days (1.00 =
# linear).
#
# Usage: scripts/bench-scale.sh [--quick] [--participants "1000 3000 10000"]
#                               [--days "90 365 1095"] [--rounds N] [--work DIR]
#   --quick          participants "1000 3000", days "90 365" (4 cells)
#   --participants   participant counts (ascending; the first is the baseline's)
#   --days           day counts (ascending; the first is the baseline's)
#   --rounds         federated rounds (default: evaluate's default, 80)
#   --work DIR       where cohorts and outputs go (default target/bench-scale); cohorts
#                    already there are reused
# Builds the release binary first (CARGO_TARGET_DIR is honoured).
set -euo pipefail

cd "$(dirname "$0")/.."
participants="1000 3000 10000"
days="90 365 1095"
rounds=""
work="target/bench-scale"
while [[ $# -gt 0 ]]; do
    case "$1" in
        --quick) participants="1000 3000"; days="90 365"; shift ;;
        --participants) participants="$2"; shift 2 ;;
        --days) days="$2"; shift 2 ;;
        --rounds) rounds="$2"; shift 2 ;;
        --work) work="$2"; shift 2 ;;
        -h|--help) sed -n '2,18p' "$0"; exit 0 ;;
        *) echo "unknown argument: $1 (see --help)" >&2; exit 2 ;;
    esac
done
if [[ ! -x /usr/bin/time ]]; then
    echo "needs GNU time at /usr/bin/time (Debian: apt-get install time)" >&2
    exit 1
fi

cargo build --release -p plimsoll-device --bin plimsoll >&2
bin="${CARGO_TARGET_DIR:-target}/release/plimsoll"
mkdir -p "$work"
results="$work/results.tsv"
: > "$results"

for p in $participants; do
    for d in $days; do
        cohort="$work/cohort-p$p-d$d"
        if [[ ! -f "$cohort/daily.csv" ]]; then
            echo "simulating $p participants × $d days" >&2
            "$bin" simulate demo-data/pilot.toml --participants "$p" --days "$d" \
                --out "$cohort" > /dev/null
        fi
        out="$work/eval-p$p-d$d"
        echo "evaluating $p participants × $d days" >&2
        args=(evaluate "$cohort" --out "$out")
        [[ -n "$rounds" ]] && args+=(--rounds "$rounds")
        /usr/bin/time -v "$bin" "${args[@]}" > "$out.log" 2> "$out.time" || {
            echo "evaluate failed for $p × $d; see $out.log and $out.time" >&2
            exit 1
        }
        wall=$(awk -F': ' '/Elapsed \(wall clock\)/ {
            n = split($2, t, ":"); s = 0; for (i = 1; i <= n; i++) s = s * 60 + t[i]; print s }' "$out.time")
        rss_kb=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$out.time")
        # "Reading 3.7 s; prior 45.4 s (enrolment 3.2 s, rounds 42.1 s); detection 141.2 s; ..."
        phases=$(grep '^Reading ' "$out.log" | sed -E \
            's/^Reading ([0-9.]+) s; prior [0-9.]+ s \(enrolment ([0-9.]+) s, rounds ([0-9.]+) s\); detection ([0-9.]+) s.*/\1 \2 \3 \4/')
        dropped=$(grep -o '[0-9]* devices dropped' "$out.log" | head -1 | cut -d' ' -f1)
        printf '%s\t%s\t%s\t%s\t%s\t%s\n' "$p" "$d" "$wall" "$rss_kb" "$phases" "${dropped:-?}" >> "$results"
    done
done

echo
echo "plimsoll evaluate at scale ($(nproc) cores; $(date -u +%Y-%m-%dT%H:%MZ)); baseline = first cell"
awk -F'\t' '
NR == 1 { bp = $1; bd = $2; bw = $3; bm = $4 }
{
    split($5, ph, " ")
    size = ($1 * $2) / (bp * bd)
    if (NR == 1) {
        printf "%-12s %6s %9s %9s %8s %8s %9s %9s %8s %8s %8s %8s %7s\n", "participants", "days", "wall s", "peak MB", "wall ×", "mem ×", "wall/pd ×", "mem/pd ×", "read s", "enrol s", "rounds s", "detect s", "dropped"
    }
    printf "%-12d %6d %9.1f %9.0f %8.2f %8.2f %9.2f %9.2f %8s %8s %8s %8s %7s\n", $1, $2, $3, $4 / 1024, $3 / bw, $4 / bm, ($3 / bw) / size, ($4 / bm) / size, ph[1], ph[2], ph[3], ph[4], $6
}' "$results"
echo "(wall/pd ×, mem/pd ×: the ratio divided by the growth in participant-days; 1.00 = linear)"
