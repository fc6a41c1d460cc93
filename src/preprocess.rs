//! Preprocessing fitted on the training rows: dead-feature removal, then
//! per-feature standardization or full PCA whitening. The map is affine and
//! invertible on the live features, and its exact log-determinant is added
//! to every log-likelihood so that they stay in the original input space.

use crate::data::Dataset;
use crate::linalg::{log_sum_exp, matmul, View};

/// How live features are mapped to the flow's unit-scale inputs.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// Rotate onto principal components (by decreasing variance), then
    /// scale each to unit variance.
    Pca,
    /// Subtract each feature's mean and divide by its standard deviation.
    Standardize,
}

/// A feature is dead when its training standard deviation is at most this
/// fraction of the largest feature standard deviation.
pub const DEFAULT_DEAD_THRESHOLD: f64 = 1e-6;

/// Principal components whose variance is at most this fraction of the
/// largest (the square of the dead-feature threshold) carry no variance of
/// the training rows: the null space of rank-deficient data, for example
/// fewer rows than features. They are kept out of the density, and a
/// vector's distance from the remaining subspace is reported instead.
pub const NULL_VARIANCE: f64 = 1e-12;

/// Rows per block when streaming over the data.
const BLOCK: usize = 2048;

/// Per-column mean and sum of squared deviations, in one streaming pass:
/// each block's statistics are computed about the block mean in f64 and
/// merged with the pairwise update of Chan, Golub & LeVeque (1979), which
/// stays accurate when values sit far from zero (unlike sum / sum-of-squares).
pub struct ColumnStats {
    pub n: f64,
    pub mean: Vec<f64>,
    pub m2: Vec<f64>,
}

impl ColumnStats {
    pub fn of(x: &Dataset, idx: &[usize]) -> ColumnStats {
        let cols = x.cols;
        let mut total = ColumnStats { n: 0.0, mean: vec![0.0; cols], m2: vec![0.0; cols] };
        let mut rows = Vec::new();
        for chunk in idx.chunks(BLOCK) {
            x.gather(chunk, &mut rows);
            let nb = chunk.len() as f64;
            let mut mean = vec![0.0f64; cols];
            for row in rows.chunks(cols) {
                for (m, &v) in mean.iter_mut().zip(row) {
                    *m += v as f64;
                }
            }
            mean.iter_mut().for_each(|m| *m /= nb);
            let mut m2 = vec![0.0f64; cols];
            for row in rows.chunks(cols) {
                for ((s, &v), m) in m2.iter_mut().zip(row).zip(&mean) {
                    *s += (v as f64 - m).powi(2);
                }
            }
            total.merge(nb, &mean, &m2);
        }
        total
    }

    fn merge(&mut self, nb: f64, mean_b: &[f64], m2_b: &[f64]) {
        let n = self.n + nb;
        for j in 0..self.mean.len() {
            let delta = mean_b[j] - self.mean[j];
            self.mean[j] += delta * nb / n;
            self.m2[j] += m2_b[j] + delta * delta * self.n * nb / n;
        }
        self.n = n;
    }
}

/// A fitted preprocessing map from input vectors to whitened vectors.
#[derive(Clone, Debug)]
pub struct Preprocessor {
    pub method: Method,
    pub input_dim: usize,
    /// Input columns that vary (enter the model), in order.
    pub live: Vec<usize>,
    /// Input columns that do not vary (kept out of the model).
    pub dead: Vec<usize>,
    /// Training mean of each dead column.
    pub dead_value: Vec<f64>,
    /// Training mean of each live column.
    pub mean: Vec<f64>,
    /// PCA only: `k x live`, row i is the i-th principal direction (null
    /// directions left out, so k <= live).
    pub components: Option<Vec<f32>>,
    /// Per output dimension: the standard deviation it is divided by.
    pub scale: Vec<f64>,
    /// Principal directions left out because the training rows have no
    /// variance along them.
    pub floored: usize,
    /// Shrinkage intensity applied to the covariance (0: none).
    pub shrinkage: f64,
}

/// Buffers that [`Preprocessor::transform_with`] reuses between calls.
#[derive(Default)]
pub struct TransformScratch {
    centered: Vec<f32>,
    inv: Vec<f32>,
}

