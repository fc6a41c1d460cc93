"""Types of the compiled module; the public API is in ``tidemark/__init__.py``.

Arrays passed here are already 2-D aligned C-contiguous float32 (rows),
1-D int64 (labels) or 1-D float64 (scores): the package converts them."""

from typing import Dict, List, Optional, Tuple

import numpy as np
import numpy.typing as npt

Rows = npt.NDArray[np.float32]
Column = npt.NDArray[np.float64]

class Interrupted(KeyboardInterrupt): ...

class Model:
    def save(self, path: str) -> None: ...
    def columns(self, calibrated: bool = False) -> List[str]: ...
    def score(
        self, x: Rows, columns: List[str], calibration: Optional[Calibration], threads: int
    ) -> Dict[str, Column]: ...
    def calibrate(
        self, x: Rows, false_alarm: float, score: str, threads: int
    ) -> Tuple[Calibration, List[str]]: ...
    def sample(self, n: int, seed: int) -> Rows: ...
    def info_json(self) -> str: ...
    def describe(self) -> str: ...
    def fingerprint(self) -> str: ...

class Calibration:
    def save(self, path: str) -> None: ...
    def to_json(self) -> str: ...
    def p_values(self, values: Column) -> Column: ...

def fit(
    x: Rows,
    labels: Optional[npt.NDArray[np.int64]],
    val: Optional[Rows],
    *,
    options: str,
    config: Optional[str],
    checkpoint: str,
    resume: Optional[str],
    log: Optional[str],
    quiet: bool,
) -> Model: ...
def load(path: str) -> Model: ...
def load_calibration(path: str) -> Calibration: ...
def evaluate(
    id: List[Tuple[str, Column]],
    ood: List[Tuple[str, List[Tuple[str, Column]]]],
    columns: List[str],
    bootstrap: int,
    seed: int,
    output: Optional[str],
    report: Optional[str],
    calibration: Optional[Calibration],
    log: Optional[str],
) -> str: ...
def default_threads() -> int: ...
def _data_address(x: Rows) -> int: ...
