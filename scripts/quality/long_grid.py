#!/usr/bin/env python3
"""Long-grid reference for the quality suite: on each set made by
make_sets.py, fit explicit tidemark configurations (`fit --no-search ...`)
on the same train/validation rows as the default fit (train.npy, --val
val.npy, seed 0), score test.npy and every ood_*.npy, and record per
configuration the validation NLL the model reports, the mean held-out
log-likelihood, the likelihood AUROC per outlier set and the wall seconds.
The grid's best is the configuration with the best validation NLL (--also
configurations included since 2026-12-04's second run; reruns with another
--seed never). The default `fit` (no option but --threads) runs first on
each set, from the same binary.

Fitting, inspecting, scoring and AUROC are compare.py's own `tidemark` and
`auroc` functions. Each configuration runs in its own folder of links to the
set's files, so that two fits at once do not share score files.

Grid, per set, in this order (at most --jobs fits at once; --max-flows cuts
the first flow phase, most promising first):
  default fit; --kind mixture; --kind gaussian;
  flows over all live (whitened) dims: --hidden 64/128/256, --layers 6/10,
  --dropout/--noise 0/0, 0.1/0.05, 0.2/0.2, --weight-decay 0/1e-4,
  --epochs 400 --patience 25;
  then --mixing lu and --coupling spline on the best affine flow so far
  (by validation NLL).

Run: python3 scripts/quality/long_grid.py TIDEMARK_BIN SETS_DIR WORK_DIR [--sets digits,curved]
         [--jobs 2] [--threads 1] [--max-flows N] [--stop-at 2026-12-04T01:05]
Writes WORK_DIR/results.json after every fit; a configuration already measured there is not fitted again.
Tables: python3 scripts/quality/long_grid.py --tables RESULTS.json [MORE.json ...]   (markdown; the files' configurations
        merge per set, a later file winning for the same configuration)
"""
import argparse
import datetime as dt
import json
import os
import queue
import subprocess
import sys
import threading
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from compare import auroc, tidemark  # noqa: E402


def with_deadline(stop_at):
    """subprocess.run, with a timeout that ends at stop_at (epoch seconds) if given."""
    def run(*a, **k):
        if stop_at is not None:
            left = stop_at - time.time()
            if left <= 0:
                raise subprocess.TimeoutExpired(a[0] if a else k.get("args"), 0)
            k.setdefault("timeout", left)
        return subprocess.run(*a, **k)
    return run


def flow_grid(dims):
    """Flow configurations, most promising first (moderate regularisation, default-ish width)."""
    base = ["--no-search", "--kind", "flow", "--flow-dims", str(dims), "--epochs", "400", "--patience", "25"]
    regs = [("0.1", "0.05"), ("0", "0"), ("0.2", "0.2")]
    first = [(128, 6, regs[0], "0"), (256, 6, regs[0], "0"), (128, 10, regs[0], "0"), (128, 6, regs[2], "0"),
             (128, 6, regs[1], "0"), (64, 6, regs[0], "0"), (128, 6, regs[0], "1e-4"), (256, 10, regs[0], "0")]
    rest = [(h, l, r, wd) for wd in ("0", "1e-4") for r in regs for l in (6, 10) for h in (64, 128, 256)]
    order = first + [c for c in rest if c not in first]
    return [base + ["--hidden", str(h), "--layers", str(l), "--dropout", r[0], "--noise", r[1], "--weight-decay", wd]
            for h, l, r, wd in order]


