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

use crate::calibrate::Calibration;
use crate::error::{Error, Result};
use crate::score::{did_you_mean, direction_of, Direction};
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
        while j < all.len() && tied(all[j].0, all[i].0) {
            j += 1;
        }
        let mid_rank = (i + j + 1) as f64 / 2.0;
        rank_sum += mid_rank * all[i..j].iter().filter(|e| e.1).count() as f64;
        i = j;
    }
    let (n_in, n_out) = (inliers.len() as f64, outliers.len() as f64);
    (rank_sum - n_out * (n_out + 1.0) / 2.0) / (n_in * n_out)
}

/// The pooled scores' tie groups, highest score first: (score, positives,
/// negatives) for each distinct score.
fn tie_groups(negatives: &[f64], positives: &[f64]) -> Vec<(f64, usize, usize)> {
    let mut all: Vec<(f64, bool)> =
        negatives.iter().map(|&v| (v, false)).chain(positives.iter().map(|&v| (v, true))).collect();
    all.sort_by(|a, b| b.0.total_cmp(&a.0));
    let mut groups: Vec<(f64, usize, usize)> = Vec::new();
    for (v, positive) in all {
        match groups.last_mut() {
            Some(g) if tied(g.0, v) => {}
            _ => groups.push((v, 0, 0)),
        }
        if let Some(g) = groups.last_mut() {
            if positive {
                g.1 += 1;
            } else {
                g.2 += 1;
            }
        }
    }
    groups
}

/// Equal scores, with NaN tied to NaN: every value is tied with itself, so
/// each tie group holds at least one value and the loops over them advance.
fn tied(a: f64, b: f64) -> bool {
    a == b || (a.is_nan() && b.is_nan())
}

/// One point of a ROC curve per distinct score, highest threshold first,
/// starting at (0, 0): (false positive rate, true positive rate, threshold)
/// for "positive when score >= threshold".
pub fn roc_curve(negatives: &[f64], positives: &[f64]) -> Vec<(f64, f64, f64)> {
    let (n_neg, n_pos) = (negatives.len() as f64, positives.len() as f64);
    let mut points = vec![(0.0, 0.0, f64::INFINITY)];
    let (mut tp, mut fp) = (0usize, 0usize);
    for (t, pos, neg) in tie_groups(negatives, positives) {
        tp += pos;
        fp += neg;
        points.push((fp as f64 / n_neg, tp as f64 / n_pos, t));
    }
    points
}

