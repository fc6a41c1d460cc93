//! What commands write, and what they refuse to write over: outputs that
//! name an input, existing files without `--force`, `.npy` sidecars, exit
//! statuses, option values, resuming with different inputs or options, and
//! a closed standard error. All through the binary.

mod common;

use assert_cmd::Command;
use common::{bin, send, wait_for};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::Duration;

fn tidemark() -> Command {
    Command::new(bin())
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Runs `args` and expects exit status `code` with `message` in one line on
/// stderr.
fn fails(args: &[&str], code: i32, message: &str) {
    let out = tidemark().args(args).output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(code), "{args:?}: {stderr}");
    assert!(stderr.contains(message), "{args:?}: expected '{message}' in: {stderr}");
    assert_eq!(stderr.trim_end().lines().count(), 1, "{args:?}: one line: {stderr}");
    assert!(!stderr.contains("panicked"), "{stderr}");
}

/// Every file in `dir` with its bytes.
fn snapshot(dir: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file())
        .map(|p| (p.clone(), std::fs::read(&p).unwrap()))
        .collect()
}

/// A fitted model with its log, scores of in-distribution and shifted rows,
/// a calibration, labels and a config: every kind of input a command reads.
struct Files {
    dir: tempfile::TempDir,
    train: PathBuf,
    held: PathBuf,
    model: PathBuf,
    log: PathBuf,
    id: PathBuf,
    ood: PathBuf,
    cal: PathBuf,
    labels: PathBuf,
    config: PathBuf,
}

