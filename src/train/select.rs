//! The default `fit`: every density kind that suits the data is fitted on
//! the same training rows and the one with the best validation
//! log-likelihood is kept. A fixed table of settings tuned on one dump does
//! not transfer to the next; the held-out rows can decide.

pub(crate) use super::race::SavedSearch;
use super::race::{minutes, race_flows, race_log, winner};
use super::{fit_one, write_log, FitOptions, LogEntry, Run, GAUSSIAN_BELOW_ROWS_PER_FEATURE};
use crate::error::{Error, Result};
use crate::model::{kind_name, Candidate, Kind, Model};
use crate::output::note;
use std::time::{Duration, Instant};

/// Whether `fit` chooses the density: no density option given, not
/// resuming one run, not told to skip the search, and validation rows to
/// choose on.
pub(super) fn applies(run: &Run, opts: &FitOptions) -> bool {
    opts.implied_kind(run.labels.is_some()).is_none()
        && !opts.no_search
        && !opts.asks_for_a_flow()
        && run.resume.is_none()
        && (run.val.is_some() || opts.val_fraction.unwrap_or(super::DEFAULT_VAL_FRACTION) > 0.0)
}

/// The kinds compared: the (class-)Gaussian, the (class-)mixture, and the
/// flow unless training rows are too few per feature for one
/// (measured: see [`GAUSSIAN_BELOW_ROWS_PER_FEATURE`]).
fn kinds(run: &Run, opts: &FitOptions) -> Vec<Kind> {
    let labelled = run.labels.is_some();
    let mut kinds = vec![if labelled { Kind::ClassGaussian } else { Kind::Gaussian }, Kind::Mixture];
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
        (Kind::Mixture, Some(mm)) if !mm.per_class.is_empty() => {
            let per: Vec<String> = mm.per_class.iter().map(|k| k.to_string()).collect();
            format!("{} components ({} per class), ridge {:.3e}", mm.components, per.join(", "), mm.ridge)
        }
        (Kind::Mixture, Some(mm)) => format!("{} components, ridge {:.3e}", mm.components, mm.ridge),
        (Kind::Flow, _) => format!(
            "{}, best epoch {}",
            flow_shape(m.meta.flow.layers, m.meta.flow.coupling, m.meta.flow_dims, m.dim(), m.meta.flow.hidden),
            t.best_epoch
        ),
        _ => format!("covariance shrinkage {:.3e}", m.pre.shrinkage),
    }
}

