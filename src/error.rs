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
