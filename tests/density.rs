//! The fitted density against closed-form results.

mod common;

use common::mean;
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use tidemark::data::{Dataset, Matrix};
use tidemark::flow::Mixing;
use tidemark::model::Model;
use tidemark::train::{fit, FitOptions};

fn quiet() -> FitOptions {
    FitOptions { quiet: true, threads: Some(2), seed: Some(3), ..Default::default() }
}

/// Samples of N(0, A A^T) for a lower-triangular A (row-major, d x d).
fn correlated_gaussian(a: &[f64], d: usize, n: usize, seed: u64) -> Matrix {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut data = Vec::with_capacity(n * d);
    for _ in 0..n {
        let e: Vec<f64> = (0..d).map(|_| StandardNormal.sample(&mut rng)).collect();
        for i in 0..d {
            data.push((0..=i).map(|j| a[i * d + j] * e[j]).sum::<f64>() as f32);
        }
    }
    Matrix::new(n, d, data)
}

/// Differential entropy of a multivariate normal, 0.5 ln det(2 pi e S)
/// (Cover & Thomas, Elements of Information Theory, Thm 8.4.1). With
/// S = A A^T and A lower-triangular, ln det S = 2 sum ln a_ii.
#[test]
fn held_out_nll_of_a_correlated_gaussian_matches_its_entropy() {
    let d = 8;
    let mut a = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..i {
            a[i * d + j] = 0.4 * ((i + 2 * j) as f64).sin();
        }
        a[i * d + i] = 0.5 + 0.25 * i as f64;
    }
    let train = Dataset::in_memory(correlated_gaussian(&a, d, 20_000, 1));
    let test = Dataset::in_memory(correlated_gaussian(&a, d, 5_000, 2));
    let model = fit(&train, None, &quiet()).unwrap();
    let nll = -mean(&model.evaluate(&test, 2).log_likelihood);
    let ln_det: f64 = (0..d).map(|i| 2.0 * a[i * d + i].ln()).sum();
    let entropy = 0.5 * (d as f64 * (2.0 * std::f64::consts::PI * std::f64::consts::E).ln() + ln_det);
    let per_dim = (nll - entropy) / d as f64;
    assert!(per_dim.abs() < 0.03, "held-out NLL {nll:.4} vs entropy {entropy:.4} ({per_dim:.4} nats/dim)");
}

/// Change of variables: scaling every input by c shifts every
/// log-likelihood by exactly -D ln c. With c a power of two the fitted
/// whitening, and so the whole training run, is the same up to that factor.
#[test]
fn scaling_the_data_shifts_log_likelihood_by_d_ln_c() {
    let x = banana(3000, 5);
    let opts = FitOptions { epochs: Some(5), ..quiet() };
    let base = fit(&Dataset::in_memory(x.clone()), None, &opts).unwrap();
    let ll = base.evaluate(&Dataset::in_memory(x.clone()), 2).log_likelihood;
    for c in [4.0f32, 0.25] {
        let scaled = Dataset::in_memory(Matrix::new(x.rows, x.cols, x.data.iter().map(|v| v * c).collect()));
        let model = fit(&scaled, None, &opts).unwrap();
        let ll_c = model.evaluate(&scaled, 2).log_likelihood;
        let shift = -(x.cols as f64) * (c as f64).ln();
        for (a, b) in ll.iter().zip(&ll_c) {
            assert!((b - a - shift).abs() < 1e-3, "c={c}: {b} - {a} != {shift}");
        }
    }
}

/// A curved 2-D "banana": x1 ~ N(0, 1), x2 = x1^2 + 0.5 N(0, 1) (invented).
fn banana(n: usize, seed: u64) -> Matrix {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut data = Vec::with_capacity(2 * n);
    for _ in 0..n {
        let a: f64 = StandardNormal.sample(&mut rng);
        let b: f64 = StandardNormal.sample(&mut rng);
        data.extend([a as f32, (a * a + 0.5 * b) as f32]);
    }
    Matrix::new(n, 2, data)
}

