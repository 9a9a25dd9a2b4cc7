#!/usr/bin/env bash
# Prune MODEL with the calibration activations ACTS, proving per layer a
# lower bound on the best objective any mask of the pattern could reach
# (`--certify`), and write the JSON report (per layer: lower_bound,
# certified_gap, rows_proven_optimal, bound_seconds) to REPORT.json.
#
#   scripts/repro-certify.sh MODEL ACTS REPORT.json ARGS...
#
# ARGS are passed to `lopper prune` (e.g. --sparsity 0.5, --pattern 2:4,
# --max-sweeps 5, --ridge 0.01). Without -o/--output in ARGS the pruned
# model goes to a temporary folder beside REPORT.json, removed at the end.
set -euo pipefail
if [ $# -lt 3 ]; then
    echo "usage: $0 MODEL ACTS REPORT.json ARGS..." >&2
    exit 2
fi
model=$1 acts=$2 report=$3
shift 3
root=$(cd "$(dirname "$0")/.." && pwd)
cargo build --release --quiet --manifest-path "$root/Cargo.toml"
out=()
has_out=0
for a in "$@"; do
    case $a in -o|--output|--output=*) has_out=1 ;; esac
done
if [ $has_out -eq 0 ]; then
    tmp=$(mktemp -d "$(dirname "$report")/.certify-out.XXXXXX")
    trap 'rm -rf "$tmp"' EXIT
    if [ -d "$model" ]; then
        out=(-o "$tmp/model")
    else
        out=(-o "$tmp/model.safetensors")
    fi
fi
"$root/target/release/lopper" prune "$model" --activations "$acts" "$@" "${out[@]}" \
    --report "$report" --certify
