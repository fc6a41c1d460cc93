//! PCA whitening against numpy (scripts/make_fixtures.py: eigen-decomposition
//! of the covariance with numpy.linalg.eigh; committed in expected.json).

mod common;

use tidemark::data::{read_matrix, Dataset};
use tidemark::preprocess::{Method, Preprocessor, DEFAULT_DEAD_THRESHOLD};

#[test]
fn whitening_matches_numpy_and_handles_dead_columns() {
    let x = read_matrix(&common::fixture("whitening.npy"), None).unwrap();
    let text = std::fs::read_to_string(common::fixture("expected.json")).unwrap();
    let want: serde_json::Value = serde_json::from_str(&text).unwrap();
    let want = &want["whitening"];
    let all: Vec<usize> = (0..x.rows).collect();
    let pre = Preprocessor::fit(&Dataset::in_memory(x.clone()), &all, Method::Pca, DEFAULT_DEAD_THRESHOLD).unwrap();

    // Column 1 is constant and column 4 has std 1e-9: both dead, as documented.
    let live: Vec<usize> = want["live"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap() as usize).collect();
    assert_eq!(pre.live, live);
    assert_eq!(pre.dead, vec![1, 4]);
    assert_eq!(pre.dead_value.len(), 2);

    for (a, b) in pre.mean.iter().zip(common::floats(&want["mean"])) {
        assert!((a - b).abs() < 1e-9 * b.abs().max(1.0), "mean {a} vs {b}");
    }
    for (s, lambda) in pre.scale.iter().zip(common::floats(&want["eigenvalues"])) {
        assert!((s * s - lambda).abs() < 1e-9 * lambda, "eigenvalue {} vs {lambda}", s * s);
    }
    let comps = pre.components.as_ref().unwrap();
    for (a, b) in comps.iter().zip(common::floats(&want["components"])) {
        assert!((*a as f64 - b).abs() < 1e-6, "component {a} vs {b}");
    }
    let log_det = want["log_det"].as_f64().unwrap();
    assert!((pre.log_det() - log_det).abs() < 1e-9 * log_det.abs());

    let mut u = vec![0.0f32; 5 * pre.dim()];
    pre.transform(&x.data, 5, &mut u, None);
    for (a, b) in u.iter().zip(common::floats(&want["whitened_first_rows"])) {
        assert!((*a as f64 - b).abs() < 1e-4, "whitened {a} vs {b}");
    }
}

/// With the flow at identity, the model is the maximum-likelihood Gaussian of
/// the live columns, so its log-likelihood in input space (whitening log-det
/// included) must equal scipy.stats.multivariate_normal.logpdf — full
/// covariance after PCA whitening, diagonal after standardization.
#[test]
fn identity_flow_log_likelihood_equals_scipy_gaussian_logpdf() {
    let x = Dataset::open(&common::fixture("whitening.npy"), None).unwrap();
    let text = std::fs::read_to_string(common::fixture("expected.json")).unwrap();
    let want: serde_json::Value = serde_json::from_str(&text).unwrap();
    for (method, key) in
        [(Method::Pca, "gaussian_logpdf_first_rows"), (Method::Standardize, "diagonal_gaussian_logpdf_first_rows")]
    {
        let opts = tidemark::train::FitOptions {
            method: Some(method),
            val_fraction: Some(0.0),
            epochs: Some(1),
            flow_dims: Some(4),
            quiet: true,
            threads: Some(1),
            ..Default::default()
        };
        let mut model = tidemark::train::fit(&x, None, &opts).unwrap();
        model.density.flow_mut().expect("a flow").make_identity();
        let got = model.evaluate_rows(&x, &[0, 1, 2, 3, 4], 1).log_likelihood;
        for (a, b) in got.iter().zip(common::floats(&want["whitening"][key])) {
            assert!((a - b).abs() < 1e-4 * b.abs().max(1.0), "{method:?}: {a} vs scipy {b}");
        }
    }
}

/// Rows that span only a 5-d subspace of 12 features (invented): the 7 null
/// principal directions are left out of the density instead of being
/// whitened into huge log-determinants, and a vector's distance from the
/// subspace is reported: for x = m + A w + n with n orthogonal to the span
/// of A, `subspace_residual` is ||n|| (Pythagoras).
#[test]
fn null_directions_are_left_out_and_the_residual_is_the_distance_to_the_subspace() {
    let (d, r, n) = (12, 5, 40);
    // Orthonormal columns: unit vectors on features 0..5, rotated in pairs.
    let basis = |j: usize, f: usize| -> f64 {
        let (c, s) = (0.6, 0.8);
        match (f, j) {
            (f, j) if f == 2 * j && j < r => c,
            (f, j) if f == 2 * j + 1 && j < r => s,
            _ => 0.0,
        }
    };
    let mean: Vec<f64> = (0..d).map(|f| 3.0 + f as f64).collect();
    let point = |w: &[f64], off: &[f64]| -> Vec<f32> {
        (0..d).map(|f| (mean[f] + (0..r).map(|j| basis(j, f) * w[j]).sum::<f64>() + off[f]) as f32).collect()
    };
    let zero = vec![0.0; d];
    let mut data = Vec::new();
    for i in 0..n {
        let w: Vec<f64> =
            (0..r).map(|j| (i as f64 * (0.37 + 0.29 * j as f64) + j as f64).sin() * (1.0 + j as f64)).collect();
        data.extend(point(&w, &zero));
    }
    let x = Dataset::in_memory(tidemark::data::Matrix::new(n, d, data));
    let all: Vec<usize> = (0..n).collect();
    let pre = Preprocessor::fit(&x, &all, Method::Pca, DEFAULT_DEAD_THRESHOLD).unwrap();
    // Features 10 and 11 never vary: dead. Of the 10 live ones, 5 are null directions.
    assert_eq!((pre.dead.clone(), pre.dim(), pre.floored), (vec![10, 11], r, 10 - r));
    assert!(pre.log_det().abs() < 50.0, "log-det {}", pre.log_det());
    // Off the subspace: along (-0.8, 0.6) on features 0, 1 (length 2) and on
    // features 8, 9 (length 1.5); and 0.7 on the dead feature 11, which the
    // residual leaves to dead_feature_deviation.
    let mut off = vec![0.0; d];
    off[0] = -0.8 * 2.0;
    off[1] = 0.6 * 2.0;
    off[8] = -0.8 * 1.5;
    off[9] = 0.6 * 1.5;
    off[11] = 0.7;
    let v = point(&[0.3, -0.2, 0.1, 0.5, -0.4], &off);
    let (mut u, mut res) = (vec![0.0f32; r], vec![0.0f64; 1]);
    pre.transform(&v, 1, &mut u, Some(&mut res));
    let want = (2.0f64 * 2.0 + 1.5 * 1.5).sqrt();
    assert!((res[0] - want).abs() < 1e-3, "residual {} vs {want}", res[0]);
    assert!((pre.dead_deviation(&v) - 0.7).abs() < 1e-5);
}