/// Which covariance PCA whitening decomposes.
#[derive(Default)]
pub struct Covariance<'a> {
    /// Pool within classes: each row is centred on its class mean.
    /// `class_of[row]` indexes `means` (full input width).
    pub classes: Option<(&'a [u32], &'a [Vec<f64>])>,
    /// How much to shrink the correlation matrix (the covariance of the
    /// standardized features) towards a scaled identity before scaling
    /// back: unlike shrinking the raw covariance, the result does not
    /// depend on the features' units.
    pub shrinkage: Shrinkage<'a>,
}

/// The shrinkage intensity alpha of `(1 - alpha) R + alpha mu I`, where `R`
/// is the correlation matrix and `mu` its mean eigenvalue.
#[derive(Clone, Copy, Default)]
pub enum Shrinkage<'a> {
    /// The maximum-likelihood covariance.
    #[default]
    None,
    /// The Ledoit-Wolf intensity (Ledoit & Wolf 2004, as scikit-learn's
    /// LedoitWolf computes it).
    LedoitWolf,
    /// A given intensity in [0, 1).
    Fixed(f64),
    /// The intensity on [`SHRINKAGE_GRID`] (plus the Ledoit-Wolf estimate)
    /// with the best log-likelihood of these held-out rows.
    Validated(&'a Dataset, &'a [usize]),
}

/// Intensities tried when the shrinkage is chosen on validation rows
/// (0 only when the training covariance has full rank).
pub const SHRINKAGE_GRID: [f64; 12] = [0.0, 1e-6, 1e-5, 1e-4, 3e-4, 1e-3, 3e-3, 1e-2, 3e-2, 0.1, 0.3, 0.6];

impl Preprocessor {
    /// Fit on the rows `idx` of `x`, streaming over them in blocks. Fails
    /// when no feature varies.
    pub fn fit(x: &Dataset, idx: &[usize], method: Method, dead_threshold: f64) -> Result<Preprocessor, String> {
        Preprocessor::fit_with(x, idx, method, dead_threshold, &Covariance::default())
    }

    /// [`Preprocessor::fit`] with a choice of covariance for PCA whitening.
    pub fn fit_with(
        x: &Dataset,
        idx: &[usize],
        method: Method,
        dead_threshold: f64,
        how: &Covariance,
    ) -> Result<Preprocessor, String> {
        let stats = ColumnStats::of(x, idx);
        let std: Vec<f64> = stats.m2.iter().map(|s| (s / stats.n).sqrt()).collect();
        let top = std.iter().cloned().fold(0.0, f64::max);
        let (live, dead): (Vec<usize>, Vec<usize>) = (0..x.cols).partition(|&j| std[j] > dead_threshold * top);
        if live.is_empty() {
            return Err("no feature varies across the training rows".into());
        }
        let mut pre = Preprocessor {
            method,
            input_dim: x.cols,
            dead_value: dead.iter().map(|&j| stats.mean[j]).collect(),
            mean: live.iter().map(|&j| stats.mean[j]).collect(),
            live,
            dead,
            components: None,
            scale: vec![],
            floored: 0,
            shrinkage: 0.0,
        };
        match method {
            Method::Standardize => pre.scale = pre.live.iter().map(|&j| std[j]).collect(),
            Method::Pca => {
                let live_std: Vec<f64> = pre.live.iter().map(|&j| std[j]).collect();
                pre.fit_pca(x, idx, how, &live_std)
            }
        }
        Ok(pre)
    }

    /// Number of whitened dimensions (the density's dimension).
    pub fn dim(&self) -> usize {
        self.scale.len()
    }

    /// Covariance (maximum-likelihood, divided by n) of the live features
    /// about the already exact mean (or each row's class mean), accumulated
    /// in f64 over row blocks; also the sum of squared squared row norms
    /// that the Ledoit-Wolf intensity needs, for rows scaled by `std`.
    fn covariance(&self, x: &Dataset, idx: &[usize], how: &Covariance, std: &[f64]) -> (Vec<f64>, f64) {
        let d = self.live.len();
        let mut cov = vec![0.0f64; d * d];
        let mut sum_norm4 = 0.0;
        let mut rows = Vec::new();
        let mut centered = vec![0.0f64; BLOCK * d];
        for chunk in idx.chunks(BLOCK) {
            let n = chunk.len();
            x.gather(chunk, &mut rows);
            for (r, row) in rows.chunks(x.cols).enumerate() {
                let c = &mut centered[r * d..(r + 1) * d];
                match how.classes {
                    Some((class_of, means)) => {
                        let m = &means[class_of[chunk[r]] as usize];
                        for (i, &j) in self.live.iter().enumerate() {
                            c[i] = row[j] as f64 - m[j];
                        }
                    }
                    None => {
                        for (i, &j) in self.live.iter().enumerate() {
                            c[i] = row[j] as f64 - self.mean[i];
                        }
                    }
                }
                sum_norm4 += c.iter().zip(std).map(|(v, s)| (v / s).powi(2)).sum::<f64>().powi(2);
            }
            let c = &centered[..n * d];
            matmul(&mut cov, d, true, View::transposed(c, n, d), View::rows(c, n, d, d));
        }
        cov.iter_mut().for_each(|v| *v /= idx.len() as f64);
        (cov, sum_norm4)
    }

