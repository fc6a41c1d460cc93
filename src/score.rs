//! Scoring: per-vector scores from a fitted model, streamed chunk by chunk
//! to CSV, `.npy` (float32, column names in a sidecar `.json`) or JSON lines;
//! and the batch typicality test over consecutive batches.

use crate::calibrate::Calibration;
use crate::data::Dataset;
use crate::error::{Error, Result};
use crate::kde::Kde;
use crate::model::{Evaluation, Model};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use std::io::Write;
use std::path::{Path, PathBuf};

/// Statistics of a vector that the multi-statistic score's density is over:
/// the log-determinant and the squared latent distance to the nearest class
/// mean (||z||^2 without classes). Without classes the base log-density,
/// the latent norm and the NLL are functions of these two (log p(z) =
/// -||z||^2/2 - const, NLL = -log p(z) - log-det), so adding them would only
/// make the kernel covariance singular.
pub const KDE_STATS: [&str; 2] = ["log_det", "mahalanobis_sq"];

/// The value of statistic `name` for row `r`.
pub fn statistic(e: &Evaluation, name: &str, r: usize) -> f64 {
    match name {
        "log_det" => e.log_det[r],
        _ => e.mahalanobis_sq[r],
    }
}

/// What each score column means and which way is anomalous.
pub fn column_help(name: &str) -> &'static str {
    match name {
        "log_likelihood" => "log p(x), nats, input space; higher = more typical",
        "bits_per_dim" => "-log2 p(x) / live features; lower = more typical",
        "base_log_density" => "log p(z) under the base distribution; higher = more typical",
        "log_det" => "ln|det dz/dx| (flow + whitening); compare with training values",
        "latent_norm" => "||z||; near sqrt(D) is typical for a D-dim standard normal",
        "mahalanobis_sq" => "squared distance of z to the nearest class mean; higher = more anomalous",
        "typicality" => "|NLL - training mean NLL| / training NLL std; higher = more anomalous",
        "multi_statistic" => {
            "-log density of (log_det, mahalanobis_sq) under a KDE of validation vectors; higher = more anomalous"
        }
        "log_likelihood_ratio" => "log p(x) - log p_background(x); higher = more typical",
        "predicted_class" => "most probable class label",
        "class_probability" => "posterior probability of the predicted class",
        "dead_feature_deviation" => "largest |x_j - training value| on dead features; higher = more anomalous",
        "subspace_residual" => {
            "distance from the span of the training rows' principal directions (input units); higher = more anomalous"
        }
        "p_value" => "conformal p-value of the calibrated score; lower = more anomalous",
        "flagged" => "1 when the p-value is at most the calibrated false-alarm rate",
        _ => "log p(x | class), nats, input space; higher = more typical",
    }
}

/// Direction of a score column: `Some(true)` when higher values are more
/// anomalous, `Some(false)` when lower values are, `None` for columns that
/// are not anomaly scores (predicted class, log-det).
pub fn higher_is_anomalous(name: &str) -> Option<bool> {
    match name {
        "bits_per_dim"
        | "mahalanobis_sq"
        | "typicality"
        | "multi_statistic"
        | "dead_feature_deviation"
        | "subspace_residual"
        | "flagged" => Some(true),
        "log_likelihood" | "base_log_density" | "log_likelihood_ratio" | "class_probability" | "p_value" => Some(false),
        n if n.starts_with("class_log_likelihood_") => Some(false),
        _ => None,
    }
}

/// Every column a model can produce, in output order (with a calibration,
/// `p_value` and `flagged` at the end).
pub fn available_columns(model: &Model, calibrated: bool) -> Vec<String> {
    let mut cols: Vec<String> = [
        "log_likelihood",
        "bits_per_dim",
        "base_log_density",
        "log_det",
        "latent_norm",
        "mahalanobis_sq",
        "typicality",
        "multi_statistic",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    if model.background.is_some() {
        cols.push("log_likelihood_ratio".into());
    }
    if model.classes() > 0 {
        cols.push("predicted_class".into());
        cols.push("class_probability".into());
        cols.extend(model.meta.classes.iter().map(|c| format!("class_log_likelihood_{}", c.label)));
    }
    cols.push("dead_feature_deviation".into());
    if model.pre.floored > 0 {
        cols.push("subspace_residual".into());
    }
    if calibrated {
        cols.push("p_value".into());
        cols.push("flagged".into());
    }
    cols
}

/// Turns evaluations into score columns.
pub struct Scorer<'a> {
    model: &'a Model,
    kde: Option<Kde>,
    per_bit: f64,
    calibration: Option<&'a Calibration>,
}

