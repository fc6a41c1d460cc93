//! The binary, run as a user would: fit, score, inspect, sample, and every
//! kind of bad input (one clear line, non-zero exit, no output file).

mod common;

use assert_cmd::Command;
use common::{column, mean};
use std::path::{Path, PathBuf};
use tidemark::data::Matrix;

fn tidemark() -> Command {
    Command::new(common::bin())
}

#[test]
fn fit_score_inspect_sample_end_to_end() {
    let dir = tempfile::tempdir().unwrap();
    let (train, shifted) = (dir.path().join("train.npy"), dir.path().join("shifted.npy"));
    common::save(&train, &common::wavy(800, 0.0));
    common::save(&shifted, &common::wavy(200, 1.5));
    let model = dir.path().join("model.safetensors");
    tidemark()
        .args(["fit", train.to_str().unwrap(), "-o", model.to_str().unwrap(), "--epochs", "8", "--seed", "4"])
        .assert()
        .success();

    let scores = dir.path().join("scores.csv");
    tidemark()
        .args(["score", model.to_str().unwrap(), train.to_str().unwrap(), "-o", scores.to_str().unwrap()])
        .assert()
        .success();
    let csv = std::fs::read_to_string(&scores).unwrap();
    assert_eq!(
        csv.lines().next().unwrap(),
        "log_likelihood,bits_per_dim,base_log_density,log_det,latent_norm,mahalanobis_sq,typicality,multi_statistic,dead_feature_deviation"
    );
    let ll_train = column(&csv, "log_likelihood");
    assert_eq!(ll_train.len(), 800);
    // bits per dimension = -log_likelihood / (D ln 2)
    for (ll, bpd) in ll_train.iter().zip(column(&csv, "bits_per_dim")) {
        assert!((bpd + ll / (4.0 * std::f64::consts::LN_2)).abs() < 1e-9);
    }
    let out =
        tidemark().args(["score", model.to_str().unwrap(), shifted.to_str().unwrap(), "-o", "-"]).assert().success();
    let ll_shifted = column(&String::from_utf8(out.get_output().stdout.clone()).unwrap(), "log_likelihood");
    assert_eq!(ll_shifted.len(), 200);
    assert!(mean(&ll_train) > mean(&ll_shifted) + 1.0, "{} vs {}", mean(&ll_train), mean(&ll_shifted));

    let out = tidemark().args(["inspect", model.to_str().unwrap()]).assert().success();
    let text = String::from_utf8(out.get_output().stdout.clone()).unwrap();
    assert!(text.contains("validation NLL") && text.contains("input features              4"), "{text}");

    let samples = dir.path().join("samples.npy");
    tidemark()
        .args(["sample", model.to_str().unwrap(), "-n", "50", "-o", samples.to_str().unwrap()])
        .assert()
        .success();
    let s = tidemark::data::read_matrix(&samples, None).unwrap();
    assert_eq!((s.rows, s.cols), (50, 4));
}

#[test]
fn same_seed_same_threads_gives_an_identical_model_file() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(400, 0.0));
    let fit = |name: &str| {
        let model = dir.path().join(name);
        tidemark()
            .args([
                "fit",
                train.to_str().unwrap(),
                "-o",
                model.to_str().unwrap(),
                "--epochs",
                "3",
                "--threads",
                "2",
                "-q",
            ])
            .assert()
            .success();
        std::fs::read(model).unwrap()
    };
    let (a, b) = (fit("a.safetensors"), fit("b.safetensors"));
    assert!(a == b, "the two model files differ");
}

/// Runs `args`, expects failure with `message` on stderr in one line, and no
/// file at `output` nor any temporary file beside it.
fn refuses(args: &[&str], message: &str, output: &Path) {
    let out = tidemark().args(args).assert().failure();
    let stderr = String::from_utf8(out.get_output().stderr.clone()).unwrap();
    assert!(stderr.contains(message), "expected '{message}' in: {stderr}");
    assert_eq!(stderr.trim_end().lines().count(), 1, "one line: {stderr}");
    assert!(!output.exists(), "{} was left behind", output.display());
    let dir = output.parent().unwrap();
    let leftovers: Vec<_> = std::fs::read_dir(dir)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".tmp"))
        .collect();
    assert!(leftovers.is_empty());
}

