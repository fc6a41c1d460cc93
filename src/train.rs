//! Training: split, fit the preprocessing, then fit the flow by minibatch
//! Adam on the negative log-likelihood, keeping the weights with the best
//! validation NLL. The untrained flow (identity, i.e. the whitened Gaussian)
//! is the first candidate, so a fitted flow never ends worse than a Gaussian
//! on the validation rows.

use crate::data::Matrix;
use crate::error::{Error, Result};
use crate::flow::{Flow, FlowSpec, Workers};
use crate::model::{ClassCount, Meta, Model, PreprocessingMeta, Spread, TrainingSummary, FORMAT_VERSION};
use crate::preprocess::{Method, Preprocessor, DEFAULT_DEAD_THRESHOLD};
use indicatif::{ProgressBar, ProgressStyle};
use rand::rngs::StdRng;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::io::IsTerminal;
use std::time::Instant;

/// Training options as the user gives them, on the command line or in a JSON
/// config file with the same field names; `None` means "choose by data size".
#[derive(Clone, Debug, Default, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FitOptions {
    pub method: Option<Method>,
    pub layers: Option<usize>,
    pub hidden: Option<usize>,
    pub depth: Option<usize>,
    pub clamp: Option<f32>,
    pub flow_dims: Option<usize>,
    pub epochs: Option<usize>,
    pub batch_size: Option<usize>,
    pub lr: Option<f64>,
    pub val_fraction: Option<f64>,
    pub patience: Option<usize>,
    pub dropout: Option<f64>,
    pub noise: Option<f64>,
    pub dead_threshold: Option<f64>,
    pub seed: Option<u64>,
    pub threads: Option<usize>,
    #[serde(skip)]
    pub quiet: bool,
}

impl FitOptions {
    /// Read options from a JSON config file; an unknown key is an error
    /// that names it.
    pub fn from_json_file(path: &std::path::Path) -> Result<FitOptions> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| Error::Invalid(format!("{}: cannot read config: {e}", path.display())))?;
        serde_json::from_str(&text).map_err(|e| Error::Invalid(format!("{}: {e}", path.display())))
    }

    /// Each option set here, else the one in `fallback`.
    pub fn or(self, fallback: FitOptions) -> FitOptions {
        FitOptions {
            method: self.method.or(fallback.method),
            layers: self.layers.or(fallback.layers),
            hidden: self.hidden.or(fallback.hidden),
            depth: self.depth.or(fallback.depth),
            clamp: self.clamp.or(fallback.clamp),
            flow_dims: self.flow_dims.or(fallback.flow_dims),
            epochs: self.epochs.or(fallback.epochs),
            batch_size: self.batch_size.or(fallback.batch_size),
            lr: self.lr.or(fallback.lr),
            val_fraction: self.val_fraction.or(fallback.val_fraction),
            patience: self.patience.or(fallback.patience),
            dropout: self.dropout.or(fallback.dropout),
            noise: self.noise.or(fallback.noise),
            dead_threshold: self.dead_threshold.or(fallback.dead_threshold),
            seed: self.seed.or(fallback.seed),
            threads: self.threads.or(fallback.threads),
            quiet: self.quiet || fallback.quiet,
        }
    }
}

/// Threads used when none are asked for: every core.
pub fn default_threads() -> usize {
    std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
}

/// Every training setting, resolved; stored in the model's metadata.
#[derive(Clone, Debug, serde::Serialize)]
pub struct Settings {
    pub method: Method,
    pub layers: usize,
    pub hidden: usize,
    pub depth: usize,
    pub clamp: f32,
    pub flow_dims: usize,
    pub epochs: usize,
    pub batch_size: usize,
    pub lr: f64,
    pub warmup_fraction: f64,
    pub grad_clip: f64,
    pub val_fraction: f64,
    pub patience: usize,
    pub dropout: f64,
    pub noise: f64,
    pub dead_threshold: f64,
    pub seed: u64,
    pub threads: usize,
}

/// Rows per whitened dimension below which the flow runs only on the
/// leading third of the principal components (measured: see README).
const FEW_ROWS_PER_DIM: f64 = 50.0;

