//! Evaluation: how well each score separates in-distribution vectors from
//! known outlier sets — AUROC, AUPR, FPR at 95% TPR, detection error — with
//! bootstrap confidence intervals.
//!
//! Conventions: every score is first oriented so that higher = more
//! anomalous. AUROC and AUPR-Out take the outliers as the positive class;
//! AUPR-In takes the in-distribution vectors as positive (scored by the
//! negated anomaly). FPR at 95% TPR takes the in-distribution vectors as
//! positive: the share of outliers accepted at the threshold that keeps 95%
//! of in-distribution vectors. Detection error is min over thresholds of
//! 0.5 (1 - TPR) + 0.5 FPR.

use crate::error::{Error, Result};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};

/// Area under the ROC curve for telling `outliers` from `inliers` with a
/// score where higher = more anomalous: the probability that a random
/// outlier scores above a random inlier, ties counting one half. Equal to
/// the Mann-Whitney U statistic divided by n_in * n_out.
pub fn auroc(inliers: &[f64], outliers: &[f64]) -> f64 {
    let mut all: Vec<(f64, bool)> =
        inliers.iter().map(|&v| (v, false)).chain(outliers.iter().map(|&v| (v, true))).collect();
    all.sort_by(|a, b| a.0.total_cmp(&b.0));
    // Sum of the (mid-)ranks of the outliers.
    let mut rank_sum = 0.0;
    let mut i = 0;
    while i < all.len() {
        let mut j = i;
        while j < all.len() && all[j].0 == all[i].0 {
            j += 1;
        }
        let mid_rank = (i + j + 1) as f64 / 2.0;
        rank_sum += mid_rank * all[i..j].iter().filter(|e| e.1).count() as f64;
        i = j;
    }
    let (n_in, n_out) = (inliers.len() as f64, outliers.len() as f64);
    (rank_sum - n_out * (n_out + 1.0) / 2.0) / (n_in * n_out)
}

/// One point of a ROC curve per distinct score, highest threshold first,
/// starting at (0, 0): (false positive rate, true positive rate, threshold)
/// for "positive when score >= threshold".
pub fn roc_curve(negatives: &[f64], positives: &[f64]) -> Vec<(f64, f64, f64)> {
    let mut all: Vec<(f64, bool)> =
        negatives.iter().map(|&v| (v, false)).chain(positives.iter().map(|&v| (v, true))).collect();
    all.sort_by(|a, b| b.0.total_cmp(&a.0));
    let (n_neg, n_pos) = (negatives.len() as f64, positives.len() as f64);
    let mut points = vec![(0.0, 0.0, f64::INFINITY)];
    let (mut tp, mut fp) = (0.0, 0.0);
    let mut i = 0;
    while i < all.len() {
        let t = all[i].0;
        while i < all.len() && all[i].0 == t {
            if all[i].1 {
                tp += 1.0;
            } else {
                fp += 1.0;
            }
            i += 1;
        }
        points.push((fp / n_neg, tp / n_pos, t));
    }
    points
}

/// Average precision (area under the precision-recall curve as the step
/// sum over distinct thresholds, sum of (R_k - R_k-1) P_k) with `positives`
/// scored higher.
pub fn average_precision(negatives: &[f64], positives: &[f64]) -> f64 {
    precision_area(&roc_curve(negatives, positives), negatives.len(), positives.len())
}

/// Average precision from a ROC curve of `n_neg` negatives and `n_pos`
/// positives (see [`average_precision`]).
fn precision_area(curve: &[(f64, f64, f64)], n_neg: usize, n_pos: usize) -> f64 {
    let (n_neg, n_pos) = (n_neg as f64, n_pos as f64);
    let mut ap = 0.0;
    for w in curve.windows(2) {
        let (fpr, tpr) = (w[1].0, w[1].1);
        let (tp, fp) = (tpr * n_pos, fpr * n_neg);
        if tp + fp > 0.0 {
            ap += (tpr - w[0].1) * tp / (tp + fp);
        }
    }
    ap
}

