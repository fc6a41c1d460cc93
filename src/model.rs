//! The fitted model: preprocessing + flow, its exact log-likelihood in the
//! original input space, sampling, and the `.safetensors` model file.
//!
//! Log-likelihood of an input vector x (live features only; dead features are
//! kept out and reported separately):
//!   u = whiten(x)                      ln|det du/dx| = preprocessing log-det
//!   flow on u[..k], standard normal on u[k..]
//!   log p(x) = -NLL_flow(u[..k]) - sum_{i>=k} (u_i^2/2 + ln(2 pi)/2) + log-det

use crate::data::{Dataset, Matrix};
use crate::error::{Error, Result};
use crate::flow::{self, Flow, FlowSpec, Workers, HALF_LN_2PI};
use crate::preprocess::{Method, Preprocessor};
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use safetensors::{Dtype, SafeTensors};
use std::collections::HashMap;
use std::path::Path;

/// Newest version of the model file layout; bumped on any incompatible
/// change. Version 2 added LU mixing; a model without it is still written as
/// version 1, so that older builds read it.
pub const FORMAT_VERSION: u32 = 2;

/// The oldest version that can hold a flow with this mixing (builds before
/// version 2 would read an LU-mixed flow as a permuted one, so they must
/// refuse it).
pub fn format_version_for(mixing: crate::flow::Mixing) -> u32 {
    match mixing {
        crate::flow::Mixing::Permutation => 1,
        crate::flow::Mixing::Lu => 2,
    }
}

/// Key of the JSON document in the safetensors `__metadata__`.
const META_KEY: &str = "tidemark";

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
        line(
            "flow",
            format!(
                "{} coupling layers over the leading {} of {} whitened dims; conditioner {} x {} (soft clamp {}); {}",
                self.flow.layers,
                self.flow_dims,
                p.whitened_dims,
                self.flow.depth,
                self.flow.hidden,
                self.flow.clamp,
                match self.flow.mixing {
                    crate::flow::Mixing::Permutation => "permutations between layers",
                    crate::flow::Mixing::Lu => "permutations and learned LU mixing between layers",
                }
            ),
        );
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
    pub flow: Flow,
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

