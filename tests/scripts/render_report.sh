#!/usr/bin/env bash
# Rendering check of report.html: builds the release binary if needed, runs the demo into a
# temporary folder, loads its report.html in headless Chromium (the Debian package
# `chromium`), saves a screenshot and checks that the page rendered: the screenshot is a
# PNG of the window size that is not a single colour, and the rendered DOM holds the five
# inline SVG plots and every section of the report. Then it measures, in Chromium, the
# rendered size of every plot text (font size times the SVG's scale on screen) at a wide
# (1280 px) and a narrow (420 px) window: at least 11 px (issue 12 item 8), and that no
# table sits in a box of limited height. The measuring script goes into a copy of the page
# (the report itself has no script). Finally it prints the page to PDF.
#
# Usage: tests/scripts/render_report.sh [SCREENSHOT.png]
# (default: the screenshot stays in the temporary folder, whose path is printed).
set -euo pipefail

cd "$(dirname "$0")/../.."
ROOT="$PWD"
BIN="$ROOT/target/release/weighbridge"
CHROMIUM="${CHROMIUM:-/usr/bin/chromium}"

if [ ! -x "$CHROMIUM" ]; then
    echo "installing the Debian package chromium"
    apt-get update -qq
    apt-get install -y -qq chromium >/dev/null
fi
"$CHROMIUM" --version

# Cargo decides whether anything needs rebuilding.
cargo build --release --quiet

WORK="$(mktemp -d)"
OUT="$WORK/demo"
SHOT="${1:-$WORK/report.png}"
# A small demo is enough to check rendering.
"$BIN" demo --out "$OUT" --screens 2 > "$WORK/demo.txt"
REPORT="$OUT/report.html"
test -s "$REPORT"
grep -q "file://$REPORT" "$WORK/demo.txt" || {
    echo "the demo did not print the report's address file://$REPORT" >&2
    exit 1
}

chromium_run() {
    # No network: every flag that would make Chromium call home is off, and the page
    # itself references nothing outside the file.
    timeout 120 "$CHROMIUM" --headless --no-sandbox --disable-gpu --disable-quic \
        --no-first-run --disable-background-networking --disable-component-update \
        --disable-sync --user-data-dir="$(mktemp -d -p "$WORK")" --window-size=1200,7000 \
        "$@" "file://$REPORT" 2>> "$WORK/chromium.log"
}

chromium_run --screenshot="$SHOT" > /dev/null
chromium_run --dump-dom > "$WORK/dom.html"

# A copy of the page with a measuring script; Chromium runs it before dumping the DOM.
MEASURE="$OUT/measure.html"
python3 - "$REPORT" "$MEASURE" <<'PY'
import sys
page = open(sys.argv[1], encoding="utf-8").read()
script = """<script>
const sizes = [];
for (const t of document.querySelectorAll("svg text")) {
  const m = t.getScreenCTM();
  sizes.push(parseFloat(getComputedStyle(t).fontSize) * Math.hypot(m.a, m.b));
}
const boxed = [...document.querySelectorAll("table")].filter(t => {
  for (let e = t.parentElement; e; e = e.parentElement) {
    const s = getComputedStyle(e);
    // A box of limited height, or one that scrolls vertically (overflow-x: auto makes
    // overflow-y auto too, which is harmless while the content fits).
    if (s.maxHeight !== "none") return true;
    if ((s.overflowY === "auto" || s.overflowY === "scroll") && e.scrollHeight > e.clientHeight + 1) return true;
  }
  return false;
}).length;
const pre = document.createElement("pre");
pre.id = "measured";
pre.textContent = "MEASURED " + JSON.stringify({texts: sizes.length, smallest: Math.min(...sizes), boxed});
document.body.appendChild(pre);
</script>"""
open(sys.argv[2], "w", encoding="utf-8").write(page.replace("</body>", script + "</body>"))
PY
for width in 1280 420; do
    timeout 120 "$CHROMIUM" --headless --no-sandbox --disable-gpu --disable-quic \
        --no-first-run --disable-background-networking --disable-component-update \
        --disable-sync --user-data-dir="$(mktemp -d -p "$WORK")" --window-size=$width,2000 \
        --dump-dom "file://$MEASURE" 2>> "$WORK/chromium.log" > "$WORK/measured-$width.html"
    python3 - "$WORK/measured-$width.html" "$width" <<'PY'
