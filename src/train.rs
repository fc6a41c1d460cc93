//! Training: split, fit the preprocessing, then fit the flow by minibatch
//! Adam on the negative log-likelihood, keeping the weights with the best
//! validation NLL. The untrained flow (identity, i.e. the whitened Gaussian)
//! is the first candidate, so a fitted flow never ends worse than a Gaussian
//! on the validation rows.

use crate::check;
use crate::data::{mix64, Dataset};
use crate::error::{Error, Result};
use crate::flow::{Coupling, Flow, FlowSpec, Mixing, Workers, HALF_LN_2PI};
use crate::model::{
    format_version_for, leading_columns_into, Candidate, ClassCount, Kind, Meta, Model, PreprocessingMeta, ScoringMeta,
    ScoringRefs, Spread, TrainingSummary,
};
use crate::output::note;
use crate::preprocess::{
    ColumnStats, Covariance, Method, Preprocessor, Shrinkage, TransformScratch, DEFAULT_DEAD_THRESHOLD,
};
use crate::simd::elementwise;
pub use checkpoint::Checkpoint;
use checkpoint::{absolute, resume, save_checkpoint};
use progress::Progress;
use rand::rngs::StdRng;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

/// Training options as the user gives them, on the command line or in a JSON
/// config file with the same field names; `None` means "choose by data size".
#[derive(Clone, Debug, Default, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FitOptions {
    pub kind: Option<Kind>,
    pub background_noise: Option<f64>,
    pub method: Option<Method>,
    pub layers: Option<usize>,
    pub hidden: Option<usize>,
    pub depth: Option<usize>,
    pub clamp: Option<f32>,
    pub mixing: Option<Mixing>,
    pub coupling: Option<CouplingKind>,
    pub bins: Option<usize>,
    pub tail_bound: Option<f32>,
    pub flow_dims: Option<usize>,
    pub epochs: Option<usize>,
    pub batch_size: Option<usize>,
    pub lr: Option<f64>,
    pub val_fraction: Option<f64>,
    pub patience: Option<usize>,
    pub dropout: Option<f64>,
    pub noise: Option<f64>,
    pub dead_threshold: Option<f64>,
    pub weight_decay: Option<f64>,
    pub grad_clip: Option<f64>,
    pub max_retries: Option<usize>,
    pub checkpoint_every: Option<usize>,
    pub checkpoint_minutes: Option<f64>,
    pub seed: Option<u64>,
    pub threads: Option<usize>,
    pub shrinkage: Option<ShrinkageOption>,
    /// Mixture components (chosen on validation when unset).
    pub components: Option<usize>,
    /// Wall-clock bound of the search over densities (`20m`, `8h`, ...).
    pub budget: Option<Budget>,
    /// Fit exactly the configuration given (defaults by data size) instead
    /// of choosing the kind on the validation rows.
    #[serde(default)]
    pub no_search: bool,
    #[serde(skip)]
    pub quiet: bool,
    /// Test hook: make the gradient of this step non-finite once.
    #[serde(skip)]
    pub inject_nan_at_step: Option<usize>,
}

impl FitOptions {
    /// Read options from a JSON config file; an unknown key or a value out
    /// of range is an error that names it.
    pub fn from_json_file(path: &std::path::Path) -> Result<FitOptions> {
        let opts = FitOptions::from_json(path, &crate::data::read_text(path)?)?;
        opts.check(&Source::Config(path))?;
        Ok(opts)
    }

    /// Options from the text of a JSON config file (`path` names it in messages).
    /// Malformed JSON, a key we do not know and a value of the wrong type
    /// are each one message naming the file and the key.
    pub fn from_json(path: &std::path::Path, text: &str) -> Result<FitOptions> {
        // Messages quote the file's text (serde quotes keys): no control codes.
        let bad = |msg: String| Error::Invalid(format!("{}: {}", path.display(), crate::data::printable(&msg, 600)));
        let doc: serde_json::Value = serde_json::from_str(text).map_err(|e| bad(format!("not valid JSON ({e})")))?;
        let serde_json::Value::Object(fields) = doc else {
            return Err(bad("a config file is one JSON object of option names and values".into()));
        };
        for (key, value) in fields {
            let shown = crate::data::printable(&key, 40);
            let one = serde_json::Value::Object(serde_json::Map::from_iter([(key, value)]));
            serde_json::from_value::<FitOptions>(one).map_err(|e| bad(format!("key '{shown}': {e}")))?;
        }
        // Each key alone was fine; this catches a key given twice.
        serde_json::from_str(text).map_err(|e| bad(e.to_string()))
    }