#[test]
fn bad_inputs_fail_with_one_clear_line_and_no_output() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("model.safetensors");
    let o = out.to_str().unwrap();
    let f = |name: &str| common::fixture(name).to_str().unwrap().to_string();
    let cases: Vec<(Vec<String>, &str)> = vec![
        (vec![f("with_nan.npy")], "row 2, column 1 (0-based) is NaN"),
        (vec![f("with_inf.npy")], "row 3, column 0 (0-based) is infinite"),
        (vec![f("zero_rows.npy")], "zero_rows.npy: has zero rows"),
        (vec![f("one_d.npy")], "expected a 2-D array (rows x features), found 1-D shape [5]"),
        (vec![f("three_d.npy")], "found 3-D shape [2, 3, 4]"),
        (vec![f("complex.npy")], "unsupported dtype '<c8'"),
        (vec![f("truncated.npy")], "truncated: shape [4, 3] needs 48 data bytes, file has 38"),
        (vec![f("bad_cell.csv")], "bad_cell.csv: line 3, column 2 ('f1'): 'abc' is not a number"),
        (vec![f("several.safetensors")], "holds several tensors; choose one with --tensor: embeddings, other"),
        (
            vec![f("several.safetensors"), "--tensor".into(), "nope".into()],
            "has no tensor 'nope' (it has: embeddings, other)",
        ),
        (vec![f("one_d.safetensors")], "tensor 'x' is 1-D [12]; expected 2-D"),
        (vec![f("small_f32.npy")], "need at least 10 rows to fit, got 4"),
        (
            vec![f("whitening.npy"), "--labels".into(), f("labels_i32.npy")],
            "labels_i32.npy: has 4 labels but the data has 300 rows",
        ),
        (vec![f("missing.npy")], "missing.npy: cannot open"),
        (vec![f("expected.json")], "unsupported file type '.json'"),
    ];
    for (extra, message) in cases {
        let mut args = vec!["fit".to_string()];
        args.extend(extra);
        args.extend(["-o".to_string(), o.to_string(), "-q".to_string()]);
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        refuses(&args, message, &out);
    }
}

/// An output in a directory that does not exist is refused before any
/// training, whether it is the model, the checkpoint or the log.
#[test]
fn outputs_in_missing_directories_are_refused_before_training() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(200, 0.0));
    let (t, missing) = (train.to_str().unwrap(), dir.path().join("no_such_dir"));
    let model = dir.path().join("model.safetensors");
    for flag in ["-o", "--checkpoint", "--log"] {
        let target = missing.join("file");
        let mut args = vec!["fit", t, "--epochs", "3"];
        if flag != "-o" {
            args.extend(["-o", model.to_str().unwrap()]);
        }
        args.extend([flag, target.to_str().unwrap()]);
        let out = tidemark().args(&args).assert().failure();
        let stderr = String::from_utf8(out.get_output().stderr.clone()).unwrap();
        let want = format!("directory {} does not exist", missing.display());
        assert!(stderr.contains(&want), "{flag}: expected '{want}' in: {stderr}");
        assert!(!stderr.contains("epoch"), "{flag}: trained before refusing: {stderr}");
        assert!(!model.exists() && !missing.exists());
    }
}

#[test]
fn scoring_data_of_the_wrong_width_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(300, 0.0));
    let model = dir.path().join("model.safetensors");
    tidemark()
        .args(["fit", train.to_str().unwrap(), "-o", model.to_str().unwrap(), "--epochs", "1", "-q"])
        .assert()
        .success();
    let scores = dir.path().join("scores.csv");
    refuses(
        &[
            "score",
            model.to_str().unwrap(),
            common::fixture("small_f32.npy").to_str().unwrap(),
            "-o",
            scores.to_str().unwrap(),
        ],
        "small_f32.npy: has 3 features per row but the model was fitted on 4",
        &scores,
    );
    refuses(
        &["score", train.to_str().unwrap(), train.to_str().unwrap(), "-o", scores.to_str().unwrap()],
        "train.npy: not a safetensors file",
        &scores,
    );
}