fn flow_shape(layers: usize, coupling: crate::flow::Coupling, flow_dims: usize, dims: usize, hidden: usize) -> String {
    let coupling = match coupling {
        crate::flow::Coupling::Affine => "affine",
        crate::flow::Coupling::Spline { .. } => "spline",
    };
    format!("{layers} {coupling} coupling layers over {flow_dims} of {dims} dims, hidden {hidden}")
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

/// Fit every candidate kind and keep the best on the validation rows: the
/// Gaussian, the mixture, and flows raced by successive halving, all within
/// the budget when one is given. An interrupted search writes the best
/// density so far to the run's output.
pub(super) fn fit_best(run: &Run, opts: &FitOptions, saved: Option<&SavedSearch>) -> Result<Model> {
    let started = Instant::now();
    let mut best: Option<Model> = None;
    let mut candidates: Vec<Candidate> = Vec::new();
    let mut flow_epochs: Vec<LogEntry> = Vec::new();
    let deadline = opts.budget.map(|b| started + Duration::from_secs_f64(b.0));
    let quiet_run = Run { output: None, checkpoint: None, log: None, resume: None, deadline, ..*run };
    for kind in kinds(run, opts) {
        let t = Instant::now();
        if kind != Kind::Flow {
            let model = match fit_one(&quiet_run, &FitOptions { kind: Some(kind), quiet: true, ..opts.clone() }) {
                Ok(model) => model,
                // A later kind that does not suit the data is left out; the Gaussian always fits.
                Err(Error::Invalid(why)) if best.is_some() => {
                    if !opts.quiet {
                        note(format!("{} left out of the comparison: {why}", kind_name(kind)));
                    }
                    continue;
                }
                Err(Error::Interrupted(msg)) => return Err(interrupted(run, best, msg)),
                Err(e) => return Err(e),
            };
            let c = Candidate {
                name: kind_name(kind),
                detail: detail(&model),
                seconds: t.elapsed().as_secs_f64(),
                stopped: closed_form_or_em(&model),
                ..candidate(&model)
            };
            keep(opts, &mut candidates, &mut best, model, c);
            continue;
        }
        let first = best.as_ref().expect("a Gaussian kind comes first");
        let (racers, dims) = match race_flows(run, opts, first, saved, started.elapsed().as_secs_f64()) {
            Ok(r) => r,
            Err(Error::Interrupted(msg)) => return Err(interrupted(run, best, msg)),
            Err(e) => return Err(e),
        };
        let seconds_all: f64 = racers.iter().map(|r| r.flow.seconds()).sum();
        flow_epochs = race_log(&racers);
        let best_flow = winner(&racers);
        for (i, r) in racers.into_iter().enumerate() {
            let raced = Candidate {
                name: r.config.name,
                seconds: r.flow.seconds(),
                epochs: r.flow.epochs(),
                stopped: r.stopped.unwrap_or_default(),
                stages: r.stages,
                first_stage: r.first_stage,
                ..candidate_of_kind(kind)
            };
            if i == best_flow {
                let model = r.flow.into_model(&quiet_run)?;
                let c = Candidate {
                    detail: format!("\"{}\": {}", raced.name, detail(&model)),
                    validation_nll: model.meta.training.best_validation_nll,
                    ..raced
                };
                keep(opts, &mut candidates, &mut best, model, c);
            } else {
                let s = r.flow.settings();
                candidates.push(Candidate {
                    detail: format!(
                        "\"{}\": {}",
                        raced.name,
                        flow_shape(s.layers, s.coupling, s.flow_dims, dims, s.hidden)
                    ),
                    validation_nll: r.flow.best_validation_nll(),
                    ..raced
                });
            }
        }
        if !opts.quiet {
            note(format!("flows raced for {}", minutes(seconds_all)));
        }
    }
    let mut model = best.ok_or_else(|| Error::Invalid("no density could be fitted".into()))?;
    let chosen = model.meta.training.best_validation_nll;
    for c in &mut candidates {
        c.chosen = c.kind == model.meta.kind && c.validation_nll == chosen;
    }
    write_log(run, &flow_epochs, &candidates)?;
    model.meta.training.candidates = candidates;
    Ok(model)
}

/// A candidate of `kind` with nothing measured yet.
fn candidate_of_kind(kind: Kind) -> Candidate {
    Candidate {
        kind,
        name: String::new(),
        detail: String::new(),
        validation_nll: f64::INFINITY,
        seconds: 0.0,
        chosen: false,
        epochs: 0,
        stopped: String::new(),
        stages: Vec::new(),
        first_stage: 0,
    }
}

/// A fitted model as a candidate: its kind and validation NLL.
fn candidate(model: &Model) -> Candidate {
    Candidate { validation_nll: model.meta.training.best_validation_nll, ..candidate_of_kind(model.meta.kind) }
}

/// How a candidate fitted without epochs ended.
fn closed_form_or_em(model: &Model) -> String {
    match &model.meta.mixture {
        Some(m) if m.converged => format!("EM converged ({} iterations)", m.em_iterations),
        Some(m) => format!("EM stopped at {} iterations, not converged", m.em_iterations),
        None => "closed form".to_string(),
    }
}

/// List a fitted candidate, and keep it when it is clearly better than the
/// best so far.
fn keep(opts: &FitOptions, candidates: &mut Vec<Candidate>, best: &mut Option<Model>, model: Model, c: Candidate) {
    if !opts.quiet {
        note(format!(
            "candidate {}: validation NLL {:.4} nats/vector ({:.1} s; {})",
            kind_name(c.kind),
            c.validation_nll,
            c.seconds,
            c.detail
        ));
    }
    candidates.push(c);
    // The Gaussian's shrinkage can keep directions along which the training
    // rows do not vary, which the unshrunk whitening of the mixture and the
    // flows leaves out; densities over different dimensions do not compare,
    // so the Gaussian then stands aside (the one-component mixture and each
    // flow's untrained start take its place).
    if let Some(b) = best.as_ref().filter(|b| b.dim() != model.dim()) {
        let why = format!(
            "not compared: its shrinkage keeps {} directions that have no training variance",
            b.dim().abs_diff(model.dim())
        );
        if !opts.quiet {
            note(format!("candidate {} {why}", kind_name(b.meta.kind)));
        }
        if let Some(first) = candidates.first_mut() {
            first.detail = format!("{}; {why}", first.detail);
        }
        *best = Some(model);
    } else if best.as_ref().is_none_or(|b| clearly_better(&model, b)) {
        *best = Some(model);
    }
}

/// Continue an interrupted search from its checkpoint: the Gaussian kinds
/// are fitted again (they are quick and deterministic), the flows go on
/// from where they stopped.
pub(super) fn resume(run: &Run, opts: &FitOptions, saved: &SavedSearch) -> Result<Model> {
    if opts.implied_kind(run.labels.is_some()).is_some() || opts.asks_for_a_flow() {
        return Err(Error::Invalid(
            "this checkpoint is of a search over densities; resume it with the options it was started with".into(),
        ));
    }
    fit_best(run, opts, Some(saved))
}

/// The error of an interrupted search, after writing the best density so
/// far where the run's model goes.
fn interrupted(run: &Run, best: Option<Model>, msg: String) -> Error {
    match (best, run.output) {
        (Some(model), Some(out)) => match model.save(out) {
            Ok(()) => Error::Interrupted(format!(
                "search interrupted ({msg}); the best density so far ({}) written to {}",
                kind_name(model.meta.kind),
                out.display()
            )),
            Err(e) => e,
        },
        _ => Error::Interrupted(format!("search interrupted ({msg})")),
    }
}
