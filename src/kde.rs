//! Gaussian kernel density estimate with a full-covariance kernel and
//! Scott's bandwidth rule, the same estimator as scipy.stats.gaussian_kde:
//! kernel covariance = cov(points, ddof = 1) * n^(-2 / (d + 4)).
//!
//! The points are stored mapped through the inverse Cholesky factor of the
//! kernel covariance, so each kernel term of a query is a plain squared
//! distance; `score` evaluates it for every scored vector against every
//! stored point, so it is a flat loop with no allocation per term.

use nalgebra::{DMatrix, DVector};

/// Points per block of the kernel sum: sized for the stack, long enough
/// for the loops over it to vectorise.
const BLOCK: usize = 64;

pub struct Kde {
    points: usize,
    /// Whitened points, coordinate-major: coordinate j of point i at
    /// `j * points + i`.
    whitened: Vec<f64>,
    /// Inverse of the lower Cholesky factor of the kernel covariance.
    inv_chol: DMatrix<f64>,
    /// log of the normalising constant: log n + 0.5 log det(2 pi H).
    log_norm: f64,
}

impl Kde {
    /// Fit on `n` points of `dim` statistics (row-major). `None` when the
    /// points do not span `dim` dimensions (fewer than two points, or a
    /// singular covariance).
    pub fn new(points: &[f64], dim: usize) -> Option<Kde> {
        let n = points.len() / dim.max(1);
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
        let chol = kernel.cholesky()?.l();
        let log_det: f64 = 2.0 * chol.diagonal().iter().map(|v| v.ln()).sum::<f64>();
        let log_norm = (n as f64).ln() + 0.5 * (dim as f64 * (2.0 * std::f64::consts::PI).ln() + log_det);
        let inv_chol = chol.solve_lower_triangular(&DMatrix::identity(dim, dim))?;
        let mut whitened = vec![0.0; dim * n];
        for (i, p) in points.chunks_exact(dim).enumerate() {
            for (j, w) in whiten(&inv_chol, p).into_iter().enumerate() {
                whitened[j * n + i] = w;
            }
        }
        Some(Kde { points: n, whitened, inv_chol, log_norm })
    }

    /// log of the estimated density at `x`: the log-sum-exp of -d_i / 2
    /// over the whitened squared distances d_i, kept relative to the
    /// nearest point seen so far so that no term overflows or underflows
    /// to a zero sum, however far `x` lies from the points.
    pub fn log_density(&self, x: &[f64]) -> f64 {
        let y = whiten(&self.inv_chol, x);
        let (mut nearest, mut sum) = (f64::INFINITY, 0.0f64);
        let mut d = [0.0f64; BLOCK];
        for start in (0..self.points).step_by(BLOCK) {
            let len = BLOCK.min(self.points - start);
            let d = &mut d[..len];
            d.fill(0.0);
            for (j, &yj) in y.iter().enumerate() {
                add_squared_differences(d, &self.whitened[j * self.points + start..][..len], yj);
            }
            let block_nearest = d.iter().copied().fold(f64::INFINITY, f64::min);
            if block_nearest < nearest {
                sum *= exp_f64(-0.5 * (nearest - block_nearest));
                nearest = block_nearest;
            }
            sum += kernel_sum(d, nearest);
        }
        -0.5 * nearest + sum.ln() - self.log_norm
    }
}

/// `inv_chol * x` for a lower-triangular `inv_chol`.
fn whiten(inv_chol: &DMatrix<f64>, x: &[f64]) -> Vec<f64> {
    (0..x.len()).map(|j| (0..=j).map(|l| inv_chol[(j, l)] * x[l]).sum()).collect()
}

crate::simd::elementwise! {
    /// `d += (col - y)^2`, element-wise.
    fn add_squared_differences(d: &mut [f64], col: &[f64], y: f64) {
        for (dv, &c) in d.iter_mut().zip(col) {
            *dv += (c - y) * (c - y);
        }
    }
}

