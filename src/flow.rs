//! The normalizing flow: a stack of RealNVP-style affine coupling layers with
//! ActNorm and fixed permutations, over a standard normal base.
//!
//! Each layer maps its input `x` (D features) to `y`:
//!   a = x * exp(log_scale) + bias            (ActNorm)
//!   p = a[perm]                              (fixed, seeded permutation)
//!   p1 = p[..d1], p2 = p[d1..]
//!   (r, t) = MLP(p1);  s = c * tanh(r / c)   (soft-clamped log-scale)
//!   y = [p1, p2 * exp(s) + t]
//! log|det dy/dx| = sum(log_scale) + sum(s).
//!
//! Optionally ([`Mixing::Lu`]) a learned invertible linear map follows the
//! permutation: p <- W p with W = L (U + diag(exp(lambda))), L unit lower-
//! and U strictly upper-triangular (an LU parameterisation), adding
//! sum(lambda) to the log-determinant. It starts at W = I.
//!
//! The forward pass, its backward pass and the inverse are written by hand
//! over flat f32 buffers with a reusable [`Workspace`], so a training step
//! allocates nothing once the workspace exists. The candle implementation in
//! `reference.rs` computes the same function with autograd and the tests hold
//! this one to it.

use crate::data::mix64;
use crate::linalg::{matmul, View};
use crate::simd::elementwise;
use lu::{unmix_rows, MixBuffers};

/// `0.5 * ln(2 * pi)`, the per-dimension constant of the standard normal.
pub const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

/// Dropout in the conditioner's hidden layers during training. Masks are a
/// function of (seed, layer, hidden layer, global row), so they do not depend
/// on how rows are split across threads.
#[derive(Clone, Copy, Debug)]
pub struct Dropout {
    pub rate: f32,
    pub seed: u64,
    /// Index of the first row of this chunk within the whole batch.
    pub row_offset: usize,
}

impl Dropout {
    /// Key of the mask of one row of one conditioner hidden layer.
    fn row_key(&self, layer: usize, hidden: usize, r: usize) -> u32 {
        let unit = ((layer * 64 + hidden) as u64) << 40;
        mix(self.seed ^ mix(unit ^ (self.row_offset + r) as u64)) as u32
    }

    /// Entries whose mask hash falls below this are dropped.
    fn threshold(&self) -> u32 {
        (self.rate as f64 * u32::MAX as f64) as u32
    }

    /// Whether entry `j` of row `r` of hidden layer `hidden` of coupling
    /// layer `layer` is dropped.
    #[cfg(test)]
    fn drops(&self, layer: usize, hidden: usize, r: usize, j: usize) -> bool {
        mask_hash(self.row_key(layer, hidden, r), j) < self.threshold()
    }
}

/// The mask hash of entry `j` of a row: a multiply-xorshift finaliser on
/// 32-bit lanes, so the loops using it vectorise.
#[inline(always)]
fn mask_hash(key: u32, j: usize) -> u32 {
    let mut h = key ^ (j as u32).wrapping_mul(0x9E37_79B9);
    h ^= h >> 16;
    h = h.wrapping_mul(0x7FEB_352D);
    h ^= h >> 15;
    h = h.wrapping_mul(0x846C_A68B);
    h ^ (h >> 16)
}

/// Preallocated buffers for up to `cap` rows: every layer's input, permuted
/// ActNorm output, hidden activations and log-scales, plus backward scratch.
pub struct Workspace {
    pub cap: usize,
    /// Per-layer blocks kept: all layers for training, two (in turn) for the
    /// forward pass alone; layer k uses block `k % kept`.
    kept: usize,
    /// The latent `z` (`cap x dim`).
    latent: Vec<f32>,
    /// `kept` blocks of `cap x dim`: a layer's input after its ActNorm and
    /// permutation.
    perm: Vec<f32>,
    hidden: Vec<f32>,
    s: Vec<f32>,
    es: Vec<f32>,
    /// The conditioner's output: one row block for affine couplings (its
    /// log-scales are kept in `s` and `es`), `kept` blocks for splines,
    /// whose backward pass recomputes from it.
    out: Vec<f32>,
    /// Per-row log-determinant of the whole flow.
    pub logdet: Vec<f64>,
    g: Vec<f32>,
    gout: Vec<f32>,
    gh_a: Vec<f32>,
    gh_b: Vec<f32>,
    /// Column sums of the running conditioner gradient (its bias gradient).
    gsum: Vec<f32>,
    /// 1 / (1 - dropout rate) of the last forward pass.
    keep_inv: f32,
    /// ActNorm's scale and shift in permuted order, and (backward) their
    /// gradients.
    an_scale: Vec<f32>,
    an_shift: Vec<f32>,
    an_gscale: Vec<f32>,
    an_gshift: Vec<f32>,
    /// One row of a coupling layer's output, before the next ActNorm.
    row: Vec<f32>,
    /// LU mixing's buffers (empty without it).
    mix: MixBuffers,
}

