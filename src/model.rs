//! The fitted model: preprocessing + flow, its exact log-likelihood in the
//! original input space, sampling, and the `.safetensors` model file.
//!
//! Log-likelihood of an input vector x (live features only; dead features are
//! kept out and reported separately):
//!   u = whiten(x)                      ln|det du/dx| = preprocessing log-det
//!   flow on u[..k], standard normal on u[k..]
//!   log p(x) = -NLL_flow(u[..k]) - sum_{i>=k} (u_i^2/2 + ln(2 pi)/2) + log-det

use crate::data::{Dataset, Matrix};
use crate::density::{Density, Evaluate, Parts};
use crate::error::{Error, Result};
use crate::flow::{Flow, FlowSpec, Workers, HALF_LN_2PI};
use crate::preprocess::{Method, Preprocessor};
use rand::SeedableRng;
use std::path::Path;

/// Newest version of the model file layout; bumped on any incompatible
/// change. Version 2 added LU mixing; a model without it is still written as
/// version 1, so that older builds read it.
pub const FORMAT_VERSION: u32 = 4;

/// The oldest version that can hold a model with this mixing and kind
/// (builds before version 2 would read an LU-mixed flow as a permuted one,
/// builds before version 3 know no mixture, and builds before version 4
/// would read a class-conditional mixture as one without classes, so they
/// must refuse them).
pub fn format_version_for(mixing: crate::flow::Mixing, kind: Kind, labelled: bool) -> u32 {
    match (kind, mixing) {
        (Kind::Mixture, _) if labelled => 4,
        (Kind::Mixture, _) => 3,
        (_, crate::flow::Mixing::Permutation) => 1,
        (_, crate::flow::Mixing::Lu) => 2,
    }
}

/// Key of the JSON document in the safetensors `__metadata__`.
const META_KEY: &str = "tidemark";

mod file;
pub(crate) use file::Extras;

/// How a model was trained and how it did.
#[derive(Clone, Debug, Default, serde::Serialize, serde::Deserialize)]
pub struct TrainingSummary {
    /// Every resolved training setting (after defaults by data size).
    pub settings: serde_json::Value,
    pub train_rows: usize,
    pub validation_rows: usize,
    pub epochs_run: usize,
    /// 0 means the untrained (identity) flow, i.e. the whitened Gaussian, won.
    pub best_epoch: usize,
    /// Mean negative log-likelihood per vector, nats, input space.
    pub best_train_nll: f64,
    pub best_validation_nll: f64,
    /// Validation NLL of the untrained flow (the whitened Gaussian).
    pub gaussian_validation_nll: f64,
    /// Checksum of the training data file (hex), to warn when the same rows
    /// are used for calibration.
    #[serde(default)]
    pub data_checksum: String,
    /// Every density `fit` compared on the validation rows when it chose
    /// one (empty when the kind was given).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub candidates: Vec<Candidate>,
}

/// One density compared on the validation rows.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct Candidate {
    pub kind: Kind,
    /// Its name in the search: the kind, or the flow configuration (the
    /// name its epochs carry in the training log).
    #[serde(default)]
    pub name: String,
    /// What distinguishes it (components, shrinkage, flow shape).
    pub detail: String,
    /// Mean negative log-likelihood of the validation rows, nats per vector.
    pub validation_nll: f64,
    pub seconds: f64,
    pub chosen: bool,
    /// Training epochs run (0 for the kinds fitted in closed form or by EM).
    #[serde(default)]
    pub epochs: usize,
    /// Why it stopped: closed form, EM converged, early stopping, all
    /// epochs, halved out after a stage, or the budget.
    #[serde(default)]
    pub stopped: String,
    /// Validation NLL after each stage of the flows' successive halving.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub stages: Vec<f64>,
    /// The stage its first entry in `stages` belongs to: 0, or later for a
    /// flow of the local round that follows the first round.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub first_stage: usize,
}

fn is_zero(n: &usize) -> bool {
    *n == 0
}

/// Mean and standard deviation of a statistic over the training rows.
#[derive(Clone, Debug, Default, serde::Serialize, serde::Deserialize)]
pub struct Spread {
    pub mean: f64,
    pub std: f64,
}

