"""The bindings against the CLI of the same checkout: the same numbers and
files bit for bit, and the same messages for bad input."""

import json

import numpy as np
import pytest
import tidemark

from conftest import FIT_FLAGS, FIT_OPTIONS, assert_same_scores, cli, read_scores


def test_scores_of_a_cli_model_equal_the_cli(data, cli_model, tmp_path):
    cli("score", cli_model, data["dir"] / "held.npy", "-o", tmp_path / "s.csv", "--threads", "1")
    ours = tidemark.load(cli_model).score(data["held"], threads=1)
    assert "class_log_likelihood_7" in ours
    assert_same_scores(ours, read_scores(tmp_path / "s.csv"))


def test_columns_and_thread_count_do_not_change_values(data, cli_model, tmp_path):
    cli("score", cli_model, data["dir"] / "ood.npy", "-o", tmp_path / "s.csv", "--threads", "2",
        "--columns", "typicality,log_likelihood")
    ours = tidemark.load(cli_model).score(data["ood"], columns=["typicality", "log_likelihood"], threads=2)
    assert_same_scores(ours, read_scores(tmp_path / "s.csv"))


def test_calibration_equals_the_cli_file_and_flags_alike(data, cli_model, tmp_path):
    cli("calibrate", cli_model, data["dir"] / "held.npy", "-o", tmp_path / "cli_cal.json",
        "--false-alarm", "0.05", "--score", "typicality", "--threads", "1")
    model = tidemark.load(cli_model)
    cal = model.calibrate(data["held"], false_alarm=0.05, score="typicality", threads=1)
    cal.save(tmp_path / "py_cal.json")
    assert json.loads((tmp_path / "py_cal.json").read_text()) == json.loads((tmp_path / "cli_cal.json").read_text())
    cli("score", cli_model, data["dir"] / "ood.npy", "-o", tmp_path / "s.csv", "--threads", "1",
        "--calibration", tmp_path / "cli_cal.json")
    loaded = tidemark.load_calibration(tmp_path / "cli_cal.json")
    ours = model.score(data["ood"], calibration=loaded, threads=1)
    assert_same_scores(ours, read_scores(tmp_path / "s.csv"))
    assert ours["flagged"].sum() > 0


def test_a_python_fit_equals_the_cli_fit_and_scores_alike_in_both(data, cli_model, tmp_path):
    model = tidemark.fit(data["train"], data["labels"], **FIT_OPTIONS)
    model.save(tmp_path / "py_model.safetensors")
    assert model.fingerprint == tidemark.load(cli_model).fingerprint
    cli("score", tmp_path / "py_model.safetensors", data["dir"] / "ood.npy", "-o", tmp_path / "s.csv",
        "--threads", "1")
    assert_same_scores(model.score(data["ood"], threads=1), read_scores(tmp_path / "s.csv"))


def test_a_model_from_a_config_file_and_options_equals_the_cli(data, tmp_path):
    (tmp_path / "cfg.json").write_text(json.dumps({"layers": 2, "hidden": 16, "kind": "flow"}))
    cli("fit", data["dir"] / "train.npy", "-o", tmp_path / "m.safetensors", "--config", tmp_path / "cfg.json",
        "--epochs", "2", "--threads", "1", "-q", "--seed", "5")
    model = tidemark.fit(data["train"], config=tmp_path / "cfg.json", epochs=2, seed=5, threads=1, progress=False)
    assert model.fingerprint == tidemark.load(tmp_path / "m.safetensors").fingerprint


def test_info_is_the_inspect_json(cli_model):
    proc = cli("inspect", cli_model, "--json")
    assert tidemark.load(cli_model).info == json.loads(proc.stdout)
    assert tidemark.load(cli_model).describe() == cli("inspect", cli_model).stdout


def test_evaluation_and_report_equal_the_cli(data, cli_model, tmp_path):
    d = data["dir"]
    for name in ("held", "ood"):
        cli("score", cli_model, d / f"{name}.npy", "-o", tmp_path / f"{name}.csv", "--threads", "1")
    cli("calibrate", cli_model, d / "held.npy", "-o", tmp_path / "cal.json", "--false-alarm", "0.05",
        "--score", "log_likelihood")
    cli("evaluate", "--id", tmp_path / "held.csv", "--ood", f"shifted={tmp_path / 'ood.csv'}",
        "-o", tmp_path / "cli.json", "--report", tmp_path / "cli.html", "--calibration", tmp_path / "cal.json",
        "--bootstrap", "50")
    ids, oods = read_scores(tmp_path / "held.csv"), read_scores(tmp_path / "ood.csv")
    cal = tidemark.load_calibration(tmp_path / "cal.json")
    ours = tidemark.report(tmp_path / "py.html", ids, {"shifted": oods}, calibration=cal, bootstrap=50)
    theirs = json.loads((tmp_path / "cli.json").read_text())
    # The in-distribution set is named by its file in the CLI, by the argument here.
    assert ours.pop("in_distribution") == "id_scores"
    theirs.pop("in_distribution")
    assert ours == theirs
    assert tidemark.evaluate(ids, {"shifted": oods}, bootstrap=50)["sets"] == theirs["sets"]
    cli_html = (tmp_path / "cli.html").read_text().replace(str(tmp_path / "held.csv"), "id_scores")
    assert (tmp_path / "py.html").read_text() == cli_html