impl Workspace {
    /// Buffers for training: every layer's activations are kept for the
    /// backward pass.
    pub fn new(spec: &FlowSpec, cap: usize) -> Workspace {
        Workspace::with_blocks(spec, cap, spec.layers, true)
    }

    /// Buffers for the forward pass alone: layers take turns in two blocks,
    /// so activation memory does not grow with depth (scoring, initialisation).
    pub fn forward_only(spec: &FlowSpec, cap: usize) -> Workspace {
        Workspace::with_blocks(spec, cap, spec.layers.min(2), false)
    }

    fn with_blocks(spec: &FlowSpec, cap: usize, kept: usize, backward: bool) -> Workspace {
        let d2 = spec.split().1;
        let (dim, h, w) = (spec.dim, spec.hidden, spec.conditioner_out());
        let affine = spec.coupling == Coupling::Affine;
        let back = |n: usize| vec![0.0; if backward { n } else { 0 }];
        let lu = |n: usize| vec![0.0; if spec.mixing == Mixing::Lu { n } else { 0 }];
        Workspace {
            cap,
            kept,
            latent: vec![0.0; cap * dim],
            perm: vec![0.0; kept * cap * dim],
            hidden: vec![0.0; kept * spec.depth * cap * h],
            s: vec![0.0; if affine { kept * cap * d2 } else { 0 }],
            es: vec![0.0; if affine { kept * cap * d2 } else { 0 }],
            out: vec![0.0; if affine { cap * w } else { kept * cap * w }],
            logdet: vec![0.0; cap],
            g: back(cap * dim),
            gout: back(cap * w),
            gh_a: back(cap * h),
            gh_b: back(cap * h),
            gsum: vec![0.0; w.max(h)],
            keep_inv: 1.0,
            an_scale: vec![0.0; spec.dim],
            an_shift: vec![0.0; spec.dim],
            an_gscale: vec![0.0; spec.dim],
            an_gshift: vec![0.0; spec.dim],
            row: vec![0.0; spec.dim],
            mix: MixBuffers {
                cap,
                unmixed: lu(kept * cap * dim),
                w: lu(spec.layers * dim * dim),
                source: if spec.mixing == Mixing::Lu { vec![f32::NAN; spec.layers * dim * dim] } else { Vec::new() },
                l: lu(dim * dim),
                u: lu(dim * dim),
                gw: if backward { lu(dim * dim) } else { Vec::new() },
                t: if backward { lu(dim * dim) } else { Vec::new() },
                g_unmixed: if backward { lu(cap * dim) } else { Vec::new() },
            },
        }
    }

    /// The latent vectors of the last forward pass (`rows x dim`).
    pub fn latent(&self, dim: usize, rows: usize) -> &[f32] {
        &self.latent[..rows * dim]
    }
}

/// A step of splitmix64: a tiny, well-mixed hash for dropout mask keys.
fn mix(z: u64) -> u64 {
    mix64(z.wrapping_add(0x9E37_79B9_7F4A_7C15))
}

/// `out = inp * W^T` (rows x out); the bias is added by the caller, fused
/// with what follows.
fn linear_forward(params: &[f32], lin: &LinearSlot, inp: View<'_, f32>, out: &mut [f32]) {
    let w = View::transposed(&params[lin.weight..lin.weight + lin.out * lin.inp], lin.out, lin.inp);
    matmul(out, lin.out, false, inp, w);
}

