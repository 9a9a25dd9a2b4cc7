#!/usr/bin/env bash
# Whole-model CPU timing of a pruned model on its sparse kernels against its
# dense original, with the documented defaults of `lopper latency`
# (encoders: batch 1 and 32 at 128 tokens; decoders: a 256-token prefill and
# batch-1 decode with the key/value cache, 32 timed tokens after a 32-token
# prompt and 2 untimed ones; 5 timed calls or decode runs per variant, 2
# threads), and write the JSON report to OUT.json.
#
#   scripts/repro-latency.sh DENSE_DIR PRUNED_DIR OUT.json
#
# Ratios dense / pruned sit under keys containing "speedup"
# (scenarios.<name>.speedup.sparse_kernels, .as_written for a structurally
# smaller model); decode figures under scenarios.decode_batch_1. THREADS
# overrides the thread count. The report is written to a temporary file
# next to OUT.json and renamed at the end, so a failed run leaves nothing.
set -euo pipefail
if [ $# -ne 3 ]; then
    echo "usage: $0 DENSE_DIR PRUNED_DIR OUT.json" >&2
    exit 2
fi
dense=$1 pruned=$2 out=$3
for d in "$dense" "$pruned"; do
    if [ ! -f "$d/config.json" ]; then
        echo "$0: $d is not a model directory (no config.json)" >&2
        exit 2
    fi
done
if [ -e "$out" ] && [ ! -f "$out" ]; then
    echo "$0: $out exists and is not a regular file" >&2
    exit 2
fi
case "$(realpath -m "$out")" in
    "$(realpath "$dense")"/* | "$(realpath "$pruned")"/*)
        echo "$0: $out is inside a model directory; write it elsewhere" >&2
        exit 2 ;;
esac
root=$(cd "$(dirname "$0")/.." && pwd)
cargo build --release --quiet --manifest-path "$root/Cargo.toml"
tmp=$(mktemp "$(dirname "$out")/.repro-latency.XXXXXX")
trap 'rm -f "$tmp"' EXIT
echo "load before: $(cut -d' ' -f1-3 /proc/loadavg)" >&2
"$root/target/release/lopper" latency "$pruned" --dense "$dense" \
    --threads "${THREADS:-2}" --json > "$tmp"
mv "$tmp" "$out"
trap - EXIT
echo "wrote $out (load after: $(cut -d' ' -f1-3 /proc/loadavg))" >&2
