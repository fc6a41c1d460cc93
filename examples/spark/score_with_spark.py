"""Score a Parquet dataset with PySpark through the tidemark Python package.

Each Python worker loads the model once and scores every Arrow record batch
Spark hands it (`mapInArrow`); the batch size is Spark's
`spark.sql.execution.arrow.maxRecordsPerBatch`. The id column is carried
through so the scores join back to the source table.

    python3 examples/spark/score_with_spark.py MODEL INPUT_DIR OUTPUT_DIR \
        [--column embedding] [--keep id] [--master local[2]] [--batch 8192]
"""
import argparse

import numpy as np
import pyarrow as pa
from pyspark.sql import SparkSession
from pyspark.sql.types import DoubleType, StructField, StructType

SCORES = ["log_likelihood", "typicality"]

# One model per Python worker process, loaded on first use.
_model = None


def _load(path):
    global _model
    if _model is None:
        import tidemark

        _model = tidemark.load(path)
    return _model


def rows_of(column):
    """A (rows, width) float32 array from a list-of-floats Arrow column."""
    column = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if column.null_count:
        raise ValueError("null embedding in the batch")
    flat = column.flatten().to_numpy(zero_copy_only=False).astype(np.float32, copy=False)
    return flat.reshape(len(column), -1)


def scorer(model_path, column, keep):
    def score_batches(batches):
        model = _load(model_path)
        for batch in batches:
            x = rows_of(batch.column(batch.schema.get_field_index(column)))
            scores = model.score(x, columns=SCORES)
            arrays = [batch.column(batch.schema.get_field_index(k)) for k in keep]
            arrays += [pa.array(scores[s].astype(np.float64)) for s in SCORES]
            yield pa.RecordBatch.from_arrays(arrays, names=keep + SCORES)

    return score_batches


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("model")
    p.add_argument("input")
    p.add_argument("output")
    p.add_argument("--column", default="embedding")
    p.add_argument("--keep", default="id")
    p.add_argument("--master", default="local[2]")
    p.add_argument("--batch", type=int, default=8192)
    a = p.parse_args()
    keep = [k for k in a.keep.split(",") if k]
    spark = (
        SparkSession.builder.master(a.master)
        .appName("tidemark-score")
        .config("spark.sql.execution.arrow.maxRecordsPerBatch", str(a.batch))
        .config("spark.ui.enabled", "false")
        .getOrCreate()
    )
    df = spark.read.parquet(a.input)
    fields = [df.schema[k] for k in keep] + [StructField(s, DoubleType(), False) for s in SCORES]
    out = df.mapInArrow(scorer(a.model, a.column, keep), StructType(fields))
    out.write.mode("overwrite").parquet(a.output)
    spark.stop()


if __name__ == "__main__":
    main()