/// What kind of density a model is.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Kind {
    /// Whitening followed by affine coupling layers (optionally class-conditional).
    #[default]
    Flow,
    /// One full-covariance Gaussian (Ledoit-Wolf shrinkage when rows are few).
    Gaussian,
    /// Class means with one shared covariance.
    ClassGaussian,
}

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
    /// Rows whitened and pushed through the flow at a time.
    cap: usize,
    workers: Workers,
    bg_workers: Option<Workers>,
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
            m.evaluate_whitened(
                &self.whitened[..n * m.dim()],
                n,
                &mut self.workers,
                self.bg_workers.as_mut(),
                &mut out,
            );
            out.dead_deviation.extend(self.rows.chunks(x.cols).map(|r| m.pre.dead_deviation(r)));
        }
        out
    }

    /// The flow workers' thread pool (`None` with one thread).
    pub fn pool(&self) -> Option<&rayon::ThreadPool> {
        self.workers.pool()
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

    /// Flow workers and scratch for evaluating up to `max_rows` rows per
    /// call, to keep across calls (`score` makes one for the whole file).
    pub fn evaluator(&self, threads: usize, max_rows: usize) -> Evaluator<'_> {
        let cap = (CHUNK_ROWS * threads.max(1)).min(max_rows).max(1);
        Evaluator {
            model: self,
            cap,
            workers: Workers::forward_only(&self.flow, threads, cap),
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
        for v in self.flow.params.iter().chain(self.background.iter().flat_map(|b| b.params.iter())) {
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
        self.flow.spec.classes
    }

    /// log of each class's prior (its share of the training labels).
    fn log_priors(&self) -> Vec<f64> {
        let total: usize = self.meta.classes.iter().map(|c| c.rows).sum();
        self.meta.classes.iter().map(|c| (c.rows as f64 / total as f64).ln()).collect()
    }

    /// Evaluate whitened rows (`rows x dim`), appending to `out`.
    fn evaluate_whitened(
        &self,
        u: &[f32],
        rows: usize,
        workers: &mut Workers,
        bg_workers: Option<&mut Workers>,
        out: &mut Evaluation,
    ) {
        let (d, k) = (self.dim(), self.meta.flow_dims);
        // No copy when the flow models every dimension.
        let head = if k == d { std::borrow::Cow::Borrowed(u) } else { leading_columns(u, rows, d, k).into() };
        let mut z = vec![0.0f32; rows * k];
        let mut flow_logdet = vec![0.0f64; rows];
        workers.latent(&self.flow, &head, rows, &mut z, &mut flow_logdet);
        let pre_log_det = self.pre.log_det();
        let priors = self.log_priors();
        let mut per_class = vec![0.0f64; self.classes()];
        if let (Some(bg), Some(bg_workers)) = (&self.background, bg_workers) {
            let mut bz = vec![0.0f32; rows * k];
            let mut bg_logdet = vec![0.0f64; rows];
            bg_workers.latent(bg, &head, rows, &mut bz, &mut bg_logdet);
            for r in 0..rows {
                let sq: f64 =
                    bz[r * k..(r + 1) * k].iter().chain(&u[r * d + k..(r + 1) * d]).map(|&v| (v as f64).powi(2)).sum();
                out.background_log_likelihood.push(-0.5 * sq - d as f64 * HALF_LN_2PI + bg_logdet[r] + pre_log_det);
            }
        }
        for r in 0..rows {
            let zr = &z[r * k..(r + 1) * k];
            let tail_sq: f64 = u[r * d + k..(r + 1) * d].iter().map(|&v| (v as f64).powi(2)).sum();
            let head_sq: f64 = zr.iter().map(|&v| (v as f64).powi(2)).sum();
            let norm_const = d as f64 * HALF_LN_2PI;
            let log_det = flow_logdet[r] + pre_log_det;
            let (base, maha) = if self.classes() == 0 {
                (-0.5 * (head_sq + tail_sq) - norm_const, head_sq + tail_sq)
            } else {
                for (c, slot) in per_class.iter_mut().enumerate() {
                    let sq: f64 = zr.iter().zip(self.flow.class_mean(c)).map(|(&v, &m)| ((v - m) as f64).powi(2)).sum();
                    *slot = sq + tail_sq;
                }
                let maha = per_class.iter().cloned().fold(f64::INFINITY, f64::min);
                // log N(z; mu_c, I) + log pi_c, then the mixture and the posterior.
                for (slot, p) in per_class.iter_mut().zip(&priors) {
                    *slot = -0.5 * *slot - norm_const + p;
                }
                let mix = log_sum_exp(&per_class);
                let (best, top) =
                    per_class
                        .iter()
                        .enumerate()
                        .fold((0, f64::NEG_INFINITY), |b, (c, &v)| if v > b.1 { (c, v) } else { b });
                out.predicted_class.push(best);
                out.class_probability.push((top - mix).exp());
                out.class_log_likelihood.extend(per_class.iter().zip(&priors).map(|(v, p)| v - p + log_det));
                (mix, maha)
            };
            out.log_likelihood.push(base + log_det);
            out.base_log_density.push(base);
            out.log_det.push(log_det);
            out.latent_norm.push((head_sq + tail_sq).sqrt());
            out.mahalanobis_sq.push(maha);
        }
    }

    /// Draw `n` vectors from the model (input space).
    pub fn sample(&self, n: usize, seed: u64) -> Matrix {
        let (d, k) = (self.dim(), self.meta.flow_dims);
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let z: Vec<f32> = (0..n * d).map(|_| StandardNormal.sample(&mut rng)).collect();
        let mut head_z = leading_columns(&z, n, d, k);
        if self.classes() > 0 {
            // A class from the priors, then the base around its mean.
            let priors: Vec<f64> = self.log_priors().iter().map(|p| p.exp()).collect();
            let pick = rand_distr::weighted::WeightedIndex::new(&priors).expect("class priors are positive");
            for row in head_z.chunks_mut(k) {
                let c = pick.sample(&mut rng);
                for (v, m) in row.iter_mut().zip(self.flow.class_mean(c)) {
                    *v += m;
                }
            }
        }
        let head = flow::inverse(&self.flow, &head_z, n);
        let mut u = z;
        for r in 0..n {
            u[r * d..r * d + k].copy_from_slice(&head[r * k..(r + 1) * k]);
        }
        Matrix::new(n, self.meta.input_dim, self.pre.inverse(&u, n))
    }

    /// Write the model as one `.safetensors` file (atomically).
    pub fn save(&self, path: &Path) -> Result<()> {
        self.save_with(path, Vec::new(), None)
    }

    /// Write the model plus extra f32 tensors and one extra metadata entry
    /// (used by checkpoints).
    pub(crate) fn save_with(
        &self,
        path: &Path,
        extra: Vec<(String, &[f32])>,
        extra_meta: Option<(&str, String)>,
    ) -> Result<()> {
        let mut tensors: Vec<(String, Dtype, Vec<usize>, Vec<u8>)> = Vec::new();
        for (name, values) in extra {
            tensors.push((name, Dtype::F32, vec![values.len()], le_bytes_f32(values)));
        }
        let mut put = |name: &str, dtype: Dtype, shape: Vec<usize>, bytes: Vec<u8>| {
            tensors.push((name.to_string(), dtype, shape, bytes));
        };
        let pre = &self.pre;
        let (live, k) = (pre.live.len(), pre.dim());
        put("preprocess.mean", Dtype::F64, vec![live], le_bytes_f64(&pre.mean));
        put("preprocess.scale", Dtype::F64, vec![k], le_bytes_f64(&pre.scale));
        put("preprocess.live_features", Dtype::I64, vec![live], le_bytes_i64(&pre.live));
        if let Some(c) = &pre.components {
            put("preprocess.components", Dtype::F32, vec![k, live], le_bytes_f32(c));
        }
        if !pre.dead.is_empty() {
            put("preprocess.dead_values", Dtype::F64, vec![pre.dead.len()], le_bytes_f64(&pre.dead_value));
        }
        flow_tensors(&self.flow, "flow", &mut put);
        if let Some(bg) = &self.background {
            flow_tensors(bg, "background", &mut put);
        }
        let r = &self.refs;
        let kde_cols = self.meta.scoring.kde_columns.len().max(1);
        if !r.kde_points.is_empty() {
            put(
                "scores.kde_points",
                Dtype::F64,
                vec![r.kde_points.len() / kde_cols, kde_cols],
                le_bytes_f64(&r.kde_points),
            );
        }
        if !r.validation_nll.is_empty() {
            put("scores.validation_nll", Dtype::F64, vec![r.validation_nll.len()], le_bytes_f64(&r.validation_nll));
        }
        let meta_json = serde_json::to_string(&self.meta).map_err(|e| Error::model(path, e))?;
        let mut metadata = HashMap::from([(META_KEY.to_string(), meta_json)]);
        if let Some((key, value)) = extra_meta {
            metadata.insert(key.to_string(), value);
        }
        let listed: Vec<(&str, Dtype, &[usize], &[u8])> =
            tensors.iter().map(|(n, d, shape, b)| (n.as_str(), *d, shape.as_slice(), b.as_slice())).collect();
        let checksum = content_checksum(&metadata, &listed).to_le_bytes().to_vec();
        tensors.push((CHECKSUM_TENSOR.to_string(), Dtype::U8, vec![8], checksum));
        let views = tensors
            .iter()
            .map(|(name, dtype, shape, bytes)| {
                let view = safetensors::tensor::TensorView::new(*dtype, shape.clone(), bytes)
                    .map_err(|e| Error::model(path, e))?;
                Ok((name.clone(), view))
            })
            .collect::<Result<Vec<_>>>()?;
        if crate::output::is_stdout(path) {
            let bytes = safetensors::serialize(views, Some(metadata)).map_err(|e| Error::model(path, e))?;
            return crate::output::write_atomic(path, |w| {
                w.write_all(&bytes).map_err(|source| Error::Io { path: path.into(), source })
            });
        }
        // Straight from the tensors to the file: no second copy of the
        // whole file in memory (checkpoints carry the optimizer state).
        crate::output::write_atomic_via(path, |tmp| {
            safetensors::serialize_to_file(views, Some(metadata), tmp).map_err(|e| Error::model(path, e))
        })
    }

    /// Read a model file written by [`Model::save`].
    pub fn load(path: &Path) -> Result<Model> {
        Ok(Model::load_with(path)?.0)
    }

    /// Read a model file and give access to what [`Model::save_with`] added.
    pub(crate) fn load_with(path: &Path) -> Result<(Model, Extras)> {
        let bytes = crate::data::read_file(path).map_err(|e| Error::model(path, e.msg))?;
        let model = Model::from_bytes(path, &bytes)?;
        Ok((model, Extras { path: path.to_path_buf(), bytes }))
    }

    /// A model from the contents of a model file (`path` names it in
    /// messages). The checksum (when the file has one) is verified and
    /// every metadata field is checked against the tensors and sane bounds
    /// before anything is allocated from it.
    pub fn from_bytes(path: &Path, bytes: &[u8]) -> Result<Model> {
        let st =
            SafeTensors::deserialize(bytes).map_err(|e| Error::model(path, format!("not a safetensors file ({e})")))?;
        let (_, header) = SafeTensors::read_metadata(bytes).map_err(|e| Error::model(path, e))?;
        let empty = HashMap::new();
        let metadata = header.metadata().as_ref().unwrap_or(&empty);
        let json = metadata
            .get(META_KEY)
            .ok_or_else(|| Error::model(path, "is not a tidemark model (no tidemark metadata)"))?;
        verify_checksum(path, metadata, &st)?;
        let meta: Meta = serde_json::from_str(json).map_err(|e| {
            Error::model(path, format!("bad model metadata: {}", crate::data::printable(&e.to_string(), 300)))
        })?;
        if !(1..=FORMAT_VERSION).contains(&meta.format_version) {
            return Err(Error::model(
                path,
                format!(
                    "model format version {} is not supported (this build reads {FORMAT_VERSION})",
                    meta.format_version
                ),
            ));
        }
        check_meta(path, &meta)?;
        let tensors = Tensors { path, st: &st };
        let pm = &meta.preprocessing;
        let (d, k) = (pm.live_features, pm.whitened_dims);
        let live: Vec<usize> = tensors.indices("preprocess.live_features", d)?;
        // input_dim = live + dead was checked, and both lists are in the file.
        let mut is_live = vec![false; meta.input_dim];
        for &j in &live {
            if j >= meta.input_dim || std::mem::replace(&mut is_live[j], true) {
                return Err(Error::model(path, "live feature indices are out of range or repeated"));
            }
        }
        let dead: Vec<usize> = (0..meta.input_dim).filter(|&j| !is_live[j]).collect();
        if dead != pm.dead_features {
            return Err(Error::model(path, "dead feature list does not match the live features"));
        }
        let components = match pm.method {
            Method::Pca => Some(tensors.f32s("preprocess.components", &[k, d])?),
            Method::Standardize => None,
        };
        let scale = tensors.f64s("preprocess.scale", &[k])?;
        if scale.iter().any(|&s| s <= 0.0) {
            return Err(Error::model(path, "tensor 'preprocess.scale' holds a scale that is not positive"));
        }
        let pre = Preprocessor {
            method: pm.method,
            input_dim: meta.input_dim,
            dead_value: if dead.is_empty() { vec![] } else { tensors.f64s("preprocess.dead_values", &[dead.len()])? },
            live,
            dead,
            mean: tensors.f64s("preprocess.mean", &[d])?,
            components,
            scale,
            floored: pm.floored_components,
            shrinkage: pm.shrinkage,
        };
        let flow = read_flow(&tensors, "flow", &meta.flow, meta.format_version)?;
        let background = match &meta.background {
            Some(spec) => Some(read_flow(&tensors, "background", spec, meta.format_version)?),
            None => None,
        };
        let s = &meta.scoring;
        let refs = ScoringRefs {
            kde_points: if s.kde_rows == 0 {
                vec![]
            } else {
                tensors.f64s("scores.kde_points", &[s.kde_rows, s.kde_columns.len()])?
            },
            validation_nll: if s.validation_rows == 0 {
                vec![]
            } else {
                tensors.f64s("scores.validation_nll", &[s.validation_rows])?
            },
        };
        Ok(Model { meta, pre, flow, background, refs })
    }
}

/// Largest plausible sizes in a model file: far beyond any model this tool
/// fits, small enough that no check below can overflow or allocate wildly.
const MAX_FEATURES: usize = 1 << 24;
const MAX_LAYERS: usize = 1 << 12;
const MAX_DEPTH: usize = 1 << 8;
const MAX_HIDDEN: usize = 1 << 20;

/// Metadata fields checked against each other and sane bounds, before any
/// of them sizes an allocation.
fn check_meta(path: &Path, meta: &Meta) -> Result<()> {
    let bad = |field: &str, why: String| Err(Error::model(path, format!("metadata field '{field}' {why}")));
    let pm = &meta.preprocessing;
    if meta.input_dim == 0 || meta.input_dim > MAX_FEATURES {
        return bad("input_dim", format!("is {}, outside 1..={MAX_FEATURES}", meta.input_dim));
    }
    if pm.live_features.checked_add(pm.dead_features.len()) != Some(meta.input_dim) {
        return bad(
            "preprocessing.live_features",
            format!(
                "{} plus {} dead features is not input_dim {}",
                pm.live_features,
                pm.dead_features.len(),
                meta.input_dim
            ),
        );
    }
    let k = pm.whitened_dims;
    if k == 0 || k > pm.live_features || (pm.method == Method::Standardize && k != pm.live_features) {
        return bad("preprocessing.whitened_dims", format!("{k} does not match {} live features", pm.live_features));
    }
    if meta.flow_dims != meta.flow.dim || meta.flow_dims > k {
        return bad(
            "flow_dims",
            format!("{} does not match the flow ({}) and {k} whitened dims", meta.flow_dims, meta.flow.dim),
        );
    }
    check_spec(path, "flow", &meta.flow)?;
    if let Some(bg) = &meta.background {
        check_spec(path, "background", bg)?;
        if bg.dim != meta.flow_dims || bg.classes != 0 {
            return bad("background", "does not match the flow's dimensions".into());
        }
    }
    if meta.classes.len() != meta.flow.classes {
        return bad(
            "classes",
            format!("lists {} classes, the flow has {} class means", meta.classes.len(), meta.flow.classes),
        );
    }
    if let Some(c) = meta.classes.iter().find(|c| c.rows == 0) {
        return bad("classes", format!("class {} has no training rows", c.label));
    }
    let mut labels: Vec<i64> = meta.classes.iter().map(|c| c.label).collect();
    labels.sort_unstable();
    if labels.windows(2).any(|w| w[0] == w[1]) {
        return bad("classes", "lists a label twice".into());
    }
    let finite = [
        ("preprocessing.log_det", pm.log_det),
        ("preprocessing.dead_threshold", pm.dead_threshold),
        ("preprocessing.shrinkage", pm.shrinkage),
        ("train_log_likelihood.mean", meta.train_log_likelihood.mean),
        ("train_log_likelihood.std", meta.train_log_likelihood.std),
        ("background_noise", meta.background_noise.unwrap_or(0.0)),
    ];
    if let Some((field, v)) = finite.iter().find(|(_, v)| !v.is_finite()) {
        return bad(field, format!("is {v}"));
    }
    let s = &meta.scoring;
    let kde_cols = s.kde_columns.len();
    if s.kde_mean.len() != kde_cols || s.kde_std.len() != kde_cols {
        return bad("scoring", "has a different number of multi-statistic columns, means and spreads".into());
    }
    if let Some(c) = s.kde_columns.iter().find(|c| !crate::score::KDE_STATS.contains(&c.as_str())) {
        return bad("scoring.kde_columns", format!("names an unknown statistic '{}'", crate::data::printable(c, 40)));
    }
    if s.kde_mean.iter().any(|v| !v.is_finite()) || s.kde_std.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
        return bad("scoring", "has a non-finite mean or a spread that is not positive".into());
    }
    if s.kde_rows > 0 && kde_cols == 0 {
        return bad("scoring.kde_rows", "is set without multi-statistic columns".into());
    }
    Ok(())
}

