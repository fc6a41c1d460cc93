//! Monotone rational-quadratic splines (Durkan et al. 2019, "Neural Spline
//! Flows", after Gregory & Delbourgo 1982) for coupling layers, one element
//! at a time.
//!
//! On [-B, B] the map is a spline of `K` bins whose widths and heights are
//! softmaxes of raw conditioner outputs (each at least a minimum share) and
//! whose inner knot derivatives are positive functions of further outputs;
//! the two end derivatives are 1, so outside [-B, B] the map continues as
//! the identity (linear tails) with a continuous derivative. The inner
//! derivatives are `m + (1 - m) softplus(r) / ln 2`, so that a conditioner
//! output of zero gives uniform bins and unit derivatives: the identity map,
//! which is where a flow starts.
//!
//! Raw outputs per element: `K` width logits, `K` height logits, `K - 1`
//! derivative pre-activations, in that order.

use super::exp_f32;

/// Smallest share of the interval a bin's width or height takes, and the
/// smallest knot derivative (the published defaults).
const MIN_BIN: f32 = 1e-3;
const MIN_DERIVATIVE: f32 = 1e-3;

/// Raw conditioner outputs per transformed element for `bins` bins.
pub fn params_per_element(bins: usize) -> usize {
    3 * bins - 1
}

/// The knots of one element: positions and derivatives, from its raw
/// outputs; `bins <= MAX_BINS`.
pub const MAX_BINS: usize = 32;

/// Softmax shares of an element's bin widths and heights; knot positions
/// are summed from them only as far as the bin that is needed.
struct Knots {
    w_share: [f32; MAX_BINS],
    h_share: [f32; MAX_BINS],
}

/// One bin of an element's spline: its index, left knot and size.
struct Located {
    b: usize,
    x: f32,
    y: f32,
    w: f32,
    h: f32,
}

/// The derivative at knot `i` of `k + 1` (1 at both ends); only the two
/// knots of an element's bin are ever needed.
fn derivative(raw: &[f32], k: usize, i: usize) -> f32 {
    if i == 0 || i == k {
        1.0
    } else {
        MIN_DERIVATIVE + (1.0 - MIN_DERIVATIVE) * softplus(raw[2 * k + i - 1]) / std::f32::consts::LN_2
    }
}

fn softmax_into(raw: &[f32], out: &mut [f32]) {
    let top = raw.iter().cloned().fold(f32::NEG_INFINITY, f32::max);
    let mut sum = 0.0;
    for (o, &r) in out.iter_mut().zip(raw) {
        *o = exp_f32(r - top);
        sum += *o;
    }
    let inv = 1.0 / sum;
    out.iter_mut().for_each(|o| *o *= inv);
}

/// ln(1 + e^r) without overflow.
fn softplus(r: f32) -> f32 {
    if r > 20.0 {
        r
    } else {
        exp_f32(r).ln_1p()
    }
}

fn sigmoid(r: f32) -> f32 {
    1.0 / (1.0 + exp_f32(-r))
}

impl Knots {
    fn new(raw: &[f32], k: usize) -> Knots {
        let mut kn = Knots { w_share: [0.0; MAX_BINS], h_share: [0.0; MAX_BINS] };
        softmax_into(&raw[..k], &mut kn.w_share[..k]);
        softmax_into(&raw[k..2 * k], &mut kn.h_share[..k]);
        kn
    }

    /// The bin whose [left, right) interval holds `v`, along the inputs
    /// (`along_x`) or the outputs; the last bin takes everything beyond.
    fn locate(&self, k: usize, bound: f32, v: f32, along_x: bool) -> Located {
        let scale = 2.0 * bound;
        let spread = 1.0 - MIN_BIN * k as f32;
        let (mut x, mut y) = (-bound, -bound);
        for b in 0..k {
            let w = scale * (MIN_BIN + spread * self.w_share[b]);
            let h = scale * (MIN_BIN + spread * self.h_share[b]);
            let right = if along_x { x + w } else { y + h };
            if v < right || b + 1 == k {
                return Located { b, x, y, w, h };
            }
            x += w;
            y += h;
        }
        unreachable!("a spline has at least one bin")
    }
}

/// The quantities of one element's bin that [`forward`] and [`backward`]
/// share: with `xi` the position within the bin and `s` its slope,
/// `y = y_b + num / den` and `dy/dx = s^2 t / den^2`.
struct Bin {
    kn: Knots,
    b: usize,
    /// The bin's left knot output.
    yb: f32,
    wb: f32,
    hb: f32,
    db: f32,
    db1: f32,
    s: f32,
    xi: f32,
    q: f32,
    num: f32,
    den: f32,
    t: f32,
}

