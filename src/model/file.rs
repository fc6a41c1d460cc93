//! The model file: one `.safetensors` with the metadata JSON, a checksum
//! tensor, and every metadata field checked against the tensors and sane
//! bounds before anything is allocated from it.

use super::{Kind, Meta, Model, ScoringRefs, FORMAT_VERSION, META_KEY};
use crate::density::flow::{read_flow, write_flow};
use crate::density::{
    le_bytes_f32, le_bytes_f64, le_bytes_i64, read_boxed, Density, FlowDensity, Gaussian, Layout, MixtureDensity,
    TensorSource,
};
use crate::error::{Error, Result};
use crate::flow::FlowSpec;
use crate::preprocess::{Method, Preprocessor};
use safetensors::{Dtype, SafeTensors};
use std::collections::HashMap;
use std::path::Path;

impl Model {
    /// Write the model as one `.safetensors` file (atomically).
    pub fn save(&self, path: &Path) -> Result<()> {
        self.save_with(path, Vec::new(), None)
    }

    /// Write the model plus extra f32 tensors and one extra metadata entry
    /// (used by checkpoints).
    pub(crate) fn save_with(
        &self,
        path: &Path,
        extra: Vec<(String, &[f32])>,
        extra_meta: Option<(&str, String)>,
    ) -> Result<()> {
        let mut tensors: Vec<(String, Dtype, Vec<usize>, Vec<u8>)> = Vec::new();
        for (name, values) in extra {
            tensors.push((name, Dtype::F32, vec![values.len()], le_bytes_f32(values)));
        }
        let mut put = |name: &str, dtype: Dtype, shape: Vec<usize>, bytes: Vec<u8>| {
            tensors.push((name.to_string(), dtype, shape, bytes));
        };
        let pre = &self.pre;
        let (live, k) = (pre.live.len(), pre.dim());
        put("preprocess.mean", Dtype::F64, vec![live], le_bytes_f64(&pre.mean));
        put("preprocess.scale", Dtype::F64, vec![k], le_bytes_f64(&pre.scale));
        put("preprocess.live_features", Dtype::I64, vec![live], le_bytes_i64(&pre.live));
        if let Some(c) = &pre.components {
            put("preprocess.components", Dtype::F32, vec![k, live], le_bytes_f32(c));
        }
        if !pre.dead.is_empty() {
            put("preprocess.dead_values", Dtype::F64, vec![pre.dead.len()], le_bytes_f64(&pre.dead_value));
        }
        self.density.write(&mut put);
        if let Some(bg) = &self.background {
            write_flow(bg, "background", &mut put);
        }
        let r = &self.refs;
        let kde_cols = self.meta.scoring.kde_columns.len().max(1);
        if !r.kde_points.is_empty() {
            put(
                "scores.kde_points",
                Dtype::F64,
                vec![r.kde_points.len() / kde_cols, kde_cols],
                le_bytes_f64(&r.kde_points),
            );
        }
        if !r.validation_nll.is_empty() {
            put("scores.validation_nll", Dtype::F64, vec![r.validation_nll.len()], le_bytes_f64(&r.validation_nll));
        }
        let meta_json = serde_json::to_string(&self.meta).map_err(|e| Error::model(path, e))?;
        let mut metadata = HashMap::from([(META_KEY.to_string(), meta_json)]);
        if let Some((key, value)) = extra_meta {
            metadata.insert(key.to_string(), value);
        }
        let listed: Vec<(&str, Dtype, &[usize], &[u8])> =
            tensors.iter().map(|(n, d, shape, b)| (n.as_str(), *d, shape.as_slice(), b.as_slice())).collect();
        let checksum = content_checksum(&metadata, &listed).to_le_bytes().to_vec();
        tensors.push((CHECKSUM_TENSOR.to_string(), Dtype::U8, vec![8], checksum));
        let views = tensors
            .iter()
            .map(|(name, dtype, shape, bytes)| {
                let view = safetensors::tensor::TensorView::new(*dtype, shape.clone(), bytes)
                    .map_err(|e| Error::model(path, e))?;
                Ok((name.clone(), view))
            })
            .collect::<Result<Vec<_>>>()?;
        if crate::output::is_stdout(path) {
            let bytes = safetensors::serialize(views, Some(metadata)).map_err(|e| Error::model(path, e))?;
            return crate::output::write_atomic(path, |w| {
                w.write_all(&bytes).map_err(|source| Error::Io { path: path.into(), source })
            });
        }
        // Straight from the tensors to the file: no second copy of the
        // whole file in memory (checkpoints carry the optimizer state).
        crate::output::write_atomic_via(path, |tmp| {
            safetensors::serialize_to_file(views, Some(metadata), tmp).map_err(|e| Error::model(path, e))
        })
    }