#[test]
fn config_files_set_options_flags_override_and_unknown_keys_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(300, 0.0));
    let model = dir.path().join("model.safetensors");
    let config = dir.path().join("c.json");
    std::fs::write(&config, r#"{"layers": 3, "hidden": 40, "epochs": 2, "seed": 9}"#).unwrap();
    let (t, m, c) = (train.to_str().unwrap(), model.to_str().unwrap(), config.to_str().unwrap());
    tidemark().args(["fit", t, "-o", m, "--config", c, "--hidden", "48", "-q"]).assert().success();
    let out = tidemark().args(["inspect", m, "--json"]).assert().success();
    let meta: serde_json::Value = serde_json::from_slice(&out.get_output().stdout).unwrap();
    let s = &meta["training"]["settings"];
    assert_eq!(
        (s["layers"].as_u64(), s["hidden"].as_u64(), s["epochs"].as_u64(), s["seed"].as_u64()),
        (Some(3), Some(48), Some(2), Some(9))
    );

    std::fs::write(&config, r#"{"layers": 3, "hiden": 40}"#).unwrap();
    std::fs::remove_file(&model).unwrap();
    refuses(&["fit", t, "-o", m, "--config", c], "c.json: key 'hiden': unknown field `hiden`", &model);

    std::fs::write(&config, r#"{"layers": "six"}"#).unwrap();
    refuses(
        &["fit", t, "-o", m, "--config", c],
        "c.json: key 'layers': invalid type: string \"six\", expected usize",
        &model,
    );

    // Every shipped config is valid.
    for entry in std::fs::read_dir(PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("configs")).unwrap() {
        let path = entry.unwrap().path();
        tidemark::train::FitOptions::from_json_file(&path).unwrap_or_else(|e| panic!("{e}"));
    }
}

#[test]
fn output_formats_columns_batch_test_and_background_ratio() {
    let dir = tempfile::tempdir().unwrap();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(600, 0.0));
    let model = dir.path().join("model.safetensors");
    let (t, m) = (train.to_str().unwrap(), model.to_str().unwrap());
    tidemark().args(["fit", t, "-o", m, "--epochs", "3", "--background-noise", "0.5", "-q"]).assert().success();

    // CSV with chosen columns, including the background likelihood ratio.
    let out = tidemark()
        .args(["score", m, t, "-o", "-", "--columns", "log_likelihood,log_likelihood_ratio"])
        .assert()
        .success();
    let csv = String::from_utf8(out.get_output().stdout.clone()).unwrap();
    assert_eq!(csv.lines().next().unwrap(), "log_likelihood,log_likelihood_ratio");
    assert!(column(&csv, "log_likelihood_ratio").iter().all(|v| v.is_finite()));

    // .npy (float32, rows x columns) with the column names beside it.
    let npy = dir.path().join("s.npy");
    tidemark()
        .args(["score", m, t, "-o", npy.to_str().unwrap(), "--columns", "typicality,latent_norm"])
        .assert()
        .success();
    let arr = tidemark::data::read_matrix(&npy, None).unwrap();
    assert_eq!((arr.rows, arr.cols), (600, 2));
    let side: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("s.json")).unwrap()).unwrap();
    assert_eq!(side["columns"], serde_json::json!(["typicality", "latent_norm"]));

    // JSON lines, one object per vector; and the batch typicality test.
    let jsonl = dir.path().join("s.jsonl");
    tidemark().args(["score", m, t, "-o", jsonl.to_str().unwrap(), "--batch", "50"]).assert().success();
    let lines: Vec<serde_json::Value> =
        std::fs::read_to_string(&jsonl).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 600);
    assert!(lines[0]["multi_statistic"].is_number());
    let batches = std::fs::read_to_string(dir.path().join("s.batches.csv")).unwrap();
    assert_eq!(
        batches.lines().next().unwrap(),
        "batch,first_row,rows,mean_nll,statistic,threshold,alpha,out_of_distribution"
    );
    assert_eq!(batches.lines().count(), 1 + 12);
    // Each batch's mean NLL is the mean of its rows' -log_likelihood.
    for (b, line) in batches.lines().skip(1).enumerate() {
        let mean: f64 = line.split(',').nth(3).unwrap().parse().unwrap();
        let want =
            -lines[b * 50..(b + 1) * 50].iter().map(|l| l["log_likelihood"].as_f64().unwrap()).sum::<f64>() / 50.0;
        assert!((mean - want).abs() < 1e-9 * want.abs().max(1.0), "batch {b}: {mean} vs {want}");
    }

    let bad = dir.path().join("bad.csv");
    refuses(
        &["score", m, t, "-o", bad.to_str().unwrap(), "--columns", "nope"],
        "this model has no column 'nope'",
        &bad,
    );
    let bad = dir.path().join("bad.txt");
    refuses(&["score", m, t, "-o", bad.to_str().unwrap()], "output must end in .csv, .npy or .jsonl", &bad);
}