/// The conditioner of layer `k` on `inp` (rows x d1): hidden activations go
/// to `hidden` (depth blocks, `block` apart), `(r, t)` to `out` (rows x 2*d2).
fn run_conditioner(
    flow: &Flow,
    k: usize,
    inp: View<'_, f32>,
    hidden: &mut [f32],
    block: usize,
    out: &mut [f32],
    dropout: Option<(Dropout, usize)>,
) {
    let (spec, slot, params) = (&flow.spec, &flow.slots[k], &flow.params);
    let (rows, hid) = (inp.rows, spec.hidden);
    for i in 0..spec.depth {
        let (prev, cur) = hidden.split_at_mut(i * block);
        let cur = &mut cur[..rows * hid];
        let layer_in = if i == 0 { inp } else { View::rows(&prev[(i - 1) * block..], rows, hid, hid) };
        let lin = &slot.linears[i];
        linear_forward(params, lin, layer_in, cur);
        // Bias, ReLU and dropout in one pass.
        let bias = &params[lin.bias..lin.bias + hid];
        match dropout {
            Some((d, layer)) if d.rate > 0.0 => {
                let scale = 1.0 / (1.0 - d.rate);
                for r in 0..rows {
                    let key = d.row_key(layer, i, r);
                    bias_relu_dropout(&mut cur[r * hid..(r + 1) * hid], bias, key, d.threshold(), scale);
                }
            }
            _ => bias_relu(cur, bias),
        }
    }
    let last = &slot.linears[spec.depth];
    let last_in = View::rows(&hidden[(spec.depth - 1) * block..], rows, hid, hid);
    linear_forward(params, last, last_in, out);
    let bias = &params[last.bias..last.bias + last.out];
    for row in out[..rows * last.out].chunks_exact_mut(last.out) {
        for (v, b) in row.iter_mut().zip(bias) {
            *v += b;
        }
    }
}

/// ActNorm's scale `exp(log_scale)` and shift of layer `k`, in the layer's
/// permuted order.
fn permuted_actnorm(flow: &Flow, k: usize, scale: &mut [f32], shift: &mut [f32]) {
    let slot = &flow.slots[k];
    for (j, &src) in flow.perms[k].iter().enumerate() {
        scale[j] = flow.params[slot.log_scale + src as usize].exp();
        shift[j] = flow.params[slot.bias + src as usize];
    }
}

/// Layer 0's permuted ActNorm output from the flow's input `x`.
fn enter_first_layer(flow: &Flow, ws: &mut Workspace, x: &[f32], rows: usize) {
    let dim = flow.spec.dim;
    permuted_actnorm(flow, 0, &mut ws.an_scale, &mut ws.an_shift);
    for r in 0..rows {
        let p = &mut ws.perm[r * dim..(r + 1) * dim];
        actnorm_permute_row(&x[r * dim..(r + 1) * dim], &flow.perms[0], &ws.an_scale, &ws.an_shift, p);
    }
}

