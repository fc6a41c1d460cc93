"""tidemark: fit a density to embedding vectors on a CPU and score new vectors
for being in-distribution.

Thin bindings over the library the ``tidemark`` command line uses: the same
fitting, scores, calibration, evaluation and report, bit for bit.

Arrays: a C-contiguous ``float32`` array (including ``np.load(path,
mmap_mode="r")`` of a float32 ``.npy``) is read where it lies, without a
copy; any other dtype or layout (float64, Fortran order, strided views) is
converted once into a float32 C-order copy. Do not write to an array while a
call that reads it is running in another thread. NaN or infinite values
raise ``ValueError`` naming the row and column.

The GIL is released while the library fits and scores, so other Python
threads run meanwhile, and one model can score from several threads at once.
Progress lines go to the process's standard error (in Jupyter: the terminal
the kernel runs in).
"""

from __future__ import annotations

import json
import os
import tempfile
import uuid
import warnings
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np

from . import _core
from ._core import Interrupted

__all__ = [
    "Calibration",
    "Interrupted",
    "Model",
    "evaluate",
    "fit",
    "load",
    "load_calibration",
    "report",
]

PathLike = Union[str, "os.PathLike[str]"]
Scores = Union[Mapping[str, Any], Any]


def _rows(x: Any, name: str) -> np.ndarray:
    """``x`` as a 2-D aligned C-contiguous float32 array: itself when it
    already is one, otherwise one converted copy."""
    a = np.asarray(x)
    if a.ndim != 2:
        raise ValueError(f"{name}: expected a 2-D array (rows x features), got shape {a.shape}")
    return np.require(a, dtype=np.float32, requirements=["C", "A"])


def _labels(labels: Any) -> Optional[np.ndarray]:
    if labels is None:
        return None
    a = np.asarray(labels)
    if a.ndim == 2 and a.shape[1] == 1:
        a = a[:, 0]
    if a.ndim != 1:
        raise ValueError(f"labels: expected one integer label per row, got shape {a.shape}")
    if a.dtype.kind not in "iu":
        raise ValueError(f"labels: expected integers, got dtype {a.dtype}")
    return np.ascontiguousarray(a, dtype=np.int64)


def _path(p: Optional[PathLike]) -> Optional[str]:
    return None if p is None else os.fspath(p)


def _threads(threads: Optional[int]) -> int:
    return _core.default_threads() if threads is None else int(threads)


def _json_value(v: Any) -> Any:
    # numpy scalars (np.int64(3), np.float32(0.1)) as plain numbers
    if hasattr(v, "item"):
        return v.item()
    raise TypeError(f"option value {v!r} is not a number, string or boolean")


class Calibration:
    """A split-conformal threshold for one score at a false-alarm rate, from
    held-out in-distribution vectors (the CLI's calibration file).

    Attributes mirror the file: ``score``, ``direction`` ("higher", "lower"
    or "two-sided"), ``false_alarm``, ``rows``, ``rank`` (the conformal rank
    ceil((n + 1)(1 - alpha))), ``threshold`` (on the oriented
    higher-is-more-anomalous scale), ``threshold_raw`` (the same threshold on
    the score's own scale) and ``model`` (the fingerprint of its model).
    """

    def __init__(self, core: "_core.Calibration") -> None:
        self._core = core
        fields = json.loads(core.to_json())
        self.score: str = fields["score"]
        self.direction: str = fields["direction"]
        self.false_alarm: float = fields["false_alarm"]
        self.rows: int = fields["rows"]
        self.rank: int = fields["rank"]
        self.threshold: float = fields["threshold"]
        self.threshold_raw: float = fields["threshold_raw"]
        self.model: str = fields["model"]

    def save(self, path: PathLike) -> None:
        """Write the calibration as JSON (readable by ``tidemark score --calibration``)."""
        self._core.save(os.fspath(path))

    def p_values(self, values: Any) -> np.ndarray:
        """Conformal p-values of raw values of the calibrated score."""
        return self._core.p_values(np.ascontiguousarray(values, dtype=np.float64).ravel())

    def __repr__(self) -> str:
        return (
            f"Calibration(score={self.score!r}, false_alarm={self.false_alarm}, "
            f"threshold_raw={self.threshold_raw!r}, rows={self.rows})"
        )


