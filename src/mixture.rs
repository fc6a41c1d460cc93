//! A Gaussian mixture with full covariances over whitened vectors, fitted by
//! expectation-maximisation (Dempster, Laird & Rubin 1977) from a seeded
//! k-means++ start (Arthur & Vassilvitskii 2007).
//!
//! Each component keeps the Cholesky factor of its precision, W with
//! W W^T = inverse covariance (upper triangular), so that the squared
//! Mahalanobis distance of a row u is ||u W - mu W||^2: one matrix product
//! per component for a whole block of rows. The covariance update and the
//! log-likelihood follow the usual full-covariance EM; a ridge is added to
//! every covariance's diagonal.
//!
//! The E-step and evaluation run blocks of rows in parallel, the M-step
//! components, on the rayon pool the caller installs; every row and every
//! component is computed as one thread would, so the result does not depend
//! on the number of threads.

use crate::linalg::{log_sum_exp, matmul, View};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, StandardNormal};
use rayon::prelude::*;

const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

/// Rows per block when evaluating, to bound scratch memory.
const BLOCK: usize = 1024;
/// Training rows whose covariance terms one product sums in the M-step: bounds
/// each thread's scratch (this many rows x dim), and is above every training
/// set of the quality suite, so their fits are those of one product.
const COVARIANCE_BLOCK: usize = 16_384;

/// The pool to install around this module's parallel steps: `threads`
/// workers (at least one), so that a run asked for one thread uses one
/// rather than rayon's global pool.
pub fn pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new().num_threads(threads.max(1)).build().expect("threads start")
}

/// A fitted mixture over `dim`-dimensional vectors.
#[derive(Clone, Debug, PartialEq)]
pub struct Mixture {
    pub dim: usize,
    /// ln of each component's weight (they sum to 1).
    pub log_weights: Vec<f64>,
    /// `components x dim`.
    pub means: Vec<f64>,
    /// `components x dim x dim`, row-major: each component's W.
    pub precision_cholesky: Vec<f64>,
}

/// Per-row results of [`Mixture::evaluate`].
#[derive(Clone, Debug, Default)]
pub struct MixtureEvaluation {
    /// ln p(u).
    pub log_density: Vec<f64>,
    /// The most responsible component and its posterior probability.
    pub component: Vec<usize>,
    pub probability: Vec<f64>,
    /// Squared Mahalanobis distance to the most responsible component.
    pub mahalanobis_sq: Vec<f64>,
    /// ln of the summed weighted densities of each group's components,
    /// `rows x groups` (empty without groups): for a class-conditional
    /// mixture, ln [pi_c p(u | c)].
    pub group_log_joint: Vec<f64>,
}

/// How EM ran.
#[derive(Clone, Copy, Debug)]
pub struct EmReport {
    pub iterations: usize,
    /// Mean log-likelihood of the training rows at the last E-step.
    pub mean_log_likelihood: f64,
    pub converged: bool,
}

impl Mixture {
    pub fn components(&self) -> usize {
        self.log_weights.len()
    }

    fn mean(&self, k: usize) -> &[f64] {
        &self.means[k * self.dim..(k + 1) * self.dim]
    }

    fn w(&self, k: usize) -> &[f64] {
        &self.precision_cholesky[k * self.dim * self.dim..(k + 1) * self.dim * self.dim]
    }

    /// ln N(u; mu_k, Sigma_k) for every row and component (`rows x K`),
    /// and the squared Mahalanobis distances (same layout).
    fn log_gaussians(&self, u: &[f64], rows: usize) -> (Vec<f64>, Vec<f64>) {
        let (d, kk) = (self.dim, self.components());
        let mut out = vec![0.0f64; rows * kk];
        let mut maha = vec![0.0f64; rows * kk];
        let mut y = vec![0.0f64; rows * d];
        for k in 0..kk {
            let w = self.w(k);
            matmul(&mut y, d, false, View::rows(u, rows, d, d), View::rows(w, d, d, d));
            // mu W, subtracted from every row of u W.
            let mut mw = vec![0.0f64; d];
            matmul(&mut mw, d, false, View::rows(self.mean(k), 1, d, d), View::rows(w, d, d, d));
            let log_det_w: f64 = (0..d).map(|i| w[i * d + i].ln()).sum();
            for r in 0..rows {
                let q: f64 = y[r * d..(r + 1) * d].iter().zip(&mw).map(|(a, b)| (a - b) * (a - b)).sum();
                maha[r * kk + k] = q;
                out[r * kk + k] = -0.5 * q - d as f64 * HALF_LN_2PI + log_det_w;
            }
        }
        (out, maha)
    }