#[test]
fn calibrate_then_score_with_p_values() {
    let dir = tempfile::tempdir().unwrap();
    let (train, held) = (dir.path().join("train.npy"), dir.path().join("held.npy"));
    common::save(&train, &common::wavy(600, 0.0));
    common::save(&held, &common::wavy(300, 0.37));
    let model = dir.path().join("model.safetensors");
    let (t, h, m) = (train.to_str().unwrap(), held.to_str().unwrap(), model.to_str().unwrap());
    tidemark().args(["fit", t, "-o", m, "--epochs", "3", "-q"]).assert().success();
    let cal = dir.path().join("cal.json");
    let c = cal.to_str().unwrap();
    let out = tidemark()
        .args(["calibrate", m, h, "-o", c, "--false-alarm", "0.05", "--score", "typicality"])
        .assert()
        .success();
    assert!(String::from_utf8_lossy(&out.get_output().stderr).contains("conformal rank 286 of 300"));
    let doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&cal).unwrap()).unwrap();
    // Conformal rank ceil((n + 1)(1 - alpha)) = ceil(301 * 0.95) = 286.
    assert_eq!(doc["rank"], 286);
    let out = tidemark().args(["score", m, h, "-o", "-", "--calibration", c]).assert().success();
    let csv = String::from_utf8(out.get_output().stdout.clone()).unwrap();
    let (p, flagged) = (column(&csv, "p_value"), column(&csv, "flagged"));
    // On the calibration rows themselves at most alpha (n+1)/n are flagged.
    let share = mean(&flagged);
    assert!(share <= 0.05 * 301.0 / 300.0 + 1e-12, "{share}");
    assert!(p.iter().zip(&flagged).all(|(p, f)| (*p <= 0.05) == (*f == 1.0)));

    // Calibrating on the training file warns; too few rows for the rate is refused.
    let out = tidemark().args(["calibrate", m, t, "-o", c, "--false-alarm", "0.05", "--force"]).assert().success();
    assert!(String::from_utf8_lossy(&out.get_output().stderr).contains("is the file the model was fitted on"));
    let tiny = dir.path().join("tiny.npy");
    common::save(&tiny, &common::wavy(50, 0.1));
    let cal2 = dir.path().join("cal2.json");
    refuses(
        &["calibrate", m, tiny.to_str().unwrap(), "-o", cal2.to_str().unwrap(), "--false-alarm", "0.01"],
        "50 rows are too few for a false-alarm rate of 0.01 (need at least 99)",
        &cal2,
    );
    // A calibration belongs to its model.
    let other = dir.path().join("other.safetensors");
    tidemark().args(["fit", t, "-o", other.to_str().unwrap(), "--epochs", "3", "--seed", "9", "-q"]).assert().success();
    let scores = dir.path().join("s.csv");
    refuses(
        &["score", other.to_str().unwrap(), h, "-o", scores.to_str().unwrap(), "--calibration", c],
        "cal.json: was calibrated for a different model",
        &scores,
    );
}

/// With few training rows per feature and no `--kind`, `fit` leaves the
/// flow out of its comparison and says so, and keeps a Gaussian kind
/// (class-Gaussian with labels) or the mixture; asking for a flow, or
/// giving an option only a flow uses, keeps the flow.
#[test]
fn few_rows_per_feature_leave_the_flow_out_unless_one_is_asked_for() {
    let dir = tempfile::tempdir().unwrap();
    let (train, labels) = (dir.path().join("train.npy"), dir.path().join("labels.csv"));
    // 80 rows of 32 features (72 training rows: 2.25 per feature), invented.
    let v: Vec<f32> = (0..80 * 32).map(|i| ((i * 7919 % 1000) as f32 / 500.0 - 1.0) + (i / 32 % 3) as f32).collect();
    common::save(&train, &Matrix::new(80, 32, v));
    std::fs::write(&labels, (0..80).map(|r| format!("{}\n", r % 3)).collect::<String>()).unwrap();
    let model = dir.path().join("model.safetensors");
    let (t, m) = (train.to_str().unwrap(), model.to_str().unwrap());
    let kind_with = |extra: &[&str]| -> (String, String) {
        let out = tidemark().args(["fit", t, "-o", m, "--force"]).args(extra).assert().success();
        let stderr = String::from_utf8(out.get_output().stderr.clone()).unwrap();
        let out = tidemark().args(["inspect", m, "--json"]).assert().success();
        let meta: serde_json::Value = serde_json::from_slice(&out.get_output().stdout).unwrap();
        (meta["kind"].as_str().unwrap().to_string(), stderr)
    };
    let (kind, stderr) = kind_with(&[]);
    assert!(kind == "gaussian" || kind == "mixture", "{kind}");
    assert!(stderr.contains("2.2 per feature") && stderr.contains("--kind flow"), "{stderr}");
    assert!(stderr.contains("candidate gaussian") && stderr.contains("candidate mixture"), "{stderr}");
    assert!(!stderr.contains("candidate flow"), "{stderr}");
    let (kind, stderr) = kind_with(&["--labels", labels.to_str().unwrap()]);
    assert!(kind == "class-gaussian" || kind == "mixture", "{kind}");
    assert!(stderr.contains("candidate class-gaussian") && stderr.contains("per class"), "{stderr}");
    assert_eq!(kind_with(&["--kind", "flow"]).0, "flow");
    assert_eq!(kind_with(&["--layers", "2"]).0, "flow");
}

