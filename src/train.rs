//! Training: split, fit the preprocessing, then fit the flow by minibatch
//! Adam on the negative log-likelihood, keeping the weights with the best
//! validation NLL. The untrained flow (identity, i.e. the whitened Gaussian)
//! is the first candidate, so a fitted flow never ends worse than a Gaussian
//! on the validation rows.

use crate::check;
use crate::data::{mix64, Dataset};
use crate::density::FlowDensity;
use crate::error::{Error, Result};
use crate::flow::{Coupling, Flow, FlowSpec, Mixing, Workers, HALF_LN_2PI};
use crate::model::{leading_columns_into, Candidate, Kind, Model, ScoringMeta, ScoringRefs, Spread};
use crate::output::note;
use crate::preprocess::{Method, TransformScratch, DEFAULT_DEAD_THRESHOLD};
use crate::simd::elementwise;
pub use checkpoint::Checkpoint;
use checkpoint::{resume, save_checkpoint};
use progress::Progress;
use rand::rngs::StdRng;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

mod checkpoint;
mod fit_mixture;
mod log;
mod optimizer;
mod options;
mod progress;
mod race;
mod select;
mod start;
use log::write_log;
pub use log::{read_log, LogEntry, TrainingLog};
use optimizer::clip_norm;
pub use optimizer::{learning_rate, Adam, ParamGroups};
pub use options::*;
use start::{class_indices, new_learned, start};

/// Independent seeds from (seed, purpose, counter).
fn derive(seed: u64, purpose: u64, counter: u64) -> u64 {
    mix64(seed ^ purpose.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ counter.wrapping_mul(0xD1B5_4A32_D192_ED03))
}

/// Seeded split of row indices into (train, validation).
fn split_rows(n: usize, val_fraction: f64, seed: u64) -> (Vec<usize>, Vec<usize>) {
    let mut idx: Vec<usize> = (0..n).collect();
    idx.shuffle(&mut StdRng::seed_from_u64(derive(seed, 1, 0)));
    let val = idx.split_off(n - validation_rows(n, val_fraction));
    (idx, val)
}

/// Rows of `n` that the seeded split holds out for validation.
fn validation_rows(n: usize, val_fraction: f64) -> usize {
    if val_fraction > 0.0 {
        ((n as f64 * val_fraction).round() as usize).clamp(1, n - 1)
    } else {
        0
    }
}

/// Fewest rows `fit` accepts.
pub const MIN_ROWS: usize = 10;

/// Most training rows used for the log-likelihood spread stored in the model.
const SPREAD_ROWS: usize = 50_000;

/// What a training run reads and writes besides its options.
pub struct Run<'a> {
    pub data: &'a Dataset,
    /// Separate validation rows (otherwise a seeded split of `data`).
    pub val: Option<&'a Dataset>,
    pub labels: Option<&'a [i64]>,
    /// Where the best model so far is written when training stops early
    /// (interrupted or diverged).
    pub output: Option<&'a Path>,
    /// Where checkpoints are kept (none when `None`).
    pub checkpoint: Option<PathBuf>,
    /// Continue from this checkpoint.
    pub resume: Option<&'a Checkpoint>,
    /// JSON-lines training log.
    pub log: Option<&'a Path>,
    /// Set (by a signal handler) to stop after the current step.
    pub stop: Option<&'a AtomicBool>,
    /// When a search's budget ends: the mixture tries no further component
    /// count after it (the flows' race keeps its own clock).
    pub deadline: Option<Instant>,
}

impl<'a> Run<'a> {
    /// A run that only trains: no files, no checkpoints.
    pub fn new(data: &'a Dataset) -> Run<'a> {
        Run {
            data,
            val: None,
            labels: None,
            output: None,
            checkpoint: None,
            resume: None,
            log: None,
            stop: None,
            deadline: None,
        }
    }
}

/// Shape and checksum of the data a run was started on.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Fingerprint {
    pub rows: usize,
    pub cols: usize,
    pub checksum: u64,
}

impl Fingerprint {
    fn of(d: &Dataset) -> Fingerprint {
        Fingerprint { rows: d.rows, cols: d.cols, checksum: d.checksum() }
    }
}

