#!/usr/bin/env bash
# Run each cargo-fuzz target for SECONDS (default 600), one after another,
# at the lowest priority. Seeds the corpora from the committed fixtures and
# tests/bad_inputs; corpora and crashes stay under fuzz/ (not committed).
# Needs cargo-fuzz (`cargo install cargo-fuzz`); works on stable through
# RUSTC_BOOTSTRAP and without a sanitizer.
# Usage: scripts/fuzz.sh [SECONDS] [TARGET...]
set -euo pipefail
cd "$(dirname "$0")/.."
secs=${1:-600}
shift || true
targets=("$@")
[ ${#targets[@]} -eq 0 ] && targets=(npy csv safetensors_data model_file calibration config)
export RUSTC_BOOTSTRAP=1
seed() { # target, file globs
    local t=$1; shift
    mkdir -p "fuzz/corpus/$t"
    for f in "$@"; do [ -f "$f" ] && cp "$f" "fuzz/corpus/$t/" || true; done
}
seed npy tests/fixtures/*.npy tests/bad_inputs/*.npy demo-data/*.npy
seed csv tests/fixtures/*.csv tests/bad_inputs/*.csv
seed safetensors_data tests/fixtures/*.safetensors tests/bad_inputs/st-*.safetensors tests/bad_inputs/ok-*.safetensors
seed model_file tests/bad_inputs/model-*.safetensors fuzz/seeds/*.safetensors
seed calibration tests/bad_inputs/cal-*.json fuzz/seeds/*.cal.json
seed config tests/bad_inputs/config-*.json configs/*.json
# Build once, then run the binaries: editing the crate meanwhile does not
# send every target back to the compiler.
nice -n 19 cargo fuzz build --sanitizer none
bin=fuzz/target/x86_64-unknown-linux-gnu/release
for t in "${targets[@]}"; do
    echo "== $t: ${secs}s"
    mkdir -p "fuzz/artifacts/$t"
    nice -n 19 "$bin/$t" "fuzz/corpus/$t" -artifact_prefix="fuzz/artifacts/$t/" -max_total_time="$secs" \
        -rss_limit_mb=2048 -max_len=65536 -timeout=10 -print_final_stats=1 2>&1 |
        grep -E "^(stat::|INFO: Seed|Done|==[0-9]+==|.*(panicked|SUMMARY|Test unit written|DEDUP))" || true
done
