#!/usr/bin/env bash
# The whole test suite, with everything it needs, on a fresh machine:
# Python reference packages, the real test model, then cargo's tests.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m pip install --quiet --disable-pip-version-check numpy safetensors
bash scripts/fetch-test-model.sh
export LOPPER_TEST_MODEL="${LOPPER_TEST_MODEL:-${LOPPER_CACHE:-$HOME/.cache/lopper}/all-minilm-l6-v2}"
cargo test --release --all-targets "$@"
cargo test --release --doc
