//! Scores and the decisions above them, run as a user would: rows with NaN
//! or infinite values (`score --bad-rows`), a calibrated and an
//! uncalibrated score file evaluated together, decision columns read as
//! decisions, and option errors that name the flag and suggest a name.

mod common;

use assert_cmd::Command;
use std::path::Path;
use tidemark::data::{Dataset, Matrix};

fn tidemark() -> Command {
    let mut c = Command::new(common::bin());
    c.env("CANDLE_NUM_THREADS", "1");
    c
}

use common::wavy as data;

fn stderr_of(out: &assert_cmd::assert::Assert) -> String {
    String::from_utf8_lossy(&out.get_output().stderr).to_string()
}

fn fit(dir: &Path) -> String {
    let train = dir.join("train.npy");
    common::save(&train, &data(600, 0.0));
    let model = dir.join("model.safetensors");
    tidemark()
        .args(["fit", train.to_str().unwrap(), "-o", model.to_str().unwrap(), "--epochs", "3", "-q"])
        .assert()
        .success();
    model.to_str().unwrap().to_string()
}

#[test]
fn bad_rows_are_an_error_a_flag_or_skipped_and_counted() {
    let dir = tempfile::tempdir().unwrap();
    let m = fit(dir.path());
    let clean = data(40, 0.2);
    let mut dirty = clean.clone();
    dirty.data[3 * 4 + 2] = f32::NAN;
    dirty.data[7 * 4] = f32::INFINITY;
    let (c, d) = (dir.path().join("clean.npy"), dir.path().join("dirty.npy"));
    common::save(&c, &clean);
    common::save(&d, &dirty);
    let p = |n: &str| dir.path().join(n).to_str().unwrap().to_string();
    let d = d.to_str().unwrap();

    // Default: refused, naming file, row and column, and nothing written.
    let out = tidemark().args(["score", &m, d, "-o", &p("e.csv")]).assert().failure();
    let err = stderr_of(&out);
    assert!(err.contains("dirty.npy: row 3, column 2 (0-based) is NaN") && err.contains("--bad-rows"), "{err}");
    assert!(!Path::new(&p("e.csv")).exists());

    tidemark().args(["score", &m, c.to_str().unwrap(), "-o", &p("clean.csv")]).assert().success();
    let want = std::fs::read_to_string(p("clean.csv")).unwrap();
    let want: Vec<&str> = want.lines().collect();

    // flag, CSV: every row, empty score cells and a reason for the bad ones.
    let out = tidemark().args(["score", &m, d, "-o", &p("f.csv"), "--bad-rows", "flag"]).assert().success();
    assert!(stderr_of(&out).contains("38 rows scored, 2 bad rows written"), "{}", stderr_of(&out));
    let got = std::fs::read_to_string(p("f.csv")).unwrap();
    let got: Vec<&str> = got.lines().collect();
    assert_eq!(got.len(), 41);
    assert_eq!(got[0], format!("{},bad_row", want[0]));
    let cells = want[0].split(',').count();
    for r in 0..40 {
        match r {
            3 => assert_eq!(got[r + 1], format!("{}NaN in column 2", ",".repeat(cells))),
            7 => assert_eq!(got[r + 1], format!("{}infinite in column 0", ",".repeat(cells))),
            _ => assert_eq!(got[r + 1], format!("{},", want[r + 1]), "row {r}"),
        }
    }

    // flag, .npy: NaN scores, a 0/1 bad_row column, reasons in the sidecar.
    tidemark().args(["score", &m, d, "-o", &p("f.npy"), "--bad-rows", "flag"]).assert().success();
    let npy = Dataset::open_unchecked(Path::new(&p("f.npy")), None).unwrap().to_matrix();
    assert_eq!((npy.rows, npy.cols), (40, cells + 1));
    assert!(npy.row(3)[..cells].iter().all(|v| v.is_nan()) && npy.row(3)[cells] == 1.0);
    assert!(npy.row(4).iter().all(|v| v.is_finite()) && npy.row(4)[cells] == 0.0);
    let sidecar: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(p("f.json")).unwrap()).unwrap();
    assert_eq!(sidecar["bad_rows"][1]["row"], 7);
    assert_eq!(sidecar["bad_rows"][1]["reason"], "infinite in column 0");

    // flag, JSON lines: null scores and the reason.
    tidemark().args(["score", &m, d, "-o", &p("f.jsonl"), "--bad-rows", "flag"]).assert().success();
    let lines: Vec<serde_json::Value> =
        std::fs::read_to_string(p("f.jsonl")).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert!(lines[3]["log_likelihood"].is_null() && lines[3]["bad_row"] == "NaN in column 2");
    assert!(lines[2]["log_likelihood"].is_number() && lines[2]["bad_row"].is_null());

    // skip: the good rows only, identical to scoring them alone.
    let out = tidemark().args(["score", &m, d, "-o", &p("s.csv"), "--bad-rows", "skip"]).assert().success();
    assert!(stderr_of(&out).contains("38 rows scored, 2 bad rows skipped"), "{}", stderr_of(&out));
    let got = std::fs::read_to_string(p("s.csv")).unwrap();
    let kept: Vec<&str> = want.iter().enumerate().filter(|(i, _)| *i != 4 && *i != 8).map(|(_, l)| *l).collect();
    assert_eq!(got.lines().collect::<Vec<_>>(), kept);

    // evaluate reads flagged files in every format as the skipped rows alone.
    let eval = |id: &str| {
        let out = tidemark()
            .args(["evaluate", "--id", &p(id), "--ood", &format!("clean={}", p("clean.csv")), "--bootstrap", "10"])
            .args(["--columns", "log_likelihood", "-o", &p(&format!("{id}.results.json"))])
            .assert()
            .success();
        let doc: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(p(&format!("{id}.results.json"))).unwrap()).unwrap();
        (
            doc["in_distribution_rows"].as_u64().unwrap(),
            doc["sets"]["clean"]["scores"]["log_likelihood"]["auroc"]["value"].clone(),
            out,
        )
    };
    for ext in ["csv", "npy", "jsonl"] {
        let skipped = p(&format!("s2.{ext}"));
        tidemark().args(["score", &m, d, "-o", &skipped, "--bad-rows", "skip"]).assert().success();
        let (rows, auroc, _) = eval(&format!("s2.{ext}"));
        assert_eq!(rows, 38);
        let (r, a, _) = eval(&format!("f.{ext}"));
        assert_eq!((r, &a), (38, &auroc), "{ext}");
    }
}

