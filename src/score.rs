//! Scoring: per-vector scores from a fitted model, streamed chunk by chunk
//! to CSV, `.npy` (float32, column names in a sidecar `.json`) or JSON lines;
//! and the batch typicality test over consecutive batches.
//!
//! Scores know nothing of calibration files: a decision rule (the
//! [`Decision`] trait, implemented by `calibrate::Calibration`) can append
//! its own columns to the rows written here.

use crate::data::Dataset;
use crate::error::{Error, Result};
use crate::kde::Kde;
use crate::model::{Evaluation, Model, Spread};
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

/// Every column `score` can write, as `score --help` lists them (a model
/// has those its kind and options give it).
pub const ALL_COLUMNS: [&str; 19] = [
    "log_likelihood",
    "bits_per_dim",
    "base_log_density",
    "log_det",
    "latent_norm",
    "mahalanobis_sq",
    "typicality",
    "multi_statistic",
    "log_likelihood_ratio",
    "predicted_class",
    "class_probability",
    "class_log_likelihood_<label>",
    "component",
    "component_probability",
    "dead_feature_deviation",
    "subspace_residual",
    "p_value",
    "flagged",
    "bad_row",
];

/// What each score column means and which way is anomalous.
pub fn column_help(name: &str) -> &'static str {
    match name {
        "log_likelihood" => "log p(x), nats, input space; higher = more typical",
        "bits_per_dim" => "-log2 p(x) / live features; lower = more typical",
        "base_log_density" => "log p(z) under the base distribution; higher = more typical",
        "log_det" => {
            "ln|det dz/dx| (flow + whitening); two-sided: far from the in-distribution median either way is anomalous"
        }
        "latent_norm" => {
            "||z||; near sqrt(D) is typical for a D-dim standard normal; two-sided: far from it either way is anomalous"
        }
        "mahalanobis_sq" => {
            "squared Mahalanobis distance to the nearest class mean (or most responsible mixture component); higher = more anomalous"
        }
        "typicality" => {
            "|NLL - mean NLL of held-out rows| / their NLL std (the fit's validation rows); higher = more anomalous"
        }
        "multi_statistic" => {
            "-log density of (log_det, mahalanobis_sq) under a KDE of validation vectors; higher = more anomalous"
        }
        "log_likelihood_ratio" => "log p(x) - log p_background(x); higher = more typical",
        "predicted_class" => "most probable class label (not a score)",
        "class_probability" => "posterior probability of the predicted class",
        "component" => "index of the most responsible mixture component (not a score)",
        "component_probability" => "posterior probability of the most responsible mixture component (not a score)",
        "dead_feature_deviation" => "largest |x_j - training value| on dead features; higher = more anomalous",
        "subspace_residual" => {
            "distance from the span of the training rows' principal directions (input units); higher = more anomalous"
        }
        "p_value" => "conformal p-value of the calibrated score; lower = more anomalous",
        "flagged" => "1 when the p-value is at most the calibrated false-alarm rate",
        "bad_row" => "why a row was not scored (NaN or infinite value), empty for scored rows",
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

/// How a score column becomes "higher = more anomalous".
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Direction {
    Higher,
    Lower,
    /// Distance from the in-distribution median, either way (log_det, latent_norm).
    TwoSided,
}

impl Direction {
    /// The anomaly value (higher = more anomalous) of a raw score; `centre`
    /// is the in-distribution median a two-sided score is measured from.
    pub fn orient(self, centre: f64, raw: f64) -> f64 {
        match self {
            Direction::Higher => raw,
            Direction::Lower => -raw,
            Direction::TwoSided => (raw - centre).abs(),
        }
    }
}

/// Which way a score column is anomalous; `None` for columns that are not
/// scores (predicted class, and the decision columns `p_value`, `flagged`).
pub fn direction_of(column: &str) -> Option<Direction> {
    match (higher_is_anomalous(column), column) {
        (_, "p_value" | "flagged") => None,
        (Some(true), _) => Some(Direction::Higher),
        (Some(false), _) => Some(Direction::Lower),
        (None, "log_det" | "latent_norm") => Some(Direction::TwoSided),
        _ => None,
    }
}

/// The name in `candidates` nearest to `name` by edit distance, when it is
/// close enough to be a likely typo (at most a third of its length).
pub fn nearest<'c>(name: &str, candidates: impl IntoIterator<Item = &'c str>) -> Option<&'c str> {
    let limit = (name.chars().count() / 3).max(2);
    candidates.into_iter().map(|c| (edit_distance(name, c), c)).filter(|(d, _)| *d <= limit).min().map(|(_, c)| c)
}