/// Forward pass of layer `k` over the first `rows` rows of the workspace:
/// reads block k of `perm` and writes the next layer's block of `perm`
/// (its ActNorm and permutation applied on the way, so the coupling output
/// never makes a round trip through memory) or, after the last layer, the
/// latent; adds to `logdet`.
fn forward_layer(flow: &Flow, k: usize, ws: &mut Workspace, rows: usize, dropout: Option<Dropout>) {
    let spec = &flow.spec;
    let (dim, hid, cap) = (spec.dim, spec.hidden, ws.cap);
    let (d1, d2) = spec.split();
    let slot = &flow.slots[k];
    let log_scale = &flow.params[slot.log_scale..slot.log_scale + dim];
    let mut layer_logdet: f64 = log_scale.iter().map(|&v| v as f64).sum();
    if let Some(mix) = slot.mix {
        let b = k % ws.kept;
        let p = &mut ws.perm[b * ws.cap * dim..b * ws.cap * dim + rows * dim];
        layer_logdet += ws.mix.forward(&flow.params[mix..mix + dim * dim], dim, k, b, p);
    }
    let last = k + 1 == spec.layers;
    if !last {
        permuted_actnorm(flow, k + 1, &mut ws.an_scale, &mut ws.an_shift);
    }
    let (b, block) = (k % ws.kept, cap * dim);
    let (p, next) = if last {
        (&ws.perm[b * block..b * block + rows * dim], &mut ws.latent[..rows * dim])
    } else {
        // The next layer's block is b + 1, or 0 when the two blocks of a
        // forward-only workspace wrap around.
        let nb = (k + 1) % ws.kept;
        let (lo, hi) = ws.perm.split_at_mut(b.max(nb) * block);
        if nb > b {
            (&lo[b * block..b * block + rows * dim], &mut hi[..rows * dim])
        } else {
            (&hi[..rows * dim], &mut lo[nb * block..nb * block + rows * dim])
        }
    };

    // Conditioner MLP on p1 = p[:, ..d1].
    let hidden_block = cap * hid;
    let layer_hidden = &mut ws.hidden[b * spec.depth * hidden_block..(b + 1) * spec.depth * hidden_block];
    let w = spec.conditioner_out();
    let out_block = if spec.coupling == Coupling::Affine { 0 } else { b * cap * w };
    let out = &mut ws.out[out_block..out_block + rows * w];
    let masks = dropout.map(|d| (d, k));
    run_conditioner(flow, k, View::rows(p, rows, d1, dim), layer_hidden, hidden_block, out, masks);

    for r in 0..rows {
        let o = &out[r * w..(r + 1) * w];
        let (pr, nr) = (&p[r * dim..(r + 1) * dim], &mut next[r * dim..(r + 1) * dim]);
        let y = if last { &mut nr[..] } else { &mut ws.row[..] };
        y[..d1].copy_from_slice(&pr[..d1]);
        let coupling_logdet = match spec.coupling {
            Coupling::Affine => {
                let at = b * cap * d2 + r * d2;
                let (sr, er) = (&mut ws.s[at..at + d2], &mut ws.es[at..at + d2]);
                soft_clamp_exp(&o[..d2], spec.clamp, sr, er);
                affine_row(&mut y[d1..], &pr[d1..], er, &o[d2..]);
                sr.iter().map(|&v| v as f64).sum::<f64>()
            }
            Coupling::Spline { bins, tail_bound } => {
                let m = spline::params_per_element(bins);
                let mut sum = 0.0f64;
                for (j, (yv, &xv)) in y[d1..].iter_mut().zip(&pr[d1..]).enumerate() {
                    let (v, ld) = spline::forward(xv, &o[j * m..(j + 1) * m], bins, tail_bound);
                    *yv = v;
                    sum += ld as f64;
                }
                sum
            }
        };
        if !last {
            actnorm_permute_row(&ws.row, &flow.perms[k + 1], &ws.an_scale, &ws.an_shift, nr);
        }
        ws.logdet[r] += layer_logdet + coupling_logdet;
    }
}

/// e^x in f32 for |x| < 87, to about 2e-7 relative: x = k ln 2 + f with
/// |f| <= ln2 / 2, e^f by its degree-6 Taylor polynomial, 2^k from the
/// exponent bits. Branch-free, so loops over slices vectorise.
#[inline(always)]
pub(crate) fn exp_f32(x: f32) -> f32 {
    // 1.5 * 2^23: adding and subtracting it rounds to the nearest integer.
    const ROUND: f32 = 12_582_912.0;
    let x = x.max(-87.0).min(87.0);
    let rounded = x * std::f32::consts::LOG2_E + ROUND;
    let k = rounded - ROUND;
    // The integer k sits in the low mantissa bits of `rounded`: integer
    // arithmetic on the bits, no float-to-int conversion, keeps this vectorised.
    let k_bits = (rounded.to_bits() as i32).wrapping_sub(ROUND.to_bits() as i32);
    let f = (x - k * 0.693_145_75) - k * 1.428_606_8e-6;
    let p = 1.0 + f * (1.0 + f * (0.5 + f * (1.0 / 6.0 + f * (1.0 / 24.0 + f * (1.0 / 120.0 + f * (1.0 / 720.0))))));
    p * f32::from_bits(((k_bits + 127) << 23) as u32)
}

