#!/usr/bin/env bash
# Kill soak: for SECONDS, run fit / score / calibrate on small generated data
# and stop them at random moments with SIGKILL or SIGTERM, then check that
#   - every file that survives loads (or is absent): models and checkpoints
#     through `tidemark inspect`, logs as JSON lines, scores with numpy, the
#     calibration as JSON;
#   - a run that is resumed (fit) or rerun (score, calibrate) until it ends
#     gives exactly the bytes of the uninterrupted run;
#   - no temporary file is left after a clean run;
#   - no run ends in a panic (status 101) or an internal error (70).
# Prints the counts at the end; exits non-zero when any check failed.
#
# Usage: scripts/soak.sh SECONDS   (needs python3 with numpy; run it with nice -n 19)
set -u
SECONDS_TOTAL=${1:?usage: scripts/soak.sh SECONDS}
ROOT=$(cd "$(dirname "$0")/.." && pwd)
cargo build --release --quiet --manifest-path "$ROOT/Cargo.toml" || exit 1
# Under target/ (ignored by git), where no /tmp cleaner reaches.
WORK=$(mktemp -d "$ROOT/target/soak.XXXXXX")
trap 'rm -rf "$WORK"' EXIT
trap 'exit 130' INT TERM
# A copy, so that a rebuild during the soak does not change the binary under it.
cp "$ROOT/target/release/tidemark" "$WORK/tidemark-soak"
BIN="$WORK/tidemark-soak"
cd "$WORK" || exit 1
export CANDLE_NUM_THREADS=1
RANDOM=${SOAK_SEED:-1}

python3 - <<'EOF'
import numpy as np
rng = np.random.default_rng(0)
def make(n):
    z = rng.standard_normal((n, 8)).astype(np.float32)
    z[:, 1] += 0.8 * z[:, 0] ** 2
    return z
np.save("train.npy", make(4000))
np.save("held.npy", make(20000))
EOF

FIT=(--epochs 6 --patience 100 --hidden 32 --layers 4 --threads 1 --seed 3 --checkpoint-minutes 0 -q)
runs=0 kills=0 terms=0 resumes=0 restarts=0 reruns=0 identical=0 checked=0 failures=0

fail() { echo "FAIL: $*"; failures=$((failures + 1)); }

# Run a command in the background and stop it after a random delay of up to
# $1 milliseconds (or let it finish); sets $status to its exit status.
run_and_maybe_kill() {
    local most=$1
    shift
    "$@" >/dev/null 2>>errors.log &
    local pid=$! delay=$((RANDOM % most))
    runs=$((runs + 1))
    sleep "$(printf '%d.%03d' $((delay / 1000)) $((delay % 1000)))"
    if kill -0 "$pid" 2>/dev/null; then
        if ((RANDOM % 2)); then
            kill -KILL "$pid" 2>/dev/null && kills=$((kills + 1))
        else
            kill -TERM "$pid" 2>/dev/null && terms=$((terms + 1))
        fi
    fi
    # (2>/dev/null: the shell's own "Killed" notices)
    wait "$pid" 2>/dev/null
    status=$?
    if ((status == 101 || status == 70)); then
        fail "status $status from: $*"
    fi
}

model_loads() { "$BIN" inspect "$1" >/dev/null 2>&1; }

# Whatever a killed run left must load, or be absent.
check_survivors() {
    local f
    for f in "$@"; do
        [[ -e $f ]] || continue
        checked=$((checked + 1))
        case $f in
        *.safetensors) model_loads "$f" || fail "$f does not load" ;;
        *.jsonl) python3 -c "import json,sys; [json.loads(l) for l in open(sys.argv[1])]" "$f" || fail "$f: bad JSON lines" ;;
        *.json) python3 -c "import json,sys; json.load(open(sys.argv[1]))" "$f" || fail "$f: bad JSON" ;;
        *.npy) python3 -c "import numpy as np,sys; a=np.load(sys.argv[1]); assert a.shape==(20000,9)" "$f" || fail "$f: bad .npy" ;;
        esac
    done
}

no_temporaries() {
    local left
    left=$(find . -maxdepth 1 -name ".$1.*.tmp" | head -1)
    [[ -z $left ]] || fail "temporary file left after a clean run: $left"
}

# The uninterrupted results.
"$BIN" fit train.npy -o ref.safetensors "${FIT[@]}" || exit 1
"$BIN" score ref.safetensors held.npy -o ref_scores.npy || exit 1
"$BIN" calibrate ref.safetensors held.npy -o ref_cal.json --false-alarm 0.05 2>/dev/null || exit 1

started=$(date +%s)
i=0
while (($(date +%s) - started < SECONDS_TOTAL)); do
    i=$((i + 1))
    [[ -f $BIN ]] || { echo "soak: the work directory $WORK went away"; exit 1; }
    case $((RANDOM % 3)) in
    0)
        m=m$i.safetensors ck=ck$i.safetensors log=log$i.jsonl
        run_and_maybe_kill 1500 "$BIN" fit train.npy -o "$m" --checkpoint "$ck" --log "$log" "${FIT[@]}"
        while ((status != 0)); do
            check_survivors "$m" "$ck" "$log"
            if [[ -e $ck ]]; then
                resumes=$((resumes + 1))
                run_and_maybe_kill 1500 "$BIN" fit train.npy -o "$m" --resume "$ck" --log "$log" "${FIT[@]}"
            else
                # Killed before its first checkpoint: start again.
                restarts=$((restarts + 1))
                run_and_maybe_kill 1500 "$BIN" fit train.npy -o "$m" --checkpoint "$ck" --log "$log" "${FIT[@]}" --force
            fi
        done
        if cmp -s "$m" ref.safetensors; then identical=$((identical + 1)); else fail "$m differs from the uninterrupted model"; fi
        [[ ! -e $ck ]] || fail "$ck left after a finished run"
        no_temporaries "$m"
        no_temporaries "$ck"
        no_temporaries "$log"
        rm -f "$m" "$log"
        ;;
    1)
        s=s$i.npy
        run_and_maybe_kill 120 "$BIN" score ref.safetensors held.npy -o "$s"
        while ((status != 0)); do
            check_survivors "$s" "${s%.npy}.json"
            reruns=$((reruns + 1))
            run_and_maybe_kill 120 "$BIN" score ref.safetensors held.npy -o "$s" --force
        done
        check_survivors "$s"
        cmp -s "$s" ref_scores.npy && cmp -s "${s%.npy}.json" ref_scores.json || fail "$s differs from the uninterrupted scores"
        no_temporaries "$s"
        no_temporaries "${s%.npy}.json"
        rm -f "$s" "${s%.npy}.json"
        ;;
    2)
        c=c$i.json
        run_and_maybe_kill 120 "$BIN" calibrate ref.safetensors held.npy -o "$c" --false-alarm 0.05
        while ((status != 0)); do
            check_survivors "$c"
            reruns=$((reruns + 1))
            run_and_maybe_kill 120 "$BIN" calibrate ref.safetensors held.npy -o "$c" --false-alarm 0.05 --force
        done
        cmp -s "$c" ref_cal.json || fail "$c differs from the uninterrupted calibration"
        no_temporaries "$c"
        rm -f "$c"
        ;;
    esac
done
left=$(find . -name '*.tmp' | wc -l)
((left == 0)) || fail "$left temporary files left at the end"
echo "soak: $i jobs, $runs runs, $kills SIGKILL, $terms SIGTERM, $resumes resumes, $restarts fits started again," \
    "$reruns score/calibrate reruns," \
    "$identical fits byte-identical to the uninterrupted model, $checked surviving files checked, $failures failures"
((failures == 0))