    /// Check every option that is set; what passes is what training trusts
    /// (the settings resolved from it need no further checks but the ones
    /// that depend on the data).
    pub fn check(&self, source: &Source) -> Result<()> {
        let n = |field: &str| source.name(field);
        let opt = |v: Option<usize>, field: &str, lo: usize, hi: usize| -> Result<()> {
            v.map_or(Ok(()), |v| check::count(&n(field), v, lo, hi).map(drop))
        };
        opt(self.layers, "layers", 0, 1024)?;
        opt(self.hidden, "hidden", 1, 1 << 16)?;
        opt(self.depth, "depth", 1, 64)?;
        opt(self.flow_dims, "flow_dims", 1, 1 << 20)?;
        opt(self.epochs, "epochs", 1, 1_000_000)?;
        opt(self.batch_size, "batch_size", 1, 1 << 24)?;
        opt(self.max_retries, "max_retries", 0, 1000)?;
        opt(self.checkpoint_every, "checkpoint_every", 1, 1_000_000)?;
        opt(self.threads, "threads", 1, check::MAX_THREADS)?;
        opt(self.components, "components", 1, 1 << 16)?;
        opt(self.bins, "bins", 2, crate::flow::spline::MAX_BINS)?;
        if (self.bins.is_some() || self.tail_bound.is_some()) && self.coupling != Some(CouplingKind::Spline) {
            return Err(Error::Invalid(format!(
                "{} and {} shape spline couplings; add {} spline",
                n("bins"),
                n("tail_bound"),
                n("coupling")
            )));
        }
        if self.components.is_some() && self.kind.is_some_and(|k| k != Kind::Mixture) {
            return Err(Error::Invalid(format!("{} sizes a mixture; it needs the mixture kind", n("components"))));
        }
        let real = |v: Option<f64>, field: &str, test: fn(&str, f64) -> Result<f64>| -> Result<()> {
            v.map_or(Ok(()), |v| test(&n(field), v).map(drop))
        };
        real(self.background_noise, "background_noise", check::positive)?;
        real(self.clamp.map(f64::from), "clamp", check::positive)?;
        real(self.tail_bound.map(f64::from), "tail_bound", check::positive)?;
        real(self.lr, "lr", check::positive)?;
        real(self.grad_clip, "grad_clip", check::positive)?;
        real(self.noise, "noise", check::non_negative)?;
        real(self.weight_decay, "weight_decay", check::non_negative)?;
        real(self.checkpoint_minutes, "checkpoint_minutes", check::non_negative)?;
        real(self.val_fraction, "val_fraction", |name, v| check::fraction_below(name, v, MAX_VAL_FRACTION))?;
        real(self.dropout, "dropout", |name, v| check::fraction_below(name, v, 1.0))?;
        real(self.dead_threshold, "dead_threshold", |name, v| check::fraction_below(name, v, 1.0))?;
        if let Some(ShrinkageOption::Fixed(v)) = self.shrinkage {
            check::fraction_below(&n("shrinkage"), v, 1.0)?;
        }
        if self.shrinkage.is_some() && matches!(self.kind, Some(Kind::Flow | Kind::Mixture)) {
            return Err(Error::Invalid(format!(
                "{} applies to the Gaussian kinds; drop it or the flow kind",
                n("shrinkage")
            )));
        }
        Ok(())
    }

    /// Each option set here, else the one in `fallback`.
    pub fn or(self, fallback: FitOptions) -> FitOptions {
        FitOptions {
            kind: self.kind.or(fallback.kind),
            background_noise: self.background_noise.or(fallback.background_noise),
            method: self.method.or(fallback.method),
            layers: self.layers.or(fallback.layers),
            hidden: self.hidden.or(fallback.hidden),
            depth: self.depth.or(fallback.depth),
            clamp: self.clamp.or(fallback.clamp),
            mixing: self.mixing.or(fallback.mixing),
            coupling: self.coupling.or(fallback.coupling),
            bins: self.bins.or(fallback.bins),
            tail_bound: self.tail_bound.or(fallback.tail_bound),
            flow_dims: self.flow_dims.or(fallback.flow_dims),
            epochs: self.epochs.or(fallback.epochs),
            batch_size: self.batch_size.or(fallback.batch_size),
            lr: self.lr.or(fallback.lr),
            val_fraction: self.val_fraction.or(fallback.val_fraction),
            patience: self.patience.or(fallback.patience),
            dropout: self.dropout.or(fallback.dropout),
            noise: self.noise.or(fallback.noise),
            dead_threshold: self.dead_threshold.or(fallback.dead_threshold),
            weight_decay: self.weight_decay.or(fallback.weight_decay),
            grad_clip: self.grad_clip.or(fallback.grad_clip),
            max_retries: self.max_retries.or(fallback.max_retries),
            checkpoint_every: self.checkpoint_every.or(fallback.checkpoint_every),
            checkpoint_minutes: self.checkpoint_minutes.or(fallback.checkpoint_minutes),
            seed: self.seed.or(fallback.seed),
            threads: self.threads.or(fallback.threads),
            shrinkage: self.shrinkage.or(fallback.shrinkage),
            components: self.components.or(fallback.components),
            no_search: self.no_search || fallback.no_search,
            budget: self.budget.or(fallback.budget),
            quiet: self.quiet || fallback.quiet,
            inject_nan_at_step: self.inject_nan_at_step.or(fallback.inject_nan_at_step),
        }
    }
}

mod checkpoint;
mod fit_mixture;
mod progress;
mod select;

/// The coupling transform as the user names it (its shape comes from
/// `bins` and `tail_bound`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum CouplingKind {
    /// y = x e^s + t with a soft-clamped log-scale s.
    Affine,
    /// Monotone rational-quadratic splines with linear tails.
    Spline,
}

/// Spline bins and tail bound (whitened units, after ActNorm) when not
/// given: the published tabular settings were of this size (recalled from
/// memory, not measured here).
const DEFAULT_BINS: usize = 8;
const DEFAULT_TAIL_BOUND: f32 = 3.0;

/// A duration in seconds, written as a number with a unit (`90s`, `20m`,
/// `8h`, `1h30m`; a bare number is seconds).
#[derive(Clone, Copy, Debug, PartialEq, serde::Deserialize, serde::Serialize)]
#[serde(try_from = "String", into = "String")]
pub struct Budget(pub f64);

impl std::str::FromStr for Budget {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        let bad = || format!("'{}' is not a duration such as 90s, 20m, 8h or 1h30m", crate::data::printable(s, 40));
        let mut total = 0.0;
        let mut number = String::new();
        for ch in s.trim().chars() {
            match ch {
                '0'..='9' | '.' => number.push(ch),
                's' | 'm' | 'h' | 'd' => {
                    let v: f64 = number.parse().map_err(|_| bad())?;
                    total += v * match ch {
                        's' => 1.0,
                        'm' => 60.0,
                        'h' => 3600.0,
                        _ => 86400.0,
                    };
                    number.clear();
                }
                _ => return Err(bad()),
            }
        }
        if !number.is_empty() {
            total += number.parse::<f64>().map_err(|_| bad())?;
        }
        if !(total.is_finite() && total > 0.0) {
            return Err(bad());
        }
        Ok(Budget(total))
    }
}