fn files() -> Files {
    let dir = tempfile::tempdir().unwrap();
    let p = |name: &str| dir.path().join(name);
    let f = Files {
        train: p("train.npy"),
        held: p("held.npy"),
        model: p("model.safetensors"),
        log: p("log.jsonl"),
        id: p("id.csv"),
        ood: p("ood.csv"),
        cal: p("cal.json"),
        labels: p("labels.csv"),
        config: p("config.json"),
        dir,
    };
    common::save(&f.train, &common::wavy(300, 0.0));
    common::save(&f.held, &common::wavy(200, 0.1));
    std::fs::write(&f.labels, (0..300).map(|r| format!("{}\n", r % 2)).collect::<String>()).unwrap();
    std::fs::write(&f.config, r#"{"epochs": 2}"#).unwrap();
    let (t, h, m) = (s(&f.train), s(&f.held), s(&f.model));
    tidemark().args(["fit", t, "-o", m, "--epochs", "2", "--log", s(&f.log), "-q"]).assert().success();
    tidemark().args(["score", m, h, "-o", s(&f.id), "--columns", "log_likelihood"]).assert().success();
    let shifted = f.dir.path().join("shifted.npy");
    common::save(&shifted, &common::wavy(100, 2.0));
    tidemark().args(["score", m, s(&shifted), "-o", s(&f.ood), "--columns", "log_likelihood"]).assert().success();
    tidemark().args(["calibrate", m, h, "-o", s(&f.cal), "--false-alarm", "0.1"]).assert().success();
    f
}

#[test]
fn an_output_naming_an_input_is_refused_by_every_command_and_no_input_changes() {
    let f = files();
    let (t, h, m) = (s(&f.train), s(&f.held), s(&f.model));
    let (id, ood, cal, log) = (s(&f.id), s(&f.ood), s(&f.cal), s(&f.log));
    let new = f.dir.path().join("new.safetensors");
    let n = s(&new);
    let link = f.dir.path().join("also_train.npy");
    std::fs::hard_link(&f.train, &link).unwrap();
    let (labels, config) = (s(&f.labels), s(&f.config));
    // The sidecar of cal.npy is cal.json, the calibration read.
    let cal_npy = f.dir.path().join("cal.npy");
    let ood_arg = format!("shifted={ood}");
    let before = snapshot(f.dir.path());
    let cases: Vec<(Vec<&str>, String)> = vec![
        (vec!["fit", t, "-o", t], format!("-o {t}: is the input DATA")),
        (vec!["fit", t, "-o", s(&link), "--force"], "is the input DATA".into()),
        (vec!["fit", t, "-o", n, "--checkpoint", t], format!("--checkpoint {t}: is the input DATA")),
        (vec!["fit", t, "-o", n, "--checkpoint", t, "--force"], "is the input DATA".into()),
        (vec!["fit", t, "-o", n, "--log", t], format!("--log {t}: is the input DATA")),
        (vec!["fit", t, "-o", labels, "--labels", labels], "is the input --labels".into()),
        (vec!["fit", t, "-o", n, "--val", h, "--log", h], "is the input --val".into()),
        (vec!["fit", t, "-o", config, "--config", config, "--force"], "is the input --config".into()),
        (vec!["fit", t, "-o", n, "--log", n], "-o and --log both name".into()),
        (vec!["score", m, h, "-o", m, "--force"], format!("-o {m}: is the input MODEL")),
        (vec!["score", m, h, "-o", s(&cal_npy), "--calibration", cal], "-o's .json sidecar".into()),
        (vec!["score", m, h, "-o", "x.csv", "--batch", "10", "--batch-output", h], "is the input DATA".into()),
        (vec!["calibrate", m, h, "-o", h, "--false-alarm", "0.1", "--force"], "is the input HELD_OUT".into()),
        (vec!["calibrate", m, h, "-o", m, "--false-alarm", "0.1"], "is the input MODEL".into()),
        (vec!["sample", m, "-n", "5", "-o", m, "--force"], "is the input MODEL".into()),
        (vec!["evaluate", "--id", id, "--ood", &ood_arg, "-o", id], "is the input --id".into()),
        (vec!["evaluate", "--id", id, "--ood", &ood_arg, "--report", ood], "is the input --ood shifted".into()),
        (vec!["evaluate", "--id", id, "--ood", &ood_arg, "--log", log, "-o", log], "is the input --log".into()),
        (
            vec!["evaluate", "--id", id, "--ood", &ood_arg, "--calibration", cal, "--report", cal],
            "--calibration".into(),
        ),
    ];
    for (args, message) in &cases {
        fails(args, 1, message);
    }
    assert!(before == snapshot(f.dir.path()), "a file changed, appeared or went missing");
}

#[test]
fn existing_outputs_need_force_and_a_npy_comes_with_its_sidecar() {
    let f = files();
    let (h, m) = (s(&f.held), s(&f.model));
    let scores = f.dir.path().join("s.csv");
    std::fs::write(&scores, "mine\n").unwrap();
    fails(&["score", m, h, "-o", s(&scores)], 1, "s.csv: already exists; pass --force to replace it");
    assert_eq!(std::fs::read_to_string(&scores).unwrap(), "mine\n");
    tidemark().args(["score", m, h, "-o", s(&scores), "--force"]).assert().success();
    assert!(std::fs::read_to_string(&scores).unwrap().starts_with("log_likelihood,"));

    // An unrelated x.json beside x.npy is neither replaced nor orphaned.
    let (npy, side) = (f.dir.path().join("x.npy"), f.dir.path().join("x.json"));
    std::fs::write(&side, "{\"mine\": 1}\n").unwrap();
    fails(&["score", m, h, "-o", s(&npy)], 1, "-o's .json sidecar");
    assert!(!npy.exists());
    assert_eq!(std::fs::read_to_string(&side).unwrap(), "{\"mine\": 1}\n");
    tidemark().args(["score", m, h, "-o", s(&npy), "--force"]).assert().success();
    let doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&side).unwrap()).unwrap();
    assert_eq!(doc["columns"][0], "log_likelihood");
    assert_eq!(tidemark::data::read_matrix(&npy, None).unwrap().rows, 200);

    let ood_arg = format!("shifted={}", s(&f.ood));
    let existing: Vec<Vec<&str>> = vec![
        vec!["fit", s(&f.train), "-o", m, "--epochs", "1"],
        vec!["fit", s(&f.train), "-o", "fresh.safetensors", "--log", s(&f.log), "--epochs", "1"],
        vec!["calibrate", m, h, "-o", s(&f.cal), "--false-alarm", "0.1"],
        vec!["sample", m, "-n", "3", "-o", s(&scores)],
        vec!["evaluate", "--id", s(&f.id), "--ood", &ood_arg, "-o", s(&scores)],
        vec!["bench", "--seconds", "0.01", "--json", s(&scores)],
    ];
    let before = snapshot(f.dir.path());
    for args in &existing {
        fails(args, 1, "already exists; pass --force to replace it");
    }
    assert!(before == snapshot(f.dir.path()));
}

