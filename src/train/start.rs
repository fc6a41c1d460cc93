//! The start of a fit: split the rows, fit the preprocessing (with the
//! covariance shrinkage the kind calls for), build the untrained density
//! and the training state around it.

use super::checkpoint::absolute;
use super::{
    derive, params, split_rows, trained_flow, Adam, BatchBuffers, Fingerprint, FitOptions, Learned, Rows, Run,
    Settings, ShrinkageOption, TrainState, DEFAULT_VAL_FRACTION, FEW_ROWS_PER_DIM, MIN_ROWS,
};
use crate::data::Dataset;
use crate::density::{Density, FlowDensity, Gaussian};
use crate::error::{Error, Result};
use crate::flow::{Coupling, Flow, FlowSpec};
use crate::model::{
    format_version_for, ClassCount, Kind, Meta, Model, PreprocessingMeta, ScoringMeta, ScoringRefs, Spread,
    TrainingSummary,
};
use crate::output::note;
use crate::preprocess::{ColumnStats, Covariance, Method, Preprocessor, Shrinkage, DEFAULT_DEAD_THRESHOLD};

/// Split, fit the preprocessing and set up an untrained flow.
pub(super) fn start(run: &Run, opts: &FitOptions) -> Result<Learned> {
    let x = run.data;
    if x.rows < MIN_ROWS {
        return Err(Error::Invalid(format!(
            "{}: need at least {MIN_ROWS} rows to fit, got {}",
            x.path.display(),
            x.rows
        )));
    }
    if let Some(v) = run.val {
        if v.cols != x.cols {
            return Err(Error::Invalid(format!(
                "{}: validation rows have {} features but the training data has {}",
                v.path.display(),
                v.cols,
                x.cols
            )));
        }
    }
    let seed = opts.seed.unwrap_or(0);
    let val_fraction = if run.val.is_some() { 0.0 } else { opts.val_fraction.unwrap_or(DEFAULT_VAL_FRACTION) };
    let (train_idx, val_idx) = split_rows(x.rows, val_fraction, seed);
    let method = opts.method.unwrap_or(Method::Pca);
    let (kind, by_size) = opts.kind_for(train_idx.len(), x.cols, run.labels.is_some());
    if by_size && !opts.quiet {
        note(format!(
            "{} training rows for {} features ({:.1} per feature): fitting {} with shrinkage, \
             which beats a flow at this size; --kind flow fits a flow anyway",
            train_idx.len(),
            x.cols,
            train_idx.len() as f64 / x.cols as f64,
            if kind == Kind::ClassGaussian { "class means with a shared covariance" } else { "a Gaussian" }
        ));
    }
    let opts = &FitOptions { kind: Some(kind), ..opts.clone() };
    let dead_threshold = opts.dead_threshold.unwrap_or(DEFAULT_DEAD_THRESHOLD);
    let classes = class_counts(run.labels.unwrap_or(&[]));
    let class_of = run.labels.map(|l| class_indices(l, &classes));
    if kind == Kind::ClassGaussian && class_of.is_none() {
        return Err(Error::Invalid("--kind class-gaussian needs --labels".into()));
    }
    if kind == Kind::Gaussian && class_of.is_some() {
        return Err(Error::Invalid(
            "--kind gaussian fits one Gaussian and uses no labels; drop --labels, or use --kind class-gaussian".into(),
        ));
    }
    // Class means (input space) over the training rows, for pooling.
    let class_means: Vec<Vec<f64>> = match (&class_of, kind) {
        (Some(of), Kind::ClassGaussian) => (0..classes.len())
            .map(|c| {
                let rows: Vec<usize> = train_idx.iter().copied().filter(|&r| of[r] as usize == c).collect();
                ColumnStats::of(x, &rows).mean
            })
            .collect(),
        _ => Vec::new(),
    };
    let all_val_rows: Vec<usize> = run.val.map(|v| (0..v.rows).collect()).unwrap_or_default();
    let how = Covariance {
        classes: class_of.as_deref().filter(|_| kind == Kind::ClassGaussian).map(|of| (of, &class_means[..])),
        shrinkage: shrinkage_for(
            kind,
            opts.shrinkage,
            (x, &train_idx, &val_idx),
            run.val.map(|v| (v, &all_val_rows[..])),
        ),
    };
    let pre = Preprocessor::fit_with(x, &train_idx, method, dead_threshold, &how).map_err(Error::Invalid)?;
    let settings = Settings::resolve(opts, train_idx.len(), pre.dim(), run.val.is_some(), run.labels.is_some())?;
    let spec = FlowSpec {
        dim: settings.flow_dims,
        layers: settings.layers,
        hidden: settings.hidden,
        depth: settings.depth,
        clamp: settings.clamp,
        mixing: settings.mixing,
        classes: if matches!(kind, Kind::Gaussian | Kind::Mixture) { 0 } else { classes.len() },
        coupling: settings.coupling,
    };
    let mut flow = Flow::new(spec, settings.seed);
    for (c, mean) in class_means.iter().enumerate() {
        // The class-Gaussian base means are the whitened class means.
        let row: Vec<f32> = mean.iter().map(|&v| v as f32).collect();
        let mut u = vec![0.0f32; pre.dim()];
        pre.transform(&row, 1, &mut u, None);
        let at = flow.class_means + c * flow.spec.dim;
        flow.params[at..at + flow.spec.dim].copy_from_slice(&u);
    }
    let meta = skeleton_meta(x.cols, &pre, &flow, &settings, classes)?;
    let density = untrained_density(kind, flow, pre.dim(), &meta.classes);
    let model = Model { meta, pre, density, background: None, refs: ScoringRefs::default() };
    new_learned(run, model, settings, kind != Kind::Flow)
}

