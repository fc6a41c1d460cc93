//! The default `fit`: every density kind that suits the data is fitted on
//! the same training rows and the one with the best validation
//! log-likelihood is kept. A fixed table of settings tuned on one dump does
//! not transfer to the next; the held-out rows can decide.

use super::{fit_one, FitOptions, Run, GAUSSIAN_BELOW_ROWS_PER_FEATURE};
use crate::error::{Error, Result};
use crate::model::{kind_name, Candidate, Kind, Model};
use crate::output::note;
use std::time::Instant;

/// Whether `fit` chooses the density: no kind or flow option given, not
/// resuming one run, not told to skip the search, and validation rows to
/// choose on.
pub(super) fn applies(run: &Run, opts: &FitOptions) -> bool {
    opts.kind.is_none()
        && !opts.no_search
        && !opts.asks_for_a_flow()
        && run.resume.is_none()
        && (run.val.is_some() || opts.val_fraction.unwrap_or(super::DEFAULT_VAL_FRACTION) > 0.0)
}

/// The kinds compared: the (class-)Gaussian, the mixture without labels,
/// and the flow unless training rows are too few per feature for one
/// (measured: see [`GAUSSIAN_BELOW_ROWS_PER_FEATURE`]).
fn kinds(run: &Run, opts: &FitOptions) -> Vec<Kind> {
    let labelled = run.labels.is_some();
    let mut kinds = vec![if labelled { Kind::ClassGaussian } else { Kind::Gaussian }];
    if !labelled {
        kinds.push(Kind::Mixture);
    }
    let val_share = if run.val.is_some() { 0.0 } else { opts.val_fraction.unwrap_or(super::DEFAULT_VAL_FRACTION) };
    let train_rows = run.data.rows as f64 * (1.0 - val_share);
    if train_rows >= GAUSSIAN_BELOW_ROWS_PER_FEATURE * run.data.cols as f64 {
        kinds.push(Kind::Flow);
    } else if !opts.quiet {
        note(format!(
            "{:.0} training rows for {} features ({:.1} per feature): too few for a flow, comparing the other kinds; \
             --kind flow fits one anyway",
            train_rows,
            run.data.cols,
            train_rows / run.data.cols as f64
        ));
    }
    kinds
}

/// What distinguishes a fitted candidate, for the leaderboard.
fn detail(m: &Model) -> String {
    let t = &m.meta.training;
    match (m.meta.kind, &m.meta.mixture) {
        (Kind::Mixture, Some(mm)) => format!("{} components, ridge {:e}", mm.components, mm.ridge),
        (Kind::Flow, _) => format!(
            "{} coupling layers over {} of {} dims, hidden {}, {} epochs (best {})",
            m.meta.flow.layers,
            m.meta.flow_dims,
            m.dim(),
            m.meta.flow.hidden,
            t.epochs_run,
            t.best_epoch
        ),
        _ => format!("covariance shrinkage {:.3e}", m.pre.shrinkage),
    }
}

/// Whether `new` (a more flexible kind) beats `old` on the validation rows
/// by more than one standard error of the paired per-row difference in
/// NLL: within noise the simpler density is kept (the one-standard-error
/// rule; Breiman et al. 1984, "Classification and Regression Trees").
/// Both models keep the NLLs of the same validation rows, in the same order.
fn clearly_better(new: &Model, old: &Model) -> bool {
    let (a, b) = (&new.refs.validation_nll, &old.refs.validation_nll);
    let mean_new = new.meta.training.best_validation_nll;
    let mean_old = old.meta.training.best_validation_nll;
    if a.len() != b.len() || a.len() < 2 {
        return mean_new < mean_old;
    }
    let n = a.len() as f64;
    let diff: Vec<f64> = b.iter().zip(a).map(|(o, w)| o - w).collect();
    let mean = diff.iter().sum::<f64>() / n;
    let sd = (diff.iter().map(|d| (d - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    mean > sd / n.sqrt()
}

/// Fit every candidate kind and keep the best on the validation rows. Only
/// the flow writes the run's log and checkpoints (the others take seconds
/// to minutes); an interrupted flow stops the whole run.
pub(super) fn fit_best(run: &Run, opts: &FitOptions) -> Result<Model> {
    let mut best: Option<Model> = None;
    let mut candidates: Vec<Candidate> = Vec::new();
    for kind in kinds(run, opts) {
        let started = Instant::now();
        let flow = kind == Kind::Flow;
        let quiet_run = Run { output: None, checkpoint: None, log: None, ..*run };
        let sub = if flow { run } else { &quiet_run };
        let sub_opts = FitOptions { kind: Some(kind), quiet: opts.quiet || !flow, ..opts.clone() };
        if flow && !opts.quiet {
            note("candidate flow:");
        }
        let model = match fit_one(sub, &sub_opts) {
            Ok(m) => m,
            // A flow that diverges is left out; the others stand.
            Err(Error::Invalid(msg)) if flow && best.is_some() => {
                if !opts.quiet {
                    note(format!("candidate flow left out: {msg}"));
                }
                continue;
            }
            Err(e) => return Err(e),
        };
        let nll = model.meta.training.best_validation_nll;
        let candidate = Candidate {
            kind,
            detail: detail(&model),
            validation_nll: nll,
            seconds: started.elapsed().as_secs_f64(),
            chosen: false,
        };
        if !opts.quiet {
            note(format!(
                "candidate {}: validation NLL {:.4} nats/vector ({:.1} s; {})",
                kind_name(kind),
                nll,
                candidate.seconds,
                candidate.detail
            ));
        }
        candidates.push(candidate);
        if best.as_ref().is_none_or(|b| clearly_better(&model, b)) {
            best = Some(model);
        }
    }
    let mut model = best.ok_or_else(|| Error::Invalid("no density could be fitted".into()))?;
    let chosen = model.meta.kind;
    for c in &mut candidates {
        c.chosen = c.kind == chosen;
    }
    model.meta.training.candidates = candidates;
    Ok(model)
}
