//! The library's error type: every variant names the file or setting at fault.

use std::path::PathBuf;

pub use crate::data::DataError;

#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// An input data or label file is unreadable or invalid.
    #[error(transparent)]
    Data(#[from] DataError),
    /// A model file is unreadable, invalid, or does not fit the data.
    #[error("{}: {msg}", path.display())]
    Model { path: PathBuf, msg: String },
    /// Settings or inputs that cannot work together.
    #[error("{0}")]
    Invalid(String),
    /// Training stopped on request; the message says how to continue.
    #[error("{0}")]
    Interrupted(String),
    /// Writing an output file failed.
    #[error("{}: {source}", path.display())]
    Io { path: PathBuf, source: std::io::Error },
}

pub type Result<T> = std::result::Result<T, Error>;

impl Error {
    pub fn model(path: impl Into<PathBuf>, msg: impl std::fmt::Display) -> Error {
        Error::Model { path: path.into(), msg: msg.to_string() }
    }
}

/// Exit status for a bad input, option or usage.
pub const EXIT_BAD_INPUT: u8 = 1;
/// Exit status when an output could not be written (disk full, permission).
pub const EXIT_IO: u8 = 2;
/// Exit status for an internal error (a panic: a bug).
pub const EXIT_INTERNAL: u8 = 70;
/// Exit status of a run stopped by a signal (128 + SIGINT, as shells report
/// it); a fit so stopped can be resumed.
pub const EXIT_INTERRUPTED: u8 = 130;

impl Error {
    /// The process exit status for this error; the one place errors map to
    /// statuses.
    pub fn exit_code(&self) -> u8 {
        match self {
            Error::Io { .. } => EXIT_IO,
            Error::Interrupted(_) => EXIT_INTERRUPTED,
            Error::Data(_) | Error::Model { .. } | Error::Invalid(_) => EXIT_BAD_INPUT,
        }
    }

    /// A reader of standard output that stopped early (`| head`): not a
    /// failure.
    pub fn is_broken_pipe(&self) -> bool {
        matches!(self, Error::Io { source, .. } if source.kind() == std::io::ErrorKind::BrokenPipe)
    }
}

/// Make a panic a one-line report and exit status [`EXIT_INTERNAL`], after
/// removing the temporary files being written (the process ends without
/// unwinding, so nothing else would).
pub fn install_panic_hook() {
    std::panic::set_hook(Box::new(|info| {
        crate::output::remove_temporaries();
        crate::output::note(panic_line(info));
        std::process::exit(EXIT_INTERNAL.into());
    }));
}

/// "internal error, please report: MESSAGE at FILE:LINE:COLUMN".
pub fn panic_line(info: &std::panic::PanicHookInfo) -> String {
    let payload = info.payload();
    let message = payload
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| payload.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "panic".to_string());
    let at = info.location().map(|l| format!(" at {}:{}:{}", l.file(), l.line(), l.column())).unwrap_or_default();
    format!("internal error, please report: {message}{at}")
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::{Arc, Mutex};

    /// The hook's line carries the message and where the panic happened.
    #[test]
    fn a_panic_becomes_one_line_with_its_message_and_location() {
        let seen = Arc::new(Mutex::new(Vec::new()));
        let keep = Arc::clone(&seen);
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            if let Ok(mut v) = keep.lock() {
                v.push(panic_line(info));
            }
        }));
        let line_of_panic = line!() + 1;
        let caught = std::panic::catch_unwind(|| panic!("row {} of {}", 3, 7));
        std::panic::set_hook(previous);
        assert!(caught.is_err());
        let lines = seen.lock().unwrap().clone();
        let want = format!("internal error, please report: row 3 of 7 at src/error.rs:{line_of_panic}:");
        assert!(lines.iter().any(|l| l.starts_with(&want)), "{lines:?}");
    }

    #[test]
    fn output_failures_and_bad_inputs_have_their_own_statuses() {
        let io = Error::Io { path: "x".into(), source: std::io::Error::from(std::io::ErrorKind::StorageFull) };
        assert_eq!(io.exit_code(), 2);
        assert_eq!(Error::Invalid("x".into()).exit_code(), 1);
        assert_eq!(Error::Interrupted("x".into()).exit_code(), 130);
    }
}
