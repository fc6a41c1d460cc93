#!/usr/bin/env python3
"""A raced flow's best validation NLL (nats per vector) after given epochs,
measured outside the search: fits the flow with explicit settings (the
configuration the search names, on the full schedule, so that the learning
rate follows the race's) and `--log`, stops it with SIGTERM once the log
passes the last of EPOCHS, and reads the best validation NLL up to each
from the log.
The log is in nats per dimension; the number of dimensions is read from
`inspect` of the model that SIGTERM writes.

Run: python3 scripts/quality/stage_value.py TIDEMARK_BIN SET_DIR EPOCHS -- FIT_OPTIONS...   (EPOCHS: 50 or 50,100)
e.g. ... sets/sentences 50,100 -- --kind flow --flow-dims 381 --hidden 256 --dropout 0.3 --noise 0.3
         --weight-decay 1e-4 --epochs 200 --patience 10
"""
import json
import os
import re
import signal
import subprocess
import sys
import tempfile
import time


def main():
    if "--" not in sys.argv or sys.argv.index("--") != 4:
        sys.exit(__doc__)
    binary, set_dir = sys.argv[1], sys.argv[2]
    epochs = sorted(int(e) for e in sys.argv[3].split(","))
    epoch = epochs[-1]
    fit_args = sys.argv[5:]
    with tempfile.TemporaryDirectory() as tmp:
        model, log = os.path.join(tmp, "m.safetensors"), os.path.join(tmp, "log.jsonl")
        cmd = [binary, "fit", os.path.join(set_dir, "train.npy"), "--val", os.path.join(set_dir, "val.npy"),
               "-o", model, "--log", log, "-q", *fit_args]
        # stderr is left to the terminal: an unread pipe could fill and stall the fit, and a failed fit says why.
        fit = subprocess.Popen(cmd, stdout=subprocess.DEVNULL)
        while fit.poll() is None:
            if os.path.exists(log) and sum(1 for _ in open(log)) >= epoch:
                fit.send_signal(signal.SIGTERM)
                break
            time.sleep(0.5)
        fit.wait()
        entries = [json.loads(line) for line in open(log)]
        if max(e["epoch"] for e in entries) < epoch:
            sys.exit(f"the fit ended at epoch {entries[-1]['epoch']}, before epoch {epoch}")
        shown = subprocess.run([binary, "inspect", model], capture_output=True, text=True, check=True).stdout
        found = re.search(r"validation NLL\s+(-?[\d.]+) nats/vector \((-?[\d.]+) nats/dim\)", shown)
        if not found:
            sys.exit("inspect shows no validation NLL")
        per_vector, per_dim = map(float, found.groups())
        dims = round(per_vector / per_dim)
        for until in epochs:
            best = min(e["val_nll"] for e in entries if e["epoch"] <= until)
            print(f"best validation NLL up to epoch {until}: {best * dims:.2f} nats/vector ({dims} dims)")


if __name__ == "__main__":
    main()