impl Bin {
    fn of(x: f32, raw: &[f32], k: usize, bound: f32) -> Bin {
        let kn = Knots::new(raw, k);
        let Located { b, x: xb, y: yb, w: wb, h: hb } = kn.locate(k, bound, x, true);
        let (db, db1) = (derivative(raw, k, b), derivative(raw, k, b + 1));
        let s = hb / wb;
        let xi = ((x - xb) / wb).clamp(0.0, 1.0);
        let q = xi * (1.0 - xi);
        let num = hb * (s * xi * xi + db * q);
        let den = s + (db1 + db - 2.0 * s) * q;
        let t = db1 * xi * xi + 2.0 * s * q + db * (1.0 - xi) * (1.0 - xi);
        Bin { kn, b, yb, wb, hb, db, db1, s, xi, q, num, den, t }
    }
}

/// One element through the spline: `(y, ln dy/dx)`.
pub fn forward(x: f32, raw: &[f32], k: usize, bound: f32) -> (f32, f32) {
    if !(-bound..bound).contains(&x) {
        return (x, 0.0);
    }
    let Bin { yb, s, num, den, t, .. } = Bin::of(x, raw, k, bound);
    // ln(s^2 t / den^2) in one logarithm.
    let r = s / den;
    (yb + num / den, (r * r * t).ln())
}

/// Reverse mode through [`forward`]: given the gradients `gy` of `y` and
/// `gld` of `ln dy/dx`, writes the gradient of every raw output into
/// `graw` (overwriting it) and returns the gradient of `x`.
pub fn backward(x: f32, raw: &[f32], k: usize, bound: f32, gy: f32, gld: f32, graw: &mut [f32]) -> f32 {
    graw[..params_per_element(k)].fill(0.0);
    if !(-bound..bound).contains(&x) {
        return gy;
    }
    let Bin { kn, b, wb, hb, db, db1, s, xi, q, num, den, t, .. } = Bin::of(x, raw, k, bound);
    // Adjoints of the intermediate quantities, in reverse order.
    let g_yb = gy;
    let g_num = gy / den;
    let g_den = -gy * num / (den * den) - 2.0 * gld / den;
    let g_t = gld / t;
    let mut g_s = 2.0 * gld / s;
    let mut g_xi = g_t * (2.0 * db1 * xi - 2.0 * db * (1.0 - xi));
    let mut g_q = g_t * 2.0 * s;
    let mut g_db1 = g_t * xi * xi;
    let mut g_db = g_t * (1.0 - xi) * (1.0 - xi);
    g_s += g_t * 2.0 * q;
    g_s += g_den * (1.0 - 2.0 * q);
    g_db1 += g_den * q;
    g_db += g_den * q;
    g_q += g_den * (db1 + db - 2.0 * s);
    let mut g_hb = g_num * (s * xi * xi + db * q);
    g_s += g_num * hb * xi * xi;
    g_xi += g_num * hb * s * 2.0 * xi;
    g_db += g_num * hb * q;
    g_q += g_num * hb * db;
    g_xi += g_q * (1.0 - 2.0 * xi);
    g_hb += g_s / wb;
    let mut g_wb = -g_s * hb / (wb * wb);
    let g_x = g_xi / wb;
    let g_xb = -g_xi / wb;
    g_wb += -g_xi * xi / wb;
    // Widths: bin b directly, and every bin left of b through its left knot.
    let spread = 2.0 * bound * (1.0 - MIN_BIN * k as f32);
    let mut g_share = [0.0f32; MAX_BINS];
    for (i, g) in g_share[..k].iter_mut().enumerate() {
        *g = spread * (if i == b { g_wb } else { 0.0 } + if i < b { g_xb } else { 0.0 });
    }
    softmax_backward(&kn.w_share[..k], &g_share[..k], &mut graw[..k]);
    // Heights: bin b directly (through s and its height), every bin left of
    // b through the left knot's y.
    for (i, g) in g_share[..k].iter_mut().enumerate() {
        *g = spread * (if i == b { g_hb } else { 0.0 } + if i < b { g_yb } else { 0.0 });
    }
    softmax_backward(&kn.h_share[..k], &g_share[..k], &mut graw[k..2 * k]);
    // Inner derivatives d_1..d_{K-1}.
    let scale = (1.0 - MIN_DERIVATIVE) / std::f32::consts::LN_2;
    for (knot, g) in [(b, g_db), (b + 1, g_db1)] {
        if (1..k).contains(&knot) {
            let r = raw[2 * k + knot - 1];
            graw[2 * k + knot - 1] += g * scale * sigmoid(r);
        }
    }
    g_x
}

