//! Threads over a batch: one workspace per thread, gradients summed in thread order.

use super::*;

/// One workspace per thread, and a gradient buffer for each thread after
/// the first (whose gradient goes straight into the caller's). Batches are
/// split by rows into contiguous chunks, one per thread, run on a persistent
/// thread pool; gradients are summed in thread order, so a fixed thread
/// count gives bit-identical results.
pub struct Workers {
    chunk_cap: usize,
    pool: Vec<Worker>,
    /// `None` with one thread: everything runs on the caller's thread.
    threads: Option<rayon::ThreadPool>,
}

struct Worker {
    ws: Workspace,
    grad: Vec<f32>,
    total: f64,
}

/// Parameters per block when per-parameter work is split across threads.
pub const PARAM_BLOCK: usize = 1 << 15;

/// Fewest rows worth handing to a thread of its own.
const MIN_ROWS_PER_THREAD: usize = 32;

impl Workers {
    /// Workers for training (forward and backward) on batches of up to
    /// `batch_cap` rows.
    pub fn new(flow: &Flow, threads: usize, batch_cap: usize) -> Workers {
        Workers::build(flow, threads, batch_cap, true)
    }

    /// Workers for the forward pass alone ([`Workers::latent`]), with
    /// forward-only workspaces and no gradient buffers.
    pub fn forward_only(flow: &Flow, threads: usize, batch_cap: usize) -> Workers {
        Workers::build(flow, threads, batch_cap, false)
    }

    fn build(flow: &Flow, threads: usize, batch_cap: usize, train: bool) -> Workers {
        let threads = threads.max(1);
        let chunk_cap = batch_cap.div_ceil(threads).max(1);
        // The first worker writes its gradient straight into the caller's.
        let pool = (0..threads)
            .map(|i| Worker {
                ws: if train {
                    Workspace::new(&flow.spec, chunk_cap)
                } else {
                    Workspace::forward_only(&flow.spec, chunk_cap)
                },
                grad: vec![0.0; if train && i > 0 { flow.param_count() } else { 0 }],
                total: 0.0,
            })
            .collect();
        let threads = (threads > 1)
            .then(|| rayon::ThreadPoolBuilder::new().num_threads(threads).build().expect("worker threads start"));
        Workers { chunk_cap, pool, threads }
    }

    /// Run `f(offset, a, b, c)` over matching `PARAM_BLOCK`-sized blocks of
    /// three equally long parameter arrays on the worker threads (in order
    /// on one thread); `offset` is where the blocks start.
    pub fn for_param_blocks<F>(&self, a: &mut [f32], b: &mut [f32], c: &mut [f32], f: F)
    where
        F: Fn(usize, &mut [f32], &mut [f32], &mut [f32]) + Sync + Send,
    {
        match &self.threads {
            Some(tp) => {
                use rayon::prelude::*;
                tp.install(|| {
                    a.par_chunks_mut(PARAM_BLOCK)
                        .zip(b.par_chunks_mut(PARAM_BLOCK))
                        .zip(c.par_chunks_mut(PARAM_BLOCK))
                        .enumerate()
                        .for_each(|(i, ((x, y), z))| f(i * PARAM_BLOCK, x, y, z))
                });
            }
            None => {
                let blocks = a.chunks_mut(PARAM_BLOCK).zip(b.chunks_mut(PARAM_BLOCK)).zip(c.chunks_mut(PARAM_BLOCK));
                blocks.enumerate().for_each(|(i, ((x, y), z))| f(i * PARAM_BLOCK, x, y, z));
            }
        }
    }

    fn chunks(&self, rows: usize) -> usize {
        let useful = rows.div_ceil(MIN_ROWS_PER_THREAD).max(1);
        useful.min(self.pool.len()).max(rows.div_ceil(self.chunk_cap))
    }