/// Levenshtein distance (insertions, deletions, substitutions).
fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut row: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut diag = row[0];
        row[0] = i + 1;
        for (j, &cb) in b.iter().enumerate() {
            let next = (row[j + 1] + 1).min(row[j] + 1).min(diag + usize::from(ca != cb));
            diag = row[j + 1];
            row[j + 1] = next;
        }
    }
    row[b.len()]
}

/// "did you mean 'x'?" for `name` among `candidates`, or nothing.
pub fn did_you_mean<'c>(name: &str, candidates: impl IntoIterator<Item = &'c str>) -> String {
    nearest(name, candidates).map(|c| format!("; did you mean '{c}'?")).unwrap_or_default()
}

/// Columns a decision rule appends to each scored row (a calibration's
/// p-value and flag), computed from one score column's raw value.
pub trait Decision: Sync {
    /// The score column the decision reads.
    fn score(&self) -> &str;
    /// Names of the columns it adds, in output order.
    fn columns(&self) -> Vec<String>;
    /// Value of its column `column` for a raw score.
    fn value(&self, column: &str, raw: f64) -> f64;
    /// Whether a raw score is flagged.
    fn flags(&self, raw: f64) -> bool;
}

/// Every score column a model can produce, in output order.
pub fn available_columns(model: &Model) -> Vec<String> {
    let mut cols: Vec<String> = ALL_COLUMNS[..8].iter().map(|s| s.to_string()).collect();
    if model.background.is_some() {
        cols.push("log_likelihood_ratio".into());
    }
    if model.classes() > 0 {
        cols.push("predicted_class".into());
        cols.push("class_probability".into());
        cols.extend(model.meta.classes.iter().map(|c| format!("class_log_likelihood_{}", c.label)));
    }
    if model.density.components() > 0 {
        cols.push("component".into());
        cols.push("component_probability".into());
    }
    cols.push("dead_feature_deviation".into());
    if model.pre.floored > 0 {
        cols.push("subspace_residual".into());
    }
    cols
}

/// Turns evaluations into score columns.
pub struct Scorer<'a> {
    model: &'a Model,
    kde: Option<Kde>,
    per_bit: f64,
    /// NLL centre and scale of the typicality score.
    typical: Spread,
    decision: Option<&'a dyn Decision>,
}

/// What `inspect` prints: the model's description, then the centre of the
/// typicality score and the rows it comes from.
pub fn describe(model: &Model) -> String {
    let centre = held_out_nll(model);
    let rows = match model.refs.validation_nll.len() {
        0 => "the training rows (no validation rows stored)".to_string(),
        n => format!("{n} held-out validation rows"),
    };
    format!(
        "{}{:<28}NLL mean {:.4}, std {:.4} over {rows}\n",
        model.meta.describe(),
        "typicality centre",
        centre.mean,
        centre.std
    )
}

/// Mean and standard deviation of the NLL of held-out in-distribution rows:
/// the validation rows kept at the end of `fit`. A model fits its own
/// training rows better than new ones, so the training NLL would put every
/// new in-distribution vector off centre. A model fitted without validation
/// rows falls back to its training figures.
pub fn held_out_nll(model: &Model) -> Spread {
    let v = &model.refs.validation_nll;
    if v.is_empty() {
        let t = &model.meta.train_log_likelihood;
        return Spread { mean: -t.mean, std: t.std };
    }
    let mean = v.iter().sum::<f64>() / v.len() as f64;
    let std = (v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / v.len() as f64).sqrt();
    Spread { mean, std }
}