impl TryFrom<String> for Budget {
    type Error = String;
    fn try_from(s: String) -> std::result::Result<Self, String> {
        s.parse()
    }
}

impl From<Budget> for String {
    fn from(b: Budget) -> String {
        format!("{}s", b.0)
    }
}

/// How the Gaussian kinds shrink their covariance, as the user asks:
/// `validated` (the default), `ledoit-wolf`, or an intensity in [0, 1).
#[derive(Clone, Copy, Debug, PartialEq, serde::Deserialize, serde::Serialize)]
#[serde(try_from = "serde_json::Value", into = "String")]
pub enum ShrinkageOption {
    /// The intensity with the best held-out log-likelihood (Ledoit-Wolf
    /// among the candidates).
    Validated,
    LedoitWolf,
    Fixed(f64),
}

impl std::str::FromStr for ShrinkageOption {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "validated" => Ok(ShrinkageOption::Validated),
            "ledoit-wolf" => Ok(ShrinkageOption::LedoitWolf),
            _ => s.parse::<f64>().map(ShrinkageOption::Fixed).map_err(|_| {
                format!("'{}' is not validated, ledoit-wolf or a number in [0, 1)", crate::data::printable(s, 40))
            }),
        }
    }
}

impl TryFrom<serde_json::Value> for ShrinkageOption {
    type Error = String;
    fn try_from(v: serde_json::Value) -> std::result::Result<Self, String> {
        match v {
            serde_json::Value::String(s) => s.parse(),
            serde_json::Value::Number(n) => n.as_f64().map(ShrinkageOption::Fixed).ok_or_else(|| "not a number".into()),
            _ => Err("expected \"validated\", \"ledoit-wolf\" or a number in [0, 1)".into()),
        }
    }
}

impl From<ShrinkageOption> for String {
    fn from(s: ShrinkageOption) -> String {
        match s {
            ShrinkageOption::Validated => "validated".into(),
            ShrinkageOption::LedoitWolf => "ledoit-wolf".into(),
            ShrinkageOption::Fixed(v) => v.to_string(),
        }
    }
}

/// Where options came from, for naming them in messages.
pub enum Source<'a> {
    /// Command-line flags: `--grad-clip`.
    Flags,
    /// A JSON config file: `FILE: grad_clip`.
    Config(&'a Path),
}

impl Source<'_> {
    fn name(&self, field: &str) -> String {
        match self {
            Source::Flags => format!("--{}", field.replace('_', "-")),
            Source::Config(path) => format!("{}: {field}", path.display()),
        }
    }
}

/// Share of the rows held out for validation when none is asked for.
const DEFAULT_VAL_FRACTION: f64 = 0.1;

/// Validation share of the rows stays below this (0 fits on every row and
/// validates on the training rows).
const MAX_VAL_FRACTION: f64 = 0.9;

/// Threads used when none are asked for: every core.
pub fn default_threads() -> usize {
    std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
}

/// Every training setting, resolved; stored in the model's metadata and in
/// checkpoints (a resumed run uses the checkpoint's settings).
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct Settings {
    pub kind: Kind,
    /// Noise (whitened units) of the background flow's training vectors;
    /// `None`: no background flow.
    pub background_noise: Option<f64>,
    pub method: Method,
    pub layers: usize,
    pub hidden: usize,
    pub depth: usize,
    pub clamp: f32,
    /// What mixes features between coupling layers (models made before the
    /// option existed used the permutation).
    #[serde(default)]
    pub mixing: Mixing,
    /// The coupling transform (models made before the option existed used
    /// the affine one).
    #[serde(default)]
    pub coupling: Coupling,
    pub flow_dims: usize,
    pub epochs: usize,
    pub batch_size: usize,
    pub lr: f64,
    pub warmup_fraction: f64,
    pub grad_clip: f64,
    pub weight_decay: f64,
    pub val_fraction: f64,
    /// Validation rows come from a separate file instead of a split.
    pub val_file: bool,
    pub patience: usize,
    pub dropout: f64,
    pub noise: f64,
    pub dead_threshold: f64,
    /// Divergences (non-finite loss or gradient) survived by rolling back
    /// and halving the learning rate before training stops.
    pub max_retries: usize,
    /// Write a checkpoint every this many epochs (and at every new best).
    pub checkpoint_every: usize,
    /// ... and at least this often within an epoch.
    pub checkpoint_minutes: f64,
    pub seed: u64,
    pub threads: usize,
}

/// A default that depends on rows per dimension: the value for fewer than
/// 50, 200, 500, and for more (dropout and noise measured to help small sets).
fn by_rows_per_dim(per_dim: f64, values: [f64; 4]) -> f64 {
    let band = [FEW_ROWS_PER_DIM, 200.0, 500.0].iter().take_while(|&&limit| per_dim >= limit).count();
    values[band]
}

/// Rows per whitened dimension below which the flow runs only on the
/// leading third of the principal components (measured: see README).
const FEW_ROWS_PER_DIM: f64 = 50.0;

/// Training rows per input feature below which the density defaults to a
/// Gaussian with Ledoit-Wolf shrinkage instead of a flow. Measured on one
/// real dump (384-d sentence embeddings, default settings otherwise): the
/// flow's held-out log-likelihood trailed the Gaussian's by 345 nats per
/// vector at 1.4 training rows per feature and by 8 at 3.5, and led by 6 at
/// 4.7, 14 at 5.9 and 23 at 8.5.
const GAUSSIAN_BELOW_ROWS_PER_FEATURE: f64 = 4.0;