    /// Mean NLL over `rows` rows of `x` (given their classes, for a
    /// class-conditional flow) and its gradient (written to `grad`).
    pub fn nll_and_grad(
        &mut self,
        flow: &Flow,
        x: &[f32],
        classes: Option<&[u32]>,
        rows: usize,
        dropout: Option<(f32, u64)>,
        grad: &mut [f32],
    ) -> f64 {
        let dim = flow.spec.dim;
        let parts = self.chunks(rows);
        assert!(parts <= self.pool.len(), "batch larger than the workers were sized for");
        let per = rows.div_ceil(parts);
        let scale = 1.0 / rows as f32;
        let job = |idx: usize, ws: &mut Workspace, total: &mut f64, grad: &mut [f32]| {
            let start = (idx * per).min(rows);
            let n = per.min(rows - start);
            *total = 0.0;
            if n == 0 {
                grad.fill(0.0);
                return;
            }
            let d = dropout.map(|(rate, seed)| Dropout { rate, seed, row_offset: start });
            forward(flow, ws, &x[start * dim..(start + n) * dim], n, d);
            let cls = classes.map(|c| &c[start..start + n]);
            *total = (0..n).map(|r| row_nll(flow, ws, r, cls.map(|c| c[r]))).sum();
            backward_nll(flow, ws, n, cls, scale, grad);
        };
        // The first chunk's gradient goes straight into `grad`; the others'
        // are added to it below.
        let (first, rest) = self.pool[..parts].split_first_mut().expect("at least one worker");
        match &self.threads {
            Some(tp) if parts > 1 => {
                use rayon::prelude::*;
                tp.install(|| {
                    rayon::join(
                        || job(0, &mut first.ws, &mut first.total, grad),
                        || {
                            rest.par_iter_mut()
                                .enumerate()
                                .for_each(|(i, w)| job(i + 1, &mut w.ws, &mut w.total, &mut w.grad))
                        },
                    )
                });
            }
            _ => {
                job(0, &mut first.ws, &mut first.total, grad);
                for (i, w) in rest.iter_mut().enumerate() {
                    job(i + 1, &mut w.ws, &mut w.total, &mut w.grad);
                }
            }
        }
        // Add the other chunks' gradients in thread order (bit-identical for
        // a fixed thread count), in parallel over parameter blocks.
        let items = &self.pool[..parts];
        let reduce = |(b, out): (usize, &mut [f32])| {
            let at = b * PARAM_BLOCK;
            for w in &items[1..] {
                for (a, g) in out.iter_mut().zip(&w.grad[at..]) {
                    *a += g;
                }
            }
        };
        match &self.threads {
            Some(tp) if parts > 1 => {
                use rayon::prelude::*;
                tp.install(|| grad.par_chunks_mut(PARAM_BLOCK).enumerate().for_each(reduce));
            }
            _ if parts > 1 => grad.chunks_mut(PARAM_BLOCK).enumerate().for_each(reduce),
            _ => {}
        }
        items.iter().map(|w| w.total).sum::<f64>() / rows as f64
    }

    /// The worker threads' pool (`None` with one thread), for other
    /// per-row work between passes.
    pub fn pool(&self) -> Option<&rayon::ThreadPool> {
        self.threads.as_ref()
    }

    /// Latent vectors (`rows x dim`) and log-determinants of any number of
    /// rows of `x`, computed in blocks across the threads.
    pub fn latent(&mut self, flow: &Flow, x: &[f32], rows: usize, z: &mut [f32], logdet: &mut [f64]) {
        let dim = flow.spec.dim;
        let block = self.chunk_cap * self.pool.len();
        let mut start = 0;
        while start < rows {
            let n = block.min(rows - start);
            let parts = self.chunks(n);
            let per = n.div_ceil(parts);
            let xs = &x[start * dim..(start + n) * dim];
            let zs = &mut z[start * dim..(start + n) * dim];
            let ls = &mut logdet[start..start + n];
            let job = |w: &mut Worker, xc: &[f32], zc: &mut [f32], lc: &mut [f64]| {
                let m = lc.len();
                forward(flow, &mut w.ws, xc, m, None);
                zc.copy_from_slice(w.ws.latent(dim, m));
                lc.copy_from_slice(&w.ws.logdet[..m]);
            };
            let items = &mut self.pool[..parts];
            match &self.threads {
                Some(tp) if parts > 1 => {
                    use rayon::prelude::*;
                    tp.install(|| {
                        items
                            .par_iter_mut()
                            .zip(xs.par_chunks(per * dim))
                            .zip(zs.par_chunks_mut(per * dim))
                            .zip(ls.par_chunks_mut(per))
                            .for_each(|(((w, xc), zc), lc)| job(w, xc, zc, lc))
                    });
                }
                _ => {
                    let pieces = xs.chunks(per * dim).zip(zs.chunks_mut(per * dim)).zip(ls.chunks_mut(per));
                    for (w, ((xc, zc), lc)) in items.iter_mut().zip(pieces) {
                        job(w, xc, zc, lc);
                    }
                }
            }
            start += n;
        }
    }
}
