//! A training step of the compute core (forward, backward, gradient
//! reduction, Adam) allocates nothing of its own once its workspace exists,
//! counted with a counting global allocator. The only allocations left are
//! the `gemm` crate's: it allocates its packing buffers inside every matrix
//! product (at most two per call), which this crate cannot reuse.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};
use tidemark::flow::{Flow, FlowSpec, Workers};
use tidemark::train::Adam;

struct Counting;

static ALLOCATIONS: AtomicUsize = AtomicUsize::new(0);

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::SeqCst);
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
    for threads in [1, 2] {
        let spec = FlowSpec { dim: 24, layers: 4, hidden: 64, depth: 2, clamp: 3.0, classes: 3 };
        let mut flow = Flow::new(spec, 1);
        let rows = 256;
        let x: Vec<f32> = (0..rows * 24).map(|i| ((i * 7919) % 1000) as f32 / 500.0 - 1.0).collect();
        let classes: Vec<u32> = (0..rows as u32).map(|r| r % 3).collect();
        let mut workers = Workers::new(&flow, threads, rows);
        let mut grad = vec![0.0f32; flow.param_count()];
        let mut adam = Adam::new(flow.param_count());
        let decay = vec![true; flow.param_count()];
        let mut step = |flow: &mut Flow, seed: u64| {
            workers.nll_and_grad(flow, &x, Some(&classes), rows, Some((0.1, seed)), &mut grad);
            adam.step_on(&workers, &mut flow.params, &grad, 1e-3, 1e-4, &decay);
        };
        // Warm-up: each pool thread allocates gemm's thread-local buffer on
        // its first product, whenever the scheduler first hands it one.
        for s in 0..3 {
            step(&mut flow, s);
        }
        let mut per_step = Vec::new();
        for s in 3..8 {
            let before = ALLOCATIONS.load(Ordering::SeqCst);
            step(&mut flow, s);
            per_step.push(ALLOCATIONS.load(Ordering::SeqCst) - before);
        }
        // Matrix products per step: (depth + 1) per layer forward, twice that
        // backward (weight and input gradients), in each thread's share.
        let products = threads * 4 * 3 * 3;
        // One thread: exactly the same every step. Two: the pool's scheduling
        // moves a few of gemm's buffer allocations between steps.
        let (lo, hi) = (*per_step.iter().min().unwrap(), *per_step.iter().max().unwrap());
        assert!(hi - lo <= 4 * (threads - 1), "{threads} thread(s): allocations vary: {per_step:?}");
        assert!(hi <= 2 * products, "{threads} thread(s): {hi} allocations for {products} products");
    }
}
