"""Write the malformed and unusual input files of tests/bad_inputs/.

Every file is tiny. Valid files are written with numpy and the safetensors
package; damaged ones by hand with struct, so each names one fault.
tests/bad_inputs/cases.txt (kept by hand) says what the binary must do with
each. Usage: python3 scripts/make_bad_inputs.py (numpy, safetensors).
"""

import json
import os
import struct

import numpy as np
from safetensors.numpy import save as st_save

OUT = os.path.join(os.path.dirname(__file__), "..", "tests", "bad_inputs")
rng = np.random.default_rng(13)


def put(name, data):
    with open(os.path.join(OUT, name), "wb") as f:
        f.write(data if isinstance(data, bytes) else data.encode())


def npy_raw(header, body=b"", version=1, header_len=None):
    """A .npy file with the given header text, as numpy lays it out."""
    h = header.encode() if isinstance(header, str) else header
    if version == 1:
        n = len(h) if header_len is None else header_len
        return b"\x93NUMPY\x01\x00" + struct.pack("<H", n) + h + body
    n = len(h) if header_len is None else header_len
    return b"\x93NUMPY" + bytes([version, 0]) + struct.pack("<I", n) + h + body


def npy_of(a, fortran=False):
    import io

    buf = io.BytesIO()
    np.save(buf, np.asfortranarray(a) if fortran else a)
    return buf.getvalue()


def header(descr, shape, fortran="False"):
    return "{'descr': %s, 'fortran_order': %s, 'shape': %s, }\n" % (descr, fortran, shape)


def st_raw(meta, body=b""):
    """A safetensors file with a hand-written JSON header."""
    h = meta.encode() if isinstance(meta, str) else meta
    return struct.pack("<Q", len(h)) + h + body


train = rng.normal(size=(200, 3)).astype(np.float32)
train[:, 1] += 0.5 * train[:, 0]
labels = (np.arange(200) % 2).astype(np.int64)
small = rng.normal(size=(6, 3))
f4 = small.astype("<f4").tobytes()

# ---- valid inputs the cases are run against
put("ok-train.npy", npy_of(train))
put("ok-labels.npy", npy_of(labels))

