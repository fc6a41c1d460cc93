#!/usr/bin/env bash
# Flows side by side against one flow on every thread: `tidemark bench`
# training throughput at one thread, at THREADS threads, and THREADS
# one-thread runs at once (their sum), for each width. Optionally the
# default `fit` (the search) on given files with two binaries (BEFORE and
# BIN), e.g. one that races flows side by side and one that threads them.
#
#   scripts/bench_lanes.sh [THREADS] [SECONDS]
#   BEFORE=old/tidemark FIT_ARGS="train.npy --val val.npy" scripts/bench_lanes.sh
#
# Run it on an idle machine: other jobs on the cores change every figure.
set -euo pipefail
threads=${1:-2}
seconds=${2:-5}
bin=${BIN:-target/release/tidemark}
rate() { grep -o "train [0-9]* vec/s" | grep -o "[0-9]*"; }
for dim_hidden in "64 128" "384 512"; do
  set -- $dim_hidden
  one=$("$bin" bench --dim "$1" --hidden "$2" --threads 1 --seconds "$seconds" 2>&1 | rate)
  all=$("$bin" bench --dim "$1" --hidden "$2" --threads "$threads" --seconds "$seconds" 2>&1 | rate)
  tmp=$(mktemp -d)
  for i in $(seq "$threads"); do
    "$bin" bench --dim "$1" --hidden "$2" --threads 1 --seconds "$seconds" > "$tmp/$i" 2>&1 &
  done
  wait
  side=$(cat "$tmp"/* | rate | paste -sd+ | bc)
  rm -rf "$tmp"
  echo "D $1 hidden $2: 1 thread $one vec/s; $threads threads $all vec/s; $threads x 1 thread side by side $side vec/s;" \
    "side by side / threaded = $(echo "scale=2; $side / $all" | bc)"
done
if [[ -n "${BEFORE:-}" && -n "${FIT_ARGS:-}" ]]; then
  out=$(mktemp -d)
  for b in "$BEFORE" "$bin"; do
    start=$(date +%s.%N)
    # shellcheck disable=SC2086
    "$b" fit $FIT_ARGS -o "$out/model.safetensors" --budget 10h --threads "$threads" -q --force
    echo "default fit with $b: $(echo "$(date +%s.%N) - $start" | bc) s"
  done
  rm -rf "$out"
fi
