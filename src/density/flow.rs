//! The flow: coupling layers over the leading whitened dimensions, a
//! standard normal on the rest, and (class-conditional) a base mean per
//! class. Also the flow's tensors in a model file, shared with the
//! background flow of the likelihood-ratio score.

use super::{
    draw_classes, le_bytes_f32, le_bytes_i64, unit_gaussian_parts, Density, Evaluate, Kind, Layout, Parts, Put, Stored,
    TensorSource,
};
use crate::error::{Error, Result};
use crate::flow::{self, Flow, FlowSpec, Workers};
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal};
use safetensors::Dtype;

/// A flow on the leading `flow.spec.dim` of `dim` whitened dimensions.
#[derive(Clone, Debug)]
pub struct FlowDensity {
    pub flow: Flow,
    pub dim: usize,
    /// ln of each class's prior (empty unless class-conditional).
    pub log_priors: Vec<f64>,
}

impl FlowDensity {
    pub fn new(flow: Flow, dim: usize, log_priors: Vec<f64>) -> FlowDensity {
        FlowDensity { flow, dim, log_priors }
    }

    fn class_means(&self) -> &[f32] {
        let f = &self.flow;
        &f.params[f.class_means..f.class_means + f.spec.classes * f.spec.dim]
    }
}

impl Stored for FlowDensity {
    fn read(t: &dyn TensorSource, l: Layout) -> Result<FlowDensity> {
        Ok(FlowDensity::new(read_flow(t, "flow", l.flow, l.version)?, l.dim, l.log_priors))
    }
}

struct FlowEvaluator<'a> {
    density: &'a FlowDensity,
    workers: Workers,
    head: Vec<f32>,
    z: Vec<f32>,
    log_det: Vec<f64>,
}

impl Evaluate for FlowEvaluator<'_> {
    fn evaluate(&mut self, u: &[f32], rows: usize, out: &mut Parts) {
        let f = self.density;
        let (d, k) = (f.dim, f.flow.spec.dim);
        crate::model::leading_columns_into(&u[..rows * d], d, k, &mut self.head);
        self.z.resize(rows * k, 0.0);
        self.log_det.resize(rows, 0.0);
        self.workers.latent(&f.flow, &self.head, rows, &mut self.z, &mut self.log_det);
        // The full latent: the flow's output, then the dimensions it leaves.
        let mut full = u[..rows * d].to_vec();
        for (row, zr) in full.chunks_exact_mut(d).zip(self.z.chunks_exact(k)) {
            row[..k].copy_from_slice(zr);
        }
        unit_gaussian_parts(&full, rows, d, k, f.class_means(), &f.log_priors, &self.log_det, out);
    }

    fn pool(&self) -> Option<&rayon::ThreadPool> {
        self.workers.pool()
    }
}

impl Density for FlowDensity {
    fn dim(&self) -> usize {
        self.dim
    }

    fn classes(&self) -> usize {
        self.flow.spec.classes
    }

    fn components(&self) -> usize {
        0
    }

    fn evaluator(&self, threads: usize, cap: usize) -> Box<dyn Evaluate + '_> {
        Box::new(FlowEvaluator {
            density: self,
            workers: Workers::forward_only(&self.flow, threads, cap),
            head: Vec::new(),
            z: Vec::new(),
            log_det: Vec::new(),
        })
    }

    /// A class from the priors, the base around its mean, the flow inverted
    /// on the leading dimensions.
    fn sample(&self, n: usize, rng: &mut StdRng) -> Vec<f32> {
        let (d, k) = (self.dim, self.flow.spec.dim);
        let mut u: Vec<f32> = (0..n * d).map(|_| StandardNormal.sample(rng)).collect();
        let mut head = Vec::with_capacity(n * k);
        crate::model::leading_columns_into(&u, d, k, &mut head);
        if self.classes() > 0 {
            for (row, c) in head.chunks_mut(k).zip(draw_classes(&self.log_priors, n, rng)) {
                for (v, m) in row.iter_mut().zip(self.flow.class_mean(c)) {
                    *v += m;
                }
            }
        }
        let x = flow::inverse(&self.flow, &head, n);
        for (row, xr) in u.chunks_exact_mut(d).zip(x.chunks_exact(k)) {
            row[..k].copy_from_slice(xr);
        }
        u
    }

    fn fingerprint(&self, eat: &mut dyn FnMut(u64)) {
        for v in &self.flow.params {
            eat(v.to_bits() as u64);
        }
    }

    fn write(&self, put: &mut Put) {
        write_flow(&self.flow, "flow", put);
    }

    fn boxed_clone(&self) -> Box<dyn Density> {
        Box::new(self.clone())
    }

    fn flow(&self) -> Option<&Flow> {
        Some(&self.flow)
    }

    fn flow_mut(&mut self) -> Option<&mut Flow> {
        Some(&mut self.flow)
    }
}