impl FitOptions {
    /// Whether any option that only shapes a flow or its training was given.
    fn asks_for_a_flow(&self) -> bool {
        self.background_noise.is_some()
            || self.epochs.is_some()
            || self.batch_size.is_some()
            || self.lr.is_some()
            || self.patience.is_some()
            || self.weight_decay.is_some()
            || self.grad_clip.is_some()
            || self.max_retries.is_some()
            || self.inject_nan_at_step.is_some()
            || self.method.is_some_and(|m| m != Method::Pca)
            || self.layers.is_some()
            || self.hidden.is_some()
            || self.depth.is_some()
            || self.clamp.is_some()
            || self.mixing.is_some()
            || self.coupling.is_some()
            || self.bins.is_some()
            || self.tail_bound.is_some()
            || self.flow_dims.is_some()
            || self.dropout.is_some()
            || self.noise.is_some()
    }

    /// The density kind: as asked; else, with fewer than
    /// [`GAUSSIAN_BELOW_ROWS_PER_FEATURE`] training rows per feature and no
    /// flow option given, the Gaussian (class-Gaussian with labels); else a
    /// flow. The second value says whether the size of the data chose it.
    fn kind_for(&self, rows: usize, features: usize, labelled: bool) -> (Kind, bool) {
        match self.kind {
            Some(kind) => (kind, false),
            None if (rows as f64) < GAUSSIAN_BELOW_ROWS_PER_FEATURE * features as f64 && !self.asks_for_a_flow() => {
                (if labelled { Kind::ClassGaussian } else { Kind::Gaussian }, true)
            }
            None => (Kind::Flow, false),
        }
    }
}

impl Settings {
    /// Fill every unset option from the size of the training set:
    /// `n` training rows, `d` live dimensions.
    pub fn resolve(o: &FitOptions, n: usize, d: usize, val_file: bool, labelled: bool) -> Result<Settings> {
        let method = o.method.unwrap_or(Method::Pca);
        let kind = o.kind.unwrap_or_default();
        if kind != Kind::Flow && method != Method::Pca {
            return Err(Error::Invalid(
                "--kind gaussian, class-gaussian and mixture whiten with PCA; drop --method".into(),
            ));
        }
        if kind != Kind::Flow && o.background_noise.is_some() {
            return Err(Error::Invalid("--background-noise trains a background flow; it needs --kind flow".into()));
        }
        let per_dim = n as f64 / d as f64;
        let few = per_dim < FEW_ROWS_PER_DIM;
        // Class-conditional flows keep every dimension: class means on a
        // shared standard-normal remainder could not differ.
        let reduce = few && method == Method::Pca && kind == Kind::Flow && !labelled;
        let default_dims = if reduce { d.div_ceil(3).max(2.min(d)) } else { d };
        let flow_dims = o.flow_dims.unwrap_or(default_dims);
        if flow_dims == 0 || flow_dims > d {
            return Err(Error::Invalid(format!("--flow-dims must be between 1 and {d} (the live features)")));
        }
        let batch_size = o.batch_size.unwrap_or(if n >= 20_000 { 256 } else { 128 }).clamp(1, n);
        let steps_per_epoch = n.div_ceil(batch_size);
        let s = Settings {
            kind,
            background_noise: o.background_noise,
            method,
            layers: if flow_dims < 2 || kind != Kind::Flow { 0 } else { o.layers.unwrap_or(6) },
            hidden: o.hidden.unwrap_or((2 * flow_dims).clamp(64, 512).next_multiple_of(32)),
            depth: o.depth.unwrap_or(2),
            clamp: o.clamp.unwrap_or(3.0),
            mixing: o.mixing.unwrap_or_default(),
            coupling: match o.coupling {
                Some(CouplingKind::Spline) => Coupling::Spline {
                    bins: o.bins.unwrap_or(DEFAULT_BINS),
                    tail_bound: o.tail_bound.unwrap_or(DEFAULT_TAIL_BOUND),
                },
                _ => Coupling::Affine,
            },
            flow_dims,
            epochs: o.epochs.unwrap_or((20_000usize.div_ceil(steps_per_epoch)).clamp(20, 200)),
            batch_size,
            lr: o.lr.unwrap_or(1e-3),
            warmup_fraction: 0.02,
            grad_clip: o.grad_clip.unwrap_or(5.0),
            weight_decay: o.weight_decay.unwrap_or(0.0),
            val_fraction: if val_file { 0.0 } else { o.val_fraction.unwrap_or(DEFAULT_VAL_FRACTION) },
            val_file,
            patience: o.patience.unwrap_or(10),
            dropout: o.dropout.unwrap_or_else(|| by_rows_per_dim(per_dim, [0.2, 0.1, 0.1, 0.0])),
            noise: o.noise.unwrap_or_else(|| by_rows_per_dim(per_dim, [0.2, 0.1, 0.0, 0.0])),
            dead_threshold: o.dead_threshold.unwrap_or(DEFAULT_DEAD_THRESHOLD),
            max_retries: o.max_retries.unwrap_or(3),
            checkpoint_every: o.checkpoint_every.unwrap_or(1),
            checkpoint_minutes: o.checkpoint_minutes.unwrap_or(10.0),
            seed: o.seed.unwrap_or(0),
            threads: o.threads.unwrap_or_else(default_threads),
        };
        Ok(s)
    }
}

/// Adam (Kingma & Ba 2015) with decoupled weight decay (Loshchilov & Hutter
/// 2019) over the flat parameter vector, in one fused pass. Its whole state
/// (moments and step count) is saved in checkpoints.
#[derive(Clone)]
pub struct Adam {
    pub m: Vec<f32>,
    pub v: Vec<f32>,
    pub t: u64,
}

