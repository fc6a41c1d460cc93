"""How arrays reach the library: float32 C-order read in place (memory-mapped
files too), everything else converted once, the values agreeing; the GIL
released while the library works, and one model shared by threads."""

import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
import tidemark
from tidemark import _core

from conftest import assert_same_scores, cli, read_scores


def test_c_contiguous_float32_is_read_in_place(data):
    x = data["held"]
    assert x.dtype == np.float32 and x.flags.c_contiguous
    assert _core._data_address(x) == x.ctypes.data


def test_a_memory_mapped_file_is_read_in_place_and_scores_as_the_cli(data, cli_model, tmp_path):
    mapped = np.load(data["dir"] / "ood.npy", mmap_mode="r")
    assert _core._data_address(tidemark._rows(mapped, "x")) == mapped.ctypes.data
    cli("score", cli_model, data["dir"] / "ood.npy", "-o", tmp_path / "s.csv", "--threads", "1")
    assert_same_scores(tidemark.load(cli_model).score(mapped, threads=1), read_scores(tmp_path / "s.csv"))


@pytest.mark.parametrize(
    "convert",
    [
        lambda x: x.astype(np.float64),
        lambda x: np.asfortranarray(x),
        lambda x: np.repeat(x, 2, axis=1)[:, ::2],  # a strided view
    ],
    ids=["float64", "fortran", "strided"],
)
def test_other_layouts_are_converted_once_with_the_same_values(data, cli_model, convert):
    x = data["held"]
    other = convert(x)
    np.testing.assert_array_equal(other, x)
    rows = tidemark._rows(other, "x")
    # One fresh float32 C-order copy, owned by the converted array.
    assert rows.dtype == np.float32 and rows.flags.c_contiguous and rows.flags.owndata
    assert not np.shares_memory(rows, other)
    assert _core._data_address(rows) == rows.ctypes.data
    model = tidemark.load(cli_model)
    assert_same_scores(model.score(other, threads=1), model.score(x, threads=1))


def test_float64_values_are_rounded_as_the_cli_reads_a_float64_file(data, cli_model, tmp_path):
    x = data["held"].astype(np.float64) + 1e-9  # not representable in float32
    np.save(tmp_path / "f64.npy", x)
    cli("score", cli_model, tmp_path / "f64.npy", "-o", tmp_path / "s.csv", "--threads", "1")
    assert_same_scores(tidemark.load(cli_model).score(x, threads=1), read_scores(tmp_path / "s.csv"))


def test_two_threads_scoring_one_model_give_the_single_thread_result(data, cli_model):
    model = tidemark.load(cli_model)
    x = np.concatenate([data["held"]] * 20)
    alone = model.score(x, threads=1)
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(lambda _: model.score(x, threads=1), range(4)))
    for r in results:
        assert_same_scores(r, alone)


def test_score_frame_is_a_dataframe_and_needs_pandas(data, cli_model, monkeypatch):
    pd = pytest.importorskip("pandas")
    model = tidemark.load(cli_model)
    frame = model.score_frame(data["held"])
    assert isinstance(frame, pd.DataFrame) and list(frame.columns) == model.columns()
    monkeypatch.setitem(__import__("sys").modules, "pandas", None)
    with pytest.raises(ImportError, match="needs pandas"):
        model.score_frame(data["held"])


def spins_while(work) -> int:
    """How many times this thread got to run Python code while `work` ran on another thread."""
    t = threading.Thread(target=work)
    spins = 0
    t.start()
    while t.is_alive():
        spins += 1
    t.join()
    return spins


def test_the_gil_is_released_while_scoring_and_fitting(data, cli_model):
    # Holding the GIL through the library call would leave this thread a
    # handful of turns at most (it runs only between the other's bytecodes).
    model = tidemark.load(cli_model)
    x = np.tile(data["held"], (300, 1))
    assert spins_while(lambda: model.score(x, threads=1)) > 1000
    assert spins_while(lambda: tidemark.fit(data["train"], epochs=5, layers=2, hidden=16, threads=1, progress=False)) > 1000
