//! Parquet and Arrow IPC inputs written by pyarrow
//! (scripts/make_columnar_fixtures.py) read back equal to the same rows
//! saved by numpy as .npy; every malformed file gives its error; the binary
//! scores a columnar file exactly as it scores the .npy.

mod common;

use assert_cmd::Command;
use std::path::PathBuf;
use tidemark::columnar::{self, Features, Selection};
use tidemark::data::read_matrix;

fn fixture(name: &str) -> PathBuf {
    common::fixture(&format!("columnar/{name}"))
}

fn rows() -> tidemark::data::Matrix {
    read_matrix(&fixture("rows.npy"), None).unwrap()
}

fn list(name: &str) -> Selection {
    Selection { features: Some(Features::List(name.into())), ..Default::default() }
}

#[test]
fn list_columns_in_every_container_read_back_equal_to_the_npy() {
    let want = rows();
    // Fixed-size float32 lists over several row groups (snappy), variable
    // float64 lists (zstd), an Arrow IPC file and an Arrow IPC stream.
    for file in ["fixed.parquet", "list64.parquet", "fixed.arrow", "fixed.arrows"] {
        let (x, labels) = columnar::read_all(&fixture(file), &Selection::default(), None, true).unwrap();
        assert_eq!(x, want, "{file}");
        assert!(labels.is_none());
        let (x, _) = columnar::read_all(&fixture(file), &list("embedding"), None, true).unwrap();
        assert_eq!(x, want, "{file}");
    }
}

#[test]
fn float_columns_by_prefix_or_by_name() {
    let want = rows();
    let prefix = Selection { features: Some(Features::Prefix("emb_".into())), ..Default::default() };
    let (x, _) = columnar::read_all(&fixture("wide.parquet"), &prefix, None, true).unwrap();
    assert_eq!(x, want);
    // Named columns come in the order given.
    let named =
        Selection { features: Some(Features::Named(vec!["emb_3".into(), "emb_0".into()])), ..Default::default() };
    let (x, _) = columnar::read_all(&fixture("wide.parquet"), &named, None, true).unwrap();
    for r in 0..want.rows {
        assert_eq!(x.row(r), &[want.row(r)[3], want.row(r)[0]]);
    }
}

#[test]
fn labels_come_from_an_integer_column() {
    let sel = Selection { label_column: Some("label".into()), ..Default::default() };
    let (_, labels) = columnar::read_all(&fixture("fixed.parquet"), &sel, None, true).unwrap();
    let want: Vec<i64> = (0..40).map(|i| i % 3).collect();
    assert_eq!(labels.unwrap(), want);
    let sel = Selection { label_column: Some("ts".into()), ..Default::default() };
    let err = columnar::read_all(&fixture("fixed.parquet"), &sel, None, true).unwrap_err().to_string();
    assert!(err.contains("label column 'ts'") && err.contains("expected integers"), "{err}");
}

#[test]
fn a_sample_is_seeded_uniform_and_in_file_order() {
    let want = rows();
    let (a, _) = columnar::read_all(&fixture("fixed.parquet"), &Selection::default(), Some((10, 3)), true).unwrap();
    let (b, _) = columnar::read_all(&fixture("fixed.parquet"), &Selection::default(), Some((10, 3)), true).unwrap();
    assert_eq!(a, b);
    assert_eq!(a.rows, 10);
    // Each sampled row is a row of the file, in increasing file position.
    let positions: Vec<usize> =
        (0..a.rows).map(|r| (0..want.rows).find(|&i| want.row(i) == a.row(r)).unwrap()).collect();
    assert!(positions.windows(2).all(|w| w[0] < w[1]), "{positions:?}");
    let (c, _) = columnar::read_all(&fixture("fixed.parquet"), &Selection::default(), Some((10, 4)), true).unwrap();
    assert_ne!(a, c);
}

#[test]
fn every_malformed_file_names_its_row_and_column() {
    let cases: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(fixture("bad_cases.json")).unwrap()).unwrap();
    for (file, want) in cases["cases"].as_object().unwrap() {
        let err = columnar::read_all(&fixture(file), &Selection::default(), None, true).unwrap_err().to_string();
        assert!(err.contains(file.as_str()) && err.contains(want.as_str().unwrap()), "{file}: {err}");
    }
    let missing = columnar::read_all(&fixture("fixed.parquet"), &list("vectors"), None, true).unwrap_err().to_string();
    assert!(missing.contains("has no column 'vectors' (it has: id, ts, embedding, label)"), "{missing}");
    let wrong = columnar::read_all(&fixture("fixed.parquet"), &list("id"), None, true).unwrap_err().to_string();
    assert!(wrong.contains("column 'id' is Int64, expected a list"), "{wrong}");
    let not_float = Selection { features: Some(Features::Named(vec!["id".into()])), ..Default::default() };
    let err = columnar::read_all(&fixture("wide.parquet"), &not_float, None, true).unwrap_err().to_string();
    assert!(err.contains("column 'id' is Int64, expected a float column"), "{err}");
}

