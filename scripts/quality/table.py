#!/usr/bin/env python3
"""Markdown table from one or more results.json files of compare.py (later files win per set).
Run: python3 scripts/quality/table.py target/quality/results.json [more.json ...]"""
import json
import sys


def markdown(rows, keys=("gaussian", "sk_mixture", "tidemark")):
    """The table of compare.py's results: one row per set, one column per method in `keys`."""
    heads = {"gaussian": "ML Gaussian", "sk_mixture": "sklearn GaussianMixture (best on val)", "tidemark": "tidemark default fit"}
    out = ["| set | N train / D | exact | " + " | ".join(heads.get(k, k) for k in keys) + " |",
           "|---|---|---|" + "---|" * len(keys)]
    for name, row in rows.items():
        cells = []
        for k in keys:
            r = row.get(k)
            if r is None:
                cells.append("n/a")
                continue
            aucs = ", ".join(f"{kk[6:]} {v:.3f}" for kk, v in r.items() if kk.startswith("auroc_"))
            more = f"; {r['how']}, {r['seconds']:.0f} s" if "how" in r else ""
            if "kind" in r:
                took = "resumed, time not known" if r["seconds"] is None else f"{r['seconds']:.0f} s"
                more = f"; chose {r['kind']}, fit {took}"
            cells.append(f"{r['test_ll']:.2f} ({aucs}){more}")
        ex = ""
        if "exact" in row:
            aucs = ", ".join(f"{kk[6:]} {v:.3f}" for kk, v in row["exact"].items() if kk.startswith("auroc_"))
            ex = f"{row['exact']['test_ll']:.2f}" + (f" ({aucs})" if aucs else "")
        out.append(f"| {name} | {row['rows'][0]} / {row['dim']} | {ex} | " + " | ".join(cells) + " |")
    return "\n".join(out)


if __name__ == "__main__":
    rows = {}
    for f in sys.argv[1:]:
        try:
            rows.update(json.load(open(f)))
        except FileNotFoundError:
            pass
    print(markdown(rows))
