//! Training that survives interruption: exact resume after SIGTERM,
//! checkpoints that always load after SIGKILL, rollback after a non-finite
//! gradient, early stopping, the JSON-lines log. All through the binary.

mod common;

use assert_cmd::Command;
use common::{bin, column, mean, send, wait_for};
use std::path::Path;
use std::process::Stdio;
use std::time::Duration;
use tidemark::data::Matrix;

/// Deterministic non-Gaussian 6-d data (invented).
fn data(n: usize, phase: f32) -> Matrix {
    let mut v = Vec::with_capacity(n * 6);
    for i in 0..n {
        let t = i as f32 * 0.377 + phase;
        let (a, b) = (t.sin(), (t * 1.618).cos());
        v.extend([a, b, a * b, a * a - b, (t * 0.5).sin() * 0.3 + b * b, (t * 2.71).cos() * 0.2]);
    }
    Matrix::new(n, 6, v)
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The tensor bytes and metadata of a safetensors file, for comparison.
fn contents(path: &Path) -> (Vec<u8>, serde_json::Value) {
    let bytes = std::fs::read(path).unwrap();
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let header: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
    (bytes[8 + n..].to_vec(), header)
}

const LONG_RUN: [&str; 12] =
    ["--epochs", "40", "--patience", "100", "--hidden", "96", "--layers", "6", "--threads", "2", "--seed", "5"];

#[test]
fn sigterm_then_resume_gives_bit_identical_weights() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &data(6000, 0.0));

    let reference = dir.path().join("reference.safetensors");
    Command::new(bin()).args(["fit", s(&train), "-o", s(&reference), "-q"]).args(LONG_RUN).assert().success();

    let model = dir.path().join("model.safetensors");
    let checkpoint = dir.path().join("run.checkpoint.safetensors");
    let log = dir.path().join("log.jsonl");
    let child = std::process::Command::new(bin())
        .args(["fit", s(&train), "-o", s(&model), "-q", "--checkpoint", s(&checkpoint), "--log", s(&log)])
        .args(LONG_RUN)
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Let it pass a few epochs, then stop it wherever it is.
    wait_for(&log, Duration::from_secs(60));
    std::thread::sleep(Duration::from_millis(150));
    send(child.id(), "-TERM");
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(130), "{stderr}");
    assert!(stderr.contains("--resume"), "says how to resume: {stderr}");
    assert!(model.exists(), "best model so far is written on interrupt");
    let state: serde_json::Value =
        serde_json::from_str(contents(&checkpoint).1["__metadata__"]["tidemark_checkpoint"].as_str().unwrap()).unwrap();
    let at_epoch = state["epoch"].as_u64().unwrap();
    assert!(at_epoch < 40, "interrupted before the end (epoch {at_epoch})");

    Command::new(bin())
        .args(["fit", s(&train), "-o", s(&model), "-q", "--resume", s(&checkpoint), "--log", s(&log)])
        .assert()
        .success();
    let (a, meta_a) = contents(&reference);
    let (b, meta_b) = contents(&model);
    assert!(a == b, "weights differ after resume (interrupted at epoch {at_epoch})");
    assert_eq!(meta_a, meta_b);
    // The log is continuous across the interruption and pandas-readable JSON lines.
    let lines: Vec<serde_json::Value> =
        std::fs::read_to_string(&log).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 40);
    for (i, line) in lines.iter().enumerate() {
        assert_eq!(line["epoch"].as_u64(), Some(i as u64 + 1));
        for key in ["step", "lr", "train_nll", "val_nll", "grad_norm", "seconds"] {
            assert!(line[key].is_number(), "{key} in {line}");
        }
    }
}

#[test]
fn the_newest_checkpoint_always_loads_after_sigkill() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &data(20_000, 0.3));
    let checkpoint = dir.path().join("ck.safetensors");
    let model = dir.path().join("model.safetensors");
    let args = ["--epochs", "4", "--checkpoint-minutes", "0", "--threads", "1", "-q"];
    for (i, delay_ms) in [40u64, 90, 160, 230].into_iter().enumerate() {
        let _ = std::fs::remove_file(&checkpoint);
        let mut child = std::process::Command::new(bin())
            .args(["fit", s(&train), "-o", s(&model), "--checkpoint", s(&checkpoint), "--seed", &i.to_string()])
            .arg("--force")
            .args(args)
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        wait_for(&checkpoint, Duration::from_secs(60));
        std::thread::sleep(Duration::from_millis(delay_ms));
        send(child.id(), "-KILL");
        assert!(!child.wait().unwrap().success(), "the run ended before it was killed; make it longer");
        Command::new(bin())
            .args(["fit", s(&train), "-o", s(&model), "--resume", s(&checkpoint)])
            .args(args)
            .assert()
            .success();
        tidemark::model::Model::load(&model).unwrap();
    }
}