#[test]
fn a_checkpoint_is_removed_only_when_the_run_wrote_it_and_an_old_one_is_pointed_out() {
    let f = files();
    let t = s(&f.train);
    let ck = f.dir.path().join("ck.safetensors");
    std::fs::write(&ck, "not yours").unwrap();
    let m2 = f.dir.path().join("m2.safetensors");
    fails(&["fit", t, "-o", s(&m2), "--checkpoint", s(&ck)], 1, "a checkpoint of an earlier run is here");
    // A Gaussian fit writes no checkpoint, so the file it was allowed to
    // replace is still the user's, and stays.
    tidemark()
        .args(["fit", t, "-o", s(&m2), "--checkpoint", s(&ck), "--kind", "gaussian", "--force", "-q"])
        .assert()
        .success();
    assert_eq!(std::fs::read_to_string(&ck).unwrap(), "not yours");
    // A flow writes its checkpoint over it and removes it at the end.
    tidemark()
        .args(["fit", t, "-o", s(&m2), "--checkpoint", s(&ck), "--epochs", "1", "--force", "-q"])
        .assert()
        .success();
    assert!(!ck.exists());
}

#[test]
fn exit_statuses_tell_usage_and_output_failures_apart() {
    let f = files();
    // Usage errors (clap's own several-line messages) are bad input too.
    tidemark().arg("fit").assert().code(1);
    tidemark().args(["score", "--bogus"]).assert().code(1);
    tidemark().arg("--help").assert().code(0);
    // No file can be created in /proc/self, whoever runs the test.
    fails(&["score", s(&f.model), s(&f.held), "-o", "/proc/self/scores.csv"], 2, "/proc/self/scores.csv");
    fails(&["sample", s(&f.model), "-n", "4", "-o", "/proc/self/s.npy"], 2, "/proc/self/s.npy");
}

