//! Checkpoints: writing them, reading them back, and the checks that a
//! resumed run continues the run that wrote it.

use super::start::labels_checksum;
use super::{validation_rows, Adam, Fingerprint, FitOptions, Learned, Run, Settings, TrainState};
use crate::error::{Error, Result};
use crate::model::Model;
use crate::output::note;
use std::path::{Path, PathBuf};

const CHECKPOINT_KEY: &str = "tidemark_checkpoint";
/// Metadata key of a search checkpoint (see `select`).
pub(super) const SEARCH_KEY: &str = "tidemark_search";

/// A path made absolute, so that it names the same file from any directory.
pub(super) fn absolute(path: Option<&Path>) -> Option<PathBuf> {
    path.map(|p| std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf()))
}

/// A checkpoint read back, to continue the run that wrote it: one
/// training run, or a search over densities.
pub struct Checkpoint {
    path: PathBuf,
    saved: Saved,
}

pub(super) enum Saved {
    Run(Learned),
    Search(super::select::SavedSearch),
}

impl Checkpoint {
    pub fn load(path: &Path) -> Result<Checkpoint> {
        let (model, extras) = Model::load_with(path)?;
        if let Ok(json) = extras.metadata(SEARCH_KEY) {
            let search = super::select::SavedSearch::read(path, &json, extras)?;
            return Ok(Checkpoint { path: path.to_path_buf(), saved: Saved::Search(search) });
        }
        let state: TrainState = serde_json::from_str(&extras.metadata(CHECKPOINT_KEY)?)
            .map_err(|e| Error::model(path, format!("bad checkpoint state: {e}")))?;
        let settings: Settings = serde_json::from_value(model.meta.training.settings.clone())
            .map_err(|e| Error::model(path, format!("bad checkpoint settings: {e}")))?;
        let n = model.flow().map_or(0, |f| f.param_count());
        let adam = Adam {
            m: extras.tensor("checkpoint.adam_m", n)?,
            v: extras.tensor("checkpoint.adam_v", n)?,
            t: state.adam_t,
        };
        let best_params = extras.tensor("checkpoint.best_params", n)?;
        let learned = Learned { model, settings, state, best_params, adam };
        Ok(Checkpoint { path: path.to_path_buf(), saved: Saved::Run(learned) })
    }

    pub(super) fn saved(&self) -> &Saved {
        &self.saved
    }

