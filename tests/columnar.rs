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