/// The metrics of one score on one pair of sets.
#[derive(Clone, Debug, serde::Serialize)]
pub struct Metrics {
    pub auroc: f64,
    pub aupr_in: f64,
    pub aupr_out: f64,
    pub fpr_at_95_tpr: f64,
    pub detection_error: f64,
}

impl Metrics {
    /// From anomaly values (higher = more anomalous).
    pub fn of(inliers: &[f64], outliers: &[f64]) -> Metrics {
        let neg = |v: &[f64]| v.iter().map(|x| -x).collect::<Vec<_>>();
        // ROC with the in-distribution vectors as positives.
        let roc_in = roc_curve(&neg(outliers), &neg(inliers));
        let aupr_in = precision_area(&roc_in, outliers.len(), inliers.len());
        let fpr_at_95_tpr = roc_in.iter().find(|p| p.1 >= 0.95).map(|p| p.0).unwrap_or(1.0);
        let detection_error = roc_in.iter().map(|p| 0.5 * (1.0 - p.1) + 0.5 * p.0).fold(f64::INFINITY, f64::min);
        Metrics {
            auroc: auroc(inliers, outliers),
            aupr_in,
            aupr_out: average_precision(inliers, outliers),
            fpr_at_95_tpr,
            detection_error,
        }
    }

    fn values(&self) -> [f64; 5] {
        [self.auroc, self.aupr_in, self.aupr_out, self.fpr_at_95_tpr, self.detection_error]
    }
}

pub const METRIC_NAMES: [&str; 5] = ["auroc", "aupr_in", "aupr_out", "fpr_at_95_tpr", "detection_error"];

/// A metric with its bootstrap 95% interval.
#[derive(Clone, Debug, serde::Serialize)]
pub struct Estimate {
    pub value: f64,
    pub ci95: [f64; 2],
}

/// Every metric with percentile-bootstrap 95% intervals: both sets are
/// resampled with replacement `rounds` times (seeded).
pub fn with_intervals(inliers: &[f64], outliers: &[f64], rounds: usize, seed: u64) -> Vec<(String, Estimate)> {
    let point = Metrics::of(inliers, outliers).values();
    let mut rng = StdRng::seed_from_u64(seed);
    let mut draws: Vec<[f64; 5]> = Vec::with_capacity(rounds);
    let resample =
        |v: &[f64], rng: &mut StdRng| (0..v.len()).map(|_| v[rng.random_range(0..v.len())]).collect::<Vec<_>>();
    for _ in 0..rounds {
        let (a, b) = (resample(inliers, &mut rng), resample(outliers, &mut rng));
        draws.push(Metrics::of(&a, &b).values());
    }
    METRIC_NAMES
        .iter()
        .enumerate()
        .map(|(m, name)| {
            let mut v: Vec<f64> = draws.iter().map(|d| d[m]).collect();
            v.sort_by(f64::total_cmp);
            let ci95 = if v.is_empty() {
                [point[m], point[m]]
            } else {
                let at = |q: f64| v[((q * (v.len() - 1) as f64).round() as usize).min(v.len() - 1)];
                [at(0.025), at(0.975)]
            };
            (name.to_string(), Estimate { value: point[m], ci95 })
        })
        .collect()
}

/// Columns of a score file.
pub struct ScoreTable {
    pub path: std::path::PathBuf,
    pub columns: Vec<String>,
    pub values: Vec<Vec<f64>>,
}

impl ScoreTable {
    pub fn column(&self, name: &str) -> Option<&[f64]> {
        self.columns.iter().position(|c| c == name).map(|i| &self.values[i][..])
    }
}