impl<'a> Scorer<'a> {
    /// A scorer for `model`; `decision` adds its columns to [`Scorer::fill`].
    pub fn new(model: &'a Model, decision: Option<&'a dyn Decision>) -> Scorer<'a> {
        let s = &model.meta.scoring;
        let k = s.kde_columns.len();
        let standardized: Vec<f64> = model
            .refs
            .kde_points
            .chunks(k.max(1))
            .flat_map(|p| p.iter().enumerate().map(|(j, v)| (v - s.kde_mean[j]) / s.kde_std[j]).collect::<Vec<_>>())
            .collect();
        let kde = if k == 0 { None } else { Kde::new(&standardized, k) };
        Scorer {
            model,
            kde,
            per_bit: model.dim() as f64 * std::f64::consts::LN_2,
            typical: held_out_nll(model),
            decision,
        }
    }

    /// Every row's values of `columns`, row-major into `out`, on `pool`'s
    /// threads when given.
    pub fn fill(&self, e: &Evaluation, columns: &[String], out: &mut [f64], pool: Option<&rayon::ThreadPool>) {
        let added = self.decision.map(|d| d.columns()).unwrap_or_default();
        let decided: Vec<Option<&dyn Decision>> =
            columns.iter().map(|c| self.decision.filter(|_| added.contains(c))).collect();
        let row = |(r, slots): (usize, &mut [f64])| {
            for ((slot, c), decision) in slots.iter_mut().zip(columns).zip(&decided) {
                *slot = match decision {
                    Some(d) => d.value(c, self.value(e, d.score(), r)),
                    None => self.value(e, c, r),
                };
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
            "typicality" => (-e.log_likelihood[r] - self.typical.mean).abs() / self.typical.std.max(f64::MIN_POSITIVE),
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
            "component" => e.component[r] as f64,
            "component_probability" => e.component_probability[r],
            "dead_feature_deviation" => e.dead_deviation[r],
            "subspace_residual" => e.subspace_residual[r],
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

/// What `score` does with a row holding a NaN or infinite value.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum BadRows {
    /// Stop with an error naming the row and column; nothing is written.
    #[default]
    Error,
    /// Write the row with empty scores and the reason in a `bad_row` column.
    Flag,
    /// Leave the row out of the output and count it.
    Skip,
}

/// Options of `tidemark score`.
pub struct ScoreOptions<'a> {
    /// Columns to write (all when empty).
    pub columns: Vec<String>,
    pub threads: usize,
    /// Batch typicality test: batch size, significance, and where to write.
    pub batch: Option<BatchTest>,
    /// Adds its columns (a calibration's `p_value` and `flagged`).
    pub decision: Option<&'a dyn Decision>,
    pub bad_rows: BadRows,
}

/// What a scoring run did.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ScoreSummary {
    /// Rows scored (bad rows excluded).
    pub scored: usize,
    /// Rows with a NaN or infinite value: (row, reason), in row order.
    pub bad: Vec<(usize, String)>,
    /// Rows the decision flagged, when a decision was given.
    pub flagged: Option<usize>,
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

/// The columns to write: all score columns and `added` (a decision's), or
/// the requested ones, each of which must exist. `flag` names the option
/// the names came from, for the error.
pub fn select_columns(model: &Model, requested: &[String], added: &[String], flag: &str) -> Result<Vec<String>> {
    let mut all = available_columns(model);
    all.extend(added.iter().cloned());
    if requested.is_empty() {
        return Ok(all);
    }
    for c in requested {
        if !all.contains(c) {
            return Err(Error::Invalid(format!(
                "{flag}: this model has no column '{c}'{} (it has: {})",
                did_you_mean(c, all.iter().map(String::as_str)),
                all.join(", ")
            )));
        }
    }
    Ok(requested.to_vec())
}

/// Rows of `x` with a NaN or infinite value, with the reason.
pub fn find_bad_rows(x: &Dataset) -> Vec<(usize, String)> {
    let mut row = vec![0.0f32; x.cols];
    let mut bad = Vec::new();
    for r in 0..x.rows {
        x.row_into(r, &mut row);
        if let Some((c, what)) = x.bad_value(r, &row) {
            bad.push((r, format!("{what} in column {c}")));
        }
    }
    bad
}

/// The work on each chunk of rows that every scoring path shares: evaluate
/// the good rows, feed the batch test and the decision's count, and fill the
/// score values.
pub struct ChunkScorer<'m> {
    model: &'m Model,
    /// The score columns, in output order.
    pub columns: Vec<String>,
    scorer: Scorer<'m>,
    evaluator: crate::model::Evaluator<'m>,
    values: Vec<f64>,
    batch: Option<&'m BatchTest>,
    decision: Option<&'m dyn Decision>,
    /// Per batch of the batch test: (sum of NLLs, rows), kept as the rows
    /// stream past so memory grows with batches, not rows.
    batches: Vec<(f64, usize)>,
    pub summary: ScoreSummary,
}