/// Log-density of the full-covariance Gaussian fitted by maximum likelihood
/// (closed form: mean, covariance, 2x2 inverse and determinant).
fn gaussian_log_density(train: &Matrix, test: &Matrix) -> Vec<f64> {
    let n = train.rows as f64;
    let m: Vec<f64> = (0..2).map(|j| (0..train.rows).map(|r| train.row(r)[j] as f64).sum::<f64>() / n).collect();
    let c = |i: usize, j: usize| {
        (0..train.rows).map(|r| (train.row(r)[i] as f64 - m[i]) * (train.row(r)[j] as f64 - m[j])).sum::<f64>() / n
    };
    let (s00, s01, s11) = (c(0, 0), c(0, 1), c(1, 1));
    let det = s00 * s11 - s01 * s01;
    (0..test.rows)
        .map(|r| {
            let (a, b) = (test.row(r)[0] as f64 - m[0], test.row(r)[1] as f64 - m[1]);
            let q = (s11 * a * a - 2.0 * s01 * a * b + s00 * b * b) / det;
            -0.5 * q - 0.5 * (4.0 * std::f64::consts::PI * std::f64::consts::PI * det).ln()
        })
        .collect()
}

#[test]
fn flow_beats_a_full_covariance_gaussian_on_a_curved_density() {
    let train = banana(8000, 1);
    let test = banana(2000, 2);
    let model = fit(&Dataset::in_memory(train.clone()), None, &FitOptions { epochs: Some(40), ..quiet() }).unwrap();
    let flow_ll = mean(&model.evaluate(&Dataset::in_memory(test.clone()), 2).log_likelihood);
    let gauss_ll = mean(&gaussian_log_density(&train, &test));
    // The banana's true entropy is well below the Gaussian's: expect a clear gap.
    assert!(flow_ll > gauss_ll + 0.3, "flow {flow_ll:.4} vs Gaussian {gauss_ll:.4} nats/vector");
}

/// With LU mixing after each permutation (`--mixing lu`), the fitted model
/// is still a density: it integrates to 1 over a grid covering the banana
/// (midpoint rule); it beats the full-covariance Gaussian on held-out rows;
/// and its file (format version 2, holding the LU blocks) reloads to the
/// same log-likelihoods.
#[test]
fn lu_mixed_flow_is_a_density_and_its_file_reloads() {
    let train = banana(8000, 1);
    let test = Dataset::in_memory(banana(2000, 2));
    let opts = FitOptions { epochs: Some(40), mixing: Some(Mixing::Lu), ..quiet() };
    let model = fit(&Dataset::in_memory(train.clone()), None, &opts).unwrap();
    assert_eq!(model.meta.format_version, 2);
    let flow = model.flow().expect("a flow");
    let mix = flow.slots[0].mix.expect("an LU block");
    assert!(flow.params[mix..mix + 4].iter().any(|&v| v != 0.0), "the LU block was trained");

    let (lo, hi, steps) = ([-5.5f32, -3.0], [5.5f32, 32.0], 300);
    let h = [(hi[0] - lo[0]) / steps as f32, (hi[1] - lo[1]) / steps as f32];
    let mut grid = Vec::with_capacity(2 * steps * steps);
    for i in 0..steps {
        for j in 0..steps {
            grid.extend([lo[0] + (i as f32 + 0.5) * h[0], lo[1] + (j as f32 + 0.5) * h[1]]);
        }
    }
    let grid = Dataset::in_memory(Matrix::new(steps * steps, 2, grid));
    let mass: f64 =
        model.evaluate(&grid, 2).log_likelihood.iter().map(|ll| ll.exp()).sum::<f64>() * (h[0] * h[1]) as f64;
    assert!((mass - 1.0).abs() < 0.02, "integral of the density = {mass}");

    let ll = model.evaluate(&test, 2).log_likelihood;
    let gauss_ll = mean(&gaussian_log_density(&train, &banana(2000, 2)));
    assert!(mean(&ll) > gauss_ll + 0.3, "flow {:.4} vs Gaussian {gauss_ll:.4} nats/vector", mean(&ll));

    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("lu.safetensors");
    model.save(&path).unwrap();
    assert_eq!(Model::load(&path).unwrap().evaluate(&test, 2).log_likelihood, ll);
}
