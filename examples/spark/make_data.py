"""Invented data for the Spark example: float32 embeddings of 'support
tickets' in a list column beside an id and a timestamp, as a training file
and a dataset of several Parquet files to score.

    python3 examples/spark/make_data.py OUT_DIR [--rows 40000] [--dim 64]
"""
import argparse
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq


def table(x, first_id):
    n, d = x.shape
    ids = np.arange(first_id, first_id + n, dtype=np.int64)
    ts = pa.array(np.datetime64("2026-11-01T00:00:00") + ids.astype("timedelta64[s]"), pa.timestamp("s"))
    emb = pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), d)
    return pa.table({"id": ids, "ts": ts, "embedding": emb})


def main():
    p = argparse.ArgumentParser()
    p.add_argument("out")
    p.add_argument("--rows", type=int, default=40000)
    p.add_argument("--dim", type=int, default=64)
    p.add_argument("--files", type=int, default=4)
    a = p.parse_args()
    rng = np.random.default_rng(11)
    mix = rng.normal(size=(a.dim, a.dim)) / np.sqrt(a.dim)
    def draw(n):
        z = rng.normal(size=(n, a.dim))
        return (np.tanh(z @ mix) + 0.1 * z).astype(np.float32)
    os.makedirs(os.path.join(a.out, "batch"), exist_ok=True)
    pq.write_table(table(draw(8000), 0), os.path.join(a.out, "train.parquet"))
    per = a.rows // a.files
    for f in range(a.files):
        pq.write_table(table(draw(per), 1_000_000 + f * per), os.path.join(a.out, "batch", f"part-{f}.parquet"), row_group_size=4096)


if __name__ == "__main__":
    main()