/// The JSON document stored in the model file's metadata.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Meta {
    pub format: String,
    pub format_version: u32,
    pub created_by: String,
    /// Width of the input vectors.
    pub input_dim: usize,
    pub preprocessing: PreprocessingMeta,
    /// How many leading whitened dimensions the flow models; the rest are
    /// standard normal.
    pub flow_dims: usize,
    pub flow: FlowSpec,
    pub seed: u64,
    pub training: TrainingSummary,
    /// Log-likelihood (nats, input space) over the training rows.
    pub train_log_likelihood: Spread,
    /// Class labels given at fit time and their row counts (empty without labels).
    #[serde(default)]
    pub classes: Vec<ClassCount>,
    pub kind: Kind,
    /// Shape of the background flow (likelihood-ratio score), if any.
    pub background: Option<FlowSpec>,
    /// Noise scale the background flow was trained with (whitened units).
    pub background_noise: Option<f64>,
    pub scoring: ScoringMeta,
    /// The Gaussian mixture over the whitened vectors (mixture kind only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mixture: Option<MixtureMeta>,
}

/// Shape of a fitted Gaussian mixture and how it was fitted.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MixtureMeta {
    /// All components (with classes, over every class).
    pub components: usize,
    /// Components of each class, in the order of the classes (empty
    /// without classes).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub per_class: Vec<usize>,
    /// Added to every covariance's diagonal (whitened units).
    pub ridge: f64,
    pub em_iterations: usize,
    pub converged: bool,
}

#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct ClassCount {
    pub label: i64,
    pub rows: usize,
}

impl Meta {
    /// A readable account of the model, for `inspect`.
    pub fn describe(&self) -> String {
        let p = &self.preprocessing;
        let t = &self.training;
        let dead = if p.dead_features.is_empty() {
            "none".to_string()
        } else {
            format!("{} {:?}", p.dead_features.len(), p.dead_features)
        };
        let mut s = String::new();
        // Strings here come from the file: no control codes reach the terminal.
        let mut line = |k: &str, v: String| s.push_str(&format!("{k:<28}{}\n", crate::data::printable(&v, 100_000)));
        line("model", format!("{} v{} ({})", self.format, self.format_version, self.created_by));
        line("input features", self.input_dim.to_string());
        line("dead features", format!("{dead} (std <= {:e} x largest std)", p.dead_threshold));
        line(
            "preprocessing",
            format!(
                "{:?}, {} whitened dims, log-det {:.4}, null components left out {}, shrinkage {}",
                p.method, p.whitened_dims, p.log_det, p.floored_components, p.shrinkage
            )
            .to_lowercase(),
        );
        line("flow", crate::density::flow::describe_flow(&self.flow, p.whitened_dims));
        if let Some(m) = &self.mixture {
            line(
                "mixture",
                format!(
                    "{} full-covariance Gaussians{} over all {} whitened dims, ridge {:.3e}, {} EM iterations{}",
                    m.components,
                    if m.per_class.is_empty() {
                        String::new()
                    } else {
                        format!(
                            " ({} per class)",
                            m.per_class.iter().map(|k| k.to_string()).collect::<Vec<_>>().join(", ")
                        )
                    },
                    p.whitened_dims,
                    m.ridge,
                    m.em_iterations,
                    if m.converged { "" } else { " (not converged)" }
                ),
            );
        }
        line("seed", self.seed.to_string());
        line("rows", format!("{} train, {} validation", t.train_rows, t.validation_rows));
        line("epochs", format!("{} run, best {} (0 = untrained flow, i.e. Gaussian)", t.epochs_run, t.best_epoch));
        let per_dim = |v: f64| v / p.whitened_dims as f64;
        line("train NLL", format!("{:.4} nats/vector ({:.4} nats/dim)", t.best_train_nll, per_dim(t.best_train_nll)));
        line(
            "validation NLL",
            format!("{:.4} nats/vector ({:.4} nats/dim)", t.best_validation_nll, per_dim(t.best_validation_nll)),
        );
        line("Gaussian validation NLL", format!("{:.4} nats/vector", t.gaussian_validation_nll));
        line(
            "train log-likelihood",
            format!("mean {:.4}, std {:.4}", self.train_log_likelihood.mean, self.train_log_likelihood.std),
        );
        if !self.classes.is_empty() {
            let c: Vec<String> = self.classes.iter().map(|c| format!("{}: {}", c.label, c.rows)).collect();
            line("classes (rows)", c.join(", "));
        }
        for row in leaderboard(&t.candidates) {
            line("candidate", row);
        }
        line("settings", t.settings.to_string());
        s
    }