/// Everything besides tensors that a checkpoint must hold to continue a run
/// bit for bit: shuffles, noise and dropout are derived from (seed, epoch,
/// step), so the position is enough to reproduce them.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
struct TrainState {
    /// The epoch in progress (1-based).
    epoch: usize,
    /// Minibatches of this epoch already done.
    batch: usize,
    step: usize,
    adam_t: u64,
    train_sum: f64,
    grad_norm_sum: f64,
    best_val: f64,
    best_epoch: usize,
    since_best: usize,
    gaussian_val: f64,
    lr_scale: f64,
    retries: usize,
    seconds: f64,
    log: Vec<LogEntry>,
    data: Fingerprint,
    val_data: Option<Fingerprint>,
    /// Checksum of the class labels, if any.
    labels: Option<u64>,
    /// Training ended (early stopping or the last epoch): nothing to resume
    /// but the steps after the main flow.
    finished: bool,
    /// The run's model file and training log (absolute), so that a resumed
    /// run knows which existing files are its own.
    #[serde(default)]
    model_path: Option<PathBuf>,
    #[serde(default)]
    log_path: Option<PathBuf>,
}

/// The learned state that a checkpoint saves besides the model skeleton.
#[derive(Clone)]
struct Learned {
    model: Model,
    settings: Settings,
    state: TrainState,
    best_params: Vec<f32>,
    adam: Adam,
}

/// Fit a model to `x` with no files written (library use and tests).
pub fn fit(x: &Dataset, labels: Option<&[i64]>, opts: &FitOptions) -> Result<Model> {
    fit_run(&Run { labels, ..Run::new(x) }, opts)
}

/// Fit a model as `run` describes: fresh or resumed, with checkpoints, a
/// log and a stop flag when given. Without a kind or flow option, the kind
/// is chosen on the validation rows (see [`select`]).
pub fn fit_run(run: &Run, opts: &FitOptions) -> Result<Model> {
    opts.check(&Source::Flags)?;
    if let Some(checkpoint::Saved::Search(saved)) = run.resume.map(Checkpoint::saved) {
        return select::resume(run, opts, saved);
    }
    if select::applies(run, opts) {
        return select::fit_best(run, opts, None);
    }
    fit_one(run, opts)
}

/// Fit the one model that `opts` (with its defaults) describe.
fn fit_one(run: &Run, opts: &FitOptions) -> Result<Model> {
    let started = Instant::now();
    for path in [run.output, run.checkpoint.as_deref(), run.log].into_iter().flatten() {
        crate::output::check_directory(path)?;
    }
    let mut learned = match run.resume {
        Some(checkpoint) => resume(checkpoint, run, opts)?,
        None => start(run, opts)?,
    };
    if !opts.quiet {
        let json = serde_json::to_string(&learned.settings).map_err(|e| Error::Invalid(e.to_string()))?;
        note(format!("settings: {json}"));
        if run.resume.is_some() {
            let s = &learned.state;
            note(format!("resuming at epoch {} (batch {}, step {})", s.epoch, s.batch, s.step));
        }
    }
    train(run, opts, &mut learned, started, None)?;
    put_params(&mut learned.model, &learned.best_params);
    if learned.settings.kind == Kind::Mixture {
        let rows = Rows::new(run, &learned.settings, &learned.model);
        fit_mixture::fit_mixture(&rows, &mut learned, opts.components, opts.quiet, run.deadline, run.stop)?;
    }
    if let Some(sigma) = learned.settings.background_noise {
        let bg = train_background(run, opts, &learned, sigma, started)?;
        learned.model.meta.background = Some(bg.spec.clone());
        learned.model.background = Some(bg);
    }
    finish(run, &mut learned)?;
    Ok(learned.model)
}

/// A flow trained in stages, so that a search can compare many and carry
/// on with the best (successive halving). It writes no files.
pub(crate) struct Staged {
    learned: Learned,
}

impl Staged {
    pub(crate) fn new(run: &Run, opts: &FitOptions) -> Result<Staged> {
        Ok(Staged { learned: start(run, opts)? })
    }

