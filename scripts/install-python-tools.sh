#!/usr/bin/env bash
# Creates the Python virtual environment the tests use as outside references
# (target/python-tools), when it is missing or lacks a package:
#   prometheus_client — parses the aggregator's /metrics text (tests/metrics.rs);
#   grpcio, grpcio-tools — the Python example device (device-sim/python/) and
#     its stubs, generated from proto/ by the test (tests/python_device.rs);
#   fhir.resources 6.1.0 (FHIR R4 4.0.1 models, on pydantic 1) — validates the
#     FHIR export (tests/fhir_export.rs);
#   dp-accounting 0.6.0 (Google's differential-privacy accountants) — the
#     reference for the privacy accountant (tests/privacy.rs).
# Packages come from PyPI by name and pinned version; nothing else is downloaded.
set -euo pipefail
cd "$(dirname "$0")/.."
VENV=target/python-tools
PACKAGES=(
  "prometheus_client==0.26.0"
  "grpcio==1.84.0"
  "grpcio-tools==1.84.0"
  "fhir.resources==6.1.0"
  "pydantic==1.10.27"
  "dp-accounting==0.6.0"
)
if [ ! -x "$VENV/bin/python" ]; then
  mkdir -p target
  python3 -m venv "$VENV"
fi
if ! "$VENV/bin/python" -c "import prometheus_client, grpc, grpc_tools, fhir.resources.bundle, dp_accounting" >/dev/null 2>&1; then
  "$VENV/bin/python" -m pip install --quiet --disable-pip-version-check "${PACKAGES[@]}"
fi
echo "python tools ready in $VENV: $("$VENV/bin/python" -m pip freeze 2>/dev/null | grep -iE '^(prometheus.client|grpcio|grpcio.tools|protobuf|fhir.resources|pydantic|dp.accounting)==' | tr '\n' ' ')"