    fn fit_pca(&mut self, x: &Dataset, idx: &[usize], how: &Covariance, std: &[f64]) {
        let d = self.live.len();
        let (mut cov, sum_norm4) = self.covariance(x, idx, how, std);
        if !matches!(how.shrinkage, Shrinkage::None) {
            // Shrink the correlation matrix, so that the result does not
            // depend on the features' units, then scale back.
            for i in 0..d {
                for j in 0..d {
                    cov[i * d + j] /= std[i] * std[j];
                }
            }
            let lw = ledoit_wolf_intensity(&cov, d, idx.len(), sum_norm4);
            self.shrinkage = match how.shrinkage {
                Shrinkage::None => 0.0,
                Shrinkage::LedoitWolf => lw,
                Shrinkage::Fixed(alpha) => alpha,
                Shrinkage::Validated(val, rows) => {
                    let centres = self.centres(how, idx);
                    validated_intensity(
                        &cov,
                        d,
                        lw,
                        &ValidationRows { data: val, rows, live: &self.live, std },
                        &centres,
                    )
                }
            };
            shrink(&mut cov, d, self.shrinkage);
            for i in 0..d {
                for j in 0..d {
                    cov[i * d + j] *= std[i] * std[j];
                }
            }
        }
        let cov = nalgebra::DMatrix::from_row_slice(d, d, &cov);
        let eig = nalgebra::SymmetricEigen::new(cov);
        let mut order: Vec<usize> = (0..d).collect();
        order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
        let top = eig.eigenvalues[order[0]].max(f64::MIN_POSITIVE);
        let kept: Vec<usize> = order.iter().copied().filter(|&k| eig.eigenvalues[k] > NULL_VARIANCE * top).collect();
        self.floored = d - kept.len();
        let mut components = vec![0.0f32; kept.len() * d];
        let mut scale = Vec::with_capacity(kept.len());
        for (i, &k) in kept.iter().enumerate() {
            let v = eig.eigenvectors.column(k);
            // Sign convention: the entry of largest magnitude is positive.
            let lead = v.iter().cloned().fold(0.0f64, |m, e| if e.abs() > m.abs() { e } else { m });
            let sign = if lead < 0.0 { -1.0 } else { 1.0 };
            for j in 0..d {
                components[i * d + j] = (sign * v[j]) as f32;
            }
            scale.push(eig.eigenvalues[k].sqrt());
        }
        self.components = Some(components);
        self.scale = scale;
    }

    /// Where the Gaussian (or each class's Gaussian) sits: its log prior and
    /// its mean over the live features.
    fn centres(&self, how: &Covariance, idx: &[usize]) -> Vec<(f64, Vec<f64>)> {
        let Some((class_of, means)) = how.classes else {
            return vec![(0.0, self.mean.clone())];
        };
        let mut counts = vec![0usize; means.len()];
        for &r in idx {
            counts[class_of[r] as usize] += 1;
        }
        let live = |m: &Vec<f64>| self.live.iter().map(|&j| m[j]).collect();
        let n = idx.len() as f64;
        means.iter().zip(&counts).filter(|(_, &c)| c > 0).map(|(m, &c)| ((c as f64 / n).ln(), live(m))).collect()
    }

    /// `ln |det|` of the map from live input features to whitened vectors.
    pub fn log_det(&self) -> f64 {
        -self.scale.iter().map(|s| s.ln()).sum::<f64>()
    }

