"""The README's Python example runs as written (numpy array -> fit ->
DataFrame of scores -> calibrated flags), so it cannot rot."""

import os
import re

import pytest

from conftest import REPO

MARKER = "<!-- readme-example: run by python/tests/test_readme.py -->"


def readme_example() -> str:
    text = (REPO / "README.md").read_text()
    match = re.search(re.escape(MARKER) + r"\s*```python\n(.*?)```", text, re.S)
    assert match, f"README.md has no ```python block after {MARKER}"
    return match.group(1)


def test_readme_example_runs(tmp_path, monkeypatch, capsys):
    pytest.importorskip("pandas")
    monkeypatch.chdir(tmp_path)
    ns: dict = {}
    exec(compile(readme_example(), "README.md example", "exec"), ns)
    scores = ns["scores"]
    assert len(scores) == 100 and {"p_value", "flagged"} <= set(scores.columns)
    # The five widened vectors (4x the spread in 16 dimensions) sit far out in
    # typicality; with a 1% false-alarm rate they are all flagged.
    assert scores["flagged"].iloc[-5:].tolist() == [1.0] * 5
    assert os.path.exists("model.safetensors") and os.path.exists("cal.json")
    assert "flagged" in capsys.readouterr().out
