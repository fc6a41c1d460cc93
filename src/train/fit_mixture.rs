//! Fitting the mixture kind: EM on the whitened training rows for a
//! doubling number of components, then the counts halfway to the best
//! one's neighbours, each with a ridge, all chosen by the log-likelihood of
//! the validation rows. With labels, each class gets its
//! own mixture on its own rows (up to the same number of components), and
//! the model is their union weighted by the class priors; the choice is by
//! the validation rows' log-likelihood under that union, which needs no
//! validation labels.

use super::{derive, Learned, Rows};
use crate::error::{Error, Result};
use crate::mixture::{em, kmeans_start, responsibilities, EmReport, Fitted, Mixture};
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
/// k-means++ starts EM runs from for each component count: one start can
/// merge two clusters and split another, and EM rarely moves out of that
/// (several starts, best by training likelihood: common practice).
const EM_STARTS: usize = 3;
/// Most components tried.
const MAX_COMPONENTS: usize = 64;
/// Fewest training rows per component, and per dimension of each
/// component (a full covariance needs well over `dim` rows).
const MIN_ROWS_PER_COMPONENT: usize = 20;
const MIN_ROWS_PER_COMPONENT_DIM: usize = 2;
/// Fewest training rows of a class for a mixture of its own.
const MIN_CLASS_ROWS: usize = 2;
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
    std::iter::successors(Some(1usize), |k| Some(k * 2)).take_while(|&k| k == 1 || room_for(rows, dim, k)).collect()
}

/// Whether `rows` training rows allow `k` components of dimension `dim`.
fn room_for(rows: usize, dim: usize, k: usize) -> bool {
    k <= MAX_COMPONENTS && rows / k >= (MIN_ROWS_PER_COMPONENT_DIM * dim).max(MIN_ROWS_PER_COMPONENT)
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

/// The whitened training rows one mixture is fitted to: all of them, or
/// one class's.
struct Group {
    u: Vec<f64>,
    n: usize,
    /// ln of its share of the density: its class prior (0 without classes).
    log_share: f64,
    /// Most components its rows allow.
    cap: usize,
}

/// The training rows EM runs on: all, or a seeded sample of [`MAX_EM_ROWS`].
fn em_rows(rows: &Rows, seed: u64) -> Vec<usize> {
    let mut train = rows.train.clone();
    if train.len() > MAX_EM_ROWS {
        train.shuffle(&mut StdRng::seed_from_u64(derive(seed, 9, 0)));
        train.truncate(MAX_EM_ROWS);
        train.sort_unstable();
    }
    train
}

/// One group of all `train` rows, or one per class of the model.
fn groups(rows: &Rows, l: &Learned, train: &[usize]) -> Result<Vec<Group>> {
    let d = l.model.dim();
    let group = |idx: &[usize], log_share: f64| {
        let cap = component_counts(idx.len(), d, None).last().copied().unwrap_or(1);
        Group { u: whitened(l, rows.data, idx), n: idx.len(), log_share, cap }
    };
    let Some(of) = &rows.class_of else { return Ok(vec![group(train, 0.0)]) };
    let classes = &l.model.meta.classes;
    let priors = crate::density::log_priors(&classes.iter().map(|c| c.rows).collect::<Vec<_>>());
    let mut out = Vec::with_capacity(classes.len());
    for (c, class) in classes.iter().enumerate() {
        let idx: Vec<usize> = train.iter().copied().filter(|&r| of[r] as usize == c).collect();
        if idx.len() < MIN_CLASS_ROWS {
            return Err(Error::Invalid(format!(
                "class {} has {} training row{}; a mixture per class needs at least {MIN_CLASS_ROWS} \
                 (use --kind class-gaussian, or label more rows of it)",
                class.label,
                idx.len(),
                if idx.len() == 1 { "" } else { "s" }
            )));
        }
        out.push(group(&idx, priors[c]));
    }
    Ok(out)
}

/// EM for every group with `counts[i]` components, from [`EM_STARTS`]
/// seeded k-means++ starts, keeping the start with the best training
/// log-likelihood; `None` if a group's covariances stopped being positive
/// definite from every start.
fn em_groups(groups: &[Group], d: usize, w: &[f64], counts: &[usize], seed: u64) -> Option<Vec<(Fitted, EmReport)>> {
    let one = groups.len() == 1;
    (groups.iter().zip(counts).enumerate())
        .map(|(i, (g, &k))| {
            // Without classes the first seed is the one earlier builds used.
            let seed = if one { seed } else { derive(seed, 11, i as u64) };
            let starts = if k == 1 { 1 } else { EM_STARTS };
            (0..starts)
                .filter_map(|s| {
                    let seed = if s == 0 { seed } else { derive(seed, 12, s as u64) };
                    em(&g.u, g.n, d, &kmeans_start(&g.u, g.n, d, w, k, seed), EM_RIDGE, EM_ROUNDS, EM_TOL)
                })
                .reduce(|a, b| if b.1.mean_log_likelihood > a.1.mean_log_likelihood { b } else { a })
        })
        .collect()
}

/// EM again for every group at `ridge`, from where `fits` ended.
fn em_again(groups: &[Group], d: usize, fits: &[(Fitted, EmReport)], ridge: f64) -> Option<Vec<(Fitted, EmReport)>> {
    (groups.iter().zip(fits))
        .map(|(g, (f, _))| em(&g.u, g.n, d, &responsibilities(&f.mixture, &g.u, g.n), ridge, EM_ROUNDS, EM_TOL))
        .collect()
}

/// How EM ran over all groups: the most rounds any took, converged if all did.
fn joint_report(fits: &[(Fitted, EmReport)]) -> EmReport {
    let n = fits.len().max(1) as f64;
    EmReport {
        iterations: fits.iter().map(|f| f.1.iterations).max().unwrap_or(0),
        mean_log_likelihood: fits.iter().map(|f| f.1.mean_log_likelihood).sum::<f64>() / n,
        converged: fits.iter().all(|f| f.1.converged),
    }
}

/// The groups' mixtures as one, weighted by their shares, and the group of
/// each component.
fn union(groups: &[Group], parts: &[Mixture]) -> (Mixture, Vec<usize>) {
    let weighted: Vec<(f64, &Mixture)> = groups.iter().map(|g| g.log_share).zip(parts).collect();
    Mixture::union(&weighted)
}

/// The best mixture so far.
struct Best {
    mixture: Mixture,
    component_class: Vec<usize>,
    counts: Vec<usize>,
    tried: Tried,
    report: EmReport,
}

/// The search over component counts and ridges: every group's EM for a
/// count, scored by the validation rows under the union.
struct Search<'a> {
    groups: &'a [Group],
    d: usize,
    /// Whitened validation rows and their count.
    v: Vec<f64>,
    nv: usize,
    /// The whitening's log-determinant, to report input-space NLL.
    log_det: f64,
    /// Column weights of the k-means starts' distances (see [`start_weights`]).
    start_weights: Vec<f64>,
    asked: Option<usize>,
    seed: u64,
    quiet: bool,
    labelled: bool,
    best: Option<Best>,
    tried: Vec<Tried>,
    /// Per-group counts already fitted, so a count that every class caps
    /// to the same numbers is not fitted twice.
    seen: Vec<Vec<usize>>,
}

