#!/usr/bin/env bash
# Creates the Python virtual environment the tests use as outside references
# (target/python-tools), when it is missing or lacks a package:
#   prometheus_client — parses the aggregator's /metrics text (tests/metrics.rs).
# Packages come from PyPI by name and pinned version; nothing else is downloaded.
set -euo pipefail
cd "$(dirname "$0")/.."
VENV=target/python-tools
PACKAGES=("prometheus_client==0.26.0")
if [ ! -x "$VENV/bin/python" ]; then
  mkdir -p target
  python3 -m venv "$VENV"
fi
if ! "$VENV/bin/python" -c "import prometheus_client" >/dev/null 2>&1; then
  "$VENV/bin/python" -m pip install --quiet --disable-pip-version-check "${PACKAGES[@]}"
fi
echo "python tools ready in $VENV: $("$VENV/bin/python" -m pip show prometheus_client 2>/dev/null | grep -m1 '^Version' || true)"