impl<'a> Scorer<'a> {
    pub fn new(model: &'a Model, calibration: Option<&'a Calibration>) -> Scorer<'a> {
        let s = &model.meta.scoring;
        let k = s.kde_columns.len();
        let standardized: Vec<f64> = model
            .refs
            .kde_points
            .chunks(k.max(1))
            .flat_map(|p| p.iter().enumerate().map(|(j, v)| (v - s.kde_mean[j]) / s.kde_std[j]).collect::<Vec<_>>())
            .collect();
        let kde = if k == 0 { None } else { Kde::new(&standardized, k) };
        Scorer { model, kde, per_bit: model.dim() as f64 * std::f64::consts::LN_2, calibration }
    }

    /// Every row's values of `columns`, row-major into `out`, on `pool`'s
    /// threads when given.
    pub fn fill(&self, e: &Evaluation, columns: &[String], out: &mut [f64], pool: Option<&rayon::ThreadPool>) {
        let row = |(r, slots): (usize, &mut [f64])| {
            for (slot, c) in slots.iter_mut().zip(columns) {
                *slot = self.value(e, c, r);
            }
        };
        match pool {
            Some(pool) => {
                use rayon::prelude::*;
                pool.install(|| out.par_chunks_mut(columns.len()).enumerate().for_each(row))
            }
            None => out.chunks_mut(columns.len()).enumerate().for_each(row),
        }
    }

    /// Value of column `name` for row `r` of `e`.
    pub fn value(&self, e: &Evaluation, name: &str, r: usize) -> f64 {
        let m = self.model;
        match name {
            "log_likelihood" => e.log_likelihood[r],
            "bits_per_dim" => -e.log_likelihood[r] / self.per_bit,
            "base_log_density" => e.base_log_density[r],
            "log_det" => e.log_det[r],
            "latent_norm" => e.latent_norm[r],
            "mahalanobis_sq" => e.mahalanobis_sq[r],
            "typicality" => {
                let t = &m.meta.train_log_likelihood;
                (e.log_likelihood[r] - t.mean).abs() / t.std.max(f64::MIN_POSITIVE)
            }
            "multi_statistic" => match &self.kde {
                Some(kde) => {
                    let s = &m.meta.scoring;
                    let x: Vec<f64> = s
                        .kde_columns
                        .iter()
                        .enumerate()
                        .map(|(j, c)| (statistic(e, c, r) - s.kde_mean[j]) / s.kde_std[j])
                        .collect();
                    -kde.log_density(&x)
                }
                None => f64::NAN,
            },
            "log_likelihood_ratio" => e.log_likelihood[r] - e.background_log_likelihood[r],
            "predicted_class" => m.meta.classes[e.predicted_class[r]].label as f64,
            "class_probability" => e.class_probability[r],
            "dead_feature_deviation" => e.dead_deviation[r],
            "subspace_residual" => e.subspace_residual[r],
            "p_value" | "flagged" => {
                let cal = self.calibration.expect("calibrated columns need a calibration");
                let p = cal.p_value(self.value(e, &cal.score, r));
                if name == "p_value" {
                    p
                } else {
                    f64::from(u8::from(p <= cal.false_alarm))
                }
            }
            other => {
                let label = other.trim_start_matches("class_log_likelihood_");
                let c = m.meta.classes.iter().position(|c| c.label.to_string() == label).expect("known class column");
                e.class_log_likelihood[r * m.classes() + c]
            }
        }
    }
}

/// Output encodings, chosen by the output file's extension.
#[derive(Clone, Copy, PartialEq, Debug)]
pub enum Format {
    Csv,
    Npy,
    JsonLines,
}

impl Format {
    pub fn of(path: &Path) -> Result<Format> {
        if crate::output::is_stdout(path) {
            return Ok(Format::Csv);
        }
        match path.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase).as_deref() {
            Some("csv") => Ok(Format::Csv),
            Some("npy") => Ok(Format::Npy),
            Some("jsonl") => Ok(Format::JsonLines),
            _ => Err(Error::Invalid(format!("{}: output must end in .csv, .npy or .jsonl", path.display()))),
        }
    }
}

/// Options of `tidemark score`.
pub struct ScoreOptions {
    /// Columns to write (all when empty).
    pub columns: Vec<String>,
    pub threads: usize,
    /// Batch typicality test: batch size, significance, and where to write.
    pub batch: Option<BatchTest>,
    /// Adds `p_value` and `flagged`.
    pub calibration: Option<Calibration>,
}