def tables(results):
    """Markdown: per set, every configuration (best validation NLL first), then the summary rows."""
    out, summary = [], []
    for name, row in results.items():
        cfgs = {k: v for k, v in row.get("configs", {}).items()}
        ok = {k: v for k, v in cfgs.items() if "error" not in v}
        oods = sorted({kk[6:] for v in ok.values() for kk in v if kk.startswith("auroc_")})
        out += [f"### {name} ({row['rows'][0]} train / {row['rows'][1]} validation / {row['rows'][2]} test rows, "
                f"D {row['dim']}, {row['live_features']} live)", "",
                "| configuration | kind | validation NLL | test LL | " + " | ".join(f"AUROC {o}" for o in oods)
                + " | epochs | seconds |", "|---|---|---|---|" + "---|" * len(oods) + "---|---|"]
        order = sorted(ok, key=lambda k: (ok[k].get("validation_nll") is None, ok[k].get("validation_nll") or 0))
        for k in order:
            v = ok[k]
            vn = v.get("validation_nll")
            out.append(f"| `{k}` | {v.get('kind')} | {vn:.3f} | {v['test_ll']:.3f} | "
                       + " | ".join(f"{v.get('auroc_' + o, float('nan')):.3f}" for o in oods)
                       + f" | {v.get('epochs')} | {v['seconds']:.0f} |")
        for k, v in cfgs.items():
            if "error" in v:
                out.append(f"| `{k}` | not measured: {v['error'][:120]} |")
        out.append("")
        # every explicit configuration, --also ones included, but not reruns with another seed (a seed is not a
        # setting to choose); the default fit is what is judged
        grid = {k: v for k, v in ok.items() if k != "default" and "--seed" not in k and v.get("validation_nll") is not None}
        d = ok.get("default")
        if grid and d:
            b = min(grid, key=lambda k: grid[k]["validation_nll"])
            g = grid[b]
            au = lambda v: ", ".join(f"{o} {v.get('auroc_' + o, float('nan')):.3f}" for o in oods)
            diff = g["test_ll"] - d["test_ll"]
            summary.append(f"| {name} | {d['test_ll']:.2f} ({au(d)}); chose {d.get('kind')}, {d['seconds']:.0f} s | "
                           f"{g['test_ll']:.2f} ({au(g)}); `{b}` | {diff:+.2f} | {'yes' if diff <= 2 else 'no'} |")
    head = ["| set | default fit test LL (AUROC); choice, wall time | long-grid best by validation NLL: test LL (AUROC); "
            "configuration | grid best minus default (nats) | default within 2 nats? |", "|---|---|---|---|---|"]
    return "\n".join(out), "\n".join(head + summary)