/// Average precision with `positives` scored higher: the mean, over the
/// positives, of the precision at each positive's rank. Tied scores are
/// taken in every order with equal chance and the expectation reported, the
/// same convention as AUROC's "ties count one half" (McSherry and Najork
/// 2008, "Computing information retrieval performance measures efficiently
/// in the presence of tied scores"). Without ties this is scikit-learn's
/// `average_precision_score`. Why not its rule for ties (a tie group
/// counted at the precision of its end): under that rule, a row that
/// appears twice raises the value, and bootstrap resamples repeat rows, so
/// every resample sat above the point estimate and intervals could exclude
/// it; under the expectation, repeating a row that ties with nothing else
/// changes nothing.
pub fn average_precision(negatives: &[f64], positives: &[f64]) -> f64 {
    if positives.is_empty() {
        return f64::NAN;
    }
    let (mut tp_before, mut rows_before) = (0.0, 0.0);
    let mut sum = 0.0;
    for (_, pos, neg) in tie_groups(negatives, positives) {
        let (p, n) = (pos as f64, (pos + neg) as f64);
        // Position i of the group holds a positive with chance p / n; given
        // that, the positives before it in the group are hypergeometric
        // with mean (i - 1)(p - 1)/(n - 1).
        let within = if n > 1.0 { (p - 1.0) / (n - 1.0) } else { 0.0 };
        for i in 1..=(pos + neg) {
            let i = i as f64;
            sum += (p / n) * (tp_before + 1.0 + (i - 1.0) * within) / (rows_before + i);
        }
        tp_before += p;
        rows_before += n;
    }
    sum / positives.len() as f64
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
        let aupr_in = average_precision(&neg(outliers), &neg(inliers));
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

/// The score columns to evaluate, and one note per column left out.
/// Requested columns must be scores present in every file; by default every
/// score column of the in-distribution file, which must then be in every
/// file (decision columns such as `p_value` and `flagged` may differ). A
/// column with one value in every file separates nothing and is left out.
pub fn score_columns(
    id: &ScoreTable,
    ood: &[(String, ScoreTable)],
    requested: &[String],
) -> Result<(Vec<String>, Vec<String>)> {
    let files = || std::iter::once(id).chain(ood.iter().map(|o| &o.1));
    let is_score = |c: &String| direction_of(c).is_some();
    let wanted: Vec<String> = if requested.is_empty() {
        let scores: Vec<String> = id.columns.iter().filter(|c| is_score(c)).cloned().collect();
        let shared: Vec<String> = scores.iter().filter(|c| files().all(|t| t.column(c).is_some())).cloned().collect();
        if let Some(t) = files().find(|t| scores.iter().any(|c| t.column(c).is_none())) {
            let missing: Vec<&str> = scores.iter().filter(|c| t.column(c).is_none()).map(String::as_str).collect();
            return Err(Error::Invalid(format!(
                "{}: has no score column {} that {} has; score every set with the same columns, or evaluate the shared ones with --columns {}",
                t.path.display(),
                missing.iter().map(|c| format!("'{c}'")).collect::<Vec<_>>().join(", "),
                id.path.display(),
                shared.join(",")
            )));
        }
        scores
    } else {
        for c in requested {
            if c == "p_value" || c == "flagged" {
                return Err(Error::Invalid(format!(
                    "--columns: '{c}' is a decision, not a score; evaluate reports the calibrated decision's false-alarm and detection rates by itself"
                )));
            }
            if !is_score(c) {
                let known = id.columns.iter().filter(|c| is_score(c)).map(String::as_str);
                return Err(Error::Invalid(format!(
                    "--columns: '{c}' is not a score column of {}{} (its score columns: {})",
                    id.path.display(),
                    did_you_mean(c, known.clone()),
                    known.collect::<Vec<_>>().join(", ")
                )));
            }
            for t in files() {
                if t.column(c).is_none() {
                    return Err(Error::Invalid(format!(
                        "{}: has no column '{c}'{} (it has: {}); score every set with the same model and columns",
                        t.path.display(),
                        did_you_mean(c, t.columns.iter().map(String::as_str)),
                        t.columns.join(", ")
                    )));
                }
            }
        }
        requested.to_vec()
    };
    let mut notes = Vec::new();
    let mut kept = Vec::new();
    for c in wanted {
        let first = id.column(&c).and_then(|v| v.first().copied());
        let constant = files().all(|t| t.column(&c).unwrap_or(&[]).iter().all(|v| Some(*v) == first));
        if constant {
            notes.push(format!(
                "skipped {c}: it is {} in every file, so it separates nothing",
                first.unwrap_or(f64::NAN)
            ));
        } else {
            kept.push(c);
        }
    }
    if kept.is_empty() {
        return Err(Error::Invalid(format!("{}: has no score columns that vary to evaluate", id.path.display())));
    }
    Ok((kept, notes))
}

/// Orient a score column so that higher = more anomalous; two-sided scores
/// are distances from the in-distribution median.
pub fn anomaly(column: &str, values: &[f64], id_median: f64) -> Vec<f64> {
    let direction = direction_of(column).unwrap_or(Direction::Higher);
    values.iter().map(|&v| direction.orient(id_median, v)).collect()
}

pub fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

/// Rows flagged out of rows.
#[derive(Clone, Copy, Debug, serde::Serialize)]
pub struct Rate {
    pub flagged: usize,
    pub rows: usize,
}

impl Rate {
    fn of(flags: impl Iterator<Item = bool>) -> Rate {
        let (mut flagged, mut rows) = (0, 0);
        for f in flags {
            flagged += usize::from(f);
            rows += 1;
        }
        Rate { flagged, rows }
    }

    pub fn share(&self) -> f64 {
        self.flagged as f64 / self.rows.max(1) as f64
    }
}

/// A calibrated decision read as the decision it is: the false-alarm rate
/// on the in-distribution file and the share of each outlier set flagged.
#[derive(Clone, Debug)]
pub struct DecisionRates {
    /// Where the flags come from: the calibration applied to its score
    /// column, or the files' `flagged` column.
    pub source: String,
    pub false_alarm: Rate,
    pub detection: Vec<(String, Rate)>,
}

/// The decision rates: from `calibration` applied to its score column when
/// given and that column is in every file, else from `flagged` columns
/// when every file has one.
fn decision_rates(
    id: &ScoreTable,
    ood: &[(String, ScoreTable)],
    calibration: Option<&Calibration>,
) -> Option<DecisionRates> {
    let all = |c: &str| std::iter::once(id).chain(ood.iter().map(|o| &o.1)).all(|t| t.column(c).is_some());
    let (source, flags): (String, Box<dyn Fn(&ScoreTable) -> Rate>) = match calibration {
        Some(cal) if all(&cal.score) => (
            format!("calibration of {} at false-alarm rate {}", cal.score, cal.false_alarm),
            Box::new(move |t: &ScoreTable| {
                Rate::of(t.column(&cal.score).unwrap_or(&[]).iter().map(|&v| cal.flagged(v)))
            }),
        ),
        _ if all("flagged") => (
            "the flagged column of each file".to_string(),
            Box::new(|t: &ScoreTable| Rate::of(t.column("flagged").unwrap_or(&[]).iter().map(|&v| v == 1.0))),
        ),
        _ => return None,
    };
    Some(DecisionRates {
        source,
        false_alarm: flags(id),
        detection: ood.iter().map(|(n, t)| (n.clone(), flags(t))).collect(),
    })
}

/// What `tidemark evaluate` was asked to do.
pub struct EvaluateOptions<'a> {
    pub id: &'a std::path::Path,
    pub ood: &'a [(String, std::path::PathBuf)],
    pub columns: &'a [String],
    pub bootstrap: usize,
    pub seed: u64,
    pub output: Option<&'a std::path::Path>,
    /// Its threshold is applied to its score column for the decision rates.
    pub calibration: Option<&'a Calibration>,
}