impl Adam {
    const BETA1: f32 = 0.9;
    const BETA2: f32 = 0.999;
    const EPS: f32 = 1e-8;

    pub fn new(n: usize) -> Adam {
        Adam { m: vec![0.0; n], v: vec![0.0; n], t: 0 }
    }

    /// One update; `decay[i]` says whether parameter i takes weight decay.
    pub fn step(&mut self, params: &mut [f32], grad: &[f32], lr: f64, weight_decay: f64, decay: &[bool]) {
        let (step, eps, shrink) = self.advance(lr, weight_decay);
        adam_update(params, grad, &mut self.m, &mut self.v, decay, step, eps, shrink);
    }

    /// [`Adam::step`] split over the workers' threads (same result).
    pub fn step_on(
        &mut self,
        workers: &Workers,
        params: &mut [f32],
        grad: &[f32],
        lr: f64,
        weight_decay: f64,
        decay: &[bool],
    ) {
        let (step, eps, shrink) = self.advance(lr, weight_decay);
        workers.for_param_blocks(params, &mut self.m, &mut self.v, |at, p, m, v| {
            let n = p.len();
            adam_update(p, &grad[at..at + n], m, v, &decay[at..at + n], step, eps, shrink);
        });
    }

    /// Count the step; the bias-corrected step size, epsilon and decay factor.
    fn advance(&mut self, lr: f64, weight_decay: f64) -> (f32, f32, f32) {
        self.t += 1;
        let c1 = 1.0 - (Self::BETA1 as f64).powi(self.t as i32);
        let c2 = 1.0 - (Self::BETA2 as f64).powi(self.t as i32);
        ((lr * c2.sqrt() / c1) as f32, Self::EPS * c2.sqrt() as f32, (lr * weight_decay) as f32)
    }
}

elementwise! {
    /// One AdamW update of a block of parameters with its moments.
    #[allow(clippy::too_many_arguments)]
    fn adam_update(
        p: &mut [f32],
        g: &[f32],
        m: &mut [f32],
        v: &mut [f32],
        decay: &[bool],
        step: f32,
        eps: f32,
        shrink: f32,
    ) {
        let (b1, b2) = (Adam::BETA1, Adam::BETA2);
        for ((((p, &g), m), v), &d) in p.iter_mut().zip(g).zip(m).zip(v).zip(decay) {
            *m = b1 * *m + (1.0 - b1) * g;
            *v = b2 * *v + (1.0 - b2) * g * g;
            // Branch-free, so the loop vectorises.
            let decayed = *p - f32::from(u8::from(d)) * shrink * *p;
            *p = decayed - step * *m / (v.sqrt() + eps);
        }
    }
}

/// Learning rate at `step` of `total`: linear warm-up, then cosine decay.
pub fn learning_rate(base: f64, step: usize, total: usize, warmup_fraction: f64) -> f64 {
    let warm = ((total as f64 * warmup_fraction).ceil() as usize).max(1);
    if step < warm {
        return base * (step + 1) as f64 / warm as f64;
    }
    let progress = (step - warm) as f64 / (total - warm).max(1) as f64;
    base * 0.5 * (1.0 + (std::f64::consts::PI * progress.min(1.0)).cos())
}

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
}