impl<'m> ChunkScorer<'m> {
    /// For chunks of at most `max_rows` rows.
    pub fn new(model: &'m Model, opts: &'m ScoreOptions, max_rows: usize) -> Result<ChunkScorer<'m>> {
        let added = opts.decision.map(|d| d.columns()).unwrap_or_default();
        let columns = select_columns(model, &opts.columns, &added, "--columns")?;
        Ok(ChunkScorer {
            model,
            scorer: Scorer::new(model, opts.decision),
            evaluator: model.evaluator(opts.threads, max_rows.max(1)),
            values: vec![0.0f64; max_rows.max(1) * columns.len()],
            columns,
            batch: opts.batch.as_ref(),
            decision: opts.decision,
            batches: Vec::new(),
            summary: ScoreSummary { flagged: opts.decision.map(|_| 0), ..ScoreSummary::default() },
        })
    }

    /// Score rows `good` of `x`: their values, row-major, one row of
    /// `columns` each.
    pub fn score(&mut self, x: &Dataset, good: &[usize]) -> &[f64] {
        let e = if good.is_empty() { Evaluation::default() } else { self.evaluator.evaluate_rows(x, good) };
        if let Some(b) = self.batch {
            for ll in &e.log_likelihood {
                match self.batches.last_mut() {
                    Some((sum, n)) if *n < b.size => {
                        *sum -= ll;
                        *n += 1;
                    }
                    _ => self.batches.push((-ll, 1)),
                }
            }
        }
        if let (Some(d), Some(count)) = (self.decision, self.summary.flagged.as_mut()) {
            *count += (0..good.len()).filter(|&r| d.flags(self.scorer.value(&e, d.score(), r))).count();
        }
        let values = &mut self.values[..good.len() * self.columns.len()];
        // On the flow's worker threads (the multi-statistic KDE is the
        // costly column); written in row order by the caller.
        self.scorer.fill(&e, &self.columns, values, self.evaluator.pool());
        self.summary.scored += good.len();
        values
    }

    /// Write the batch test, if asked for, and say what the run did.
    pub fn finish(self) -> Result<ScoreSummary> {
        if let Some(b) = self.batch {
            write_batch_test(self.model, &self.batches, b)?;
        }
        Ok(self.summary)
    }
}

/// Each row of a chunk in order: `Ok(k)` for a good row, the k-th of those
/// evaluated, or `Err(reason)` for a bad one; and the good rows' indices.
/// `bad` yields the bad rows (row, reason) in increasing order.
pub fn sort_rows<'b>(
    rows: std::ops::Range<usize>,
    bad: &mut std::iter::Peekable<impl Iterator<Item = &'b (usize, String)>>,
) -> (Vec<std::result::Result<usize, &'b str>>, Vec<usize>) {
    let mut order = Vec::with_capacity(rows.len());
    let mut good = Vec::with_capacity(rows.len());
    for r in rows {
        match bad.peek() {
            Some((b, why)) if *b == r => {
                order.push(Err(why.as_str()));
                bad.next();
            }
            _ => {
                order.push(Ok(good.len()));
                good.push(r);
            }
        }
    }
    (order, good)
}

/// The error for bad row `r` of `x` under `--bad-rows error`, in the
/// readers' words; `first_row` is `x`'s first row in its file.
pub fn bad_row_error(x: &Dataset, r: usize, first_row: usize) -> Error {
    let mut row = vec![0.0f32; x.cols];
    x.row_into(r, &mut row);
    let (c, what) = x.bad_value(r, &row).unwrap_or((0, "not finite".into()));
    Error::Invalid(format!(
        "{}: row {}, column {c} (0-based) is {what}; --bad-rows flag or skip scores past such rows",
        x.path.display(),
        first_row + r
    ))
}