/// Through `share = softmax(raw)`: `graw_i = share_i (g_i - sum_j share_j g_j)`.
fn softmax_backward(share: &[f32], g: &[f32], graw: &mut [f32]) {
    let dot: f32 = share.iter().zip(g).map(|(s, g)| s * g).sum();
    for ((o, &s), &gv) in graw.iter_mut().zip(share).zip(g) {
        *o = s * (gv - dot);
    }
}

/// The inverse of [`forward`]: the root in [0, 1] of the quadratic the
/// spline's bin equation gives for `y`.
pub fn inverse(y: f32, raw: &[f32], k: usize, bound: f32) -> f32 {
    if !(-bound..bound).contains(&y) {
        return y;
    }
    let Located { b, x: xb, y: yb, w, h } = Knots::new(raw, k).locate(k, bound, y, false);
    let (wb, hb) = (w as f64, h as f64);
    let (db, db1) = (derivative(raw, k, b) as f64, derivative(raw, k, b + 1) as f64);
    let s = hb / wb;
    let dy = (y - yb) as f64;
    let a = hb * (s - db) + dy * (db1 + db - 2.0 * s);
    let bq = hb * db - dy * (db1 + db - 2.0 * s);
    let c = -s * dy;
    let disc = (bq * bq - 4.0 * a * c).max(0.0);
    let xi = (2.0 * c / (-bq - disc.sqrt())).clamp(0.0, 1.0);
    (xi * wb) as f32 + xb
}

#[cfg(test)]
mod tests {
    use super::*;

    fn raw(k: usize, seed: u32) -> Vec<f32> {
        (0..params_per_element(k)).map(|i| (((i as u32 * 2654435761) ^ seed) % 1000) as f32 / 250.0 - 2.0).collect()
    }

    /// Zero raw outputs give the identity map (zero log-derivative).
    #[test]
    fn zero_outputs_are_the_identity() {
        let r = vec![0.0f32; params_per_element(8)];
        for x in [-2.9f32, -1.0, 0.0, 0.37, 2.5] {
            let (y, ld) = forward(x, &r, 8, 3.0);
            assert!((y - x).abs() < 1e-5 && ld.abs() < 1e-5, "{x} -> {y}, {ld}");
        }
    }

    /// The spline is monotone, continuous at the knots and the bounds, its
    /// log-derivative matches a central finite difference (in f64 terms, to
    /// f32 accuracy), and the inverse undoes it.
    #[test]
    fn monotone_derivative_matches_finite_difference_and_inverts() {
        let (k, bound) = (8, 3.0f32);
        for seed in 0..20 {
            let r = raw(k, seed);
            let mut last = f32::NEG_INFINITY;
            for i in 0..600 {
                let x = -3.3 + i as f32 * 0.011;
                let (y, ld) = forward(x, &r, k, bound);
                assert!(y > last, "not monotone at {x}");
                last = y;
                let h = 1e-3;
                let fd = (forward(x + h, &r, k, bound).0 - forward(x - h, &r, k, bound).0) / (2.0 * h);
                if (x.abs() - bound).abs() > 2.0 * h {
                    assert!((fd.ln() - ld).abs() < 2e-2, "seed {seed} x {x}: fd {} vs {ld}", fd.ln());
                }
                let back = inverse(y, &r, k, bound);
                assert!((back - x).abs() < 2e-4, "seed {seed}: {x} -> {y} -> {back}");
            }
        }
    }

    /// Every gradient of [`backward`] against central finite differences of
    /// [`forward`] in f32 (loss = 0.7 y - 1.3 ln dy/dx).
    #[test]
    fn backward_matches_finite_differences() {
        let (k, bound) = (5, 3.0f32);
        let loss = |x: f32, r: &[f32]| {
            let (y, ld) = forward(x, r, k, bound);
            0.7 * y as f64 - 1.3 * ld as f64
        };
        for seed in 0..30 {
            let r = raw(k, seed);
            let x = -2.7 + seed as f32 * 0.18;
            let mut g = vec![0.0f32; params_per_element(k)];
            let gx = backward(x, &r, k, bound, 0.7, -1.3, &mut g);
            let h = 2e-3f32;
            let fd_x = (loss(x + h, &r) - loss(x - h, &r)) / (2.0 * h as f64);
            assert!((gx as f64 - fd_x).abs() < 2e-2 * fd_x.abs().max(1.0), "seed {seed} dx {gx} vs {fd_x}");
            for i in 0..r.len() {
                let (mut up, mut down) = (r.clone(), r.clone());
                up[i] += h;
                down[i] -= h;
                let fd = (loss(x, &up) - loss(x, &down)) / (2.0 * h as f64);
                assert!((g[i] as f64 - fd).abs() < 2e-2 * fd.abs().max(1.0), "seed {seed} raw {i}: {} vs {fd}", g[i]);
            }
        }
    }
}
