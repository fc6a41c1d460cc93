//! tidemark: fit small normalizing flows to embedding vectors on a CPU and
//! turn new vectors into in-distribution scores.
//!
//! Pipeline, one module per stage: [`data`] (files in) -> [`preprocess`]
//! (standardization / PCA whitening) -> [`flow`] (coupling layers) ->
//! [`train`] (fitting) -> [`model`] (the saved file) -> [`score`] (per-vector
//! scores) -> [`output`] (files out).

pub mod flow;
pub mod linalg;
