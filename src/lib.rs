//! tidemark: fit small normalizing flows to embedding vectors on a CPU and
//! turn new vectors into in-distribution scores.
//!
//! Pipeline, one module per stage, data flowing one way:
//! [`data`] (files in) -> [`preprocess`] (standardization / PCA whitening)
//! -> [`flow`] (coupling layers) -> [`train`] (fitting) -> [`model`] (the
//! fitted model and its file) -> [`score`] (per-vector scores) -> [`output`]
//! (files out). [`demo`] runs the whole job on the shipped demo data.

pub mod bench;
pub mod calibrate;
pub mod check;
pub mod data;
pub mod demo;
pub mod error;
pub mod evaluate;
pub mod flow;
pub mod kde;
pub mod linalg;
pub mod model;
pub mod output;
pub mod preprocess;
pub mod report;
pub mod score;
pub mod simd;
pub mod train;

pub use error::{Error, Result};
