//! `tidemark bench`: throughput of the flow's compute core on synthetic
//! data — training steps (forward, backward, Adam) and scoring passes —
//! with the achieved GFLOP/s as a fraction of a single-core f32 GEMM peak
//! measured in the same run.

use crate::flow::{Flow, FlowSpec, Mixing, Workers};
use crate::linalg::{matmul, time_in_products, View};
use crate::train::{Adam, ParamGroups};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, StandardNormal};
use std::time::Instant;

/// Rows per thread per scoring pass (as in `Model::evaluate`).
const SCORE_BLOCK: usize = 1024;

/// What to measure.
#[derive(Clone, Debug, serde::Serialize)]
pub struct BenchConfig {
    pub dim: usize,
    pub hidden: usize,
    pub layers: usize,
    pub depth: usize,
    pub batch: usize,
    pub coupling: crate::flow::Coupling,
    pub threads: usize,
    pub seconds: f64,
}

/// What was measured.
#[derive(Clone, Debug, serde::Serialize)]
pub struct BenchResult {
    pub config: BenchConfig,
    /// Single-thread f32 GEMM throughput on 512 x 512 x 512 products.
    pub gemm_peak_gflops: f64,
    pub train_mflop_per_sample: f64,
    pub train_samples_per_s: f64,
    pub train_gflops: f64,
    /// train_gflops / (gemm_peak_gflops x threads).
    pub train_fraction_of_peak: f64,
    /// Share of the training threads' time spent inside matrix products
    /// (operand packing included); the rest is element-wise work and AdamW.
    pub train_product_share: f64,
    /// The training step's products alone, as a fraction of the peak: what
    /// training would reach if everything outside the products took no time.
    pub train_product_fraction_of_peak: f64,
    pub score_samples_per_s: f64,
    pub score_gflops: f64,
    pub score_fraction_of_peak: f64,
}

/// Multiply-adds of one forward pass of one vector through the conditioners.
fn forward_macs(spec: &FlowSpec) -> f64 {
    let (d1, d2) = spec.split();
    let h = spec.hidden as f64;
    let per_layer = d1 as f64 * h + (spec.depth - 1) as f64 * h * h + h * 2.0 * d2 as f64;
    per_layer * spec.layers as f64
}

/// f32 GEMM GFLOP/s on one thread, best of repeated 512^3 products.
pub fn gemm_peak(seconds: f64) -> f64 {
    let n = 512;
    let mut rng = StdRng::seed_from_u64(1);
    let a: Vec<f32> = (0..n * n).map(|_| rng.random_range(-1.0..1.0)).collect();
    let b: Vec<f32> = (0..n * n).map(|_| rng.random_range(-1.0..1.0)).collect();
    let mut c = vec![0.0f32; n * n];
    let start = Instant::now();
    let mut best = 0.0f64;
    while start.elapsed().as_secs_f64() < seconds {
        let t = Instant::now();
        matmul(&mut c, n, false, View::rows(&a, n, n, n), View::rows(&b, n, n, n));
        best = best.max(2.0 * (n * n * n) as f64 / t.elapsed().as_secs_f64() / 1e9);
    }
    best
}

