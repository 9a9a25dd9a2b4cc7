#!/usr/bin/env bash
# Open a lopper comparison page in headless Chromium (Debian's `chromium`
# package) and check that it renders:
#
#   bash scripts/check-report-page.sh PAGE.html CHARTS [SHOT.png]
#
# 1. --dump-dom after load: the page holds exactly CHARTS charts
#    (<svg class="lopper-chart">), and the page's own script, run by the
#    browser after layout, counted CHARTS charts with a non-empty box
#    (body[data-rendered-charts]).
# 2. --screenshot at 1280 px wide, as tall as the page: the PNG (decoded with
#    Python's zlib, no imaging library) is not blank (over 3% of pixels not
#    white) and every series colour named in the legends appears in it.
#
# The browser runs with a fresh profile and network features off; the page
# itself needs no network. Prints one line per check; exits 1 on failure,
# 3 when chromium is missing.
set -euo pipefail

page=${1:?usage: check-report-page.sh PAGE.html CHARTS [SHOT.png]}
charts=${2:?usage: check-report-page.sh PAGE.html CHARTS [SHOT.png]}
shot=${3:-}
browser=$(command -v chromium || command -v chromium-browser || true)
if [ -z "$browser" ]; then
    echo "check-report-page: chromium is not installed (apt-get install -y chromium)" >&2
    exit 3
fi
[ -f "$page" ] || { echo "check-report-page: no such page: $page" >&2; exit 1; }
url="file://$(cd "$(dirname "$page")" && pwd)/$(basename "$page")"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
[ -n "$shot" ] || shot="$work/shot.png"

run_browser() {
    # A fresh profile per call; every background fetch off.
    "$browser" --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
        --disable-background-networking --disable-component-update --disable-sync \
        --disable-default-apps --disable-extensions --hide-scrollbars \
        --user-data-dir="$(mktemp -d "$work/profile.XXXX")" "$@" 2>"$work/browser.log"
}

run_browser --window-size=1280,900 --dump-dom "$url" >"$work/dom.html"
height=$(grep -o 'data-page-height="[0-9]*"' "$work/dom.html" | grep -o '[0-9]*' || true)
height=${height:-2400}
[ "$height" -le 12000 ] || height=12000
run_browser --window-size=1280,"$height" --screenshot="$shot" "$url" >/dev/null

python3 - "$work/dom.html" "$shot" "$charts" <<'PY'
import re, struct, sys, zlib

dom_path, png_path, want = sys.argv[1], sys.argv[2], int(sys.argv[3])
dom = open(dom_path, encoding="utf-8").read()
fail = []

svgs = len(re.findall(r'<svg[^>]*class="lopper-chart"', dom))
m = re.search(r'data-rendered-charts="(\d+)"', dom)
rendered = int(m.group(1)) if m else -1
print(f"charts in DOM: {svgs}, laid out with a non-empty box: {rendered}, expected {want}")
if svgs != want or rendered != want:
    fail.append("chart count")

def decode_png(path):
    data = open(path, "rb").read()
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    pos, idat, w = 8, b"", None
    while pos < len(data):
        n, kind = struct.unpack(">I4s", data[pos:pos + 8])
        body = data[pos + 8:pos + 8 + n]
        if kind == b"IHDR":
            w, h, depth, ctype, _, _, interlace = struct.unpack(">IIBBBBB", body)
            assert depth == 8 and ctype in (2, 6) and interlace == 0, (depth, ctype, interlace)
            bpp = 3 if ctype == 2 else 4
        elif kind == b"IDAT":
            idat += body
        pos += 12 + n
    raw = zlib.decompress(idat)
    stride = w * bpp
    rows, prev = [], bytearray(stride)
    for y in range(h):
        f = raw[y * (stride + 1)]
        line = bytearray(raw[y * (stride + 1) + 1:(y + 1) * (stride + 1)])
        for i in range(stride):
            a = line[i - bpp] if i >= bpp else 0
            b = prev[i]
            c = prev[i - bpp] if i >= bpp else 0
            if f == 1:
                line[i] = (line[i] + a) & 255
            elif f == 2:
                line[i] = (line[i] + b) & 255
            elif f == 3:
                line[i] = (line[i] + (a + b) // 2) & 255
            elif f == 4:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                pr = a if pa <= pb and pa <= pc else (b if pb <= pc else c)
                line[i] = (line[i] + pr) & 255
        rows.append(bytes(line))
        prev = line
    return w, h, bpp, rows

w, h, bpp, rows = decode_png(png_path)
counts = {}
ink = 0
for line in rows:
    for i in range(0, len(line), bpp):
        px = line[i:i + 3]
        if px != b"\xff\xff\xff":
            ink += 1
            counts[px] = counts.get(px, 0) + 1
share = ink / (w * h)
print(f"screenshot {w}x{h}: {100 * share:.1f}% of pixels not white")
if w != 1280 or share < 0.03:
    fail.append("blank or narrow screenshot")

colours = sorted(set(re.findall(r'class="legend-item"><line[^>]*stroke="#([0-9A-Fa-f]{6})"', dom)))
for c in colours:
    n = counts.get(bytes.fromhex(c), 0)
    print(f"series colour #{c}: {n} pixels")
    if n < 30:
        fail.append(f"colour #{c} missing")
if not colours:
    fail.append("no legend")

if fail:
    print("check-report-page: FAILED: " + ", ".join(fail))
    sys.exit(1)
print("check-report-page: ok")
PY
