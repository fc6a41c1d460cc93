//! Calibration, the decisions layer above the scores: a threshold with a
//! known false-alarm rate and conformal p-values, from scores of held-out
//! in-distribution vectors
//! (split-conformal; Bates et al. 2023, "Testing for outliers with
//! conformal p-values").
//!
//! Guarantee: if a new in-distribution vector and the n calibration vectors
//! are exchangeable (same distribution, calibration rows never used for
//! fitting), its p-value is super-uniform, P(p <= a) <= a, so it is flagged
//! with probability at most alpha. It is marginal (over the draw of the
//! calibration set and the new vector), not conditional on either, and it
//! breaks under drift or when calibration rows were used in training.

use crate::data::Dataset;
use crate::error::{Error, Result};
use crate::model::Model;
pub use crate::score::Direction;
use crate::score::{did_you_mean, Decision, Scorer};
use std::path::Path;

/// A calibration file's contents.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Calibration {
    pub format: String,
    pub format_version: u32,
    /// Fingerprint of the model the scores came from.
    pub model: String,
    pub score: String,
    pub direction: Direction,
    /// Median of the calibration scores (the centre of a two-sided score).
    pub center: f64,
    pub false_alarm: f64,
    pub rows: usize,
    /// Conformal rank ceil((n + 1)(1 - alpha)).
    pub rank: usize,
    /// The rank-th smallest anomaly value: flagged when a vector's anomaly
    /// value is above it (equivalently, its p-value is at most alpha).
    pub threshold: f64,
    /// The same threshold on the score's own scale.
    pub threshold_raw: f64,
    /// Calibration anomaly values (higher = more anomalous), sorted.
    pub anomaly: Vec<f64>,
}

pub const FORMAT_VERSION: u32 = 1;

/// Rows scored at a time (for the progress bar; memory is bounded anyway).
const CHUNK: usize = 8192;

/// The conformal rank and threshold for `sorted` anomaly values at false-
/// alarm rate `alpha`; `None` when n + 1 < 1 / alpha (too few values for
/// any threshold with that guarantee).
pub fn conformal_threshold(sorted: &[f64], alpha: f64) -> Option<(usize, f64)> {
    let n = sorted.len();
    let rank = ((n as f64 + 1.0) * (1.0 - alpha)).ceil() as usize;
    (rank >= 1 && rank <= n).then(|| (rank, sorted[rank - 1]))
}

/// Conformal p-value of anomaly value `a`: (1 + #{calibration >= a}) / (n + 1).
pub fn p_value(sorted: &[f64], a: f64) -> f64 {
    let below = sorted.partition_point(|&v| v < a);
    (1 + sorted.len() - below) as f64 / (sorted.len() + 1) as f64
}

impl Calibration {
    /// The anomaly value (higher = more anomalous) of a raw score.
    pub fn anomaly(&self, raw: f64) -> f64 {
        self.direction.orient(self.center, raw)
    }

    pub fn p_value(&self, raw: f64) -> f64 {
        p_value(&self.anomaly, self.anomaly(raw))
    }

    /// Flagged exactly when the p-value is at most the false-alarm rate.
    pub fn flagged(&self, raw: f64) -> bool {
        self.p_value(raw) <= self.false_alarm
    }

    pub fn load(path: &Path) -> Result<Calibration> {
        Calibration::parse(path, &crate::data::read_text(path)?)
    }

    /// A calibration from the text of a calibration file (`path` names it
    /// in messages).
    pub fn parse(path: &Path, text: &str) -> Result<Calibration> {
        // Messages quote the file's text (serde quotes keys): no control codes.
        let bad = |msg: String| Error::Invalid(format!("{}: {}", path.display(), crate::data::printable(&msg, 600)));
        let cal: Calibration =
            serde_json::from_str(text).map_err(|e| bad(format!("not a tidemark calibration file ({e})")))?;
        if cal.format != "tidemark-calibration" || cal.format_version != FORMAT_VERSION {
            return Err(bad(format!("not a tidemark calibration file of version {FORMAT_VERSION}")));
        }
        cal.check().map_err(bad)?;
        Ok(cal)
    }