pub struct BatchTest {
    pub size: usize,
    pub alpha: f64,
    pub output: PathBuf,
}

impl BatchTest {
    /// Check the settings; the batch file defaults to the score file's name
    /// with `.batches.csv`.
    pub fn new(size: usize, alpha: f64, output: Option<PathBuf>, scores: &Path) -> Result<BatchTest> {
        if size == 0 || !(0.0..1.0).contains(&alpha) || alpha == 0.0 {
            return Err(Error::Invalid("--batch must be at least 1 and --batch-alpha in (0, 1)".into()));
        }
        let output = match output {
            Some(p) => p,
            None if crate::output::is_stdout(scores) => {
                return Err(Error::Invalid(
                    "scores go to standard output: name the batch file with --batch-output".into(),
                ))
            }
            None => scores.with_extension("batches.csv"),
        };
        Ok(BatchTest { size, alpha, output })
    }
}

/// Rows scored at a time (memory is bounded by this, not by the input).
const SCORE_CHUNK: usize = 8192;

/// The columns to write: all, or the requested ones (each must exist).
pub fn select_columns(model: &Model, requested: &[String], calibrated: bool) -> Result<Vec<String>> {
    let all = available_columns(model, calibrated);
    if requested.is_empty() {
        return Ok(all);
    }
    for c in requested {
        if !all.contains(c) {
            return Err(Error::Invalid(format!(
                "--columns: this model has no column '{c}' (it has: {})",
                all.join(", ")
            )));
        }
    }
    Ok(requested.to_vec())
}

/// Score every row of `x` chunk by chunk: `each` gets the chunk's
/// evaluation and its values of `columns`, row-major. Memory is bounded by
/// the chunk, not by the rows.
pub fn score_chunks(
    model: &Model,
    x: &Dataset,
    columns: &[String],
    calibration: Option<&Calibration>,
    threads: usize,
    mut each: impl FnMut(&Evaluation, &[f64]) -> Result<()>,
) -> Result<()> {
    let scorer = Scorer::new(model, calibration);
    let mut evaluator = model.evaluator(threads, SCORE_CHUNK.min(x.rows));
    let mut values = vec![0.0f64; SCORE_CHUNK.min(x.rows) * columns.len()];
    for start in (0..x.rows).step_by(SCORE_CHUNK) {
        let chunk: Vec<usize> = (start..(start + SCORE_CHUNK).min(x.rows)).collect();
        let e = evaluator.evaluate_rows(x, &chunk);
        let values = &mut values[..chunk.len() * columns.len()];
        // On the flow's worker threads (the multi-statistic KDE is the
        // costly column).
        scorer.fill(&e, columns, values, evaluator.pool());
        each(&e, values)?;
    }
    Ok(())
}

/// Every row's values of `columns`, one vector per column (for callers that
/// keep the scores in memory).
pub fn score_columns(
    model: &Model,
    x: &Dataset,
    columns: &[String],
    calibration: Option<&Calibration>,
    threads: usize,
) -> Result<Vec<Vec<f64>>> {
    let mut out: Vec<Vec<f64>> = columns.iter().map(|_| Vec::with_capacity(x.rows)).collect();
    score_chunks(model, x, columns, calibration, threads, |_, values| {
        for row in values.chunks(columns.len()) {
            for (column, v) in out.iter_mut().zip(row) {
                column.push(*v);
            }
        }
        Ok(())
    })?;
    Ok(out)
}