    /// Train on until the pause (or until training ends earlier).
    pub(crate) fn train_to(&mut self, run: &Run, opts: &FitOptions, pause: Pause) -> Result<()> {
        train(run, opts, &mut self.learned, Instant::now(), Some(pause))
    }

    /// Seconds spent training so far.
    pub(crate) fn seconds(&self) -> f64 {
        self.learned.state.seconds
    }

    /// Best validation NLL so far, nats per vector.
    pub(crate) fn best_validation_nll(&self) -> f64 {
        self.learned.state.best_val
    }

    /// Epochs done so far.
    pub(crate) fn epochs(&self) -> usize {
        self.learned.state.log.len()
    }

    /// No more epochs to run (the last one, or early stopping).
    pub(crate) fn finished(&self) -> bool {
        self.learned.state.finished || self.learned.state.epoch > self.learned.settings.epochs
    }

    /// Trainable parameters of the flow.
    pub(crate) fn parameters(&self) -> usize {
        params(&self.learned.model).len()
    }

    /// Why a finished flow stopped.
    pub(crate) fn why_finished(&self) -> String {
        let (st, s) = (&self.learned.state, &self.learned.settings);
        if st.since_best >= s.patience {
            format!("early stopping (no validation gain in {} epochs)", s.patience)
        } else {
            format!("all {} epochs", s.epochs)
        }
    }

    /// The epochs so far, for the search's log, each marked with `name`.
    pub(crate) fn log_as(&self, name: &str) -> impl Iterator<Item = LogEntry> + '_ {
        let name = name.to_string();
        self.learned.state.log.iter().map(move |e| LogEntry { candidate: Some(name.clone()), ..e.clone() })
    }

    pub(crate) fn settings(&self) -> &Settings {
        &self.learned.settings
    }

    /// Dimensions of the whitened space the flow sits on.
    pub(crate) fn dim(&self) -> usize {
        self.learned.model.dim()
    }

    fn state(&self) -> &TrainState {
        &self.learned.state
    }

    /// The tensors a search checkpoint keeps of this flow.
    fn tensors(&self) -> [&[f32]; 4] {
        let l = &self.learned;
        [params(&l.model), &l.best_params, &l.adam.m, &l.adam.v]
    }

    /// Put back what [`Staged::tensors`] and the state saved.
    fn restore(&mut self, state: TrainState, [params, best, m, v]: [Vec<f32>; 4]) {
        let l = &mut self.learned;
        l.adam = Adam { m, v, t: state.adam_t };
        put_params(&mut l.model, &params);
        l.best_params = best;
        l.state = state;
    }

    /// The model with its best weights.
    pub(crate) fn into_model(mut self, run: &Run) -> Result<Model> {
        put_params(&mut self.learned.model, &self.learned.best_params);
        finish(run, &mut self.learned)?;
        Ok(self.learned.model)
    }
}

/// The parameters of the model's flow (none for the other kinds).
fn params(model: &Model) -> &[f32] {
    model.flow().map_or(&[], |f| &f.params)
}

/// Set the parameters of the model's flow (nothing to set for the other kinds).
fn put_params(model: &mut Model, params: &[f32]) {
    if let Some(f) = model.density.flow_mut() {
        f.params.clone_from_slice(params);
    }
}

/// The flow that training steps: only a flow's training runs epochs.
fn trained_flow(model: &mut Model) -> &mut Flow {
    model.density.flow_mut().expect("only a flow trains by epochs")
}

