//! tidemark: fit small normalizing flows to embedding vectors on a CPU and
//! turn new vectors into in-distribution scores.
//!
//! Pipeline, one module per stage, data flowing one way (each module uses
//! only those to its left):
//! [`data`] and [`columnar`] (files in, chosen by [`input`]) -> [`preprocess`] (standardization / PCA whitening)
//! -> [`flow`] (coupling layers) and [`mixture`] (Gaussian mixture) -> [`train`] (fitting) -> [`model`] (the
//! fitted model and its file) -> [`score`] (per-vector scores, the batch
//! test; knows no calibration files) -> [`calibrate`] (decisions: a
//! threshold and p-values applied to a score) -> [`evaluate`] (metrics of
//! score files against outlier sets, decision rates) -> [`report`] (draws an
//! evaluation). [`split`] cuts a file into train / calibration / test;
//! [`output`] writes every file; [`progress`] is the bar of
//! score, calibrate and evaluate. [`demo`] runs the whole job on the shipped
//! demo data.

pub mod bench;
pub mod calibrate;
pub mod check;
pub mod columnar;
pub mod data;
pub mod demo;
pub mod density;
pub mod error;
pub mod evaluate;
pub mod flow;
pub mod input;
pub mod kde;
pub mod linalg;
pub mod mixture;
pub mod model;
pub mod output;
pub mod preprocess;
pub mod progress;
pub mod report;
pub mod score;
pub mod simd;
pub mod split;
pub mod stream;
pub mod train;

pub use error::{Error, Result};
