//! LU mixing between coupling layers: W = L (U + diag(exp(lambda))), applied, differentiated and undone.

use super::*;

/// Buffers of LU mixing in a workspace.
pub(super) struct MixBuffers {
    /// Rows per block.
    pub(super) cap: usize,
    /// `kept` blocks of each layer's permuted ActNorm output before the
    /// mixing map (`perm` holds it after).
    pub(super) unmixed: Vec<f32>,
    /// Every layer's composed `dim x dim` map W, and the LU block it was
    /// composed from: a forward pass recomposes a layer's W only when its
    /// block changed (every training step; once per scoring run).
    pub(super) w: Vec<f32>,
    pub(super) source: Vec<f32>,
    /// Dense L and U' scratch.
    pub(super) l: Vec<f32>,
    pub(super) u: Vec<f32>,
    /// Backward scratch: dL/dW, a `dim x dim` product, and the gradient
    /// with respect to the unmixed rows.
    pub(super) gw: Vec<f32>,
    pub(super) t: Vec<f32>,
    pub(super) g_unmixed: Vec<f32>,
}

/// Dense L (unit lower-triangular) and U' = U + diag(exp(lambda)) from an
/// LU block (L below the diagonal, U above, lambda on it).
fn lu_factors(block: &[f32], dim: usize, l: &mut [f32], u: &mut [f32]) {
    for i in 0..dim {
        for j in 0..dim {
            let v = block[i * dim + j];
            let (lv, uv) = match j.cmp(&i) {
                std::cmp::Ordering::Less => (v, 0.0),
                std::cmp::Ordering::Equal => (1.0, v.exp()),
                std::cmp::Ordering::Greater => (0.0, v),
            };
            l[i * dim + j] = lv;
            u[i * dim + j] = uv;
        }
    }
}

impl MixBuffers {
    /// LU mixing of layer `k` on the rows `p` (`rows x dim`, workspace
    /// block `b`): keeps them as they are in `unmixed`, composes W = L U'
    /// from `block` unless layer `k`'s W already comes from the same values,
    /// and replaces the rows by `p W^T`. Returns the map's log-determinant,
    /// sum(lambda).
    pub(super) fn forward(&mut self, block: &[f32], dim: usize, k: usize, b: usize, p: &mut [f32]) -> f64 {
        let (rows, dd) = (p.len() / dim, dim * dim);
        let w = &mut self.w[k * dd..(k + 1) * dd];
        let source = &mut self.source[k * dd..(k + 1) * dd];
        if source != block {
            lu_factors(block, dim, &mut self.l, &mut self.u);
            matmul(w, dim, false, View::rows(&self.l, dim, dim, dim), View::rows(&self.u, dim, dim, dim));
            source.copy_from_slice(block);
        }
        let unmixed = &mut self.unmixed[b * self.cap * dim..b * self.cap * dim + rows * dim];
        unmixed.copy_from_slice(p);
        matmul(p, dim, false, View::rows(unmixed, rows, dim, dim), View::transposed(w, dim, dim));
        (0..dim).map(|j| block[j * dim + j] as f64).sum()
    }

    /// The rows of block `b` before mixing.
    pub(super) fn unmixed(&self, dim: usize, b: usize, rows: usize) -> &[f32] {
        &self.unmixed[b * self.cap * dim..b * self.cap * dim + rows * dim]
    }

    /// Backward of LU mixing at layer `k`: `g` holds the gradient with
    /// respect to the mixed rows and leaves with the gradient with respect
    /// to the unmixed ones (g W); the gradient of the LU `block` goes to
    /// `out`: with W = L U', dL = dW U'^T below the diagonal, dU' = L^T dW on
    /// and above it, and d lambda = diag(dU') exp(lambda) - `logdet_grad`
    /// (the log-det term's share).
    pub(super) fn backward(
        &mut self,
        block: &[f32],
        dim: usize,
        k: usize,
        g: &mut [f32],
        logdet_grad: f32,
        out: &mut [f32],
    ) {
        let (rows, dd) = (g.len() / dim, dim * dim);
        let unmixed = &self.unmixed[k * self.cap * dim..k * self.cap * dim + rows * dim];
        matmul(&mut self.gw, dim, false, View::transposed(g, rows, dim), View::rows(unmixed, rows, dim, dim));
        let g_unmixed = &mut self.g_unmixed[..rows * dim];
        matmul(
            g_unmixed,
            dim,
            false,
            View::rows(g, rows, dim, dim),
            View::rows(&self.w[k * dd..(k + 1) * dd], dim, dim, dim),
        );
        g.copy_from_slice(g_unmixed);
        lu_factors(block, dim, &mut self.l, &mut self.u);
        let gw = View::rows(&self.gw, dim, dim, dim);
        matmul(&mut self.t, dim, false, gw, View::transposed(&self.u, dim, dim));
        for i in 0..dim {
            out[i * dim..i * dim + i].copy_from_slice(&self.t[i * dim..i * dim + i]);
        }
        matmul(&mut self.t, dim, false, View::transposed(&self.l, dim, dim), gw);
        for i in 0..dim {
            out[i * dim + i + 1..(i + 1) * dim].copy_from_slice(&self.t[i * dim + i + 1..(i + 1) * dim]);
            out[i * dim + i] = self.t[i * dim + i] * block[i * dim + i].exp() - logdet_grad;
        }
    }
}

/// Undo LU mixing on rows (`rows x dim`) in place: solve L U' p = q for
/// each row, in f64.
pub(super) fn unmix_rows(block: &[f32], dim: usize, q: &mut [f32]) {
    let mut y = vec![0.0f64; dim];
    for row in q.chunks_exact_mut(dim) {
        for i in 0..dim {
            y[i] = row[i] as f64 - (0..i).map(|j| block[i * dim + j] as f64 * y[j]).sum::<f64>();
        }
        for i in (0..dim).rev() {
            let upper: f64 = (i + 1..dim).map(|j| block[i * dim + j] as f64 * y[j]).sum();
            y[i] = (y[i] - upper) / (block[i * dim + i] as f64).exp();
        }
        for (v, &yv) in row.iter_mut().zip(&y) {
            *v = yv as f32;
        }
    }
}
