//! The Gaussian mixture over whitened rows (the fitting, EM, is in
//! [`crate::mixture`]): its latent for a row is the row's whitened offset
//! from the most responsible component.

use super::{le_bytes_f64, Density, Evaluate, Parts, Put, TensorSource};
use crate::error::{Error, Result};
use crate::mixture::Mixture;
use rand::rngs::StdRng;
use safetensors::Dtype;

#[derive(Clone, Debug)]
pub struct MixtureDensity {
    pub mixture: Mixture,
}

impl MixtureDensity {
    /// A mixture of `c` components over `d` dims: weights that are
    /// log-probabilities summing to 1, finite means, and precision factors
    /// that are upper triangular with a positive diagonal.
    pub(crate) fn read(t: &dyn TensorSource, c: usize, d: usize) -> Result<MixtureDensity> {
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
        Ok(MixtureDensity { mixture: Mixture { dim: d, log_weights, means, precision_cholesky } })
    }
}

struct MixtureEvaluator<'a> {
    mixture: &'a Mixture,
    u: Vec<f64>,
}

impl Evaluate for MixtureEvaluator<'_> {
    fn evaluate(&mut self, u: &[f32], rows: usize, out: &mut Parts) {
        self.u.clear();
        self.u.extend(u[..rows * self.mixture.dim].iter().map(|&v| v as f64));
        let e = self.mixture.evaluate(&self.u, rows);
        out.log_density.extend(&e.log_density);
        out.base_log_density.extend(&e.log_density);
        out.log_det.extend(std::iter::repeat_n(0.0, rows));
        out.latent_norm.extend(e.mahalanobis_sq.iter().map(|q| q.sqrt()));
        out.mahalanobis_sq.extend(&e.mahalanobis_sq);
        out.component.extend(e.component);
        out.component_probability.extend(e.probability);
    }
}

impl Density for MixtureDensity {
    fn dim(&self) -> usize {
        self.mixture.dim
    }

    fn classes(&self) -> usize {
        0
    }

    fn components(&self) -> usize {
        self.mixture.components()
    }

    fn evaluator(&self, _threads: usize, _cap: usize) -> Box<dyn Evaluate + '_> {
        Box::new(MixtureEvaluator { mixture: &self.mixture, u: Vec::new() })
    }

    fn sample(&self, n: usize, rng: &mut StdRng) -> Vec<f32> {
        self.mixture.sample(n, rng).iter().map(|&v| v as f32).collect()
    }

    fn fingerprint(&self, eat: &mut dyn FnMut(u64)) {
        let m = &self.mixture;
        for v in m.log_weights.iter().chain(&m.means).chain(&m.precision_cholesky) {
            eat(v.to_bits());
        }
    }

    fn write(&self, put: &mut Put) {
        let m = &self.mixture;
        let (c, d) = (m.components(), m.dim);
        put("mixture.log_weights", Dtype::F64, vec![c], le_bytes_f64(&m.log_weights));
        put("mixture.means", Dtype::F64, vec![c, d], le_bytes_f64(&m.means));
        put("mixture.precision_cholesky", Dtype::F64, vec![c, d, d], le_bytes_f64(&m.precision_cholesky));
    }

    fn boxed_clone(&self) -> Box<dyn Density> {
        Box::new(self.clone())
    }
}
