//! `tidemark demo`: the whole job on the shipped demo data — fit a
//! class-conditional density, calibrate thresholds at a 1% false-alarm rate on
//! held-out normal vectors, score every set, evaluate every score against
//! every outlier set, write the report, and show which score catches which
//! kind of outlier.

use crate::calibrate::{calibrate, Calibration};
use crate::data::{check_label_count, read_labels, Dataset};
use crate::error::{Error, Result};
use crate::evaluate::{self, EvaluateOptions, Results};
use crate::model::{Evaluation, Model};
use crate::report::{write_report, ReportInput};
use crate::score::{score_to_file, BadRows, BatchRule, ScoreOptions, Scorer};
use crate::train::{fit_run, read_log, FitOptions, Run};
use std::path::{Path, PathBuf};

/// A line of the demo's account on standard output; a closed pipe (`| head`)
/// ends the demo as a broken-pipe error, which the binary treats as success.
macro_rules! say {
    ($($t:tt)*) => { crate::output::print(format!("{}\n", format_args!($($t)*)))? };
}

/// Part of a line of the account.
macro_rules! say_part {
    ($($t:tt)*) => { crate::output::print(format_args!($($t)*))? };
}

/// Outlier sets, in the order the summary lists them.
const OUTLIERS: [&str; 3] = ["unseen_model", "stuck_sensor", "drifted"];
/// Scores compared in the summary; the first is calibrated into the score files.
const SHOWN: [&str; 4] = ["multi_statistic", "log_likelihood", "typicality", "mahalanobis_sq"];
/// False-alarm rate of the calibrated thresholds and the batch test.
const FALSE_ALARM: f64 = 0.01;
/// Vectors per batch in the batch typicality test.
const BATCH: usize = 25;

pub fn run(data_dir: &Path, out_dir: &Path, threads: usize) -> Result<()> {
    let file = |name: &str| data_dir.join(format!("{name}.npy"));
    if !file("train").exists() {
        return Err(Error::Invalid(format!(
            "demo data not found in {} (run from the repository root, or pass --data-dir)",
            data_dir.display()
        )));
    }
    std::fs::create_dir_all(out_dir).map_err(|source| Error::Io { path: out_dir.to_path_buf(), source })?;
    let out = |name: &str| out_dir.join(name);

    // 1. Fit.
    let x = Dataset::open(&file("train"), None)?;
    let labels_path = file("train_labels");
    let labels = read_labels(&labels_path)?;
    check_label_count(&labels_path, labels.len(), x.rows)?;
    say!(
        "1. fitting a class-conditional density to {} ({} vectors x {} features): class-Gaussian and flow compared on validation rows",
        file("train").display(),
        x.rows,
        x.cols
    );
    let log_path = out("train_log.jsonl");
    let run = Run { labels: Some(&labels), log: Some(&log_path), ..Run::new(&x) };
    let model = fit_run(&run, &FitOptions { threads: Some(threads), quiet: true, ..FitOptions::default() })?;
    let model_path = out("model.safetensors");
    model.save(&model_path)?;
    say!("   {}", model.meta.fit_summary(&model_path));

    // 2. Calibrate every shown score at the false-alarm rate.
    let cal_data = Dataset::open(&file("calibration"), None)?;
    let mut calibrations = Vec::new();
    for score in SHOWN {
        let (cal, _) = calibrate(&model, &cal_data, score, FALSE_ALARM, threads)?;
        cal.save(&out(&format!("calibration_{score}.json")))?;
        calibrations.push(cal);
    }
    say!(
        "2. calibrated {} thresholds at a {:.0}% false-alarm rate on {} ({} vectors): {}",
        SHOWN.len(),
        100.0 * FALSE_ALARM,
        file("calibration").display(),
        cal_data.rows,
        out("calibration_*.json").display()
    );

    // 3. Score every set (with p-values for the first shown score).
    let scorer = Scorer::new(&model, None);
    let mut rows = Vec::new();
    for set in std::iter::once("heldout").chain(OUTLIERS) {
        let data = Dataset::open(&file(set), None)?;
        model.check_width(&file(set), data.cols)?;
        let scores = out(&format!("scores_{set}.csv"));
        let opts = ScoreOptions {
            columns: vec![],
            threads,
            batch: None,
            decision: Some(&calibrations[0]),
            bad_rows: BadRows::Error,
        };
        score_to_file(&model, &data, &scores, &opts)?;
        let e = model.evaluate(&data, threads);
        rows.push((set, flagged_shares(&scorer, &calibrations, &e), batch_flags(&model, &e)));
    }
    say!("3. scored every set: {}", out("scores_*.csv").display());

    // 4. Evaluate and report.
    let ood: Vec<(String, PathBuf)> =
        OUTLIERS.iter().map(|s| (s.to_string(), out(&format!("scores_{s}.csv")))).collect();
    let log = read_log(&log_path)?;
    let columns: Vec<String> = SHOWN.iter().map(|s| s.to_string()).collect();
    let evaluated = evaluate::run(&EvaluateOptions {
        id: &out("scores_heldout.csv"),
        ood: &ood,
        columns: &columns,
        bootstrap: 500,
        seed: 0,
        output: Some(&out("evaluation.json")),
        calibration: Some(&calibrations[0]),
    })?;
    let report = ReportInput { evaluated: &evaluated, calibration: Some(&calibrations[0]), log: Some(&log) };
    write_report(&out("report.html"), &report)?;
    say!(
        "4. evaluated against held-out normal vectors: {} and {}\n",
        out("evaluation.json").display(),
        out("report.html").display()
    );
    print_summary(&rows, &evaluated.results)
}