class Model:
    """A fitted density model (from :func:`fit` or :func:`load`)."""

    def __init__(self, core: "_core.Model") -> None:
        self._core = core

    def save(self, path: PathLike) -> None:
        """Write the model as a ``.safetensors`` file, the CLI's model format."""
        self._core.save(os.fspath(path))

    def columns(self, calibrated: bool = False) -> List[str]:
        """Every score column this model produces, in order (with
        ``calibrated``, ``p_value`` and ``flagged`` at the end)."""
        return self._core.columns(calibrated)

    def score(
        self,
        x: Any,
        columns: Optional[Sequence[str]] = None,
        calibration: Optional[Calibration] = None,
        *,
        threads: Optional[int] = None,
    ) -> Dict[str, np.ndarray]:
        """Score every row of ``x`` (rows x features).

        Returns ``{column: float64 array}`` in the column order of
        ``tidemark score`` (all columns, or ``columns``); with a
        ``calibration``, ``p_value`` and ``flagged`` (1.0 or 0.0) are added.
        Rows are scored in chunks, so a memory-mapped input is never loaded
        whole. The values equal the CLI's bit for bit.
        """
        rows = _rows(x, "x")
        cal = None if calibration is None else calibration._core
        return self._core.score(rows, list(columns or []), cal, _threads(threads))

    def score_frame(
        self,
        x: Any,
        columns: Optional[Sequence[str]] = None,
        calibration: Optional[Calibration] = None,
        *,
        threads: Optional[int] = None,
    ) -> "Any":
        """:meth:`score` as a pandas DataFrame (one row per input row)."""
        try:
            import pandas as pd
        except ImportError as e:
            raise ImportError(
                "Model.score_frame needs pandas (pip install pandas); Model.score returns a dict of numpy arrays without it"
            ) from e
        return pd.DataFrame(self.score(x, columns, calibration, threads=threads))

    def calibrate(
        self,
        x_held_out: Any,
        false_alarm: float = 0.01,
        score: str = "log_likelihood",
        *,
        threads: Optional[int] = None,
    ) -> Calibration:
        """Pick the threshold of ``score`` that flags at most a ``false_alarm``
        share of in-distribution vectors, from held-out in-distribution rows
        the model never saw (split-conformal). Warns when they are the
        training rows."""
        rows = _rows(x_held_out, "x_held_out")
        core, notes = self._core.calibrate(rows, float(false_alarm), score, _threads(threads))
        for note in notes:
            warnings.warn(note, stacklevel=2)
        return Calibration(core)

    def sample(self, n: int, seed: int = 0) -> np.ndarray:
        """``n`` vectors drawn from the model (float32, n x features)."""
        return self._core.sample(int(n), int(seed))

    @property
    def info(self) -> Dict[str, Any]:
        """How the model was made and how it did: the metadata that
        ``tidemark inspect --json`` prints, as a dict."""
        return json.loads(self._core.info_json())

    def describe(self) -> str:
        """The text ``tidemark inspect`` prints."""
        return self._core.describe()

    @property
    def fingerprint(self) -> str:
        """A checksum of everything that determines the scores (calibrations
        record it, and refuse other models)."""
        return self._core.fingerprint()

    def __repr__(self) -> str:
        info = self.info
        return f"Model(kind={info['kind']!r}, input_dim={info['input_dim']}, fingerprint={self.fingerprint!r})"


def fit(
    x: Any,
    labels: Any = None,
    *,
    config: Optional[PathLike] = None,
    val: Any = None,
    seed: int = 0,
    threads: Optional[int] = None,
    progress: bool = True,
    checkpoint: Optional[PathLike] = None,
    resume: Optional[PathLike] = None,
    log: Optional[PathLike] = None,
    **options: Any,
) -> Model:
    """Fit a model to the rows of ``x`` (rows x features).

    ``labels``: one integer class label per row, for a class-conditional
    model. ``val``: held-out in-distribution rows for validation instead of
    a split. ``options``: the CLI's fit options with underscored names
    (``layers=4``, ``kind="gaussian"``, ``batch_size=256``, ...); unset ones
    are chosen from the data size; ``config`` is a JSON file of the same
    options, which keyword options override. An unknown option raises
    ``ValueError`` naming it. ``log``: a JSON-lines training log.

    Checkpoints go to ``checkpoint`` (default: a file in the temporary
    directory), and are deleted when the fit completes. Ctrl-C (or
    ``KeyboardInterrupt`` raised in the main thread) stops training after its
    current step, writes a checkpoint and raises :class:`Interrupted` (a
    ``KeyboardInterrupt``) whose message gives the call that continues:
    the same arguments plus ``resume=CHECKPOINT``. Same data, seed and
    threads give an identical model, resumed or not.
    """
    opts = dict(options)
    opts["seed"] = seed
    if threads is not None:
        opts["threads"] = threads
    rows = _rows(x, "x")
    val_rows = None if val is None else _rows(val, "val")
    ck = _path(checkpoint) or _path(resume)
    if ck is None:
        ck = os.path.join(tempfile.gettempdir(), f"tidemark-fit-{uuid.uuid4().hex[:12]}.checkpoint.safetensors")
    try:
        core = _core.fit(
            rows,
            _labels(labels),
            val_rows,
            options=json.dumps(opts, default=_json_value),
            config=_path(config),
            checkpoint=ck,
            resume=_path(resume),
            log=_path(log),
            quiet=not progress,
        )
    except Interrupted as e:
        call = _resume_call(labels is not None, val is not None, config, seed, threads, checkpoint, log, options, ck)
        stopped = Interrupted(f"{e}; continue with: {call}")
        stopped.checkpoint = ck  # type: ignore[attr-defined]
        raise stopped from None
    return Model(core)


