//! The model file loader; a model that loads is also described, scored on
//! a few rows and sampled from, since a loaded model must be usable.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use tidemark::data::{Dataset, Matrix};
use tidemark::model::Model;

fuzz_target!(|data: &[u8]| {
    let Ok(m) = Model::from_bytes(Path::new("fuzz.safetensors"), data) else { return };
    m.meta.describe();
    m.fingerprint();
    let d = m.meta.input_dim;
    if d <= 256 {
        let rows: Vec<f32> = (0..3 * d).map(|i| (i % 7) as f32 * 0.3 - 1.0).collect();
        m.evaluate(&Dataset::in_memory(Matrix::new(3, d, rows)), 1);
        m.sample(2, 0);
    }
});
