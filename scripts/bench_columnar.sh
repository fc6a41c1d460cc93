#!/usr/bin/env bash
# Scoring a 384-wide embedding column from Parquet against the same rows as
# a float32 .npy, one thread each, at two sizes: CPU seconds (user + sys)
# and peak resident memory from /usr/bin/time, best of REPEATS runs; with a
# Gaussian model (scoring nearly free, so reading dominates) and with a
# flow (6 coupling layers over all 384 dims, one epoch of training).
# Needs python3 with numpy and pyarrow (PYTHON=path/to/python to choose).
#   scripts/bench_columnar.sh [ROWS_SMALL] [ROWS_LARGE] [REPEATS]
set -euo pipefail
cd "$(dirname "$0")/.."
small=${1:-50000}; large=${2:-200000}; repeats=${3:-3}
py=${PYTHON:-python3}
bin=target/release/tidemark
cargo build --release -q
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
"$py" - "$work" "$small" "$large" <<'PY'
import sys
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
out, sizes = sys.argv[1], [int(v) for v in sys.argv[2:]]
rng = np.random.default_rng(0)
mix = rng.normal(size=(384, 384)).astype(np.float32) / 20
for n in sizes:
    x = (rng.normal(size=(n, 384)).astype(np.float32) @ mix).astype(np.float32)
    np.save(f"{out}/data{n}.npy", x)
    col = pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), 384)
    pq.write_table(pa.table({"id": np.arange(n), "embedding": col}), f"{out}/data{n}.parquet")
    if n == sizes[0]:
        np.save(f"{out}/fit.npy", x[:5000])
PY
"$bin" fit "$work/fit.npy" -o "$work/gaussian.safetensors" --kind gaussian -q
"$bin" fit "$work/fit.npy" -o "$work/flow.safetensors" --kind flow --flow-dims 384 --epochs 1 -q
source scripts/measure_best.sh
echo "model     rows    format   cpu_s  peak_MiB"
for model in gaussian flow; do
    for n in "$small" "$large"; do
        m="$work/$model.safetensors"
        read -r cn mn < <(measure "$bin" score "$m" "$work/data$n.npy" -o "$work/s.csv" --threads 1 --force)
        read -r cp mp < <(measure "$bin" score "$m" "$work/data$n.parquet" -o "$work/s.csv" --threads 1 --force --column embedding)
        printf "%-9s %-7s npy      %6.2f  %6.0f\n" "$model" "$n" "$cn" "$((mn / 1024))"
        printf "%-9s %-7s parquet  %6.2f  %6.0f   cpu ratio parquet/npy %.3f\n" "$model" "$n" "$cp" "$((mp / 1024))" \
            "$(echo "$cp / $cn" | bc -l)"
    done
done
