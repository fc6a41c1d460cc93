"""Shared fixtures: small seeded data sets, the CLI binary, and a model
fitted by the CLI. The reference for every parity test is the `tidemark`
binary of the same checkout (built by `cargo build --release` or
`cargo test --release`; TIDEMARK_BIN overrides the path)."""

import csv
import os
import subprocess
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[2]
DIM = 8


def cli_path() -> Path:
    path = Path(os.environ.get("TIDEMARK_BIN", REPO / "target" / "release" / "tidemark"))
    if not path.exists():
        pytest.fail(f"{path} not found: run `cargo build --release` first or set TIDEMARK_BIN")
    return path


def cli(*args, check=True):
    """Run the CLI; returns the completed process."""
    proc = subprocess.run([str(cli_path()), *map(str, args)], capture_output=True, text=True)
    if check and proc.returncode != 0:
        raise AssertionError(f"tidemark {' '.join(map(str, args))} failed:\n{proc.stderr}")
    return proc


def read_scores(path: Path) -> dict:
    """A CLI score CSV as {column: float64 array}, each text value parsed exactly."""
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return {name: np.array([float(r[i]) for r in rows[1:]]) for i, name in enumerate(rows[0])}


def assert_same_scores(a: dict, b: dict):
    assert list(a) == list(b)
    for name in a:
        np.testing.assert_array_equal(a[name], b[name], err_msg=name)


def clusters(rng, n, shift=0.0):
    """Rows from two Gaussian clusters in DIM dimensions with labels 3 and 7."""
    labels = rng.choice(np.array([3, 7]), size=n)
    centres = np.where(labels[:, None] == 3, -1.5, 1.5) + shift
    mixing = np.linspace(0.5, 1.5, DIM)
    x = centres + rng.normal(size=(n, DIM)) * mixing
    return x.astype(np.float32), labels.astype(np.int64)


@pytest.fixture(scope="session")
def data(tmp_path_factory):
    """Train, held-out and outlier rows, in memory and as .npy files."""
    d = tmp_path_factory.mktemp("data")
    rng = np.random.default_rng(20)
    train, labels = clusters(rng, 600)
    held, _ = clusters(rng, 300)
    ood, _ = clusters(rng, 200, shift=2.5)
    sets = {"train": train, "labels": labels, "held": held, "ood": ood}
    for name, a in sets.items():
        np.save(d / f"{name}.npy", a)
    return {"dir": d, **sets}


# Small and fast: the parity checks do not need a good model.
FIT_FLAGS = ["--epochs", "3", "--layers", "2", "--hidden", "16", "--threads", "1", "-q"]
FIT_OPTIONS = dict(epochs=3, layers=2, hidden=16, threads=1, progress=False)


@pytest.fixture(scope="session")
def cli_model(data):
    """A class-conditional model fitted by the CLI."""
    path = data["dir"] / "cli_model.safetensors"
    cli("fit", data["dir"] / "train.npy", "-o", path, "--labels", data["dir"] / "labels.npy", *FIT_FLAGS)
    return path
