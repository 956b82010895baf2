#!/usr/bin/env bash
# Side-by-side benchmark of plumbline against the Python reference pipeline
# (scikit-learn + numpy + scipy) on identical inputs, folds and settings,
# and of the plumbline server against a Python grpcio server over that
# pipeline (benches/reference/serve.py, driven by the compare bench itself).
# Both sides run in one go; the table shows medians and ratios from this
# run only, because shared machines are noisy.
#
#   benches/run-comparison.sh [OUT_DIR]      (default target/comparison)
#   REPS=3 FIT_REPS=3 QUERIES=100000 SERVICE_SECONDS=8 benches/run-comparison.sh
#   PARTS=service benches/run-comparison.sh  (only the service comparison;
#                                             PARTS is any of gemm,score,fit,service)
#
# Needs the Python packages of benches/reference/requirements.txt.
set -euo pipefail
cd "$(dirname "$0")/.."
out="${1:-target/comparison}"
reps="${REPS:-3}"
fit_reps="${FIT_REPS:-$reps}"
queries="${QUERIES:-100000}"
service_seconds="${SERVICE_SECONDS:-8}"
parts="${PARTS:-gemm,score,fit,service}"
mkdir -p "$out"
cargo bench --bench compare -- "$out" --reps "$reps" --fit-reps "$fit_reps" \
    --queries "$queries" --service-seconds "$service_seconds" --only "$parts"
# The offline half of the reference runs only for the parts it has.
offline=$(tr ',' '\n' <<<"$parts" | grep -xE 'score|fit' | paste -sd, - || true)
if [[ -n "$offline" ]]; then
    python3 benches/reference/pipeline.py "$out" --reps "$reps" --fit-reps "$fit_reps" --only "$offline"
else
    rm -f "$out/reference.json"
fi
python3 benches/reference/table.py "$out" | tee "$out/table.md"