/// A flow's shape within sane bounds.
fn check_spec(path: &Path, prefix: &str, spec: &FlowSpec) -> Result<()> {
    let bad = |why: String| Err(Error::model(path, format!("metadata field '{prefix}' {why}")));
    if spec.dim > MAX_FEATURES || (spec.layers > 0 && spec.dim < 2) {
        return bad(format!("has dim {}; a coupling flow needs 2..={MAX_FEATURES}", spec.dim));
    }
    if spec.layers > MAX_LAYERS || spec.depth == 0 || spec.depth > MAX_DEPTH {
        return bad(format!(
            "has {} layers of depth {} (at most {MAX_LAYERS}, depth 1..={MAX_DEPTH})",
            spec.layers, spec.depth
        ));
    }
    if (spec.layers > 0 && spec.hidden == 0) || spec.hidden > MAX_HIDDEN {
        return bad(format!("has hidden width {} (1..={MAX_HIDDEN})", spec.hidden));
    }
    if spec.classes > MAX_FEATURES {
        return bad(format!("has {} classes", spec.classes));
    }
    if !(spec.clamp.is_finite() && spec.clamp > 0.0) {
        return bad(format!("has soft clamp {}", spec.clamp));
    }
    Ok(())
}

/// Name of the checksum tensor (8 bytes, a little-endian u64): a hash of
/// every metadata entry and of every other tensor's name, dtype, shape and
/// bytes. A tensor rather than a metadata entry because safetensors writes
/// the metadata map in no fixed order, and the same model must give the
/// same file. Files written before it existed have none and load unchecked.
const CHECKSUM_TENSOR: &str = "tidemark.checksum";