    fn paths(&self) -> (Option<&Path>, Option<&Path>) {
        match &self.saved {
            Saved::Run(l) => (l.state.model_path.as_deref(), l.state.log_path.as_deref()),
            Saved::Search(s) => s.paths(),
        }
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The model file the interrupted run was writing.
    pub fn model_path(&self) -> Option<&Path> {
        self.paths().0
    }

    /// The training log the interrupted run was writing.
    pub fn log_path(&self) -> Option<&Path> {
        self.paths().1
    }
}

/// Continue from a checkpoint: the data, validation rows and labels must
/// be the ones the run was started on, and options given again must agree
/// with its settings (those that only steer the rest of the run apply).
pub(super) fn resume(checkpoint: &Checkpoint, run: &Run, opts: &FitOptions) -> Result<Learned> {
    let Saved::Run(learned) = &checkpoint.saved else {
        return Err(Error::Invalid(format!(
            "{}: is the checkpoint of a search over densities; resume it without density options",
            checkpoint.path.display()
        )));
    };
    let mut learned = learned.clone();
    same_inputs(run, &learned.state)?;
    // A minibatch larger than the training rows was cut to them.
    let train_rows = run.data.rows - validation_rows(run.data.rows, learned.settings.val_fraction);
    let opts = &FitOptions { batch_size: opts.batch_size.map(|b| b.min(train_rows)), ..opts.clone() };
    for msg in apply_resume_options(&mut learned.settings, &learned.state, opts)? {
        if !opts.quiet {
            note(msg);
        }
    }
    learned.state.model_path = absolute(run.output);
    learned.state.log_path = absolute(run.log);
    Ok(learned)
}

/// The data, validation rows and labels of a resumed run must be the ones
/// the run was started on.
pub(super) fn same_inputs(run: &Run, state: &TrainState) -> Result<()> {
    let refuse = |what: &Path, fp: &Fingerprint| {
        Error::Invalid(format!(
            "{}: differs from the data this run was started on ({} x {}, checksum {:016x}); resume needs the same file",
            what.display(),
            fp.rows,
            fp.cols,
            fp.checksum
        ))
    };
    if Fingerprint::of(run.data) != state.data {
        return Err(refuse(&run.data.path, &state.data));
    }
    match (run.val, &state.val_data) {
        (Some(v), Some(fp)) if Fingerprint::of(v) != *fp => return Err(refuse(&v.path, fp)),
        (None, Some(_)) | (Some(_), None) => {
            return Err(Error::Invalid("give --val on resume exactly when the run was started with it".into()))
        }
        _ => {}
    }
    match (run.labels.map(labels_checksum), state.labels) {
        (Some(given), Some(kept)) if given != kept => {
            return Err(Error::Invalid(
                "--labels: differ from the labels this run was started with; resume needs the same labels".into(),
            ))
        }
        (Some(_), None) => {
            return Err(Error::Invalid("--labels: this run was started without labels; drop --labels".into()))
        }
        (None, Some(_)) => {
            return Err(Error::Invalid("this run was started with --labels; give the same labels file again".into()))
        }
        _ => {}
    }
    Ok(())
}

/// Options given again with `--resume`. Those that only steer the rest of
/// the run (epochs, patience, threads, checkpointing, retries) are applied,
/// each with a line saying so; any other that differs from the checkpoint's
/// settings is refused, naming it.
fn apply_resume_options(s: &mut Settings, state: &TrainState, o: &FitOptions) -> Result<Vec<String>> {
    keep("--kind", o.kind, s.kind)?;
    keep("--background-noise", o.background_noise.map(Some), s.background_noise)?;
    keep("--method", o.method, s.method)?;
    keep("--layers", o.layers, s.layers)?;
    keep("--hidden", o.hidden, s.hidden)?;
    keep("--depth", o.depth, s.depth)?;
    keep("--clamp", o.clamp, s.clamp)?;
    keep("--mixing", o.mixing, s.mixing)?;
    keep("--lu-rate", o.lu_rate.map(Some), s.lu_rate)?;
    let coupling = |c: &crate::flow::Coupling| match c {
        crate::flow::Coupling::Affine => super::CouplingKind::Affine,
        crate::flow::Coupling::Spline { .. } => super::CouplingKind::Spline,
    };
    keep("--coupling", o.coupling, coupling(&s.coupling))?;
    if let crate::flow::Coupling::Spline { bins, tail_bound } = s.coupling {
        keep("--bins", o.bins, bins)?;
        keep("--tail-bound", o.tail_bound, tail_bound)?;
    }
    keep("--flow-dims", o.flow_dims, s.flow_dims)?;
    keep("--batch-size", o.batch_size, s.batch_size)?;
    keep("--lr", o.lr, s.lr)?;
    keep("--val-fraction", o.val_fraction.filter(|_| !s.val_file), s.val_fraction)?;
    keep("--dropout", o.dropout, s.dropout)?;
    keep("--noise", o.noise, s.noise)?;
    keep("--dead-threshold", o.dead_threshold, s.dead_threshold)?;
    keep("--weight-decay", o.weight_decay, s.weight_decay)?;
    keep("--grad-clip", o.grad_clip, s.grad_clip)?;
    keep("--seed", o.seed, s.seed)?;
    let mut notes = Vec::new();
    if let Some(epochs) = o.epochs.filter(|&e| e != s.epochs) {
        let done = state.epoch - 1;
        if epochs < done {
            return Err(Error::Invalid(format!("--epochs {epochs}: this run has already trained {done} epochs")));
        }
        notes.push(format!(
            "resuming with --epochs {epochs} instead of {}: the learning-rate schedule spans the new length",
            s.epochs
        ));
        s.epochs = epochs;
    }
    let mut apply = |flag: &str, given: Option<usize>, kept: &mut usize| {
        if let Some(v) = given.filter(|v| v != kept) {
            notes.push(format!("resuming with {flag} {v} instead of {kept}"));
            *kept = v;
        }
    };
    apply("--patience", o.patience, &mut s.patience);
    apply("--threads", o.threads, &mut s.threads);
    apply("--checkpoint-every", o.checkpoint_every, &mut s.checkpoint_every);
    apply("--max-retries", o.max_retries, &mut s.max_retries);
    if let Some(m) = o.checkpoint_minutes.filter(|&m| m != s.checkpoint_minutes) {
        notes.push(format!("resuming with --checkpoint-minutes {m} instead of {}", s.checkpoint_minutes));
        s.checkpoint_minutes = m;
    }
    Ok(notes)
}

/// Refuse an option given with `--resume` that differs from the setting the
/// run was started with.
fn keep<T: PartialEq + std::fmt::Debug>(flag: &str, given: Option<T>, kept: T) -> Result<()> {
    match given {
        Some(v) if v != kept => Err(Error::Invalid(format!(
            "{flag} {v:?} differs from the checkpoint's {kept:?}; a resumed run keeps the settings it was started \
             with (drop {flag}, or start a new run)"
        ))),
        _ => Ok(()),
    }
}

pub(super) fn save_checkpoint(run: &Run, l: &Learned) -> Result<()> {
    let Some(path) = &run.checkpoint else { return Ok(()) };
    let state = serde_json::to_string(&l.state).map_err(|e| Error::Invalid(e.to_string()))?;
    let extra = vec![
        ("checkpoint.best_params".to_string(), &l.best_params[..]),
        ("checkpoint.adam_m".to_string(), &l.adam.m[..]),
        ("checkpoint.adam_v".to_string(), &l.adam.v[..]),
    ];
    l.model.save_with(path, extra, Some((CHECKPOINT_KEY, state)))
}