impl Search<'_> {
    /// Fit `k` components (capped per group), try the ridge grid on it;
    /// `Some(true)` if it beat the best so far, `None` if not fitted.
    fn try_count(&mut self, k: usize) -> Option<bool> {
        let counts: Vec<usize> =
            self.groups.iter().map(|g| k.min(if self.asked.is_some() { g.n } else { g.cap })).collect();
        if self.seen.contains(&counts) {
            return None;
        }
        self.seen.push(counts.clone());
        let Some(fits) = em_groups(self.groups, self.d, &self.start_weights, &counts, derive(self.seed, 10, k as u64))
        else {
            if !self.quiet {
                note(format!("mixture of {k}: a covariance stopped being positive definite; skipped"));
            }
            return Some(false);
        };
        let mut improved = false;
        let report = joint_report(&fits);
        let mut ridge_here = (EM_RIDGE, f64::INFINITY);
        for extra in RIDGE_GRID {
            let Some(parts) = fits.iter().map(|f| f.0.with_ridge(extra)).collect::<Option<Vec<_>>>() else { continue };
            let (nll, better) = self.consider(k, &counts, parts, EM_RIDGE + extra, report);
            improved |= better;
            if nll < ridge_here.1 {
                ridge_here = (EM_RIDGE + extra, nll);
            }
        }
        // A larger ridge added after EM is only an estimate of EM run with
        // it: EM again at that ridge, from where the first run ended.
        if ridge_here.0 > EM_RIDGE {
            if let Some(again) = em_again(self.groups, self.d, &fits, ridge_here.0) {
                let report = joint_report(&again);
                let parts = again.into_iter().map(|f| f.0.mixture).collect();
                improved |= self.consider(k, &counts, parts, ridge_here.0, report).1;
            }
        }
        self.tell(k, report.iterations);
        Some(improved)
    }

    /// Score one candidate on the validation rows and keep it if best;
    /// its NLL and whether it is the new best.
    fn consider(
        &mut self,
        k: usize,
        counts: &[usize],
        parts: Vec<Mixture>,
        ridge: f64,
        report: EmReport,
    ) -> (f64, bool) {
        let (m, component_class) = union(self.groups, &parts);
        let nll = -(m.mean_log_density(&self.v, self.nv) + self.log_det);
        let t = Tried { components: k, ridge, validation_nll: nll };
        self.tried.push(t.clone());
        let better = self.best.as_ref().is_none_or(|b| nll < b.tried.validation_nll);
        if better {
            self.best = Some(Best { mixture: m, component_class, counts: counts.to_vec(), tried: t, report });
        }
        (nll, better)
    }

    /// The best ridge's figure for `k` components, on the terminal.
    fn tell(&self, k: usize, rounds: usize) {
        if self.quiet {
            return;
        }
        let here = self.tried.iter().filter(|t| t.components == k);
        if let Some(b) = here.min_by(|a, b| a.validation_nll.total_cmp(&b.validation_nll)) {
            let what =
                if self.labelled { format!("mixtures of up to {k} per class") } else { format!("mixture of {k}") };
            note(format!(
                "{what}: validation NLL {:.4} nats/vector (ridge {:.3e}, {rounds} EM rounds)",
                b.validation_nll, b.ridge
            ));
        }
    }
}