/// Fold `b` (with its length) into the hash `h`.
fn hash_bytes(h: &mut u64, b: &[u8]) {
    *h = crate::data::mix64(*h ^ b.len() as u64);
    let mut words = b.chunks_exact(8);
    for w in &mut words {
        *h = crate::data::mix64(*h ^ u64::from_le_bytes(w.try_into().unwrap_or_default()));
    }
    let mut last = [0u8; 8];
    last[..words.remainder().len()].copy_from_slice(words.remainder());
    *h = crate::data::mix64(*h ^ u64::from_le_bytes(last));
}

/// The checksum of a model file's metadata and tensors (order-free: both
/// are taken sorted by name; the checksum tensor itself left out).
fn content_checksum(metadata: &HashMap<String, String>, tensors: &[(&str, Dtype, &[usize], &[u8])]) -> u64 {
    let mut h = 0x6D0D_E1F1_u64;
    let mut keys: Vec<&String> = metadata.keys().collect();
    keys.sort();
    for key in keys {
        hash_bytes(&mut h, key.as_bytes());
        hash_bytes(&mut h, metadata[key].as_bytes());
    }
    let mut sorted: Vec<&(&str, Dtype, &[usize], &[u8])> = tensors.iter().filter(|t| t.0 != CHECKSUM_TENSOR).collect();
    sorted.sort_by_key(|t| t.0);
    for (name, dtype, shape, bytes) in sorted {
        hash_bytes(&mut h, name.as_bytes());
        hash_bytes(&mut h, format!("{dtype:?}{shape:?}").as_bytes());
        hash_bytes(&mut h, bytes);
    }
    h
}