/// Train the background flow of the likelihood-ratio score (Ren et al.
/// 2019, adapted to embeddings): a smaller flow on the same whitened
/// training vectors perturbed with Gaussian noise of scale `sigma`. It is
/// not checkpointed; an interrupted run resumes by training it again.
fn train_background(run: &Run, opts: &FitOptions, main: &Learned, sigma: f64, started: Instant) -> Result<Flow> {
    let s = &main.settings;
    let settings = Settings {
        noise: sigma,
        layers: (s.layers / 2).max(2.min(s.layers)),
        hidden: (s.hidden / 2).max(32),
        background_noise: None,
        ..s.clone()
    };
    let spec =
        FlowSpec { layers: settings.layers, hidden: settings.hidden, classes: 0, ..main.model.meta.flow.clone() };
    let mut model = main.model.clone();
    model.density = Box::new(FlowDensity::new(Flow::new(spec, derive(s.seed, 7, 0)), model.dim(), Vec::new()));
    model.meta.classes.clear();
    let quiet_run = Run { checkpoint: None, log: None, output: None, resume: None, labels: None, ..*run };
    let mut bg = new_learned(&quiet_run, model, settings, false)?;
    if !opts.quiet {
        note(format!("training the background flow (noise {sigma})"));
    }
    train(&quiet_run, opts, &mut bg, started, None)?;
    put_params(&mut bg.model, &bg.best_params);
    Ok(trained_flow(&mut bg.model).clone())
}

/// Train and validation rows, their classes, and how to whiten them.
struct Rows<'a> {
    data: &'a Dataset,
    train: Vec<usize>,
    val_data: &'a Dataset,
    val: Vec<usize>,
    /// Class index of every data row (class-conditional models).
    class_of: Option<Vec<u32>>,
}

