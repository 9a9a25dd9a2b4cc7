#!/usr/bin/env bash
# Text calibration on the real encoder, end to end: every method at 50%,
# 70% per row and 2:4, sequential, 128 windows x 128 tokens of the GPL-3
# text, evaluated on the MPL-2.0 text. Prints one line per run: wall time,
# peak memory, phase times, mean held-out layer error and the end-to-end
# figures. Usage: bash scripts/bench-text.sh [OUT_DIR] [extra prune flags]
set -euo pipefail
cd "$(dirname "$0")/.."
out="${1:-target/bench-text}"
shift || true
model="${LOPPER_TEST_MODEL:-$HOME/.cache/lopper/all-minilm-l6-v2}"
calib=/usr/share/common-licenses/GPL-3
heldout=/usr/share/common-licenses/MPL-2.0
cargo build --release --quiet
mkdir -p "$out"
methods="${METHODS:-magnitude scaled obs l0}"
targets="${TARGETS:-0.5 0.7 2:4}"
printf '%-9s %-6s %7s %8s %8s %8s %8s %10s %8s %8s\n' method target wall_s peak_MiB forward gram solve held_err cos_mean hidden
for t in $targets; do
  for m in $methods; do
    if [[ $t == *:* ]]; then flag=(--pattern "$t"); else flag=(--sparsity "$t"); fi
    name="$m-${t/:/of}"
    rm -rf "$out/$name"
    /usr/bin/time -f '%e %M' -o "$out/$name.time" ./target/release/lopper prune "$model" \
      --text "$calib" --eval-text "$heldout" "${flag[@]}" --method "$m" \
      -o "$out/$name" --report "$out/$name.json" --quiet "$@"
    read -r wall kib < "$out/$name.time"
    python3 - "$out/$name.json" "$m" "$t" "$wall" "$kib" <<'PY'
import json, sys
r = json.load(open(sys.argv[1])); t = r["timing"]; e = r["eval"]
print(f"{sys.argv[2]:<9} {sys.argv[3]:<6} {float(sys.argv[4]):7.1f} {int(sys.argv[5])/1024:8.0f} "
      f"{t['forward']:8.1f} {t['gram']:8.1f} {t['solve']:8.1f} "
      f"{r['summary']['mean_rel_error_holdout']:10.3e} {e['cosine_mean']:8.4f} {e['hidden_rel_error']:8.4f}")
PY
    rm -rf "$out/$name"
  done
done
