"""Reference values for detection metrics on heavily tied scores, by
scikit-learn: writes tests/fixtures/metric_ties.json.

Average precision with ties is taken as its expectation over every ordering
of the tied scores (the same convention as AUROC's "ties count one half").
scikit-learn's average_precision_score gives a tie group the precision at
the group's end, so its value with ties is not that expectation; here it is
applied to each tie-broken ordering and averaged:
- exactly, over every ordering, on a small case;
- by Monte Carlo (random tie-breaking, standard error recorded) on larger
  cases, including the fixture of scripts/make_fixtures.py.

pip install numpy scikit-learn; python3 scripts/make_metric_fixtures.py
"""

import itertools
import json
import os

import numpy as np
import sklearn
from sklearn.metrics import average_precision_score, roc_auc_score

root = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests", "fixtures")
rng = np.random.default_rng(20240607)


def tie_broken(scores, order):
    """Scores with ties broken by `order` (a rank within each tie group),
    keeping the order between distinct scores."""
    levels = np.unique(scores)
    gap = np.min(np.diff(levels)) if len(levels) > 1 else 1.0
    return scores + order * gap / (len(scores) + 1)


def exact_expected_ap(y, s):
    """Mean of average_precision_score over every distinct ordering of the
    labels within each tie group."""
    groups = [np.flatnonzero(s == v) for v in np.unique(s)]
    per_group = []
    for g in groups:
        k = int(y[g].sum())
        # Distinct arrangements: which positions in the group hold positives.
        per_group.append([(g, c) for c in itertools.combinations(range(len(g)), k)])
    total, count = 0.0, 0
    for choice in itertools.product(*per_group):
        yy = np.zeros_like(y)
        order = np.zeros(len(s))
        for g, pos in choice:
            order[g] = np.arange(len(g))
            yy[g[list(pos)]] = 1
        total += average_precision_score(yy, tie_broken(s, order))
        count += 1
    return total / count, count


def monte_carlo_ap(y, s, draws):
    """Mean and standard error of average_precision_score over random
    tie-breaking."""
    values = np.empty(draws)
    for i in range(draws):
        values[i] = average_precision_score(y, tie_broken(s, rng.permutation(len(s))))
    return float(values.mean()), float(values.std(ddof=1) / np.sqrt(draws))


def case(id_scores, ood_scores, draws=None):
    """Reference values with outliers positive (AP-Out, AUROC) and with the
    in-distribution rows positive scored by the negated score (AP-In)."""
    y = np.r_[np.zeros(len(id_scores)), np.ones(len(ood_scores))].astype(int)
    s = np.r_[id_scores, ood_scores].astype(float)
    out = {"id": list(map(float, id_scores)), "ood": list(map(float, ood_scores))}
    out["roc_auc_score"] = float(roc_auc_score(y, s))
    for name, yy, ss in [("ap_out", y, s), ("ap_in", 1 - y, -s)]:
        if draws is None:
            mean, n = exact_expected_ap(yy, ss)
            out[name] = {"value": mean, "orderings": n, "std_error": 0.0}
        else:
            mean, se = monte_carlo_ap(yy, ss, draws)
            out[name] = {"value": mean, "draws": draws, "std_error": se}
        # Without tie-breaking (scikit-learn's own tie rule), for the record.
        out[name]["sklearn_with_ties"] = float(average_precision_score(yy, ss))
    return out


fixtures = {"versions": {"numpy": np.__version__, "scikit-learn": sklearn.__version__}}

# Small: 4 tie groups mixing both sets, every ordering enumerated.
fixtures["small"] = case([1, 1, 2, 2, 3, 3, 3, 5], [2, 3, 3, 4, 4, 5, 5, 6])

# Demo-like: a continuous in-distribution set and a stuck sensor whose
# vectors are identical (one tied value, below every in-distribution score)
# plus a few distinct ones.
id_scores = np.round(rng.normal(size=200), 3)
stuck = np.r_[np.full(60, -3.5), np.round(rng.normal(-3.0, 0.2, size=10), 3)]
fixtures["stuck"] = case(id_scores, stuck, draws=4000)

# Rounded to one decimal: heavy ties everywhere.
fixtures["rounded"] = case(
    np.round(rng.normal(size=150), 1), np.round(rng.normal(loc=0.8, scale=1.3, size=60), 1), draws=4000
)

# No ties: average_precision_score itself.
untied_id, untied_ood = rng.normal(size=100), rng.normal(loc=1.0, size=40)
y = np.r_[np.zeros(100), np.ones(40)]
s = np.r_[untied_id, untied_ood]
fixtures["untied"] = {
    "id": untied_id.tolist(),
    "ood": untied_ood.tolist(),
    "roc_auc_score": float(roc_auc_score(y, s)),
    "ap_out": {"value": float(average_precision_score(y, s)), "std_error": 0.0},
    "ap_in": {"value": float(average_precision_score(1 - y, -s)), "std_error": 0.0},
}

with open(os.path.join(root, "metric_ties.json"), "w") as f:
    json.dump(fixtures, f, indent=1)
    f.write("\n")
print("wrote metric_ties.json")