impl<'a> Run<'a> {
    /// A run that only trains: no files, no checkpoints.
    pub fn new(data: &'a Dataset) -> Run<'a> {
        Run { data, val: None, labels: None, output: None, checkpoint: None, resume: None, log: None, stop: None }
    }
}

/// One line of the JSON-lines training log (NLLs in nats per dimension,
/// input space; `grad_norm` is the epoch's mean before clipping).
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct LogEntry {
    pub epoch: usize,
    pub step: usize,
    pub lr: f64,
    pub train_nll: f64,
    pub val_nll: f64,
    pub grad_norm: f64,
    pub seconds: f64,
    /// The flow of a search this epoch belongs to (absent for a single run).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub candidate: Option<String>,
}

/// A training log read back: every epoch line and, after a search, one line
/// per candidate density (`{"candidate_result": {...}}`).
#[derive(Clone, Debug, Default)]
pub struct TrainingLog {
    pub epochs: Vec<LogEntry>,
    pub candidates: Vec<Candidate>,
}

/// A line of the log: an epoch, or a candidate's result.
#[derive(serde::Serialize, serde::Deserialize)]
#[serde(untagged)]
enum LogLine<'a> {
    Result { candidate_result: std::borrow::Cow<'a, Candidate> },
    Epoch(std::borrow::Cow<'a, LogEntry>),
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
    learned.model.flow.params = learned.best_params.clone();
    if learned.settings.kind == Kind::Mixture {
        let rows = Rows::new(run, &learned.settings, &learned.model);
        fit_mixture::fit_mixture(&rows, &mut learned, opts.components, opts.quiet)?;
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
        self.learned.model.flow.param_count()
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
        [&l.model.flow.params, &l.best_params, &l.adam.m, &l.adam.v]
    }

    /// Put back what [`Staged::tensors`] and the state saved.
    fn restore(&mut self, state: TrainState, [params, best, m, v]: [Vec<f32>; 4]) {
        let l = &mut self.learned;
        l.adam = Adam { m, v, t: state.adam_t };
        l.model.flow.params = params;
        l.best_params = best;
        l.state = state;
    }

    /// The model with its best weights.
    pub(crate) fn into_model(mut self, run: &Run) -> Result<Model> {
        self.learned.model.flow.params = self.learned.best_params.clone();
        finish(run, &mut self.learned)?;
        Ok(self.learned.model)
    }
}

/// Split, fit the preprocessing and set up an untrained flow.
fn start(run: &Run, opts: &FitOptions) -> Result<Learned> {
    let x = run.data;
    if x.rows < MIN_ROWS {
        return Err(Error::Invalid(format!(
            "{}: need at least {MIN_ROWS} rows to fit, got {}",
            x.path.display(),
            x.rows
        )));
    }
    if let Some(v) = run.val {
        if v.cols != x.cols {
            return Err(Error::Invalid(format!(
                "{}: validation rows have {} features but the training data has {}",
                v.path.display(),
                v.cols,
                x.cols
            )));
        }
    }
    let seed = opts.seed.unwrap_or(0);
    let val_fraction = if run.val.is_some() { 0.0 } else { opts.val_fraction.unwrap_or(DEFAULT_VAL_FRACTION) };
    let (train_idx, val_idx) = split_rows(x.rows, val_fraction, seed);
    let method = opts.method.unwrap_or(Method::Pca);
    let (kind, by_size) = opts.kind_for(train_idx.len(), x.cols, run.labels.is_some());
    if by_size && !opts.quiet {
        note(format!(
            "{} training rows for {} features ({:.1} per feature): fitting {} with shrinkage, \
             which beats a flow at this size; --kind flow fits a flow anyway",
            train_idx.len(),
            x.cols,
            train_idx.len() as f64 / x.cols as f64,
            if kind == Kind::ClassGaussian { "class means with a shared covariance" } else { "a Gaussian" }
        ));
    }
    let opts = &FitOptions { kind: Some(kind), ..opts.clone() };
    let dead_threshold = opts.dead_threshold.unwrap_or(DEFAULT_DEAD_THRESHOLD);
    let classes = class_counts(run.labels.unwrap_or(&[]));
    let class_of = run.labels.map(|l| class_indices(l, &classes));
    if kind == Kind::ClassGaussian && class_of.is_none() {
        return Err(Error::Invalid("--kind class-gaussian needs --labels".into()));
    }
    if kind == Kind::Mixture && class_of.is_some() {
        return Err(Error::Invalid(
            "--kind mixture fits no per-class densities yet; drop --labels, or use --kind class-gaussian or flow"
                .into(),
        ));
    }
    // Class means (input space) over the training rows, for pooling.
    let class_means: Vec<Vec<f64>> = match (&class_of, kind) {
        (Some(of), Kind::ClassGaussian) => (0..classes.len())
            .map(|c| {
                let rows: Vec<usize> = train_idx.iter().copied().filter(|&r| of[r] as usize == c).collect();
                ColumnStats::of(x, &rows).mean
            })
            .collect(),
        _ => Vec::new(),
    };
    let all_val_rows: Vec<usize> = run.val.map(|v| (0..v.rows).collect()).unwrap_or_default();
    let how = Covariance {
        classes: class_of.as_deref().filter(|_| kind == Kind::ClassGaussian).map(|of| (of, &class_means[..])),
        shrinkage: shrinkage_for(
            kind,
            opts.shrinkage,
            (x, &train_idx, &val_idx),
            run.val.map(|v| (v, &all_val_rows[..])),
        ),
    };
    let pre = Preprocessor::fit_with(x, &train_idx, method, dead_threshold, &how).map_err(Error::Invalid)?;
    let settings = Settings::resolve(opts, train_idx.len(), pre.dim(), run.val.is_some(), run.labels.is_some())?;
    let spec = FlowSpec {
        dim: settings.flow_dims,
        layers: settings.layers,
        hidden: settings.hidden,
        depth: settings.depth,
        clamp: settings.clamp,
        mixing: settings.mixing,
        classes: if matches!(kind, Kind::Gaussian | Kind::Mixture) { 0 } else { classes.len() },
        coupling: settings.coupling,
    };
    let mut flow = Flow::new(spec, settings.seed);
    for (c, mean) in class_means.iter().enumerate() {
        // The class-Gaussian base means are the whitened class means.
        let row: Vec<f32> = mean.iter().map(|&v| v as f32).collect();
        let mut u = vec![0.0f32; pre.dim()];
        pre.transform(&row, 1, &mut u, None);
        let at = flow.class_means + c * flow.spec.dim;
        flow.params[at..at + flow.spec.dim].copy_from_slice(&u);
    }
    let meta = skeleton_meta(x.cols, &pre, &flow, &settings, classes)?;
    let model = Model { meta, pre, flow, background: None, mixture: None, refs: ScoringRefs::default() };
    new_learned(run, model, settings, kind != Kind::Flow)
}

/// The covariance shrinkage of a Gaussian kind: as asked; by default the
/// intensity with the best log-likelihood on the held-out rows (a separate
/// file, or the split's); without held-out rows, Ledoit-Wolf when rows are
/// few per feature (below [`FEW_ROWS_PER_DIM`]), else none. Flows whiten
/// and mixtures whiten with the maximum-likelihood covariance.
fn shrinkage_for<'a>(
    kind: Kind,
    asked: Option<ShrinkageOption>,
    (x, train, split_val): (&'a Dataset, &[usize], &'a [usize]),
    val_file: Option<(&'a Dataset, &'a [usize])>,
) -> Shrinkage<'a> {
    if matches!(kind, Kind::Flow | Kind::Mixture) {
        return Shrinkage::None;
    }
    match asked {
        Some(ShrinkageOption::LedoitWolf) => Shrinkage::LedoitWolf,
        Some(ShrinkageOption::Fixed(v)) => Shrinkage::Fixed(v),
        Some(ShrinkageOption::Validated) | None => match val_file {
            Some((v, rows)) => Shrinkage::Validated(v, rows),
            None if !split_val.is_empty() => Shrinkage::Validated(x, split_val),
            None if (train.len() as f64) < FEW_ROWS_PER_DIM * x.cols as f64 => Shrinkage::LedoitWolf,
            None => Shrinkage::None,
        },
    }
}

