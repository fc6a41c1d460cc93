//! The calibration file loader and what scoring does with a calibration.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use tidemark::calibrate::Calibration;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    if let Ok(cal) = Calibration::parse(Path::new("fuzz.json"), text) {
        for raw in [f64::NEG_INFINITY, -1.0, 0.0, 1.0, f64::MAX] {
            cal.p_value(raw);
            cal.flagged(raw);
        }
    }
});
