#!/usr/bin/env bash
# Where Parquet scoring spends its time and memory beyond .npy's: the same
# N x 384 float32 rows scored with a Gaussian model (scoring nearly free, so
# reading dominates), one thread, from .npy and from Parquet written by
# pyarrow four ways: its defaults (snappy, dictionary tried first, one row
# group for the whole file), no compression and no dictionary, 16,384-row
# row groups, and 16,384-row row groups with no compression or dictionary.
# CPU seconds (user + sys) and peak resident memory from /usr/bin/time, best
# of REPEATS; then, if perf is installed, the hottest functions of one
# default-Parquet run. Uses the built binary; needs python3 with numpy and
# pyarrow (PYTHON=... to choose).
#   scripts/bench_columnar_profile.sh [ROWS...]   (default 50000 200000 400000)
set -euo pipefail
cd "$(dirname "$0")/.."
sizes=("${@:-50000 200000 400000}")
read -r -a sizes <<< "${sizes[*]}"
repeats=${REPEATS:-3}
py=${PYTHON:-python3}
bin=target/release/tidemark
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
"$py" - "$work" "${sizes[@]}" <<'PY'
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
    t = pa.table({"id": np.arange(n), "embedding": col})
    pq.write_table(t, f"{out}/data{n}.default.parquet")
    pq.write_table(t, f"{out}/data{n}.plain.parquet", compression="none", use_dictionary=False)
    pq.write_table(t, f"{out}/data{n}.rg16k.parquet", row_group_size=16384)
    pq.write_table(t, f"{out}/data{n}.rg16k-plain.parquet", row_group_size=16384,
                   compression="none", use_dictionary=False)
    if n == sizes[0]:
        np.save(f"{out}/fit.npy", x[:5000])
    for v in ["default", "plain", "rg16k", "rg16k-plain"]:
        md = pq.ParquetFile(f"{out}/data{n}.{v}.parquet").metadata
        enc = md.row_group(0).column(1).encodings
        print(f"# {n} {v}: {md.num_row_groups} row groups, embedding encodings {enc}", file=sys.stderr)
PY
"$bin" fit "$work/fit.npy" -o "$work/gaussian.safetensors" --kind gaussian -q
source scripts/measure_best.sh
m="$work/gaussian.safetensors"
echo "rows    input                cpu_s  peak_MiB  cpu ratio to npy"
for n in "${sizes[@]}"; do
    read -r cn mn < <(measure "$bin" score "$m" "$work/data$n.npy" -o "$work/s.csv" --threads 1 --force)
    printf "%-7s %-19s %6.2f  %6.0f\n" "$n" npy "$cn" "$((mn / 1024))"
    for v in default plain rg16k rg16k-plain; do
        read -r cp mp < <(measure "$bin" score "$m" "$work/data$n.$v.parquet" -o "$work/s.csv" --threads 1 --force --column embedding)
        printf "%-7s %-19s %6.2f  %6.0f  %.3f\n" "$n" "parquet $v" "$cp" "$((mp / 1024))" "$(echo "$cp / $cn" | bc -l)"
    done
done
if command -v perf >/dev/null; then
    n=${sizes[1]:-${sizes[0]}}
    for input in "data$n.npy" "data$n.default.parquet"; do
        extra=(); case $input in *.parquet) extra=(--column embedding);; esac
        echo "perf, $input: functions over 2% of samples"
        perf record -q -g -o "$work/perf.data" -- "$bin" score "$m" "$work/$input" -o "$work/s.csv" \
            --threads 1 --force "${extra[@]}" >/dev/null 2>&1 || { echo "  perf record failed"; continue; }
        perf report -i "$work/perf.data" --no-children --stdio --percent-limit 2 -g none 2>/dev/null \
            | grep -E '^ +[0-9]' | sed -E 's/ +\[\.\] / /; s/^ +/  /' | cut -c1-160
    done
fi
