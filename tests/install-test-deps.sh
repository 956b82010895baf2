#!/usr/bin/env bash
# Installs what the test suite needs beyond cargo: the Python reference
# libraries (scikit-learn, scipy, numpy, statsmodels) and the official gRPC
# Python packages used as an independent client. Versions are pinned.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m pip install --quiet --disable-pip-version-check -r tests/reference/requirements.txt
