#!/usr/bin/env bash
# Prune MODEL_DIR to SPARSITY overall with per-layer sparsities chosen from
# measured error curves and output sensitivities (--spread measured), the
# default solver (l0) and text calibration on CALIB.txt; writes the model to
# OUT_DIR and the report to OUT_DIR.report.json.
#
#   scripts/repro-allocation.sh MODEL_DIR CALIB.txt OUT_DIR SPARSITY
#
# LOPPER (default: lopper on PATH, else target/release/lopper) picks the binary.
set -euo pipefail
if [ "$#" -ne 4 ]; then
  echo "usage: $0 MODEL_DIR CALIB.txt OUT_DIR SPARSITY" >&2
  exit 2
fi
model=$1 calib=$2 out=$3 sparsity=$4
here=$(cd "$(dirname "$0")/.." && pwd)
bin=${LOPPER:-$(command -v lopper || echo "$here/target/release/lopper")}
exec "$bin" prune "$model" --text "$calib" --sparsity "$sparsity" --spread measured \
  -o "$out" --report "$out.report.json"