    /// Whiten `rows` input rows (`rows x input_dim`) into `out` (`rows x
    /// dim`); when `residual` is given, also each row's distance from the
    /// span of the kept principal directions (input units; 0 without PCA).
    pub fn transform(&self, x: &[f32], rows: usize, out: &mut [f32], residual: Option<&mut [f64]>) {
        self.transform_with(x, rows, out, residual, &mut TransformScratch::default());
    }

    /// [`Preprocessor::transform`] with its intermediate buffers kept in
    /// `scratch`, so that repeated calls (one per training batch) allocate
    /// nothing once the buffers have grown.
    pub fn transform_with(
        &self,
        x: &[f32],
        rows: usize,
        out: &mut [f32],
        residual: Option<&mut [f64]>,
        scratch: &mut TransformScratch,
    ) {
        let (live, k, cols) = (self.live.len(), self.dim(), self.input_dim);
        let TransformScratch { centered, inv } = scratch;
        centered.resize(rows * live, 0.0);
        for r in 0..rows {
            let row = &x[r * cols..(r + 1) * cols];
            for (i, &j) in self.live.iter().enumerate() {
                // Subtract in f64: features with a large mean and a small
                // spread would lose their digits in f32.
                centered[r * live + i] = (row[j] as f64 - self.mean[i]) as f32;
            }
        }
        match &self.components {
            Some(comp) => {
                let (c, proj) = (View::rows(centered, rows, live, live), View::transposed(comp, k, live));
                matmul(&mut out[..rows * k], k, false, c, proj);
            }
            None => out[..rows * k].copy_from_slice(&centered[..rows * k]),
        }
        if let Some(res) = residual {
            for r in 0..rows {
                // ||c||^2 - ||projection||^2 (the directions are orthonormal).
                let total: f64 = centered[r * live..(r + 1) * live].iter().map(|&v| (v as f64).powi(2)).sum();
                let kept: f64 = out[r * k..(r + 1) * k].iter().map(|&v| (v as f64).powi(2)).sum();
                res[r] = if self.components.is_some() && k < live { (total - kept).max(0.0).sqrt() } else { 0.0 };
            }
        }
        inv.clear();
        inv.extend(self.scale.iter().map(|s| (1.0 / s) as f32));
        for r in 0..rows {
            for (v, s) in out[r * k..(r + 1) * k].iter_mut().zip(inv.iter()) {
                *v *= s;
            }
        }
    }

    /// Map whitened vectors (`rows x dim`) back to input space; dead
    /// features take their training value.
    pub fn inverse(&self, u: &[f32], rows: usize) -> Vec<f32> {
        let (live, k, cols) = (self.live.len(), self.dim(), self.input_dim);
        let mut scaled = u[..rows * k].to_vec();
        for r in 0..rows {
            for (v, s) in scaled[r * k..(r + 1) * k].iter_mut().zip(&self.scale) {
                *v *= *s as f32;
            }
        }
        let centered = match &self.components {
            Some(comp) => {
                let mut c = vec![0.0f32; rows * live];
                matmul(&mut c, live, false, View::rows(&scaled, rows, k, k), View::rows(comp, k, live, live));
                c
            }
            None => scaled,
        };
        let mut out = vec![0.0f32; rows * cols];
        for r in 0..rows {
            for (i, &j) in self.live.iter().enumerate() {
                out[r * cols + j] = (centered[r * live + i] as f64 + self.mean[i]) as f32;
            }
            for (&j, &v) in self.dead.iter().zip(&self.dead_value) {
                out[r * cols + j] = v as f32;
            }
        }
        out
    }

    /// Largest absolute deviation of a row's dead features from their
    /// training values (0 when no feature is dead).
    pub fn dead_deviation(&self, row: &[f32]) -> f64 {
        self.dead.iter().zip(&self.dead_value).map(|(&j, &v)| (row[j] as f64 - v).abs()).fold(0.0, f64::max)
    }
}

/// The Ledoit-Wolf intensity for shrinking the empirical covariance `s`
/// (`d x d`, from `n` centred rows with sum of ||x||^4 `sum_norm4`) towards
/// mu I, mu = trace / d. Follows scikit-learn's `ledoit_wolf_shrinkage`:
/// beta = (sum ||x||^4 / n - ||S||_F^2) / (d n), delta = ||S - mu I||_F^2 / d,
/// intensity = min(beta, delta) / delta.
fn ledoit_wolf_intensity(s: &[f64], d: usize, n: usize, sum_norm4: f64) -> f64 {
    let mu = trace(s, d) / d as f64;
    let frob: f64 = s.iter().map(|v| v * v).sum();
    let beta = (sum_norm4 / n as f64 - frob) / (d as f64 * n as f64);
    let delta = (frob - 2.0 * mu * mu * d as f64 + d as f64 * mu * mu) / d as f64;
    if beta <= 0.0 || delta <= 0.0 {
        0.0
    } else {
        beta.min(delta) / delta
    }
}

