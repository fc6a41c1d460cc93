#!/usr/bin/env bash
# Peak anonymous memory and throughput while training on a big dump.
# Makes an N x D float32 .npy (default 2,000,000 x 256 = 2 GB) with numpy,
# trains on it for SECONDS, stops the run with SIGTERM (which checkpoints),
# and reports peak RssAnon (sampled from /proc every 0.1 s) and vectors/s.
# Usage: scripts/bench_memory.sh [ROWS] [DIM] [SECONDS]   (needs python3 + numpy)
set -euo pipefail
rows=${1:-2000000}
dim=${2:-256}
seconds=${3:-150}
work=${TMPDIR:-/tmp}/tidemark-bench-memory
mkdir -p "$work"
data="$work/dump_${rows}x${dim}.npy"
cd "$(dirname "$0")/.."
cargo build --release --quiet
if [ ! -f "$data" ]; then
  python3 - "$data" "$rows" "$dim" <<'PY'
import sys, numpy as np
path, n, d = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n, d))
rng = np.random.default_rng(0)
mix = rng.normal(size=(d, d)).astype(np.float32) / np.sqrt(d)
for s in range(0, n, 100_000):
    z = rng.normal(size=(min(100_000, n - s), d)).astype(np.float32)
    out[s:s + len(z)] = np.tanh(z @ mix) + 0.1 * z
out.flush()
PY
fi
ck="$work/run.checkpoint.safetensors"
rm -f "$ck"
SECONDS=0
./target/release/tidemark fit "$data" -o "$work/model.safetensors" --checkpoint "$ck" \
  --epochs 1000 --patience 1000 --batch-size 256 --hidden 512 --layers 6 -q &
pid=$!
peak=0
while kill -0 "$pid" 2>/dev/null; do
  anon=$(awk '/RssAnon/ {print $2}' "/proc/$pid/status" 2>/dev/null || echo 0)
  [ -n "$anon" ] && [ "$anon" -gt "$peak" ] && peak=$anon
  if [ "$SECONDS" -ge "$seconds" ]; then kill -TERM "$pid"; break; fi
  sleep 0.1
done
while kill -0 "$pid" 2>/dev/null; do
  anon=$(awk '/RssAnon/ {print $2}' "/proc/$pid/status" 2>/dev/null || echo 0)
  [ -n "$anon" ] && [ "$anon" -gt "$peak" ] && peak=$anon
  sleep 0.1
done
wait "$pid" || true
python3 - "$ck" "$peak" "$rows" "$dim" <<'PY'
import json, struct, sys
path, peak_kb, rows, dim = sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4]
with open(path, "rb") as f:
    n = struct.unpack("<Q", f.read(8))[0]
    meta = json.loads(f.read(n))["__metadata__"]
state = json.loads(meta["tidemark_checkpoint"])
settings = json.loads(meta["tidemark"])["training"]["settings"]
steps, secs = state["step"], state["seconds"]
print(f"data {rows} x {dim} float32, threads {settings['threads']}, batch {settings['batch_size']}")
print(f"peak RssAnon {peak_kb / 1024:.0f} MiB")
print(f"{steps} steps in {secs:.1f} s of run time (setup included): {steps * settings['batch_size'] / secs:.0f} vectors/s overall")
PY