    /// Read a model file written by [`Model::save`].
    pub fn load(path: &Path) -> Result<Model> {
        Ok(Model::load_with(path)?.0)
    }

    /// Read a model file and give access to what [`Model::save_with`] added.
    pub(crate) fn load_with(path: &Path) -> Result<(Model, Extras)> {
        let bytes = crate::data::read_file(path).map_err(|e| Error::model(path, e.msg))?;
        let model = Model::from_bytes(path, &bytes)?;
        Ok((model, Extras { path: path.to_path_buf(), bytes }))
    }

    /// A model from the contents of a model file (`path` names it in
    /// messages). The checksum (when the file has one) is verified and
    /// every metadata field is checked against the tensors and sane bounds
    /// before anything is allocated from it.
    pub fn from_bytes(path: &Path, bytes: &[u8]) -> Result<Model> {
        let st =
            SafeTensors::deserialize(bytes).map_err(|e| Error::model(path, format!("not a safetensors file ({e})")))?;
        let (_, header) = SafeTensors::read_metadata(bytes).map_err(|e| Error::model(path, e))?;
        let empty = HashMap::new();
        let metadata = header.metadata().as_ref().unwrap_or(&empty);
        let json = metadata
            .get(META_KEY)
            .ok_or_else(|| Error::model(path, "is not a tidemark model (no tidemark metadata)"))?;
        verify_checksum(path, metadata, &st)?;
        let meta: Meta = serde_json::from_str(json).map_err(|e| {
            Error::model(path, format!("bad model metadata: {}", crate::data::printable(&e.to_string(), 300)))
        })?;
        if !(1..=FORMAT_VERSION).contains(&meta.format_version) {
            return Err(Error::model(
                path,
                format!(
                    "model format version {} is not supported (this build reads {FORMAT_VERSION})",
                    meta.format_version
                ),
            ));
        }
        check_meta(path, &meta)?;
        let tensors = Tensors { path, st: &st };
        let pm = &meta.preprocessing;
        let (d, k) = (pm.live_features, pm.whitened_dims);
        let live: Vec<usize> = tensors.indices("preprocess.live_features", d)?;
        // input_dim = live + dead was checked, and both lists are in the file.
        let mut is_live = vec![false; meta.input_dim];
        for &j in &live {
            if j >= meta.input_dim || std::mem::replace(&mut is_live[j], true) {
                return Err(Error::model(path, "live feature indices are out of range or repeated"));
            }
        }
        let dead: Vec<usize> = (0..meta.input_dim).filter(|&j| !is_live[j]).collect();
        if dead != pm.dead_features {
            return Err(Error::model(path, "dead feature list does not match the live features"));
        }
        let components = match pm.method {
            Method::Pca => Some(tensors.f32s("preprocess.components", &[k, d])?),
            Method::Standardize => None,
        };
        let scale = tensors.f64s("preprocess.scale", &[k])?;
        if scale.iter().any(|&s| s <= 0.0) {
            return Err(Error::model(path, "tensor 'preprocess.scale' holds a scale that is not positive"));
        }
        let pre = Preprocessor {
            method: pm.method,
            input_dim: meta.input_dim,
            dead_value: if dead.is_empty() { vec![] } else { tensors.f64s("preprocess.dead_values", &[dead.len()])? },
            live,
            dead,
            mean: tensors.f64s("preprocess.mean", &[d])?,
            components,
            scale,
            floored: pm.floored_components,
            shrinkage: pm.shrinkage,
        };
        let density = read_density(&tensors, &meta)?;
        let background = match &meta.background {
            Some(spec) => Some(read_flow(&tensors, "background", spec, meta.format_version)?),
            None => None,
        };
        let s = &meta.scoring;
        let refs = ScoringRefs {
            kde_points: if s.kde_rows == 0 {
                vec![]
            } else {
                tensors.f64s("scores.kde_points", &[s.kde_rows, s.kde_columns.len()])?
            },
            validation_nll: if s.validation_rows == 0 {
                vec![]
            } else {
                tensors.f64s("scores.validation_nll", &[s.validation_rows])?
            },
        };
        Ok(Model { meta, pre, density, background, refs })
    }
}

