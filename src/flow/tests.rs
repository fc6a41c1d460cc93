//! The flow held to closed forms, finite differences and the candle reference.

use super::*;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, StandardNormal};

/// The fast exponential against the standard library's, over the range
/// the coupling uses and beyond.
#[test]
fn fast_exp_is_accurate() {
    let mut worst = 0.0f64;
    for i in -80_000..=80_000 {
        let x = i as f32 * 1e-3;
        let (a, b) = (exp_f32(x) as f64, (x as f64).exp());
        worst = worst.max((a - b).abs() / b);
    }
    assert!(worst < 5e-7, "worst relative error {worst}");
}

fn spec(dim: usize, layers: usize, hidden: usize, depth: usize) -> FlowSpec {
    FlowSpec {
        dim,
        layers,
        hidden,
        depth,
        clamp: 3.0,
        classes: 0,
        mixing: Mixing::Permutation,
        coupling: Coupling::Affine,
    }
}

const SPLINE: Coupling = Coupling::Spline { bins: 5, tail_bound: 3.0 };

/// A flow with every parameter random (non-identity ActNorm, non-zero
/// last layers), as after some training.
fn random_flow(spec: FlowSpec, seed: u64) -> Flow {
    let mut flow = Flow::new(spec, seed);
    let mut rng = StdRng::seed_from_u64(seed + 1);
    for p in &mut flow.params {
        *p = rng.random_range(-0.4f32..0.4);
    }
    flow
}

fn normal(rows: usize, dim: usize, seed: u64) -> Vec<f32> {
    let mut rng = StdRng::seed_from_u64(seed);
    (0..rows * dim).map(|_| StandardNormal.sample(&mut rng)).collect()
}

fn fast(flow: &Flow, x: &[f32], rows: usize, dropout: Option<(f32, u64)>) -> (f64, Vec<f32>) {
    fast_classes(flow, x, None, rows, dropout)
}

fn fast_classes(flow: &Flow, x: &[f32], c: Option<&[u32]>, rows: usize, d: Option<(f32, u64)>) -> (f64, Vec<f32>) {
    let mut workers = Workers::new(flow, 1, rows);
    let mut grad = vec![0.0; flow.param_count()];
    let nll = workers.nll_and_grad(flow, x, c, rows, d, &mut grad);
    (nll, grad)
}

fn init_candle() {
    // candle's element-wise pool collapses on a busy 2-core machine.
    std::env::set_var("CANDLE_NUM_THREADS", "1");
}

/// Every parameter tensor's gradient agrees with the reference's to 1e-4
/// relative to the tensor's largest reference entry.
fn assert_gradients_match(flow: &Flow, grad: &[f32], r: &reference::Reference) {
    let dim = flow.spec.dim;
    let mut tensors = vec![(flow.class_means, flow.spec.classes * dim)];
    for layer in &flow.slots {
        tensors.extend([(layer.log_scale, dim), (layer.bias, dim)]);
        tensors.extend(layer.mix.map(|at| (at, dim * dim)));
        for lin in &layer.linears {
            tensors.extend([(lin.weight, lin.out * lin.inp), (lin.bias, lin.out)]);
        }
    }
    for (at, n) in tensors {
        let want = &r.grad[at..at + n];
        let top = want.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-3);
        for (i, (&g, &w)) in grad[at..at + n].iter().zip(want).enumerate() {
            assert!((g as f64 - w).abs() <= 1e-4 * top, "dim {dim}: param {} grad {g} vs {w}", at + i);
        }
    }
}

/// Every parameter gradient of the hand-written backward pass agrees with
/// candle's autograd (reference implementation, f64).
#[test]
fn gradients_match_candle_autograd() {
    init_candle();
    use Mixing::{Lu, Permutation};
    let cases = [
        (7, 3, 16, 2, 0, Permutation),
        (2, 2, 8, 1, 3, Permutation),
        (12, 2, 24, 3, 2, Permutation),
        (7, 3, 16, 2, 0, Lu),
        (5, 2, 8, 1, 2, Lu),
    ];
    let splines = [(7, 3, 16, 2, 0, Permutation, SPLINE), (6, 2, 12, 1, 2, Lu, SPLINE)];
    let cases = cases.iter().map(|&(a, b, c, d, e, f)| (a, b, c, d, e, f, Coupling::Affine)).chain(splines);
    for (dim, layers, hidden, depth, classes, mixing, coupling) in cases {
        let flow =
            random_flow(FlowSpec { classes, mixing, coupling, ..spec(dim, layers, hidden, depth) }, 11 + dim as u64);
        let rows = 64;
        let x = normal(rows, dim, 5);
        let labels: Vec<u32> = (0..rows as u32).map(|r| r % classes.max(1) as u32).collect();
        let labels = (classes > 0).then_some(&labels[..]);
        let (nll, grad) = fast_classes(&flow, &x, labels, rows, None);
        let r = reference::evaluate(&flow, &x, labels, rows, None).unwrap();
        assert!((nll - r.mean_nll).abs() <= 1e-5 * r.mean_nll.abs().max(1.0), "{nll} vs {}", r.mean_nll);
        assert_gradients_match(&flow, &grad, &r);
    }
}