# ---- .npy embeddings
put("npy-bad-magic.npy", b"\x93NUMPZ\x01\x00" + b"\x00" * 40)
put("npy-empty.npy", b"")
put("npy-short.npy", b"\x93NUMPY\x01")
put("npy-version-9.npy", b"\x93NUMPY\x09\x00" + b"\x10\x00" + b" " * 16)
put("npy-header-len-4g.npy", npy_raw(header("'<f4'", "(6, 3)"), f4, version=2, header_len=0xFFFFFFF0))
put("npy-header-len-past-end.npy", npy_raw(header("'<f4'", "(6, 3)"), f4, header_len=60000))
put("npy-header-not-utf8.npy", npy_raw(b"{'descr': '<f4\xff\xfe', 'fortran_order': False, 'shape': (6, 3), }\n", f4))
put("npy-empty-dtype.npy", npy_raw(header("''", "(6, 3)"), f4))
put("npy-nonascii-dtype.npy", npy_raw(header("'\u00e94'", "(6, 3)"), f4))
put("npy-dtype-order-only.npy", npy_raw(header("'<'", "(6, 3)"), f4))
put("npy-int-embeddings.npy", npy_of(np.arange(18, dtype="<i4").reshape(6, 3)))
put("npy-complex.npy", npy_of(small.astype(np.complex64)))
put("npy-structured-dtype.npy", npy_raw(header("[('a', '<f4')]", "(6,)"), f4))
put("npy-shape-reversed-parens.npy", npy_raw(header("'<f4'", ")6, 3("), f4))
put("npy-shape-negative.npy", npy_raw(header("'<f4'", "(6, -3)"), f4))
put("npy-shape-huge-number.npy", npy_raw(header("'<f4'", "(99999999999999999999999, 3)"), f4))
put("npy-shape-overflow.npy", npy_raw(header("'<f4'", "(%d, 4)" % 2**62), f4))
put("npy-shape-1d.npy", npy_of(small[:, 0].astype("<f4")))
put("npy-shape-3d.npy", npy_of(small.reshape(1, 6, 3).astype("<f4")))
put("npy-zero-rows.npy", npy_of(np.zeros((0, 3), "<f4")))
put("npy-zero-columns.npy", npy_of(np.zeros((6, 0), "<f4")))
put("npy-truncated.npy", npy_of(small.astype("<f4"))[:-7])
put("npy-missing-shape.npy", npy_raw("{'descr': '<f4', 'fortran_order': False, }\n", f4))
put("npy-repeated-key.npy", npy_raw("{'descr': '<f4', 'descr': '<f8', 'fortran_order': False, 'shape': (6, 3), }\n", f4))
put("npy-fortran-maybe.npy", npy_raw(header("'<f4'", "(6, 3)", "Maybe"), f4))
put("npy-unterminated-string.npy", npy_raw("{'descr': '<f4, 'fortran_order': False, 'shape': (6, 3)\n", f4))
put("npy-no-closing-brace.npy", npy_raw("{'descr': '<f4', 'fortran_order': False, 'shape': (6, 3), \n", f4))
put("npy-text-after-brace.npy", npy_raw("{'descr': '<f4', 'fortran_order': False, 'shape': (6, 3), } x\n", f4))
put("npy-unknown-key.npy", npy_raw("{'descr': '<f4', 'fortran_order': False, 'shape': (6, 3), 'x': 1}\n", f4))
nan = small.astype("<f4").copy()
nan[2, 1] = np.nan
put("npy-nan.npy", npy_of(nan))
inf = small.astype("<f4").copy()
inf[4, 0] = -np.inf
put("npy-inf.npy", npy_of(inf))
wide = small.copy()
wide[1, 2] = 1e300
put("npy-f64-1e300.npy", npy_of(wide))
put("npy-wrong-width.npy", npy_of(rng.normal(size=(5, 4)).astype("<f4")))
# must load
put("ok-fortran.npy", npy_of(small.astype("<f4"), fortran=True))
put("ok-big-endian.npy", npy_of(small.astype(">f4")))
put("ok-float16.npy", npy_of(small.astype("<f2")))
put("ok-float64.npy", npy_of(small))
put("ok-version-2.npy", npy_raw(header("'<f4'", "(6, 3)"), f4, version=2))

# ---- CSV embeddings
put("csv-empty-first-cell.csv", "1.0,,3.0\n4,5,6\n")
put("csv-empty-cell-after-header.csv", "a,b,c\n1,2,3\n4,,6\n")
put("csv-text-cell.csv", "a,b,c\n1,2,3\n4,five,6\n")
put("csv-ragged.csv", "1,2,3\n4,5\n")
put("csv-nan.csv", "1,2,3\n4,nan,6\n")
put("csv-inf.csv", "1,2,3\n4,5,-inf\n")
put("csv-1e300.csv", "1,2,3\n4,1e300,6\n")
put("csv-only-header.csv", "a,b,c\n")
put("csv-empty.csv", "")
put("csv-not-utf8.csv", b"1,2,3\n4,\xff\xfe,6\n")
put("csv-row-of-empty-cells.csv", "1,2,3\n,,\n4,5,6\n")
put("csv-escape-codes.csv", "1,2,3\n4,\x1b[31mred,6\n")
# must load
put("ok-crlf.csv", "a,b,c\r\n1,2,3\r\n4,5,6\r\n7,8,9\r\n")
put("ok-bom.csv", "\ufeffa,b,c\n1,2,3\n4,5,6\n7,8,9\n")
put("ok-bom-no-header.csv", "\ufeff1,2,3\n4,5,6\n7,8,9\n")