/// Score every row of `x` and write the scores to `output`, chunk by chunk.
pub fn score_to_file(model: &Model, x: &Dataset, output: &Path, opts: &ScoreOptions) -> Result<()> {
    let columns = select_columns(model, &opts.columns, opts.calibration.is_some())?;
    let format = Format::of(output)?;
    // Per batch of the batch test: (sum of NLLs, rows), kept as the rows
    // stream past so memory grows with batches, not rows.
    let mut batches: Vec<(f64, usize)> = Vec::new();
    crate::output::write_atomic(output, |w| {
        let io = |source| Error::Io { path: output.to_path_buf(), source };
        match format {
            Format::Csv => writeln!(w, "{}", columns.join(",")).map_err(io)?,
            Format::Npy => crate::data::write_npy_header(w, x.rows, columns.len()).map_err(io)?,
            Format::JsonLines => {}
        }
        score_chunks(model, x, &columns, opts.calibration.as_ref(), opts.threads, |e, values| {
            if let Some(b) = &opts.batch {
                for ll in &e.log_likelihood {
                    match batches.last_mut() {
                        Some((sum, n)) if *n < b.size => {
                            *sum -= ll;
                            *n += 1;
                        }
                        _ => batches.push((-ll, 1)),
                    }
                }
            }
            for row in values.chunks(columns.len()) {
                write_row(w, format, &columns, row).map_err(io)?;
            }
            Ok(())
        })
    })?;
    if format == Format::Npy && !crate::output::is_stdout(output) {
        let sidecar = output.with_extension("json");
        let doc = serde_json::json!({
            "columns": columns,
            "descriptions": columns.iter().map(|c| column_help(c)).collect::<Vec<_>>(),
        });
        crate::output::write_atomic(&sidecar, |w| {
            writeln!(w, "{doc:#}").map_err(|source| Error::Io { path: sidecar.clone(), source })
        })?;
    }
    if let Some(b) = &opts.batch {
        write_batch_test(model, &batches, b)?;
    }
    Ok(())
}

fn write_row(w: &mut dyn Write, format: Format, columns: &[String], values: &[f64]) -> std::io::Result<()> {
    match format {
        Format::Csv => {
            for (i, v) in values.iter().enumerate() {
                let sep = if i == 0 { "" } else { "," };
                write!(w, "{sep}{v}")?;
            }
            writeln!(w)
        }
        Format::Npy => {
            for v in values {
                w.write_all(&(*v as f32).to_le_bytes())?;
            }
            Ok(())
        }
        Format::JsonLines => {
            let obj: serde_json::Map<String, serde_json::Value> = columns
                .iter()
                .zip(values)
                .map(|(c, &v)| {
                    // JSON has no NaN: write null, which pandas reads as NaN.
                    let value = serde_json::Number::from_f64(v).map(serde_json::Value::Number).unwrap_or_default();
                    (c.clone(), value)
                })
                .collect();
            writeln!(w, "{}", serde_json::Value::Object(obj))
        }
    }
}

/// Batch typicality test (Nalisnick et al. 2019, "Detecting out-of-
/// distribution inputs to deep generative models using typicality"): for
/// each consecutive batch of M vectors, the statistic |mean NLL - H| with H
/// the training NLL mean (the entropy estimate); the threshold is the
/// (1 - alpha) quantile of the same statistic over bootstrap batches of M
/// drawn from the stored validation NLLs.
pub fn batch_threshold(model: &Model, size: usize, alpha: f64) -> f64 {
    let nll = &model.refs.validation_nll;
    let entropy = -model.meta.train_log_likelihood.mean;
    let mut rng = StdRng::seed_from_u64(0x7E57);
    let mut stats: Vec<f64> = (0..BOOTSTRAP)
        .map(|_| {
            let mean = (0..size).map(|_| nll[rng.random_range(0..nll.len())]).sum::<f64>() / size as f64;
            (mean - entropy).abs()
        })
        .collect();
    stats.sort_by(f64::total_cmp);
    stats[(((1.0 - alpha) * BOOTSTRAP as f64).ceil() as usize).clamp(1, BOOTSTRAP) - 1]
}

/// The batch typicality statistic of a batch with mean NLL `mean_nll`: its
/// distance from the training estimate of the entropy.
pub fn batch_statistic(model: &Model, mean_nll: f64) -> f64 {
    let entropy = -model.meta.train_log_likelihood.mean;
    (mean_nll - entropy).abs()
}

/// Bootstrap resamples behind the batch threshold.
const BOOTSTRAP: usize = 2000;

fn write_batch_test(model: &Model, batches: &[(f64, usize)], b: &BatchTest) -> Result<()> {
    if model.refs.validation_nll.is_empty() {
        return Err(Error::Invalid("this model stores no validation NLLs for the batch test".into()));
    }
    let threshold = batch_threshold(model, b.size, b.alpha);
    crate::output::write_atomic(&b.output, |w| {
        let io = |source| Error::Io { path: b.output.clone(), source };
        writeln!(w, "batch,first_row,rows,mean_nll,statistic,threshold,alpha,out_of_distribution").map_err(io)?;
        for (i, &(sum, rows)) in batches.iter().enumerate() {
            let mean = sum / rows as f64;
            let stat = batch_statistic(model, mean);
            let verdict = stat > threshold;
            writeln!(w, "{i},{},{rows},{mean},{stat},{threshold},{},{verdict}", i * b.size, b.alpha).map_err(io)?;
        }
        Ok(())
    })
}