/// The score columns to evaluate: the requested ones, or every anomaly
/// score of the in-distribution file; each must be in every file.
pub fn common_columns(id: &ScoreTable, ood: &[(String, ScoreTable)], requested: &[String]) -> Result<Vec<String>> {
    let wanted: Vec<String> = if requested.is_empty() {
        id.columns.iter().filter(|c| crate::calibrate::direction_of(c).is_ok()).cloned().collect()
    } else {
        requested.to_vec()
    };
    if wanted.is_empty() {
        return Err(Error::Invalid(format!("{}: has no score columns to evaluate", id.path.display())));
    }
    for c in &wanted {
        crate::calibrate::direction_of(c)?;
        for t in std::iter::once(id).chain(ood.iter().map(|o| &o.1)) {
            if t.column(c).is_none() {
                return Err(Error::Invalid(format!(
                    "{}: has no column '{c}' (it has: {}); score every set with the same model and columns",
                    t.path.display(),
                    t.columns.join(", ")
                )));
            }
        }
    }
    Ok(wanted)
}

/// Orient a score column so that higher = more anomalous; two-sided scores
/// are distances from the in-distribution median.
pub fn anomaly(column: &str, values: &[f64], id_median: f64) -> Vec<f64> {
    use crate::calibrate::Direction;
    match crate::calibrate::direction_of(column).expect("checked column") {
        Direction::Higher => values.to_vec(),
        Direction::Lower => values.iter().map(|v| -v).collect(),
        Direction::TwoSided => values.iter().map(|v| (v - id_median).abs()).collect(),
    }
}

pub fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

/// What `tidemark evaluate` was asked to do.
pub struct EvaluateOptions<'a> {
    pub id: &'a std::path::Path,
    pub ood: &'a [(String, std::path::PathBuf)],
    pub columns: &'a [String],
    pub bootstrap: usize,
    pub seed: u64,
    pub output: Option<&'a std::path::Path>,
    pub report: Option<&'a std::path::Path>,
    pub calibration: Option<&'a crate::calibrate::Calibration>,
    pub log: Option<&'a [crate::train::LogEntry]>,
}

/// Per outlier set, per column: every metric with its interval.
pub type Results = Vec<(String, Vec<(String, Vec<(String, Estimate)>)>)>;

/// Read the score files, compute every metric with intervals, and write
/// the JSON results and the report when asked. Returns the results.
pub fn run(o: &EvaluateOptions) -> Result<Results> {
    let read = |p: &std::path::Path| -> Result<ScoreTable> {
        let (columns, values) = crate::data::read_score_table(p)?;
        Ok(ScoreTable { path: p.to_path_buf(), columns, values })
    };
    let id = read(o.id)?;
    let ood: Vec<(String, ScoreTable)> = o.ood.iter().map(|(n, p)| Ok((n.clone(), read(p)?))).collect::<Result<_>>()?;
    Ok(run_tables(o, &id, &ood)?.0)
}

