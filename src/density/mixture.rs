//! The Gaussian mixture over whitened rows (the fitting, EM, is in
//! [`crate::mixture`]): its latent for a row is the row's whitened offset
//! from the most responsible component. With classes, each class has its
//! own components, weighted within the class and then by the class prior,
//! so that p(u) = sum_c pi_c p(u | c) is itself one mixture.

use super::{argmax, le_bytes_f64, le_bytes_i64, Density, Evaluate, Layout, Parts, Put, Stored, TensorSource};
use crate::error::{Error, Result};
use crate::mixture::Mixture;
use rand::rngs::StdRng;
use safetensors::Dtype;

#[derive(Clone, Debug)]
pub struct MixtureDensity {
    pub mixture: Mixture,
    /// The class of each component (empty without classes).
    pub component_class: Vec<usize>,
    /// ln of each class's prior (empty without classes).
    pub log_priors: Vec<f64>,
}

/// Where the class of each component sits in a model file.
const COMPONENT_CLASS: &str = "mixture.component_class";

impl Stored for MixtureDensity {
    /// A mixture of `components` components over `dim` dims: weights that are
    /// log-probabilities summing to 1, finite means, and precision factors
    /// that are upper triangular with a positive diagonal; with classes,
    /// every class owns a component and its components' weights sum to its
    /// prior.
    fn read(t: &dyn TensorSource, l: Layout) -> Result<MixtureDensity> {
        let (c, d, log_priors) = (l.components, l.dim, l.log_priors);
        let log_weights = t.f64s("mixture.log_weights", &[c])?;
        let means = t.f64s("mixture.means", &[c, d])?;
        let precision_cholesky = t.f64s("mixture.precision_cholesky", &[c, d, d])?;
        let total = crate::linalg::log_sum_exp(&log_weights);
        if log_weights.iter().any(|w| !(w.is_finite() && *w <= 0.0)) || (total.abs() > 1e-6) {
            return Err(Error::model(
                t.path(),
                "tensor 'mixture.log_weights' does not hold log-probabilities summing to 1",
            ));
        }
        for w in precision_cholesky.chunks(d * d) {
            let upper = (0..d).all(|i| w[i * d + i] > 0.0 && (0..i).all(|j| w[i * d + j] == 0.0));
            if !upper {
                return Err(Error::model(
                    t.path(),
                    "tensor 'mixture.precision_cholesky' holds a factor that is not upper triangular with a positive diagonal",
                ));
            }
        }
        let mixture = Mixture { dim: d, log_weights, means, precision_cholesky };
        let component_class = if log_priors.is_empty() { Vec::new() } else { t.indices(COMPONENT_CLASS, c)? };
        if component_class.iter().any(|&k| k >= log_priors.len()) {
            return Err(Error::model(t.path(), format!("tensor '{COMPONENT_CLASS}' names a class the model lacks")));
        }
        for (class, prior) in log_priors.iter().enumerate() {
            let weights: Vec<f64> = (component_class.iter().zip(&mixture.log_weights))
                .filter(|(&k, _)| k == class)
                .map(|(_, &w)| w)
                .collect();
            if weights.is_empty() || (crate::linalg::log_sum_exp(&weights) - prior).abs() > 1e-6 {
                return Err(Error::model(
                    t.path(),
                    format!(
                        "tensor '{COMPONENT_CLASS}' gives class {class} no components or weights that do not sum to its prior"
                    ),
                ));
            }
        }
        Ok(MixtureDensity { mixture, component_class, log_priors })
    }
}

struct MixtureEvaluator<'a> {
    density: &'a MixtureDensity,
    u: Vec<f64>,
    /// Runs the blocks of rows (one thread when scoring is asked for one).
    pool: rayon::ThreadPool,
    threads: usize,
}

impl Evaluate for MixtureEvaluator<'_> {
    fn evaluate(&mut self, u: &[f32], rows: usize, out: &mut Parts) {
        let m = self.density;
        self.u.clear();
        self.u.extend(u[..rows * m.mixture.dim].iter().map(|&v| v as f64));
        let classes = m.log_priors.len();
        let e = self.pool.install(|| m.mixture.evaluate_grouped(&self.u, rows, &m.component_class, classes));
        // ln p(u | c) = ln [pi_c p(u | c)] - ln pi_c; the posterior by Bayes' rule.
        for (joint, total) in e.group_log_joint.chunks(classes.max(1)).zip(&e.log_density) {
            let (best, top) = argmax(joint);
            out.predicted_class.push(best);
            out.class_probability.push((top - total).exp());
            out.class_log_density.extend(joint.iter().zip(&m.log_priors).map(|(j, p)| j - p));
        }
        out.log_density.extend(&e.log_density);
        out.base_log_density.extend(&e.log_density);
        out.log_det.extend(std::iter::repeat_n(0.0, rows));
        out.latent_norm.extend(e.mahalanobis_sq.iter().map(|q| q.sqrt()));
        out.mahalanobis_sq.extend(&e.mahalanobis_sq);
        out.component.extend(e.component);
        out.component_probability.extend(e.probability);
    }

    fn pool(&self) -> Option<&rayon::ThreadPool> {
        (self.threads > 1).then_some(&self.pool)
    }
}

impl Density for MixtureDensity {
    fn dim(&self) -> usize {
        self.mixture.dim
    }

    fn classes(&self) -> usize {
        self.log_priors.len()
    }

    fn components(&self) -> usize {
        self.mixture.components()
    }

    fn evaluator(&self, threads: usize, _cap: usize) -> Box<dyn Evaluate + '_> {
        Box::new(MixtureEvaluator { density: self, u: Vec::new(), pool: crate::mixture::pool(threads), threads })
    }

    fn sample(&self, n: usize, rng: &mut StdRng) -> Vec<f32> {
        self.mixture.sample(n, rng).iter().map(|&v| v as f32).collect()
    }

    fn fingerprint(&self, eat: &mut dyn FnMut(u64)) {
        let m = &self.mixture;
        for v in m.log_weights.iter().chain(&m.means).chain(&m.precision_cholesky) {
            eat(v.to_bits());
        }
        for &k in &self.component_class {
            eat(k as u64);
        }
    }

    fn write(&self, put: &mut Put) {
        let m = &self.mixture;
        let (c, d) = (m.components(), m.dim);
        put("mixture.log_weights", Dtype::F64, vec![c], le_bytes_f64(&m.log_weights));
        put("mixture.means", Dtype::F64, vec![c, d], le_bytes_f64(&m.means));
        put("mixture.precision_cholesky", Dtype::F64, vec![c, d, d], le_bytes_f64(&m.precision_cholesky));
        if !self.component_class.is_empty() {
            put(COMPONENT_CLASS, Dtype::I64, vec![c], le_bytes_i64(&self.component_class));
        }
    }

    fn boxed_clone(&self) -> Box<dyn Density> {
        Box::new(self.clone())
    }
}
