//! The densities a model can hold over whitened rows, behind one interface.
//!
//! Every kind — the Gaussian (with or without class means), the Gaussian
//! mixture, and the flow of coupling layers — gives ln p(u) of whitened rows
//! with its parts, draws whitened rows, and writes its tensors, so that the
//! model (which adds the whitening's log-determinant: the change of
//! variables back to input space), scoring, calibration and the report
//! treat them alike, and reads its tensors back ([`Stored`]). How each kind
//! is fitted stays with training: a flow learns by gradient steps with
//! checkpoints and early stopping, a mixture by EM with its size chosen on
//! validation rows, a Gaussian in closed form with the whitening; one
//! signature would fit none of them well, and the search compares the
//! fitted models through [`Density`] and their validation NLL.

pub mod flow;
pub mod gaussian;
pub mod mixture;

use crate::linalg::log_sum_exp;
use rand::rngs::StdRng;
use safetensors::Dtype;

pub use flow::FlowDensity;
pub use gaussian::Gaussian;
pub use mixture::MixtureDensity;

/// ln(2 pi) / 2.
const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

/// What kind of density a model is.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Kind {
    /// Whitening followed by coupling layers (optionally class-conditional).
    #[default]
    Flow,
    /// One full-covariance Gaussian (Ledoit-Wolf shrinkage when rows are few).
    Gaussian,
    /// Class means with one shared covariance.
    ClassGaussian,
    /// Gaussian mixture with full covariances, fitted by EM; components and ridge chosen on validation rows.
    Mixture,
}

/// The name of a kind as the command line spells it.
pub fn kind_name(kind: Kind) -> String {
    serde_json::to_value(kind).ok().and_then(|v| v.as_str().map(str::to_string)).unwrap_or_default()
}

/// Per-row results of a density over whitened rows u, appended by
/// [`Evaluate::evaluate`]: `log_density = base_log_density + log_det`.
#[derive(Clone, Debug, Default)]
pub struct Parts {
    /// ln p(u) (for a class-conditional density, the mixture over classes).
    pub log_density: Vec<f64>,
    /// ln p(z) of the latent z under the base distribution.
    pub base_log_density: Vec<f64>,
    /// ln|det dz/du| (0 where z is u).
    pub log_det: Vec<f64>,
    /// ||z||, or the Mahalanobis distance to the nearest component.
    pub latent_norm: Vec<f64>,
    /// Squared Mahalanobis distance to the nearest class mean or component.
    pub mahalanobis_sq: Vec<f64>,
    /// ln p(u | c) for every class, row-major `rows x classes` (empty
    /// without classes).
    pub class_log_density: Vec<f64>,
    /// Most probable class and its posterior probability.
    pub predicted_class: Vec<usize>,
    pub class_probability: Vec<f64>,
    /// Most responsible mixture component and its posterior probability
    /// (empty without components).
    pub component: Vec<usize>,
    pub component_probability: Vec<f64>,
}

/// Evaluates blocks of whitened rows with workspaces it keeps between calls.
pub trait Evaluate {
    /// Append the parts of `rows` whitened rows `u` (`rows x dim`) to `out`.
    fn evaluate(&mut self, u: &[f32], rows: usize, out: &mut Parts);
    /// Its worker threads, if it has any, for the work scoring adds.
    fn pool(&self) -> Option<&rayon::ThreadPool> {
        None
    }
}

/// Typed access to a model file's tensors, each checked for name, dtype and
/// shape, float values for finiteness.
pub(crate) trait TensorSource {
    /// The file, for messages.
    fn path(&self) -> &std::path::Path;
    fn f32s(&self, name: &str, shape: &[usize]) -> crate::error::Result<Vec<f32>>;
    fn f64s(&self, name: &str, shape: &[usize]) -> crate::error::Result<Vec<f64>>;
    /// Non-negative indices stored as i64.
    fn indices(&self, name: &str, len: usize) -> crate::error::Result<Vec<usize>>;
}