elementwise! {
    /// The coupling's log-scale and its exponential from the raw conditioner
    /// output: s = c tanh(r / c) (tanh(y) = 1 - 2 / (e^(2y) + 1)), e = e^s.
    fn soft_clamp_exp(raw: &[f32], c: f32, s: &mut [f32], e: &mut [f32]) {
        let inv = 2.0 / c;
        for ((&r, sv), ev) in raw.iter().zip(s.iter_mut()).zip(e.iter_mut()) {
            let t = exp_f32((r * inv).max(-40.0).min(40.0));
            *sv = c * (1.0 - 2.0 / (t + 1.0));
            *ev = exp_f32(*sv);
        }
    }
}

elementwise! {
    /// One row of `v = max(v + bias, 0)` under dropout: entry j is dropped
    /// when its mask hash falls below `threshold`, and scaled by `scale` =
    /// 1 / keep rate otherwise.
    fn bias_relu_dropout(v: &mut [f32], bias: &[f32], key: u32, threshold: u32, scale: f32) {
        for (j, (x, b)) in v.iter_mut().zip(bias).enumerate() {
            *x = if mask_hash(key, j) < threshold { 0.0 } else { (*x + b).max(0.0) * scale };
        }
    }
}

elementwise! {
    /// `v = max(v + bias, 0)` over rows of `bias.len()` values.
    fn bias_relu(v: &mut [f32], bias: &[f32]) {
        for row in v.chunks_exact_mut(bias.len()) {
            for (x, b) in row.iter_mut().zip(bias) {
                *x = (*x + b).max(0.0);
            }
        }
    }
}

elementwise! {
    /// Backward of one row's affine half, y2 = p2 e^s + t with s = c tanh(r/c)
    /// and the -scale * sum(s) log-det term: gradients for r and t (into
    /// `g_out = [g_r, g_t]`, whose column sums collect in `sums`), and for
    /// p2, written over `g2`.
    #[allow(clippy::too_many_arguments)]
    fn coupling_backward_row(
        g2: &mut [f32],
        p2: &[f32],
        s: &[f32],
        es: &[f32],
        c: f32,
        scale: f32,
        g_out: &mut [f32],
        sums: &mut [f32],
    ) {
        let inv_c = 1.0 / c;
        let d2 = g2.len();
        let (g_raw, g_t) = g_out.split_at_mut(d2);
        let (sum_raw, sum_t) = sums.split_at_mut(d2);
        for j in 0..d2 {
            let (gv, e, sv) = (g2[j], es[j], s[j] * inv_c);
            let gr = (gv * p2[j] * e - scale) * (1.0 - sv * sv);
            g_raw[j] = gr;
            g_t[j] = gv;
            sum_raw[j] += gr;
            sum_t[j] += gv;
            g2[j] = gv * e;
        }
    }
}

elementwise! {
    /// Through ReLU and dropout: zero where the stored output is 0, scaled
    /// by 1/keep where it was kept; the column sums of the result (rows of
    /// `sums.len()`) are added to `sums`.
    fn relu_dropout_backward(g: &mut [f32], h: &[f32], keep_inv: f32, sums: &mut [f32]) {
        for (grow, hrow) in g.chunks_exact_mut(sums.len()).zip(h.chunks_exact(sums.len())) {
            for ((gv, &hv), sv) in grow.iter_mut().zip(hrow).zip(sums.iter_mut()) {
                *gv = if hv > 0.0 { *gv * keep_inv } else { 0.0 };
                *sv += *gv;
            }
        }
    }
}

elementwise! {
    /// ActNorm's parameter gradients from one row, in permuted order:
    /// `g_scale += gp (p - shift)` (times the scale, that is the log-scale
    /// gradient) and `g_shift += gp`.
    fn actnorm_backward_row(gp: &[f32], p: &[f32], shift: &[f32], g_scale: &mut [f32], g_shift: &mut [f32]) {
        for ((((&gv, &pv), &sh), gs), gb) in gp.iter().zip(p).zip(shift).zip(g_scale.iter_mut()).zip(g_shift.iter_mut()) {
            *gs += gv * (pv - sh);
            *gb += gv;
        }
    }
}