#[test]
fn a_non_finite_gradient_rolls_back_and_training_still_finishes() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &data(2000, 0.0));
    let model = dir.path().join("model.safetensors");
    let out = Command::new(bin())
        .args(["fit", s(&train), "-o", s(&model), "--epochs", "4", "--inject-nan-at-step", "20"])
        .assert()
        .success();
    let stderr = String::from_utf8_lossy(&out.get_output().stderr);
    assert!(stderr.contains("rolled back") && stderr.contains("x0.5"), "{stderr}");
    let m = tidemark::model::Model::load(&model).unwrap();
    assert!(m.flow().expect("a flow").params.iter().all(|p| p.is_finite()));

    // With no retries allowed it stops, names the problem and keeps the best model.
    let _ = std::fs::remove_file(&model);
    let out = Command::new(bin())
        .args([
            "fit",
            s(&train),
            "-o",
            s(&model),
            "--epochs",
            "4",
            "--inject-nan-at-step",
            "20",
            "--max-retries",
            "0",
            "-q",
        ])
        .assert()
        .failure();
    let stderr = String::from_utf8_lossy(&out.get_output().stderr);
    assert!(stderr.contains("training diverged") && stderr.contains("best model so far written"), "{stderr}");
    tidemark::model::Model::load(&model).unwrap();
}

#[test]
fn early_stopping_keeps_the_best_epoch_and_its_validation_nll_is_reproducible() {
    let dir = tempfile::tempdir().unwrap();
    let (train, val) = (dir.path().join("train.npy"), dir.path().join("val.npy"));
    // Few rows, a big conditioner, no regularisation: it overfits quickly.
    common::save(&train, &data(150, 0.0));
    common::save(&val, &data(300, 100.0));
    let model = dir.path().join("model.safetensors");
    let args =
        ["--val", s(&val), "--epochs", "300", "--patience", "3", "--hidden", "256", "--noise", "0", "--dropout", "0"];
    Command::new(bin()).args(["fit", s(&train), "-o", s(&model), "-q", "--lr", "0.005"]).args(args).assert().success();
    let m = tidemark::model::Model::load(&model).unwrap();
    let t = &m.meta.training;
    assert!(t.epochs_run < 300, "stopped early");
    assert_eq!(t.epochs_run, t.best_epoch + 3, "stopped 3 epochs after the best");
    let scores = dir.path().join("val.csv");
    Command::new(bin()).args(["score", s(&model), s(&val), "-o", s(&scores)]).assert().success();
    let recomputed = -mean(&column(&std::fs::read_to_string(&scores).unwrap(), "log_likelihood"));
    assert!(
        (recomputed - t.best_validation_nll).abs() < 1e-9 * recomputed.abs().max(1.0),
        "{recomputed} vs {}",
        t.best_validation_nll
    );
}

#[test]
fn resume_refuses_changed_data() {
    let dir = tempfile::tempdir().unwrap();
    let (train, other) = (dir.path().join("train.npy"), dir.path().join("other.npy"));
    common::save(&train, &data(500, 0.0));
    common::save(&other, &data(500, 1.0));
    let model = dir.path().join("model.safetensors");
    let checkpoint = dir.path().join("ck.safetensors");
    let mut child = std::process::Command::new(bin())
        .args([
            "fit",
            s(&train),
            "-o",
            s(&model),
            "--checkpoint",
            s(&checkpoint),
            "--epochs",
            "1000",
            "--patience",
            "1000",
            "-q",
        ])
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    wait_for(&checkpoint, Duration::from_secs(60));
    send(child.id(), "-TERM");
    assert_eq!(child.wait().unwrap().code(), Some(130));
    let out =
        Command::new(bin()).args(["fit", s(&other), "-o", s(&model), "--resume", s(&checkpoint)]).assert().failure();
    let stderr = String::from_utf8_lossy(&out.get_output().stderr);
    assert!(stderr.contains("other.npy: differs from the data this run was started on (500 x 6"), "{stderr}");
}

/// A second Ctrl-C exits at once (status 130) without waiting for the
/// checkpoint; whatever checkpoint is on disk is whole (files are only ever
/// renamed into place) and resumes.
#[test]
fn a_second_interrupt_exits_at_once_and_leaves_a_loadable_checkpoint() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &data(20_000, 0.2));
    let (model, checkpoint) = (dir.path().join("model.safetensors"), dir.path().join("ck.safetensors"));
    let args = ["--epochs", "3", "--checkpoint-minutes", "0", "--threads", "1", "-q"];
    let child = std::process::Command::new(bin())
        .args(["fit", s(&train), "-o", s(&model), "--checkpoint", s(&checkpoint)])
        .args(args)
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    wait_for(&checkpoint, Duration::from_secs(60));
    send(child.id(), "-INT");
    send(child.id(), "-INT");
    let out = child.wait_with_output().unwrap();
    assert_eq!(out.status.code(), Some(130));
    Command::new(bin())
        .args(["fit", s(&train), "-o", s(&model), "--resume", s(&checkpoint)])
        .args(args)
        .assert()
        .success();
}