def main():
    if len(sys.argv) > 2 and sys.argv[1] == "--tables":
        rows = {}
        for f in sys.argv[2:]:  # configurations merge per set; a later file wins for the same configuration
            for name, row in json.load(open(f)).items():
                into = rows.setdefault(name, {})
                configs = {**into.get("configs", {}), **row.get("configs", {})}
                into.update(row)
                into["configs"] = configs
        per_set, summary = tables(rows)
        print(per_set + "\n" + summary)
        return
    p = argparse.ArgumentParser()
    p.add_argument("binary")
    p.add_argument("sets_dir")
    p.add_argument("work_dir")
    p.add_argument("--sets", default="digits,curved,synthetic,sentences")
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--max-flows", type=int, default=None, help="flows in the first phase per set, 0 for none [default: all 36]")
    p.add_argument("--also", action="append", default=[],
                   help="a further --no-search configuration, fitted after the flow grid, e.g. \"--flow-dims 22\"; "
                        "{all} stands for the dimensions a flow over all of them models (repeatable)")
    p.add_argument("--no-followups", action="store_true", help="skip the --mixing lu / --coupling spline follow-ups")
    p.add_argument("--stop-at", default="", help="UTC time (ISO) after which nothing new starts and running fits are stopped")
    args = p.parse_args()
    stop_at = dt.datetime.fromisoformat(args.stop_at).replace(tzinfo=dt.timezone.utc).timestamp() if args.stop_at else None
    run = with_deadline(stop_at)
    os.makedirs(args.work_dir, exist_ok=True)
    out_json = os.path.join(args.work_dir, "results.json")
    results = json.load(open(out_json)) if os.path.exists(out_json) else {}
    lock = threading.Lock()
    jobs = queue.PriorityQueue()
    seq = [0]

    def save():
        with open(out_json + ".tmp", "w") as f:
            json.dump(results, f, indent=1)
        os.replace(out_json + ".tmp", out_json)

    def run_config(name, set_dir, extra, key):
        """One fit + scoring in its own folder; returns the record (also saved)."""
        with lock:
            prev = results.get(name, {}).get("configs", {}).get(key)
        if prev is not None and "error" not in prev:
            return prev  # measured by an earlier run into the same WORK_DIR
        run_dir = os.path.join(args.work_dir, name, key.replace(" ", "_").replace("-", "") or "default")
        os.makedirs(run_dir, exist_ok=True)
        files = sorted(f for f in os.listdir(set_dir) if f in ("train.npy", "val.npy", "test.npy") or f.startswith("ood_"))
        for f in files:
            link = os.path.join(run_dir, f)
            if not os.path.lexists(link):
                os.symlink(os.path.abspath(os.path.join(set_dir, f)), link)
        oods = [f[4:-4] for f in files if f.startswith("ood_")]
        rec = {"options": " ".join(extra), "started": dt.datetime.now(dt.timezone.utc).strftime("%H:%M:%S")}
        try:
            ll, seconds, meta = tidemark(args.binary, run_dir, extra, run)
            scores = {"test": ll("test"), **{k: ll(f"ood_{k}") for k in oods}}
            tr = meta.get("training", {})
            rec.update({
                "kind": meta.get("kind"),
                "validation_nll": tr.get("best_validation_nll"),
                "test_ll": float(scores["test"].mean()),
                **{f"auroc_{k}": auroc(scores["test"], scores[k]) for k in oods},
                "seconds": seconds,
                "epochs": tr.get("epochs", tr.get("epochs_run")),
                "candidates": [(c.get("kind"), c.get("detail"), c.get("validation_nll")) for c in tr.get("candidates", [])],
                "chosen_detail": tr.get("detail", meta.get("detail")),
            })
        except subprocess.TimeoutExpired:
            rec["error"] = "stopped at --stop-at"
        except Exception as e:  # a failed configuration is recorded, not fatal
            rec["error"] = f"{type(e).__name__}: {e}"[:500]
        with lock:
            results.setdefault(name, {}).setdefault("configs", {})[key] = rec
            save()
        print(name, key, {k: v for k, v in rec.items() if k != "candidates"}, flush=True)
        return rec

    def submit(priority, fn):
        with lock:
            seq[0] += 1
            jobs.put((priority, seq[0], fn))

    def worker():
        while True:
            _, _, fn = jobs.get()
            if fn is None:
                return
            if stop_at is None or time.time() < stop_at:
                fn()
            jobs.task_done()

    def set_driver(idx, name):
        set_dir = os.path.join(args.sets_dir, name)
        train = np.load(os.path.join(set_dir, "train.npy"))
        sd = train.std(0)
        live_cols = sd > 1e-6 * sd.max()  # as compare.py and tidemark count live features
        live = int(live_cols.sum())
        # Directions with variance: what a flow over every dimension models (tidemark leaves out principal
        # directions with no training variance, e.g. the one a LayerNorm's zero-sum constraint removes).
        eig = np.linalg.eigvalsh(np.cov(train[:, live_cols].astype(np.float64), rowvar=False))
        modelled = int((eig > 1e-12 * eig.max()).sum())
        with lock:
            results.setdefault(name, {}).update({"rows": [len(train), len(np.load(os.path.join(set_dir, "val.npy"))),
                                                          len(np.load(os.path.join(set_dir, "test.npy")))],
                                                 "dim": train.shape[1], "live_features": live})
        th = ["--threads", str(args.threads)]
        phase1 = [("default", th), ("--kind mixture", ["--no-search", "--kind", "mixture"] + th),
                  ("--kind gaussian", ["--no-search", "--kind", "gaussian"] + th)]
        flows = flow_grid(modelled)
        if args.max_flows is not None:
            flows = flows[:args.max_flows]
        phase1 += [(" ".join(f[f.index("--hidden"):]), f + th) for f in flows]
        phase1 += [(a, ["--no-search"] + a.replace("{all}", str(modelled)).split() + th) for a in args.also]
        done = []
        events = []
        for i, (key, extra) in enumerate(phase1):
            ev = threading.Event()
            events.append(ev)

            def fn(key=key, extra=extra, ev=ev):
                try:
                    done.append((key, extra, run_config(name, set_dir, extra, key)))
                finally:
                    ev.set()
            submit((idx, 0, i), fn)
        for ev in events:
            while not ev.wait(5):
                if stop_at is not None and time.time() > stop_at:
                    return
        affine = [(r["validation_nll"], key, extra) for key, extra, r in done
                  if r.get("kind") == "flow" and r.get("validation_nll") is not None and "--hidden" in extra]
        if not affine or args.no_followups:
            return
        _, best_key, best_extra = min(affine)
        for j, (tag, more) in enumerate([("--mixing lu", ["--mixing", "lu"]), ("--coupling spline", ["--coupling", "spline"])]):
            if tag in best_key:
                continue  # the best already has it
            submit((idx, 1, j), lambda tag=tag, more=more: run_config(name, set_dir, best_extra + more, best_key + " " + tag))

    threads = [threading.Thread(target=worker, daemon=True) for _ in range(args.jobs)]
    for t in threads:
        t.start()
    drivers = [threading.Thread(target=set_driver, args=(i, n)) for i, n in enumerate(args.sets.split(","))
               if os.path.isdir(os.path.join(args.sets_dir, n))]
    for d in drivers:
        d.start()
    for d in drivers:
        d.join()
    jobs.join()
    for _ in threads:
        submit((1e9,), None)


if __name__ == "__main__":
    main()
