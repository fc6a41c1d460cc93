"""Check that the scores Spark wrote equal the command line's on the same
rows, joined on the id column; prints one line and exits non-zero on any
difference.

    python3 examples/spark/compare.py SPARK_OUT_DIR CLI_SCORES.parquet...
"""
import sys

import numpy as np
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq

SCORES = ["log_likelihood", "typicality"]


def main():
    spark = ds.dataset(sys.argv[1], format="parquet").to_table()
    cli = [pq.read_table(p) for p in sys.argv[2:]]
    import pyarrow as pa

    cli = pa.concat_tables(cli)
    spark = spark.sort_by("id")
    cli = cli.sort_by("id")
    if spark.num_rows != cli.num_rows or not pc.all(pc.equal(spark["id"], cli["id"])).as_py():
        print(f"row sets differ: Spark {spark.num_rows} rows, CLI {cli.num_rows}")
        sys.exit(1)
    worst = 0.0
    for s in SCORES:
        a = spark[s].to_numpy()
        b = cli[s].to_numpy()
        if not np.array_equal(a, b):
            worst = max(worst, float(np.max(np.abs(a - b))))
    if worst > 0:
        print(f"scores differ: largest difference {worst:g}")
        sys.exit(1)
    print(f"Spark and the CLI agree bit for bit on {spark.num_rows} rows ({', '.join(SCORES)})")


if __name__ == "__main__":
    main()