/// Largest plausible sizes in a model file: far beyond any model this tool
/// fits, small enough that no check below can overflow or allocate wildly.
const MAX_FEATURES: usize = 1 << 24;
const MAX_LAYERS: usize = 1 << 12;
const MAX_DEPTH: usize = 1 << 8;
const MAX_HIDDEN: usize = 1 << 20;
const MAX_COMPONENTS: usize = 1 << 16;
/// Most numbers a mixture's precision factors may hold (8 GiB of f64).
const MAX_MIXTURE_VALUES: usize = 1 << 30;

/// Metadata fields checked against each other and sane bounds, before any
/// of them sizes an allocation.
fn check_meta(path: &Path, meta: &Meta) -> Result<()> {
    let bad = |field: &str, why: String| Err(Error::model(path, format!("metadata field '{field}' {why}")));
    let pm = &meta.preprocessing;
    if meta.input_dim == 0 || meta.input_dim > MAX_FEATURES {
        return bad("input_dim", format!("is {}, outside 1..={MAX_FEATURES}", meta.input_dim));
    }
    if pm.live_features.checked_add(pm.dead_features.len()) != Some(meta.input_dim) {
        return bad(
            "preprocessing.live_features",
            format!(
                "{} plus {} dead features is not input_dim {}",
                pm.live_features,
                pm.dead_features.len(),
                meta.input_dim
            ),
        );
    }
    let k = pm.whitened_dims;
    if k == 0 || k > pm.live_features || (pm.method == Method::Standardize && k != pm.live_features) {
        return bad("preprocessing.whitened_dims", format!("{k} does not match {} live features", pm.live_features));
    }
    if meta.flow_dims != meta.flow.dim || meta.flow_dims > k {
        return bad(
            "flow_dims",
            format!("{} does not match the flow ({}) and {k} whitened dims", meta.flow_dims, meta.flow.dim),
        );
    }
    check_spec(path, "flow", &meta.flow)?;
    if let Some(bg) = &meta.background {
        check_spec(path, "background", bg)?;
        if bg.dim != meta.flow_dims || bg.classes != 0 {
            return bad("background", "does not match the flow's dimensions".into());
        }
    }
    // A class mixture keeps its classes in its components, not in a flow.
    let flow_classes = if meta.kind == Kind::Mixture { 0 } else { meta.classes.len() };
    if flow_classes != meta.flow.classes {
        return bad(
            "classes",
            format!("lists {} classes, the flow has {} class means", meta.classes.len(), meta.flow.classes),
        );
    }
    if let Some(c) = meta.classes.iter().find(|c| c.rows == 0) {
        return bad("classes", format!("class {} has no training rows", c.label));
    }
    let mut labels: Vec<i64> = meta.classes.iter().map(|c| c.label).collect();
    labels.sort_unstable();
    if labels.windows(2).any(|w| w[0] == w[1]) {
        return bad("classes", "lists a label twice".into());
    }
    let finite = [
        ("preprocessing.log_det", pm.log_det),
        ("preprocessing.dead_threshold", pm.dead_threshold),
        ("preprocessing.shrinkage", pm.shrinkage),
        ("train_log_likelihood.mean", meta.train_log_likelihood.mean),
        ("train_log_likelihood.std", meta.train_log_likelihood.std),
        ("background_noise", meta.background_noise.unwrap_or(0.0)),
    ];
    if let Some((field, v)) = finite.iter().find(|(_, v)| !v.is_finite()) {
        return bad(field, format!("is {v}"));
    }
    match (&meta.mixture, meta.kind) {
        (Some(m), crate::model::Kind::Mixture) => {
            if m.components == 0 || m.components > MAX_COMPONENTS {
                return bad("mixture.components", format!("is {}, outside 1..={MAX_COMPONENTS}", m.components));
            }
            if k.checked_mul(k).and_then(|kk| kk.checked_mul(m.components)).is_none_or(|n| n > MAX_MIXTURE_VALUES) {
                return bad("mixture.components", format!("{} components of {k} dims are too large", m.components));
            }
            if meta.flow.layers != 0 || meta.flow_dims != k || meta.background.is_some() {
                return bad("mixture", "comes with a flow or a background flow".into());
            }
            if !meta.classes.is_empty() && meta.format_version < 4 {
                return bad(
                    "format_version",
                    format!("is {}, too old for a mixture with classes", meta.format_version),
                );
            }
            let shares_sum = m.per_class.iter().sum::<usize>() == m.components;
            if m.per_class.len() != meta.classes.len() || (!m.per_class.is_empty() && !shares_sum) {
                return bad("mixture.per_class", "does not give each class its share of the components".into());
            }
            if !(m.ridge.is_finite() && m.ridge >= 0.0) {
                return bad("mixture.ridge", format!("is {}", m.ridge));
            }
        }
        (None, crate::model::Kind::Mixture) => return bad("kind", "is mixture but no mixture is described".into()),
        (Some(_), _) => return bad("mixture", "is set for a model that is not a mixture".into()),
        (None, _) => {}
    }
    let s = &meta.scoring;
    let kde_cols = s.kde_columns.len();
    if s.kde_mean.len() != kde_cols || s.kde_std.len() != kde_cols {
        return bad("scoring", "has a different number of multi-statistic columns, means and spreads".into());
    }
    if let Some(c) = s.kde_columns.iter().find(|c| !crate::score::KDE_STATS.contains(&c.as_str())) {
        return bad("scoring.kde_columns", format!("names an unknown statistic '{}'", crate::data::printable(c, 40)));
    }
    if s.kde_mean.iter().any(|v| !v.is_finite()) || s.kde_std.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
        return bad("scoring", "has a non-finite mean or a spread that is not positive".into());
    }
    if s.kde_rows > 0 && kde_cols == 0 {
        return bad("scoring.kde_rows", "is set without multi-statistic columns".into());
    }
    Ok(())
}

