//! The safetensors embeddings reader.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use tidemark::data::{Bytes, Dataset, Format};

fuzz_target!(|data: &[u8]| {
    let path = Path::new("fuzz.safetensors");
    for tensor in [None, Some("x")] {
        if let Ok(ds) = Dataset::from_bytes(path, Format::Safetensors, Bytes::Owned(data.to_vec()), tensor) {
            ds.to_matrix();
        }
    }
});
