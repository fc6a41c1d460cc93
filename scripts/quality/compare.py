#!/usr/bin/env python3
"""The quality suite: on every set made by make_sets.py, held-out
log-likelihood (nats per vector, mean over test.npy) and likelihood AUROC
against each outlier set for

- gaussian:   the maximum-likelihood full-covariance Gaussian (numpy),
- sk_mixture: scikit-learn's GaussianMixture, full covariances, K in
              1, 2, 4, ... 32 (while training rows per component >= 2 D) and
              reg_covar in 1e-6, 1e-4, 1e-3, 1e-2 times the mean feature
              variance, the pair with the best validation log-likelihood,
- tidemark:   `tidemark fit train.npy --val val.npy` with no other option
              (the default), then `tidemark score` (its wall time too),
- tidemark's best candidate: the best validation NLL among every candidate
              the default search fitted (read from the model's metadata),
              with its held-out figure when it is the chosen one.

Run: python3 scripts/quality/compare.py TIDEMARK_BIN [DIR] [--sets a,b] [--extra-fit-args "--kind mixture"]
           [--json FILE] [--md FILE] [--reuse EARLIER.json] [--fitted]
Writes DIR/results.json (after every set, so an interrupted run keeps what
it measured) and prints a markdown table (also to --md FILE).
"""
import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np
from sklearn.metrics import roc_auc_score
from sklearn.mixture import GaussianMixture

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from table import markdown  # noqa: E402


def auroc(id_ll, ood_ll):
    y = np.r_[np.zeros(len(id_ll)), np.ones(len(ood_ll))]
    return float(roc_auc_score(y, -np.r_[id_ll, ood_ll]))


def gaussian(train):
    mu = train.mean(0)
    cov = np.cov(train, rowvar=False, bias=True)
    sign, logdet = np.linalg.slogdet(cov)
    if sign <= 0:
        return None
    inv = np.linalg.inv(cov)
    d = train.shape[1]

    def ll(x):
        c = x - mu
        return -0.5 * (np.einsum("ij,jk,ik->i", c, inv, c) + logdet + d * np.log(2 * np.pi))
    return ll


def sk_mixture(train, val):
    d = train.shape[1]
    scale = train.var(0).mean()
    best = None
    k = 1
    while k <= 32 and (k == 1 or len(train) / k >= 2 * d):
        for reg in (1e-6, 1e-4, 1e-3, 1e-2):
            try:
                gm = GaussianMixture(k, covariance_type="full", reg_covar=reg * scale, random_state=0).fit(train)
            except Exception:
                continue
            v = gm.score(val)
            if best is None or v > best[0]:
                best = (v, k, reg, gm)
        k *= 2
    v, k, reg, gm = best
    return gm.score_samples, f"K={k}, reg={reg:g} x mean var"


def tidemark(binary, d, extra, run=subprocess.run, fitted=False):
    """Default (or `extra`) fit of set folder d; its held-out log-likelihood per file name, wall seconds and
    inspect metadata. `run` stands in for subprocess.run (a caller may add a timeout). With `fitted` the model
    already in d is scored as it is (a search finished with `fit --resume`), and its wall time is unknown (None)."""
    model = os.path.join(d, "model" + ("_" + "_".join(x.strip("-") for x in extra) if extra else "") + ".safetensors")
    seconds = None
    if not fitted:
        t = time.time()
        run([binary, "fit", os.path.join(d, "train.npy"), "--val", os.path.join(d, "val.npy"), "-o", model,
             "--force", "-q", *extra], check=True)
        seconds = time.time() - t
    meta = json.loads(run([binary, "inspect", model, "--json"], check=True, capture_output=True, text=True).stdout)

    def ll(name):
        out = os.path.join(d, f"scores_{name}.npy")
        run([binary, "score", model, os.path.join(d, f"{name}.npy"), "-o", out, "--columns", "log_likelihood",
             "--force"], check=True, capture_output=True)
        return np.load(out).reshape(-1)
    return ll, seconds, meta


