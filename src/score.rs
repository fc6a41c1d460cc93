//! Scoring: per-vector scores from a fitted model, written as CSV with a
//! header row (one row per input vector, in input order).

use crate::data::Dataset;
use crate::error::{Error, Result};
use crate::model::Model;
use std::path::Path;

/// Score columns, in output order.
pub const COLUMNS: [&str; 3] = ["log_likelihood", "bits_per_dim", "dead_feature_deviation"];

/// Per-vector scores.
#[derive(Clone, Debug, Default)]
pub struct Scores {
    /// log p(x) in nats, input space, over the live features. Higher = more typical.
    pub log_likelihood: Vec<f64>,
    /// -log2 p(x) / live features. Lower = more typical.
    pub bits_per_dim: Vec<f64>,
    /// Largest |x_j - training value| over dead features. 0 = as in training.
    pub dead_feature_deviation: Vec<f64>,
}

impl Scores {
    pub fn len(&self) -> usize {
        self.log_likelihood.len()
    }

    pub fn is_empty(&self) -> bool {
        self.log_likelihood.is_empty()
    }

    fn column(&self, name: &str) -> &[f64] {
        match name {
            "log_likelihood" => &self.log_likelihood,
            "bits_per_dim" => &self.bits_per_dim,
            _ => &self.dead_feature_deviation,
        }
    }
}

/// Score every row of `x` with `model`.
pub fn score(model: &Model, x: &Dataset, threads: usize) -> Scores {
    let eval = model.evaluate(x, threads);
    let per_bit = model.dim() as f64 * std::f64::consts::LN_2;
    Scores {
        bits_per_dim: eval.log_likelihood.iter().map(|ll| -ll / per_bit).collect(),
        log_likelihood: eval.log_likelihood,
        dead_feature_deviation: eval.dead_deviation,
    }
}

/// Write scores as CSV (header row, full f64 precision) to `path` (`-` = stdout).
pub fn write_csv(path: &Path, scores: &Scores) -> Result<()> {
    crate::output::write_atomic(path, |w| {
        let io = |source| Error::Io { path: path.to_path_buf(), source };
        writeln!(w, "{}", COLUMNS.join(",")).map_err(io)?;
        for r in 0..scores.len() {
            let row: Vec<String> = COLUMNS.iter().map(|c| scores.column(c)[r].to_string()).collect();
            writeln!(w, "{}", row.join(",")).map_err(io)?;
        }
        Ok(())
    })
}