impl<'a> Rows<'a> {
    fn new(run: &Run<'a>, s: &Settings, model: &Model) -> Rows<'a> {
        let (train, val) = split_rows(run.data.rows, s.val_fraction, s.seed);
        let class_of =
            run.labels.filter(|_| !model.meta.classes.is_empty()).map(|l| class_indices(l, &model.meta.classes));
        let (val_data, val) = match run.val {
            Some(v) => (v, (0..v.rows).collect()),
            // Without validation rows the training rows stand in.
            None if val.is_empty() => (run.data, train.clone()),
            None => (run.data, val),
        };
        Rows { data: run.data, train, val_data, val, class_of }
    }

    /// The flow's part of the whitened rows `idx` of the training data, and
    /// their classes, into `b` (reused from batch to batch).
    fn prepare_batch(&self, model: &Model, idx: &[usize], b: &mut BatchBuffers) {
        let (d, k, n) = (model.dim(), model.meta.flow_dims, idx.len());
        self.data.gather(idx, &mut b.raw);
        // When the flow models every dimension, whiten straight into `head`.
        let whitened = if k == d { &mut b.head } else { &mut b.whitened };
        whitened.resize(n * d, 0.0);
        model.pre.transform_with(&b.raw, n, whitened, None, &mut b.scratch);
        if k < d {
            leading_columns_into(&b.whitened, d, k, &mut b.head);
        }
        b.classes.clear();
        if let Some(of) = &self.class_of {
            b.classes.extend(idx.iter().map(|&r| of[r]));
        }
    }

    /// Mean negative log-likelihood of the validation rows, nats per vector.
    fn val_nll(&self, model: &Model, threads: usize) -> f64 {
        let ll = model.evaluate_rows(self.val_data, &self.val, threads).log_likelihood;
        -ll.iter().sum::<f64>() / ll.len() as f64
    }
}

/// One training batch on its way from the data file to the flow; kept
/// across steps so that a step allocates nothing once they have grown.
#[derive(Default)]
struct BatchBuffers {
    raw: Vec<f32>,
    /// All whitened features (only when the flow models fewer).
    whitened: Vec<f32>,
    /// The flow's input: the first `flow_dims` whitened features of each row.
    head: Vec<f32>,
    classes: Vec<u32>,
    scratch: TransformScratch,
}

/// Why the training loop stopped before its end.
enum Halt {
    Interrupted,
    Diverged(usize),
}

/// Where a stage of a search pauses: after this epoch, or after the first
/// epoch that ends past the deadline.
#[derive(Clone, Copy)]
pub(crate) struct Pause {
    pub epoch: usize,
    pub deadline: Option<Instant>,
}

/// Train until the run finishes (last epoch or early stopping) or, with a
/// `pause`, until the stage ends.
fn train(run: &Run, opts: &FitOptions, l: &mut Learned, started: Instant, pause: Option<Pause>) -> Result<()> {
    if l.model.flow().is_none() {
        // The other kinds were fitted when they were built.
        return Ok(());
    }
    let until = pause.map_or(usize::MAX, |p| p.epoch);
    let deadline = pause.and_then(|p| p.deadline);
    let s = l.settings.clone();
    let rows = Rows::new(run, &s, &l.model);
    let (d, k) = (l.model.dim(), s.flow_dims);
    let n_train = rows.train.len();
    let steps_per_epoch = n_train.div_ceil(s.batch_size);
    let total_steps = steps_per_epoch * s.epochs;
    let mut workers = Workers::new(trained_flow(&mut l.model), s.threads, s.batch_size);
    let mut grad = vec![0.0f32; params(&l.model).len()];
    let mut batch = BatchBuffers::default();
    let groups = ParamGroups::for_flow(trained_flow(&mut l.model), s.lu_block_rate());
    let position = |st: &TrainState| (st.epoch - 1) * steps_per_epoch + st.batch;
    let progress = Progress::new(total_steps, position(&l.state), opts.quiet);
    let seconds_before = l.state.seconds;
    let mut last_checkpoint = Instant::now();
    let mut injected = false;
    // The last good state, for rolling back after a divergence.
    let mut snapshot = (params(&l.model).to_vec(), l.adam.clone(), l.state.clone());
    let mut epoch_started = Instant::now();
    let mut epoch_samples = 0usize;
    'epochs: while !l.state.finished && l.state.epoch <= s.epochs.min(until) {
        let mut order = rows.train.clone();
        order.shuffle(&mut StdRng::seed_from_u64(derive(s.seed, 2, l.state.epoch as u64)));
        if l.state.batch == 0 {
            snapshot = (params(&l.model).to_vec(), l.adam.clone(), l.state.clone());
        }
        while l.state.batch < steps_per_epoch {
            let chunk = &order[l.state.batch * s.batch_size..((l.state.batch + 1) * s.batch_size).min(n_train)];
            rows.prepare_batch(&l.model, chunk, &mut batch);
            if s.noise > 0.0 {
                let mut rng = StdRng::seed_from_u64(derive(s.seed, 3, l.state.step as u64));
                let noise = s.noise as f32;
                for v in &mut batch.head {
                    *v += noise * <StandardNormal as Distribution<f32>>::sample(&StandardNormal, &mut rng);
                }
            }
            let dropout = (s.dropout > 0.0).then(|| (s.dropout as f32, derive(s.seed, 4, l.state.step as u64)));
            let classes = rows.class_of.is_some().then_some(&batch.classes[..]);
            let nll =
                workers.nll_and_grad(trained_flow(&mut l.model), &batch.head, classes, chunk.len(), dropout, &mut grad);
            if opts.inject_nan_at_step == Some(l.state.step) && !injected {
                injected = true;
                grad[0] = f32::NAN;
            }
            // Non-finite when any gradient is.
            let grad_norm = sum_of_squares(&grad).sqrt();
            if !nll.is_finite() || !grad_norm.is_finite() {
                if l.state.retries >= s.max_retries {
                    stop_early(run, l, Halt::Diverged(l.state.epoch))?;
                }
                let (retries, lr_scale) = (l.state.retries + 1, l.state.lr_scale * 0.5);
                put_params(&mut l.model, &snapshot.0);
                l.adam = snapshot.1.clone();
                l.state = snapshot.2.clone();
                l.state.retries = retries;
                l.state.lr_scale = lr_scale;
                if !opts.quiet {
                    progress.note(&format!(
                        "non-finite loss or gradient: rolled back to epoch {} batch {}, learning rate x{lr_scale} (retry {retries} of {})",
                        l.state.epoch, l.state.batch, s.max_retries
                    ));
                }
                continue 'epochs;
            }
            clip_norm(&mut grad, grad_norm, s.grad_clip);
            let lr = learning_rate(s.lr, l.state.step, total_steps, s.warmup_fraction) * l.state.lr_scale;
            l.adam.step_on(&workers, &mut trained_flow(&mut l.model).params, &grad, lr, s.weight_decay, &groups);
            l.state.adam_t = l.adam.t;
            l.state.train_sum += nll * chunk.len() as f64;
            l.state.grad_norm_sum += grad_norm;
            l.state.batch += 1;
            l.state.step += 1;
            epoch_samples += chunk.len();
            l.state.seconds = seconds_before + started.elapsed().as_secs_f64();
            progress.step(position(&l.state));
            if run.stop.is_some_and(|f| f.load(Ordering::SeqCst)) {
                stop_early(run, l, Halt::Interrupted)?;
            }
            if last_checkpoint.elapsed().as_secs_f64() >= s.checkpoint_minutes * 60.0 {
                save_checkpoint(run, l)?;
                last_checkpoint = Instant::now();
            }
        }
        // End of epoch: validate, log, keep the best, checkpoint.
        let offset = (d - k) as f64 * (0.5 + HALF_LN_2PI) - l.model.pre.log_det();
        let train_nll = l.state.train_sum / n_train as f64 + offset;
        let val_nll = rows.val_nll(&l.model, s.threads);
        let improved = val_nll < l.state.best_val;
        if improved {
            l.state.best_val = val_nll;
            l.state.best_epoch = l.state.epoch;
            l.state.since_best = 0;
            l.best_params.clone_from(&trained_flow(&mut l.model).params);
        } else {
            l.state.since_best += 1;
        }
        let rate = epoch_samples as f64 / epoch_started.elapsed().as_secs_f64().max(1e-9);
        l.state.log.push(LogEntry {
            epoch: l.state.epoch,
            step: l.state.step,
            lr: learning_rate(s.lr, l.state.step.saturating_sub(1), total_steps, s.warmup_fraction) * l.state.lr_scale,
            train_nll: train_nll / d as f64,
            val_nll: val_nll / d as f64,
            grad_norm: l.state.grad_norm_sum / steps_per_epoch as f64,
            seconds: l.state.seconds,
            candidate: None,
        });
        progress.epoch(l.state.epoch, s.epochs, train_nll / d as f64, val_nll / d as f64, rate, improved);
        let epoch = l.state.epoch;
        l.state.epoch += 1;
        l.state.batch = 0;
        l.state.train_sum = 0.0;
        l.state.grad_norm_sum = 0.0;
        epoch_started = Instant::now();
        epoch_samples = 0;
        write_log(run, &l.state.log, &[])?;
        let done = l.state.since_best >= s.patience || l.state.epoch > s.epochs;
        l.state.finished = done;
        if improved || epoch.is_multiple_of(s.checkpoint_every) || done {
            save_checkpoint(run, l)?;
            last_checkpoint = Instant::now();
        }
        if done || epoch >= until || deadline.is_some_and(|d| Instant::now() >= d) {
            break;
        }
    }
    progress.finish();
    Ok(())
}