/// Per outlier set, per column: every metric with its interval.
pub type Results = Vec<(String, Vec<(String, Vec<(String, Estimate)>)>)>;

/// Everything an evaluation found, for the table and the report.
pub struct Evaluated {
    pub id: ScoreTable,
    pub ood: Vec<(String, ScoreTable)>,
    /// The score columns ranked.
    pub columns: Vec<String>,
    /// One line per column left out, and why.
    pub notes: Vec<String>,
    pub results: Results,
    pub decision: Option<DecisionRates>,
}

/// Read the score files, compute every metric with intervals and the
/// decision rates, and write the JSON results when asked.
pub fn run(o: &EvaluateOptions) -> Result<Evaluated> {
    let read = |p: &std::path::Path| -> Result<ScoreTable> {
        let (columns, values) = crate::data::read_score_table(p)?;
        Ok(ScoreTable { path: p.to_path_buf(), columns, values })
    };
    let id = read(o.id)?;
    let ood: Vec<(String, ScoreTable)> = o.ood.iter().map(|(n, p)| Ok((n.clone(), read(p)?))).collect::<Result<_>>()?;
    run_tables(o, id, ood)
}

/// [`run`] on score tables already in memory (`o.id` and `o.ood` are not
/// read; the tables' own paths name them).
pub fn run_tables(o: &EvaluateOptions, id: ScoreTable, ood: Vec<(String, ScoreTable)>) -> Result<Evaluated> {
    if ood.is_empty() {
        return Err(Error::Invalid("give at least one --ood NAME=SCORES".into()));
    }
    let (columns, notes) = score_columns(&id, &ood, o.columns)?;
    let mut progress = crate::progress::Progress::new(ood.len() * columns.len() * o.bootstrap, "bootstrap resamples");
    let mut results: Results = Vec::new();
    for (name, table) in &ood {
        let mut per_column = Vec::new();
        for c in &columns {
            let id_raw = id.column(c).unwrap_or(&[]);
            let centre = median(id_raw);
            let a = anomaly(c, id_raw, centre);
            let b = anomaly(c, table.column(c).unwrap_or(&[]), centre);
            per_column.push((c.clone(), with_intervals(&a, &b, o.bootstrap, o.seed)));
            progress.advance(o.bootstrap);
        }
        results.push((name.clone(), per_column));
    }
    progress.finish();
    let decision = decision_rates(&id, &ood, o.calibration);
    let evaluated = Evaluated { id, ood, columns, notes, results, decision };
    if let Some(path) = o.output {
        let doc = results_json(&evaluated, o);
        crate::output::write_atomic(path, |w| {
            writeln!(w, "{doc:#}").map_err(|source| Error::Io { path: path.to_path_buf(), source })
        })?;
    }
    Ok(evaluated)
}

