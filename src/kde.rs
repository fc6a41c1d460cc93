//! Gaussian kernel density estimate with a full-covariance kernel and
//! Scott's bandwidth rule, the same estimator as scipy.stats.gaussian_kde:
//! kernel covariance = cov(points, ddof = 1) * n^(-2 / (d + 4)).

use nalgebra::{DMatrix, DVector};

pub struct Kde {
    dim: usize,
    points: Vec<f64>,
    /// Lower Cholesky factor of the kernel covariance.
    chol: DMatrix<f64>,
    /// log of the normalising constant: log n + 0.5 log det(2 pi H).
    log_norm: f64,
}

impl Kde {
    /// Fit on `n` points of `dim` statistics (row-major). `None` when the
    /// points do not span `dim` dimensions (fewer than two points, or a
    /// singular covariance).
    pub fn new(points: &[f64], dim: usize) -> Option<Kde> {
        let n = points.len() / dim;
        if n < 2 || dim == 0 {
            return None;
        }
        let mean: Vec<f64> = (0..dim).map(|j| (0..n).map(|i| points[i * dim + j]).sum::<f64>() / n as f64).collect();
        let mut cov = DMatrix::<f64>::zeros(dim, dim);
        for i in 0..n {
            let c = DVector::from_iterator(dim, (0..dim).map(|j| points[i * dim + j] - mean[j]));
            cov += &c * c.transpose();
        }
        let factor = (n as f64).powf(-1.0 / (dim as f64 + 4.0));
        let kernel = cov * (factor * factor / (n as f64 - 1.0));
        let chol = kernel.clone().cholesky()?.l();
        let log_det: f64 = 2.0 * chol.diagonal().iter().map(|v| v.ln()).sum::<f64>();
        let log_norm = (n as f64).ln() + 0.5 * (dim as f64 * (2.0 * std::f64::consts::PI).ln() + log_det);
        Some(Kde { dim, points: points.to_vec(), chol, log_norm })
    }

    /// log of the estimated density at `x`.
    pub fn log_density(&self, x: &[f64]) -> f64 {
        let terms: Vec<f64> = self
            .points
            .chunks(self.dim)
            .map(|p| {
                let diff = DVector::from_iterator(self.dim, x.iter().zip(p).map(|(a, b)| a - b));
                let y = self.chol.solve_lower_triangular(&diff).expect("Cholesky factor is invertible");
                -0.5 * y.norm_squared()
            })
            .collect();
        crate::model::log_sum_exp(&terms) - self.log_norm
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// scipy.stats.gaussian_kde on the committed fixture (values written by
    /// scripts/make_fixtures.py).
    #[test]
    fn matches_scipy_gaussian_kde() {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/expected.json");
        let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        let k = &v["kde"];
        let floats = |key: &str| -> Vec<f64> {
            k[key]
                .as_array()
                .unwrap()
                .iter()
                .flat_map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()))
                .collect()
        };
        let (points, queries) = (floats("points"), floats("queries"));
        let kde = Kde::new(&points, 2).unwrap();
        for (q, want) in queries.chunks(2).zip(k["logpdf"].as_array().unwrap()) {
            let want = want.as_f64().unwrap();
            let got = kde.log_density(q);
            assert!((got - want).abs() < 1e-5 * want.abs().max(1.0), "{got} vs scipy {want}");
        }
    }
}