/// What a model file's metadata says about its density, for reading its
/// tensors back: the whitened dims and class priors, and per kind the dims
/// that carry class means, the components, or the flow's shape and the
/// file's format version.
pub(crate) struct Layout<'a> {
    pub dim: usize,
    pub log_priors: Vec<f64>,
    pub mean_dims: usize,
    pub components: usize,
    pub flow: &'a crate::flow::FlowSpec,
    pub version: u32,
}

/// A kind as a model file holds it: [`Density::write`] puts its tensors,
/// [`Stored::read`] reads them back, every shape and value checked.
pub(crate) trait Stored: Density + Sized + 'static {
    fn read(t: &dyn TensorSource, layout: Layout) -> crate::error::Result<Self>;
}

/// Read a density of kind `D`, behind the one interface.
pub(crate) fn read_boxed<D: Stored>(t: &dyn TensorSource, layout: Layout) -> crate::error::Result<Box<dyn Density>> {
    Ok(Box::new(D::read(t, layout)?))
}

/// Adds one tensor (name, dtype, shape, little-endian bytes) to a model file.
pub type Put<'a> = dyn FnMut(&str, Dtype, Vec<usize>, Vec<u8>) + 'a;

/// A density over whitened rows.
pub trait Density: std::fmt::Debug + Send + Sync {
    /// Dimensions of the whitened rows it is over.
    fn dim(&self) -> usize;
    /// Number of classes it conditions on (0: none).
    fn classes(&self) -> usize;
    /// Number of mixture components it reports for each row (0: none).
    fn components(&self) -> usize;
    /// An evaluator for up to `cap` rows per call on `threads` threads.
    fn evaluator(&self, threads: usize, cap: usize) -> Box<dyn Evaluate + '_>;
    /// Draw `n` whitened rows (`n x dim`).
    fn sample(&self, n: usize, rng: &mut StdRng) -> Vec<f32>;
    /// Feed the bits of every parameter to `eat` (the model's fingerprint).
    fn fingerprint(&self, eat: &mut dyn FnMut(u64));
    /// Write its tensors into a model file.
    fn write(&self, put: &mut Put);
    fn boxed_clone(&self) -> Box<dyn Density>;
    /// The flow, for training and the checks that need its parameters.
    fn flow(&self) -> Option<&crate::flow::Flow> {
        None
    }
    fn flow_mut(&mut self) -> Option<&mut crate::flow::Flow> {
        None
    }
}

impl Clone for Box<dyn Density> {
    fn clone(&self) -> Self {
        self.boxed_clone()
    }
}

/// ln of each class's prior from its row count (empty without classes).
pub fn log_priors(rows_per_class: &[usize]) -> Vec<f64> {
    // In f64: row counts come from the file and their sum may not fit.
    let total: f64 = rows_per_class.iter().map(|&r| r as f64).sum();
    rows_per_class.iter().map(|&r| (r as f64 / total).ln()).collect()
}

/// The parts of latent rows `z` under a standard normal base, or under a
/// mixture of unit-covariance Gaussians around `class_means` (`classes x
/// k`, on the leading `k` of `d` dims) weighted by the priors, with the
/// rest of each row standard normal; `log_det` is each row's ln|det dz/du|.
pub(crate) fn unit_gaussian_parts(
    z: &[f32],
    rows: usize,
    d: usize,
    k: usize,
    class_means: &[f32],
    log_priors: &[f64],
    log_det: &[f64],
    out: &mut Parts,
) {
    let classes = log_priors.len();
    let norm_const = d as f64 * HALF_LN_2PI;
    let mut per_class = vec![0.0f64; classes];
    for r in 0..rows {
        let zr = &z[r * d..(r + 1) * d];
        let head_sq: f64 = zr[..k].iter().map(|&v| (v as f64).powi(2)).sum();
        let tail_sq: f64 = zr[k..].iter().map(|&v| (v as f64).powi(2)).sum();
        let (base, maha) = if classes == 0 {
            (-0.5 * (head_sq + tail_sq) - norm_const, head_sq + tail_sq)
        } else {
            for (c, slot) in per_class.iter_mut().enumerate() {
                let mean = &class_means[c * k..(c + 1) * k];
                let sq: f64 = zr[..k].iter().zip(mean).map(|(&v, &m)| ((v - m) as f64).powi(2)).sum();
                *slot = sq + tail_sq;
            }
            let maha = per_class.iter().cloned().fold(f64::INFINITY, f64::min);
            // ln N(z; mu_c, I) + ln pi_c, then the mixture and the posterior.
            for (slot, p) in per_class.iter_mut().zip(log_priors) {
                *slot = -0.5 * *slot - norm_const + p;
            }
            let mix = log_sum_exp(&per_class);
            let (best, top) = argmax(&per_class);
            out.predicted_class.push(best);
            out.class_probability.push((top - mix).exp());
            out.class_log_density.extend(per_class.iter().zip(log_priors).map(|(v, p)| v - p + log_det[r]));
            (mix, maha)
        };
        out.log_density.push(base + log_det[r]);
        out.base_log_density.push(base);
        out.log_det.push(log_det[r]);
        out.latent_norm.push((head_sq + tail_sq).sqrt());
        out.mahalanobis_sq.push(maha);
    }
}

