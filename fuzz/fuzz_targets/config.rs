//! The fit options config file parser.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use tidemark::train::FitOptions;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let _ = FitOptions::from_json(Path::new("fuzz.json"), text);
});
