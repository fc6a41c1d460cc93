//! A training step (gathering a minibatch from a memory-mapped `.npy`,
//! whitening it, forward, backward, gradient reduction, Adam) allocates
//! nothing of its own once its buffers exist, counted with a counting global
//! allocator. The only allocations left are the `gemm` crate's: it allocates
//! its packing buffers inside every matrix product, which this crate cannot
//! reuse; they are counted apart (`linalg::inside_gemm`).

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};
use tidemark::data::{write_npy, Dataset, Matrix};
use tidemark::flow::{Coupling, Flow, FlowSpec, Mixing, Workers};
use tidemark::linalg::inside_gemm;
use tidemark::preprocess::{Method, Preprocessor, TransformScratch, DEFAULT_DEAD_THRESHOLD};
use tidemark::train::{Adam, ParamGroups};

struct Counting;

/// Allocations outside `gemm`, and inside it.
static OURS: AtomicUsize = AtomicUsize::new(0);
static GEMM: AtomicUsize = AtomicUsize::new(0);

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        let counter = if inside_gemm() { &GEMM } else { &OURS };
        counter.fetch_add(1, Ordering::SeqCst);
        unsafe { System.alloc(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        unsafe { System.dealloc(ptr, layout) }
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

#[test]
fn a_training_step_allocates_nothing_after_the_first() {
    let (n, dim, rows) = (1024, 24, 256);
    let x: Vec<f32> = (0..n * dim).map(|i| ((i * 7919) % 1000) as f32 / 500.0 - 1.0).collect();
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("train.npy");
    write_npy(&mut std::fs::File::create(&path).unwrap(), &Matrix::new(n, dim, x)).unwrap();
    let data = Dataset::open(&path, None).unwrap();
    let all: Vec<usize> = (0..n).collect();
    let pre = Preprocessor::fit(&data, &all, Method::Pca, DEFAULT_DEAD_THRESHOLD).unwrap();
    let k = pre.dim();
    let spline = Coupling::Spline { bins: 8, tail_bound: 3.0 };
    let cases = [1, 2].into_iter().flat_map(|t| {
        [
            (t, Mixing::Permutation, Coupling::Affine),
            (t, Mixing::Lu, Coupling::Affine),
            (t, Mixing::Permutation, spline),
        ]
    });
    for (threads, mixing, coupling) in cases {
        let spec = FlowSpec { dim: k, layers: 4, hidden: 64, depth: 2, clamp: 3.0, classes: 3, mixing, coupling };
        let mut flow = Flow::new(spec, 1);
        let classes: Vec<u32> = (0..rows as u32).map(|r| r % 3).collect();
        let mut workers = Workers::new(&flow, threads, rows);
        let mut grad = vec![0.0f32; flow.param_count()];
        let mut adam = Adam::new(flow.param_count());
        let groups = ParamGroups::uniform(flow.param_count(), true);
        let (mut raw, mut batch, mut scratch) = (Vec::new(), vec![0.0f32; rows * k], TransformScratch::default());
        let mut step = |flow: &mut Flow, s: usize| {
            let idx: Vec<usize> = (0..rows).map(|r| (r * 37 + s * 101) % n).collect();
            let before = (OURS.load(Ordering::SeqCst), GEMM.load(Ordering::SeqCst));
            data.gather(&idx, &mut raw);
            pre.transform_with(&raw, rows, &mut batch, None, &mut scratch);
            workers.nll_and_grad(flow, &batch, Some(&classes), rows, Some((0.1, s as u64)), &mut grad);
            adam.step_on(&workers, &mut flow.params, &grad, 1e-3, 1e-4, &groups);
            (OURS.load(Ordering::SeqCst) - before.0, GEMM.load(Ordering::SeqCst) - before.1)
        };
        // Warm-up: the buffers grow, and each pool thread allocates gemm's
        // thread-local buffer on its first product.
        for s in 0..3 {
            step(&mut flow, s);
        }
        // A step allocates nothing of ours. On a loaded machine a pool
        // thread can run its first task only after the warm-up, and setting
        // it up allocates once (seen: 2 allocations, in one step of eight
        // under load); an allocation every step would show in every step.
        let per_step: Vec<(usize, usize)> = (3..11).map(|s| step(&mut flow, s)).collect();
        let allocating: Vec<usize> = per_step.iter().map(|&(ours, _)| ours).filter(|&ours| ours > 0).collect();
        assert!(
            allocating.len() <= 1 && allocating.iter().all(|&ours| ours <= 2 * threads),
            "{threads} thread(s), {mixing:?}: (ours, gemm's) {per_step:?}"
        );
        // Matrix products per step: (depth + 1) per layer forward, twice that
        // backward (weight and input gradients), and with LU mixing two more
        // forward (compose W, apply it) and four backward, in each thread's
        // share; and the whitening projection. gemm allocates one or two
        // buffers in each.
        let lu = if mixing == Mixing::Lu { 6 } else { 0 };
        let products = threads * 4 * (3 * 3 + lu) + 1;
        assert!(per_step.iter().all(|&(_, g)| g <= 2 * products), "{threads} thread(s), {mixing:?}: {per_step:?}");
    }
}