fn tidemark() -> Command {
    Command::new(common::bin())
}

#[test]
fn the_binary_scores_parquet_and_arrow_exactly_as_npy() {
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("model.safetensors");
    let fixed = fixture("fixed.parquet");
    tidemark()
        .args(["fit", fixed.to_str().unwrap(), "-o", model.to_str().unwrap(), "--epochs", "2", "-q"])
        .assert()
        .success();
    let score = |input: PathBuf, extra: &[&str]| {
        let mut args = vec!["score".to_string(), model.to_str().unwrap().into(), input.to_str().unwrap().into()];
        args.extend(["-o".into(), "-".into()]);
        args.extend(extra.iter().map(|s| s.to_string()));
        String::from_utf8(tidemark().args(&args).assert().success().get_output().stdout.clone()).unwrap()
    };
    let from_npy = score(fixture("rows.npy"), &[]);
    assert_eq!(from_npy.lines().count(), 41);
    assert_eq!(score(fixed.clone(), &[]), from_npy);
    assert_eq!(score(fixture("fixed.arrows"), &["--column", "embedding"]), from_npy);
    assert_eq!(score(fixture("wide.parquet"), &["--column-prefix", "emb_"]), from_npy);

    // Column options on a row format are refused, naming the file.
    let out = tidemark()
        .args(["score", model.to_str().unwrap(), fixture("rows.npy").to_str().unwrap(), "-o", "-", "--column", "e"])
        .assert()
        .failure();
    let err = String::from_utf8(out.get_output().stderr.clone()).unwrap();
    assert!(err.contains("rows.npy") && err.contains("need a Parquet or Arrow file"), "{err}");
}

/// A model fitted on the fixture rows, and the CLI's CSV scores of rows.npy.
fn model_and_reference(dir: &std::path::Path) -> (PathBuf, String) {
    let model = dir.join("model.safetensors");
    let rows = fixture("rows.npy");
    tidemark()
        .args(["fit", rows.to_str().unwrap(), "-o", model.to_str().unwrap(), "--epochs", "2", "-q"])
        .assert()
        .success();
    let out = tidemark()
        .args([
            "score",
            model.to_str().unwrap(),
            rows.to_str().unwrap(),
            "-o",
            "-",
            "--columns",
            "log_likelihood,typicality",
        ])
        .assert()
        .success();
    (model, String::from_utf8(out.get_output().stdout.clone()).unwrap())
}

fn read_parquet(path: &std::path::Path) -> Vec<arrow_array::RecordBatch> {
    let file = std::fs::File::open(path).unwrap();
    let reader = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file).unwrap().build().unwrap();
    reader.map(|b| b.unwrap()).collect()
}

fn f64_column(batches: &[arrow_array::RecordBatch], name: &str) -> Vec<Option<f64>> {
    use arrow_array::cast::AsArray;
    batches
        .iter()
        .flat_map(|b| {
            let c = b.column_by_name(name).unwrap().as_primitive::<arrow_array::types::Float64Type>().clone();
            (0..c.len()).map(move |i| (!arrow_array::Array::is_null(&c, i)).then(|| c.value(i)))
        })
        .collect()
}

fn i64_column(batches: &[arrow_array::RecordBatch], name: &str) -> Vec<i64> {
    use arrow_array::cast::AsArray;
    batches
        .iter()
        .flat_map(|b| b.column_by_name(name).unwrap().as_primitive::<arrow_array::types::Int64Type>().values().to_vec())
        .collect()
}