# ---- safetensors embeddings
put("st-empty-header.safetensors", struct.pack("<Q", 0))
put("st-header-len-huge.safetensors", struct.pack("<Q", 2**63) + b"{}")
put("st-header-not-json.safetensors", st_raw("{not json}   "))
put("st-offsets-past-end.safetensors", st_raw('{"x":{"dtype":"F32","shape":[6,3],"data_offsets":[0,72]}}', f4[:40]))
put("st-shape-mismatch.safetensors", st_raw('{"x":{"dtype":"F32","shape":[2,3],"data_offsets":[0,20]}}', f4[:20]))
put("st-shape-overflow.safetensors", st_raw('{"x":{"dtype":"F32","shape":[4611686018427387904,4],"data_offsets":[0,0]}}'))
st_ok = st_save({"x": small.astype(np.float32)})
put("st-int-dtype.safetensors", st_save({"x": np.arange(18, dtype=np.int32).reshape(6, 3)}))
put("st-1d.safetensors", st_save({"x": small[:, 0].astype(np.float32).copy()}))
put("st-several-tensors.safetensors", st_save({"x": small.astype(np.float32), "y": small.astype(np.float32)}))
put("st-no-tensors.safetensors", st_raw("{}  "))
st_nan = small.astype(np.float32).copy()
st_nan[5, 2] = np.nan
put("st-nan.safetensors", st_save({"x": st_nan}))
put("st-overlap.safetensors", st_raw('{"x":{"dtype":"F32","shape":[6,3],"data_offsets":[0,72]},"y":{"dtype":"F32","shape":[6,3],"data_offsets":[0,72]}}', f4))
# must load
# bfloat16 is the top half of a float32 (rounded toward zero here).
bf16 = (small.astype("<f4").view("<u4") >> 16).astype("<u2").tobytes()
put("ok-bf16.safetensors", st_raw('{"x":{"dtype":"BF16","shape":[6,3],"data_offsets":[0,36]}}', bf16))

# ---- labels (for ok-train.npy, 200 rows)
put("labels-huge-rows.npy", npy_raw(header("'<i8'", "(1000000000000,)"), b"\x00" * 64))
put("labels-float.npy", npy_of(labels.astype(np.float32)))
put("labels-two-columns.npy", npy_of(np.stack([labels, labels], 1)))
put("labels-wrong-count.npy", npy_of(labels[:199]))
put("labels-bool.npy", npy_of(labels.astype(bool)))
put("labels-text.csv", "label\n" + "0\n" * 100 + "x\n" + "1\n" * 99)
put("labels-two-fields.csv", "0\n1,1\n")
put("labels-fraction.csv", "\n".join(["1.5"] + ["0"] * 199) + "\n")
put("labels-empty.csv", "label\n")
put("labels-bad-extension.txt", "0\n1\n")

# ---- fit config files
put("config-malformed.json", '{"layers": 4,,}')
put("config-wrong-type.json", '{"layers": "four"}')
put("config-unknown-key.json", '{"hiden": 8}')
put("config-array.json", "[1, 2]")
put("config-not-utf8.json", b'{"layers": "\xff"}')
put("config-duplicate-key.json", '{"layers": 2, "layers": 3}')
put("config-negative-count.json", '{"epochs": -1}')
put("config-escape-key.json", '{"\\u001b[2J": 1}')

# ---- calibration files (valid for no model: fingerprint 0)
anomaly = sorted(float(v) for v in rng.normal(size=19))


def cal(**over):
    c = {
        "format": "tidemark-calibration", "format_version": 1, "model": "0000000000000000",
        "score": "log_likelihood", "direction": "lower", "center": 0.0, "false_alarm": 0.1,
        "rows": 19, "rank": 18, "threshold": anomaly[17], "threshold_raw": -anomaly[17], "anomaly": anomaly,
    }
    c.update(over)
    return json.dumps(c)


