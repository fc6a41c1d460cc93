//! The typicality score and the batch typicality test centre on held-out
//! in-distribution rows: checked on a deliberately overfitted flow (200
//! training rows in 16 dimensions, 6 wide coupling layers, no dropout,
//! noise or weight decay), which fits its training rows much better than
//! new ones.

mod common;

use assert_cmd::Command;
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::path::Path;
use tidemark::data::Matrix;

const DIM: usize = 16;

/// Curved, correlated, mean-zero data: x_i = z_i + 0.4 (z_{i+1}^2 - 1).
fn draw(rows: usize, seed: u64) -> Matrix {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut data = Vec::with_capacity(rows * DIM);
    for _ in 0..rows {
        let z: Vec<f64> = (0..DIM).map(|_| StandardNormal.sample(&mut rng)).collect();
        data.extend((0..DIM).map(|i| (z[i] + 0.4 * (z[(i + 1) % DIM].powi(2) - 1.0)) as f32));
    }
    Matrix { rows, cols: DIM, data }
}

fn scaled(m: &Matrix, c: f32) -> Matrix {
    Matrix { rows: m.rows, cols: m.cols, data: m.data.iter().map(|v| v * c).collect() }
}

fn run(args: &[&str]) -> String {
    let out = Command::new(common::bin()).args(args).env("CANDLE_NUM_THREADS", "1").assert().success();
    String::from_utf8_lossy(&out.get_output().stdout).to_string()
}

/// Batches flagged in a batch-test CSV.
fn flagged(path: &Path) -> (usize, usize) {
    let text = std::fs::read_to_string(path).unwrap();
    let verdicts: Vec<bool> = text.lines().skip(1).map(|l| l.ends_with("true")).collect();
    (verdicts.iter().filter(|&&v| v).count(), verdicts.len())
}

/// Two-sided acceptance region of an exact binomial test at level `level`:
/// the counts k whose tail probabilities P(X <= k) and P(X >= k) under
/// Binomial(n, p) both exceed level / 2.
fn binomial_region(n: usize, p: f64, level: f64) -> (usize, usize) {
    let mut pmf = vec![(1.0 - p).powi(n as i32)];
    for k in 0..n {
        let next = pmf[k] * (n - k) as f64 / (k + 1) as f64 * p / (1.0 - p);
        pmf.push(next);
    }
    let cdf_low = |k: usize| pmf[..=k].iter().sum::<f64>();
    let cdf_high = |k: usize| pmf[k..].iter().sum::<f64>();
    let lo = (0..=n).find(|&k| cdf_low(k) > level / 2.0).unwrap();
    let hi = (0..=n).rev().find(|&k| cdf_high(k) > level / 2.0).unwrap();
    (lo, hi)
}

#[test]
fn typicality_centres_on_held_out_rows_of_an_overfitted_model() {
    let dir = tempfile::tempdir().unwrap();
    let p = |n: &str| dir.path().join(n).to_str().unwrap().to_string();
    common::save(Path::new(&p("train.npy")), &draw(200, 1));
    common::save(Path::new(&p("val.npy")), &draw(3000, 2));
    let held_out = draw(4000, 3);
    common::save(Path::new(&p("held_out.npy")), &held_out);
    // 0.85x the deviation from the (zero) mean: a batch with too little spread.
    common::save(Path::new(&p("narrow.npy")), &scaled(&held_out, 0.85));
    run(&[
        "fit",
        &p("train.npy"),
        "-o",
        &p("m.safetensors"),
        "--val",
        &p("val.npy"),
        "--flow-dims",
        "16",
        "--hidden",
        "256",
        "--layers",
        "6",
        "--dropout",
        "0",
        "--noise",
        "0",
        "--weight-decay",
        "0",
        "--epochs",
        "60",
        "--patience",
        "60",
        "--seed",
        "0",
        "--threads",
        "1",
        "--quiet",
    ]);
    let meta = run(&["inspect", &p("m.safetensors"), "--json"]);
    let meta: serde_json::Value = serde_json::from_str(&meta).unwrap();
    let (train_nll, val_nll) = (
        meta["training"]["best_train_nll"].as_f64().unwrap(),
        meta["training"]["best_validation_nll"].as_f64().unwrap(),
    );
    eprintln!("overfitted model: train NLL {train_nll:.3}, validation NLL {val_nll:.3} nats per vector");
    assert!(val_nll - train_nll > 1.0, "the model should fit its training rows better: {train_nll} vs {val_nll}");

    // Per vector: with the held-out mean and standard deviation as centre and
    // scale, E[typicality^2] = 1 on new in-distribution rows (definition of
    // the variance). The standard error of the mean of 4,000 values is ~0.03
    // here, the centre and scale from 3,000 validation rows add ~0.03.
    let (batch, alpha) = (25, 0.1);
    let (size, level) = (batch.to_string(), alpha.to_string());
    let score = |name: &str| {
        let (input, output) = (p(&format!("{name}.npy")), p(&format!("{name}.csv")));
        let args = ["score", &p("m.safetensors"), &input, "-o", &output, "--columns", "typicality"];
        run(&[&args[..], &["--batch", &size, "--batch-alpha", &level, "--threads", "1"]].concat());
        std::fs::read_to_string(output).unwrap()
    };
    let t = common::column(&score("held_out"), "typicality");
    let mean_sq = common::mean(&t.iter().map(|v| v * v).collect::<Vec<_>>());
    eprintln!("held-out rows: mean typicality^2 {mean_sq:.3}");
    assert!((mean_sq - 1.0).abs() < 0.15, "mean typicality^2 on held-out rows {mean_sq}");

    // Batches: in-distribution batches flagged at alpha, within an exact
    // two-sided binomial test at the 0.1% level.
    let (hits, batches) = flagged(Path::new(&p("held_out.batches.csv")));
    let (lo, hi) = binomial_region(batches, alpha, 0.001);
    eprintln!("held-out batches flagged: {hits}/{batches} at alpha {alpha} (binomial 99.9% region {lo}..={hi})");
    assert!((lo..=hi).contains(&hits), "{hits} of {batches} in-distribution batches flagged at alpha {alpha}");

    // Narrow batches: the mean NLL drops by about (1 - 0.85^2) D / 2 = 2.2
    // nats, ~4 batch standard deviations; at least 85% must be caught (150 of 160 in one run).
    score("narrow");
    let (caught, narrow) = flagged(Path::new(&p("narrow.batches.csv")));
    eprintln!("narrow batches flagged: {caught}/{narrow}");
    assert!(caught as f64 >= 0.85 * narrow as f64, "only {caught} of {narrow} narrow batches flagged");
}