def _resume_call(
    labels: bool,
    val: bool,
    config: Optional[PathLike],
    seed: int,
    threads: Optional[int],
    checkpoint: Optional[PathLike],
    log: Optional[PathLike],
    options: Mapping[str, Any],
    ck: str,
) -> str:
    """The ``fit`` call that continues an interrupted one."""
    parts = ["x"] + (["labels"] if labels else []) + (["val=val"] if val else [])
    named = {"config": config, "checkpoint": checkpoint, "log": log, "seed": seed, "threads": threads, **options}
    parts += [f"{k}={_literal(v)}" for k, v in named.items() if v is not None]
    return f"tidemark.fit({', '.join(parts)}, resume={ck!r})"


def _literal(v: Any) -> str:
    return repr(os.fspath(v)) if isinstance(v, os.PathLike) else repr(v)


def load(path: PathLike) -> Model:
    """Read a model file written by :meth:`Model.save` or ``tidemark fit``."""
    return Model(_core.load(os.fspath(path)))


def load_calibration(path: PathLike) -> Calibration:
    """Read a calibration file written by :meth:`Calibration.save` or ``tidemark calibrate``."""
    return Calibration(_core.load_calibration(os.fspath(path)))


def _table(scores: Scores, name: str) -> List[Tuple[str, np.ndarray]]:
    items: Iterable[Tuple[Any, Any]] = scores.items()
    table = [(str(c), np.ascontiguousarray(v, dtype=np.float64).ravel()) for c, v in items]
    if not table:
        raise ValueError(f"{name}: has no score columns")
    return table


def evaluate(
    id_scores: Scores,
    ood_scores: Mapping[str, Scores],
    *,
    columns: Optional[Sequence[str]] = None,
    bootstrap: int = 1000,
    seed: int = 0,
    output: Optional[PathLike] = None,
    report: Optional[PathLike] = None,
    calibration: Optional[Calibration] = None,
    log: Optional[PathLike] = None,
) -> Dict[str, Any]:
    """How well each score separates held-out in-distribution scores
    ``id_scores`` from each outlier set in ``ood_scores`` ({name: scores});
    scores are what :meth:`Model.score` returns (or a DataFrame of them).

    Returns the document ``tidemark evaluate -o`` writes (and writes it to
    ``output`` when given): per set and score, AUROC, AUPR-In, AUPR-Out, FPR
    at 95% TPR and detection error, each with a bootstrap 95% interval.
    With ``report``, also writes the HTML report (see :func:`report`).
    """
    doc = _core.evaluate(
        _table(id_scores, "id_scores"),
        [(str(n), _table(s, str(n))) for n, s in ood_scores.items()],
        list(columns or []),
        int(bootstrap),
        int(seed),
        _path(output),
        _path(report),
        None if calibration is None else calibration._core,
        _path(log),
    )
    return json.loads(doc)


def report(path: PathLike, id_scores: Scores, ood_scores: Mapping[str, Scores], **options: Any) -> Dict[str, Any]:
    """Write the self-contained HTML report ``tidemark evaluate --report``
    writes (histograms, ROC curves, metric table; the calibrated threshold
    when ``calibration=`` is given; training curves from a ``log=`` file of
    ``fit``), and return the results; ``options`` are :func:`evaluate`'s."""
    return evaluate(id_scores, ood_scores, report=path, **options)