put("cal-p-value.json", cal(score="p_value"))
put("cal-flagged.json", cal(score="flagged", direction="higher", threshold_raw=anomaly[17]))
put("cal-unknown-score.json", cal(score="no_such_score"))
put("cal-false-alarm-negative.json", cal(false_alarm=-3))
put("cal-false-alarm-one.json", cal(false_alarm=1.0))
put("cal-empty-values.json", cal(anomaly=[], rows=0))
put("cal-null-value.json", cal(anomaly=anomaly[:5] + [None] + anomaly[6:]))
put("cal-huge-value.json", cal(anomaly=anomaly[:-1] + ["1e999"]).replace('"1e999"', "1e999"))
put("cal-unsorted.json", cal(anomaly=anomaly[::-1]))
put("cal-direction-mismatch.json", cal(direction="higher"))
put("cal-rank-mismatch.json", cal(rank=3))
put("cal-other-model.json", cal())
put("cal-not-json.json", "threshold = 3\n")
put("cal-wrong-format.json", cal(format="something-else"))

# ---- score tables for evaluate
def scores_csv(values):
    return "log_likelihood,bits_per_dim\n" + "".join(f"{a},{b}\n" for a, b in values)


good = [(float(a), float(-a / 3)) for a in rng.normal(size=12)]
put("ok-scores-id.csv", scores_csv(good))
put("ok-scores-ood.csv", scores_csv([(a - 2, b + 1) for a, b in good]))
put("scores-nan.csv", scores_csv(good[:4] + [(float("nan"), 1.0)] + good[5:]))
put("scores-inf.csv", scores_csv(good[:7] + [(1.0, float("inf"))] + good[8:]))
put("scores-empty-cell.csv", scores_csv(good).replace("\n" + str(good[3][0]) + ",", "\n,"))
put("scores-no-header.csv", "".join(f"{a},{b}\n" for a, b in good))
put("scores-ragged.csv", scores_csv(good) + "1.0\n")
put("scores-only-header.csv", "log_likelihood,bits_per_dim\n")
put("scores-null.jsonl", "".join(json.dumps({"log_likelihood": a, "bits_per_dim": b if i != 2 else None}) + "\n" for i, (a, b) in enumerate(good)))
put("scores-string.jsonl", "".join(json.dumps({"log_likelihood": a if i != 5 else "x", "bits_per_dim": b}) + "\n" for i, (a, b) in enumerate(good)))
put("scores-missing-key.jsonl", json.dumps({"log_likelihood": 1.0, "bits_per_dim": 2.0}) + "\n" + json.dumps({"log_likelihood": 1.0}) + "\n")
put("scores-bad-json.jsonl", '{"log_likelihood": 1.0\n')
nan_scores = np.array(good, dtype=np.float32)
nan_scores[6, 1] = np.nan
put("scores-nan.npy", npy_of(nan_scores))
put("scores-nan.json", json.dumps({"columns": ["log_likelihood", "bits_per_dim"]}))
put("scores-no-sidecar.npy", npy_of(np.array(good, dtype=np.float32)))
put("scores-sidecar-short.npy", npy_of(np.array(good, dtype=np.float32)))
put("scores-sidecar-short.json", json.dumps({"columns": ["log_likelihood"]}))

# ---- training logs (evaluate --log) and too little data to fit
put("log-not-json.jsonl", '{"epoch": 1, "step": 10, "lr": 0.001, "train_nll": 1.0, "val_nll": 1.0, "grad_norm": 1.0, "seconds": 1.0}\nnot json\n')
put("log-wrong-type.jsonl", '{"epoch": "one", "step": 10, "lr": 0.001, "train_nll": 1.0, "val_nll": 1.0, "grad_norm": 1.0, "seconds": 1.0}\n')
put("fit-too-few-rows.npy", npy_of(small[:3].astype("<f4")))

# ---- model files that are not models (damaged real models are derived by the test)
put("model-text.safetensors", "this is not a model\n")
put("model-no-metadata.safetensors", st_ok)
put("model-bad-json.safetensors", st_save({"x": small.astype(np.float32)}, metadata={"tidemark": "{not json"}))
put("model-wrong-ext.npy", npy_of(small.astype("<f4")))

os.makedirs(os.path.join(OUT, "dir.npy"), exist_ok=True)
put("dir.npy/.gitkeep", "")
print("wrote", len(os.listdir(OUT)), "entries to", os.path.normpath(OUT))