    /// Every field consistent with the others, as [`calibrate`] writes them.
    fn check(&self) -> std::result::Result<(), String> {
        let score = crate::data::printable(&self.score, 40);
        if matches!(self.score.as_str(), "p_value" | "flagged") {
            return Err(format!("field 'score': '{score}' is computed from a calibration, it cannot be calibrated"));
        }
        match crate::score::direction_of(&self.score) {
            Some(d) if d == self.direction => {}
            Some(_) => return Err(format!("field 'direction' does not match the score '{score}'")),
            None => return Err(format!("field 'score': '{score}' is not an anomaly score")),
        }
        if !(self.false_alarm > 0.0 && self.false_alarm < 1.0) {
            return Err(format!("field 'false_alarm': {} is not between 0 and 1", self.false_alarm));
        }
        if self.anomaly.is_empty() || self.anomaly.len() != self.rows {
            return Err(format!("field 'anomaly' holds {} values for {} rows", self.anomaly.len(), self.rows));
        }
        if let Some(i) = self.anomaly.iter().position(|v| !v.is_finite()) {
            return Err(format!("field 'anomaly': value {i} is not a finite number"));
        }
        if let Some(i) = self.anomaly.windows(2).position(|w| w[0] > w[1]) {
            return Err(format!("field 'anomaly': values {i} and {} are not in ascending order", i + 1));
        }
        if !self.center.is_finite() {
            return Err("field 'center' is not a finite number".into());
        }
        if conformal_threshold(&self.anomaly, self.false_alarm) != Some((self.rank, self.threshold)) {
            return Err("fields 'rank' and 'threshold' do not match the values and the false-alarm rate".into());
        }
        let raw = if self.direction == Direction::Lower { -self.threshold } else { self.threshold };
        if self.threshold_raw != raw {
            return Err("field 'threshold_raw' does not match 'threshold'".into());
        }
        Ok(())
    }

    pub fn save(&self, path: &Path) -> Result<()> {
        let json = serde_json::to_string_pretty(self).map_err(|e| Error::Invalid(e.to_string()))?;
        crate::output::write_atomic(path, |w| {
            writeln!(w, "{json}").map_err(|source| Error::Io { path: path.into(), source })
        })
    }

    /// Refuse to use the calibration with a model it was not made for.
    pub fn check_model(&self, model: &Model, path: &Path) -> Result<()> {
        if self.model != model.fingerprint() {
            return Err(Error::Invalid(format!("{}: was calibrated for a different model", path.display())));
        }
        if !crate::score::available_columns(model).contains(&self.score) {
            return Err(Error::Invalid(format!(
                "{}: field 'score': the model has no column '{}'",
                path.display(),
                crate::data::printable(&self.score, 40)
            )));
        }
        Ok(())
    }
}

/// Which way a column is anomalous, for calibration; `flag` names the
/// option the column came from.
pub fn direction_of(score: &str, model: &Model, flag: &str) -> Result<Direction> {
    let columns = crate::score::available_columns(model);
    let scores = || columns.iter().map(String::as_str).filter(|c| crate::score::direction_of(c).is_some());
    if !columns.iter().any(|c| c == score) {
        return Err(Error::Invalid(format!(
            "{flag}: this model has no score '{score}'{} (scores: {})",
            did_you_mean(score, scores()),
            scores().collect::<Vec<_>>().join(", ")
        )));
    }
    crate::score::direction_of(score).ok_or_else(|| {
        Error::Invalid(format!(
            "{flag}: '{score}' is not an anomaly score; choose one of {}",
            scores().collect::<Vec<_>>().join(", ")
        ))
    })
}

impl Decision for Calibration {
    fn score(&self) -> &str {
        &self.score
    }

    fn columns(&self) -> Vec<String> {
        vec!["p_value".into(), "flagged".into()]
    }

    fn value(&self, column: &str, raw: f64) -> f64 {
        let p = self.p_value(raw);
        if column == "p_value" {
            p
        } else {
            f64::from(u8::from(p <= self.false_alarm))
        }
    }

    fn flags(&self, raw: f64) -> bool {
        self.flagged(raw)
    }
}

