#!/usr/bin/env bash
# Score a Parquet dataset with PySpark in local mode (local[2]) through the
# Python package, and check that its scores equal the command line's on the
# same rows. Installs pyspark, pyarrow and the package into a virtual
# environment (target/spark-venv) and a Java runtime with apt if none is found.
#   examples/spark/run.sh [ROWS]
set -euo pipefail
cd "$(dirname "$0")/../.."
rows=${1:-40000}
venv=target/spark-venv
if ! command -v java >/dev/null; then
    apt-get update -qq && apt-get install -y -qq openjdk-17-jre-headless
fi
cargo build --release -q
if [ ! -x "$venv/bin/python" ]; then
    python3 -m venv "$venv"
fi
"$venv/bin/pip" install -q pyspark pyarrow numpy pandas maturin
# Shares target/ with the build above: only the bindings compile anew.
CARGO_TARGET_DIR="$PWD/target" "$venv/bin/pip" install -q ./python
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
"$venv/bin/python" examples/spark/make_data.py "$work" --rows "$rows"
# One flow at the settings table, a few epochs: the check is about scoring.
./target/release/tidemark fit "$work/train.parquet" -o "$work/model.safetensors" -q --no-search --epochs 5
start=$(date +%s%N)
PYSPARK_PYTHON="$venv/bin/python" "$venv/bin/python" examples/spark/score_with_spark.py \
    "$work/model.safetensors" "$work/batch" "$work/spark_scores" --keep id
spark_ms=$(( ($(date +%s%N) - start) / 1000000 ))
cli=()
start=$(date +%s%N)
for f in "$work"/batch/*.parquet; do
    out="$work/cli-$(basename "$f")"
    ./target/release/tidemark score "$work/model.safetensors" "$f" -o "$out" --keep id \
        --columns log_likelihood,typicality
    cli+=("$out")
done
cli_ms=$(( ($(date +%s%N) - start) / 1000000 ))
"$venv/bin/python" examples/spark/compare.py "$work/spark_scores" "${cli[@]}"
echo "rows $rows: Spark local[2] ${spark_ms} ms (JVM start included), CLI ${cli_ms} ms"
