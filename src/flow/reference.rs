//! The same flow built from candle tensors with candle's autograd, in f64.
//! Tests hold the hand-written forward, backward and inverse to it.

use super::{Coupling, Dropout, Flow, HALF_LN_2PI};
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
        let (y2, ld) = match spec.coupling {
            Coupling::Affine => {
                let c = spec.clamp as f64;
                let s = ((net.narrow(1, 0, d2)? / c)?.tanh()? * c)?;
                let t = net.narrow(1, d2, d2)?;
                (((p2 * s.exp()?)? + t)?, s.sum(1)?)
            }
            Coupling::Spline { bins, tail_bound } => spline(&p2, &net, bins, tail_bound as f64)?,
        };
        logdet = (logdet + ld)?;
        h = Tensor::cat(&[&p1, &y2], 1)?;
    }
    Ok((h, logdet, vars))
}

/// Softmax over the last dimension, written out so that autograd sees it.
fn softmax_last(t: &Tensor) -> candle_core::Result<Tensor> {
    let e = t.broadcast_sub(&t.max_keepdim(2)?)?.exp()?;
    e.broadcast_div(&e.sum_keepdim(2)?)
}

/// The rational-quadratic spline coupling on `x` (`rows x d2`) with the
/// conditioner output `net` (`rows x d2 (3K - 1)`), elementwise on a tensor
/// `rows x d2 x K`: each element's bin is found from the values and enters
/// as a one-hot mask, so autograd differentiates the spline of that bin.
/// Returns `(y, per-row log-det)`.
fn spline(x: &Tensor, net: &Tensor, k: usize, bound: f64) -> candle_core::Result<(Tensor, Tensor)> {
    let dev = x.device();
    let (rows, d2) = x.dims2()?;
    let m = 3 * k - 1;
    let net = net.reshape((rows, d2, m))?;
    let (min_bin, min_d) = (1e-3, 1e-3);
    let spread = 1.0 - min_bin * k as f64;
    let widths = ((softmax_last(&net.narrow(2, 0, k)?)? * spread)? + min_bin)?.affine(2.0 * bound, 0.0)?;
    let heights = ((softmax_last(&net.narrow(2, k, k)?)? * spread)? + min_bin)?.affine(2.0 * bound, 0.0)?;
    // Left knots: -B plus the widths of every bin to the left (a product
    // with a strictly upper-triangular matrix of ones).
    let left: Vec<f64> = (0..k * k).map(|e| if e / k < e % k { 1.0 } else { 0.0 }).collect();
    let left = Tensor::from_vec(left, (k, k), dev)?;
    let cum = |t: &Tensor| -> candle_core::Result<Tensor> {
        t.reshape((rows * d2, k))?.matmul(&left)?.reshape((rows, d2, k))? - bound
    };
    let (xk, yk) = (cum(&widths)?, cum(&heights)?);
    let inner = net.narrow(2, 2 * k, k - 1)?;
    let softplus = (inner.exp()? + 1.0)?.log()?;
    let inner_d = ((softplus * ((1.0 - min_d) / std::f64::consts::LN_2))? + min_d)?;
    let ones = Tensor::ones((rows, d2, 1), DType::F64, dev)?;
    let d = Tensor::cat(&[&ones, &inner_d, &ones], 2)?;
    // One-hot bin masks from the values, and which elements are inside.
    let xs = x.to_vec2::<f64>()?;
    let knots = xk.to_vec3::<f64>()?;
    let mut onehot = vec![0.0f64; rows * d2 * k];
    let mut inside = vec![0.0f64; rows * d2];
    for r in 0..rows {
        for j in 0..d2 {
            // Outside elements run the spline at 0 (masked out below), which
            // keeps their arithmetic finite.
            let v = if xs[r][j] >= -bound && xs[r][j] < bound { xs[r][j] } else { 0.0 };
            inside[r * d2 + j] = if v == xs[r][j] { 1.0 } else { 0.0 };
            let b = (1..k).take_while(|&i| v >= knots[r][j][i]).count();
            onehot[(r * d2 + j) * k + b] = 1.0;
        }
    }
    let onehot = Tensor::from_vec(onehot, (rows, d2, k), dev)?;
    let inside = Tensor::from_vec(inside, (rows, d2), dev)?;
    let pick = |t: &Tensor| (t * &onehot)?.sum(2);
    let (wb, hb, xb, yb) = (pick(&widths)?, pick(&heights)?, pick(&xk)?, pick(&yk)?);
    let db = pick(&d.narrow(2, 0, k)?)?;
    let db1 = pick(&d.narrow(2, 1, k)?)?;
    let xin = (x * &inside)?;
    let s = (&hb / &wb)?;
    let xi = ((&xin - &xb)? / &wb)?;
    let q = (&xi * xi.affine(-1.0, 1.0)?)?;
    let num = (&hb * ((&s * xi.sqr()?)? + (&db * &q)?)?)?;
    let den = (&s + ((((&db1 + &db)? - (&s * 2.0)?)?) * &q)?)?;
    let y = (&yb + (&num / &den)?)?;
    let t = (((&db1 * xi.sqr()?)? + ((&s * 2.0)? * &q)?)? + (&db * xi.affine(-1.0, 1.0)?.sqr()?)?)?;
    let ld = (((s.log()? * 2.0)? + t.log()?)? - (den.log()? * 2.0)?)?;
    let outside = inside.affine(-1.0, 1.0)?;
    let y = ((&y * &inside)? + (x * &outside)?)?;
    let ld = (ld * &inside)?.sum(1)?;
    Ok((y, ld))
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