fn trace(s: &[f64], d: usize) -> f64 {
    (0..d).map(|i| s[i * d + i]).sum()
}

/// `s <- (1 - alpha) s + alpha mu I`, mu = trace / d.
fn shrink(s: &mut [f64], d: usize, alpha: f64) {
    let mu = trace(s, d) / d as f64;
    for i in 0..d {
        for j in 0..d {
            s[i * d + j] *= 1.0 - alpha;
        }
        s[i * d + i] += alpha * mu;
    }
}

/// Held-out rows, and how to standardize their live features.
struct ValidationRows<'a> {
    data: &'a Dataset,
    rows: &'a [usize],
    live: &'a [usize],
    std: &'a [f64],
}

/// The intensity among [`SHRINKAGE_GRID`] and the Ledoit-Wolf estimate `lw`
/// under which the held-out rows are most likely. The density is the
/// mixture over `centres` (log prior, mean of the live features) of
/// Gaussians with the shrunk correlation `r`; every intensity shares `r`'s
/// eigenvectors, so one eigendecomposition and one projection of the rows
/// serve the whole grid. Intensities that leave a null direction are
/// skipped: their likelihood is over fewer dimensions and not comparable.
fn validated_intensity(r: &[f64], d: usize, lw: f64, val: &ValidationRows, centres: &[(f64, Vec<f64>)]) -> f64 {
    let eig = nalgebra::SymmetricEigen::new(nalgebra::DMatrix::from_row_slice(d, d, r));
    let lambda: Vec<f64> = eig.eigenvalues.iter().map(|&l| l.max(0.0)).collect();
    let mu = lambda.iter().sum::<f64>() / d as f64;
    let top = lambda.iter().cloned().fold(0.0, f64::max);
    let mut grid: Vec<f64> = SHRINKAGE_GRID.iter().copied().chain([lw]).collect();
    grid.retain(|&a| lambda.iter().all(|&l| (1.0 - a) * l + a * mu > NULL_VARIANCE * top));
    // vectors: column i of `basis` (d x d, row-major) is eigenvector i.
    let basis: Vec<f64> =
        (0..d).flat_map(|row| (0..d).map(move |i| (row, i))).map(|(row, i)| eig.eigenvectors[(row, i)]).collect();
    let mut raw = Vec::new();
    let mut centred = vec![0.0f64; BLOCK * d];
    let mut proj = vec![0.0f64; BLOCK * d];
    let log_dets: Vec<f64> =
        grid.iter().map(|&a| lambda.iter().map(|&l| ((1.0 - a) * l + a * mu).ln()).sum()).collect();
    let mut total = vec![0.0f64; grid.len()];
    let mut per_centre = vec![0.0f64; centres.len()];
    for chunk in val.rows.chunks(BLOCK) {
        let n = chunk.len();
        val.data.gather(chunk, &mut raw);
        // One projection per centre: rows x d, times the eigenvectors.
        let mut projections = Vec::with_capacity(centres.len());
        for (_, mean) in centres {
            for (r, row) in raw.chunks(val.data.cols).enumerate() {
                for (i, &j) in val.live.iter().enumerate() {
                    centred[r * d + i] = (row[j] as f64 - mean[i]) / val.std[i];
                }
            }
            proj[..n * d].fill(0.0);
            matmul(&mut proj[..n * d], d, false, View::rows(&centred[..n * d], n, d, d), View::rows(&basis, d, d, d));
            projections.push(proj[..n * d].to_vec());
        }
        for (g, &a) in grid.iter().enumerate() {
            let inv: Vec<f64> = lambda.iter().map(|&l| 1.0 / ((1.0 - a) * l + a * mu)).collect();
            for r in 0..n {
                for (c, (log_prior, _)) in centres.iter().enumerate() {
                    let p = &projections[c][r * d..(r + 1) * d];
                    let q: f64 = p.iter().zip(&inv).map(|(v, w)| v * v * w).sum();
                    per_centre[c] = log_prior - 0.5 * (q + log_dets[g]);
                }
                total[g] += log_sum_exp(&per_centre);
            }
        }
    }
    let best = (0..grid.len()).max_by(|&a, &b| total[a].total_cmp(&total[b]));
    best.map_or(lw, |g| grid[g])
}