/// The latent and log-determinant of the forward pass agree with candle's,
/// with either mixing.
#[test]
fn forward_matches_candle() {
    init_candle();
    for (mixing, coupling) in
        [(Mixing::Permutation, Coupling::Affine), (Mixing::Lu, Coupling::Affine), (Mixing::Permutation, SPLINE)]
    {
        let flow = random_flow(FlowSpec { mixing, coupling, ..spec(5, 4, 12, 2) }, 3);
        let rows = 20;
        let x = normal(rows, 5, 9);
        let mut ws = Workspace::new(&flow.spec, rows);
        forward(&flow, &mut ws, &x, rows, None);
        let r = reference::evaluate(&flow, &x, None, rows, None).unwrap();
        for (a, b) in ws.latent(5, rows).iter().zip(&r.z) {
            assert!((*a as f64 - b).abs() < 1e-4 * b.abs().max(1.0), "{mixing:?}: {a} vs {b}");
        }
        for (a, b) in ws.logdet[..rows].iter().zip(&r.logdet) {
            assert!((a - b).abs() < 1e-4 * b.abs().max(1.0), "{mixing:?}: {a} vs {b}");
        }
    }
}

/// Data-dependent ActNorm initialisation: on the data it was initialised
/// with, every layer's ActNorm output has mean 0 and variance 1 per
/// feature (its definition), even for a flow whose ActNorm was not at
/// the identity before.
#[test]
fn actnorm_initialisation_standardises_every_layer() {
    let mut flow = random_flow(spec(6, 3, 16, 2), 17);
    let rows = 500;
    let x: Vec<f32> = normal(rows, 6, 18).iter().enumerate().map(|(i, v)| 3.0 * v + (i % 6) as f32).collect();
    flow.init_actnorm(&x, rows);
    let mut ws = Workspace::new(&flow.spec, rows);
    forward(&flow, &mut ws, &x, rows, None);
    for k in 0..3 {
        let p = &ws.perm[k * rows * 6..(k + 1) * rows * 6];
        for j in 0..6 {
            let mean = (0..rows).map(|r| p[r * 6 + j] as f64).sum::<f64>() / rows as f64;
            let var = (0..rows).map(|r| (p[r * 6 + j] as f64 - mean).powi(2)).sum::<f64>() / rows as f64;
            assert!(mean.abs() < 1e-4 && (var - 1.0).abs() < 1e-4, "layer {k} feature {j}: mean {mean} var {var}");
        }
    }
}

/// The forward-only workspace (two blocks in turn) computes exactly what
/// the training workspace does, for even and odd depths.
#[test]
fn forward_only_workspace_matches_training_workspace() {
    for (layers, mixing) in [1, 2, 3, 5].into_iter().flat_map(|l| [(l, Mixing::Permutation), (l, Mixing::Lu)]) {
        let flow = random_flow(FlowSpec { mixing, ..spec(7, layers, 16, 2) }, 40 + layers as u64);
        let rows = 33;
        let x = normal(rows, 7, 12);
        let (mut full, mut lean) = (Workspace::new(&flow.spec, rows), Workspace::forward_only(&flow.spec, rows));
        forward(&flow, &mut full, &x, rows, None);
        forward(&flow, &mut lean, &x, rows, None);
        assert_eq!(full.latent(7, rows), lean.latent(7, rows), "{layers} layers");
        assert_eq!(full.logdet[..rows], lean.logdet[..rows], "{layers} layers");
    }
}