    /// The metadata as pretty JSON, for `inspect --json`, with every
    /// character that could drive a terminal written as a JSON escape.
    pub fn to_json(&self) -> String {
        let text = serde_json::to_string_pretty(self).unwrap_or_default();
        let mut out = String::with_capacity(text.len());
        for ch in text.chars() {
            if ch != '\n' && crate::data::drives_terminal(ch) {
                out.push_str(&format!("\\u{:04x}", ch as u32));
            } else {
                out.push(ch);
            }
        }
        out
    }

    /// One line for the end of `fit`.
    pub fn fit_summary(&self, path: &Path) -> String {
        let t = &self.training;
        if !t.candidates.is_empty() {
            let mut s = String::from("candidates, best validation NLL first (* chosen):\n");
            for row in leaderboard(&t.candidates) {
                s.push_str(&format!("  {row}\n"));
            }
            s.push_str(&format!(
                "wrote {}: {} chosen on validation NLL {:.4} nats/vector ({} candidates compared; `inspect` lists them)",
                path.display(),
                kind_name(self.kind),
                t.best_validation_nll,
                t.candidates.len()
            ));
            return s;
        }
        format!(
            "wrote {}: validation NLL {:.4} nats/vector (Gaussian {:.4}), best epoch {} of {}",
            path.display(),
            t.best_validation_nll,
            t.gaussian_validation_nll,
            t.best_epoch,
            t.epochs_run
        )
    }
}

/// The candidates best first, one line each: rank, kind, validation NLL,
/// epochs, seconds, why it stopped and what distinguishes it.
pub fn leaderboard(candidates: &[Candidate]) -> Vec<String> {
    let mut order: Vec<&Candidate> = candidates.iter().collect();
    order.sort_by(|a, b| a.validation_nll.total_cmp(&b.validation_nll));
    order
        .iter()
        .enumerate()
        .map(|(i, c)| {
            format!(
                "{:>2}{} {:<15} validation NLL {:>12.4} nats/vector, {:>4} epochs, {:>7.1} s, {}; {}",
                i + 1,
                if c.chosen { "*" } else { " " },
                kind_name(c.kind),
                c.validation_nll,
                c.epochs,
                c.seconds,
                c.stopped,
                c.detail
            )
        })
        .collect()
}

#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PreprocessingMeta {
    pub method: Method,
    pub live_features: usize,
    /// Dimensions of the whitened space the density is over (live features
    /// less null principal directions).
    pub whitened_dims: usize,
    /// Input columns kept out of the model because they do not vary.
    pub dead_features: Vec<usize>,
    pub dead_threshold: f64,
    pub floored_components: usize,
    /// Ledoit-Wolf shrinkage intensity of the covariance (0: none).
    #[serde(default)]
    pub shrinkage: f64,
    /// ln|det| of the whitening map on the live features.
    pub log_det: f64,
}

/// A fitted model.
#[derive(Clone, Debug)]
pub struct Model {
    pub meta: Meta,
    pub pre: Preprocessor,
    /// The density over the whitened vectors.
    pub density: Box<dyn Density>,
    /// The background flow of the likelihood-ratio score, if fitted.
    pub background: Option<Flow>,
    pub refs: ScoringRefs,
}

/// Reference values that scores are computed against, kept from fitting.
#[derive(Clone, Debug, Default)]
pub struct ScoringRefs {
    /// Validation rows' statistics (`rows x kde_columns`), for the
    /// multi-statistic score's kernel density estimate.
    pub kde_points: Vec<f64>,
    /// Validation NLLs, for the batch typicality test's bootstrap.
    pub validation_nll: Vec<f64>,
}

pub use crate::density::{kind_name, Kind};

/// Metadata of the reference values in [`ScoringRefs`].
#[derive(Clone, Debug, Default, serde::Serialize, serde::Deserialize)]
pub struct ScoringMeta {
    /// Statistics the multi-statistic KDE is over, with the mean and
    /// standard deviation used to standardize them.
    pub kde_columns: Vec<String>,
    pub kde_mean: Vec<f64>,
    pub kde_std: Vec<f64>,
    pub kde_rows: usize,
    pub validation_rows: usize,
}