impl Settings {
    /// Fill every unset option from the size of the training set:
    /// `n` training rows, `d` live dimensions.
    pub fn resolve(o: &FitOptions, n: usize, d: usize) -> Result<Settings> {
        let method = o.method.unwrap_or(Method::Pca);
        let per_dim = n as f64 / d as f64;
        let few = per_dim < FEW_ROWS_PER_DIM;
        let default_dims = if few && method == Method::Pca { d.div_ceil(3).max(2.min(d)) } else { d };
        let flow_dims = o.flow_dims.unwrap_or(default_dims);
        if flow_dims == 0 || flow_dims > d {
            return Err(Error::Invalid(format!("--flow-dims must be between 1 and {d} (the live features)")));
        }
        let batch_size = o.batch_size.unwrap_or(if n >= 20_000 { 256 } else { 128 }).clamp(1, n);
        let steps_per_epoch = n.div_ceil(batch_size);
        let s = Settings {
            method,
            layers: if flow_dims < 2 { 0 } else { o.layers.unwrap_or(6) },
            hidden: o.hidden.unwrap_or((2 * flow_dims).clamp(64, 512).next_multiple_of(32)),
            depth: o.depth.unwrap_or(2),
            clamp: o.clamp.unwrap_or(3.0),
            flow_dims,
            epochs: o.epochs.unwrap_or((20_000usize.div_ceil(steps_per_epoch)).clamp(20, 200)),
            batch_size,
            lr: o.lr.unwrap_or(1e-3),
            warmup_fraction: 0.02,
            grad_clip: 5.0,
            val_fraction: o.val_fraction.unwrap_or(0.1),
            patience: o.patience.unwrap_or(10),
            dropout: o.dropout.unwrap_or(if few {
                0.2
            } else if per_dim < 500.0 {
                0.1
            } else {
                0.0
            }),
            noise: o.noise.unwrap_or(if few {
                0.2
            } else if per_dim < 200.0 {
                0.1
            } else {
                0.0
            }),
            dead_threshold: o.dead_threshold.unwrap_or(DEFAULT_DEAD_THRESHOLD),
            seed: o.seed.unwrap_or(0),
            threads: o.threads.unwrap_or_else(default_threads).max(1),
        };
        if s.depth == 0 || s.hidden == 0 || s.epochs == 0 {
            return Err(Error::Invalid("--depth, --hidden and --epochs must be at least 1".into()));
        }
        if !(0.0..1.0).contains(&s.dropout) || s.noise < 0.0 || s.clamp <= 0.0 || s.lr <= 0.0 {
            return Err(Error::Invalid("--dropout must be in [0, 1); --noise >= 0; --clamp and --lr > 0".into()));
        }
        Ok(s)
    }
}

/// Adam (Kingma & Ba 2015) over the flat parameter vector, in one fused pass.
pub struct Adam {
    m: Vec<f32>,
    v: Vec<f32>,
    t: u64,
}

impl Adam {
    const BETA1: f32 = 0.9;
    const BETA2: f32 = 0.999;
    const EPS: f32 = 1e-8;

    pub fn new(n: usize) -> Adam {
        Adam { m: vec![0.0; n], v: vec![0.0; n], t: 0 }
    }

