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
- class_mixture: a class-conditional mixture with one component per class
  on 120 labelled wine rows, scored on the other 58. In whitened units each
  class's covariance is its maximum-likelihood covariance plus a ridge r
  times the identity, which in input space is S_c + r S (S: the training
  covariance the whitening uses); for every ridge on src/train/
  fit_mixture.rs's grid, the held-out mean log-likelihood of
  sum_c pi_c N(x; m_c, S_c + r S) by scipy.stats.multivariate_normal; at
  the best ridge, every held-out row's per-class log-likelihoods, its
  log-likelihood, most probable class and that class's posterior.

Run: pip install numpy scipy scikit-learn && python3 scripts/make_density_fixtures.py
The output is committed; CI does not run this script.
"""
import json
import os
import warnings

import numpy as np
import scipy
import sklearn
from scipy.special import logsumexp
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

# ---- Class-conditional mixture, one component per class.
EM_RIDGE = 1e-4
RIDGE_GRID = [0.0, 1e-3, 1e-2, 3e-2, 0.1, 0.3, 1.0]
order = rng.permutation(len(wine))
target = load_wine().target
train = wine[order[:120]].astype(np.float32).astype(np.float64)
train_labels = target[order[:120]]
held = wine[order[120:]].astype(np.float32).astype(np.float64)
whitening_cov = np.cov(train, rowvar=False, bias=True)
classes = np.unique(train_labels)
log_priors = np.log([np.mean(train_labels == c) for c in classes])


def class_log_likelihoods(ridge):
    cols = []
    for c in classes:
        rows = train[train_labels == c]
        cov = np.cov(rows, rowvar=False, bias=True) + ridge * whitening_cov
        cols.append(multivariate_normal(rows.mean(axis=0), cov).logpdf(held))
    return np.stack(cols, axis=1)


scores = {}
for extra in RIDGE_GRID:
    ridge = EM_RIDGE + extra
    scores[ridge] = float(logsumexp(class_log_likelihoods(ridge) + log_priors, axis=1).mean())
best_ridge = max(scores, key=scores.get)
per_class = class_log_likelihoods(best_ridge)
joint = per_class + log_priors
total = logsumexp(joint, axis=1)
np.save(os.path.join(os.path.dirname(out), "wine_class_train.npy"), train.astype(np.float32))
np.save(os.path.join(os.path.dirname(out), "wine_class_heldout.npy"), held.astype(np.float32))
expected["class_mixture"] = {
    "train_labels": train_labels.tolist(),
    "held_out_mean_log_likelihood": [[r, s] for r, s in scores.items()],
    "best_ridge": best_ridge,
    "class_log_likelihood": per_class.tolist(),
    "log_likelihood": total.tolist(),
    "predicted_class": joint.argmax(axis=1).tolist(),
    "class_probability": np.exp(joint.max(axis=1) - total).tolist(),
}

with open(out, "w") as f:
    json.dump(expected, f, indent=1)
print("wrote", out, "best shrinkage", expected["shrinkage_validation"]["best"], "ledoit-wolf", lw, "class-mixture ridge", best_ridge)