/// Per-row results of evaluating a model. With `z` the full latent (the
/// flow's output on the leading whitened dimensions, the rest as they are):
/// `log_likelihood = base_log_density + log_det`.
#[derive(Clone, Debug, Default)]
pub struct Evaluation {
    /// log p(x), nats, over the live features, in input space (for a
    /// class-conditional model, the mixture over classes).
    pub log_likelihood: Vec<f64>,
    /// log p(z) under the base distribution (mixture of class bases).
    pub base_log_density: Vec<f64>,
    /// ln|det dz/dx|: the flow's plus the whitening's.
    pub log_det: Vec<f64>,
    /// ||z||.
    pub latent_norm: Vec<f64>,
    /// Smallest ||z - mu_c||^2 over the class means (||z||^2 without
    /// classes); the squared Mahalanobis distance for Gaussian kinds.
    pub mahalanobis_sq: Vec<f64>,
    /// log p(x | c) for every class, row-major `rows x classes` (empty
    /// without classes).
    pub class_log_likelihood: Vec<f64>,
    /// Index of the most probable class and its posterior probability.
    pub predicted_class: Vec<usize>,
    pub class_probability: Vec<f64>,
    /// Index of the most responsible mixture component and its posterior
    /// probability (empty unless the model is a mixture).
    pub component: Vec<usize>,
    pub component_probability: Vec<f64>,
    /// log p_background(x) (empty without a background flow).
    pub background_log_likelihood: Vec<f64>,
    /// Largest absolute deviation on dead features from their training value.
    pub dead_deviation: Vec<f64>,
    /// Distance from the span of the training rows' principal directions
    /// (input units; 0 when the training rows span every live direction).
    pub subspace_residual: Vec<f64>,
}

/// What [`Model::evaluator`] builds once and reuses for every chunk.
pub struct Evaluator<'m> {
    model: &'m Model,
    /// Rows whitened and evaluated at a time.
    cap: usize,
    density: Box<dyn Evaluate + 'm>,
    bg_workers: Option<Workers>,
    /// Threads for the scoring work when the density has none of its own.
    pool: Option<rayon::ThreadPool>,
    whitened: Vec<f32>,
    rows: Vec<f32>,
}

impl Evaluator<'_> {
    /// log p(x) and the other per-row statistics for the rows `idx` of `x`.
    pub fn evaluate_rows(&mut self, x: &Dataset, idx: &[usize]) -> Evaluation {
        let m = self.model;
        let mut out = Evaluation::default();
        for chunk in idx.chunks(self.cap) {
            let n = chunk.len();
            x.gather(chunk, &mut self.rows);
            let mut residual = vec![0.0f64; n];
            m.pre.transform(&self.rows, n, &mut self.whitened, Some(&mut residual));
            out.subspace_residual.extend(residual);
            let u = &self.whitened[..n * m.dim()];
            let mut parts = Parts::default();
            self.density.evaluate(u, n, &mut parts);
            m.add_input_space(parts, &mut out);
            if let (Some(bg), Some(workers)) = (&m.background, self.bg_workers.as_mut()) {
                m.background_log_likelihood(bg, workers, u, n, &mut out.background_log_likelihood);
            }
            out.dead_deviation.extend(self.rows.chunks(x.cols).map(|r| m.pre.dead_deviation(r)));
        }
        out
    }

    /// Worker threads for the scoring work (`None` with one thread).
    pub fn pool(&self) -> Option<&rayon::ThreadPool> {
        self.density.pool().or(self.pool.as_ref())
    }
}

/// Rows per thread whitened and pushed through the flow at a time: bounds
/// memory, and is where the scoring throughput peaked in `tidemark bench`.
const CHUNK_ROWS: usize = 1024;

impl Model {
    /// Dimensions the log-likelihood is over (live features).
    pub fn dim(&self) -> usize {
        self.pre.dim()
    }

    pub fn check_width(&self, path: &Path, cols: usize) -> Result<()> {
        if cols != self.meta.input_dim {
            return Err(Error::Data(crate::data::DataError {
                path: path.to_path_buf(),
                msg: format!("has {cols} features per row but the model was fitted on {}", self.meta.input_dim),
            }));
        }
        Ok(())
    }

    /// log p(x) for every row, in chunks of bounded size.
    pub fn evaluate(&self, x: &Dataset, threads: usize) -> Evaluation {
        let idx: Vec<usize> = (0..x.rows).collect();
        self.evaluate_rows(x, &idx, threads)
    }

    /// log p(x) for the rows `idx` of `x`, in chunks of bounded size.
    pub fn evaluate_rows(&self, x: &Dataset, idx: &[usize], threads: usize) -> Evaluation {
        self.evaluator(threads, idx.len()).evaluate_rows(x, idx)
    }