    /// ln p(u) and the nearest-component statistics for `rows` rows of `u`.
    pub fn evaluate(&self, u: &[f64], rows: usize) -> MixtureEvaluation {
        self.evaluate_grouped(u, rows, &[], 0)
    }

    /// As [`Mixture::evaluate`], and the log of each group's share of the
    /// density, where component `k` belongs to group `group_of[k]`.
    pub fn evaluate_grouped(&self, u: &[f64], rows: usize, group_of: &[usize], groups: usize) -> MixtureEvaluation {
        let parts = self.blocks(u, rows, |u, n| self.evaluate_block(u, n, group_of, groups));
        let mut e = MixtureEvaluation::default();
        for p in parts {
            e.log_density.extend(p.log_density);
            e.component.extend(p.component);
            e.probability.extend(p.probability);
            e.mahalanobis_sq.extend(p.mahalanobis_sq);
            e.group_log_joint.extend(p.group_log_joint);
        }
        e
    }

    /// `f` on every block of [`BLOCK`] rows of `u`, in parallel, the results
    /// in row order.
    fn blocks<T: Send>(&self, u: &[f64], rows: usize, f: impl Fn(&[f64], usize) -> T + Sync) -> Vec<T> {
        let d = self.dim;
        (0..rows.div_ceil(BLOCK))
            .into_par_iter()
            .map(|b| {
                let (start, n) = (b * BLOCK, BLOCK.min(rows - b * BLOCK));
                f(&u[start * d..(start + n) * d], n)
            })
            .collect()
    }

    /// [`Mixture::evaluate_grouped`] of one block of `n` rows.
    fn evaluate_block(&self, u: &[f64], n: usize, group_of: &[usize], groups: usize) -> MixtureEvaluation {
        let kk = self.components();
        let mut e = MixtureEvaluation::default();
        let mut members: Vec<Vec<f64>> = vec![Vec::new(); groups];
        let (mut lp, maha) = self.log_gaussians(u, n);
        for r in 0..n {
            let row = &mut lp[r * kk..(r + 1) * kk];
            for (v, w) in row.iter_mut().zip(&self.log_weights) {
                *v += w;
            }
            let total = log_sum_exp(row);
            let (best, top) =
                row.iter().enumerate().fold((0, f64::NEG_INFINITY), |b, (k, &v)| if v > b.1 { (k, v) } else { b });
            e.log_density.push(total);
            e.component.push(best);
            e.probability.push((top - total).exp());
            e.mahalanobis_sq.push(maha[r * kk + best]);
            if groups > 0 {
                members.iter_mut().for_each(Vec::clear);
                for (&v, &g) in row.iter().zip(group_of) {
                    members[g].push(v);
                }
                e.group_log_joint.extend(members.iter().map(|m| log_sum_exp(m)));
            }
        }
        e
    }

    /// One mixture of several, each weighted by its `log_share` (the shares
    /// sum to 1); also which part each component came from.
    pub fn union(parts: &[(f64, &Mixture)]) -> (Mixture, Vec<usize>) {
        let dim = parts.first().map_or(0, |p| p.1.dim);
        let mut out = Mixture { dim, log_weights: Vec::new(), means: Vec::new(), precision_cholesky: Vec::new() };
        let mut part_of = Vec::new();
        for (i, (share, m)) in parts.iter().enumerate() {
            out.log_weights.extend(m.log_weights.iter().map(|w| w + share));
            out.means.extend(&m.means);
            out.precision_cholesky.extend(&m.precision_cholesky);
            part_of.extend(std::iter::repeat_n(i, m.components()));
        }
        (out, part_of)
    }

