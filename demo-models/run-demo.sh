#!/usr/bin/env bash
# lopper demo: prune the pump-monitor MLP to 70% sparsity with each method,
# then compare reconstruction error and held-out accuracy side by side.
#
#   bash demo-models/run-demo.sh
#
# Outputs (pruned models and JSON reports) go to $DEMO_OUT (default target/demo).
# LOPPER and ACCURACY override the binaries to run (default: the release
# builds of this repo; `cargo build --release` makes both).
set -euo pipefail

cd "$(dirname "${BASH_SOURCE[0]}")/.."

DEMO=demo-models/pump-monitor
OUT="${DEMO_OUT:-target/demo}"
LOPPER="${LOPPER:-target/release/lopper}"
ACCURACY="${ACCURACY:-target/release/pump-accuracy}"
METHODS=(magnitude scaled obs l0)

mkdir -p "$OUT"

echo "==> cargo build --release"
cargo build --release --quiet

for m in "${METHODS[@]}"; do
    echo
    echo "==> lopper prune --method $m --sparsity 0.7"
    rm -f "$OUT/pump-$m.safetensors" "$OUT/pump-$m.json"
    "$LOPPER" prune "$DEMO/model.safetensors" \
        --activations "$DEMO/calibration.safetensors" \
        --sparsity 0.7 --method "$m" \
        -o "$OUT/pump-$m.safetensors" --report "$OUT/pump-$m.json"
    for f in "$OUT/pump-$m.safetensors" "$OUT/pump-$m.json"; do
        [[ -s "$f" ]] || { echo "error: lopper did not write $f" >&2; exit 1; }
    done
done

# One accuracy line per model, then the summary table (errors from the reports).
args=("$DEMO/model.safetensors" --label dense)
for m in "${METHODS[@]}"; do
    args+=("$OUT/pump-$m.safetensors" --label "$m" --report "$OUT/pump-$m.json")
done
echo
echo "==> held-out accuracy ($DEMO/eval.safetensors)"
"$ACCURACY" --eval "$DEMO/eval.safetensors" "${args[@]}"