pub fn results_json(e: &Evaluated, o: &EvaluateOptions) -> serde_json::Value {
    serde_json::json!({
        "in_distribution": e.id.path.display().to_string(),
        "conventions": {
            "orientation": "every score oriented so that higher = more anomalous; two-sided scores (log_det, latent_norm) as distance from the in-distribution median",
            "auroc": "outliers positive; ties count one half",
            "aupr_in": "in-distribution positive; tied scores averaged over every order",
            "aupr_out": "outliers positive; tied scores averaged over every order",
            "fpr_at_95_tpr": "in-distribution positive: share of outliers accepted at the threshold that keeps 95% of in-distribution vectors",
            "detection_error": "min over thresholds of 0.5 (1 - TPR) + 0.5 FPR",
            "ci95": format!("percentile bootstrap, {} resamples of both sets, seed {}", o.bootstrap, o.seed),
        },
        "skipped": e.notes,
        "decision": e.decision.as_ref().map(|d| serde_json::json!({
            "source": d.source,
            "false_alarm": d.false_alarm,
            "detection": d.detection.iter().map(|(n, r)| (n.clone(), serde_json::json!(r))).collect::<serde_json::Map<_, _>>(),
        })),
        "sets": e.results.iter().map(|(name, per_column)| {
            let scores: serde_json::Map<String, serde_json::Value> = per_column
                .iter()
                .map(|(c, est)| (c.clone(), estimates_json(est)))
                .collect();
            let rows = e.ood.iter().find(|(n, _)| n == name).and_then(|(_, t)| t.values.first()).map_or(0, Vec::len);
            (name.clone(), serde_json::json!({ "rows": rows, "scores": scores }))
        }).collect::<serde_json::Map<_, _>>(),
        "in_distribution_rows": e.id.values.first().map_or(0, Vec::len),
    })
}

fn estimates_json(est: &[(String, Estimate)]) -> serde_json::Value {
    est.iter()
        .map(|(m, e)| (m.clone(), serde_json::json!({ "value": e.value, "ci95": e.ci95 })))
        .collect::<serde_json::Map<_, _>>()
        .into()
}

/// A readable table of the results (AUROC with its interval, then the
/// rest), then the decision rates.
pub fn table(e: &Evaluated) -> String {
    let results = &e.results;
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
    if let Some(d) = &e.decision {
        s.push_str(&format!(
            "Decision ({}): {} of {} in-distribution vectors flagged ({:.2}%)",
            d.source,
            d.false_alarm.flagged,
            d.false_alarm.rows,
            100.0 * d.false_alarm.share()
        ));
        for (set, r) in &d.detection {
            s.push_str(&format!("; {set} {} of {} ({:.1}%)", r.flagged, r.rows, 100.0 * r.share()));
        }
        s.push('\n');
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    /// NaN scores (refused by the readers) must still not stall the tie
    /// loops: NaN counts as one more distinct value.
    #[test]
    fn nan_scores_end_the_tie_loops() {
        let curve = roc_curve(&[1.0, f64::NAN], &[f64::NAN, 2.0]);
        assert_eq!(curve.len(), 4, "start plus three distinct values");
        assert_eq!(curve.last().map(|p| (p.0, p.1)), Some((1.0, 1.0)));
        assert!(auroc(&[1.0, f64::NAN], &[f64::NAN, 2.0]).is_finite());
    }

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