/// [`run`] on score tables already in memory (`o.id` and `o.ood` are not
/// read): the results, and the JSON document `run` writes to `o.output`.
pub fn run_tables(
    o: &EvaluateOptions,
    id: &ScoreTable,
    ood: &[(String, ScoreTable)],
) -> Result<(Results, serde_json::Value)> {
    if ood.is_empty() {
        return Err(Error::Invalid("give at least one --ood NAME=SCORES".into()));
    }
    let columns = common_columns(id, ood, o.columns)?;
    let results: Results = ood
        .iter()
        .map(|(name, table)| {
            let per_column = columns
                .iter()
                .map(|c| {
                    let id_raw = id.column(c).expect("checked column");
                    let centre = median(id_raw);
                    let a = anomaly(c, id_raw, centre);
                    let b = anomaly(c, table.column(c).expect("checked column"), centre);
                    (c.clone(), with_intervals(&a, &b, o.bootstrap, o.seed))
                })
                .collect();
            (name.clone(), per_column)
        })
        .collect();
    let doc = serde_json::json!({
        "in_distribution": id.path.display().to_string(),
        "conventions": {
            "orientation": "every score oriented so that higher = more anomalous; two-sided scores (log_det, latent_norm) as distance from the in-distribution median",
            "auroc": "outliers positive; ties count one half",
            "aupr_in": "in-distribution positive",
            "aupr_out": "outliers positive",
            "fpr_at_95_tpr": "in-distribution positive: share of outliers accepted at the threshold that keeps 95% of in-distribution vectors",
            "detection_error": "min over thresholds of 0.5 (1 - TPR) + 0.5 FPR",
            "ci95": format!("percentile bootstrap, {} resamples of both sets, seed {}", o.bootstrap, o.seed),
        },
        "sets": results.iter().map(|(name, per_column)| {
            let scores: serde_json::Map<String, serde_json::Value> = per_column
                .iter()
                .map(|(c, est)| (c.clone(), estimates_json(est)))
                .collect();
            let rows = ood.iter().find(|(n, _)| n == name).map(|(_, t)| t.values[0].len()).unwrap_or(0);
            (name.clone(), serde_json::json!({ "rows": rows, "scores": scores }))
        }).collect::<serde_json::Map<_, _>>(),
        "in_distribution_rows": id.values[0].len(),
    });
    if let Some(path) = o.output {
        crate::output::write_atomic(path, |w| {
            writeln!(w, "{doc:#}").map_err(|source| Error::Io { path: path.to_path_buf(), source })
        })?;
    }
    if let Some(path) = o.report {
        let input = crate::report::ReportInput {
            columns: &columns,
            id,
            ood,
            metrics: &results,
            calibration: o.calibration,
            log: o.log,
        };
        crate::report::write_report(path, &input)?;
    }
    Ok((results, doc))
}

fn estimates_json(est: &[(String, Estimate)]) -> serde_json::Value {
    est.iter()
        .map(|(m, e)| (m.clone(), serde_json::json!({ "value": e.value, "ci95": e.ci95 })))
        .collect::<serde_json::Map<_, _>>()
        .into()
}

/// A readable table of the results (AUROC with its interval, then the rest).
pub fn table(results: &Results) -> String {
    let mut s =
        String::from("AUROC and AUPR-Out: outliers positive; AUPR-In and FPR@95TPR: in-distribution positive.\n");
    s.push_str(&format!(
        "{:<16}{:<26}{:>24}{:>9}{:>9}{:>10}{:>9}\n",
        "outlier set", "score", "AUROC [95% CI]", "AUPR-In", "AUPR-Out", "FPR@95", "det.err"
    ));
    for (set, per_column) in results {
        for (column, est) in per_column {
            let v = |m: &str| est.iter().find(|(n, _)| n == m).map(|(_, e)| e.clone()).expect("every metric");
            let a = v("auroc");
            s.push_str(&format!(
                "{:<16}{:<26}{:>24}{:>9.4}{:>9.4}{:>10.4}{:>9.4}\n",
                set,
                column,
                format!("{:.4} [{:.4}, {:.4}]", a.value, a.ci95[0], a.ci95[1]),
                v("aupr_in").value,
                v("aupr_out").value,
                v("fpr_at_95_tpr").value,
                v("detection_error").value
            ));
        }
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    /// By definition: the share of (inlier, outlier) pairs ranked right,
    /// ties one half, counted pair by pair.
    #[test]
    fn auroc_counts_pairs_with_ties_as_half() {
        let inl = [0.1, 0.4, 0.4, 0.8, 0.3];
        let out = [0.4, 0.9, 0.35, 0.8];
        let mut pairs = 0.0;
        for &o in &out {
            for &i in &inl {
                pairs += if o > i {
                    1.0
                } else if o == i {
                    0.5
                } else {
                    0.0
                };
            }
        }
        assert!((auroc(&inl, &out) - pairs / 20.0).abs() < 1e-12);
        assert_eq!(auroc(&[0.0, 1.0], &[2.0, 3.0]), 1.0);
        assert_eq!(auroc(&[2.0, 3.0], &[0.0, 1.0]), 0.0);
    }
}