#[test]
fn keyed_parquet_output_joins_back_to_the_input_rows() {
    let dir = tempfile::tempdir().unwrap();
    let (model, reference) = model_and_reference(dir.path());
    let out = dir.path().join("scores.parquet");
    tidemark()
        .args(["score", model.to_str().unwrap(), fixture("fixed.parquet").to_str().unwrap(), "-o"])
        .arg(&out)
        .args(["--keep", "ts,id", "--columns", "log_likelihood,typicality"])
        .assert()
        .success();
    let batches = read_parquet(&out);
    let names: Vec<String> = batches[0].schema().fields().iter().map(|f| f.name().clone()).collect();
    assert_eq!(names, ["ts", "id", "log_likelihood", "typicality"]);
    assert_eq!(i64_column(&batches, "id"), (1000..1040).collect::<Vec<i64>>());
    // Timestamps carried unchanged: minutes after 2026-11-01, in ms.
    let ts: Vec<i64> = batches
        .iter()
        .flat_map(|b| {
            use arrow_array::cast::AsArray;
            b.column_by_name("ts")
                .unwrap()
                .as_primitive::<arrow_array::types::TimestampMillisecondType>()
                .values()
                .to_vec()
        })
        .collect();
    assert!(ts.windows(2).all(|w| w[1] - w[0] == 60_000), "{ts:?}");
    let ll: Vec<Option<f64>> = common::column(&reference, "log_likelihood").into_iter().map(Some).collect();
    assert_eq!(f64_column(&batches, "log_likelihood"), ll);

    // The same through an Arrow IPC file.
    let ipc = dir.path().join("scores.arrow");
    tidemark()
        .args(["score", model.to_str().unwrap(), fixture("fixed.parquet").to_str().unwrap(), "-o"])
        .arg(&ipc)
        .args(["--keep", "id", "--columns", "log_likelihood,typicality"])
        .assert()
        .success();
    let reader = arrow_ipc::reader::FileReader::try_new(std::fs::File::open(&ipc).unwrap(), None).unwrap();
    let batches: Vec<_> = reader.map(|b| b.unwrap()).collect();
    assert_eq!(i64_column(&batches, "id"), (1000..1040).collect::<Vec<i64>>());
    assert_eq!(f64_column(&batches, "log_likelihood"), ll);

    // --keep names a column the input lacks, or a row format for output.
    let out2 = dir.path().join("other.parquet");
    let err = tidemark()
        .args(["score", model.to_str().unwrap(), fixture("fixed.parquet").to_str().unwrap(), "-o"])
        .arg(&out2)
        .args(["--keep", "uid"])
        .assert()
        .failure();
    let msg = String::from_utf8(err.get_output().stderr.clone()).unwrap();
    assert!(msg.contains("fixed.parquet") && msg.contains("has no column 'uid'"), "{msg}");
    assert!(!out2.exists());
}

#[test]
fn bad_rows_in_batches_are_flagged_or_skipped_with_their_keys() {
    let dir = tempfile::tempdir().unwrap();
    let (model, _) = model_and_reference(dir.path());
    let bad = fixture("bad_nan.parquet");
    let run = |mode: &str, out: &std::path::Path| {
        tidemark()
            .args(["score", model.to_str().unwrap(), bad.to_str().unwrap(), "-o"])
            .arg(out)
            .args(["--keep", "id", "--columns", "log_likelihood", "--bad-rows", mode])
            .assert()
    };
    let refused = dir.path().join("refused.parquet");
    let msg = String::from_utf8(run("error", &refused).failure().get_output().stderr.clone()).unwrap();
    assert!(msg.contains("bad_nan.parquet") && msg.contains("row 11"), "{msg}");
    assert!(!refused.exists());

    let flagged = dir.path().join("flagged.parquet");
    run("flag", &flagged).success();
    let batches = read_parquet(&flagged);
    let ll = f64_column(&batches, "log_likelihood");
    assert_eq!(ll.len(), 40);
    assert!(ll[11].is_none() && ll.iter().filter(|v| v.is_none()).count() == 1);
    use arrow_array::cast::AsArray;
    let why = batches[0].column_by_name("bad_row").unwrap().as_string::<i32>().clone();
    assert!(why.value(11).contains("NaN") && arrow_array::Array::is_null(&why, 10));

    let skipped = dir.path().join("skipped.parquet");
    run("skip", &skipped).success();
    let ids = i64_column(&read_parquet(&skipped), "id");
    assert_eq!(ids.len(), 39);
    assert!(!ids.contains(&1011));
}

#[test]
fn pipes_read_arrow_streams_and_npy_from_standard_input() {
    let dir = tempfile::tempdir().unwrap();
    let (model, reference) = model_and_reference(dir.path());
    let cols = ["--columns", "log_likelihood,typicality"];
    let from_stdin = |file: &str, extra: &[&str]| {
        let out = tidemark()
            .args(["score", model.to_str().unwrap(), "-", "-o", "-"])
            .args(cols)
            .args(extra)
            .pipe_stdin(fixture(file))
            .unwrap()
            .assert()
            .success();
        out.get_output().stdout.clone()
    };
    assert_eq!(String::from_utf8(from_stdin("fixed.arrows", &[])).unwrap(), reference);
    assert_eq!(String::from_utf8(from_stdin("rows.npy", &[])).unwrap(), reference);
    // An Arrow IPC stream out, with the ids carried through.
    let bytes = from_stdin("fixed.arrows", &["--arrow-stdout", "--keep", "id"]);
    let reader = arrow_ipc::reader::StreamReader::try_new(std::io::Cursor::new(bytes), None).unwrap();
    let batches: Vec<_> = reader.map(|b| b.unwrap()).collect();
    assert_eq!(i64_column(&batches, "id"), (1000..1040).collect::<Vec<i64>>());
    let ll: Vec<Option<f64>> = common::column(&reference, "log_likelihood").into_iter().map(Some).collect();
    assert_eq!(f64_column(&batches, "log_likelihood"), ll);
}
