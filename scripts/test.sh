#!/usr/bin/env bash
# The whole test suite, with everything it needs, on a fresh machine:
# Python reference packages, the real test model, then cargo's tests.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m pip install --quiet --disable-pip-version-check --root-user-action=ignore numpy safetensors onnxruntime tokenizers
bash scripts/fetch-test-model.sh
# Headless Chromium renders the comparison page in tests/compare.rs
# (scripts/check-report-page.sh). Debian's package; skipped when present.
if ! command -v chromium >/dev/null 2>&1 && ! command -v chromium-browser >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
    echo "installing chromium (apt-get)"
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
  else
    echo "chromium is missing and cannot be installed here: run 'apt-get install -y chromium' as root" >&2
  fi
fi
export LOPPER_TEST_MODEL="${LOPPER_TEST_MODEL:-${LOPPER_CACHE:-$HOME/.cache/lopper}/all-minilm-l6-v2}"
cargo fmt --check
log=$(mktemp)
trap 'rm -f "$log"' EXIT
# Benches are left out (`cargo bench --bench solvers` runs them).
cargo test --release --doc 2>&1 | tee -a "$log"
cargo test --release --lib --bins --tests "$@" 2>&1 | tee -a "$log"
# One closing line over every test binary.
awk '/^test result:/ { p += $4; f += $6 } END { printf "lopper: %d passed, %d failed\n", p, f }' "$log"