    /// Mean ln p(u) over `rows` rows.
    pub fn mean_log_density(&self, u: &[f64], rows: usize) -> f64 {
        self.evaluate(u, rows).log_density.iter().sum::<f64>() / rows as f64
    }

    /// Draw `n` vectors: a component by weight, then its Gaussian
    /// (u = mu + W^{-T} eps, since W^{-T} W^{-1} is the covariance).
    pub fn sample(&self, n: usize, rng: &mut StdRng) -> Vec<f64> {
        let d = self.dim;
        let weights: Vec<f64> = self.log_weights.iter().map(|w| w.exp()).collect();
        let pick = rand_distr::weighted::WeightedIndex::new(&weights).expect("mixture weights are positive");
        let mut out = Vec::with_capacity(n * d);
        for _ in 0..n {
            let k = pick.sample(rng);
            let w = self.w(k);
            let eps: Vec<f64> = (0..d).map(|_| StandardNormal.sample(rng)).collect();
            // Solve W^T v = eps; W^T is lower triangular: forward substitution.
            let mut v = vec![0.0f64; d];
            for i in 0..d {
                let s: f64 = (0..i).map(|j| w[j * d + i] * v[j]).sum();
                v[i] = (eps[i] - s) / w[i * d + i];
            }
            out.extend(v.iter().zip(self.mean(k)).map(|(a, m)| a + m));
        }
        out
    }
}

/// W from a covariance: its lower Cholesky factor L, then W = L^{-T}.
/// `None` when the covariance is not positive definite.
fn precision_cholesky_of(cov: &[f64], d: usize) -> Option<Vec<f64>> {
    let chol = nalgebra::Cholesky::new(nalgebra::DMatrix::from_row_slice(d, d, cov))?;
    let l = chol.l();
    let inv = l.solve_lower_triangular(&nalgebra::DMatrix::identity(d, d))?;
    // W = (L^{-1})^T, written row-major: W[i][j] = inv[j][i].
    let mut w = vec![0.0f64; d * d];
    for i in 0..d {
        for j in 0..d {
            w[i * d + j] = inv[(j, i)];
        }
    }
    w.iter().all(|v| v.is_finite()).then_some(w)
}

/// The covariance (W W^T)^{-1} = W^{-T} W^{-1}.
#[cfg(test)]
fn covariance_of(w: &[f64], d: usize) -> Option<Vec<f64>> {
    let wm = nalgebra::DMatrix::from_row_slice(d, d, w);
    let prec = &wm * wm.transpose();
    let cov = prec.try_inverse()?;
    Some((0..d).flat_map(|i| (0..d).map(move |j| (i, j))).map(|(i, j)| 0.5 * (cov[(i, j)] + cov[(j, i)])).collect())
}

/// A mixture and its covariances (`components x dim x dim`, ridge included).
#[derive(Clone, Debug)]
pub struct Fitted {
    pub mixture: Mixture,
    pub covariances: Vec<f64>,
}

impl Fitted {
    /// The same mixture with `extra` added to every covariance's diagonal.
    pub fn with_ridge(&self, extra: f64) -> Option<Mixture> {
        let d = self.mixture.dim;
        let mut precision_cholesky = Vec::with_capacity(self.covariances.len());
        for cov in self.covariances.chunks(d * d) {
            let mut cov = cov.to_vec();
            for i in 0..d {
                cov[i * d + i] += extra;
            }
            precision_cholesky.extend(precision_cholesky_of(&cov, d)?);
        }
        Some(Mixture { precision_cholesky, ..self.mixture.clone() })
    }
}

/// One component's M-step result.
struct Component {
    log_weight: f64,
    mean: Vec<f64>,
    covariance: Vec<f64>,
    precision_cholesky: Vec<f64>,
}

