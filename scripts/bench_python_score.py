"""Scoring time from Python against the CLI, on the same model, file and threads.

Usage (after `cargo build --release` and `pip install ./python`):

    python scripts/bench_python_score.py [--rows 200000] [--dim 256] [--threads 2] [--repeats 3]

Writes a seeded rows x dim float32 .npy (correlated Gaussian rows) and a model
fitted by the CLI (8 coupling layers, hidden 512, one epoch on 20,000 rows: the
scoring cost depends on the shape, not on how well it is trained) under
--workdir, then alternates (and swaps the order of) `tidemark score MODEL DATA -o OUT.npy --threads T`
(the process: wall and CPU time, all columns) with `Model.score(np.load(DATA,
mmap_mode="r"), threads=T)` (the call, the model already loaded: wall and CPU
time of this process over the call), and prints every time. CPU time is the
steadier figure on a shared machine. The machine may be shared: the load average is
printed with each run, and alternating keeps both sides under the same load.
"""

import argparse
import os
import resource
import subprocess
import time
from pathlib import Path

import numpy as np
import tidemark

REPO = Path(__file__).resolve().parents[1]


def make_data(path: Path, rows: int, dim: int) -> None:
    rng = np.random.default_rng(0)
    mix = rng.normal(size=(dim, dim)).astype(np.float32) / np.sqrt(dim)
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(rows, dim))
    for start in range(0, rows, 20_000):
        n = min(20_000, rows - start)
        out[start : start + n] = rng.normal(size=(n, dim)).astype(np.float32) @ mix
    out.flush()
    del out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--dim", type=int, default=256)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/tidemark-bench-python"))
    ap.add_argument("--bin", type=Path, default=REPO / "target" / "release" / "tidemark")
    a = ap.parse_args()
    a.workdir.mkdir(parents=True, exist_ok=True)
    data, train, model_path = a.workdir / "data.npy", a.workdir / "train.npy", a.workdir / "model.safetensors"
    if not data.exists():
        make_data(data, a.rows, a.dim)
    if not model_path.exists():
        np.save(train, np.load(data, mmap_mode="r")[:20_000])
        subprocess.run(
            [str(a.bin), "fit", str(train), "-o", str(model_path), "--layers", "8", "--hidden", "512",
             "--epochs", "1", "--flow-dims", str(a.dim), "--threads", str(a.threads), "-q"],
            check=True,
        )
    model = tidemark.load(model_path)
    x = np.load(data, mmap_mode="r")
    print(f"{a.rows} x {a.dim}, {len(model.columns())} columns, {a.threads} threads")
    def cpu(who: int) -> float:
        r = resource.getrusage(who)
        return r.ru_utime + r.ru_stime

    def run_cli() -> tuple:
        t0, c0 = time.perf_counter(), cpu(resource.RUSAGE_CHILDREN)
        subprocess.run(
            [str(a.bin), "score", str(model_path), str(data), "-o", str(a.workdir / "scores.npy"),
             "--threads", str(a.threads)],
            check=True,
        )
        return time.perf_counter() - t0, cpu(resource.RUSAGE_CHILDREN) - c0

    def run_python() -> tuple:
        t0, c0 = time.perf_counter(), cpu(resource.RUSAGE_SELF)
        scores = model.score(x, threads=a.threads)
        assert len(scores["log_likelihood"]) == a.rows
        return time.perf_counter() - t0, cpu(resource.RUSAGE_SELF) - c0

    for i in range(a.repeats):
        # Alternate which goes first, so that neither always follows the other.
        if i % 2 == 0:
            cli_s, py_s = run_cli(), run_python()
        else:
            py_s, cli_s = run_python(), run_cli()
        load = os.getloadavg()[0]
        print(
            f"run {i + 1}: wall CLI {cli_s[0]:.2f} s, Python {py_s[0]:.2f} s (Python/CLI {py_s[0] / cli_s[0]:.3f}); "
            f"CPU CLI {cli_s[1]:.2f} s, Python {py_s[1]:.2f} s (Python/CLI {py_s[1] / cli_s[1]:.3f}); "
            f"load average {load:.1f}",
            flush=True,
        )

if __name__ == "__main__":
    main()
