//! A flow's shape and parameters: the spec, where each layer's parameters
//! sit in the one flat vector, and their initialisation (identity start,
//! data-dependent ActNorm).

use super::{enter_first_layer, forward_layer, spline, Workspace};
use rand::rngs::StdRng;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};

/// Shape of a flow; everything needed to lay out its parameters.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FlowSpec {
    /// Number of features the flow transforms.
    pub dim: usize,
    /// Number of coupling layers (each with its own ActNorm and permutation).
    pub layers: usize,
    /// Width of the conditioner's hidden layers.
    pub hidden: usize,
    /// Number of hidden layers in each conditioner (at least 1).
    pub depth: usize,
    /// Soft clamp `c` of the log-scale: `s = c * tanh(r / c)`.
    pub clamp: f32,
    /// Classes with a learned base mean each (0: one standard normal base).
    #[serde(default)]
    pub classes: usize,
    /// What mixes features between coupling layers.
    #[serde(default)]
    pub mixing: Mixing,
    /// How a coupling layer transforms its second half.
    #[serde(default)]
    pub coupling: Coupling,
}

/// The transform of a coupling layer's second half, given the conditioner's
/// output on the first half.
#[derive(Clone, Copy, Debug, Default, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum Coupling {
    /// `y = x e^s + t`, with a soft-clamped log-scale `s`.
    #[default]
    Affine,
    /// A monotone rational-quadratic spline of `bins` bins on
    /// `[-tail_bound, tail_bound]`, the identity outside (see [`spline`]).
    Spline { bins: usize, tail_bound: f32 },
}

/// What mixes features between coupling layers.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum Mixing {
    /// A fixed, seeded permutation.
    #[default]
    Permutation,
    /// The permutation followed by a learned LU-parameterised linear map.
    Lu,
}

/// Where one linear layer's weight (`out x inp`, row-major) and bias live in
/// the flat parameter vector.
#[derive(Clone, Debug)]
pub struct LinearSlot {
    pub weight: usize,
    pub bias: usize,
    pub out: usize,
    pub inp: usize,
}

/// Where one coupling layer's parameters live in the flat parameter vector.
#[derive(Clone, Debug)]
pub struct LayerSlots {
    pub log_scale: usize,
    pub bias: usize,
    /// The LU mixing map's `dim x dim` block (with [`Mixing::Lu`]): L below
    /// the diagonal, U above it, lambda on it.
    pub mix: Option<usize>,
    pub linears: Vec<LinearSlot>,
}

impl FlowSpec {
    /// Sizes of the two halves: `d1` conditions, `d2` is transformed.
    pub fn split(&self) -> (usize, usize) {
        let d1 = self.dim / 2;
        (d1, self.dim - d1)
    }

    /// Width of the conditioner's output: what the coupling needs per
    /// transformed feature, times `d2`.
    pub fn conditioner_out(&self) -> usize {
        let d2 = self.split().1;
        match self.coupling {
            Coupling::Affine => 2 * d2,
            Coupling::Spline { bins, .. } => d2 * spline::params_per_element(bins),
        }
    }

    /// Offsets of every layer's parameters, of the class means (`classes x
    /// dim`, after all layers), and the total parameter count.
    pub fn layout(&self) -> (Vec<LayerSlots>, usize, usize) {
        let d1 = self.split().0;
        let mut next = 0usize;
        let mut take = |n: usize| {
            let at = next;
            next += n;
            at
        };
        let mut layers = Vec::with_capacity(self.layers);
        for _ in 0..self.layers {
            let log_scale = take(self.dim);
            let bias = take(self.dim);
            let mix = (self.mixing == Mixing::Lu).then(|| take(self.dim * self.dim));
            let mut shapes = vec![(self.hidden, d1)];
            shapes.extend(std::iter::repeat_n((self.hidden, self.hidden), self.depth - 1));
            shapes.push((self.conditioner_out(), self.hidden));
            let linears = shapes
                .into_iter()
                .map(|(out, inp)| LinearSlot { weight: take(out * inp), bias: take(out), out, inp })
                .collect();
            layers.push(LayerSlots { log_scale, bias, mix, linears });
        }
        let class_means = take(self.classes * self.dim);
        (layers, class_means, next)
    }
}

