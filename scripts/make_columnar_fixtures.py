"""Write the Parquet and Arrow IPC fixtures of tests/columnar.rs with pyarrow.

Every good file holds the same rows as tests/fixtures/columnar/rows.npy
(float32), with an int64 `id`, a timestamp `ts` and an int32 `label` beside
them; the bad files each break one rule the readers check.

    pip install numpy pyarrow && python3 scripts/make_columnar_fixtures.py
"""
import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.ipc as ipc
import pyarrow.parquet as pq

OUT = os.path.join(os.path.dirname(__file__), "..", "tests", "fixtures", "columnar")
ROWS, DIM = 40, 6


def main():
    os.makedirs(OUT, exist_ok=True)
    rng = np.random.default_rng(20261202)
    x = rng.normal(size=(ROWS, DIM)).astype(np.float32) * np.float32(3.0) + np.float32(1.5)
    np.save(os.path.join(OUT, "rows.npy"), x)
    ids = np.arange(1000, 1000 + ROWS, dtype=np.int64)
    ts = pa.array(np.datetime64("2026-11-01T00:00:00") + np.arange(ROWS).astype("timedelta64[m]"), pa.timestamp("ms"))
    labels = pa.array((np.arange(ROWS) % 3).astype(np.int32))
    flat = pa.array(x.reshape(-1))
    fixed = pa.FixedSizeListArray.from_arrays(flat, DIM)
    var64 = pa.ListArray.from_arrays(pa.array(np.arange(0, ROWS * DIM + 1, DIM, dtype=np.int32)), pa.array(x.reshape(-1).astype(np.float64)))

    def table(emb):
        return pa.table({"id": ids, "ts": ts, "embedding": emb, "label": labels})

    # Several row groups, so the reader crosses group boundaries.
    pq.write_table(table(fixed), os.path.join(OUT, "fixed.parquet"), row_group_size=16, compression="snappy")
    pq.write_table(table(var64), os.path.join(OUT, "list64.parquet"), row_group_size=7, compression="zstd")
    wide = {"id": ids}
    wide.update({f"emb_{j}": x[:, j] for j in range(DIM)})
    pq.write_table(pa.table(wide), os.path.join(OUT, "wide.parquet"), compression="gzip")
    t = table(fixed)
    with ipc.new_file(os.path.join(OUT, "fixed.arrow"), t.schema) as w:
        for batch in t.to_batches(max_chunksize=13):
            w.write_batch(batch)
    with ipc.new_stream(os.path.join(OUT, "fixed.arrows"), t.schema) as w:
        for batch in t.to_batches(max_chunksize=9):
            w.write_batch(batch)

    # Bad files: (name, table, what the error must name).
    cases = {}
    null_row = pa.FixedSizeListArray.from_arrays(flat, DIM, mask=pa.array([i == 5 for i in range(ROWS)]))
    pq.write_table(table(null_row), os.path.join(OUT, "bad_null_row.parquet"))
    cases["bad_null_row.parquet"] = "row 5, column 'embedding' is null"
    lengths = np.full(ROWS, DIM)
    lengths[7] = DIM - 1
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32)
    ragged = pa.ListArray.from_arrays(pa.array(offsets), pa.array(np.ones(offsets[-1], np.float32)))
    pq.write_table(table(ragged), os.path.join(OUT, "bad_ragged.parquet"))
    cases["bad_ragged.parquet"] = "row 7, column 'embedding' has 5 values"
    y = x.copy()
    y[11, 2] = np.nan
    nan = pa.FixedSizeListArray.from_arrays(pa.array(y.reshape(-1)), DIM)
    pq.write_table(table(nan), os.path.join(OUT, "bad_nan.parquet"))
    cases["bad_nan.parquet"] = "row 11, column 'embedding', value 2 is NaN"
    child = np.ones(ROWS * DIM, np.float32)
    child_mask = np.zeros(ROWS * DIM, bool)
    child_mask[3 * DIM + 4] = True
    child_null = pa.FixedSizeListArray.from_arrays(pa.array(child, mask=child_mask), DIM)
    pq.write_table(table(child_null), os.path.join(OUT, "bad_child_null.parquet"))
    cases["bad_child_null.parquet"] = "row 3, column 'embedding', value 4 is null"
    strings = pa.array([str(v) for v in range(ROWS)])
    pq.write_table(pa.table({"id": ids, "embedding": strings}), os.path.join(OUT, "bad_strings.parquet"))
    cases["bad_strings.parquet"] = "cannot tell which columns hold the embedding"
    with open(os.path.join(OUT, "bad_cases.json"), "w") as f:
        json.dump({"pyarrow": pa.__version__, "numpy": np.__version__, "cases": cases}, f, indent=1)


if __name__ == "__main__":
    main()