#[cfg(test)]
mod tests {
    use super::*;

    use crate::data::Matrix;

    fn all(x: &Matrix) -> (Dataset, Vec<usize>) {
        (Dataset::in_memory(x.clone()), (0..x.rows).collect())
    }

    fn correlated(n: usize) -> Matrix {
        // Deterministic, correlated, non-centred 3-column data.
        let data = (0..n)
            .flat_map(|i| {
                let (a, b, c) = ((i as f32 * 0.7).sin(), (i as f32 * 1.3).cos(), (i as f32 * 2.9).sin());
                [5.0 + a, 2.0 * a + 0.3 * b, -b + 0.1 * a + 0.5 * c]
            })
            .collect();
        Matrix::new(n, 3, data)
    }

    #[test]
    fn whitened_data_has_identity_covariance_and_inverse_round_trips() {
        let x = correlated(500);
        for method in [Method::Pca, Method::Standardize] {
            let (ds, idx) = all(&x);
            let pre = Preprocessor::fit(&ds, &idx, method, DEFAULT_DEAD_THRESHOLD).unwrap();
            let mut u = vec![0.0; 500 * 3];
            pre.transform(&x.data, 500, &mut u, None);
            let cov =
                |i: usize, j: usize| (0..500).map(|r| u[r * 3 + i] as f64 * u[r * 3 + j] as f64).sum::<f64>() / 500.0;
            for i in 0..3 {
                assert!((cov(i, i) - 1.0).abs() < 1e-4);
                if method == Method::Pca {
                    for j in 0..i {
                        assert!(cov(i, j).abs() < 1e-4);
                    }
                }
            }
            let back = pre.inverse(&u, 500);
            for (a, b) in back.iter().zip(&x.data) {
                assert!((a - b).abs() < 1e-4);
            }
        }
    }

    #[test]
    fn constant_columns_are_dead_and_never_divide_by_zero() {
        let mut x = correlated(100);
        for r in 0..100 {
            x.data[r * 3 + 1] = 4.0;
        }
        let (ds, idx) = all(&x);
        let pre = Preprocessor::fit(&ds, &idx, Method::Pca, DEFAULT_DEAD_THRESHOLD).unwrap();
        assert_eq!((pre.live.clone(), pre.dead.clone()), (vec![0, 2], vec![1]));
        assert!(pre.log_det().is_finite());
        assert_eq!(pre.dead_deviation(&[0.0, 4.5, 0.0]), 0.5);
        let (ds, idx) = all(&Matrix::new(3, 2, vec![1.0; 6]));
        assert!(Preprocessor::fit(&ds, &idx, Method::Pca, DEFAULT_DEAD_THRESHOLD).is_err());
    }

    /// Streaming statistics equal a two-pass float64 computation on values
    /// near 1e4 with unit spread, where the one-pass sum / sum-of-squares
    /// formula in f32 loses the variance entirely.
    #[test]
    fn streaming_statistics_survive_a_large_offset() {
        let n = 5000;
        let data: Vec<f32> = (0..n).map(|i| 1.0e4 + (i as f32 * 0.37).sin() * 1.5).collect();
        let x = Matrix::new(n, 1, data.clone());
        let (ds, idx) = all(&x);
        let stats = ColumnStats::of(&ds, &idx);
        let mean = data.iter().map(|&v| v as f64).sum::<f64>() / n as f64;
        let var = data.iter().map(|&v| (v as f64 - mean).powi(2)).sum::<f64>() / n as f64;
        assert!((stats.mean[0] - mean).abs() < 1e-9 * mean);
        assert!((stats.m2[0] / n as f64 - var).abs() < 1e-9 * var, "{} vs {var}", stats.m2[0] / n as f64);
        let (s, sq) = data.iter().fold((0.0f32, 0.0f32), |(s, q), &v| (s + v, q + v * v));
        let naive = sq / n as f32 - (s / n as f32).powi(2);
        assert!((naive as f64 - var).abs() > 0.1 * var, "the naive formula should fail here: {naive} vs {var}");
    }
}