def main():
    p = argparse.ArgumentParser()
    p.add_argument("binary")
    p.add_argument("dir", nargs="?", default="target/quality")
    p.add_argument("--sets", default="")
    p.add_argument("--extra", "--extra-fit-args", dest="extra", action="append", default=[],
                   help="another tidemark fit configuration to compare, e.g. \"--kind mixture\" (repeatable)")
    p.add_argument("--json", default="", help="where to write the results [default: DIR/results.json]")
    p.add_argument("--md", default="", help="also write the markdown table to this file")
    p.add_argument("--reuse", default="",
                   help="an earlier results JSON on the same sets: take its Gaussian and scikit-learn mixture rows "
                        "instead of refitting them (only tidemark changed)")
    p.add_argument("--fitted", action="store_true",
                   help="score the models already in the set folders instead of fitting them (e.g. a search that was "
                        "interrupted and finished with `tidemark fit ... --resume`); their wall times are not known")
    args = p.parse_args()
    earlier = json.load(open(args.reuse)) if args.reuse else {}

    results = {}
    sets = [s for s in sorted(os.listdir(args.dir)) if os.path.isdir(os.path.join(args.dir, s))]
    if args.sets:
        sets = [s for s in sets if s in args.sets.split(",")]
    for name in sets:
        d = os.path.join(args.dir, name)
        load = lambda f: np.load(os.path.join(d, f)).astype(np.float64)
        train, val, test = load("train.npy"), load("val.npy"), load("test.npy")
        oods = {f[4:-4]: load(f) for f in sorted(os.listdir(d)) if f.startswith("ood_")}
        # Columns that do not vary in training (dead ReLU units) are left out,
        # as tidemark leaves them out of its log-likelihood, so that every
        # density is over the same features.
        sd = train.std(0)
        live = sd > 1e-6 * sd.max()
        cut = lambda x: x[:, live]
        row = {"rows": [len(train), len(val), len(test)], "dim": train.shape[1]}
        if os.path.exists(os.path.join(d, "exact_test_ll.npy")):
            et = np.load(os.path.join(d, "exact_test_ll.npy"))
            row["exact"] = {"test_ll": float(et.mean())}
            for k in oods:
                f = os.path.join(d, f"exact_ood_{k}_ll.npy")
                if os.path.exists(f):
                    row["exact"][f"auroc_{k}"] = auroc(et, np.load(f))

        def record(key, ll_of, **more):
            t = ll_of(test)
            row[key] = {"test_ll": float(np.mean(t)), **{f"auroc_{k}": auroc(t, ll_of(v)) for k, v in oods.items()}, **more}

        row["live_features"] = int(live.sum())
        if "sk_mixture" in earlier.get(name, {}):
            row.update({k: earlier[name][k] for k in ("gaussian", "sk_mixture") if k in earlier[name]})
        else:
            t0 = time.time()
            g = gaussian(cut(train))
            if g is not None:
                record("gaussian", lambda x: g(cut(x)), seconds=time.time() - t0)
            t0 = time.time()
            sk, how = sk_mixture(cut(train), cut(val))
            record("sk_mixture", lambda x: sk(cut(x)), how=how, seconds=time.time() - t0)
        for extra in [[]] + [e.split() for e in args.extra]:
            ll, seconds, meta = tidemark(args.binary, d, extra, fitted=args.fitted)
            files = {"test": ll("test"), **{k: ll(f"ood_{k}") for k in oods}}
            key = "tidemark" + (" " + " ".join(extra) if extra else "")
            row[key] = {
                "test_ll": float(files["test"].mean()),
                **{f"auroc_{k}": auroc(files["test"], files[k]) for k in oods},
                "seconds": seconds,
                "kind": meta["kind"],
                "validation_nll": meta["training"]["best_validation_nll"],
                "candidates": [(c["kind"], c["detail"], c["validation_nll"]) for c in meta["training"].get("candidates", [])],
            }
        results[name] = row
        print(name, json.dumps(row, indent=1)[:2000], flush=True)
        with open(args.json or os.path.join(args.dir, "results.json"), "w") as f:
            json.dump(results, f, indent=1)

    keys = ["gaussian", "sk_mixture"] + ["tidemark" + (" " + e if e else "") for e in [""] + args.extra]
    lines = [markdown(results, keys), "", "Cells: mean held-out log-likelihood in nats per vector (AUROC against each "
             + "outlier set); tidemark cells add the chosen kind and the fit's wall seconds."]
    print("\n" + "\n".join(lines))
    if args.md:
        with open(args.md, "w") as f:
            f.write("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