    /// Workspaces and threads for evaluating up to `max_rows` rows per
    /// call, to keep across calls (`score` makes one for the whole file).
    pub fn evaluator(&self, threads: usize, max_rows: usize) -> Evaluator<'_> {
        let cap = (CHUNK_ROWS * threads.max(1)).min(max_rows).max(1);
        let density = self.density.evaluator(threads, cap);
        let own_pool = threads > 1 && density.pool().is_none();
        Evaluator {
            model: self,
            cap,
            pool: own_pool.then(|| rayon::ThreadPoolBuilder::new().num_threads(threads).build().ok()).flatten(),
            density,
            bg_workers: self.background.as_ref().map(|bg| Workers::forward_only(bg, threads, cap)),
            whitened: vec![0.0f32; cap * self.dim()],
            rows: Vec::new(),
        }
    }

    /// A checksum of everything that determines the model's scores, to
    /// recognise it in calibration files.
    pub fn fingerprint(&self) -> String {
        let mut h = 0x7D3A_u64;
        let mut eat = |bits: u64| h = crate::data::mix64(h ^ bits);
        self.density.fingerprint(&mut eat);
        for v in self.background.iter().flat_map(|b| b.params.iter()) {
            eat(v.to_bits() as u64);
        }
        for v in self.pre.mean.iter().chain(&self.pre.scale) {
            eat(v.to_bits());
        }
        for v in self.pre.components.iter().flatten() {
            eat(v.to_bits() as u64);
        }
        format!("{h:016x}")
    }

    /// Number of classes of a class-conditional model (0 otherwise).
    pub fn classes(&self) -> usize {
        self.density.classes()
    }

    /// The flow, for a flow model.
    pub fn flow(&self) -> Option<&Flow> {
        self.density.flow()
    }

    /// The density's parts of whitened rows, taken to input space: the
    /// whitening's log-determinant joins every log-density (change of
    /// variables).
    fn add_input_space(&self, parts: Parts, out: &mut Evaluation) {
        let pre = self.pre.log_det();
        out.log_likelihood.extend(parts.log_density.iter().map(|v| v + pre));
        out.base_log_density.extend(parts.base_log_density);
        out.log_det.extend(parts.log_det.iter().map(|v| v + pre));
        out.latent_norm.extend(parts.latent_norm);
        out.mahalanobis_sq.extend(parts.mahalanobis_sq);
        out.class_log_likelihood.extend(parts.class_log_density.iter().map(|v| v + pre));
        out.predicted_class.extend(parts.predicted_class);
        out.class_probability.extend(parts.class_probability);
        out.component.extend(parts.component);
        out.component_probability.extend(parts.component_probability);
    }

    /// log p_background(x) of whitened rows `u`: the background flow on the
    /// leading dimensions, a standard normal on the rest.
    fn background_log_likelihood(&self, bg: &Flow, workers: &mut Workers, u: &[f32], rows: usize, out: &mut Vec<f64>) {
        let (d, k) = (self.dim(), self.meta.flow_dims);
        let head = leading_columns(u, rows, d, k);
        let mut bz = vec![0.0f32; rows * k];
        let mut bg_logdet = vec![0.0f64; rows];
        workers.latent(bg, &head, rows, &mut bz, &mut bg_logdet);
        let pre_log_det = self.pre.log_det();
        for r in 0..rows {
            let sq: f64 =
                bz[r * k..(r + 1) * k].iter().chain(&u[r * d + k..(r + 1) * d]).map(|&v| (v as f64).powi(2)).sum();
            out.push(-0.5 * sq - d as f64 * HALF_LN_2PI + bg_logdet[r] + pre_log_det);
        }
    }

    /// Draw `n` vectors from the model (input space).
    pub fn sample(&self, n: usize, seed: u64) -> Matrix {
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let u = self.density.sample(n, &mut rng);
        Matrix::new(n, self.meta.input_dim, self.pre.inverse(&u, n))
    }
}

pub use crate::linalg::log_sum_exp;

/// The first `k` of every `d` columns of `u` (the flow's part of whitened
/// rows), into `out`, which is cleared first.
pub(crate) fn leading_columns_into(u: &[f32], d: usize, k: usize, out: &mut Vec<f32>) {
    out.clear();
    out.extend(u.chunks_exact(d).flat_map(|r| &r[..k]));
}

fn leading_columns(u: &[f32], rows: usize, d: usize, k: usize) -> Vec<f32> {
    let mut out = Vec::with_capacity(rows * k);
    leading_columns_into(&u[..rows * d], d, k, &mut out);
    out
}
