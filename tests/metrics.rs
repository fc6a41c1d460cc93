//! Detection metrics against scikit-learn (roc_auc_score,
//! average_precision_score, roc_curve) and scipy (mannwhitneyu) on a
//! committed fixture with ties (scripts/make_fixtures.py; versions in
//! tests/fixtures/expected.json).

mod common;

use assert_cmd::Command;
use std::path::PathBuf;
use tidemark::evaluate::{auroc, average_precision, roc_curve, with_intervals, Metrics};

fn metrics() -> serde_json::Value {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/expected.json");
    let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    v["metrics"].clone()
}

#[test]
fn auroc_average_precision_and_roc_curve_equal_scikit_learn() {
    let m = metrics();
    let (id, ood) = (common::floats(&m["id"]), common::floats(&m["ood"]));
    let close = |a: f64, b: f64| (a - b).abs() < 1e-12;
    assert!(close(auroc(&id, &ood), m["roc_auc_score"].as_f64().unwrap()));
    // AUROC = U / (n_in n_out), scipy.stats.mannwhitneyu.
    assert!(close(auroc(&id, &ood), m["mannwhitney_u_over_n1n2"].as_f64().unwrap()));
    let curve = roc_curve(&id, &ood);
    let (fpr, tpr, thr) =
        (common::floats(&m["roc_fpr"]), common::floats(&m["roc_tpr"]), common::floats(&m["roc_thresholds"]));
    assert_eq!(curve.len(), fpr.len());
    for (i, p) in curve.iter().enumerate() {
        assert!(close(p.0, fpr[i]) && close(p.1, tpr[i]), "point {i}: {p:?} vs ({}, {})", fpr[i], tpr[i]);
        if i > 0 {
            assert!(close(p.2, thr[i - 1]));
        }
    }
    // The summary metrics use the same curve; AUPR-In and AUROC agree too.
    let all = Metrics::of(&id, &ood);
    assert!(close(all.auroc, m["roc_auc_score"].as_f64().unwrap()));
}

fn tie_cases() -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(common::fixture("metric_ties.json")).unwrap()).unwrap()
}

/// Average precision on heavily tied scores is scikit-learn's
/// average_precision_score averaged over every ordering of the tied scores
/// (enumerated for the small case, Monte Carlo for the others, within four
/// standard errors), and equals it without ties; AUROC equals
/// roc_auc_score on the same ties (scripts/make_metric_fixtures.py).
#[test]
fn average_precision_with_ties_is_scikit_learn_over_every_ordering() {
    let cases = tie_cases();
    let neg = |v: &[f64]| v.iter().map(|x| -x).collect::<Vec<_>>();
    for name in ["small", "stuck", "rounded", "untied"] {
        let c = &cases[name];
        let (id, ood) = (common::floats(&c["id"]), common::floats(&c["ood"]));
        let check = |what: &str, got: f64, want: &serde_json::Value| {
            let (v, se) = (want["value"].as_f64().unwrap(), want["std_error"].as_f64().unwrap());
            assert!((got - v).abs() <= 1e-12 + 4.0 * se, "{name} {what}: {got} vs {v} (standard error {se})");
        };
        check("AP, outliers positive", average_precision(&id, &ood), &c["ap_out"]);
        check("AP, in-distribution positive", average_precision(&neg(&ood), &neg(&id)), &c["ap_in"]);
        let m = Metrics::of(&id, &ood);
        check("AUPR-In", m.aupr_in, &c["ap_in"]);
        check("AUPR-Out", m.aupr_out, &c["ap_out"]);
        let want = c["roc_auc_score"].as_f64().unwrap();
        assert!((m.auroc - want).abs() < 1e-12, "{name} AUROC {} vs {want}", m.auroc);
    }
}

/// Bootstrap resamples repeat rows; every interval must still contain its
/// point estimate on tied data shaped like the demo's stuck sensor (one
/// tied value below every in-distribution score, so AUROC is 0 and the
/// curves barely move between resamples), in both orientations.
#[test]
fn every_bootstrap_interval_contains_its_estimate_on_tied_data() {
    let cases = tie_cases();
    for name in ["stuck", "rounded", "small"] {
        let c = &cases[name];
        let (id, ood) = (common::floats(&c["id"]), common::floats(&c["ood"]));
        for (a, b) in [(&id, &ood), (&ood, &id)] {
            for (metric, e) in with_intervals(a, b, 400, 3) {
                assert!(
                    e.ci95[0] <= e.value && e.value <= e.ci95[1],
                    "{name} {metric}: {} outside [{}, {}]",
                    e.value,
                    e.ci95[0],
                    e.ci95[1]
                );
            }
        }
    }
}

/// FPR at 95% TPR and detection error by their definitions on a small case
/// worked by hand: in-distribution anomaly values 1..=20, outliers 15..=24.
/// Keeping 95% of in-distribution vectors (19 of 20) needs the threshold at
/// 19, which accepts the 5 outliers 15..=19: FPR 0.5. The best threshold for
/// 0.5 (1 - TPR) + 0.5 FPR accepts up to 14: 0.5 * 6/20 + 0 = 0.15.
#[test]
fn fpr_at_95_tpr_and_detection_error_by_hand() {
    let id: Vec<f64> = (1..=20).map(f64::from).collect();
    let ood: Vec<f64> = (15..=24).map(f64::from).collect();
    let m = Metrics::of(&id, &ood);
    assert!((m.fpr_at_95_tpr - 0.5).abs() < 1e-12, "{}", m.fpr_at_95_tpr);
    assert!((m.detection_error - 0.15).abs() < 1e-12, "{}", m.detection_error);
}

#[test]
fn evaluate_refuses_mismatched_or_missing_columns() {
    let dir = tempfile::tempdir().unwrap();
    let write = |name: &str, text: &str| {
        let p = dir.path().join(name);
        std::fs::write(&p, text).unwrap();
        p.to_str().unwrap().to_string()
    };
    let id = write("id.csv", "log_likelihood,typicality\n1.0,0.1\n2.0,0.2\n1.5,0.3\n");
    let ood = write("ood.csv", "log_likelihood\n-1.0\n-2.0\n");
    let ood_arg = format!("x={ood}");
    let refused = |extra: &[&str], message: &str| {
        let out = Command::new(common::bin())
            .args(["evaluate", "--id", &id, "--ood", &ood_arg])
            .args(extra)
            .assert()
            .failure();
        let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
        assert!(err.contains(message), "{err}");
    };
    refused(&[], "ood.csv: has no score column 'typicality' that");
    refused(&[], "evaluate the shared ones with --columns log_likelihood");
    refused(&["--columns", "nope"], "--columns: 'nope' is not a score column");
    let ok = Command::cargo_bin("tidemark")
        .unwrap()
        .args([
            "evaluate",
            "--id",
            &id,
            "--ood",
            &format!("x={ood}"),
            "--columns",
            "log_likelihood",
            "--bootstrap",
            "50",
        ])
        .assert()
        .success();
    let table = String::from_utf8_lossy(&ok.get_output().stdout).to_string();
    assert!(table.contains("log_likelihood") && table.contains("1.0000 [1.0000, 1.0000]"), "{table}");
}