/// Measure training and scoring throughput for `cfg`.
pub fn run(cfg: &BenchConfig) -> BenchResult {
    let spec = FlowSpec {
        dim: cfg.dim,
        layers: cfg.layers,
        hidden: cfg.hidden,
        depth: cfg.depth,
        clamp: 3.0,
        classes: 0,
        mixing: Mixing::Permutation,
        coupling: cfg.coupling,
    };
    let mut flow = Flow::new(spec.clone(), 7);
    let mut rng = StdRng::seed_from_u64(3);
    // Small non-zero output layers, so the coupling is not the identity.
    for slot in flow.slots.clone() {
        let last = slot.linears.last().expect("conditioner layers");
        for w in &mut flow.params[last.weight..last.weight + last.out * last.inp] {
            *w = rng.random_range(-0.01..0.01);
        }
    }
    let rows = cfg.batch * 8;
    let data: Vec<f32> = (0..rows * cfg.dim).map(|_| StandardNormal.sample(&mut rng)).collect();
    let gemm_peak_gflops = gemm_peak(cfg.seconds.min(1.0));

    let mut workers = Workers::new(&flow, cfg.threads, cfg.batch);
    let mut grad = vec![0.0f32; flow.param_count()];
    let mut adam = Adam::new(flow.param_count());
    let groups = ParamGroups::uniform(flow.param_count(), false);
    let (mut steps, mut at) = (0usize, 0usize);
    let products_before = time_in_products();
    let start = Instant::now();
    while start.elapsed().as_secs_f64() < cfg.seconds || steps < 3 {
        let x = &data[at * cfg.batch * cfg.dim..(at + 1) * cfg.batch * cfg.dim];
        workers.nll_and_grad(&flow, x, None, cfg.batch, None, &mut grad);
        adam.step_on(&workers, &mut flow.params, &grad, 1e-4, 0.0, &groups);
        steps += 1;
        at = (at + 1) % 8;
    }
    let train_seconds = start.elapsed().as_secs_f64();
    let product_seconds = (time_in_products() - products_before).as_secs_f64();
    let train_samples_per_s = (steps * cfg.batch) as f64 / train_seconds;

    let mut score_workers = Workers::forward_only(&flow, cfg.threads, SCORE_BLOCK * cfg.threads);
    let (mut z, mut logdet) = (vec![0.0f32; rows * cfg.dim], vec![0.0f64; rows]);
    let (mut passes, start) = (0usize, Instant::now());
    while start.elapsed().as_secs_f64() < cfg.seconds || passes < 2 {
        score_workers.latent(&flow, &data, rows, &mut z, &mut logdet);
        passes += 1;
    }
    let score_samples_per_s = (passes * rows) as f64 / start.elapsed().as_secs_f64();

    let fwd_flops = 2.0 * forward_macs(&spec);
    let train_flops = 3.0 * fwd_flops;
    let peak = gemm_peak_gflops * cfg.threads as f64;
    BenchResult {
        config: cfg.clone(),
        gemm_peak_gflops,
        train_mflop_per_sample: train_flops / 1e6,
        train_samples_per_s,
        train_gflops: train_samples_per_s * train_flops / 1e9,
        train_fraction_of_peak: train_samples_per_s * train_flops / 1e9 / peak,
        train_product_share: product_seconds / (train_seconds * cfg.threads as f64),
        train_product_fraction_of_peak: (steps * cfg.batch) as f64 * train_flops
            / 1e9
            / product_seconds
            / gemm_peak_gflops,
        score_samples_per_s,
        score_gflops: score_samples_per_s * fwd_flops / 1e9,
        score_fraction_of_peak: score_samples_per_s * fwd_flops / 1e9 / peak,
    }
}

/// One readable line per result.
pub fn describe(r: &BenchResult) -> String {
    let c = &r.config;
    format!(
        "D {} hidden {} layers {} batch {} threads {}: train {:.0} vec/s ({:.1} GFLOP/s, {:.0}% of peak; \
         products {:.0}% of the time at {:.0}% of peak), score {:.0} vec/s ({:.1} GFLOP/s, {:.0}% of peak); GEMM peak {:.1} GFLOP/s per core; {:.2} MFLOP/vector to train",
        c.dim,
        c.hidden,
        c.layers,
        c.batch,
        c.threads,
        r.train_samples_per_s,
        r.train_gflops,
        100.0 * r.train_fraction_of_peak,
        100.0 * r.train_product_share,
        100.0 * r.train_product_fraction_of_peak,
        r.score_samples_per_s,
        r.score_gflops,
        100.0 * r.score_fraction_of_peak,
        r.gemm_peak_gflops,
        r.train_mflop_per_sample
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The FLOP count matches a hand count for D = 64, hidden 128, depth 2:
    /// 32*128 + 128*128 + 128*64 = 28,672 multiply-adds per layer.
    #[test]
    fn forward_macs_by_hand() {
        let spec = FlowSpec {
            dim: 64,
            layers: 8,
            hidden: 128,
            depth: 2,
            clamp: 3.0,
            classes: 0,
            mixing: Mixing::Permutation,
            coupling: Default::default(),
        };
        assert_eq!(forward_macs(&spec), 8.0 * 28_672.0);
    }
}
