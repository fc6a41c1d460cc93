//! Checks of option values: each names the option as the user gave it (a
//! flag, or a config file's key) and says what it must be.

use crate::error::{Error, Result};

/// Largest thread count accepted (a guard against typos, not a tuning limit).
pub const MAX_THREADS: usize = 4096;

fn refuse(name: &str, what: &str, got: impl std::fmt::Display) -> Error {
    Error::Invalid(format!("{name}: must be {what}, got {got}"))
}

/// A whole number in `lo..=hi`.
pub fn count(name: &str, v: usize, lo: usize, hi: usize) -> Result<usize> {
    if (lo..=hi).contains(&v) {
        Ok(v)
    } else {
        Err(refuse(name, &format!("between {lo} and {hi}"), v))
    }
}

/// A finite number above zero.
pub fn positive(name: &str, v: f64) -> Result<f64> {
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(refuse(name, "a finite number above 0", v))
    }
}

/// A finite number at or above zero.
pub fn non_negative(name: &str, v: f64) -> Result<f64> {
    if v.is_finite() && v >= 0.0 {
        Ok(v)
    } else {
        Err(refuse(name, "a finite number at or above 0", v))
    }
}

/// A number strictly between 0 and 1.
pub fn open_unit(name: &str, v: f64) -> Result<f64> {
    if v > 0.0 && v < 1.0 {
        Ok(v)
    } else {
        Err(refuse(name, "between 0 and 1 (both excluded)", v))
    }
}

/// A number in `[0, hi)`.
pub fn fraction_below(name: &str, v: f64, hi: f64) -> Result<f64> {
    if (0.0..hi).contains(&v) {
        Ok(v)
    } else {
        Err(refuse(name, &format!("at least 0 and below {hi}"), v))
    }
}

/// Worker threads: at least one.
pub fn threads(name: &str, v: usize) -> Result<usize> {
    count(name, v, 1, MAX_THREADS)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_check_names_the_option_and_the_value() {
        assert_eq!(
            positive("--lr", f64::NAN).unwrap_err().to_string(),
            "--lr: must be a finite number above 0, got NaN"
        );
        assert!(positive("--lr", 0.0).is_err() && positive("--lr", f64::INFINITY).is_err());
        assert!(non_negative("weight_decay", -1e-9).unwrap_err().to_string().starts_with("weight_decay: "));
        assert!(non_negative("x", 0.0).is_ok());
        assert!(open_unit("--false-alarm", 1.0).is_err() && open_unit("--false-alarm", 0.0).is_err());
        assert!(open_unit("--false-alarm", f64::NAN).is_err() && open_unit("--false-alarm", 0.5).is_ok());
        assert_eq!(count("--epochs", 0, 1, 10).unwrap_err().to_string(), "--epochs: must be between 1 and 10, got 0");
        assert!(fraction_below("--dropout", 1.0, 1.0).is_err() && fraction_below("--dropout", 0.0, 1.0).is_ok());
        assert!(threads("--threads", 0).is_err());
    }
}