fn verify_checksum(path: &Path, metadata: &HashMap<String, String>, st: &SafeTensors) -> Result<()> {
    let Ok(written) = st.tensor(CHECKSUM_TENSOR) else { return Ok(()) };
    let views = st.tensors();
    let tensors: Vec<(&str, Dtype, &[usize], &[u8])> =
        views.iter().map(|(n, t)| (n.as_str(), t.dtype(), t.shape(), t.data())).collect();
    if written.data() != content_checksum(metadata, &tensors).to_le_bytes() {
        return Err(Error::model(
            path,
            "model file is damaged (its contents do not match the checksum written with it)",
        ));
    }
    Ok(())
}

/// Typed access to a model file's tensors: each checked for name, dtype
/// and shape, float values for finiteness.
struct Tensors<'a, 'b> {
    path: &'a Path,
    st: &'a SafeTensors<'b>,
}

impl Tensors<'_, '_> {
    fn raw(&self, name: &str, dtype: Dtype, shape: &[usize]) -> Result<&[u8]> {
        let t = self.st.tensor(name).map_err(|_| Error::model(self.path, format!("missing tensor '{name}'")))?;
        if t.dtype() != dtype || t.shape() != shape {
            return Err(Error::model(
                self.path,
                format!("tensor '{name}' is {:?} {:?}, expected {dtype:?} {shape:?}", t.dtype(), t.shape()),
            ));
        }
        Ok(t.data())
    }

