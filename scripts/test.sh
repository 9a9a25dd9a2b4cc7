#!/usr/bin/env bash
# The whole test suite, with everything it needs, on a fresh machine:
# Python reference packages, the real test model, then cargo's tests.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m pip install --quiet --disable-pip-version-check --root-user-action=ignore numpy safetensors
bash scripts/fetch-test-model.sh
export LOPPER_TEST_MODEL="${LOPPER_TEST_MODEL:-${LOPPER_CACHE:-$HOME/.cache/lopper}/all-minilm-l6-v2}"
cargo fmt --check
# Doc tests first, so the suite's closing summary is the main one. Benches are
# left out (`cargo bench --bench solvers` runs them).
cargo test --release --doc
cargo test --release --lib --bins --tests --examples "$@"