crate::simd::elementwise! {
    /// Sum of exp(-(d - nearest) / 2) over a block of squared distances.
    fn kernel_sum(d: &[f64], nearest: f64) -> f64 {
        // Four partial sums, so the additions need not follow the order of
        // the terms and the loop runs on wide registers.
        let mut acc = [0.0f64; 4];
        let mut quads = d.chunks_exact(4);
        for quad in &mut quads {
            for (a, &v) in acc.iter_mut().zip(quad) {
                *a += exp_f64(-0.5 * (v - nearest));
            }
        }
        let tail: f64 = quads.remainder().iter().map(|&v| exp_f64(-0.5 * (v - nearest))).sum();
        acc.iter().sum::<f64>() + tail
    }
}

/// e^x in f64 for x <= 0, to within a few ulp: x = k ln 2 + f with
/// |f| <= ln 2 / 2, e^f by its degree-13 Taylor polynomial (truncation
/// below 1e-17), 2^k from the exponent bits. Branch-free, so the kernel
/// sum vectorises; below -708 it returns about e^-708 rather than a
/// subnormal, which is no change to a sum that holds a term of 1.
#[inline(always)]
fn exp_f64(x: f64) -> f64 {
    // 1.5 * 2^52: adding and subtracting it rounds to the nearest integer.
    const ROUND: f64 = 6_755_399_441_055_744.0;
    // ln 2 split so that k * LN2_HI is exact for |k| < 2^11 (fdlibm's split).
    const LN2_HI: f64 = 0.693_147_180_369_123_8;
    const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;
    let x = x.max(-708.0).min(0.0);
    let rounded = x * std::f64::consts::LOG2_E + ROUND;
    let k = rounded - ROUND;
    let k_bits = (rounded.to_bits() as i64).wrapping_sub(ROUND.to_bits() as i64);
    let f = (x - k * LN2_HI) - k * LN2_LO;
    let mut p = 1.0 / 6_227_020_800.0; // 1/13!
    for inv_factorial in [
        1.0 / 479_001_600.0,
        1.0 / 39_916_800.0,
        1.0 / 3_628_800.0,
        1.0 / 362_880.0,
        1.0 / 40_320.0,
        1.0 / 5_040.0,
        1.0 / 720.0,
        1.0 / 120.0,
        1.0 / 24.0,
        1.0 / 6.0,
        0.5,
        1.0,
        1.0,
    ] {
        p = p * f + inv_factorial;
    }
    p * f64::from_bits(((k_bits + 1023) << 52) as u64)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The kernel's exponential against the standard library's `exp`
    /// (correctly rounded to within an ulp) over the range the kernel sum
    /// uses.
    #[test]
    fn exp_matches_std_on_non_positive_arguments() {
        for i in 0..=200_000 {
            let x = -700.0 * i as f64 / 200_000.0;
            let (got, want) = (exp_f64(x), x.exp());
            assert!((got - want).abs() <= 4e-16 * want, "exp({x}) = {got}, std {want}");
        }
    }

    fn fixture() -> serde_json::Value {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/expected.json");
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
    }

    fn rows(v: &serde_json::Value) -> Vec<f64> {
        v.as_array().unwrap().iter().flat_map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap())).collect()
    }

    /// scipy.stats.gaussian_kde on the committed fixture (values written by
    /// scripts/make_fixtures.py), near the points and far from them, where
    /// every kernel term underflows in a direct sum (scipy's `logpdf` works
    /// in log space there).
    #[test]
    fn matches_scipy_gaussian_kde() {
        let v = fixture();
        let k = &v["kde"];
        let kde = Kde::new(&rows(&k["points"]), 2).unwrap();
        for (queries, expected) in [("queries", "logpdf"), ("far_queries", "far_logpdf")] {
            let want = k[expected].as_array().unwrap();
            for (q, want) in rows(&k[queries]).chunks(2).zip(want) {
                let want = want.as_f64().unwrap();
                let got = kde.log_density(q);
                assert!((got - want).abs() < 1e-9 * want.abs().max(1.0), "{queries} {q:?}: {got} vs scipy {want}");
            }
        }
    }
}