#[test]
fn calibrated_and_uncalibrated_scores_evaluate_together_with_decision_rates() {
    let dir = tempfile::tempdir().unwrap();
    let m = fit(dir.path());
    let p = |n: &str| dir.path().join(n).to_str().unwrap().to_string();
    common::save(Path::new(&p("cal.npy")), &data(300, 0.05));
    common::save(Path::new(&p("held.npy")), &data(300, 0.1));
    common::save(Path::new(&p("far.npy")), &data(200, 2.0));
    let out = tidemark()
        .args(["calibrate", &m, &p("cal.npy"), "-o", &p("cal.json"), "--false-alarm", "0.1", "--score", "typicality"])
        .assert()
        .success();
    assert!(stderr_of(&out).contains("typicality"), "{}", stderr_of(&out));
    // The in-distribution file calibrated, the outliers not.
    let out = tidemark()
        .args(["score", &m, &p("held.npy"), "-o", &p("held.csv"), "--calibration", &p("cal.json")])
        .assert()
        .success();
    let line = stderr_of(&out);
    let flagged = common::column(&std::fs::read_to_string(p("held.csv")).unwrap(), "flagged");
    let count = flagged.iter().filter(|&&f| f == 1.0).count();
    assert!(line.contains(&format!("; {count} flagged (")), "{line}");
    tidemark().args(["score", &m, &p("far.npy"), "-o", &p("far.csv")]).assert().success();
    let out = tidemark()
        .args(["evaluate", "--id", &p("held.csv"), "--ood", &format!("far={}", p("far.csv")), "--bootstrap", "50"])
        .args(["--calibration", &p("cal.json"), "-o", &p("results.json")])
        .assert()
        .success();
    let (table, notes) = (String::from_utf8_lossy(&out.get_output().stdout).to_string(), stderr_of(&out));
    // dead_feature_deviation is 0 everywhere here: one line, no ranking.
    assert!(notes.contains("skipped dead_feature_deviation: it is 0 in every file"), "{notes}");
    for not_ranked in ["p_value", "flagged", "dead_feature_deviation"] {
        assert!(!table.lines().any(|l| l.split_whitespace().nth(1) == Some(not_ranked)), "{table}");
    }
    assert!(table.contains("typicality"), "{table}");
    // The decision: the calibration's threshold applied to typicality in each file.
    let doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(p("results.json")).unwrap()).unwrap();
    assert_eq!(doc["decision"]["false_alarm"]["flagged"], count);
    assert_eq!(doc["decision"]["false_alarm"]["rows"], 300);
    let far = &doc["decision"]["detection"]["far"];
    assert!(far["flagged"].as_u64().unwrap() > 150 && far["rows"] == 200, "{far}");
    assert!(table.contains(&format!("Decision (calibration of typicality at false-alarm rate 0.1): {count} of 300")));
    // The report: summary, then the decision, then details; readable labels;
    // the far set's values beyond the robust range counted, not drawn.
    tidemark()
        .args(["evaluate", "--id", &p("held.csv"), "--ood", &format!("far={}", p("far.csv")), "--bootstrap", "20"])
        .args(["--calibration", &p("cal.json"), "--report", &p("report.html")])
        .assert()
        .success();
    let html = std::fs::read_to_string(p("report.html")).unwrap();
    let at = |s: &str| html.find(s).unwrap_or_else(|| panic!("report lacks {s}"));
    assert!(at("Summary: AUROC") < at("Calibrated decision") && at("Calibrated decision") < at("Details per score"));
    assert!(html.contains(&format!("{count} of 300")) && html.contains("FPR at 95% TPR"), "decision and labels");
    assert!(!html.contains("fpr_at_95_tpr") && html.contains("&#9733; best"));
    assert!(html.contains("Outside the plotted range"), "overflow note");
    // Asking to rank a decision is refused with the reason.
    let out = tidemark()
        .args(["evaluate", "--id", &p("held.csv"), "--ood", &format!("far={}", p("far.csv")), "--columns", "flagged"])
        .assert()
        .failure();
    assert!(stderr_of(&out).contains("'flagged' is a decision, not a score"), "{}", stderr_of(&out));
}

