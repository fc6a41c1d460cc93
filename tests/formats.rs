//! Reading embeddings and labels: fixtures written by numpy and by the
//! safetensors Python package (scripts/make_fixtures.py; versions recorded in
//! tests/fixtures/expected.json) must read back exactly.

mod common;

use tidemark::data::{read_labels, read_matrix};

fn expected(key: &str) -> Vec<f32> {
    let text = std::fs::read_to_string(common::fixture("expected.json")).unwrap();
    let v: serde_json::Value = serde_json::from_str(&text).unwrap();
    v[key]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|row| row.as_array().unwrap().iter().map(|x| x.as_f64().unwrap() as f32))
        .collect()
}

#[test]
fn npy_layouts_written_by_numpy_read_back_exactly() {
    let want = expected("small");
    for name in
        ["small_f32.npy", "small_f64.npy", "small_fortran.npy", "small_big_endian.npy", "small_v2.npy", "small_v3.npy"]
    {
        let m = read_matrix(&common::fixture(name), None).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!((m.rows, m.cols), (4, 3), "{name}");
        assert_eq!(m.data, want, "{name}");
    }
    let m = read_matrix(&common::fixture("small_f16.npy"), None).unwrap();
    assert_eq!(m.data, expected("small_f16"));
}

#[test]
fn safetensors_written_by_the_python_package_read_back_exactly() {
    let want = expected("small");
    let m = read_matrix(&common::fixture("several.safetensors"), Some("embeddings")).unwrap();
    assert_eq!(m.data, want);
    let other = read_matrix(&common::fixture("several.safetensors"), Some("other")).unwrap();
    assert_eq!((other.rows, &other.data[..]), (2, &want[..6]));
    assert_eq!(read_matrix(&common::fixture("single_f64.safetensors"), None).unwrap().data, want);
    assert_eq!(read_matrix(&common::fixture("single_f16.safetensors"), None).unwrap().data, expected("small_f16"));
    assert_eq!(read_matrix(&common::fixture("single_bf16.safetensors"), None).unwrap().data, expected("small_bf16"));
}

#[test]
fn csv_with_and_without_header() {
    let want = expected("small");
    for name in ["with_header.csv", "no_header.csv"] {
        let m = read_matrix(&common::fixture(name), None).unwrap();
        assert_eq!((m.rows, m.cols, m.data), (4, 3, want.clone()), "{name}");
    }
}

#[test]
fn labels_of_any_integer_dtype() {
    assert_eq!(read_labels(&common::fixture("labels_i32.npy")).unwrap(), vec![0, 2, 1, 2]);
    assert_eq!(read_labels(&common::fixture("labels_u8.npy")).unwrap(), vec![3, 1, 1, 0]);
    assert_eq!(read_labels(&common::fixture("labels_i64_column.npy")).unwrap(), vec![5, 6, 7, 8]);
    assert_eq!(read_labels(&common::fixture("labels.csv")).unwrap(), vec![1, 0, 1, 1]);
    let err = read_labels(&common::fixture("labels_float.npy")).unwrap_err().to_string();
    assert!(err.contains("unsupported dtype '<f8' for labels"), "{err}");
}