#[test]
fn every_option_value_is_checked_and_named_as_typed() {
    let f = files();
    let (t, h, m) = (s(&f.train), s(&f.held), s(&f.model));
    let out = f.dir.path().join("out.safetensors");
    let o = s(&out);
    let bad_config = f.dir.path().join("bad.json");
    std::fs::write(&bad_config, r#"{"grad_clip": -1}"#).unwrap();
    let fit = |extra: &[&'static str]| -> Vec<String> {
        let mut v: Vec<String> = ["fit", t, "-o", o, "-q"].iter().map(|a| a.to_string()).collect();
        v.extend(extra.iter().map(|a| a.to_string()));
        v
    };
    let cases: Vec<(Vec<String>, &str)> = vec![
        (fit(&["--noise", "NaN"]), "--noise: must be a finite number at or above 0, got NaN"),
        (fit(&["--grad-clip=-1"]), "--grad-clip: must be a finite number above 0, got -1"),
        (fit(&["--grad-clip", "0"]), "--grad-clip: must be a finite number above 0, got 0"),
        (fit(&["--weight-decay=-0.1"]), "--weight-decay: must be a finite number at or above 0"),
        (fit(&["--background-noise=-1"]), "--background-noise: must be a finite number above 0"),
        (fit(&["--batch-size", "0"]), "--batch-size: must be between 1 and"),
        (fit(&["--lr", "NaN"]), "--lr: must be a finite number above 0, got NaN"),
        (fit(&["--lr", "0"]), "--lr: must be a finite number above 0"),
        (fit(&["--clamp", "NaN"]), "--clamp: must be a finite number above 0"),
        (fit(&["--lu-rate", "0", "--mixing", "lu"]), "--lu-rate: must be a finite number above 0, got 0"),
        (fit(&["--lu-rate", "0.5", "--mixing", "permutation"]), "--lu-rate steps LU blocks; it needs --mixing lu"),
        (fit(&["--lu-rate", "0.5"]), "--lu-rate steps LU blocks; it needs --mixing lu"),
        (fit(&["--hidden", "1000000000000"]), "--hidden: must be between 1 and 65536, got 1000000000000"),
        (fit(&["--epochs", "0"]), "--epochs: must be between 1 and"),
        (fit(&["--val-fraction", "1.5"]), "--val-fraction: must be at least 0 and below 0.9, got 1.5"),
        (fit(&["--dropout", "1"]), "--dropout: must be at least 0 and below 1"),
        (fit(&["--threads", "0"]), "--threads: must be between 1 and"),
        (fit(&["--depth", "0"]), "--depth: must be between 1 and 64"),
        (fit(&["--checkpoint-minutes=-1"]), "--checkpoint-minutes: must be a finite number at or above 0"),
        (fit(&["--config"]).into_iter().chain([s(&bad_config).to_string()]).collect(), "bad.json: grad_clip: must be"),
        (strings(&["sample", m, "-n", "10000000000000", "-o", "x.npy"]), "-n: must be between 1 and"),
        (strings(&["sample", m, "-n", "300000000", "-o", "x.npy"]), "-n: 300000000 vectors of 4 values exceed"),
        (strings(&["sample", m, "-n", "0", "-o", "x.npy"]), "-n: must be between 1 and"),
        (strings(&["bench", "--dim", "1"]), "--dim: must be between 2 and 65536, got 1"),
        (strings(&["bench", "--depth", "0"]), "--depth: must be between 1 and 64, got 0"),
        (strings(&["bench", "--seconds=-1"]), "--seconds: must be a finite number above 0, got -1"),
        (strings(&["bench", "--threads", "0"]), "--threads: must be between 1 and"),
        (
            strings(&["calibrate", m, h, "-o", "c.json", "--false-alarm", "1.5"]),
            "--false-alarm: must be between 0 and 1",
        ),
        (strings(&["calibrate", m, h, "-o", "c.json", "--false-alarm", "0"]), "--false-alarm: must be between 0 and 1"),
        (strings(&["score", m, h, "-o", "x.csv", "--batch", "0"]), "--batch: must be between 1 and"),
        (strings(&["score", m, h, "-o", "x.csv", "--batch", "5", "--batch-alpha", "2"]), "--batch-alpha: must be"),
        (strings(&["score", m, h, "-o", "x.csv", "--threads", "0"]), "--threads: must be between 1 and"),
        (strings(&["evaluate", "--id", s(&f.id), "--ood", "a=b.csv", "--bootstrap", "0"]), "--bootstrap: must be"),
    ];
    let before = snapshot(f.dir.path());
    for (args, message) in &cases {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        fails(&args, 1, message);
    }
    assert!(before == snapshot(f.dir.path()));
}

fn strings(args: &[&str]) -> Vec<String> {
    args.iter().map(|a| a.to_string()).collect()
}

/// The epoch in progress in a checkpoint's training state.
fn checkpoint_epoch(path: &Path) -> u64 {
    let bytes = std::fs::read(path).unwrap();
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let header: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
    let state: serde_json::Value =
        serde_json::from_str(header["__metadata__"]["tidemark_checkpoint"].as_str().unwrap()).unwrap();
    state["epoch"].as_u64().unwrap()
}

#[test]
fn resume_refuses_other_labels_and_options_applies_more_epochs_and_keeps_the_log() {
    let dir = tempfile::tempdir().unwrap();
    let p = |name: &str| dir.path().join(name);
    let (train, labels, other_labels) = (p("train.npy"), p("labels.csv"), p("other.csv"));
    common::save(&train, &common::wavy(3000, 0.0));
    std::fs::write(&labels, (0..3000).map(|r| format!("{}\n", r % 2)).collect::<String>()).unwrap();
    std::fs::write(&other_labels, (0..3000).map(|r| format!("{}\n", r % 3)).collect::<String>()).unwrap();
    let (model, ck, log) = (p("model.safetensors"), p("ck.safetensors"), p("train log.jsonl"));
    let (t, m, c, l) = (s(&train), s(&model), s(&ck), s(&log));
    let long = ["--epochs", "500", "--patience", "500", "--hidden", "16", "--layers", "2", "--checkpoint-minutes", "0"];
    let child = std::process::Command::new(bin())
        .args(["fit", t, "-o", m, "--labels", s(&labels), "--checkpoint", c, "--log", l, "-q", "--threads", "1"])
        .args(long)
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    wait_for(&log, Duration::from_secs(60));
    send(child.id(), "-TERM");
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(130), "{stderr}");
    // The whole command, quoted for a shell, with the log.
    let wanted = format!("--labels {} --log '{l}' -q --threads 1 --epochs 500", s(&labels));
    assert!(stderr.contains(&wanted) && stderr.contains(&format!("--resume {c}")), "{stderr}");

    // The first command again, as if the interruption had been missed.
    let mut again = strings(&["fit", t, "-o", m, "--labels", s(&labels), "--checkpoint", c, "--log", l, "-q"]);
    again.extend(strings(&long));
    let again: Vec<&str> = again.iter().map(String::as_str).collect();
    fails(&again, 1, &format!("{c}: a checkpoint of an earlier run is here; continue it with --resume {c}"));

    let resume = |extra: &[&str]| -> Vec<String> {
        let mut v = strings(&["fit", t, "-o", m, "--resume", c, "-q"]);
        v.extend(strings(extra));
        v
    };
    let refused: Vec<(Vec<String>, &str)> = vec![
        (resume(&["--labels", s(&other_labels)]), "--labels: differ from the labels this run was started with"),
        (resume(&[]), "this run was started with --labels"),
        (resume(&["--labels", s(&labels), "--hidden", "64"]), "--hidden 64 differs from the checkpoint's 16"),
        (resume(&["--labels", s(&labels), "--seed", "3"]), "--seed 3 differs from the checkpoint's 0"),
    ];
    for (args, message) in &refused {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        fails(&args, 1, message);
    }
    // More epochs apply; the log goes on where the checkpoint left it,
    // without naming it again.
    let at = checkpoint_epoch(&ck);
    let epochs = (at + 1).to_string();
    let out = tidemark()
        .args(["fit", t, "-o", m, "--resume", c, "--labels", s(&labels), "--epochs", &epochs])
        .assert()
        .success();
    let stderr = String::from_utf8_lossy(&out.get_output().stderr);
    assert!(stderr.contains(&format!("resuming with --epochs {epochs} instead of 500")), "{stderr}");
    let lines = std::fs::read_to_string(&log).unwrap().lines().count() as u64;
    assert_eq!(lines, at + 1, "one log line per epoch, before and after the interruption");
    assert!(!ck.exists(), "the finished run's checkpoint is removed");
}

/// `fit 2>&1 | head -1`: the reader goes away and fit still finishes its
/// model, with status 0 and no panic.
#[test]
fn fit_with_a_closed_stderr_finishes_without_a_panic() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(2000, 0.0));
    let model = dir.path().join("model.safetensors");
    let mut child = std::process::Command::new(bin())
        .args(["fit", s(&train), "-o", s(&model), "--epochs", "5", "--threads", "1"])
        .stderr(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stderr.take());
    drop(child.stdout.take());
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(0));
    tidemark::model::Model::load(&model).unwrap();
    // And a closed stdout for a command that prints.
    let mut child = std::process::Command::new(bin())
        .args(["inspect", s(&model), "--json"])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    let out = child.wait_with_output().unwrap();
    assert_eq!(out.status.code(), Some(0), "{}", String::from_utf8_lossy(&out.stderr));
}
