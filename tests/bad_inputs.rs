//! Every malformed or unusual input in tests/bad_inputs/, run through the
//! binary as a user would (the table is tests/bad_inputs/cases.txt): a bad
//! file gives exit 1 and one line on stderr naming it, never a panic, a
//! hang, an output file or a temporary file, and leaves every input as it
//! was; the unusual-but-valid files load.

mod common;

use assert_cmd::Command;
use safetensors::SafeTensors;
use serde_json::Value;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

fn corpus() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/bad_inputs")
}

fn run(args: &[String]) -> std::process::Output {
    Command::new(common::bin())
        .args(args)
        .env("CANDLE_NUM_THREADS", "1")
        .timeout(Duration::from_secs(30))
        .output()
        .expect("the binary runs")
}

/// A model file rewritten with its metadata and tensors edited and without
/// its checksum tensor, as a file from before checksums (or a careless
/// editor) would be, so the loader's own checks are what stops it.
fn rewrite(
    bytes: &[u8],
    edit_meta: impl Fn(&mut Value),
    edit_tensor: impl Fn(&str, &mut Vec<u8>),
    drop: &[&str],
) -> Vec<u8> {
    let st = SafeTensors::deserialize(bytes).unwrap();
    let (_, header) = SafeTensors::read_metadata(bytes).unwrap();
    let mut metadata: HashMap<String, String> = header.metadata().clone().unwrap();
    let mut meta: Value = serde_json::from_str(&metadata["tidemark"]).unwrap();
    edit_meta(&mut meta);
    metadata.insert("tidemark".into(), meta.to_string());
    let mut tensors: Vec<(String, safetensors::Dtype, Vec<usize>, Vec<u8>)> = st
        .tensors()
        .into_iter()
        .filter(|(name, _)| name != "tidemark.checksum" && !drop.contains(&name.as_str()))
        .map(|(name, t)| {
            let mut data = t.data().to_vec();
            edit_tensor(&name, &mut data);
            (name, t.dtype(), t.shape().to_vec(), data)
        })
        .collect();
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    let views: Vec<(String, safetensors::tensor::TensorView)> = tensors
        .iter()
        .map(|(n, d, s, b)| (n.clone(), safetensors::tensor::TensorView::new(*d, s.clone(), b).unwrap()))
        .collect();
    safetensors::serialize(views, Some(metadata)).unwrap()
}

/// The files the table calls @name, made from a model fitted here.
fn derived(dir: &Path, model: &Path, train: &Path) -> HashMap<String, PathBuf> {
    let bytes = std::fs::read(model).unwrap();
    let keep = |_: &mut Value| {};
    let same = |_: &str, _: &mut Vec<u8>| {};
    let mut files: Vec<(&str, Vec<u8>)> = Vec::new();
    let mut flipped = bytes.clone();
    let st = SafeTensors::deserialize(&bytes).unwrap();
    let at = st.tensor("flow.0.net.0.weight").unwrap().data().as_ptr() as usize - bytes.as_ptr() as usize;
    flipped[at + 3] ^= 0x40; // the highest exponent bit of the first weight
    files.push(("flipped-bit.safetensors", flipped));
    let nan_first = |name: &str, data: &mut Vec<u8>| {
        if name == "flow.1.net.0.weight" {
            data[..4].copy_from_slice(&f32::NAN.to_le_bytes());
        }
    };
    files.push(("nan-weight.safetensors", rewrite(&bytes, keep, nan_first, &[])));
    files.push((
        "huge-hidden.safetensors",
        rewrite(&bytes, |m| m["flow"]["hidden"] = 1_000_000_000_000u64.into(), same, &[]),
    ));
    files.push((
        "huge-layers.safetensors",
        rewrite(&bytes, |m| m["flow"]["layers"] = 1_000_000_000u64.into(), same, &[]),
    ));
    files.push((
        "huge-input-dim.safetensors",
        rewrite(&bytes, |m| m["input_dim"] = 10_000_000_000_000u64.into(), same, &[]),
    ));
    let short = |m: &mut Value| {
        m["classes"].as_array_mut().unwrap().truncate(1);
    };
    files.push(("short-class-list.safetensors", rewrite(&bytes, short, same, &[])));
    files.push(("zero-row-class.safetensors", rewrite(&bytes, |m| m["classes"][1]["rows"] = 0.into(), same, &[])));
    files.push(("truncated-model.safetensors", bytes[..bytes.len() / 2].to_vec()));
    files.push(("missing-tensor.safetensors", rewrite(&bytes, keep, same, &["flow.1.net.1.bias"])));
    let zero_perm = |name: &str, data: &mut Vec<u8>| {
        if name == "flow.0.permutation" {
            data.fill(0);
        }
    };
    files.push(("bad-permutation.safetensors", rewrite(&bytes, keep, zero_perm, &[])));
    let negative_scale = |name: &str, data: &mut Vec<u8>| {
        if name == "preprocess.scale" {
            data[..8].copy_from_slice(&(-1.0f64).to_le_bytes());
        }
    };
    files.push(("bad-scale.safetensors", rewrite(&bytes, keep, negative_scale, &[])));
    files.push(("no-checksum.safetensors", rewrite(&bytes, keep, same, &[])));
    let escapes = |m: &mut Value| m["created_by"] = "\u{1b}[2J\u{1b}]0;owned\u{7}\u{9b}31m\u{202e}".into();
    files.push(("escape-codes.safetensors", rewrite(&bytes, escapes, same, &[])));

    let cal = dir.join("cal-valid.json");
    let out = run(&[
        "calibrate".into(),
        model.display().to_string(),
        train.display().to_string(),
        "-o".into(),
        cal.display().to_string(),
        "--false-alarm".into(),
        "0.1".into(),
    ]);
    assert!(out.status.success(), "calibrate: {}", String::from_utf8_lossy(&out.stderr));
    let mut doc: Value = serde_json::from_str(&std::fs::read_to_string(&cal).unwrap()).unwrap();
    doc["score"] = "class_log_likelihood_7".into();
    files.push(("cal-unknown-class.json", doc.to_string().into_bytes()));

    let mut map: HashMap<String, PathBuf> = files
        .into_iter()
        .map(|(name, data)| {
            let p = dir.join(name);
            std::fs::write(&p, data).unwrap();
            (name.to_string(), p)
        })
        .collect();
    map.insert("cal-valid.json".into(), cal);
    let fifo = dir.join("fifo.npy");
    let c = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
    // SAFETY: a plain libc call on a NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0, "mkfifo");
    map.insert("fifo.npy".into(), fifo);
    map
}