/// Calibrate `score` of `model` on held-out in-distribution rows `x` at
/// false-alarm rate `alpha`. Returns the calibration and any warnings.
pub fn calibrate(
    model: &Model,
    x: &Dataset,
    score: &str,
    alpha: f64,
    threads: usize,
) -> Result<(Calibration, Vec<String>)> {
    if !(alpha > 0.0 && alpha < 1.0) {
        return Err(Error::Invalid("--false-alarm must be between 0 and 1".into()));
    }
    let direction = direction_of(score, model, "--score")?;
    let mut warnings = Vec::new();
    if format!("{:016x}", x.checksum()) == model.meta.training.data_checksum {
        warnings.push(format!(
            "{}: is the file the model was fitted on; calibration needs held-out rows the model never saw, or the false-alarm rate will be wrong",
            x.path.display()
        ));
    }
    let n = x.rows;
    if ((n + 1) as f64) * alpha < 1.0 {
        return Err(Error::Invalid(format!(
            "{}: {n} rows are too few for a false-alarm rate of {alpha} (need at least {})",
            x.path.display(),
            (1.0 / alpha).ceil() as usize - 1
        )));
    }
    let scorer = Scorer::new(model, None);
    let mut raw = Vec::with_capacity(n);
    let mut evaluator = model.evaluator(threads, CHUNK.min(n));
    let mut progress = crate::progress::Progress::new(n, "rows scored");
    for start in (0..n).step_by(CHUNK) {
        let rows: Vec<usize> = (start..(start + CHUNK).min(n)).collect();
        let e = evaluator.evaluate_rows(x, &rows);
        raw.extend((0..rows.len()).map(|r| scorer.value(&e, score, r)));
        progress.advance(rows.len());
    }
    progress.finish();
    raw.sort_by(f64::total_cmp);
    let center = raw[n / 2];
    let mut anomaly: Vec<f64> = raw.iter().map(|&v| direction.orient(center, v)).collect();
    anomaly.sort_by(f64::total_cmp);
    let (rank, threshold) = conformal_threshold(&anomaly, alpha).expect("n checked above");
    let threshold_raw = match direction {
        Direction::Higher | Direction::TwoSided => threshold,
        Direction::Lower => -threshold,
    };
    let cal = Calibration {
        format: "tidemark-calibration".into(),
        format_version: FORMAT_VERSION,
        model: model.fingerprint(),
        score: score.to_string(),
        direction,
        center,
        false_alarm: alpha,
        rows: n,
        rank,
        threshold,
        threshold_raw,
        anomaly,
    };
    Ok((cal, warnings))
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::rngs::StdRng;
    use rand::{Rng, SeedableRng};

    /// The split-conformal guarantee by simulation (Bates et al. 2023): over
    /// many random calibration/test draws of exchangeable data, the share of
    /// test points flagged at alpha is at most alpha plus Monte Carlo error,
    /// and p-values are close to uniform (Kolmogorov-Smirnov distance).
    /// Measured (seeds 11, 12): false-alarm rate 0.0476 at alpha 0.05 over
    /// 20,000 draws; p-values never exceed the uniform CDF with ties, KS
    /// distance 0.0074 without ties.
    #[test]
    fn conformal_false_alarm_rate_and_uniform_p_values() {
        let mut rng = StdRng::seed_from_u64(11);
        let (alpha, n, trials, tests) = (0.05, 199, 400, 50);
        let (mut flagged, mut total) = (0usize, 0usize);
        let mut p_values = Vec::new();
        for _ in 0..trials {
            // Exchangeable scores with ties (rounded to 2 decimals).
            let mut draw = || ((rng.random::<f64>() + rng.random::<f64>()) * 50.0).round() / 50.0;
            let mut cal: Vec<f64> = (0..n).map(|_| draw()).collect();
            cal.sort_by(f64::total_cmp);
            let (_, threshold) = conformal_threshold(&cal, alpha).unwrap();
            for _ in 0..tests {
                let s = draw();
                let p = p_value(&cal, s);
                assert_eq!(p <= alpha, s > threshold, "p-value and threshold agree");
                flagged += (p <= alpha) as usize;
                total += 1;
                p_values.push(p);
            }
        }
        let rate = flagged as f64 / total as f64;
        eprintln!("conformal simulation: false-alarm rate {rate:.4} at alpha {alpha}");
        // Binomial standard error at alpha over 20,000 draws is 0.0015;
        // draws within a trial share a calibration set, so allow 4x that.
        assert!(rate <= alpha + 0.006, "false-alarm rate {rate}");
        // p-values: conservative with ties, so compare P(p <= t) <= t + eps.
        p_values.sort_by(f64::total_cmp);
        let ks =
            p_values.iter().enumerate().map(|(i, &p)| (i + 1) as f64 / p_values.len() as f64 - p).fold(0.0, f64::max);
        assert!(ks < 0.02, "p-values exceed uniform by up to {ks}");
        // Without ties the p-values are uniform on {1/(n+1), ..., 1}: two-sided KS.
        let mut rng = StdRng::seed_from_u64(12);
        let mut ps = Vec::new();
        for _ in 0..trials {
            let mut cal: Vec<f64> = (0..n).map(|_| rng.random::<f64>()).collect();
            cal.sort_by(f64::total_cmp);
            ps.extend((0..tests).map(|_| p_value(&cal, rng.random::<f64>())));
        }
        ps.sort_by(f64::total_cmp);
        let ks2 = ps.iter().enumerate().map(|(i, &p)| ((i + 1) as f64 / ps.len() as f64 - p).abs()).fold(0.0, f64::max);
        eprintln!(
            "conformal simulation: one-sided excess over uniform {ks:.4} with ties, KS distance {ks2:.4} without"
        );
        assert!(ks2 < 0.02, "Kolmogorov-Smirnov distance from uniform {ks2}");
    }

    #[test]
    fn too_few_rows_for_the_rate_give_no_threshold() {
        assert!(conformal_threshold(&[1.0; 98], 0.01).is_none());
        assert_eq!(conformal_threshold(&(0..99).map(f64::from).collect::<Vec<_>>(), 0.01), Some((99, 98.0)));
    }
}