#[test]
fn option_errors_name_the_flag_and_suggest_the_nearest_name() {
    let dir = tempfile::tempdir().unwrap();
    let m = fit(dir.path());
    let p = |n: &str| dir.path().join(n).to_str().unwrap().to_string();
    common::save(Path::new(&p("held.npy")), &data(300, 0.1));
    let err = |args: &[&str]| stderr_of(&tidemark().args(args).assert().failure());
    let e =
        err(&["calibrate", &m, &p("held.npy"), "-o", &p("c.json"), "--false-alarm", "0.1", "--score", "typicallity"]);
    assert!(e.contains("--score: this model has no score 'typicallity'; did you mean 'typicality'?"), "{e}");
    let e = err(&["calibrate", &m, &p("held.npy"), "-o", &p("c.json"), "--false-alarm", "0.1", "--score", "log_det2"]);
    assert!(e.contains("did you mean 'log_det'?"), "{e}");
    let e = err(&["score", &m, &p("held.npy"), "-o", &p("s.csv"), "--columns", "log_likelihood,mahalanobis"]);
    assert!(e.contains("--columns: this model has no column 'mahalanobis'; did you mean 'mahalanobis_sq'?"), "{e}");
    tidemark().args(["score", &m, &p("held.npy"), "-o", &p("s.csv")]).assert().success();
    let e = err(&["evaluate", "--id", &p("s.csv"), "--ood", &format!("x={}", p("s.csv")), "--columns", "typicalty"]);
    assert!(
        e.contains("--columns: 'typicalty' is not a score column") && e.contains("did you mean 'typicality'?"),
        "{e}"
    );
    // Far from every name: no guess.
    let e = err(&["score", &m, &p("held.npy"), "-o", &p("s2.csv"), "--columns", "zzz"]);
    assert!(e.contains("no column 'zzz' (it has:"), "{e}");
}

#[test]
fn split_writes_three_files_that_hold_every_row_once() {
    let dir = tempfile::tempdir().unwrap();
    let all = data(101, 0.0);
    let src = dir.path().join("all.npy");
    common::save(&src, &all);
    let prefix = dir.path().join("part");
    let read = |name: &str| Dataset::open(&dir.path().join(format!("part.{name}.npy")), None).unwrap().to_matrix();
    let out = tidemark()
        .args(["split", src.to_str().unwrap(), "--fractions", "0.8,0.1,0.1", "--seed", "3", "-o"])
        .arg(&prefix)
        .assert()
        .success();
    assert!(stderr_of(&out).contains("part.calibration.npy (10 rows)"), "{}", stderr_of(&out));
    let parts: Vec<Matrix> = ["train", "calibration", "test"].iter().map(|n| read(n)).collect();
    assert_eq!(parts.iter().map(|m| m.rows).collect::<Vec<_>>(), vec![81, 10, 10]);
    let mut rows: Vec<Vec<u32>> =
        parts.iter().flat_map(|m| (0..m.rows).map(|r| m.row(r).iter().map(|v| v.to_bits()).collect())).collect();
    let mut want: Vec<Vec<u32>> = (0..101).map(|r| all.row(r).iter().map(|v| v.to_bits()).collect()).collect();
    rows.sort();
    want.sort();
    assert_eq!(rows, want);
    // --ordered: by position, the last rows are the test file.
    tidemark().args(["split", src.to_str().unwrap(), "--ordered", "-o"]).arg(&prefix).assert().success();
    assert_eq!(read("test").row(9), all.row(100));
    let out = tidemark()
        .args(["split", src.to_str().unwrap(), "--fractions", "0.8,0.3", "-o"])
        .arg(&prefix)
        .assert()
        .failure();
    assert!(stderr_of(&out).contains("--fractions: give three shares"), "{}", stderr_of(&out));
}