/// A flow's shape within sane bounds.
fn check_spec(path: &Path, prefix: &str, spec: &FlowSpec) -> Result<()> {
    let bad = |why: String| Err(Error::model(path, format!("metadata field '{prefix}' {why}")));
    if spec.dim > MAX_FEATURES || (spec.layers > 0 && spec.dim < 2) {
        return bad(format!("has dim {}; a coupling flow needs 2..={MAX_FEATURES}", spec.dim));
    }
    if spec.layers > MAX_LAYERS || spec.depth == 0 || spec.depth > MAX_DEPTH {
        return bad(format!(
            "has {} layers of depth {} (at most {MAX_LAYERS}, depth 1..={MAX_DEPTH})",
            spec.layers, spec.depth
        ));
    }
    if (spec.layers > 0 && spec.hidden == 0) || spec.hidden > MAX_HIDDEN {
        return bad(format!("has hidden width {} (1..={MAX_HIDDEN})", spec.hidden));
    }
    if spec.classes > MAX_FEATURES {
        return bad(format!("has {} classes", spec.classes));
    }
    if !(spec.clamp.is_finite() && spec.clamp > 0.0) {
        return bad(format!("has soft clamp {}", spec.clamp));
    }
    if let crate::flow::Coupling::Spline { bins, tail_bound } = spec.coupling {
        let sane = (2..=crate::flow::spline::MAX_BINS).contains(&bins) && tail_bound.is_finite() && tail_bound > 0.0;
        if !sane {
            return bad(format!("has spline couplings of {bins} bins on [-{tail_bound}, {tail_bound}]"));
        }
    }
    Ok(())
}

