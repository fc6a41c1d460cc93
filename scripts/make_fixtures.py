#!/usr/bin/env python3
"""Write the test fixtures in tests/fixtures/ with numpy and the safetensors
Python package, and the values the Rust tests compare against.

Run: pip install numpy safetensors && python3 scripts/make_fixtures.py
The outputs are committed; CI does not run this script.
"""
import json
import os
import struct

import numpy as np
import safetensors
from safetensors.numpy import save_file

out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests", "fixtures")
os.makedirs(out, exist_ok=True)
rng = np.random.default_rng(7)


def path(name):
    return os.path.join(out, name)


# ---- .npy in every supported layout, and the values they hold.
small = (rng.normal(size=(4, 3)) * 10).astype(np.float32)
np.save(path("small_f32.npy"), small)
np.save(path("small_f64.npy"), small.astype(np.float64))
np.save(path("small_f16.npy"), small.astype(np.float16))
np.save(path("small_fortran.npy"), np.asfortranarray(small))
np.save(path("small_big_endian.npy"), small.astype(">f4"))
with open(path("small_v2.npy"), "wb") as f:
    np.lib.format.write_array(f, small, version=(2, 0))
with open(path("small_v3.npy"), "wb") as f:
    np.lib.format.write_array(f, small, version=(3, 0))
np.save(path("labels_i32.npy"), np.array([0, 2, 1, 2], dtype=np.int32))
np.save(path("labels_u8.npy"), np.array([3, 1, 1, 0], dtype=np.uint8))
np.save(path("labels_i64_column.npy"), np.array([[5], [6], [7], [8]], dtype=np.int64))
np.save(path("labels_float.npy"), np.array([0.0, 1.0, 1.0, 0.0]))

# ---- bad inputs.
np.save(path("one_d.npy"), np.arange(5, dtype=np.float32))
np.save(path("three_d.npy"), np.zeros((2, 3, 4), dtype=np.float32))
np.save(path("zero_rows.npy"), np.zeros((0, 3), dtype=np.float32))
np.save(path("complex.npy"), np.zeros((2, 2), dtype=np.complex64))
with_nan = small.copy()
with_nan[2, 1] = np.nan
np.save(path("with_nan.npy"), with_nan)
with_inf = small.copy()
with_inf[3, 0] = np.inf
np.save(path("with_inf.npy"), with_inf)
raw = open(path("small_f32.npy"), "rb").read()
open(path("truncated.npy"), "wb").write(raw[:-10])

# ---- .safetensors.
save_file({"embeddings": small, "other": small[:2].astype(np.float64)}, path("several.safetensors"))
save_file({"x": small.astype(np.float64)}, path("single_f64.safetensors"))
save_file({"x": small.astype(np.float16)}, path("single_f16.safetensors"))
save_file({"x": small.reshape(-1)}, path("one_d.safetensors"))


def write_bf16(name, arr):
    """numpy has no bfloat16: write the file by hand from the format's spec
    (8-byte little-endian header length, JSON header, raw bytes)."""
    bits = (arr.astype(np.float32).view(np.uint32) >> 16).astype("<u2")
    header = json.dumps({"x": {"dtype": "BF16", "shape": list(arr.shape), "data_offsets": [0, bits.nbytes]}}).encode()
    header += b" " * (-len(header) % 8)
    with open(path(name), "wb") as f:
        f.write(struct.pack("<Q", len(header)) + header + bits.tobytes())
    # bfloat16 keeps the top 16 bits of float32 (truncation, as written here).
    return (bits.astype(np.uint32) << 16).view(np.float32)


bf16_values = write_bf16("single_bf16.safetensors", small)
# The safetensors package itself must read the hand-written file back.
with safetensors.safe_open(path("single_bf16.safetensors"), framework="numpy") as f:
    assert f.keys() == ["x"]

# ---- CSV.
with open(path("with_header.csv"), "w") as f:
    f.write("f0,f1,f2\n")
    for row in small:
        f.write(",".join(repr(float(v)) for v in row) + "\n")
with open(path("no_header.csv"), "w") as f:
    for row in small:
        f.write(",".join(repr(float(v)) for v in row) + "\n")
with open(path("bad_cell.csv"), "w") as f:
    f.write("f0,f1,f2\n1.0,2.0,3.0\n4.0,abc,6.0\n")
with open(path("labels.csv"), "w") as f:
    f.write("label\n1\n0\n1\n1\n")

expected = {
    "small": small.astype(np.float64).tolist(),
    "small_f16": small.astype(np.float16).astype(np.float64).tolist(),
    "small_bf16": bf16_values.astype(np.float64).tolist(),
    "numpy_version": np.__version__,
    "safetensors_version": safetensors.__version__,
}

# ---- Whitening reference: eigen-decomposition of the covariance (divided
# by n) of the live columns, components sorted by decreasing variance, each
# eigenvector's largest-magnitude entry made positive.
n = 300
base = rng.normal(size=(n, 4)) @ np.array(
    [[2.0, 0.3, 0.0, 0.1], [0.0, 1.0, 0.5, 0.0], [0.0, 0.0, 0.7, 0.2], [0.0, 0.0, 0.0, 0.4]]
)
white = np.column_stack([base[:, 0] + 3.0, np.full(n, 7.5), base[:, 1:3], 1e-9 * rng.normal(size=n) - 2.0, base[:, 3]])
white = white.astype(np.float32)
np.save(path("whitening.npy"), white)
x = white.astype(np.float64)
std = x.std(axis=0)
live = [j for j in range(x.shape[1]) if std[j] > 1e-6 * std.max()]
xl = x[:, live]
mean = xl.mean(axis=0)
cov = (xl - mean).T @ (xl - mean) / n
vals, vecs = np.linalg.eigh(cov)
order = np.argsort(vals)[::-1]
vals, vecs = vals[order], vecs[:, order]
for i in range(vecs.shape[1]):
    if vecs[np.argmax(np.abs(vecs[:, i])), i] < 0:
        vecs[:, i] = -vecs[:, i]