/// A workspace keeps each layer's composed LU map between passes; after
/// the LU blocks change it must give what a fresh workspace gives.
#[test]
fn a_reused_workspace_follows_changed_lu_blocks() {
    let mut flow = random_flow(FlowSpec { mixing: Mixing::Lu, ..spec(6, 3, 16, 2) }, 31);
    let rows = 17;
    let x = normal(rows, 6, 2);
    let mut kept = Workspace::forward_only(&flow.spec, rows);
    forward(&flow, &mut kept, &x, rows, None);
    let before = kept.latent(6, rows).to_vec();
    let at = flow.slots[1].mix.expect("LU block");
    flow.params[at + 6 + 1] += 0.25; // lambda of feature 1 in layer 1
    flow.params[at + 6 * 3 + 2] -= 0.3; // an entry of L
    forward(&flow, &mut kept, &x, rows, None);
    let mut fresh = Workspace::forward_only(&flow.spec, rows);
    forward(&flow, &mut fresh, &x, rows, None);
    assert_eq!(kept.latent(6, rows), fresh.latent(6, rows));
    assert_eq!(kept.logdet[..rows], fresh.logdet[..rows]);
    assert_ne!(kept.latent(6, rows), &before[..]);
}

/// Change of variables: ln|det J| of the forward map, with J by central
/// finite differences of the f64 reference map, equals the analytic
/// log-determinant, with either mixing.
#[test]
fn log_determinant_matches_finite_difference_jacobian() {
    init_candle();
    let cases = [2usize, 5, 8].into_iter().flat_map(|d| {
        [
            (d, Mixing::Permutation, Coupling::Affine),
            (d, Mixing::Lu, Coupling::Affine),
            (d, Mixing::Permutation, SPLINE),
        ]
    });
    for (dim, mixing, coupling) in cases {
        let flow = random_flow(FlowSpec { mixing, coupling, ..spec(dim, 3, 16, 2) }, 21 + dim as u64);
        let x = normal(1, dim, 77);
        let mut ws = Workspace::new(&flow.spec, 1);
        forward(&flow, &mut ws, &x, 1, None);
        let x64: Vec<f64> = x.iter().map(|&v| v as f64).collect();
        let eps = 1e-5;
        let mut jac = nalgebra::DMatrix::<f64>::zeros(dim, dim);
        for j in 0..dim {
            let (mut hi, mut lo) = (x64.clone(), x64.clone());
            hi[j] += eps;
            lo[j] -= eps;
            let (fh, fl) = (reference::map_row(&flow, &hi).unwrap(), reference::map_row(&flow, &lo).unwrap());
            for i in 0..dim {
                jac[(i, j)] = (fh[i] - fl[i]) / (2.0 * eps);
            }
        }
        let fd = jac.determinant().abs().ln();
        assert!(
            (fd - ws.logdet[0]).abs() < 1e-3,
            "dim {dim} {mixing:?} {coupling:?}: fd {fd} vs analytic {}",
            ws.logdet[0]
        );
    }
}

/// inverse(forward(x)) = x, for random flows with either mixing, an
/// identity flow and odd D.
#[test]
fn inverse_undoes_forward() {
    let lu = FlowSpec { mixing: Mixing::Lu, ..spec(9, 5, 32, 2) };
    // LU entries of +-0.04: at +-0.4, five random mixing maps stretch the
    // latent to |z| ~ 500 and f32 round-off in the forward pass alone
    // reaches 1e-3 after inversion (one such layer inverts to 6e-7).
    let mut lu_flow = random_flow(lu.clone(), 4);
    for slot in lu_flow.slots.clone() {
        let at = slot.mix.expect("LU block");
        lu_flow.params[at..at + 81].iter_mut().for_each(|v| *v *= 0.1);
    }
    let flows = [
        (random_flow(spec(9, 5, 32, 2), 4), 9),
        (lu_flow, 9),
        (Flow::new(spec(6, 3, 8, 1), 4), 6),
        (Flow::new(FlowSpec { dim: 6, ..lu }, 4), 6),
    ];
    // Spline bins from weights of +-0.4 are far steeper and flatter than
    // trained ones (knot derivatives near the 1e-3 floor), and five such
    // layers amplify f32 round-off past any useful tolerance; at +-0.1
    // the bins still differ widely.
    let mut spline_flow = random_flow(FlowSpec { coupling: SPLINE, ..spec(9, 5, 32, 2) }, 4);
    spline_flow.params.iter_mut().for_each(|v| *v *= 0.25);
    for ((flow, dim), tol) in flows.into_iter().map(|f| (f, 1e-4)).chain([((spline_flow, 9), 1e-4)]) {
        let rows = 100;
        let x = normal(rows, dim, 1);
        let mut ws = Workspace::new(&flow.spec, rows);
        forward(&flow, &mut ws, &x, rows, None);
        let back = inverse(&flow, ws.latent(dim, rows), rows);
        for (a, b) in back.iter().zip(&x) {
            assert!((a - b).abs() < tol * b.abs().max(1.0), "{:?}: {a} vs {b}", flow.spec.coupling);
        }
    }
}

