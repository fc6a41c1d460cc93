//! Helpers shared by the integration tests.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};
use tidemark::data::{write_npy, Matrix};

/// A committed fixture (written by scripts/make_fixtures.py).
pub fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures").join(name)
}

/// The reference values in tests/fixtures/expected.json.
pub fn expected() -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(fixture("expected.json")).unwrap()).unwrap()
}

/// All numbers in a (nested) JSON array, flattened row by row.
pub fn floats(v: &serde_json::Value) -> Vec<f64> {
    match v.as_array() {
        Some(items) => items.iter().flat_map(floats).collect(),
        None => vec![v.as_f64().unwrap()],
    }
}

/// Write a matrix as a float32 .npy file.
pub fn save(path: &Path, m: &Matrix) {
    let mut f = std::fs::File::create(path).unwrap();
    write_npy(&mut f, m).unwrap();
}

/// The `tidemark` binary built for these tests.
pub fn bin() -> PathBuf {
    assert_cmd::cargo::cargo_bin("tidemark")
}

/// The values of column `name` of a CSV text with a header row.
pub fn column(csv: &str, name: &str) -> Vec<f64> {
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let at = header.iter().position(|h| *h == name).unwrap();
    lines.map(|l| l.split(',').nth(at).unwrap().parse().unwrap()).collect()
}

pub fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// Send a signal ("-TERM", "-INT", else SIGKILL) to a child process.
pub fn send(pid: u32, signal: &str) {
    let sig = match signal {
        "-TERM" => libc::SIGTERM,
        "-INT" => libc::SIGINT,
        _ => libc::SIGKILL,
    };
    // SAFETY: kill(2) on a child process this test spawned and has not reaped.
    let rc = unsafe { libc::kill(pid as libc::pid_t, sig) };
    assert_eq!(rc, 0, "kill {signal} {pid}");
}

/// Wait until `path` exists.
pub fn wait_for(path: &Path, limit: Duration) {
    let t = Instant::now();
    while !path.exists() {
        assert!(t.elapsed() < limit, "{} never appeared", path.display());
        std::thread::sleep(Duration::from_millis(5));
    }
}

/// Deterministic correlated 4-d data, optionally shifted (invented).
pub fn wavy(n: usize, shift: f32) -> Matrix {
    let mut v = Vec::with_capacity(n * 4);
    for i in 0..n {
        let (a, b, c) = ((i as f32 * 0.61).sin(), (i as f32 * 1.37).cos(), (i as f32 * 0.23).sin());
        v.extend([a + shift, 0.5 * a + b + shift, a * b + 0.3 * c, c - 0.2 * b]);
    }
    Matrix::new(n, 4, v)
}
