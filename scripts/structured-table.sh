#!/usr/bin/env bash
# The structured-pruning quality table of docs/structured.md: remove a
# fraction of every block's FFN neurons with each method, calibrate on one
# text and judge end to end on another kind of text.
#
#   scripts/structured-table.sh MODEL_DIR CALIB.txt EVAL.txt WORK_DIR [FRACTIONS]
#
# FRACTIONS defaults to "0.25 0.5". Prints a Markdown table; the reports
# stay in WORK_DIR.
set -euo pipefail
if [ $# -lt 4 ]; then
    echo "usage: $0 MODEL_DIR CALIB.txt EVAL.txt WORK_DIR [FRACTIONS]" >&2
    exit 2
fi
model=$1 calib=$2 eval=$3 work=$4 fractions=${5:-"0.25 0.5"}
root=$(cd "$(dirname "$0")/.." && pwd)
cargo build --release --quiet --manifest-path "$root/Cargo.toml"
mkdir -p "$work"
runs=("magnitude" "magnitude --refit" "scaled" "scaled --refit" "obs" "l0")
for f in $fractions; do
    for r in "${runs[@]}"; do
        tag="$f-${r// /}"
        rm -rf "$work/$tag"
        # shellcheck disable=SC2086
        "$root/target/release/lopper" prune "$model" --text "$calib" --eval-text "$eval" \
            --remove-neurons "$f" --method $r -o "$work/$tag" --report "$work/$tag.json" -q
    done
done
python3 - "$work" $fractions <<'PY'
import json, sys
work, fractions = sys.argv[1], sys.argv[2:]
runs = ["magnitude", "magnitude--refit", "scaled", "scaled--refit", "obs", "l0"]
names = {"magnitude": "magnitude, no refit", "magnitude--refit": "magnitude + refit",
         "scaled": "activation-weighted, no refit", "scaled--refit": "activation-weighted + refit",
         "obs": "greedy (group OBS) + refit", "l0": "greedy + swaps (l0) + refit"}
print("| removed | method | cosine mean | cosine min | final-state error | "
      "FFN out error calib | FFN out error held | solve s |")
print("|---|---|---|---|---|---|---|---|")
for f in fractions:
    for r in runs:
        rep = json.load(open(f"{work}/{f}-{r}.json"))
        e, u = rep["eval"], rep["structure"]["units"]
        calib = sum(x["rel_error"] for x in u) / len(u)
        held = sum(x["rel_error_holdout"] for x in u) / len(u)
        secs = sum(x["seconds"] for x in u)
        print(f"| {float(f):.0%} | {names[r]} | {e['cosine_mean']:.4f} | {e['cosine_min']:.4f} | "
              f"{e['hidden_rel_error']:.4f} | {calib:.4f} | {held:.4f} | {secs:.1f} |")
PY
