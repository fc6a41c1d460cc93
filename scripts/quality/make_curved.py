#!/usr/bin/env python3
"""Synthetic curved set with an exact density, for the quality suite.

32-d: in a latent frame u, two "banana" pairs
    u1 ~ N(0, 1.5^2),  u2 = (u1^2 - 1.5^2) + N(0, 0.5^2)
    u3 ~ N(0, 1.2^2),  u4 = -0.8 (u3^2 - 1.2^2) + N(0, 0.4^2)
and 28 independent Gaussian coordinates with standard deviations
log-spaced in [0.3, 2]; then x = Q u + m with a random rotation Q and
offset m. The map u -> (u1, u2 - f(u1), ...) is triangular with unit
diagonal and Q is orthogonal, so log p(x) is a sum of 1-d normal
log-densities, exactly.

Outlier set ood_flipped: the same construction with both bends reversed
(u2 = -(u1^2 - 1.5^2) + noise, ...). It has the same mean and covariance
as the in-distribution rows, so a Gaussian cannot tell them apart (AUROC
about 0.5) while the exact density can (exact AUROC in
exact_auroc_flipped.txt alongside exact_test_ll.npy).

Run: python3 scripts/quality/make_curved.py OUT   (writes OUT/curved, a second)
"""
import os
import sys

import numpy as np

D = 32
A1, B1, S1 = 1.5, 1.0, 0.5
A3, B3, S3 = 1.2, -0.8, 0.4


def norm_logpdf(x, sd):
    return -0.5 * (x / sd) ** 2 - np.log(sd) - 0.5 * np.log(2 * np.pi)


def make(out):
    rng = np.random.default_rng(1)  # its own stream: independent of the other sets
    q, r = np.linalg.qr(rng.normal(size=(D, D)))
    q = q * np.sign(np.diag(r))
    m = rng.normal(scale=2.0, size=D)
    sds = np.exp(rng.uniform(np.log(0.3), np.log(2.0), size=D - 4))

    def draw(n, sign=1.0):
        u = np.empty((n, D))
        u[:, 0] = rng.normal(scale=A1, size=n)
        u[:, 1] = sign * B1 * (u[:, 0] ** 2 - A1 ** 2) + rng.normal(scale=S1, size=n)
        u[:, 2] = rng.normal(scale=A3, size=n)
        u[:, 3] = sign * B3 * (u[:, 2] ** 2 - A3 ** 2) + rng.normal(scale=S3, size=n)
        u[:, 4:] = rng.normal(size=(n, D - 4)) * sds
        return u @ q.T + m

    def exact_ll(x):
        u = (x - m) @ q  # q orthogonal: u = Q^T (x - m), unit Jacobian
        return (norm_logpdf(u[:, 0], A1) + norm_logpdf(u[:, 1] - B1 * (u[:, 0] ** 2 - A1 ** 2), S1)
                + norm_logpdf(u[:, 2], A3) + norm_logpdf(u[:, 3] - B3 * (u[:, 2] ** 2 - A3 ** 2), S3)
                + norm_logpdf(u[:, 4:], sds).sum(1))

    train, val, test = draw(8000), draw(1000), draw(2000)
    flipped = draw(2000, sign=-1.0)
    d = os.path.join(out, "curved")
    os.makedirs(d, exist_ok=True)
    f32 = lambda x: np.ascontiguousarray(x, dtype=np.float32)
    for name, x in [("train", train), ("val", val), ("test", test), ("ood_flipped", flipped)]:
        np.save(os.path.join(d, f"{name}.npy"), f32(x))
    # exact log-density of the float32 rows the models see
    t = exact_ll(f32(test).astype(np.float64))
    o = exact_ll(f32(flipped).astype(np.float64))
    np.save(os.path.join(d, "exact_test_ll.npy"), t)
    np.save(os.path.join(d, "exact_ood_flipped_ll.npy"), o)
    from sklearn.metrics import roc_auc_score
    auc = roc_auc_score(np.r_[np.zeros(len(t)), np.ones(len(o))], -np.r_[t, o])
    print("curved train", train.shape, "val", len(val), "test", len(test), "flipped", len(flipped),
          f"exact test ll {t.mean():.3f}, exact AUROC {auc:.4f}")


if __name__ == "__main__":
    make(sys.argv[1] if len(sys.argv) > 1 else "target/quality")