    fn finite<T: Copy + Into<f64>>(&self, name: &str, v: Vec<T>) -> Result<Vec<T>> {
        if v.iter().any(|&x| !x.into().is_finite()) {
            return Err(Error::model(
                self.path,
                format!("model file is damaged: tensor '{name}' holds a non-finite value"),
            ));
        }
        Ok(v)
    }

    fn f32s(&self, name: &str, shape: &[usize]) -> Result<Vec<f32>> {
        self.finite(name, from_f32(self.raw(name, Dtype::F32, shape)?))
    }

    fn f64s(&self, name: &str, shape: &[usize]) -> Result<Vec<f64>> {
        self.finite(name, from_f64(self.raw(name, Dtype::F64, shape)?))
    }

    /// Non-negative indices stored as i64.
    fn indices(&self, name: &str, len: usize) -> Result<Vec<usize>> {
        let raw = self.raw(name, Dtype::I64, &[len])?;
        raw.chunks_exact(8)
            .map(|c| usize::try_from(i64::from_le_bytes(c.try_into().unwrap_or_default())))
            .collect::<std::result::Result<_, _>>()
            .map_err(|_| Error::model(self.path, format!("tensor '{name}' holds a negative index")))
    }
}

/// The raw file behind a loaded model, for the extras a checkpoint adds.
pub(crate) struct Extras {
    path: std::path::PathBuf,
    bytes: Vec<u8>,
}

