//! The Gaussian kinds over whitened rows. The whitening already holds the
//! covariance (shrunk as chosen on the validation rows), so the density
//! left is the standard normal; with classes, a unit-covariance Gaussian
//! around each class's whitened mean (one shared covariance), weighted by
//! the class priors.

use super::{
    draw_classes, le_bytes_f32, unit_gaussian_parts, Density, Evaluate, Layout, Parts, Put, Stored, TensorSource,
};
use crate::error::Result;
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal};
use safetensors::Dtype;

/// Where a Gaussian's class means sit in a model file (the layout of a flow
/// without coupling layers, which earlier builds wrote for these kinds).
const CLASS_MEANS: &str = "flow.class_means";

#[derive(Clone, Debug)]
pub struct Gaussian {
    pub dim: usize,
    /// Class means over the leading `mean_dims` whitened dimensions
    /// (`classes x mean_dims`; the rest have mean 0).
    pub mean_dims: usize,
    pub class_means: Vec<f32>,
    /// ln of each class's prior (empty without classes).
    pub log_priors: Vec<f64>,
}

impl Stored for Gaussian {
    /// Reads the class means of each class over `mean_dims` dims.
    fn read(t: &dyn TensorSource, l: Layout) -> Result<Gaussian> {
        let class_means =
            if l.log_priors.is_empty() { Vec::new() } else { t.f32s(CLASS_MEANS, &[l.log_priors.len(), l.mean_dims])? };
        Ok(Gaussian { dim: l.dim, mean_dims: l.mean_dims, class_means, log_priors: l.log_priors })
    }
}

struct GaussianEvaluator<'a> {
    density: &'a Gaussian,
    zeros: Vec<f64>,
}

impl Evaluate for GaussianEvaluator<'_> {
    fn evaluate(&mut self, u: &[f32], rows: usize, out: &mut Parts) {
        let g = self.density;
        self.zeros.resize(rows, 0.0);
        unit_gaussian_parts(
            &u[..rows * g.dim],
            rows,
            g.dim,
            g.mean_dims,
            &g.class_means,
            &g.log_priors,
            &self.zeros,
            out,
        );
    }
}

impl Density for Gaussian {
    fn dim(&self) -> usize {
        self.dim
    }

    fn classes(&self) -> usize {
        self.log_priors.len()
    }

    fn components(&self) -> usize {
        0
    }

    fn evaluator(&self, _threads: usize, _cap: usize) -> Box<dyn Evaluate + '_> {
        Box::new(GaussianEvaluator { density: self, zeros: Vec::new() })
    }

    fn sample(&self, n: usize, rng: &mut StdRng) -> Vec<f32> {
        let (d, k) = (self.dim, self.mean_dims);
        let mut u: Vec<f32> = (0..n * d).map(|_| StandardNormal.sample(rng)).collect();
        if self.classes() > 0 {
            for (row, c) in u.chunks_mut(d).zip(draw_classes(&self.log_priors, n, rng)) {
                for (v, m) in row.iter_mut().zip(&self.class_means[c * k..(c + 1) * k]) {
                    *v += m;
                }
            }
        }
        u
    }

    fn fingerprint(&self, eat: &mut dyn FnMut(u64)) {
        for v in &self.class_means {
            eat(v.to_bits() as u64);
        }
    }

    fn write(&self, put: &mut Put) {
        if self.classes() > 0 {
            put(CLASS_MEANS, Dtype::F32, vec![self.classes(), self.mean_dims], le_bytes_f32(&self.class_means));
        }
    }

    fn boxed_clone(&self) -> Box<dyn Density> {
        Box::new(self.clone())
    }
}
