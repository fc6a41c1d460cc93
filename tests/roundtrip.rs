//! Readers against writers, on random shapes and values (proptest): a
//! matrix written as `.npy` (either byte order, either memory order),
//! safetensors (written by the safetensors crate) or CSV (Rust's shortest
//! round-trip decimal) reads back bit for bit; labels likewise.

use proptest::prelude::*;
use std::path::Path;
use tidemark::data::{parse_labels, Bytes, Dataset, Format, Matrix};

fn read(format: Format, bytes: Vec<u8>) -> Matrix {
    Dataset::from_bytes(Path::new("roundtrip"), format, Bytes::Owned(bytes), None).unwrap().to_matrix()
}

/// A `.npy` file of `m` as numpy lays it out, float32 in either byte order
/// and either memory order.
fn npy(m: &Matrix, big_endian: bool, fortran: bool) -> Vec<u8> {
    let descr = if big_endian { ">f4" } else { "<f4" };
    let order = if fortran { "True" } else { "False" };
    let mut header = format!("{{'descr': '{descr}', 'fortran_order': {order}, 'shape': ({}, {}), }}", m.rows, m.cols);
    header.push_str(&" ".repeat(63 - (10 + header.len()) % 64));
    header.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend((header.len() as u16).to_le_bytes());
    out.extend(header.as_bytes());
    let at = |i: usize| if fortran { m.data[(i % m.rows) * m.cols + i / m.rows] } else { m.data[i] };
    for i in 0..m.data.len() {
        let v = at(i);
        out.extend(if big_endian { v.to_be_bytes() } else { v.to_le_bytes() });
    }
    out
}

fn matrices() -> impl Strategy<Value = Matrix> {
    (1usize..12, 1usize..9).prop_flat_map(|(r, c)| {
        proptest::collection::vec(any::<f32>().prop_filter("finite", |v| v.is_finite()), r * c)
            .prop_map(move |data| Matrix::new(r, c, data))
    })
}

proptest! {
    #[test]
    fn npy_round_trip(m in matrices(), big in any::<bool>(), fortran in any::<bool>()) {
        prop_assert_eq!(read(Format::Npy, npy(&m, big, fortran)), m.clone());
        let mut ours = Vec::new();
        tidemark::data::write_npy(&mut ours, &m).unwrap();
        prop_assert_eq!(read(Format::Npy, ours), m);
    }

    #[test]
    fn safetensors_round_trip(m in matrices()) {
        let bytes: Vec<u8> = m.data.iter().flat_map(|v| v.to_le_bytes()).collect();
        let view = safetensors::tensor::TensorView::new(safetensors::Dtype::F32, vec![m.rows, m.cols], &bytes).unwrap();
        let file = safetensors::serialize([("x", view)], None).unwrap();
        prop_assert_eq!(read(Format::Safetensors, file), m);
    }

    #[test]
    fn csv_round_trip(m in matrices(), header in any::<bool>(), crlf in any::<bool>()) {
        let eol = if crlf { "\r\n" } else { "\n" };
        let mut text = String::new();
        if header {
            let names: Vec<String> = (0..m.cols).map(|c| format!("f{c}")).collect();
            text.push_str(&(names.join(",") + eol));
        }
        for r in 0..m.rows {
            let cells: Vec<String> = m.row(r).iter().map(|v| v.to_string()).collect();
            text.push_str(&(cells.join(",") + eol));
        }
        let back = read(Format::Csv, text.into_bytes());
        // Bit for bit, but -0 and 0 print alike in a header-less first row.
        prop_assert_eq!(back.data.iter().map(|v| v + 0.0).collect::<Vec<_>>(), m.data.iter().map(|v| v + 0.0).collect::<Vec<_>>());
        prop_assert_eq!((back.rows, back.cols), (m.rows, m.cols));
    }

    #[test]
    fn labels_round_trip(labels in proptest::collection::vec(any::<i64>(), 1..40)) {
        let mut header = format!("{{'descr': '<i8', 'fortran_order': False, 'shape': ({},), }}", labels.len());
        header.push_str(&" ".repeat(63 - (10 + header.len()) % 64));
        header.push('\n');
        let mut npy = b"\x93NUMPY\x01\x00".to_vec();
        npy.extend((header.len() as u16).to_le_bytes());
        npy.extend(header.as_bytes());
        npy.extend(labels.iter().flat_map(|v| v.to_le_bytes()));
        prop_assert_eq!(parse_labels(Path::new("l.npy"), Format::Npy, &npy).unwrap(), labels.clone());
        let csv: String = labels.iter().map(|v| format!("{v}\n")).collect();
        prop_assert_eq!(parse_labels(Path::new("l.csv"), Format::Csv, csv.as_bytes()).unwrap(), labels);
    }
}