impl Extras {
    /// A 1-D f32 tensor of `len` values added by [`Model::save_with`].
    pub fn tensor(&self, name: &str, len: usize) -> Result<Vec<f32>> {
        let st = SafeTensors::deserialize(&self.bytes).map_err(|e| Error::model(&self.path, e))?;
        let t = st.tensor(name).map_err(|_| Error::model(&self.path, format!("missing tensor '{name}'")))?;
        if t.dtype() != Dtype::F32 || t.shape() != [len] {
            return Err(Error::model(&self.path, format!("tensor '{name}' has the wrong dtype or shape")));
        }
        Ok(from_f32(t.data()))
    }

    /// A metadata entry added by [`Model::save_with`].
    pub fn metadata(&self, key: &str) -> Result<String> {
        let (_, header) = SafeTensors::read_metadata(&self.bytes).map_err(|e| Error::model(&self.path, e))?;
        header
            .metadata()
            .as_ref()
            .and_then(|m| m.get(key).cloned())
            .ok_or_else(|| Error::model(&self.path, format!("has no '{key}' metadata (not a checkpoint?)")))
    }
}

/// Add a flow's tensors under `prefix` (`{prefix}.{layer}.actnorm.log_scale`, ...).
fn flow_tensors(flow: &Flow, prefix: &str, put: &mut dyn FnMut(&str, Dtype, Vec<usize>, Vec<u8>)) {
    let p = &flow.params;
    let dim = flow.spec.dim;
    for (k, slot) in flow.slots.iter().enumerate() {
        put(
            &format!("{prefix}.{k}.actnorm.log_scale"),
            Dtype::F32,
            vec![dim],
            le_bytes_f32(&p[slot.log_scale..slot.log_scale + dim]),
        );
        put(&format!("{prefix}.{k}.actnorm.bias"), Dtype::F32, vec![dim], le_bytes_f32(&p[slot.bias..slot.bias + dim]));
        let perm: Vec<usize> = flow.perms[k].iter().map(|&v| v as usize).collect();
        put(&format!("{prefix}.{k}.permutation"), Dtype::I64, vec![dim], le_bytes_i64(&perm));
        if let Some(mix) = slot.mix {
            put(&format!("{prefix}.{k}.mixing.lu"), Dtype::F32, vec![dim, dim], le_bytes_f32(&p[mix..mix + dim * dim]));
        }
        for (i, lin) in slot.linears.iter().enumerate() {
            let w = &p[lin.weight..lin.weight + lin.out * lin.inp];
            put(&format!("{prefix}.{k}.net.{i}.weight"), Dtype::F32, vec![lin.out, lin.inp], le_bytes_f32(w));
            put(
                &format!("{prefix}.{k}.net.{i}.bias"),
                Dtype::F32,
                vec![lin.out],
                le_bytes_f32(&p[lin.bias..lin.bias + lin.out]),
            );
        }
    }
    if flow.spec.classes > 0 {
        let means = &p[flow.class_means..flow.class_means + flow.spec.classes * dim];
        put(&format!("{prefix}.class_means"), Dtype::F32, vec![flow.spec.classes, dim], le_bytes_f32(means));
    }
}

