#!/usr/bin/env bash
# Side-by-side speed of tidemark's compute core and the same flow in PyTorch
# (scripts/bench_pytorch.py): same architecture, initialisation scheme,
# batch, threads and synthetic data. Runs alternate (tidemark, PyTorch,
# tidemark, ...), ROUNDS of each per configuration; medians and ratios are
# printed with the machine's load average. Not part of CI.
# Usage: scripts/bench_vs_pytorch.sh [THREADS] [SECONDS] [ROUNDS]
# Installs torch into ./.venv-bench (or $TIDEMARK_BENCH_VENV) when missing.
set -euo pipefail
threads=${1:-1}
seconds=${2:-3}
rounds=${3:-3}
cd "$(dirname "$0")/.."
venv=${TIDEMARK_BENCH_VENV:-.venv-bench}
if ! "$venv/bin/python" -c "import torch" 2>/dev/null; then
  python3 -m venv "$venv"
  "$venv/bin/pip" install --quiet torch numpy
fi
cargo build --release --quiet
out=$(mktemp -d)
trap 'rm -rf "$out"' EXIT
echo "load average before: $(cut -d' ' -f1-3 /proc/loadavg); threads $threads, $seconds s per measurement, $rounds rounds"
for config in "64 128 8 256" "256 512 8 512" "768 512 6 512"; do
  set -- $config
  for round in $(seq "$rounds"); do
    ./target/release/tidemark bench --dim "$1" --hidden "$2" --layers "$3" --batch "$4" \
      --threads "$threads" --seconds "$seconds" --json "$out/tm_$1_$round.json" > /dev/null
    "$venv/bin/python" scripts/bench_pytorch.py "$1" "$2" "$3" "$4" "$threads" "$seconds" > "$out/pt_$1_$round.json"
  done
done
python3 - "$out" "$rounds" <<'PY'
import json, statistics, sys
out, rounds = sys.argv[1], int(sys.argv[2])
print(f"{'D, hidden, layers, batch':<26}{'tidemark train':>16}{'PyTorch train':>15}{'ratio':>7}{'tidemark score':>16}{'PyTorch score':>15}{'ratio':>7}{'train % of GEMM peak':>22}")
for d, cfg in [(64, "64, 128, 8, 256"), (256, "256, 512, 8, 512"), (768, "768, 512, 6, 512")]:
    tm = [json.load(open(f"{out}/tm_{d}_{r}.json")) for r in range(1, rounds + 1)]
    pt = [json.load(open(f"{out}/pt_{d}_{r}.json")) for r in range(1, rounds + 1)]
    med = lambda rows, key: statistics.median(r[key] for r in rows)
    tt, ts = med(tm, "train_samples_per_s"), med(tm, "score_samples_per_s")
    pt_t, pt_s = med(pt, "train_samples_per_s"), med(pt, "score_samples_per_s")
    frac = med(tm, "train_fraction_of_peak")
    print(f"{cfg:<26}{tt:>16.0f}{pt_t:>15.0f}{tt / pt_t:>7.2f}{ts:>16.0f}{pt_s:>15.0f}{ts / pt_s:>7.2f}{100 * frac:>21.0f}%")
print(f"PyTorch {pt[0]['torch']}; GEMM peak (tidemark, one core) {statistics.median(r['gemm_peak_gflops'] for r in tm):.0f} GFLOP/s")
PY
echo "load average after: $(cut -d' ' -f1-3 /proc/loadavg)"