/// A flow's parameters and permutations.
#[derive(Clone, Debug)]
pub struct Flow {
    pub spec: FlowSpec,
    pub slots: Vec<LayerSlots>,
    /// Offset of the class means in `params`.
    pub class_means: usize,
    /// All trainable parameters, one flat vector (the optimizer works on it whole).
    pub params: Vec<f32>,
    /// For each layer, `perm[j]` is the input feature placed at position `j`.
    pub perms: Vec<Vec<u32>>,
}

impl Flow {
    /// A new flow that is exactly the identity: ActNorm at scale 1 and shift 0,
    /// and every conditioner's last layer zero, so `s = t = 0`. Hidden layers
    /// start uniform in +-1/sqrt(fan_in) so that training can break symmetry.
    pub fn new(spec: FlowSpec, seed: u64) -> Flow {
        assert!(spec.depth >= 1, "a conditioner needs at least one hidden layer");
        assert!(spec.layers == 0 || spec.dim >= 2, "coupling needs at least two features");
        if let Coupling::Spline { bins, .. } = spec.coupling {
            assert!((2..=spline::MAX_BINS).contains(&bins), "spline bins out of range");
        }
        let (slots, class_means, total) = spec.layout();
        let mut rng = StdRng::seed_from_u64(seed);
        let mut params = vec![0.0f32; total];
        for layer in &slots {
            let hidden_linears = &layer.linears[..layer.linears.len() - 1];
            for lin in hidden_linears {
                let bound = 1.0 / (lin.inp.max(1) as f32).sqrt();
                for w in &mut params[lin.weight..lin.weight + lin.out * lin.inp] {
                    *w = rng.random_range(-bound..bound);
                }
            }
        }
        let perms = (0..spec.layers)
            .map(|_| {
                let mut p: Vec<u32> = (0..spec.dim as u32).collect();
                p.shuffle(&mut rng);
                p
            })
            .collect();
        Flow { spec, slots, class_means, params, perms }
    }

    /// Reset ActNorm to the identity and zero every conditioner's output
    /// layer: the flow becomes the identity map (used as the "no flow" model).
    pub fn make_identity(&mut self) {
        let dim = self.spec.dim;
        for layer in &self.slots {
            self.params[layer.log_scale..layer.log_scale + 2 * dim].fill(0.0);
            if let Some(mix) = layer.mix {
                self.params[mix..mix + dim * dim].fill(0.0);
            }
            let last = layer.linears.last().expect("conditioner has layers");
            self.params[last.weight..last.weight + last.out * last.inp + last.out].fill(0.0);
        }
    }

    /// Data-dependent ActNorm initialisation: each layer's ActNorm is set so
    /// that its output on `x` has zero mean and unit variance per feature,
    /// layer after layer.
    pub fn init_actnorm(&mut self, x: &[f32], rows: usize) {
        let dim = self.spec.dim;
        // At the identity, the permuted ActNorm output a layer's predecessor
        // writes is exactly that layer's input, permuted.
        for slot in &self.slots {
            self.params[slot.log_scale..slot.log_scale + 2 * dim].fill(0.0);
        }
        let mut ws = Workspace::forward_only(&self.spec, rows);
        for k in 0..self.spec.layers {
            if k == 0 {
                enter_first_layer(self, &mut ws, x, rows);
            }
            let slot = &self.slots[k];
            let at = (k % ws.kept) * ws.cap * dim;
            let p = &mut ws.perm[at..at + rows * dim];
            for (q, &src) in self.perms[k].iter().enumerate() {
                let mean = (0..rows).map(|r| p[r * dim + q] as f64).sum::<f64>() / rows as f64;
                let var = (0..rows).map(|r| (p[r * dim + q] as f64 - mean).powi(2)).sum::<f64>() / rows as f64;
                let log_scale = (-0.5 * (var + 1e-6).ln()) as f32;
                let bias = (-mean * (log_scale as f64).exp()) as f32;
                self.params[slot.log_scale + src as usize] = log_scale;
                self.params[slot.bias + src as usize] = bias;
                let scale = log_scale.exp();
                for r in 0..rows {
                    p[r * dim + q] = p[r * dim + q] * scale + bias;
                }
            }
            forward_layer(self, k, &mut ws, rows, None);
        }
    }

    pub fn param_count(&self) -> usize {
        self.params.len()
    }

    /// Base mean of class `c` (class-conditional flows).
    pub fn class_mean(&self, c: usize) -> &[f32] {
        let at = self.class_means + c * self.spec.dim;
        &self.params[at..at + self.spec.dim]
    }
}