/// The flow's shape, for `inspect`.
pub fn describe_flow(spec: &FlowSpec, dim: usize) -> String {
    format!(
        "{} {} coupling layers over the leading {} of {} whitened dims; conditioner {} x {} (soft clamp {}); {}",
        spec.layers,
        match spec.coupling {
            crate::flow::Coupling::Affine => "affine".to_string(),
            crate::flow::Coupling::Spline { bins, tail_bound } => {
                format!("rational-quadratic spline ({bins} bins on [-{tail_bound}, {tail_bound}])")
            }
        },
        spec.dim,
        dim,
        spec.depth,
        spec.hidden,
        spec.clamp,
        match spec.mixing {
            crate::flow::Mixing::Permutation => "permutations between layers",
            crate::flow::Mixing::Lu => "permutations and learned LU mixing between layers",
        }
    )
}

/// Add a flow's tensors under `prefix` (`{prefix}.{layer}.actnorm.log_scale`, ...).
pub(crate) fn write_flow(flow: &Flow, prefix: &str, put: &mut Put) {
    let p = &flow.params;
    let dim = flow.spec.dim;
    for (k, slot) in flow.slots.iter().enumerate() {
        put(
            &format!("{prefix}.{k}.actnorm.log_scale"),
            Dtype::F32,
            vec![dim],
            le_bytes_f32(&p[slot.log_scale..slot.log_scale + dim]),
        );
        put(&format!("{prefix}.{k}.actnorm.bias"), Dtype::F32, vec![dim], le_bytes_f32(&p[slot.bias..slot.bias + dim]));
        let perm: Vec<usize> = flow.perms[k].iter().map(|&v| v as usize).collect();
        put(&format!("{prefix}.{k}.permutation"), Dtype::I64, vec![dim], le_bytes_i64(&perm));
        if let Some(mix) = slot.mix {
            put(&format!("{prefix}.{k}.mixing.lu"), Dtype::F32, vec![dim, dim], le_bytes_f32(&p[mix..mix + dim * dim]));
        }
        for (i, lin) in slot.linears.iter().enumerate() {
            let w = &p[lin.weight..lin.weight + lin.out * lin.inp];
            put(&format!("{prefix}.{k}.net.{i}.weight"), Dtype::F32, vec![lin.out, lin.inp], le_bytes_f32(w));
            put(
                &format!("{prefix}.{k}.net.{i}.bias"),
                Dtype::F32,
                vec![lin.out],
                le_bytes_f32(&p[lin.bias..lin.bias + lin.out]),
            );
        }
    }
    if flow.spec.classes > 0 {
        let means = &p[flow.class_means..flow.class_means + flow.spec.classes * dim];
        put(&format!("{prefix}.class_means"), Dtype::F32, vec![flow.spec.classes, dim], le_bytes_f32(means));
    }
}

/// Read a flow written by [`write_flow`]. Every tensor's shape is checked
/// before the flow is built, so the metadata cannot size the flow's
/// parameters beyond what the file holds.
pub(crate) fn read_flow(t: &dyn TensorSource, prefix: &str, spec: &FlowSpec, version: u32) -> Result<Flow> {
    let path = t.path();
    if version < crate::model::format_version_for(spec.mixing, Kind::Flow, false) {
        return Err(Error::model(path, format!("{prefix}: LU mixing in a version {version} model file")));
    }
    if version < 3 && spec.coupling != crate::flow::Coupling::Affine {
        return Err(Error::model(path, format!("{prefix}: spline couplings in a version {version} model file")));
    }
    let (dim, h) = (spec.dim, spec.hidden);
    let d1 = spec.split().0;
    let mut shapes = vec![(h, d1)];
    shapes.extend(std::iter::repeat_n((h, h), spec.depth - 1));
    shapes.push((spec.conditioner_out(), h));
    let mut values = Vec::new();
    for k in 0..spec.layers {
        values.push(t.f32s(&format!("{prefix}.{k}.actnorm.log_scale"), &[dim])?);
        values.push(t.f32s(&format!("{prefix}.{k}.actnorm.bias"), &[dim])?);
        if spec.mixing == crate::flow::Mixing::Lu {
            values.push(t.f32s(&format!("{prefix}.{k}.mixing.lu"), &[dim, dim])?);
        }
        for (i, &(out, inp)) in shapes.iter().enumerate() {
            values.push(t.f32s(&format!("{prefix}.{k}.net.{i}.weight"), &[out, inp])?);
            values.push(t.f32s(&format!("{prefix}.{k}.net.{i}.bias"), &[out])?);
        }
    }
    if spec.classes > 0 {
        values.push(t.f32s(&format!("{prefix}.class_means"), &[spec.classes, dim])?);
    }
    let mut perms = Vec::with_capacity(spec.layers);
    for k in 0..spec.layers {
        let name = format!("{prefix}.{k}.permutation");
        let perm = t.indices(&name, dim)?;
        let mut seen = vec![false; dim];
        for &p in &perm {
            if p >= dim || std::mem::replace(&mut seen[p], true) {
                return Err(Error::model(path, format!("tensor '{name}' is not a permutation")));
            }
        }
        perms.push(perm.iter().map(|&p| p as u32).collect());
    }
    // The values above are in the order of the flow's parameter layout.
    let mut flow = Flow::new(spec.clone(), 0);
    let mut at = 0;
    for v in values {
        flow.params[at..at + v.len()].copy_from_slice(&v);
        at += v.len();
    }
    if at != flow.params.len() {
        return Err(Error::model(path, format!("{prefix}: parameter count does not match the flow's shape")));
    }
    flow.perms = perms;
    Ok(flow)
}