/// An untrained flow is the identity, so its log-density is the standard
/// multivariate normal's: -0.5 ||x||^2 - (D/2) ln(2 pi) (closed form).
#[test]
fn untrained_flow_is_standard_normal() {
    let dim = 6;
    for coupling in [Coupling::Affine, SPLINE] {
        let flow = Flow::new(FlowSpec { coupling, ..spec(dim, 4, 16, 2) }, 8);
        let rows = 30;
        let x = normal(rows, dim, 2);
        let mut workers = Workers::forward_only(&flow, 2, 16);
        let (mut z, mut logdet) = (vec![0.0; rows * dim], vec![0.0; rows]);
        workers.latent(&flow, &x, rows, &mut z, &mut logdet);
        for r in 0..rows {
            let sq: f64 = x[r * dim..(r + 1) * dim].iter().map(|&v| (v as f64).powi(2)).sum();
            let want = 0.5 * sq + 0.5 * dim as f64 * (2.0 * std::f64::consts::PI).ln();
            let got: f64 =
                z[r * dim..(r + 1) * dim].iter().map(|&v| 0.5 * (v as f64).powi(2) + HALF_LN_2PI).sum::<f64>()
                    - logdet[r];
            assert!((got - want).abs() < 1e-4, "{coupling:?}: {got} vs {want}");
        }
    }
}

/// With dropout, the gradient is that of the loss with the same masks
/// applied, as candle's autograd computes it (f64 reference, masks given
/// explicitly).
#[test]
fn dropout_gradients_match_candle_autograd() {
    init_candle();
    let flow = random_flow(spec(6, 2, 32, 3), 5);
    let rows = 40;
    let x = normal(rows, 6, 3);
    let (nll, grad) = fast(&flow, &x, rows, Some((0.3, 1234)));
    let d = Dropout { rate: 0.3, seed: 1234, row_offset: 0 };
    let r = reference::evaluate(&flow, &x, None, rows, Some(d)).unwrap();
    assert!((nll - r.mean_nll).abs() <= 1e-5 * r.mean_nll.abs().max(1.0), "{nll} vs {}", r.mean_nll);
    assert_gradients_match(&flow, &grad, &r);
}

/// Dropout masks: each entry is dropped with the stated probability and
/// neighbouring entries independently (binomial, 5 standard deviations;
/// 131,072 entries per check).
#[test]
fn dropout_masks_have_the_stated_rate_and_no_neighbour_correlation() {
    let (rows, hid, rate) = (256usize, 512usize, 0.3f64);
    let threshold = (rate * u32::MAX as f64) as u32;
    let bias = vec![0.0f32; hid];
    let mut dropped = vec![false; rows * hid];
    for r in 0..rows {
        let mut v = vec![1.0f32; hid];
        bias_relu_dropout(&mut v, &bias, mix(r as u64 ^ 99) as u32, threshold, 1.0);
        for j in 0..hid {
            dropped[r * hid + j] = v[j] == 0.0;
        }
    }
    let n = (rows * hid) as f64;
    let share = |p: f64, hits: usize| {
        let (got, sd) = (hits as f64 / n, (p * (1.0 - p) / n).sqrt());
        assert!((got - p).abs() < 5.0 * sd, "share {got}, expected {p} (sd {sd})");
    };
    share(rate, dropped.iter().filter(|&&d| d).count());
    let pairs = (0..rows * hid).filter(|&i| dropped[i] && dropped[(i + 1) % (rows * hid)]).count();
    share(rate * rate, pairs);
    let stacked = (0..rows * hid).filter(|&i| dropped[i] && dropped[(i + hid) % (rows * hid)]).count();
    share(rate * rate, stacked);
}

/// Splitting a batch across threads changes nothing but summation order.
#[test]
fn threads_agree_with_one_thread() {
    let flow = random_flow(spec(10, 3, 32, 2), 6);
    let rows = 256;
    let x = normal(rows, 10, 4);
    let (n1, g1) = fast(&flow, &x, rows, Some((0.2, 7)));
    let mut workers = Workers::new(&flow, 3, rows);
    let mut g3 = vec![0.0; flow.param_count()];
    let n3 = workers.nll_and_grad(&flow, &x, None, rows, Some((0.2, 7)), &mut g3);
    assert!((n1 - n3).abs() < 1e-6 * n1.abs());
    let top = g1.iter().fold(0.0f32, |m, v| m.max(v.abs()));
    for (a, b) in g1.iter().zip(&g3) {
        assert!((a - b).abs() <= 1e-5 * top);
    }
}
