"""Fitting from Python: interruption and resumption, labels, samples."""

import json
import os
import signal
import threading
import time

import numpy as np
import pytest
import tidemark

from conftest import assert_same_scores

# Long enough (hundreds of epochs of a tiny flow) that the interrupt lands mid-run.
LONG = dict(epochs=400, patience=400, layers=2, hidden=16, threads=1, progress=False, seed=3)


def interrupt_when_exists(path, timeout=60.0):
    """Send this process SIGINT (what Ctrl-C sends) once `path` exists."""

    def watch():
        deadline = time.time() + timeout
        while time.time() < deadline:
            if path.exists():
                os.kill(os.getpid(), signal.SIGINT)
                return
            time.sleep(0.005)

    t = threading.Thread(target=watch, daemon=True)
    t.start()
    return t


def test_an_interrupted_fit_resumes_to_the_uninterrupted_model(data, tmp_path):
    ck = tmp_path / "run.checkpoint.safetensors"
    watcher = interrupt_when_exists(ck)
    with pytest.raises(tidemark.Interrupted) as e:
        tidemark.fit(data["train"], data["labels"], checkpoint=ck, **LONG)
    watcher.join()
    assert isinstance(e.value, KeyboardInterrupt)
    message = str(e.value)
    assert f"checkpoint {ck}" in message
    assert "continue with: tidemark.fit(x, labels, checkpoint=" in message and f"resume={str(ck)!r}" in message
    assert e.value.checkpoint == str(ck) and ck.exists()
    resumed = tidemark.fit(data["train"], data["labels"], checkpoint=ck, resume=ck, **LONG)
    assert not ck.exists(), "a completed fit deletes its checkpoint"
    straight = tidemark.fit(data["train"], data["labels"], **LONG)
    assert resumed.fingerprint == straight.fingerprint
    assert_same_scores(resumed.score(data["ood"]), straight.score(data["ood"]))


def test_resume_refuses_other_data(data, tmp_path):
    ck = tmp_path / "run.checkpoint.safetensors"
    watcher = interrupt_when_exists(ck)
    with pytest.raises(tidemark.Interrupted):
        tidemark.fit(data["train"], checkpoint=ck, **LONG)
    watcher.join()
    with pytest.raises(ValueError, match="differs from the data this run was started on"):
        tidemark.fit(data["train"][::-1], resume=ck, **LONG)


def test_samples_and_kinds(data):
    model = tidemark.fit(data["train"], kind="gaussian", progress=False)
    assert model.info["kind"] == "gaussian"
    s = model.sample(4000, seed=1)
    assert s.shape == (4000, data["train"].shape[1]) and s.dtype == np.float32
    # A Gaussian fitted to the rows has their mean; its samples' mean is
    # within 5 standard errors of it (standard error sigma / sqrt(n)).
    se = data["train"].std(axis=0) / np.sqrt(len(s))
    assert np.all(np.abs(s.mean(axis=0) - data["train"].mean(axis=0)) < 5 * se)


def test_training_log_and_its_curves_in_the_report(data, tmp_path):
    log = tmp_path / "train.jsonl"
    model = tidemark.fit(data["train"], epochs=3, layers=2, hidden=16, threads=1, progress=False, log=log)
    lines = [json.loads(line) for line in log.read_text().splitlines()]
    assert [entry["epoch"] for entry in lines] == [1, 2, 3]
    ids, oods = model.score(data["held"]), model.score(data["ood"])
    tidemark.report(tmp_path / "r.html", ids, {"shifted": oods}, log=log, bootstrap=10)
    assert "<h2>Training</h2>" in (tmp_path / "r.html").read_text()