/// Index and value of the largest entry (the first on ties).
pub(crate) fn argmax(v: &[f64]) -> (usize, f64) {
    v.iter().enumerate().fold((0, f64::NEG_INFINITY), |b, (i, &x)| if x > b.1 { (i, x) } else { b })
}

/// A class drawn from the priors for each of `n` rows.
pub(crate) fn draw_classes(log_priors: &[f64], n: usize, rng: &mut StdRng) -> Vec<usize> {
    use rand_distr::Distribution;
    let priors: Vec<f64> = log_priors.iter().map(|p| p.exp()).collect();
    match rand_distr::weighted::WeightedIndex::new(&priors) {
        Ok(pick) => (0..n).map(|_| pick.sample(rng)).collect(),
        Err(_) => vec![0; n],
    }
}

pub(crate) fn le_bytes_f32(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}
pub(crate) fn le_bytes_f64(v: &[f64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}
pub(crate) fn le_bytes_i64(v: &[usize]) -> Vec<u8> {
    v.iter().flat_map(|&x| (x as i64).to_le_bytes()).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The standard normal's log-density in closed form: -||z||^2/2 - d ln(2 pi)/2.
    #[test]
    fn unit_gaussian_without_classes_is_the_standard_normal() {
        let z = [0.5f32, -1.0, 2.0, 0.0, 0.0, 0.0];
        let mut out = Parts::default();
        unit_gaussian_parts(&z, 2, 3, 3, &[], &[], &[0.25, 0.0], &mut out);
        let want0 = -0.5 * (0.25 + 1.0 + 4.0) - 1.5 * (2.0 * std::f64::consts::PI).ln();
        assert!((out.base_log_density[0] - want0).abs() < 1e-12);
        assert!((out.log_density[0] - (want0 + 0.25)).abs() < 1e-12);
        assert!((out.mahalanobis_sq[0] - 5.25).abs() < 1e-12);
        assert!(out.class_log_density.is_empty() && out.predicted_class.is_empty());
    }

    /// Bayes' rule: the marginal is logsumexp_c [ln p(u | c) + ln pi_c] and
    /// the posterior of the predicted class is p(u | c) pi_c / p(u).
    #[test]
    fn class_parts_follow_bayes_rule() {
        let means = [1.0f32, 0.0, -1.0, 0.5];
        let priors = log_priors(&[30, 10]);
        let z = [0.8f32, 0.1, 3.0];
        let mut out = Parts::default();
        unit_gaussian_parts(&z, 1, 3, 2, &means, &priors, &[0.0], &mut out);
        let joint: Vec<f64> = out.class_log_density.iter().zip(&priors).map(|(l, p)| l + p).collect();
        assert!((log_sum_exp(&joint) - out.log_density[0]).abs() < 1e-12);
        assert_eq!(out.predicted_class[0], 0);
        assert!((out.class_probability[0] - (joint[0] - out.log_density[0]).exp()).abs() < 1e-12);
        // ln N(z; (1, 0, 0), I) in closed form.
        let want = -0.5 * (0.04 + 0.01 + 9.0) - 1.5 * (2.0 * std::f64::consts::PI).ln();
        assert!((out.class_log_density[0] - want).abs() < 1e-6);
    }
}