/// Read a flow written by [`flow_tensors`]. Every tensor's shape is
/// checked before the flow is built, so the metadata cannot size the
/// flow's parameters beyond what the file holds.
fn read_flow(t: &Tensors, prefix: &str, spec: &FlowSpec, version: u32) -> Result<Flow> {
    if version < format_version_for(spec.mixing) {
        return Err(Error::model(t.path, format!("{prefix}: LU mixing in a version {version} model file")));
    }
    let (dim, h) = (spec.dim, spec.hidden);
    let (d1, d2) = spec.split();
    let mut shapes = vec![(h, d1)];
    shapes.extend(std::iter::repeat_n((h, h), spec.depth - 1));
    shapes.push((2 * d2, h));
    let mut values = Vec::new();
    for k in 0..spec.layers {
        values.push(t.f32s(&format!("{prefix}.{k}.actnorm.log_scale"), &[dim])?);
        values.push(t.f32s(&format!("{prefix}.{k}.actnorm.bias"), &[dim])?);
        if spec.mixing == crate::flow::Mixing::Lu {
            values.push(t.f32s(&format!("{prefix}.{k}.mixing.lu"), &[dim, dim])?);
        }
        for (i, &(out, inp)) in shapes.iter().enumerate() {
            values.push(t.f32s(&format!("{prefix}.{k}.net.{i}.weight"), &[out, inp])?);
            values.push(t.f32s(&format!("{prefix}.{k}.net.{i}.bias"), &[out])?);
        }
    }
    if spec.classes > 0 {
        values.push(t.f32s(&format!("{prefix}.class_means"), &[spec.classes, dim])?);
    }
    let mut perms = Vec::with_capacity(spec.layers);
    for k in 0..spec.layers {
        let name = format!("{prefix}.{k}.permutation");
        let perm = t.indices(&name, dim)?;
        let mut seen = vec![false; dim];
        for &p in &perm {
            if p >= dim || std::mem::replace(&mut seen[p], true) {
                return Err(Error::model(t.path, format!("tensor '{name}' is not a permutation")));
            }
        }
        perms.push(perm.iter().map(|&p| p as u32).collect());
    }
    // The values above are in the order of the flow's parameter layout.
    let mut flow = Flow::new(spec.clone(), 0);
    let mut at = 0;
    for v in values {
        flow.params[at..at + v.len()].copy_from_slice(&v);
        at += v.len();
    }
    if at != flow.params.len() {
        return Err(Error::model(t.path, format!("{prefix}: parameter count does not match the flow's shape")));
    }
    flow.perms = perms;
    Ok(flow)
}

/// ln(sum exp(v)), computed stably.
pub fn log_sum_exp(v: &[f64]) -> f64 {
    let top = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if top == f64::NEG_INFINITY {
        return top;
    }
    top + v.iter().map(|x| (x - top).exp()).sum::<f64>().ln()
}

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

fn le_bytes_f32(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}
fn le_bytes_f64(v: &[f64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}
fn le_bytes_i64(v: &[usize]) -> Vec<u8> {
    v.iter().flat_map(|&x| (x as i64).to_le_bytes()).collect()
}
fn from_f32(b: &[u8]) -> Vec<f32> {
    b.chunks_exact(4).map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]])).collect()
}
fn from_f64(b: &[u8]) -> Vec<f64> {
    b.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap_or_default())).collect()
}