/// Share of a set's vectors flagged by each calibrated score.
fn flagged_shares(scorer: &Scorer, cals: &[Calibration], e: &Evaluation) -> Vec<f64> {
    let rows = e.log_likelihood.len();
    cals.iter()
        .map(|c| (0..rows).filter(|&r| c.flagged(scorer.value(e, &c.score, r))).count() as f64 / rows as f64)
        .collect()
}

/// (flagged, total) batches of the batch typicality test.
fn batch_flags(model: &Model, e: &Evaluation) -> (usize, usize) {
    let nll: Vec<f64> = e.log_likelihood.iter().map(|v| -v).collect();
    let rule = BatchRule::new(model, BATCH, FALSE_ALARM);
    let flags: Vec<bool> = nll.chunks(BATCH).map(|b| rule.flags(b.iter().sum::<f64>() / b.len() as f64)).collect();
    (flags.iter().filter(|&&f| f).count(), flags.len())
}

fn print_summary(rows: &[(&str, Vec<f64>, (usize, usize))], results: &Results) -> Result<()> {
    say!(
        "Share of each set flagged at the calibrated {:.0}% false-alarm thresholds, with AUROC against held-out\n\
         normal vectors in brackets (1 = perfect, 0.5 = chance, below 0.5 = looks *more* normal than normal):\n",
        100.0 * FALSE_ALARM
    );
    say_part!("{:<14}", "set");
    for s in SHOWN {
        say_part!("{s:>22}");
    }
    say!("{:>22}", format!("batches of {BATCH} flagged"));
    for (set, shares, (flagged, batches)) in rows {
        say_part!("{set:<14}");
        for (score, share) in SHOWN.iter().zip(shares) {
            let auroc = results
                .iter()
                .find(|(s, _)| s == set)
                .and_then(|(_, cols)| cols.iter().find(|(c, _)| c == score))
                .and_then(|(_, est)| est.iter().find(|(m, _)| m == "auroc"))
                .map(|(_, e)| format!(" ({:.3})", e.value))
                .unwrap_or_default();
            say_part!("{:>22}", format!("{:.1}%{auroc}", 100.0 * share));
        }
        say!("{:>22}", format!("{flagged}/{batches}"));
    }
    say!(
        "\nThe stuck-sensor vectors get a *higher* likelihood than normal data: a likelihood threshold misses them\n\
         (AUROC near 0), and so does the one-sided latent distance. Typicality and the multi-statistic score rank them\n\
         as unusual (AUROC above 0.9) though not past a 1% threshold one vector at a time; the batch typicality test,\n\
         which pools 25 vectors, flags every batch of them. These thresholds come from the demo's own held-out data;\n\
         validate any threshold on your own data before it drives a decision."
    );
    Ok(())
}