whitened = (xl - mean) @ vecs / np.sqrt(vals)
expected["whitening"] = {
    "live": live,
    "dead": [j for j in range(x.shape[1]) if j not in live],
    "mean": mean.tolist(),
    "eigenvalues": vals.tolist(),
    "components": vecs.T.tolist(),
    "log_det": float(-0.5 * np.log(vals).sum()),
    "whitened_first_rows": whitened[:5].tolist(),
}

# Log-density of the live columns under the Gaussian fitted by maximum
# likelihood (what an untrained flow after whitening is), by scipy.
import scipy
from scipy.stats import multivariate_normal

expected["whitening"]["gaussian_logpdf_first_rows"] = multivariate_normal(mean, cov).logpdf(xl[:5]).tolist()
expected["whitening"]["diagonal_gaussian_logpdf_first_rows"] = multivariate_normal(mean, np.diag(np.diag(cov))).logpdf(xl[:5]).tolist()
expected["scipy_version"] = scipy.__version__

# Gaussian kernel density estimate (Scott's rule, full covariance), by scipy.
from scipy.stats import gaussian_kde

kde_points = rng.normal(size=(200, 2)) @ np.array([[1.0, 0.4], [0.0, 0.6]]) + np.array([3.0, -1.0])
kde_queries = rng.normal(size=(10, 2)) * 1.5 + np.array([3.0, -1.0])
# Far from every point: each kernel term underflows in a direct sum.
kde_far = np.array([[40.0, 25.0], [-30.0, -45.0], [3.0, 20.0]])
kde = gaussian_kde(kde_points.T, bw_method="scott")
expected["kde"] = {
    "points": kde_points.tolist(),
    "queries": kde_queries.tolist(),
    "logpdf": kde.logpdf(kde_queries.T).tolist(),
    "far_queries": kde_far.tolist(),
    "far_logpdf": kde.logpdf(kde_far.T).tolist(),
}

# Ledoit-Wolf shrinkage on few rows relative to the dimension, by scikit-learn,
# applied to the standardized features (population std) and scaled back; and
# the Gaussian log-density under the shrunk covariance, by scipy.
import sklearn
from sklearn.covariance import LedoitWolf

few = (rng.normal(size=(60, 10)) @ rng.normal(size=(10, 10)) * 0.5 + 2.0).astype(np.float32)
few[:, 3] *= 40.0  # features on different scales
np.save(path("few_rows.npy"), few)
few64 = few.astype(np.float64)
sd = few64.std(axis=0)
lw = LedoitWolf().fit(few64 / sd)
lw_cov = lw.covariance_ * np.outer(sd, sd)
expected["ledoit_wolf"] = {
    "covariance": lw_cov.tolist(),
    "shrinkage": float(lw.shrinkage_),
    "mean": few64.mean(axis=0).tolist(),
    "logpdf_first_rows": multivariate_normal(few64.mean(axis=0), lw_cov).logpdf(few64[:5]).tolist(),
}
expected["sklearn_version"] = sklearn.__version__

# The wine data set shipped with scikit-learn (UCI Wine, Forina et al.;
# CC BY 4.0): 178 rows, 13 features, 3 cultivars.
from sklearn.datasets import load_wine

wine = load_wine()
np.savetxt(path("wine.csv"), wine.data, delimiter=",", header=",".join(wine.feature_names), comments="", fmt="%.6g")
np.savetxt(path("wine_labels.csv"), wine.target, header="cultivar", comments="", fmt="%d")

# Detection metrics on scores with ties, by scikit-learn and scipy.
from scipy.stats import mannwhitneyu
from sklearn.metrics import average_precision_score, roc_auc_score, roc_curve

id_scores = np.round(rng.normal(size=300), 1)
ood_scores = np.round(rng.normal(loc=0.8, scale=1.3, size=120), 1)
y = np.r_[np.zeros(len(id_scores)), np.ones(len(ood_scores))]
s_all = np.r_[id_scores, ood_scores]
fpr, tpr, thr = roc_curve(y, s_all, drop_intermediate=False)
u = mannwhitneyu(ood_scores, id_scores, alternative="two-sided").statistic
expected["metrics"] = {
    "id": id_scores.tolist(),
    "ood": ood_scores.tolist(),
    "roc_auc_score": float(roc_auc_score(y, s_all)),
    "average_precision_ood_positive": float(average_precision_score(y, s_all)),
    "average_precision_id_positive": float(average_precision_score(1 - y, -s_all)),
    "roc_fpr": fpr.tolist(),
    "roc_tpr": tpr.tolist(),
    "roc_thresholds": thr[1:].tolist(),
    "mannwhitney_u_over_n1n2": float(u / (len(id_scores) * len(ood_scores))),
}

with open(path("expected.json"), "w") as f:
    json.dump(expected, f, indent=1)
    f.write("\n")
print("wrote", len(os.listdir(out)), "files")