/// Column weights that make the k-means starts measure distance in the
/// input space (rotated, not rescaled: the variance each whitened column
/// had), as clustering the raw features does. In whitened space every
/// low-variance direction weighs as much as a cluster-separating one, and
/// the starts were measured to merge well-separated clusters there.
fn start_weights(l: &Learned) -> Vec<f64> {
    l.model.pre.scale.iter().map(|s| s * s).collect()
}

/// Counts halfway (geometrically, about) between the best count and its
/// doubling neighbours, which the doubling skipped: 6 and 12 around 8.
fn between(best: usize) -> [usize; 2] {
    [best * 3 / 4, best * 3 / 2]
}

/// Fit the mixture into `l.model`; the best validation NLL (nats per
/// vector, input space) goes into the training state. Past `deadline` no
/// further component count is tried once one has fitted; when `stop` is
/// set (Ctrl-C, SIGTERM) the fit ends as interrupted before the next count.
pub(super) fn fit_mixture(
    rows: &Rows,
    l: &mut Learned,
    asked: Option<usize>,
    quiet: bool,
    deadline: Option<std::time::Instant>,
    stop: Option<&std::sync::atomic::AtomicBool>,
) -> Result<()> {
    let d = l.model.dim();
    let train = em_rows(rows, l.settings.seed);
    let groups = groups(rows, l, &train)?;
    let labelled = rows.class_of.is_some();
    let mut search = Search {
        groups: &groups,
        d,
        v: whitened(l, rows.val_data, &rows.val),
        nv: rows.val.len(),
        log_det: l.model.pre.log_det(),
        start_weights: start_weights(l),
        asked,
        seed: l.settings.seed,
        quiet,
        labelled,
        best: None,
        tried: Vec::new(),
        seen: Vec::new(),
    };
    // EM's steps run on this pool (see crate::mixture); the result is the same for any thread count.
    let pool = crate::mixture::pool(l.settings.threads);
    let largest = groups.iter().map(|g| g.n).max().unwrap_or(0);
    let ladder = component_counts(largest, d, asked);
    let mut since_best = 0;
    let out_of_time = |s: &Search| s.best.is_some() && deadline.is_some_and(|d| std::time::Instant::now() >= d);
    let interrupted = || -> Result<()> {
        match stop.is_some_and(|f| f.load(std::sync::atomic::Ordering::SeqCst)) {
            true => Err(Error::Interrupted("interrupted while fitting the mixture".into())),
            false => Ok(()),
        }
    };
    for &k in &ladder {
        interrupted()?;
        if out_of_time(&search) {
            break;
        }
        match pool.install(|| search.try_count(k)) {
            None => break, // every class is at the most its rows allow
            Some(true) => since_best = 0,
            Some(false) => since_best += 1,
        }
        if since_best >= PATIENCE {
            break;
        }
    }
    if asked.is_none() {
        if let Some(k) = search.best.as_ref().map(|b| b.tried.components) {
            for c in between(k).into_iter().filter(|&c| c > 1 && room_for(largest, d, c)) {
                interrupted()?;
                if out_of_time(&search) {
                    break;
                }
                pool.install(|| search.try_count(c));
            }
        }
    }
    let best = search
        .best
        .ok_or_else(|| Error::Invalid("no mixture could be fitted: every covariance was singular".into()))?;
    l.model.meta.mixture = Some(MixtureMeta {
        components: best.mixture.components(),
        per_class: if labelled { best.counts } else { Vec::new() },
        ridge: best.tried.ridge,
        em_iterations: best.report.iterations,
        converged: best.report.converged,
    });
    let (component_class, log_priors) = if labelled {
        (best.component_class, groups.iter().map(|g| g.log_share).collect())
    } else {
        (Vec::new(), Vec::new())
    };
    l.model.density = Box::new(crate::density::MixtureDensity { mixture: best.mixture, component_class, log_priors });
    l.state.best_val = best.tried.validation_nll;
    Ok(())
}