def test_samples_equal_the_cli(cli_model, tmp_path):
    cli("sample", cli_model, "-n", "50", "-o", tmp_path / "s.npy", "--seed", "3")
    ours = tidemark.load(cli_model).sample(50, seed=3)
    assert ours.dtype == np.float32
    np.testing.assert_array_equal(ours, np.load(tmp_path / "s.npy"))


@pytest.mark.parametrize("bad, what", [(np.nan, "NaN"), (np.inf, "infinite")])
def test_bad_values_raise_the_cli_message(data, cli_model, tmp_path, bad, what):
    x = data["held"][:10].copy()
    x[3, 1] = bad
    np.save(tmp_path / "bad.npy", x)
    proc = cli("score", cli_model, tmp_path / "bad.npy", "-o", tmp_path / "s.csv", check=False)
    assert proc.returncode != 0
    with pytest.raises(ValueError) as e:
        tidemark.load(cli_model).score(x)
    assert str(e.value) == f"x: row 3, column 1 (0-based) is {what}"
    # The CLI adds a hint about its --bad-rows option, which Python has not.
    assert proc.stderr.strip().startswith(f"error: {tmp_path / 'bad.npy'}: row 3, column 1 (0-based) is {what}")
    assert not (tmp_path / "s.csv").exists()


def test_wrong_width_raises_the_cli_message(data, cli_model, tmp_path):
    x = data["held"][:, :5].copy()
    np.save(tmp_path / "narrow.npy", x)
    proc = cli("score", cli_model, tmp_path / "narrow.npy", "-o", tmp_path / "s.csv", check=False)
    with pytest.raises(ValueError) as e:
        tidemark.load(cli_model).score(x)
    assert proc.stderr.strip() == f"error: {tmp_path / 'narrow.npy'}: {str(e.value).split(': ', 1)[1]}"


def test_file_and_option_errors(data, tmp_path):
    with pytest.raises(FileNotFoundError):
        tidemark.load(tmp_path / "missing.safetensors")
    (tmp_path / "junk.safetensors").write_bytes(b"not a model")
    with pytest.raises(ValueError):
        tidemark.load(tmp_path / "junk.safetensors")
    model = tidemark.fit(data["train"], kind="gaussian", progress=False)
    with pytest.raises(OSError):
        model.save(tmp_path / "no_such_dir" / "m.safetensors")
    assert not (tmp_path / "no_such_dir").exists()
    with pytest.raises(ValueError, match="unknown field `layer`"):
        tidemark.fit(data["train"], layer=2, progress=False)
    with pytest.raises(ValueError, match="x: expected a 2-D array"):
        tidemark.fit(data["train"][0], progress=False)
    with pytest.raises(ValueError, match="labels: has 5 labels but the data has 600 rows"):
        tidemark.fit(data["train"], np.arange(5), progress=False)


@pytest.mark.parametrize("flags,options", [
    (["--kind", "mixture"], {"kind": "mixture"}),
    (["--coupling", "spline", "--bins", "4", "--epochs", "2", "--layers", "2", "--hidden", "16"],
     {"coupling": "spline", "bins": 4, "epochs": 2, "layers": 2, "hidden": 16}),
    (["--budget", "10m"], {"budget": "10m"}),
])
def test_other_densities_and_the_search_equal_the_cli(data, tmp_path, flags, options):
    cli("fit", data["dir"] / "train.npy", "-o", tmp_path / "m.safetensors", "--threads", "1", "-q", "--seed", "2",
        *flags)
    model = tidemark.fit(data["train"], seed=2, threads=1, progress=False, **options)
    cli_model = tidemark.load(tmp_path / "m.safetensors")
    assert model.fingerprint == cli_model.fingerprint
    assert model.info["kind"] == cli_model.info["kind"]
    cli("score", tmp_path / "m.safetensors", data["dir"] / "ood.npy", "-o", tmp_path / "s.csv", "--threads", "1")
    assert_same_scores(model.score(data["ood"], threads=1), read_scores(tmp_path / "s.csv"))
