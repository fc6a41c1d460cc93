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
    pre.transform(&x.data, 5, &mut u);
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
        model.flow.make_identity();
        let got = model.evaluate_rows(&x, &[0, 1, 2, 3, 4], 1).log_likelihood;
        for (a, b) in got.iter().zip(common::floats(&want["whitening"][key])) {
            assert!((a - b).abs() < 1e-4 * b.abs().max(1.0), "{method:?}: {a} vs scipy {b}");
        }
    }
}