elementwise! {
    /// ActNorm and the permutation for one row: p[j] = x[perm[j]] a[j] + b[j]
    /// (scale and shift already in permuted order).
    fn actnorm_permute_row(x: &[f32], perm: &[u32], a: &[f32], b: &[f32], p: &mut [f32]) {
        for (((pv, &src), &av), &bv) in p.iter_mut().zip(perm).zip(a).zip(b) {
            *pv = x[src as usize] * av + bv;
        }
    }
}

elementwise! {
    /// The affine half of a coupling for one row: y = x e + t.
    fn affine_row(y: &mut [f32], x: &[f32], e: &[f32], t: &[f32]) {
        for (((y, &x), &e), &t) in y.iter_mut().zip(x).zip(e).zip(t) {
            *y = x * e + t;
        }
    }
}

/// Run the whole flow on `x` (`rows x dim`, rows <= ws.cap). Afterwards the
/// latent is `ws.latent(..)` and the per-row log-determinant is `ws.logdet`.
pub fn forward(flow: &Flow, ws: &mut Workspace, x: &[f32], rows: usize, dropout: Option<Dropout>) {
    let dim = flow.spec.dim;
    assert!(rows <= ws.cap, "batch larger than workspace");
    ws.logdet[..rows].fill(0.0);
    ws.keep_inv = 1.0 / (1.0 - dropout.map(|d| d.rate).unwrap_or(0.0));
    if flow.spec.layers == 0 {
        ws.latent[..rows * dim].copy_from_slice(&x[..rows * dim]);
        return;
    }
    enter_first_layer(flow, ws, x, rows);
    for k in 0..flow.spec.layers {
        forward_layer(flow, k, ws, rows, dropout);
    }
}

/// Negative log-density of row `r` of a finished forward pass, `-log p(x)`
/// in nats: `0.5 ||z - mu||^2 + (d/2) ln 2pi - logdet`, where `mu` is the
/// row's class mean (zero without a class).
fn row_nll(flow: &Flow, ws: &Workspace, r: usize, class: Option<u32>) -> f64 {
    let dim = flow.spec.dim;
    let z = &ws.latent[r * dim..(r + 1) * dim];
    let sq: f64 = match class {
        Some(c) => z.iter().zip(flow.class_mean(c as usize)).map(|(&v, &m)| ((v - m) as f64).powi(2)).sum(),
        None => z.iter().map(|&v| (v as f64) * (v as f64)).sum(),
    };
    0.5 * sq + dim as f64 * HALF_LN_2PI - ws.logdet[r]
}

