#!/usr/bin/env python3
"""Reference values for the density kinds, by scikit-learn and scipy, in
tests/fixtures/density.json (the data sets are the wine data set that
scikit-learn ships: UCI Wine, Forina et al., CC BY 4.0, 178 rows x 13).

- mixture_em: scikit-learn's GaussianMixture (full covariances) run for a
  fixed number of EM rounds from parameters that are the M-step of given
  initial responsibilities; its weights, means, covariances and mean
  log-likelihood (score) after those rounds.
- shrinkage_validation: for every intensity on the grid that
  src/preprocess.rs tries (plus Ledoit-Wolf's), the held-out mean
  log-likelihood of a Gaussian whose correlation matrix is shrunk towards
  the identity, by scipy.stats.multivariate_normal; and the intensity with
  the best one.

Run: pip install numpy scipy scikit-learn && python3 scripts/make_density_fixtures.py
The output is committed; CI does not run this script.
"""
import json
import os
import warnings

import numpy as np
import scipy
import sklearn
from scipy.stats import multivariate_normal
from sklearn.covariance import ledoit_wolf_shrinkage
from sklearn.datasets import load_wine
from sklearn.exceptions import ConvergenceWarning
from sklearn.mixture import GaussianMixture
from sklearn.mixture._gaussian_mixture import _estimate_gaussian_parameters

out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests", "fixtures", "density.json")
rng = np.random.default_rng(11)
wine = load_wine().data.astype(np.float64)
expected = {"sklearn_version": sklearn.__version__, "scipy_version": scipy.__version__}

# ---- EM: four standardized wine features, three components.
x = wine[:, [0, 5, 6, 9]]
x = (x - x.mean(axis=0)) / x.std(axis=0)
resp = rng.dirichlet(np.ones(3), size=len(x))
reg, rounds = 1e-4, 7
nk, means, covs = _estimate_gaussian_parameters(x, resp, reg, "full")
gm = GaussianMixture(
    n_components=3,
    covariance_type="full",
    reg_covar=reg,
    max_iter=rounds,
    tol=0.0,
    weights_init=nk / len(x),
    means_init=means,
    precisions_init=np.linalg.inv(covs),
)
with warnings.catch_warnings():
    warnings.simplefilter("ignore", ConvergenceWarning)
    gm.fit(x)
expected["mixture_em"] = {
    "x": x.tolist(),
    "initial_responsibilities": resp.tolist(),
    "ridge": reg,
    "rounds": rounds,
    "weights": gm.weights_.tolist(),
    "means": gm.means_.tolist(),
    "covariances": gm.covariances_.tolist(),
    "mean_log_likelihood": float(gm.score(x)),
    "lower_bound": float(gm.lower_bound_),
}

# ---- Shrinkage chosen on held-out rows: 13 wine features, 40 training rows
# (3 per feature), the rest held out.
GRID = [0.0, 1e-6, 1e-5, 1e-4, 3e-4, 1e-3, 3e-3, 1e-2, 3e-2, 0.1, 0.3, 0.6]
order = rng.permutation(len(wine))
# The values as the float32 files hold them.
train = wine[order[:40]].astype(np.float32).astype(np.float64)
held = wine[order[40:]].astype(np.float32).astype(np.float64)
mean, sd = train.mean(axis=0), train.std(axis=0)
corr = np.cov(train, rowvar=False, bias=True) / np.outer(sd, sd)
lw = float(ledoit_wolf_shrinkage((train - mean) / sd, assume_centered=True))
scores = {}
for a in GRID + [lw]:
    shrunk = (1 - a) * corr + a * np.eye(len(sd)) * np.trace(corr) / len(sd)
    scores[a] = float(multivariate_normal(mean, shrunk * np.outer(sd, sd)).logpdf(held).mean())
best = max(scores, key=scores.get)
np.save(os.path.join(os.path.dirname(out), "wine_train40.npy"), train.astype(np.float32))
np.save(os.path.join(os.path.dirname(out), "wine_heldout.npy"), held.astype(np.float32))
expected["shrinkage_validation"] = {
    "ledoit_wolf": lw,
    "held_out_mean_log_likelihood": [[a, s] for a, s in scores.items()],
    "best": best,
    "best_mean_log_likelihood": scores[best],
}

with open(out, "w") as f:
    json.dump(expected, f, indent=1)
print("wrote", out, "best shrinkage", best, "ledoit-wolf", lw)