/// Every row's values of the chosen columns, one vector per column, for
/// callers that keep the scores in memory (the Python bindings); the rows
/// must already be checked for NaN and infinity.
pub fn score_columns(model: &Model, x: &Dataset, opts: &ScoreOptions) -> Result<(Vec<String>, Vec<Vec<f64>>)> {
    let mut chunks = ChunkScorer::new(model, opts, SCORE_CHUNK.min(x.rows))?;
    let columns = chunks.columns.clone();
    let mut out: Vec<Vec<f64>> = columns.iter().map(|_| Vec::with_capacity(x.rows)).collect();
    for start in (0..x.rows).step_by(SCORE_CHUNK) {
        let rows: Vec<usize> = (start..(start + SCORE_CHUNK).min(x.rows)).collect();
        for row in chunks.score(x, &rows).chunks(columns.len()) {
            for (column, v) in out.iter_mut().zip(row) {
                column.push(*v);
            }
        }
    }
    Ok((columns, out))
}

/// Score every row of `x` and write the scores to `output`, chunk by chunk.
/// Rows with NaN or infinite values are handled as `opts.bad_rows` says;
/// with `BadRows::Error` nothing is written when there is one.
pub fn score_to_file(model: &Model, x: &Dataset, output: &Path, opts: &ScoreOptions) -> Result<ScoreSummary> {
    let format = Format::of(output)?;
    let mut chunks = ChunkScorer::new(model, opts, SCORE_CHUNK.min(x.rows))?;
    let bad = find_bad_rows(x);
    if let (BadRows::Error, Some((r, _))) = (opts.bad_rows, bad.first()) {
        return Err(bad_row_error(x, *r, 0));
    }
    let flag_column = opts.bad_rows == BadRows::Flag;
    let width = chunks.columns.len();
    let mut header = chunks.columns.clone();
    if flag_column {
        header.push("bad_row".into());
    }
    let written = if opts.bad_rows == BadRows::Skip { x.rows - bad.len() } else { x.rows };
    let mut progress = crate::progress::Progress::new(x.rows, "rows scored");
    let mut next_bad = bad.iter().peekable();
    let body = |w: &mut dyn Write| {
        let io = |source| Error::Io { path: output.to_path_buf(), source };
        match format {
            Format::Csv => writeln!(w, "{}", header.join(",")).map_err(io)?,
            Format::Npy => crate::data::write_npy_header(w, written, header.len()).map_err(io)?,
            Format::JsonLines => {}
        }
        let empty = vec![f64::NAN; width];
        for start in (0..x.rows).step_by(SCORE_CHUNK) {
            let end = (start + SCORE_CHUNK).min(x.rows);
            let (order, good) = sort_rows(start..end, &mut next_bad);
            let values = chunks.score(x, &good);
            for place in order {
                let (row, reason) = match place {
                    Ok(k) => (&values[k * width..(k + 1) * width], None),
                    Err(_) if !flag_column => continue,
                    Err(why) => (&empty[..], Some(why)),
                };
                write_row(w, format, &header, row, flag_column.then_some(reason)).map_err(io)?;
            }
            progress.advance(end - start);
        }
        Ok(())
    };
    if format == Format::Npy && !crate::output::is_stdout(output) {
        // The column names beside the matrix; the two are written as a pair.
        let sidecar = output.with_extension("json");
        let mut doc = serde_json::json!({
            "columns": header,
            "descriptions": header.iter().map(|c| column_help(c)).collect::<Vec<_>>(),
        });
        if flag_column {
            doc["bad_rows"] = bad.iter().map(|(r, why)| serde_json::json!({ "row": r, "reason": why })).collect();
        }
        crate::output::write_atomic_pair(output, body, &sidecar, |w| {
            writeln!(w, "{doc:#}").map_err(|source| Error::Io { path: sidecar.clone(), source })
        })?;
    } else {
        crate::output::write_atomic(output, body)?;
    }
    progress.finish();
    let mut summary = chunks.finish()?;
    summary.bad = bad;
    Ok(summary)
}