/// Name of the checksum tensor (8 bytes, a little-endian u64): a hash of
/// every metadata entry and of every other tensor's name, dtype, shape and
/// bytes. A tensor rather than a metadata entry because safetensors writes
/// the metadata map in no fixed order, and the same model must give the
/// same file. Files written before it existed have none and load unchecked.
const CHECKSUM_TENSOR: &str = "tidemark.checksum";

/// Fold `b` (with its length) into the hash `h`.
fn hash_bytes(h: &mut u64, b: &[u8]) {
    *h = crate::data::mix64(*h ^ b.len() as u64);
    let mut words = b.chunks_exact(8);
    for w in &mut words {
        *h = crate::data::mix64(*h ^ u64::from_le_bytes(w.try_into().unwrap_or_default()));
    }
    let mut last = [0u8; 8];
    last[..words.remainder().len()].copy_from_slice(words.remainder());
    *h = crate::data::mix64(*h ^ u64::from_le_bytes(last));
}

/// The checksum of a model file's metadata and tensors (order-free: both
/// are taken sorted by name; the checksum tensor itself left out).
fn content_checksum(metadata: &HashMap<String, String>, tensors: &[(&str, Dtype, &[usize], &[u8])]) -> u64 {
    let mut h = 0x6D0D_E1F1_u64;
    let mut keys: Vec<&String> = metadata.keys().collect();
    keys.sort();
    for key in keys {
        hash_bytes(&mut h, key.as_bytes());
        hash_bytes(&mut h, metadata[key].as_bytes());
    }
    let mut sorted: Vec<&(&str, Dtype, &[usize], &[u8])> = tensors.iter().filter(|t| t.0 != CHECKSUM_TENSOR).collect();
    sorted.sort_by_key(|t| t.0);
    for (name, dtype, shape, bytes) in sorted {
        hash_bytes(&mut h, name.as_bytes());
        hash_bytes(&mut h, format!("{dtype:?}{shape:?}").as_bytes());
        hash_bytes(&mut h, bytes);
    }
    h
}

fn verify_checksum(path: &Path, metadata: &HashMap<String, String>, st: &SafeTensors) -> Result<()> {
    let Ok(written) = st.tensor(CHECKSUM_TENSOR) else { return Ok(()) };
    let views = st.tensors();
    let tensors: Vec<(&str, Dtype, &[usize], &[u8])> =
        views.iter().map(|(n, t)| (n.as_str(), t.dtype(), t.shape(), t.data())).collect();
    if written.data() != content_checksum(metadata, &tensors).to_le_bytes() {
        return Err(Error::model(
            path,
            "model file is damaged (its contents do not match the checksum written with it)",
        ));
    }
    Ok(())
}

/// The values of tensor `name`, refused when one is not finite.
fn finite<T: Copy + Into<f64>>(path: &Path, name: &str, v: Vec<T>) -> Result<Vec<T>> {
    if v.iter().any(|&x| !x.into().is_finite()) {
        return Err(Error::model(path, format!("model file is damaged: tensor '{name}' holds a non-finite value")));
    }
    Ok(v)
}

/// Typed access to a model file's tensors: each checked for name, dtype
/// and shape, float values for finiteness.
struct Tensors<'a, 'b> {
    path: &'a Path,
    st: &'a SafeTensors<'b>,
}