/// Backward pass of `scale * sum_rows NLL` after [`forward`] on the same
/// rows (with their class labels, for a class-conditional flow); writes the
/// gradient with respect to every parameter into `grad` (each weight
/// gradient is one product, so nothing needs zeroing or accumulating).
pub fn backward_nll(
    flow: &Flow,
    ws: &mut Workspace,
    rows: usize,
    classes: Option<&[u32]>,
    scale: f32,
    grad: &mut [f32],
) {
    let spec = &flow.spec;
    let (dim, hid, cap) = (spec.dim, spec.hidden, ws.cap);
    let (d1, d2) = spec.split();
    let c = spec.clamp;
    let params = &flow.params;
    assert!(ws.g.len() >= rows * dim && ws.kept == spec.layers, "the backward pass needs a training workspace");
    let keep_inv = ws.keep_inv;
    // dL/dz = scale * z. `g` then holds the gradient of each layer's output,
    // updated in place into the gradient of its input, layer by layer.
    let g = &mut ws.g[..rows * dim];
    for (gv, &zv) in g.iter_mut().zip(&ws.latent[..rows * dim]) {
        *gv = scale * zv;
    }
    // With class means: dL/dz = scale (z - mu_c) and dL/dmu_c = -sum of those.
    grad[flow.class_means..flow.class_means + spec.classes * dim].fill(0.0);
    if let Some(classes) = classes {
        for (r, &c) in classes[..rows].iter().enumerate() {
            let at = flow.class_means + c as usize * dim;
            for j in 0..dim {
                let gv = &mut g[r * dim + j];
                *gv -= scale * params[at + j];
                grad[at + j] -= *gv;
            }
        }
    }
    let hidden_block = cap * hid;
    for k in (0..spec.layers).rev() {
        let slot = &flow.slots[k];
        let p = &ws.perm[k * cap * dim..k * cap * dim + rows * dim];
        // Through the coupling (and the -scale * log-det term): `gout`
        // gets the gradient of the conditioner's output, `gsum` its column
        // sums, and g2 becomes the gradient of p2.
        let w = spec.conditioner_out();
        let gsum = &mut ws.gsum[..w];
        gsum.fill(0.0);
        match spec.coupling {
            Coupling::Affine => {
                let s = &ws.s[k * cap * d2..k * cap * d2 + rows * d2];
                let es = &ws.es[k * cap * d2..k * cap * d2 + rows * d2];
                for r in 0..rows {
                    coupling_backward_row(
                        &mut g[r * dim + d1..(r + 1) * dim],
                        &p[r * dim + d1..(r + 1) * dim],
                        &s[r * d2..(r + 1) * d2],
                        &es[r * d2..(r + 1) * d2],
                        c,
                        scale,
                        &mut ws.gout[r * w..(r + 1) * w],
                        gsum,
                    );
                }
            }
            Coupling::Spline { bins, tail_bound } => {
                let m = spline::params_per_element(bins);
                let out = &ws.out[k * cap * w..k * cap * w + rows * w];
                for r in 0..rows {
                    let go = &mut ws.gout[r * w..(r + 1) * w];
                    for j in 0..d2 {
                        let (at, e) = (r * dim + d1 + j, j * m..(j + 1) * m);
                        let raw = &out[r * w..(r + 1) * w][e.clone()];
                        g[at] = spline::backward(p[at], raw, bins, tail_bound, g[at], -scale, &mut go[e]);
                    }
                    for (sv, &gv) in gsum.iter_mut().zip(go.iter()) {
                        *sv += gv;
                    }
                }
            }
        }
        // Through the conditioner MLP, last layer first; the running gradient
        // ping-pongs between the two hidden scratch buffers, and `gsum` holds
        // its column sums, the bias gradient.
        let layer_hidden = &ws.hidden[k * spec.depth * hidden_block..(k + 1) * spec.depth * hidden_block];
        let mut src_is_a: Option<bool> = None;
        for i in (0..=spec.depth).rev() {
            let lin = &slot.linears[i];
            let (g_cur, dst): (&[f32], &mut [f32]) = match src_is_a {
                None => (&ws.gout[..rows * w], &mut ws.gh_a[..]),
                Some(true) => (&ws.gh_a[..rows * hid], &mut ws.gh_b[..]),
                Some(false) => (&ws.gh_b[..rows * hid], &mut ws.gh_a[..]),
            };
            let inp = if i == 0 {
                View::rows(p, rows, d1, dim)
            } else {
                View::rows(&layer_hidden[(i - 1) * hidden_block..(i - 1) * hidden_block + rows * hid], rows, hid, hid)
            };
            // gW = g_cur^T * inp ; gb = column sums of g_cur.
            let (gw, gb) = grad[lin.weight..lin.bias + lin.out].split_at_mut(lin.out * lin.inp);
            matmul(gw, lin.inp, false, View::transposed(g_cur, rows, lin.out), inp);
            gb.copy_from_slice(&ws.gsum[..lin.out]);
            let w = View::rows(&params[lin.weight..lin.weight + lin.out * lin.inp], lin.out, lin.inp, lin.inp);
            let g_cur = View::rows(g_cur, rows, lin.out, lin.out);
            if i == 0 {
                // g1 += the conditioner's input gradient: `g` is now the
                // gradient of the whole permuted ActNorm output.
                matmul(g, dim, true, g_cur, w);
            } else {
                // Into the previous hidden layer's output, then through ReLU
                // and dropout.
                let gh = &mut dst[..rows * hid];
                matmul(gh, hid, false, g_cur, w);
                let h = &layer_hidden[(i - 1) * hidden_block..(i - 1) * hidden_block + rows * hid];
                let gsum = &mut ws.gsum[..hid];
                gsum.fill(0.0);
                relu_dropout_backward(gh, h, keep_inv, gsum);
                src_is_a = Some(!src_is_a.unwrap_or(false));
            }
        }
        // Through LU mixing: `g` becomes the gradient of the unmixed rows,
        // which are the ActNorm output.
        let p = match slot.mix {
            Some(mix) => {
                let (block, out) = (&params[mix..mix + dim * dim], &mut grad[mix..mix + dim * dim]);
                ws.mix.backward(block, dim, k, g, scale * rows as f32, out);
                ws.mix.unmixed(dim, k, rows)
            }
            None => p,
        };
        // ActNorm's gradients in permuted order, then each row's gradient
        // back through the permutation and the scale.
        permuted_actnorm(flow, k, &mut ws.an_scale, &mut ws.an_shift);
        ws.an_gscale.fill(0.0);
        ws.an_gshift.fill(0.0);
        for r in 0..rows {
            let (gr, pr) = (&g[r * dim..(r + 1) * dim], &p[r * dim..(r + 1) * dim]);
            actnorm_backward_row(gr, pr, &ws.an_shift, &mut ws.an_gscale, &mut ws.an_gshift);
        }
        for (j, &src) in flow.perms[k].iter().enumerate() {
            grad[slot.log_scale + src as usize] = ws.an_gscale[j] - scale * rows as f32;
            grad[slot.bias + src as usize] = ws.an_gshift[j];
        }
        // The gradient with respect to the flow's input is of no use.
        if k == 0 {
            break;
        }
        for r in 0..rows {
            let gr = &mut g[r * dim..(r + 1) * dim];
            ws.row.copy_from_slice(gr);
            for ((&src, &gv), &a) in flow.perms[k].iter().zip(&ws.row).zip(&ws.an_scale) {
                gr[src as usize] = gv * a;
            }
        }
    }
}

