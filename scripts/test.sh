#!/usr/bin/env bash
# The whole test suite, with everything it needs, on a fresh machine:
# Python reference packages, the real test model, then cargo's tests.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m pip install --quiet --disable-pip-version-check --root-user-action=ignore numpy safetensors onnxruntime tokenizers
bash scripts/fetch-test-model.sh
export LOPPER_TEST_MODEL="${LOPPER_TEST_MODEL:-${LOPPER_CACHE:-$HOME/.cache/lopper}/all-minilm-l6-v2}"
cargo fmt --check
log=$(mktemp)
trap 'rm -f "$log"' EXIT
# Benches are left out (`cargo bench --bench solvers` runs them).
cargo test --release --doc 2>&1 | tee -a "$log"
cargo test --release --lib --bins --tests --examples "$@" 2>&1 | tee -a "$log"
# One closing line over every test binary.
awk '/^test result:/ { p += $4; f += $6 } END { printf "lopper: %d passed, %d failed\n", p, f }' "$log"
