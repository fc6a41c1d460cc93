#!/usr/bin/env bash
# Render an HTML report in headless Chromium (Debian's `chromium` package),
# save a PNG screenshot, and fail if the screenshot is blank (one colour).
# Usage: scripts/check_report_render.sh REPORT.html [OUT.png]
# Needs: chromium, python3 (the blank check reads the PNG with zlib only).
set -euo pipefail
report=$(realpath "$1")
png=${2:-${report%.html}.png}
profile=$(mktemp -d)
trap 'rm -rf "$profile"' EXIT
chromium --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
  --disable-background-networking --disable-component-update --disable-sync \
  --user-data-dir="$profile" --window-size=1280,2400 --screenshot="$png" "file://$report" >/dev/null 2>&1
python3 - "$png" <<'PY'
import struct, sys, zlib
data = open(sys.argv[1], "rb").read()
assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
pos, chunks, width, height, ctype = 8, b"", 0, 0, 0
while pos < len(data):
    n, kind = struct.unpack(">I4s", data[pos:pos + 8])
    body = data[pos + 8:pos + 8 + n]
    if kind == b"IHDR":
        width, height, depth, ctype = struct.unpack(">IIBB", body[:10])
    elif kind == b"IDAT":
        chunks += body
    pos += 12 + n
raw = zlib.decompress(chunks)
channels = {2: 3, 6: 4}.get(ctype, 3)
stride = width * channels + 1
# Count distinct raw byte values across scanlines (filter bytes excluded):
# a blank page compresses to a handful of values.
distinct = set()
for y in range(0, height, 7):
    distinct.update(raw[y * stride + 1:(y + 1) * stride:97])
print(f"{sys.argv[1]}: {width}x{height}, {len(distinct)} distinct sampled byte values")
sys.exit(0 if len(distinct) > 8 else 1)
PY