    pub fn step(&mut self, params: &mut [f32], grad: &[f32], lr: f64) {
        self.t += 1;
        let c1 = 1.0 - (Self::BETA1 as f64).powi(self.t as i32);
        let c2 = 1.0 - (Self::BETA2 as f64).powi(self.t as i32);
        let step = (lr * c2.sqrt() / c1) as f32;
        let eps = Self::EPS * c2.sqrt() as f32;
        for (((p, &g), m), v) in params.iter_mut().zip(grad).zip(&mut self.m).zip(&mut self.v) {
            *m = Self::BETA1 * *m + (1.0 - Self::BETA1) * g;
            *v = Self::BETA2 * *v + (1.0 - Self::BETA2) * g * g;
            *p -= step * *m / (v.sqrt() + eps);
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

/// Seeded split of row indices into (train, validation).
fn split_rows(n: usize, val_fraction: f64, seed: u64) -> (Vec<usize>, Vec<usize>) {
    let mut idx: Vec<usize> = (0..n).collect();
    idx.shuffle(&mut StdRng::seed_from_u64(seed ^ 0x5EED_5917));
    let n_val = if val_fraction > 0.0 { ((n as f64 * val_fraction).round() as usize).clamp(1, n - 1) } else { 0 };
    let val = idx.split_off(n - n_val);
    (idx, val)
}

/// Fewest rows `fit` accepts.
pub const MIN_ROWS: usize = 10;

/// Fit a model to the rows of `x`.
pub fn fit(x: &Matrix, labels: Option<&[i64]>, opts: &FitOptions) -> Result<Model> {
    let started = Instant::now();
    if x.rows < MIN_ROWS {
        return Err(Error::Invalid(format!("need at least {MIN_ROWS} rows to fit, got {}", x.rows)));
    }
    let val_fraction = opts.val_fraction.unwrap_or(0.1);
    if !(0.0..0.9).contains(&val_fraction) {
        return Err(Error::Invalid("--val-fraction must be in [0, 0.9)".into()));
    }
    let (train_idx, val_idx) = split_rows(x.rows, val_fraction, opts.seed.unwrap_or(0));
    let train_x = x.select_rows(&train_idx);
    let method = opts.method.unwrap_or(Method::Pca);
    let dead_threshold = opts.dead_threshold.unwrap_or(DEFAULT_DEAD_THRESHOLD);
    let pre = Preprocessor::fit(&train_x, method, dead_threshold).map_err(Error::Invalid)?;
    let d = pre.dim();
    let settings = Settings::resolve(opts, train_idx.len(), d)?;
    let k = settings.flow_dims;
    if !opts.quiet {
        eprintln!("settings: {}", serde_json::to_string(&settings).map_err(|e| Error::Invalid(e.to_string()))?);
    }

    let whiten = |m: &Matrix| {
        let mut u = vec![0.0f32; m.rows * d];
        pre.transform(&m.data, m.rows, &mut u);
        u
    };
    let u_train = whiten(&train_x);
    drop(train_x);
    let u_val = whiten(&x.select_rows(&val_idx));
    let head =
        |u: &[f32], rows: usize| -> Vec<f32> { (0..rows).flat_map(|r| u[r * d..r * d + k].iter().copied()).collect() };
    let (n_train, n_val) = (train_idx.len(), val_idx.len());
    let h_train = head(&u_train, n_train);
    let h_val = head(&u_val, n_val);

    let spec = FlowSpec {
        dim: k,
        layers: settings.layers,
        hidden: settings.hidden,
        depth: settings.depth,
        clamp: settings.clamp,
    };
    let mut flow = Flow::new(spec, settings.seed);
    let mut workers = Workers::new(&flow, settings.threads, settings.batch_size);
    // Candidate 0: the identity flow, i.e. the whitened Gaussian.
    let mean_nll = |flow: &Flow, workers: &mut Workers, h: &[f32], rows: usize| -> f64 {
        let mut out = vec![0.0; rows];
        workers.nll(flow, h, rows, &mut out);
        out.iter().sum::<f64>() / rows.max(1) as f64
    };
    let (eval_h, eval_n) = if n_val > 0 { (&h_val, n_val) } else { (&h_train, n_train) };
    let gaussian_nll = mean_nll(&flow, &mut workers, eval_h, eval_n);
    let mut best = (gaussian_nll, flow.params.clone(), 0usize);
    flow.init_actnorm(&h_train, n_train.min(4096));

    let steps_per_epoch = n_train.div_ceil(settings.batch_size);
    let total_steps = steps_per_epoch * settings.epochs;
    let mut adam = Adam::new(flow.param_count());
    let mut grad = vec![0.0f32; flow.param_count()];
    let mut batch = vec![0.0f32; settings.batch_size * k];
    let mut rng = StdRng::seed_from_u64(settings.seed.wrapping_add(1));
    let mut order: Vec<usize> = (0..n_train).collect();
    let progress = Progress::new(settings.epochs, opts.quiet);
    // Constant added to flow NLLs to report them per input-space vector.
    let offset = (d - k) as f64 * (0.5 + crate::flow::HALF_LN_2PI) - pre.log_det();
    let mut step = 0usize;
    let mut since_best = 0usize;
    let mut epochs_run = 0usize;
    for epoch in 1..=settings.epochs {
        order.shuffle(&mut rng);
        let mut train_sum = 0.0;
        for chunk in order.chunks(settings.batch_size) {
            let rows = chunk.len();
            for (r, &i) in chunk.iter().enumerate() {
                batch[r * k..(r + 1) * k].copy_from_slice(&h_train[i * k..(i + 1) * k]);
            }
            let noise = settings.noise as f32;
            if noise > 0.0 {
                for v in &mut batch[..rows * k] {
                    *v += noise * <StandardNormal as Distribution<f32>>::sample(&StandardNormal, &mut rng);
                }
            }
            let dropout = (settings.dropout > 0.0)
                .then(|| (settings.dropout as f32, settings.seed ^ (step as u64).wrapping_mul(0x9E37_79B9)));
            let nll = workers.nll_and_grad(&flow, &batch, rows, dropout, &mut grad);
            if !nll.is_finite() || grad.iter().any(|g| !g.is_finite()) {
                return Err(Error::Invalid(format!(
                    "training diverged at epoch {epoch} (non-finite loss); try a smaller --lr or a smaller --clamp"
                )));
            }
            clip_norm(&mut grad, settings.grad_clip);
            adam.step(&mut flow.params, &grad, learning_rate(settings.lr, step, total_steps, settings.warmup_fraction));
            train_sum += nll * rows as f64;
            step += 1;
        }
        epochs_run = epoch;
        let train_nll = train_sum / n_train as f64 + offset;
        let val_nll = mean_nll(&flow, &mut workers, eval_h, eval_n);
        let improved = val_nll < best.0;
        if improved {
            best = (val_nll, flow.params.clone(), epoch);
            since_best = 0;
        } else {
            since_best += 1;
        }
        progress.epoch(epoch, train_nll / d as f64, (val_nll + offset) / d as f64, improved);
        if since_best >= settings.patience {
            break;
        }
    }
    progress.finish();
    flow.params = best.1;

    // Log-likelihood spread over the training rows (for typicality scores).
    let mut train_nll_rows = vec![0.0; n_train];
    workers.nll(&flow, &h_train, n_train, &mut train_nll_rows);
    let ll: Vec<f64> = (0..n_train)
        .map(|r| {
            let tail: f64 = u_train[r * d + k..(r + 1) * d]
                .iter()
                .map(|&v| 0.5 * (v as f64).powi(2) + crate::flow::HALF_LN_2PI)
                .sum();
            -train_nll_rows[r] - tail + pre.log_det()
        })
        .collect();
    let ll_mean = ll.iter().sum::<f64>() / n_train as f64;
    let ll_std = (ll.iter().map(|v| (v - ll_mean).powi(2)).sum::<f64>() / n_train as f64).sqrt();

    let meta = Meta {
        format: "tidemark-model".into(),
        format_version: FORMAT_VERSION,
        created_by: format!("tidemark {}", env!("CARGO_PKG_VERSION")),
        input_dim: x.cols,
        preprocessing: PreprocessingMeta {
            method,
            live_features: d,
            dead_features: pre.dead.clone(),
            dead_threshold,
            floored_components: pre.floored,
            log_det: pre.log_det(),
        },
        flow_dims: k,
        flow: flow.spec.clone(),
        seed: settings.seed,
        training: TrainingSummary {
            settings: serde_json::to_value(&settings).map_err(|e| Error::Invalid(e.to_string()))?,
            train_rows: n_train,
            validation_rows: n_val,
            epochs_run,
            best_epoch: best.2,
            best_train_nll: -ll_mean,
            best_validation_nll: best.0 + offset,
            gaussian_validation_nll: gaussian_nll + offset,
            seconds: started.elapsed().as_secs_f64(),
        },
        train_log_likelihood: Spread { mean: ll_mean, std: ll_std },
        classes: class_counts(labels.unwrap_or(&[])),
    };
    Ok(Model { meta, pre, flow })
}

fn class_counts(labels: &[i64]) -> Vec<ClassCount> {
    let mut counts = std::collections::BTreeMap::new();
    for &l in labels {
        *counts.entry(l).or_insert(0usize) += 1;
    }
    counts.into_iter().map(|(label, rows)| ClassCount { label, rows }).collect()
}

/// Scale `g` down to global norm `max` when it is longer.
fn clip_norm(g: &mut [f32], max: f64) {
    let norm = g.iter().map(|&v| (v as f64) * (v as f64)).sum::<f64>().sqrt();
    if norm > max {
        let s = (max / norm) as f32;
        g.iter_mut().for_each(|v| *v *= s);
    }
}

/// Epoch progress on stderr: a bar on a terminal, one line per epoch otherwise.
struct Progress {
    bar: Option<ProgressBar>,
    quiet: bool,
    started: Instant,
}

impl Progress {
    fn new(epochs: usize, quiet: bool) -> Progress {
        let bar = (!quiet && std::io::stderr().is_terminal()).then(|| {
            let bar = ProgressBar::new(epochs as u64);
            bar.set_style(
                ProgressStyle::with_template("{bar:30} epoch {pos}/{len} {msg} [{elapsed_precise} < {eta_precise}]")
                    .expect("valid template"),
            );
            bar
        });
        Progress { bar, quiet, started: Instant::now() }
    }

    fn epoch(&self, epoch: usize, train: f64, val: f64, improved: bool) {
        let mark = if improved { " *" } else { "" };
        let msg = format!("train NLL {train:.4} val NLL {val:.4} nats/dim{mark}");
        match &self.bar {
            Some(bar) => {
                bar.set_position(epoch as u64);
                bar.set_message(msg);
            }
            None if !self.quiet => eprintln!("epoch {epoch:>4}  {msg}  ({:.1}s)", self.started.elapsed().as_secs_f64()),
            None => {}
        }
    }

    fn finish(&self) {
        if let Some(bar) = &self.bar {
            bar.finish();
        }
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
    #[test]
    fn adam_first_step_is_lr_times_sign() {
        let mut p = vec![1.0f32, 1.0, 1.0];
        let mut adam = Adam::new(3);
        adam.step(&mut p, &[0.5, -2.0, 1e-3], 0.01);
        for (v, want) in p.iter().zip([0.99, 1.01, 0.99]) {
            assert!((v - want).abs() < 1e-5, "{v} vs {want}");
        }
    }
}