/// Training state for an untrained `model`: the untrained flow (identity,
/// i.e. the whitened Gaussian, or the class means as they are) is candidate
/// zero; then ActNorm is initialised from the data.
fn new_learned(run: &Run, model: Model, settings: Settings, finished: bool) -> Result<Learned> {
    let n = model.flow.param_count();
    let mut learned = Learned {
        best_params: model.flow.params.clone(),
        adam: Adam::new(n),
        state: TrainState {
            epoch: 1,
            batch: 0,
            step: 0,
            adam_t: 0,
            train_sum: 0.0,
            grad_norm_sum: 0.0,
            best_val: f64::INFINITY,
            best_epoch: 0,
            since_best: 0,
            gaussian_val: f64::NAN,
            lr_scale: 1.0,
            retries: 0,
            seconds: 0.0,
            log: Vec::new(),
            data: Fingerprint::of(run.data),
            val_data: run.val.map(Fingerprint::of),
            labels: run.labels.map(labels_checksum),
            finished,
            model_path: absolute(run.output),
            log_path: absolute(run.log),
        },
        model,
        settings,
    };
    let rows = Rows::new(run, &learned.settings, &learned.model);
    let gaussian = rows.val_nll(&learned.model, learned.settings.threads);
    learned.state.gaussian_val = gaussian;
    learned.state.best_val = gaussian;
    if !finished {
        let init_rows = &rows.train[..rows.train.len().min(4096)];
        let mut batch = BatchBuffers::default();
        rows.prepare_batch(&learned.model, init_rows, &mut batch);
        learned.model.flow.init_actnorm(&batch.head, init_rows.len());
        if learned.model.classes() > 0 {
            init_class_means(&mut learned.model.flow, &batch.head, &batch.classes);
        }
    }
    Ok(learned)
}

/// Start each class's base mean at the mean latent of its rows under the
/// freshly initialised flow, so training starts from the class-Gaussian fit
/// rather than from one shared mean.
fn init_class_means(flow: &mut Flow, head: &[f32], classes: &[u32]) {
    let k = flow.spec.dim;
    let mut ws = crate::flow::Workspace::forward_only(&flow.spec, classes.len());
    crate::flow::forward(flow, &mut ws, head, classes.len(), None);
    let z = ws.latent(k, classes.len());
    let mut sums = vec![0.0f64; flow.spec.classes * k];
    let mut counts = vec![0usize; flow.spec.classes];
    for (r, &c) in classes.iter().enumerate() {
        counts[c as usize] += 1;
        for j in 0..k {
            sums[c as usize * k + j] += z[r * k + j] as f64;
        }
    }
    for c in 0..flow.spec.classes {
        for j in 0..k {
            flow.params[flow.class_means + c * k + j] = (sums[c * k + j] / counts[c].max(1) as f64) as f32;
        }
    }
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
        FlowSpec { layers: settings.layers, hidden: settings.hidden, classes: 0, ..main.model.flow.spec.clone() };
    let mut model = main.model.clone();
    model.flow = Flow::new(spec, derive(s.seed, 7, 0));
    model.meta.classes.clear();
    let quiet_run = Run { checkpoint: None, log: None, output: None, resume: None, labels: None, ..*run };
    let mut bg = new_learned(&quiet_run, model, settings, false)?;
    if !opts.quiet {
        note(format!("training the background flow (noise {sigma})"));
    }
    train(&quiet_run, opts, &mut bg, started, None)?;
    bg.model.flow.params = bg.best_params;
    Ok(bg.model.flow)
}

/// Class of every data row, as an index into `classes` (sorted labels).
fn class_indices(labels: &[i64], classes: &[ClassCount]) -> Vec<u32> {
    labels.iter().map(|l| classes.binary_search_by_key(l, |c| c.label).expect("label was counted") as u32).collect()
}

fn labels_checksum(labels: &[i64]) -> u64 {
    labels.iter().fold(labels.len() as u64, |h, &l| derive(h, 6, l as u64))
}