/// Weight, mean, covariance (ridge added) and precision factor of component
/// `k` from responsibilities (`rows x K`); `None` when the covariance is not
/// positive definite.
fn component(u: &[f64], rows: usize, d: usize, resp: &[f64], k: usize, ridge: f64) -> Option<Component> {
    let kk = resp.len() / rows;
    // Tiny floor on component mass, as is common practice, so that an empty
    // component does not divide by zero.
    let floor = 10.0 * f64::EPSILON;
    let nk: f64 = (0..rows).map(|r| resp[r * kk + k]).sum::<f64>() + floor;
    let mut mean = vec![0.0f64; d];
    for r in 0..rows {
        let p = resp[r * kk + k];
        for (m, &v) in mean.iter_mut().zip(&u[r * d..(r + 1) * d]) {
            *m += p * v;
        }
    }
    mean.iter_mut().for_each(|m| *m /= nk);
    let mut cov = vec![0.0f64; d * d];
    let mut scaled = vec![0.0f64; rows.min(COVARIANCE_BLOCK) * d];
    for start in (0..rows).step_by(COVARIANCE_BLOCK) {
        let n = COVARIANCE_BLOCK.min(rows - start);
        for r in 0..n {
            let s = resp[(start + r) * kk + k].sqrt();
            let row = &u[(start + r) * d..(start + r + 1) * d];
            for ((out, &v), m) in scaled[r * d..(r + 1) * d].iter_mut().zip(row).zip(&mean) {
                *out = s * (v - m);
            }
        }
        let scaled = &scaled[..n * d];
        matmul(&mut cov, d, start > 0, View::transposed(scaled, n, d), View::rows(scaled, n, d, d));
    }
    for i in 0..d {
        for j in 0..d {
            cov[i * d + j] /= nk;
        }
        cov[i * d + i] += ridge;
    }
    let precision_cholesky = precision_cholesky_of(&cov, d)?;
    Some(Component { log_weight: (nk / rows as f64).ln(), mean, covariance: cov, precision_cholesky })
}

/// Weights, means and covariances from responsibilities (`rows x K`), the
/// M-step; then the mixture that they define.
pub fn maximise(u: &[f64], rows: usize, d: usize, resp: &[f64], ridge: f64) -> Option<Fitted> {
    let kk = resp.len() / rows;
    let parts: Vec<Component> =
        (0..kk).into_par_iter().map(|k| component(u, rows, d, resp, k, ridge)).collect::<Option<_>>()?;
    let mut log_weights = Vec::with_capacity(kk);
    let mut means = Vec::with_capacity(kk * d);
    let mut precision_cholesky = Vec::with_capacity(kk * d * d);
    let mut covariances = Vec::with_capacity(kk * d * d);
    for c in parts {
        log_weights.push(c.log_weight);
        means.extend(c.mean);
        precision_cholesky.extend(c.precision_cholesky);
        covariances.extend(c.covariance);
    }
    // Renormalise: the floor may have added a hair of mass.
    let total = log_sum_exp(&log_weights);
    log_weights.iter_mut().for_each(|w| *w -= total);
    Some(Fitted { mixture: Mixture { dim: d, log_weights, means, precision_cholesky }, covariances })
}

/// Each row's posterior over the components (`rows x K`).
pub fn responsibilities(m: &Mixture, u: &[f64], rows: usize) -> Vec<f64> {
    expect(m, u, rows).0
}

/// Responsibilities (`rows x K`) and the mean log-likelihood: the E-step.
fn expect(m: &Mixture, u: &[f64], rows: usize) -> (Vec<f64>, f64) {
    let kk = m.components();
    let blocks = m.blocks(u, rows, |u, n| {
        let (mut lp, _) = m.log_gaussians(u, n);
        let mut norms = Vec::with_capacity(n);
        for row in lp.chunks_mut(kk) {
            for (v, w) in row.iter_mut().zip(&m.log_weights) {
                *v += w;
            }
            let norm = log_sum_exp(row);
            norms.push(norm);
            row.iter_mut().for_each(|v| *v = (*v - norm).exp());
        }
        (lp, norms)
    });
    let mut resp = Vec::with_capacity(rows * kk);
    let mut total = 0.0;
    for (lp, norms) in blocks {
        resp.extend(lp);
        // Summed row by row in order, as one thread would.
        total = norms.iter().fold(total, |t, n| t + n);
    }
    (resp, total / rows as f64)
}