/// Write a checkpoint and the best model so far, then report why training
/// stopped (always an error: the run did not finish).
fn stop_early(run: &Run, l: &mut Learned, why: Halt) -> Result<()> {
    save_checkpoint(run, l)?;
    let mut best = Learned {
        model: l.model.clone(),
        settings: l.settings.clone(),
        state: l.state.clone(),
        best_params: l.best_params.clone(),
        adam: Adam::new(0),
    };
    put_params(&mut best.model, &l.best_params);
    finish(run, &mut best)?;
    if let Some(out) = run.output {
        best.model.save(out)?;
    }
    let wrote = run.output.map(|p| format!("; best model so far written to {}", p.display())).unwrap_or_default();
    match why {
        // The caller, who knows the command line, adds how to continue.
        Halt::Interrupted => Err(Error::Interrupted(match &run.checkpoint {
            Some(ck) => format!("interrupted at epoch {}; checkpoint {}{wrote}", l.state.epoch, ck.display()),
            None => format!("interrupted at epoch {}{wrote}", l.state.epoch),
        })),
        Halt::Diverged(epoch) => Err(Error::Invalid(format!(
            "training diverged at epoch {epoch} after {} rollbacks (non-finite loss or gradient){wrote}; try a smaller --lr or --clamp",
            l.state.retries
        ))),
    }
}

