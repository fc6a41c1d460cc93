//! Fitting the mixture kind: EM on the whitened training rows for a
//! doubling number of components, each with a ridge, all chosen by the
//! log-likelihood of the validation rows.

use super::{derive, Learned, Rows};
use crate::error::{Error, Result};
use crate::mixture::{em, kmeans_start, responsibilities, EmReport, Mixture};
use crate::model::MixtureMeta;
use crate::output::note;
use rand::rngs::StdRng;
use rand::seq::SliceRandom;
use rand::SeedableRng;

/// Ridge (whitened units, where every direction has unit variance) that EM
/// adds to each covariance; the validation rows then choose a larger one
/// from [`RIDGE_GRID`] if it helps.
const EM_RIDGE: f64 = 1e-4;
/// Extra ridge tried on top of [`EM_RIDGE`] for every component count.
const RIDGE_GRID: [f64; 7] = [0.0, 1e-3, 1e-2, 3e-2, 0.1, 0.3, 1.0];
/// EM stops after this many rounds or when the mean training
/// log-likelihood gains less than [`EM_TOL`] (common practice).
const EM_ROUNDS: usize = 100;
const EM_TOL: f64 = 1e-3;
/// Most components tried.
const MAX_COMPONENTS: usize = 64;
/// Fewest training rows per component, and per dimension of each
/// component (a full covariance needs well over `dim` rows).
const MIN_ROWS_PER_COMPONENT: usize = 20;
const MIN_ROWS_PER_COMPONENT_DIM: usize = 2;
/// EM runs on at most this many training rows (a seeded sample).
const MAX_EM_ROWS: usize = 100_000;
/// The doubling stops after this many component counts in a row that do
/// not beat the best.
const PATIENCE: usize = 2;

/// One tried (components, ridge): its validation log-likelihood.
#[derive(Clone, Debug)]
struct Tried {
    components: usize,
    ridge: f64,
    validation_nll: f64,
}

/// Component counts to try: 1, 2, 4, ... while each component keeps enough
/// rows; only `asked` when given.
pub(super) fn component_counts(rows: usize, dim: usize, asked: Option<usize>) -> Vec<usize> {
    if let Some(k) = asked {
        return vec![k];
    }
    let per = (MIN_ROWS_PER_COMPONENT_DIM * dim).max(MIN_ROWS_PER_COMPONENT);
    std::iter::successors(Some(1usize), |k| Some(k * 2))
        .take_while(|&k| k == 1 || (k <= MAX_COMPONENTS && rows / k >= per))
        .collect()
}

/// Whitened rows `idx` of `data`, in f64, row-major.
fn whitened(l: &Learned, data: &crate::data::Dataset, idx: &[usize]) -> Vec<f64> {
    let d = l.model.dim();
    let mut out = Vec::with_capacity(idx.len() * d);
    let mut raw = Vec::new();
    let mut u = Vec::new();
    for chunk in idx.chunks(4096) {
        data.gather(chunk, &mut raw);
        u.resize(chunk.len() * d, 0.0f32);
        l.model.pre.transform(&raw, chunk.len(), &mut u, None);
        out.extend(u.iter().map(|&v| v as f64));
    }
    out
}

/// Fit the mixture into `l.model`; the best validation NLL (nats per
/// vector, input space) goes into the training state.
pub(super) fn fit_mixture(rows: &Rows, l: &mut Learned, asked: Option<usize>, quiet: bool) -> Result<()> {
    let d = l.model.dim();
    let mut train = rows.train.clone();
    if train.len() > MAX_EM_ROWS {
        train.shuffle(&mut StdRng::seed_from_u64(derive(l.settings.seed, 9, 0)));
        train.truncate(MAX_EM_ROWS);
        train.sort_unstable();
    }
    let u = whitened(l, rows.data, &train);
    let v = whitened(l, rows.val_data, &rows.val);
    let (n, nv) = (train.len(), rows.val.len());
    let log_det = l.model.pre.log_det();
    let mut best: Option<(Mixture, Tried, EmReport)> = None;
    let mut tried = Vec::new();
    let mut since_best = 0;
    for k in component_counts(n, d, asked) {
        let init = kmeans_start(&u, n, d, k, derive(l.settings.seed, 10, k as u64));
        let Some((fitted, report)) = em(&u, n, d, &init, EM_RIDGE, EM_ROUNDS, EM_TOL) else {
            if !quiet {
                note(format!("mixture of {k}: a covariance stopped being positive definite; skipped"));
            }
            continue;
        };
        let mut improved = false;
        let mut consider = |m: Mixture, ridge: f64, report: EmReport, tried: &mut Vec<Tried>| {
            let nll = -(m.mean_log_density(&v, nv) + log_det);
            let t = Tried { components: k, ridge, validation_nll: nll };
            let better = best.as_ref().is_none_or(|b| nll < b.1.validation_nll);
            if better {
                best = Some((m, t.clone(), report));
                improved = true;
            }
            tried.push(t);
            nll
        };
        let mut ridge_here = (EM_RIDGE, f64::INFINITY);
        for extra in RIDGE_GRID {
            let Some(m) = fitted.with_ridge(extra) else { continue };
            let nll = consider(m, EM_RIDGE + extra, report, &mut tried);
            if nll < ridge_here.1 {
                ridge_here = (EM_RIDGE + extra, nll);
            }
        }
        // A larger ridge added after EM is only an estimate of EM run with
        // it: EM again at that ridge, from where the first run ended.
        if ridge_here.0 > EM_RIDGE {
            let resp = responsibilities(&fitted.mixture, &u, n);
            if let Some((again, report)) = em(&u, n, d, &resp, ridge_here.0, EM_ROUNDS, EM_TOL) {
                consider(again.mixture, ridge_here.0, report, &mut tried);
            }
        }
        if !quiet {
            let b =
                tried.iter().filter(|t| t.components == k).min_by(|a, b| a.validation_nll.total_cmp(&b.validation_nll));
            if let Some(b) = b {
                note(format!(
                    "mixture of {k}: validation NLL {:.4} nats/vector (ridge {:.3e}, {} EM rounds)",
                    b.validation_nll, b.ridge, report.iterations
                ));
            }
        }
        since_best = if improved { 0 } else { since_best + 1 };
        if since_best >= PATIENCE {
            break;
        }
    }
    let (mixture, chosen, report) =
        best.ok_or_else(|| Error::Invalid("no mixture could be fitted: every covariance was singular".into()))?;
    l.model.meta.mixture = Some(MixtureMeta {
        components: chosen.components,
        ridge: chosen.ridge,
        em_iterations: report.iterations,
        converged: report.converged,
    });
    l.model.density = Box::new(crate::density::MixtureDensity { mixture });
    l.state.best_val = chosen.validation_nll;
    Ok(())
}