/// One output row. `reason` is `Some` when the output has a `bad_row`
/// column (the last of `columns`): the reason for a bad row, `None` for a
/// good one. In `.npy` that column is 1 for a bad row and 0 otherwise (the
/// reasons go to the sidecar `.json`).
pub fn write_row(
    w: &mut dyn Write,
    format: Format,
    columns: &[String],
    values: &[f64],
    reason: Option<Option<&str>>,
) -> std::io::Result<()> {
    match format {
        Format::Csv => {
            for (i, v) in values.iter().enumerate() {
                let sep = if i == 0 { "" } else { "," };
                // An empty cell, not "NaN", for a bad row's scores.
                if v.is_nan() && reason.flatten().is_some() {
                    write!(w, "{sep}")?;
                } else {
                    write!(w, "{sep}{v}")?;
                }
            }
            if let Some(why) = reason {
                write!(w, ",{}", why.unwrap_or(""))?;
            }
            writeln!(w)
        }
        Format::Npy => {
            for v in values {
                w.write_all(&(*v as f32).to_le_bytes())?;
            }
            if let Some(why) = reason {
                w.write_all(&f32::from(u8::from(why.is_some())).to_le_bytes())?;
            }
            Ok(())
        }
        Format::JsonLines => {
            let mut obj: serde_json::Map<String, serde_json::Value> = columns
                .iter()
                .zip(values)
                .map(|(c, &v)| {
                    // JSON has no NaN: write null, which pandas reads as NaN.
                    let value = serde_json::Number::from_f64(v).map(serde_json::Value::Number).unwrap_or_default();
                    (c.clone(), value)
                })
                .collect();
            if let Some(why) = reason {
                obj.insert("bad_row".into(), why.map(|s| serde_json::Value::String(s.into())).unwrap_or_default());
            }
            writeln!(w, "{}", serde_json::Value::Object(obj))
        }
    }
}

/// Batch typicality test (Nalisnick et al. 2019, "Detecting out-of-
/// distribution inputs to deep generative models using typicality"): for
/// each consecutive batch of M vectors, the statistic |mean NLL - H| with H
/// the mean NLL of the held-out validation rows (the entropy estimate; see
/// [`held_out_nll`]). The threshold is the (1 - alpha) quantile of the same
/// statistic over bootstrap draws from the stored validation NLLs: a batch
/// of M, and a resample of all of them for the centre, so the threshold
/// also covers the error of H estimated from finitely many rows.
pub struct BatchRule {
    /// H: mean NLL of the held-out validation rows.
    pub centre: f64,
    pub threshold: f64,
}

impl BatchRule {
    pub fn new(model: &Model, size: usize, alpha: f64) -> BatchRule {
        let nll = &model.refs.validation_nll;
        let mut rng = StdRng::seed_from_u64(0x7E57);
        let mut draw_mean = |n: usize| (0..n).map(|_| nll[rng.random_range(0..nll.len())]).sum::<f64>() / n as f64;
        let mut stats: Vec<f64> = (0..BOOTSTRAP)
            .map(|_| {
                let centre = draw_mean(nll.len());
                (draw_mean(size) - centre).abs()
            })
            .collect();
        stats.sort_by(f64::total_cmp);
        let threshold = stats[(((1.0 - alpha) * BOOTSTRAP as f64).ceil() as usize).clamp(1, BOOTSTRAP) - 1];
        BatchRule { centre: held_out_nll(model).mean, threshold }
    }

    /// The statistic of a batch with mean NLL `mean_nll`: its distance from
    /// the held-out estimate of the entropy.
    pub fn statistic(&self, mean_nll: f64) -> f64 {
        (mean_nll - self.centre).abs()
    }

    pub fn flags(&self, mean_nll: f64) -> bool {
        self.statistic(mean_nll) > self.threshold
    }
}

/// Bootstrap resamples behind the batch threshold.
const BOOTSTRAP: usize = 2000;

fn write_batch_test(model: &Model, batches: &[(f64, usize)], b: &BatchTest) -> Result<()> {
    if model.refs.validation_nll.is_empty() {
        return Err(Error::Invalid("this model stores no validation NLLs for the batch test".into()));
    }
    let rule = BatchRule::new(model, b.size, b.alpha);
    let threshold = rule.threshold;
    crate::output::write_atomic(&b.output, |w| {
        let io = |source| Error::Io { path: b.output.clone(), source };
        writeln!(w, "batch,first_row,rows,mean_nll,statistic,threshold,alpha,out_of_distribution").map_err(io)?;
        for (i, &(sum, rows)) in batches.iter().enumerate() {
            let mean = sum / rows as f64;
            let stat = rule.statistic(mean);
            let verdict = rule.flags(mean);
            writeln!(w, "{i},{},{rows},{mean},{stat},{threshold},{},{verdict}", i * b.size, b.alpha).map_err(io)?;
        }
        Ok(())
    })
}