/// Fill the training summary and the training log-likelihood spread.
fn finish(run: &Run, l: &mut Learned) -> Result<()> {
    let rows = Rows::new(run, &l.settings, &l.model);
    let mut sample = rows.train.clone();
    if sample.len() > SPREAD_ROWS {
        sample.shuffle(&mut StdRng::seed_from_u64(derive(l.settings.seed, 5, 0)));
        sample.truncate(SPREAD_ROWS);
        sample.sort_unstable();
    }
    let ll = l.model.evaluate_rows(run.data, &sample, l.settings.threads).log_likelihood;
    let mean = ll.iter().sum::<f64>() / ll.len() as f64;
    let std = (ll.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / ll.len() as f64).sqrt();
    let st = &l.state;
    let t = &mut l.model.meta.training;
    t.train_rows = rows.train.len();
    t.validation_rows = if run.val.is_some() || l.settings.val_fraction > 0.0 { rows.val.len() } else { 0 };
    t.epochs_run = st.log.len();
    t.best_epoch = st.best_epoch;
    t.best_train_nll = -mean;
    t.best_validation_nll = st.best_val;
    t.gaussian_validation_nll = st.gaussian_val;
    t.data_checksum = format!("{:016x}", st.data.checksum);
    l.model.meta.train_log_likelihood = Spread { mean, std };
    scoring_references(&rows, l);
    Ok(())
}

/// Validation rows kept in the model for the multi-statistic score's KDE.
const KDE_ROWS: usize = 2000;
/// Validation NLLs kept in the model for the batch typicality test.
const VALIDATION_NLL_ROWS: usize = 10_000;

/// Keep what scores are computed against: validation NLLs, and the
/// validation rows' statistics for the multi-statistic KDE (standardized;
/// a statistic that does not vary, such as the log-det of a Gaussian, is
/// left out).
fn scoring_references(rows: &Rows, l: &mut Learned) {
    let mut sample = rows.val.clone();
    sample.shuffle(&mut StdRng::seed_from_u64(derive(l.settings.seed, 8, 0)));
    sample.truncate(VALIDATION_NLL_ROWS);
    let e = l.model.evaluate_rows(rows.val_data, &sample, l.settings.threads);
    let kde_n = sample.len().min(KDE_ROWS);
    let mut meta = ScoringMeta { validation_rows: sample.len(), ..ScoringMeta::default() };
    let mut columns = Vec::new();
    for name in crate::score::KDE_STATS {
        let v: Vec<f64> = (0..kde_n).map(|r| crate::score::statistic(&e, name, r)).collect();
        let mean = v.iter().sum::<f64>() / kde_n as f64;
        let std = (v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / kde_n as f64).sqrt();
        if std > 1e-9 * mean.abs().max(1.0) {
            meta.kde_columns.push(name.to_string());
            meta.kde_mean.push(mean);
            meta.kde_std.push(std);
            columns.push(v);
        }
    }
    meta.kde_rows = if columns.is_empty() { 0 } else { kde_n };
    l.model.refs = ScoringRefs {
        kde_points: (0..meta.kde_rows).flat_map(|r| columns.iter().map(move |c| c[r])).collect(),
        validation_nll: e.log_likelihood.iter().map(|v| -v).collect(),
    };
    l.model.meta.scoring = meta;
}

elementwise! {
    /// The sum of squares in f64, in sixteen interleaved partial sums so
    /// that the loop vectorises and hides the add latency. Infinite or NaN
    /// when any value is.
    fn sum_of_squares(g: &[f32]) -> f64 {
        let mut acc = [0.0f64; 16];
        let chunks = g.chunks_exact(16);
        let tail: f64 = chunks.remainder().iter().map(|&v| (v as f64) * (v as f64)).sum();
        for c in chunks {
            for (a, &v) in acc.iter_mut().zip(c) {
                *a += (v as f64) * (v as f64);
            }
        }
        acc.iter().sum::<f64>() + tail
    }
}
