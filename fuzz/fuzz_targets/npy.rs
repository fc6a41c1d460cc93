//! The `.npy` header and body reader, as embeddings and as labels.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use tidemark::data::{parse_labels, Bytes, Dataset, Format};

fuzz_target!(|data: &[u8]| {
    let path = Path::new("fuzz.npy");
    if let Ok(ds) = Dataset::from_bytes(path, Format::Npy, Bytes::Owned(data.to_vec()), None) {
        ds.checksum();
        ds.to_matrix();
    }
    let _ = parse_labels(path, Format::Npy, data);
});
