#!/usr/bin/env bash
# Remove FRACTION of every block's FFN neurons with the reconstruction
# method (group L0: greedy removal with exact refits, then swaps), text
# calibration and the documented defaults otherwise, and write the smaller
# model directory to OUT_DIR (plus OUT_DIR.report.json).
#
#   scripts/repro-structured.sh MODEL_DIR CALIB.txt OUT_DIR FRACTION [EVAL.txt]
#
# With EVAL.txt (text of another kind than CALIB.txt), the report also holds
# the end-to-end comparison with the dense model on it.
set -euo pipefail
if [ $# -lt 4 ] || [ $# -gt 5 ]; then
    echo "usage: $0 MODEL_DIR CALIB.txt OUT_DIR FRACTION [EVAL.txt]" >&2
    exit 2
fi
model=$1 calib=$2 out=$3 fraction=$4
root=$(cd "$(dirname "$0")/.." && pwd)
cargo build --release --quiet --manifest-path "$root/Cargo.toml"
args=(prune "$model" --text "$calib" --remove-neurons "$fraction" --method l0
      -o "$out" --report "$out.report.json")
if [ $# -eq 5 ]; then
    args+=(--eval-text "$5")
fi
"$root/target/release/lopper" "${args[@]}"