import json, re, sys
text = open(sys.argv[1], encoding="utf-8").read()
found = re.search(r"MEASURED (\{.*?\})", text)
assert found, "the measuring script did not run"
m = json.loads(found.group(1))
print(f"window {sys.argv[2]} px: {m['texts']} plot texts, smallest rendered {m['smallest']:.1f} px, "
      f"{m['boxed']} tables in boxes of limited height")
assert m["texts"] > 50, m
assert m["smallest"] >= 11.0, f"plot text of {m['smallest']:.1f} px at {sys.argv[2]} px wide"
assert m["boxed"] == 0, m
PY
done
rm "$MEASURE"
timeout 120 "$CHROMIUM" --headless --no-sandbox --disable-gpu --disable-quic \
    --no-first-run --disable-background-networking --disable-component-update \
    --disable-sync --user-data-dir="$(mktemp -d -p "$WORK")" --no-pdf-header-footer \
    --print-to-pdf="$WORK/report.pdf" "file://$REPORT" 2>> "$WORK/chromium.log" > /dev/null
test -s "$WORK/report.pdf"
head -c 5 "$WORK/report.pdf" | grep -q "%PDF-" || { echo "no PDF printed" >&2; exit 1; }
echo "printed to $WORK/report.pdf"

python3 - "$SHOT" "$WORK/dom.html" <<'PY'
"""Check the screenshot (PNG decoded with the standard library only) and the DOM."""
import struct
import sys
import zlib

shot, dom_path = sys.argv[1], sys.argv[2]
data = open(shot, "rb").read()
assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
pos, idat, header = 8, b"", None
while pos < len(data):
    (length,) = struct.unpack(">I", data[pos:pos + 4])
    kind = data[pos + 4:pos + 8]
    body = data[pos + 8:pos + 8 + length]
    if kind == b"IHDR":
        header = struct.unpack(">IIBBBBB", body)
    elif kind == b"IDAT":
        idat += body
    pos += 12 + length
width, height, depth, colour, _, _, interlace = header
assert (width, height) == (1200, 7000), f"unexpected size {width}x{height}"
assert depth == 8 and colour in (2, 6) and interlace == 0, header
bpp = 3 if colour == 2 else 4
raw = zlib.decompress(idat)
stride = width * bpp
rows, prev, i = [], bytearray(stride), 0
for _ in range(height):
    kind = raw[i]
    line = bytearray(raw[i + 1:i + 1 + stride])
    i += 1 + stride
    for x in range(stride):
        a = line[x - bpp] if x >= bpp else 0
        b = prev[x]
        c = prev[x - bpp] if x >= bpp else 0
        if kind == 1:
            line[x] = (line[x] + a) & 255
        elif kind == 2:
            line[x] = (line[x] + b) & 255
        elif kind == 3:
            line[x] = (line[x] + (a + b) // 2) & 255
        elif kind == 4:
            p = a + b - c
            pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
            pred = a if pa <= pb and pa <= pc else (b if pb <= pc else c)
            line[x] = (line[x] + pred) & 255
    rows.append(bytes(line))
    prev = line
colours = set()
non_white = 0
for line in rows:
    for x in range(0, stride, bpp):
        px = line[x:x + 3]
        colours.add(px)
        if px != b"\xff\xff\xff":
            non_white += 1
share = non_white / (width * height)
print(f"screenshot {width}x{height}: {len(colours)} distinct colours, "
      f"{100 * share:.1f}% of pixels not white")
assert len(colours) > 20, "the screenshot is (nearly) a single colour"
assert share > 0.02, "the screenshot is almost blank"
# The plots' two set colours (labeled blue (31, 119, 180), pool orange (214, 96, 39), drawn
# translucent, so blended with white or with each other) must be on screen.
bluish = sum(1 for px in colours if px[2] > px[0] + 60 and px[2] > px[1])
orangish = sum(1 for px in colours if px[0] > px[2] + 60 and px[0] > px[1] + 30)
print(f"plot colours on screen: {bluish} bluish, {orangish} orange shades")
assert bluish > 0, "no labeled-set (blue) plot colour on screen"
assert orangish > 0, "no pool (orange) plot colour on screen"

dom = open(dom_path, encoding="utf-8").read()
assert dom.count("<svg") == 5, f"{dom.count('<svg')} inline SVG plots in the DOM, expected 5"
for section in ["title", "warnings", "settings", "shortlist", "shift", "level-curve",
                "comparison", "calibration-batch", "cautions", "method"]:
    assert f'id="{section}"' in dom, f"section {section} missing from the DOM"
assert "<script" not in dom.lower()
print("DOM: 5 inline plots and every section present, no script")
PY
echo "report rendered: $SHOT"