/// The model metadata known before training (the summary is filled at the end).
fn skeleton_meta(cols: usize, pre: &Preprocessor, flow: &Flow, s: &Settings, classes: Vec<ClassCount>) -> Result<Meta> {
    Ok(Meta {
        format: "tidemark-model".into(),
        format_version: if flow.spec.coupling == Coupling::Affine {
            format_version_for(flow.spec.mixing, s.kind)
        } else {
            3
        },
        created_by: format!("tidemark {}", env!("CARGO_PKG_VERSION")),
        input_dim: cols,
        preprocessing: PreprocessingMeta {
            method: pre.method,
            live_features: pre.live.len(),
            whitened_dims: pre.dim(),
            dead_features: pre.dead.clone(),
            dead_threshold: s.dead_threshold,
            floored_components: pre.floored,
            shrinkage: pre.shrinkage,
            log_det: pre.log_det(),
        },
        flow_dims: s.flow_dims,
        flow: flow.spec.clone(),
        seed: s.seed,
        training: TrainingSummary {
            settings: serde_json::to_value(s).map_err(|e| Error::Invalid(e.to_string()))?,
            ..TrainingSummary::default()
        },
        train_log_likelihood: Spread::default(),
        classes,
        kind: s.kind,
        background: None,
        background_noise: s.background_noise,
        scoring: ScoringMeta::default(),
        mixture: None,
    })
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
        let class_of = run.labels.filter(|_| model.classes() > 0).map(|l| class_indices(l, &model.meta.classes));
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
    let until = pause.map_or(usize::MAX, |p| p.epoch);
    let deadline = pause.and_then(|p| p.deadline);
    let s = l.settings.clone();
    let rows = Rows::new(run, &s, &l.model);
    let (d, k) = (l.model.dim(), s.flow_dims);
    let n_train = rows.train.len();
    let steps_per_epoch = n_train.div_ceil(s.batch_size);
    let total_steps = steps_per_epoch * s.epochs;
    let mut workers = Workers::new(&l.model.flow, s.threads, s.batch_size);
    let mut grad = vec![0.0f32; l.model.flow.param_count()];
    let mut batch = BatchBuffers::default();
    let decay = decay_mask(&l.model.flow);
    let position = |st: &TrainState| (st.epoch - 1) * steps_per_epoch + st.batch;
    let progress = Progress::new(total_steps, position(&l.state), opts.quiet);
    let seconds_before = l.state.seconds;
    let mut last_checkpoint = Instant::now();
    let mut injected = false;
    // The last good state, for rolling back after a divergence.
    let mut snapshot = (l.model.flow.params.clone(), l.adam.clone(), l.state.clone());
    let mut epoch_started = Instant::now();
    let mut epoch_samples = 0usize;
    'epochs: while !l.state.finished && l.state.epoch <= s.epochs.min(until) {
        let mut order = rows.train.clone();
        order.shuffle(&mut StdRng::seed_from_u64(derive(s.seed, 2, l.state.epoch as u64)));
        if l.state.batch == 0 {
            snapshot = (l.model.flow.params.clone(), l.adam.clone(), l.state.clone());
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
            let nll = workers.nll_and_grad(&l.model.flow, &batch.head, classes, chunk.len(), dropout, &mut grad);
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
                l.model.flow.params.clone_from(&snapshot.0);
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
            l.adam.step_on(&workers, &mut l.model.flow.params, &grad, lr, s.weight_decay, &decay);
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
            l.best_params.clone_from(&l.model.flow.params);
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

/// Conditioner weight matrices take weight decay; biases and ActNorm do not
/// (common practice).
fn decay_mask(flow: &Flow) -> Vec<bool> {
    let mut mask = vec![false; flow.param_count()];
    for slot in &flow.slots {
        for lin in &slot.linears {
            mask[lin.weight..lin.weight + lin.out * lin.inp].fill(true);
        }
    }
    mask
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
    best.model.flow.params = l.best_params.clone();
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

/// Read a JSON-lines training log written by `fit --log`.
pub fn read_log(path: &Path) -> Result<TrainingLog> {
    let text = crate::data::read_text(path)?;
    let mut log = TrainingLog::default();
    for (i, l) in text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty()) {
        let line: LogLine = serde_json::from_str(l).map_err(|e| {
            let e = crate::data::printable(&e.to_string(), 300);
            Error::Invalid(format!("{}: line {}: not a training log entry ({e})", path.display(), i + 1))
        })?;
        match line {
            LogLine::Epoch(e) => log.epochs.push(e.into_owned()),
            LogLine::Result { candidate_result } => log.candidates.push(candidate_result.into_owned()),
        }
    }
    Ok(log)
}

/// Write the run's log (atomically): its epochs, then the candidates' results.
pub(super) fn write_log(run: &Run, epochs: &[LogEntry], candidates: &[Candidate]) -> Result<()> {
    let Some(path) = run.log else { return Ok(()) };
    let lines = epochs
        .iter()
        .map(|e| LogLine::Epoch(std::borrow::Cow::Borrowed(e)))
        .chain(candidates.iter().map(|c| LogLine::Result { candidate_result: std::borrow::Cow::Borrowed(c) }));
    crate::output::write_atomic(path, |w| {
        for line in lines {
            let line = serde_json::to_string(&line).map_err(|e| Error::Invalid(e.to_string()))?;
            writeln!(w, "{line}").map_err(|source| Error::Io { path: path.to_path_buf(), source })?;
        }
        Ok(())
    })
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

fn class_counts(labels: &[i64]) -> Vec<ClassCount> {
    let mut counts = std::collections::BTreeMap::new();
    for &l in labels {
        *counts.entry(l).or_insert(0usize) += 1;
    }
    counts.into_iter().map(|(label, rows)| ClassCount { label, rows }).collect()
}

/// Scale `g`, whose global norm is `norm`, down to norm `max` when it is
/// longer.
fn clip_norm(g: &mut [f32], norm: f64, max: f64) {
    if norm > max {
        let s = (max / norm) as f32;
        g.iter_mut().for_each(|v| *v *= s);
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn schedule_warms_up_then_decays_to_zero() {
        let total = 1000;
        assert!((learning_rate(1e-3, 0, total, 0.02) - 1e-3 / 20.0).abs() < 1e-12);
        assert!((learning_rate(1e-3, 19, total, 0.02) - 1e-3).abs() < 1e-12);
        assert!(learning_rate(1e-3, 500, total, 0.02) < 1e-3);
        assert!(learning_rate(1e-3, 999, total, 0.02) < 1e-7);
    }

    /// Adam's first step moves every parameter by lr against the sign of
    /// its gradient (bias correction makes m/sqrt(v) = sign(g); Kingma & Ba).
    /// Decoupled weight decay then shrinks by lr * wd on top.
    #[test]
    fn adam_first_step_is_lr_times_sign_plus_decoupled_decay() {
        let mut p = vec![1.0f32, 1.0, 1.0];
        let mut adam = Adam::new(3);
        adam.step(&mut p, &[0.5, -2.0, 1e-3], 0.01, 0.5, &[false, false, true]);
        for (v, want) in p.iter().zip([0.99, 1.01, 1.0 - 0.005 - 0.01]) {
            assert!((v - want).abs() < 1e-5, "{v} vs {want}");
        }
    }
}