/// A hash of a regular file's bytes (None for anything else).
fn content(path: &Path) -> Option<Vec<u8>> {
    std::fs::metadata(path).ok().filter(|m| m.is_file())?;
    std::fs::read(path).ok()
}

#[test]
fn every_bad_input_fails_cleanly_and_every_unusual_one_loads() {
    let tmp = tempfile::tempdir().unwrap();
    let train = corpus().join("ok-train.npy");
    let model = tmp.path().join("model.safetensors");
    let fit = run(&[
        "fit".into(),
        train.display().to_string(),
        "--labels".into(),
        corpus().join("ok-labels.npy").display().to_string(),
        "-o".into(),
        model.display().to_string(),
        "--epochs".into(),
        "2".into(),
        "--layers".into(),
        "2".into(),
        "--hidden".into(),
        "8".into(),
        "-q".into(),
    ]);
    assert!(fit.status.success(), "fit: {}", String::from_utf8_lossy(&fit.stderr));
    let made = derived(tmp.path(), &model, &train);

    let table = std::fs::read_to_string(corpus().join("cases.txt")).unwrap();
    let mut failures = Vec::new();
    let mut count = 0;
    for (i, line) in table.lines().enumerate().filter(|(_, l)| !l.starts_with('#') && !l.trim().is_empty()) {
        let cols: Vec<&str> = line.split('\t').collect();
        let [file, code, command, expected] = cols[..] else { panic!("cases.txt line {}: four columns", i + 1) };
        let code: i32 = code.parse().unwrap();
        let file_path = match file.strip_prefix('@') {
            Some(name) => made[name].clone(),
            None if file.starts_with('/') => PathBuf::from(file),
            None => corpus().join(file),
        };
        let out_dir = tmp.path().join(format!("case-{i}"));
        std::fs::create_dir(&out_dir).unwrap();
        let resolve = |token: &str| -> String {
            match token {
                "FILE" => file_path.display().to_string(),
                "MODEL" => model.display().to_string(),
                "TRAIN" => train.display().to_string(),
                t if t.starts_with("OUT.") => out_dir.join(format!("out{}", &t[3..])).display().to_string(),
                t if corpus().join(t).is_file() => corpus().join(t).display().to_string(),
                t => t.to_string(),
            }
        };
        // NAME=FILE arguments resolve their file part.
        let args: Vec<String> = command
            .split(' ')
            .map(|t| match t.split_once('=') {
                Some((name, f)) => format!("{name}={}", resolve(f)),
                None => resolve(t),
            })
            .collect();
        let inputs: Vec<PathBuf> = args
            .iter()
            .map(|a| PathBuf::from(a.rsplit_once('=').map_or(a.as_str(), |(_, f)| f)))
            .filter(|p| p.is_absolute() && !p.starts_with(&out_dir))
            .collect();
        let before: Vec<Option<Vec<u8>>> = inputs.iter().map(|p| content(p)).collect();
        let out = run(&args);
        count += 1;
        let stderr = String::from_utf8_lossy(&out.stderr).to_string();
        let stdout = String::from_utf8_lossy(&out.stdout).to_string();
        let mut fail =
            |why: String| failures.push(format!("cases.txt line {} ({file}): {why}\n  stderr: {stderr}", i + 1));
        if out.status.code() != Some(code) {
            fail(format!("exit {:?}, expected {code}", out.status.code()));
        }
        if stderr.contains("panicked") || out.status.code() == Some(101) {
            fail("panicked".into());
        }
        let after: Vec<Option<Vec<u8>>> = inputs.iter().map(|p| content(p)).collect();
        if before != after {
            fail("an input file changed".into());
        }
        let left: Vec<String> = std::fs::read_dir(&out_dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
            .collect();
        if code != 0 {
            let name = file_path.file_name().unwrap().to_string_lossy();
            if stderr.trim_end().lines().count() != 1 {
                fail("not exactly one line on stderr".into());
            }
            if !stderr.contains(expected) || !stderr.contains(name.as_ref()) {
                fail(format!("stderr lacks '{expected}' or the file name"));
            }
            if !left.is_empty() {
                fail(format!("left files behind: {left:?}"));
            }
        } else if let Some(n) = expected.strip_prefix("rows=") {
            let csv = std::fs::read_to_string(out_dir.join("out.csv")).unwrap_or_default();
            if csv.lines().count() != n.parse::<usize>().unwrap() + 1 {
                fail(format!("expected {n} rows of scores, got {}", csv.lines().count().saturating_sub(1)));
            }
        } else if expected == "no-escapes" && stdout.chars().any(|c| c != '\n' && tidemark::data::drives_terminal(c)) {
            fail("stdout carries control codes".into());
        }
    }
    assert!(count >= 100, "only {count} cases");
    assert!(failures.is_empty(), "{} of {count} cases failed:\n{}", failures.len(), failures.join("\n"));
}
