//! The same flow built from candle tensors with candle's autograd, in f64.
//! Tests hold the hand-written forward, backward and inverse to it.

use super::{Dropout, Flow, HALF_LN_2PI};
use candle_core::{DType, Device, Tensor, Var};

/// What the reference computes for a batch: the mean NLL, its gradient
/// with respect to every parameter (in the flat layout), the latent and the
/// per-row log-determinant.
pub struct Reference {
    pub mean_nll: f64,
    pub grad: Vec<f64>,
    pub z: Vec<f64>,
    pub logdet: Vec<f64>,
}

fn var(flow: &Flow, at: usize, shape: &[usize], dev: &Device) -> candle_core::Result<Var> {
    let n: usize = shape.iter().product();
    let vals: Vec<f64> = flow.params[at..at + n].iter().map(|&v| v as f64).collect();
    Var::from_tensor(&Tensor::from_vec(vals, shape, dev)?)
}

/// Forward map of the flow on `x` (`rows x dim`, f64), with the fast
/// path's dropout masks when `dropout` is given; returns (z, logdet) as
/// tensors plus the parameter variables in layout order.
fn forward(
    flow: &Flow,
    x: &Tensor,
    dropout: Option<Dropout>,
) -> candle_core::Result<(Tensor, Tensor, Vec<(usize, Var)>)> {
    let dev = x.device();
    let spec = &flow.spec;
    let (d1, d2) = spec.split();
    let rows = x.dim(0)?;
    let mut vars = Vec::new();
    let mut h = x.clone();
    let mut logdet = Tensor::zeros(rows, DType::F64, dev)?;
    for (k, slot) in flow.slots.iter().enumerate() {
        let ls = var(flow, slot.log_scale, &[spec.dim], dev)?;
        let b = var(flow, slot.bias, &[spec.dim], dev)?;
        let a = h.broadcast_mul(&ls.as_tensor().exp()?)?.broadcast_add(b.as_tensor())?;
        logdet = logdet.broadcast_add(&ls.as_tensor().sum_all()?)?;
        vars.push((slot.log_scale, ls));
        vars.push((slot.bias, b));
        let perm = Tensor::from_vec(flow.perms[k].clone(), spec.dim, dev)?;
        let mut p = a.index_select(&perm, 1)?;
        if let Some(at) = slot.mix {
            // W = L (U + diag(exp(lambda))) from one block: L strictly below
            // the diagonal (plus I), U strictly above, lambda on it.
            let m = var(flow, at, &[spec.dim, spec.dim], dev)?;
            let mask = |keep: &dyn Fn(usize, usize) -> bool| {
                let n = spec.dim;
                let v: Vec<f64> = (0..n * n).map(|e| if keep(e / n, e % n) { 1.0 } else { 0.0 }).collect();
                Tensor::from_vec(v, (n, n), dev)
            };
            let eye = Tensor::eye(spec.dim, DType::F64, dev)?;
            let lambda = (m.as_tensor() * &eye)?.sum(1)?;
            let l = ((m.as_tensor() * mask(&|i, j| j < i)?)? + &eye)?;
            let u = ((m.as_tensor() * mask(&|i, j| j > i)?)? + eye.broadcast_mul(&lambda.exp()?.unsqueeze(0)?)?)?;
            let w = l.matmul(&u)?;
            p = p.matmul(&w.t()?)?;
            logdet = logdet.broadcast_add(&lambda.sum_all()?)?;
            vars.push((at, m));
        }
        let p1 = p.narrow(1, 0, d1)?;
        let p2 = p.narrow(1, d1, d2)?;
        let mut net = p1.clone();
        for (i, lin) in slot.linears.iter().enumerate() {
            let w = var(flow, lin.weight, &[lin.out, lin.inp], dev)?;
            let bias = var(flow, lin.bias, &[lin.out], dev)?;
            net = net.matmul(&w.as_tensor().t()?)?.broadcast_add(bias.as_tensor())?;
            if i + 1 < slot.linears.len() {
                net = net.relu()?;
                if let Some(d) = dropout {
                    let keep = 1.0 / (1.0 - d.rate as f64);
                    let mask: Vec<f64> = (0..rows * lin.out)
                        .map(|e| if d.drops(k, i, e / lin.out, e % lin.out) { 0.0 } else { keep })
                        .collect();
                    net = (net * Tensor::from_vec(mask, (rows, lin.out), dev)?)?;
                }
            }
            vars.push((lin.weight, w));
            vars.push((lin.bias, bias));
        }
        let c = spec.clamp as f64;
        let s = ((net.narrow(1, 0, d2)? / c)?.tanh()? * c)?;
        let t = net.narrow(1, d2, d2)?;
        let y2 = ((p2 * s.exp()?)? + t)?;
        logdet = (logdet + s.sum(1)?)?;
        h = Tensor::cat(&[&p1, &y2], 1)?;
    }
    Ok((h, logdet, vars))
}

/// Mean NLL of `x` (with per-row class labels for a class-conditional
/// flow, and dropout masks when given) under the flow and its gradient, by candle autograd.
pub fn evaluate(
    flow: &Flow,
    x: &[f32],
    classes: Option<&[u32]>,
    rows: usize,
    dropout: Option<Dropout>,
) -> candle_core::Result<Reference> {
    let dev = Device::Cpu;
    let dim = flow.spec.dim;
    let xs: Vec<f64> = x[..rows * dim].iter().map(|&v| v as f64).collect();
    let x = Tensor::from_vec(xs, (rows, dim), &dev)?;
    let (z, logdet, mut vars) = forward(flow, &x, dropout)?;
    let centred = match classes {
        Some(c) => {
            let means = var(flow, flow.class_means, &[flow.spec.classes, dim], &dev)?;
            let per_row = means.as_tensor().index_select(&Tensor::from_vec(c[..rows].to_vec(), rows, &dev)?, 0)?;
            vars.push((flow.class_means, means));
            (&z - per_row)?
        }
        None => z.clone(),
    };
    let nll = (((centred.sqr()?.sum(1)? * 0.5)? + dim as f64 * HALF_LN_2PI)? - &logdet)?;
    let loss = nll.mean_all()?;
    let grads = loss.backward()?;
    let mut grad = vec![0.0f64; flow.params.len()];
    for (at, v) in &vars {
        let g = grads.get(v.as_tensor()).expect("every parameter reaches the loss");
        for (i, val) in g.flatten_all()?.to_vec1::<f64>()?.into_iter().enumerate() {
            grad[at + i] = val;
        }
    }
    Ok(Reference {
        mean_nll: loss.to_scalar::<f64>()?,
        grad,
        z: z.flatten_all()?.to_vec1::<f64>()?,
        logdet: logdet.to_vec1::<f64>()?,
    })
}

/// The forward map of a single row, in f64 (for finite differences).
pub fn map_row(flow: &Flow, x: &[f64]) -> candle_core::Result<Vec<f64>> {
    let t = Tensor::from_vec(x.to_vec(), (1, x.len()), &Device::Cpu)?;
    let (z, _, _) = forward(flow, &t, None)?;
    z.flatten_all()?.to_vec1::<f64>()
}
