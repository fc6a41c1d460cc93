//! The CSV reader, as embeddings and as labels.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use tidemark::data::{parse_labels, Bytes, Dataset, Format};

fuzz_target!(|data: &[u8]| {
    let path = Path::new("fuzz.csv");
    if let Ok(ds) = Dataset::from_bytes(path, Format::Csv, Bytes::Owned(data.to_vec()), None) {
        ds.to_matrix();
    }
    let _ = parse_labels(path, Format::Csv, data);
});