/// EM from initial responsibilities: the M-step on them, then up to
/// `max_iter` rounds of E-step and M-step, stopping when the mean
/// log-likelihood gains less than `tol`. `None` when a covariance stops
/// being positive definite.
pub fn em(
    u: &[f64],
    rows: usize,
    d: usize,
    init: &[f64],
    ridge: f64,
    max_iter: usize,
    tol: f64,
) -> Option<(Fitted, EmReport)> {
    let mut m = maximise(u, rows, d, init, ridge)?;
    let mut report = EmReport { iterations: 0, mean_log_likelihood: f64::NEG_INFINITY, converged: false };
    for it in 1..=max_iter {
        let (resp, ll) = expect(&m.mixture, u, rows);
        m = maximise(u, rows, d, &resp, ridge)?;
        let gain = ll - report.mean_log_likelihood;
        report.iterations = it;
        report.mean_log_likelihood = ll;
        if gain.abs() < tol {
            report.converged = true;
            break;
        }
    }
    Some((m, report))
}

/// Hard responsibilities from seeded k-means++ seeding followed by a few
/// rounds of Lloyd's algorithm: each row belongs wholly to its nearest centre.
/// Distances weigh column j by `w[j]` (squared distance sum_j w_j (a_j - b_j)^2).
pub fn kmeans_start(u: &[f64], rows: usize, d: usize, w: &[f64], k: usize, seed: u64) -> Vec<f64> {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut centres: Vec<f64> = Vec::with_capacity(k * d);
    let first = rng.random_range(0..rows);
    centres.extend_from_slice(&u[first * d..(first + 1) * d]);
    let sq = |r: usize, c: &[f64]| -> f64 {
        u[r * d..(r + 1) * d].iter().zip(c).zip(w).map(|((a, b), w)| w * (a - b) * (a - b)).sum()
    };
    let mut nearest: Vec<f64> = (0..rows).map(|r| sq(r, &centres[..d])).collect();
    while centres.len() < k * d {
        let total: f64 = nearest.iter().sum();
        let pick = if total > 0.0 {
            let mut target = rng.random::<f64>() * total;
            nearest
                .iter()
                .position(|&v| {
                    target -= v;
                    target <= 0.0
                })
                .unwrap_or(rows - 1)
        } else {
            rng.random_range(0..rows)
        };
        let c = u[pick * d..(pick + 1) * d].to_vec();
        for (r, best) in nearest.iter_mut().enumerate() {
            *best = best.min(sq(r, &c));
        }
        centres.extend(c);
    }
    let mut assign = vec![0usize; rows];
    for _ in 0..LLOYD_ROUNDS {
        assign = nearest_centres(u, rows, d, w, &centres);
        let mut sums = vec![0.0f64; k * d];
        let mut counts = vec![0usize; k];
        for (r, &c) in assign.iter().enumerate() {
            counts[c] += 1;
            for j in 0..d {
                sums[c * d + j] += u[r * d + j];
            }
        }
        for c in 0..k {
            if counts[c] > 0 {
                for j in 0..d {
                    centres[c * d + j] = sums[c * d + j] / counts[c] as f64;
                }
            }
        }
    }
    let mut resp = vec![0.0f64; rows * k];
    for (r, &c) in assign.iter().enumerate() {
        resp[r * k + c] = 1.0;
    }
    resp
}

/// Lloyd rounds after seeding: enough to settle the start; EM does the rest.
const LLOYD_ROUNDS: usize = 10;