/// The covariance shrinkage of a Gaussian kind: as asked; by default the
/// intensity with the best log-likelihood on the held-out rows (a separate
/// file, or the split's); without held-out rows, Ledoit-Wolf when rows are
/// few per feature (below [`FEW_ROWS_PER_DIM`]), else none. Flows whiten
/// and mixtures whiten with the maximum-likelihood covariance.
pub(super) fn shrinkage_for<'a>(
    kind: Kind,
    asked: Option<ShrinkageOption>,
    (x, train, split_val): (&'a Dataset, &[usize], &'a [usize]),
    val_file: Option<(&'a Dataset, &'a [usize])>,
) -> Shrinkage<'a> {
    if matches!(kind, Kind::Flow | Kind::Mixture) {
        return Shrinkage::None;
    }
    match asked {
        Some(ShrinkageOption::LedoitWolf) => Shrinkage::LedoitWolf,
        Some(ShrinkageOption::Fixed(v)) => Shrinkage::Fixed(v),
        Some(ShrinkageOption::Validated) | None => match val_file {
            Some((v, rows)) => Shrinkage::Validated(v, rows),
            None if !split_val.is_empty() => Shrinkage::Validated(x, split_val),
            None if (train.len() as f64) < FEW_ROWS_PER_DIM * x.cols as f64 => Shrinkage::LedoitWolf,
            None => Shrinkage::None,
        },
    }
}

/// Training state for an untrained `model`: the untrained flow (identity,
/// i.e. the whitened Gaussian, or the class means as they are) is candidate
/// zero; then ActNorm is initialised from the data.
pub(super) fn new_learned(run: &Run, model: Model, settings: Settings, finished: bool) -> Result<Learned> {
    let n = params(&model).len();
    let mut learned = Learned {
        best_params: params(&model).to_vec(),
        adam: Adam::new(n),
        state: TrainState {
            epoch: 1,
            batch: 0,
            step: 0,
            adam_t: 0,
            train_sum: 0.0,
            grad_norm_sum: 0.0,
            best_val: f64::INFINITY,
            best_epoch: 0,
            since_best: 0,
            gaussian_val: f64::NAN,
            lr_scale: 1.0,
            retries: 0,
            seconds: 0.0,
            log: Vec::new(),
            data: Fingerprint::of(run.data),
            val_data: run.val.map(Fingerprint::of),
            labels: run.labels.map(labels_checksum),
            finished,
            model_path: absolute(run.output),
            log_path: absolute(run.log),
        },
        model,
        settings,
    };
    let rows = Rows::new(run, &learned.settings, &learned.model);
    let gaussian = rows.val_nll(&learned.model, learned.settings.threads);
    learned.state.gaussian_val = gaussian;
    learned.state.best_val = gaussian;
    if !finished {
        let init_rows = &rows.train[..rows.train.len().min(4096)];
        let mut batch = BatchBuffers::default();
        rows.prepare_batch(&learned.model, init_rows, &mut batch);
        let flow = trained_flow(&mut learned.model);
        flow.init_actnorm(&batch.head, init_rows.len());
        if flow.spec.classes > 0 {
            init_class_means(flow, &batch.head, &batch.classes);
        }
    }
    Ok(learned)
}