/// The mixture kind with labels writes per-class columns whose Bayes-rule
/// marginal is the log-likelihood column (log p(x) = logsumexp_c [log p(x |
/// c) + log pi_c], pi_c from the label counts); a class with a single
/// training row stops `--kind mixture` with a line naming its label and
/// leaves the default search to the other kinds; `--kind gaussian` refuses
/// labels it would not use.
#[test]
fn class_mixture_scores_per_class_and_names_a_class_too_small() {
    let dir = tempfile::tempdir().unwrap();
    let f = |name: &str| common::fixture(name).to_str().unwrap().to_string();
    let (wine, labels) = (f("wine.csv"), f("wine_labels.csv"));
    let model = dir.path().join("m.safetensors");
    let scores = dir.path().join("s.csv");
    let m = model.to_str().unwrap();
    tidemark().args(["fit", &wine, "--labels", &labels, "--kind", "mixture", "-q", "-o", m]).assert().success();
    tidemark().args(["score", m, &wine, "-o", scores.to_str().unwrap()]).assert().success();
    let text = std::fs::read_to_string(&scores).unwrap();
    let counts: Vec<f64> = {
        let l = std::fs::read_to_string(&labels).unwrap();
        let rows: Vec<i64> = l.lines().skip(1).map(|v| v.trim().parse().unwrap()).collect();
        (0..3).map(|c| rows.iter().filter(|&&r| r == c).count() as f64 / rows.len() as f64).collect()
    };
    let ll = common::column(&text, "log_likelihood");
    let per: Vec<Vec<f64>> = (0..3).map(|c| common::column(&text, &format!("class_log_likelihood_{c}"))).collect();
    for r in 0..ll.len() {
        let joint: Vec<f64> = (0..3).map(|c| per[c][r] + counts[c].ln()).collect();
        let top = joint.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let marginal = top + joint.iter().map(|j| (j - top).exp()).sum::<f64>().ln();
        assert!((marginal - ll[r]).abs() < 1e-6 * ll[r].abs().max(1.0), "row {r}: {marginal} vs {}", ll[r]);
    }
    let out = tidemark().args(["inspect", m]).assert().success();
    assert!(String::from_utf8_lossy(&out.get_output().stdout).contains("per class"));

    let lonely = dir.path().join("lonely.csv");
    let l = std::fs::read_to_string(&labels).unwrap();
    let mut lines: Vec<String> = l.lines().map(str::to_string).collect();
    lines[5] = "7".into();
    std::fs::write(&lonely, lines.join("\n") + "\n").unwrap();
    let other = dir.path().join("o.safetensors");
    let o = other.to_str().unwrap();
    let base = ["fit", &wine, "--labels", lonely.to_str().unwrap(), "-o", o];
    let out = tidemark().args(base).args(["--kind", "mixture"]).assert().failure();
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(err.contains("class 7 has 1 training row;"), "{err}");
    assert!(!other.exists());
    let out = tidemark().args(base).args(["--budget", "5s"]).assert().success();
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(err.contains("mixture left out of the comparison: class 7"), "{err}");
    let out = tidemark()
        .args(["fit", &wine, "--labels", &labels, "--kind", "gaussian", "-o", o, "--force"])
        .assert()
        .failure();
    assert!(String::from_utf8_lossy(&out.get_output().stderr)
        .contains("--kind gaussian fits one Gaussian and uses no labels"));
}
