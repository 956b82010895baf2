#!/usr/bin/env bash
# Side-by-side benchmark of plumbline against the Python reference pipeline
# (scikit-learn + numpy + scipy) on identical inputs, folds and settings.
# Both sides run in one go; the table shows medians and ratios from this
# run only, because shared machines are noisy.
#
#   benches/run-comparison.sh [OUT_DIR]      (default target/comparison)
#   REPS=3 FIT_REPS=3 QUERIES=100000 benches/run-comparison.sh
#
# Needs the Python packages of benches/reference/requirements.txt.
set -euo pipefail
cd "$(dirname "$0")/.."
out="${1:-target/comparison}"
reps="${REPS:-3}"
fit_reps="${FIT_REPS:-$reps}"
queries="${QUERIES:-100000}"
mkdir -p "$out"
cargo bench --bench compare -- "$out" --reps "$reps" --fit-reps "$fit_reps" --queries "$queries"
python3 benches/reference/pipeline.py "$out" --reps "$reps" --fit-reps "$fit_reps"
python3 benches/reference/table.py "$out" | tee "$out/table.md"