/// Start each class's base mean at the mean latent of its rows under the
/// freshly initialised flow, so training starts from the class-Gaussian fit
/// rather than from one shared mean.
pub(super) fn init_class_means(flow: &mut Flow, head: &[f32], classes: &[u32]) {
    let k = flow.spec.dim;
    let mut ws = crate::flow::Workspace::forward_only(&flow.spec, classes.len());
    crate::flow::forward(flow, &mut ws, head, classes.len(), None);
    let z = ws.latent(k, classes.len());
    let mut sums = vec![0.0f64; flow.spec.classes * k];
    let mut counts = vec![0usize; flow.spec.classes];
    for (r, &c) in classes.iter().enumerate() {
        counts[c as usize] += 1;
        for j in 0..k {
            sums[c as usize * k + j] += z[r * k + j] as f64;
        }
    }
    for c in 0..flow.spec.classes {
        for j in 0..k {
            flow.params[flow.class_means + c * k + j] = (sums[c * k + j] / counts[c].max(1) as f64) as f32;
        }
    }
}

/// The density a kind starts from: the flow as built; for the Gaussian
/// kinds the standard normal around the flow's class means (the whitening
/// holds the covariance); for the mixture the standard normal, until EM
/// replaces it.
pub(super) fn untrained_density(kind: Kind, flow: Flow, dim: usize, classes: &[ClassCount]) -> Box<dyn Density> {
    let log_priors = if flow.spec.classes > 0 {
        crate::density::log_priors(&classes.iter().map(|c| c.rows).collect::<Vec<_>>())
    } else {
        Vec::new()
    };
    match kind {
        Kind::Flow => Box::new(FlowDensity::new(flow, dim, log_priors)),
        _ => Box::new(Gaussian {
            dim,
            mean_dims: flow.spec.dim,
            class_means: flow.params[flow.class_means..].to_vec(),
            log_priors,
        }),
    }
}

/// Class of every data row, as an index into `classes` (sorted labels).
pub(super) fn class_indices(labels: &[i64], classes: &[ClassCount]) -> Vec<u32> {
    labels.iter().map(|l| classes.binary_search_by_key(l, |c| c.label).expect("label was counted") as u32).collect()
}

pub(super) fn labels_checksum(labels: &[i64]) -> u64 {
    labels.iter().fold(labels.len() as u64, |h, &l| derive(h, 6, l as u64))
}

/// The model metadata known before training (the summary is filled at the end).
pub(super) fn skeleton_meta(
    cols: usize,
    pre: &Preprocessor,
    flow: &Flow,
    s: &Settings,
    classes: Vec<ClassCount>,
) -> Result<Meta> {
    Ok(Meta {
        format: "tidemark-model".into(),
        // Spline couplings came with version 3.
        format_version: format_version_for(flow.spec.mixing, s.kind, !classes.is_empty())
            .max(if flow.spec.coupling == Coupling::Affine { 1 } else { 3 }),
        created_by: format!("tidemark {}", env!("CARGO_PKG_VERSION")),
        input_dim: cols,
        preprocessing: PreprocessingMeta {
            method: pre.method,
            live_features: pre.live.len(),
            whitened_dims: pre.dim(),
            dead_features: pre.dead.clone(),
            dead_threshold: s.dead_threshold,
            floored_components: pre.floored,
            shrinkage: pre.shrinkage,
            log_det: pre.log_det(),
        },
        flow_dims: s.flow_dims,
        flow: flow.spec.clone(),
        seed: s.seed,
        training: TrainingSummary {
            settings: serde_json::to_value(s).map_err(|e| Error::Invalid(e.to_string()))?,
            ..TrainingSummary::default()
        },
        train_log_likelihood: Spread::default(),
        classes,
        kind: s.kind,
        background: None,
        background_noise: s.background_noise,
        scoring: ScoringMeta::default(),
        mixture: None,
    })
}

pub(super) fn class_counts(labels: &[i64]) -> Vec<ClassCount> {
    let mut counts = std::collections::BTreeMap::new();
    for &l in labels {
        *counts.entry(l).or_insert(0usize) += 1;
    }
    counts.into_iter().map(|(label, rows)| ClassCount { label, rows }).collect()
}