/// The exact inverse: latent `z` (`rows x dim`) back to the flow's input.
pub fn inverse(flow: &Flow, z: &[f32], rows: usize) -> Vec<f32> {
    let spec = &flow.spec;
    let (dim, hid) = (spec.dim, spec.hidden);
    let (d1, d2) = spec.split();
    let mut y = z[..rows * dim].to_vec();
    let mut p = vec![0.0f32; rows * dim];
    let mut hidden = vec![0.0f32; spec.depth * rows * hid];
    let w = spec.conditioner_out();
    let mut out = vec![0.0f32; rows * w];
    for k in (0..spec.layers).rev() {
        run_conditioner(flow, k, View::rows(&y, rows, d1, dim), &mut hidden, rows * hid, &mut out, None);
        let (mut sv, mut ev) = (vec![0.0f32; d2], vec![0.0f32; d2]);
        for r in 0..rows {
            p[r * dim..r * dim + d1].copy_from_slice(&y[r * dim..r * dim + d1]);
            let o = &out[r * w..(r + 1) * w];
            match spec.coupling {
                Coupling::Affine => {
                    soft_clamp_exp(&o[..d2], spec.clamp, &mut sv, &mut ev);
                    for j in 0..d2 {
                        p[r * dim + d1 + j] = (y[r * dim + d1 + j] - o[d2 + j]) / ev[j];
                    }
                }
                Coupling::Spline { bins, tail_bound } => {
                    let m = spline::params_per_element(bins);
                    for j in 0..d2 {
                        let raw = &o[j * m..(j + 1) * m];
                        p[r * dim + d1 + j] = spline::inverse(y[r * dim + d1 + j], raw, bins, tail_bound);
                    }
                }
            }
        }
        let slot = &flow.slots[k];
        if let Some(mix) = slot.mix {
            unmix_rows(&flow.params[mix..mix + dim * dim], dim, &mut p);
        }
        for (j, &src) in flow.perms[k].iter().enumerate() {
            let src = src as usize;
            let inv = (-flow.params[slot.log_scale + src]).exp();
            let b = flow.params[slot.bias + src];
            for r in 0..rows {
                y[r * dim + src] = (p[r * dim + j] - b) * inv;
            }
        }
    }
    y
}

mod lu;
mod spec;
pub use spec::{Coupling, Flow, FlowSpec, LayerSlots, LinearSlot, Mixing};
#[cfg(test)]
mod reference;
pub mod spline;
mod workers;
pub use workers::{Workers, PARAM_BLOCK};

#[cfg(test)]
mod tests;