/// Index of the nearest centre of every row under the column weights `w`
/// (||u||_w^2 - 2 u.(w c) + ||c||_w^2, the first term the same for all).
fn nearest_centres(u: &[f64], rows: usize, d: usize, w: &[f64], centres: &[f64]) -> Vec<usize> {
    let k = centres.len() / d;
    let weighted: Vec<f64> = centres.chunks(d).flat_map(|c| c.iter().zip(w).map(|(v, w)| v * w)).collect();
    let norms: Vec<f64> =
        centres.chunks(d).zip(weighted.chunks(d)).map(|(c, wc)| c.iter().zip(wc).map(|(a, b)| a * b).sum()).collect();
    let mut dots = vec![0.0f64; rows * k];
    matmul(&mut dots, k, false, View::rows(u, rows, d, d), View::transposed(&weighted, k, d));
    (0..rows)
        .map(|r| {
            (0..k)
                .map(|c| norms[c] - 2.0 * dots[r * k + c])
                .enumerate()
                .fold((0, f64::INFINITY), |b, (c, v)| if v < b.1 { (c, v) } else { b })
                .0
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A 2-D mixture's density integrates to 1: a Riemann sum over a grid
    /// wide enough to hold all but a negligible tail.
    #[test]
    fn density_integrates_to_one_on_a_grid() {
        let cov_a = [1.0, 0.6, 0.6, 0.8];
        let cov_b = [0.3, -0.1, -0.1, 0.5];
        let mut precision_cholesky = precision_cholesky_of(&cov_a, 2).unwrap();
        precision_cholesky.extend(precision_cholesky_of(&cov_b, 2).unwrap());
        let m = Mixture {
            dim: 2,
            log_weights: vec![0.3f64.ln(), 0.7f64.ln()],
            means: vec![-1.0, 0.5, 2.0, -1.0],
            precision_cholesky,
        };
        let (lo, hi, steps) = (-9.0, 9.0, 600);
        let h = (hi - lo) / steps as f64;
        let grid: Vec<f64> = (0..steps * steps)
            .flat_map(|i| [lo + (i / steps) as f64 * h + h / 2.0, lo + (i % steps) as f64 * h + h / 2.0])
            .collect();
        let total: f64 = m.evaluate(&grid, steps * steps).log_density.iter().map(|v| v.exp() * h * h).sum();
        assert!((total - 1.0).abs() < 1e-6, "integral {total}");
    }

    /// Closed form: one component is the Gaussian log-density
    /// -(d/2) ln 2 pi - ln|Sigma|/2 - q/2, with q and |Sigma| by hand.
    #[test]
    fn one_component_is_the_gaussian_log_density() {
        let cov = [2.0, 0.5, 0.5, 1.0];
        let m = Mixture {
            dim: 2,
            log_weights: vec![0.0],
            means: vec![1.0, -1.0],
            precision_cholesky: precision_cholesky_of(&cov, 2).unwrap(),
        };
        let x = [2.0, 0.5];
        let (dx, dy) = (1.0, 1.5);
        let det: f64 = 2.0 * 1.0 - 0.25;
        let q = (1.0 * dx * dx - 2.0 * 0.5 * dx * dy + 2.0 * dy * dy) / det;
        let want = -std::f64::consts::LN_2 - std::f64::consts::PI.ln() - 0.5 * det.ln() - 0.5 * q;
        let got = m.evaluate(&x, 1);
        assert!((got.log_density[0] - want).abs() < 1e-12, "{} vs {want}", got.log_density[0]);
        assert!((got.mahalanobis_sq[0] - q).abs() < 1e-12);
        let back = covariance_of(&m.precision_cholesky, 2).unwrap();
        for (a, b) in back.iter().zip(cov) {
            assert!((a - b).abs() < 1e-12);
        }
    }

    /// Samples from a mixture have its weights, means and covariances
    /// (law of large numbers; 200,000 draws, tolerances ~5 standard errors).
    #[test]
    fn samples_follow_the_mixture() {
        let cov = [1.0, 0.6, 0.6, 0.8];
        let w = precision_cholesky_of(&cov, 2).unwrap();
        let m = Mixture { dim: 2, log_weights: vec![0.0], means: vec![3.0, -2.0], precision_cholesky: w };
        let n = 200_000;
        let s = m.sample(n, &mut StdRng::seed_from_u64(1));
        let mean = |j: usize| s.iter().skip(j).step_by(2).sum::<f64>() / n as f64;
        let (m0, m1) = (mean(0), mean(1));
        assert!((m0 - 3.0).abs() < 0.012 && (m1 + 2.0).abs() < 0.012, "{m0} {m1}");
        let c01 = s.chunks(2).map(|p| (p[0] - m0) * (p[1] - m1)).sum::<f64>() / n as f64;
        assert!((c01 - 0.6).abs() < 0.015, "{c01}");
    }

    /// EM on two well-separated clusters finds them from a k-means++ start.
    /// Rows drawn around two centres in `d` dims (seeded).
    fn two_clusters(rows: usize, d: usize, seed: u64) -> Vec<f64> {
        let mut rng = StdRng::seed_from_u64(seed);
        (0..rows * d)
            .map(|i| {
                let shift = if (i / d) % 3 == 0 { 4.0 } else { -1.0 };
                let noise: f64 = StandardNormal.sample(&mut rng);
                shift * ((i % d) as f64 / d as f64) + noise
            })
            .collect()
    }

    /// EM and evaluation give bit-identical results on one thread and on
    /// several: rows and components are computed as one thread would, only
    /// in parallel.
    #[test]
    fn em_and_evaluation_do_not_depend_on_the_thread_count() {
        let (rows, d) = (3000, 5);
        let u = two_clusters(rows, d, 7);
        let run = |threads: usize| {
            pool(threads).install(|| {
                let init = kmeans_start(&u, rows, d, &[1.0; 5], 3, 1);
                let (fitted, report) = em(&u, rows, d, &init, 1e-6, 50, 1e-9).unwrap();
                let e = fitted.mixture.evaluate(&u, rows);
                (fitted.mixture, fitted.covariances, report.mean_log_likelihood, e.log_density, e.mahalanobis_sq)
            })
        };
        let one = run(1);
        let three = run(3);
        assert_eq!(one.0, three.0);
        assert_eq!(one.1, three.1);
        assert_eq!(one.2.to_bits(), three.2.to_bits());
        assert_eq!(one.3, three.3);
        assert_eq!(one.4, three.4);
    }

    /// The M-step's covariance, summed over blocks of rows when there are
    /// more than one product takes, equals the weighted covariance
    /// sum_r p_r (u_r - mu)(u_r - mu)^T / sum_r p_r computed directly
    /// (the M-step of full-covariance EM).
    #[test]
    fn the_blocked_covariance_is_the_weighted_covariance() {
        let (rows, d) = (COVARIANCE_BLOCK + 1500, 3);
        let u = two_clusters(rows, d, 11);
        let resp: Vec<f64> = (0..rows).flat_map(|r| if r % 3 == 0 { [0.9, 0.1] } else { [0.2, 0.8] }).collect();
        let fitted = maximise(&u, rows, d, &resp, 0.0).unwrap();
        for k in 0..2 {
            let p: Vec<f64> = (0..rows).map(|r| resp[r * 2 + k]).collect();
            let n: f64 = p.iter().sum();
            let mean: Vec<f64> = (0..d).map(|j| (0..rows).map(|r| p[r] * u[r * d + j]).sum::<f64>() / n).collect();
            for i in 0..d {
                for j in 0..d {
                    let direct: f64 =
                        (0..rows).map(|r| p[r] * (u[r * d + i] - mean[i]) * (u[r * d + j] - mean[j])).sum::<f64>() / n;
                    let got = fitted.covariances[k * d * d + i * d + j];
                    assert!((got - direct).abs() <= 1e-10 * direct.abs().max(1.0), "{k} {i} {j}: {got} vs {direct}");
                }
            }
        }
    }

    #[test]
    fn em_recovers_two_separated_clusters() {
        let mut rng = StdRng::seed_from_u64(3);
        let rows = 2000;
        let u: Vec<f64> = (0..rows)
            .flat_map(|r| {
                let c = if r % 4 == 0 { 6.0 } else { -2.0 };
                let a: f64 = StandardNormal.sample(&mut rng);
                let b: f64 = StandardNormal.sample(&mut rng);
                [c + a, 0.5 * b]
            })
            .collect();
        let init = kmeans_start(&u, rows, 2, &[1.0, 1.0], 2, 0);
        let (fitted, report) = em(&u, rows, 2, &init, 1e-6, 100, 1e-6).unwrap();
        assert!(report.converged);
        let m = fitted.mixture;
        let mut weights: Vec<f64> = m.log_weights.iter().map(|w| w.exp()).collect();
        weights.sort_by(f64::total_cmp);
        assert!((weights[0] - 0.25).abs() < 0.01, "{weights:?}");
    }
}