impl Tensors<'_, '_> {
    fn raw(&self, name: &str, dtype: Dtype, shape: &[usize]) -> Result<&[u8]> {
        let t = self.st.tensor(name).map_err(|_| Error::model(self.path, format!("missing tensor '{name}'")))?;
        if t.dtype() != dtype || t.shape() != shape {
            return Err(Error::model(
                self.path,
                format!("tensor '{name}' is {:?} {:?}, expected {dtype:?} {shape:?}", t.dtype(), t.shape()),
            ));
        }
        Ok(t.data())
    }
}

impl TensorSource for Tensors<'_, '_> {
    fn path(&self) -> &Path {
        self.path
    }

    fn f32s(&self, name: &str, shape: &[usize]) -> Result<Vec<f32>> {
        finite(self.path, name, from_f32(self.raw(name, Dtype::F32, shape)?))
    }

    fn f64s(&self, name: &str, shape: &[usize]) -> Result<Vec<f64>> {
        finite(self.path, name, from_f64(self.raw(name, Dtype::F64, shape)?))
    }

    fn indices(&self, name: &str, len: usize) -> Result<Vec<usize>> {
        let raw = self.raw(name, Dtype::I64, &[len])?;
        raw.chunks_exact(8)
            .map(|c| usize::try_from(i64::from_le_bytes(c.try_into().unwrap_or_default())))
            .collect::<std::result::Result<_, _>>()
            .map_err(|_| Error::model(self.path, format!("tensor '{name}' holds a negative index")))
    }
}

/// The raw file behind a loaded model, for the extras a checkpoint adds.
pub(crate) struct Extras {
    path: std::path::PathBuf,
    bytes: Vec<u8>,
}

impl Extras {
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// A 1-D f32 tensor of `len` values added by [`Model::save_with`].
    pub fn tensor(&self, name: &str, len: usize) -> Result<Vec<f32>> {
        let st = SafeTensors::deserialize(&self.bytes).map_err(|e| Error::model(&self.path, e))?;
        let t = st.tensor(name).map_err(|_| Error::model(&self.path, format!("missing tensor '{name}'")))?;
        if t.dtype() != Dtype::F32 || t.shape() != [len] {
            return Err(Error::model(&self.path, format!("tensor '{name}' has the wrong dtype or shape")));
        }
        finite(&self.path, name, from_f32(t.data()))
    }

    /// A metadata entry added by [`Model::save_with`].
    pub fn metadata(&self, key: &str) -> Result<String> {
        let (_, header) = SafeTensors::read_metadata(&self.bytes).map_err(|e| Error::model(&self.path, e))?;
        header
            .metadata()
            .as_ref()
            .and_then(|m| m.get(key).cloned())
            .ok_or_else(|| Error::model(&self.path, format!("has no '{key}' metadata (not a checkpoint?)")))
    }
}

/// The density the metadata describes, from its tensors.
fn read_density(t: &Tensors, meta: &Meta) -> Result<Box<dyn Density>> {
    let counts: Vec<usize> = meta.classes.iter().map(|c| c.rows).collect();
    let layout = Layout {
        dim: meta.preprocessing.whitened_dims,
        log_priors: crate::density::log_priors(&counts),
        mean_dims: meta.flow_dims,
        components: meta.mixture.as_ref().map_or(0, |m| m.components),
        flow: &meta.flow,
        version: meta.format_version,
    };
    match meta.kind {
        Kind::Mixture => read_boxed::<MixtureDensity>(t, layout),
        Kind::Gaussian | Kind::ClassGaussian if meta.flow.layers == 0 => read_boxed::<Gaussian>(t, layout),
        _ => read_boxed::<FlowDensity>(t, layout),
    }
}

fn from_f32(b: &[u8]) -> Vec<f32> {
    b.chunks_exact(4).map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]])).collect()
}
fn from_f64(b: &[u8]) -> Vec<f64> {
    b.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap_or_default())).collect()
}
