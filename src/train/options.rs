//! Fit options as given, checked once, and resolved into settings by data size.

use super::*;

/// Training options as the user gives them, on the command line or in a JSON
/// config file with the same field names; `None` means "choose by data size".
#[derive(Clone, Debug, Default, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FitOptions {
    pub kind: Option<Kind>,
    pub background_noise: Option<f64>,
    pub method: Option<Method>,
    pub layers: Option<usize>,
    pub hidden: Option<usize>,
    pub depth: Option<usize>,
    pub clamp: Option<f32>,
    pub mixing: Option<Mixing>,
    /// LU blocks' learning rate as a fraction of the schedule's.
    pub lu_rate: Option<f64>,
    pub coupling: Option<CouplingKind>,
    pub bins: Option<usize>,
    pub tail_bound: Option<f32>,
    pub flow_dims: Option<usize>,
    pub epochs: Option<usize>,
    pub batch_size: Option<usize>,
    pub lr: Option<f64>,
    pub val_fraction: Option<f64>,
    pub patience: Option<usize>,
    pub dropout: Option<f64>,
    pub noise: Option<f64>,
    pub dead_threshold: Option<f64>,
    pub weight_decay: Option<f64>,
    pub grad_clip: Option<f64>,
    pub max_retries: Option<usize>,
    pub checkpoint_every: Option<usize>,
    pub checkpoint_minutes: Option<f64>,
    pub seed: Option<u64>,
    pub threads: Option<usize>,
    pub shrinkage: Option<ShrinkageOption>,
    /// Mixture components (chosen on validation when unset).
    pub components: Option<usize>,
    /// Wall-clock bound of the search over densities (`20m`, `8h`, ...).
    pub budget: Option<Budget>,
    /// Fit exactly the configuration given (defaults by data size) instead
    /// of choosing the kind on the validation rows.
    #[serde(default)]
    pub no_search: bool,
    #[serde(skip)]
    pub quiet: bool,
    /// Test hook: make the gradient of this step non-finite once.
    #[serde(skip)]
    pub inject_nan_at_step: Option<usize>,
}

impl FitOptions {
    /// Read options from a JSON config file; an unknown key or a value out
    /// of range is an error that names it.
    pub fn from_json_file(path: &std::path::Path) -> Result<FitOptions> {
        let opts = FitOptions::from_json(path, &crate::data::read_text(path)?)?;
        opts.check(&Source::Config(path))?;
        Ok(opts)
    }

    /// Options from the text of a JSON config file (`path` names it in messages).
    /// Malformed JSON, a key we do not know and a value of the wrong type
    /// are each one message naming the file and the key.
    pub fn from_json(path: &std::path::Path, text: &str) -> Result<FitOptions> {
        // Messages quote the file's text (serde quotes keys): no control codes.
        let bad = |msg: String| Error::Invalid(format!("{}: {}", path.display(), crate::data::printable(&msg, 600)));
        let doc: serde_json::Value = serde_json::from_str(text).map_err(|e| bad(format!("not valid JSON ({e})")))?;
        let serde_json::Value::Object(fields) = doc else {
            return Err(bad("a config file is one JSON object of option names and values".into()));
        };
        for (key, value) in fields {
            let shown = crate::data::printable(&key, 40);
            let one = serde_json::Value::Object(serde_json::Map::from_iter([(key, value)]));
            serde_json::from_value::<FitOptions>(one).map_err(|e| bad(format!("key '{shown}': {e}")))?;
        }
        // Each key alone was fine; this catches a key given twice.
        serde_json::from_str(text).map_err(|e| bad(e.to_string()))
    }

    /// Check every option that is set; what passes is what training trusts
    /// (the settings resolved from it need no further checks but the ones
    /// that depend on the data).
    pub fn check(&self, source: &Source) -> Result<()> {
        let n = |field: &str| source.name(field);
        let opt = |v: Option<usize>, field: &str, lo: usize, hi: usize| -> Result<()> {
            v.map_or(Ok(()), |v| check::count(&n(field), v, lo, hi).map(drop))
        };
        opt(self.layers, "layers", 0, 1024)?;
        opt(self.hidden, "hidden", 1, 1 << 16)?;
        opt(self.depth, "depth", 1, 64)?;
        opt(self.flow_dims, "flow_dims", 1, 1 << 20)?;
        opt(self.epochs, "epochs", 1, 1_000_000)?;
        opt(self.batch_size, "batch_size", 1, 1 << 24)?;
        opt(self.max_retries, "max_retries", 0, 1000)?;
        opt(self.checkpoint_every, "checkpoint_every", 1, 1_000_000)?;
        opt(self.threads, "threads", 1, check::MAX_THREADS)?;
        opt(self.components, "components", 1, 1 << 16)?;
        opt(self.bins, "bins", 2, crate::flow::spline::MAX_BINS)?;
        if (self.bins.is_some() || self.tail_bound.is_some()) && self.coupling != Some(CouplingKind::Spline) {
            return Err(Error::Invalid(format!(
                "{} and {} shape spline couplings; add {} spline",
                n("bins"),
                n("tail_bound"),
                n("coupling")
            )));
        }
        if self.components.is_some() && self.kind.is_some_and(|k| k != Kind::Mixture) {
            return Err(Error::Invalid(format!("{} sizes a mixture; it needs the mixture kind", n("components"))));
        }
        let real = |v: Option<f64>, field: &str, test: fn(&str, f64) -> Result<f64>| -> Result<()> {
            v.map_or(Ok(()), |v| test(&n(field), v).map(drop))
        };
        real(self.background_noise, "background_noise", check::positive)?;
        real(self.clamp.map(f64::from), "clamp", check::positive)?;
        real(self.tail_bound.map(f64::from), "tail_bound", check::positive)?;
        real(self.lr, "lr", check::positive)?;
        real(self.lu_rate, "lu_rate", check::positive)?;
        if self.lu_rate.is_some() && self.mixing == Some(Mixing::Permutation) {
            return Err(Error::Invalid(format!("{} steps LU blocks; it needs {} lu", n("lu_rate"), n("mixing"))));
        }
        real(self.grad_clip, "grad_clip", check::positive)?;
        real(self.noise, "noise", check::non_negative)?;
        real(self.weight_decay, "weight_decay", check::non_negative)?;
        real(self.checkpoint_minutes, "checkpoint_minutes", check::non_negative)?;
        real(self.val_fraction, "val_fraction", |name, v| check::fraction_below(name, v, MAX_VAL_FRACTION))?;
        real(self.dropout, "dropout", |name, v| check::fraction_below(name, v, 1.0))?;
        real(self.dead_threshold, "dead_threshold", |name, v| check::fraction_below(name, v, 1.0))?;
        if let Some(ShrinkageOption::Fixed(v)) = self.shrinkage {
            check::fraction_below(&n("shrinkage"), v, 1.0)?;
        }
        if self.shrinkage.is_some() && self.kind.is_none() && self.components.is_some() {
            return Err(Error::Invalid(format!(
                "{} sizes a mixture and {} shrinks a Gaussian; give one, or name the kind",
                n("components"),
                n("shrinkage")
            )));
        }
        if self.shrinkage.is_some() && matches!(self.kind, Some(Kind::Flow | Kind::Mixture)) {
            return Err(Error::Invalid(format!(
                "{} applies to the Gaussian kinds; drop it or the flow kind",
                n("shrinkage")
            )));
        }
        Ok(())
    }

    /// Each option set here, else the one in `fallback`.
    pub fn or(self, fallback: FitOptions) -> FitOptions {
        FitOptions {
            kind: self.kind.or(fallback.kind),
            background_noise: self.background_noise.or(fallback.background_noise),
            method: self.method.or(fallback.method),
            layers: self.layers.or(fallback.layers),
            hidden: self.hidden.or(fallback.hidden),
            depth: self.depth.or(fallback.depth),
            clamp: self.clamp.or(fallback.clamp),
            mixing: self.mixing.or(fallback.mixing),
            lu_rate: self.lu_rate.or(fallback.lu_rate),
            coupling: self.coupling.or(fallback.coupling),
            bins: self.bins.or(fallback.bins),
            tail_bound: self.tail_bound.or(fallback.tail_bound),
            flow_dims: self.flow_dims.or(fallback.flow_dims),
            epochs: self.epochs.or(fallback.epochs),
            batch_size: self.batch_size.or(fallback.batch_size),
            lr: self.lr.or(fallback.lr),
            val_fraction: self.val_fraction.or(fallback.val_fraction),
            patience: self.patience.or(fallback.patience),
            dropout: self.dropout.or(fallback.dropout),
            noise: self.noise.or(fallback.noise),
            dead_threshold: self.dead_threshold.or(fallback.dead_threshold),
            weight_decay: self.weight_decay.or(fallback.weight_decay),
            grad_clip: self.grad_clip.or(fallback.grad_clip),
            max_retries: self.max_retries.or(fallback.max_retries),
            checkpoint_every: self.checkpoint_every.or(fallback.checkpoint_every),
            checkpoint_minutes: self.checkpoint_minutes.or(fallback.checkpoint_minutes),
            seed: self.seed.or(fallback.seed),
            threads: self.threads.or(fallback.threads),
            shrinkage: self.shrinkage.or(fallback.shrinkage),
            components: self.components.or(fallback.components),
            no_search: self.no_search || fallback.no_search,
            budget: self.budget.or(fallback.budget),
            quiet: self.quiet || fallback.quiet,
            inject_nan_at_step: self.inject_nan_at_step.or(fallback.inject_nan_at_step),
        }
    }
}

/// The coupling transform as the user names it (its shape comes from
/// `bins` and `tail_bound`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum CouplingKind {
    /// y = x e^s + t with a soft-clamped log-scale s.
    Affine,
    /// Monotone rational-quadratic splines with linear tails.
    Spline,
}

/// Spline bins and tail bound (whitened units, after ActNorm) when not
/// given: the published tabular settings were of this size (recalled from
/// memory, not measured here).
pub(super) const DEFAULT_BINS: usize = 8;
pub(super) const DEFAULT_TAIL_BOUND: f32 = 3.0;

/// A duration in seconds, written as a number with a unit (`90s`, `20m`,
/// `8h`, `1h30m`; a bare number is seconds).
#[derive(Clone, Copy, Debug, PartialEq, serde::Deserialize, serde::Serialize)]
#[serde(try_from = "String", into = "String")]
pub struct Budget(pub f64);

impl std::str::FromStr for Budget {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        let bad = || format!("'{}' is not a duration such as 90s, 20m, 8h or 1h30m", crate::data::printable(s, 40));
        let mut total = 0.0;
        let mut number = String::new();
        for ch in s.trim().chars() {
            match ch {
                '0'..='9' | '.' => number.push(ch),
                's' | 'm' | 'h' | 'd' => {
                    let v: f64 = number.parse().map_err(|_| bad())?;
                    total += v * match ch {
                        's' => 1.0,
                        'm' => 60.0,
                        'h' => 3600.0,
                        _ => 86400.0,
                    };
                    number.clear();
                }
                _ => return Err(bad()),
            }
        }
        if !number.is_empty() {
            total += number.parse::<f64>().map_err(|_| bad())?;
        }
        if !(total.is_finite() && total > 0.0) {
            return Err(bad());
        }
        Ok(Budget(total))
    }
}

impl TryFrom<String> for Budget {
    type Error = String;
    fn try_from(s: String) -> std::result::Result<Self, String> {
        s.parse()
    }
}

impl From<Budget> for String {
    fn from(b: Budget) -> String {
        format!("{}s", b.0)
    }
}

/// How the Gaussian kinds shrink their covariance, as the user asks:
/// `validated` (the default), `ledoit-wolf`, or an intensity in [0, 1).
#[derive(Clone, Copy, Debug, PartialEq, serde::Deserialize, serde::Serialize)]
#[serde(try_from = "serde_json::Value", into = "String")]
pub enum ShrinkageOption {
    /// The intensity with the best held-out log-likelihood (Ledoit-Wolf
    /// among the candidates).
    Validated,
    LedoitWolf,
    Fixed(f64),
}

impl std::str::FromStr for ShrinkageOption {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "validated" => Ok(ShrinkageOption::Validated),
            "ledoit-wolf" => Ok(ShrinkageOption::LedoitWolf),
            _ => s.parse::<f64>().map(ShrinkageOption::Fixed).map_err(|_| {
                format!("'{}' is not validated, ledoit-wolf or a number in [0, 1)", crate::data::printable(s, 40))
            }),
        }
    }
}

impl TryFrom<serde_json::Value> for ShrinkageOption {
    type Error = String;
    fn try_from(v: serde_json::Value) -> std::result::Result<Self, String> {
        match v {
            serde_json::Value::String(s) => s.parse(),
            serde_json::Value::Number(n) => n.as_f64().map(ShrinkageOption::Fixed).ok_or_else(|| "not a number".into()),
            _ => Err("expected \"validated\", \"ledoit-wolf\" or a number in [0, 1)".into()),
        }
    }
}

impl From<ShrinkageOption> for String {
    fn from(s: ShrinkageOption) -> String {
        match s {
            ShrinkageOption::Validated => "validated".into(),
            ShrinkageOption::LedoitWolf => "ledoit-wolf".into(),
            ShrinkageOption::Fixed(v) => v.to_string(),
        }
    }
}

/// Where options came from, for naming them in messages.
pub enum Source<'a> {
    /// Command-line flags: `--grad-clip`.
    Flags,
    /// A JSON config file: `FILE: grad_clip`.
    Config(&'a Path),
}

impl Source<'_> {
    fn name(&self, field: &str) -> String {
        match self {
            Source::Flags => format!("--{}", field.replace('_', "-")),
            Source::Config(path) => format!("{}: {field}", path.display()),
        }
    }
}

/// Share of the rows held out for validation when none is asked for.
pub(super) const DEFAULT_VAL_FRACTION: f64 = 0.1;

/// Validation share of the rows stays below this (0 fits on every row and
/// validates on the training rows).
pub(super) const MAX_VAL_FRACTION: f64 = 0.9;

/// Threads used when none are asked for: every core.
pub fn default_threads() -> usize {
    std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
}

/// Every training setting, resolved; stored in the model's metadata and in
/// checkpoints (a resumed run uses the checkpoint's settings).
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct Settings {
    pub kind: Kind,
    /// Noise (whitened units) of the background flow's training vectors;
    /// `None`: no background flow.
    pub background_noise: Option<f64>,
    pub method: Method,
    pub layers: usize,
    pub hidden: usize,
    pub depth: usize,
    pub clamp: f32,
    /// What mixes features between coupling layers (models made before the
    /// option existed used the permutation).
    #[serde(default)]
    pub mixing: Mixing,
    /// With LU mixing, the LU blocks' learning rate as a fraction of the
    /// schedule's; `None` (LU flows written before the option existed): the
    /// rule, [`lu_rate`](super::optimizer::lu_rate) of the flow's dims.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lu_rate: Option<f64>,
    /// The coupling transform (models made before the option existed used
    /// the affine one).
    #[serde(default)]
    pub coupling: Coupling,
    pub flow_dims: usize,
    pub epochs: usize,
    pub batch_size: usize,
    pub lr: f64,
    pub warmup_fraction: f64,
    pub grad_clip: f64,
    pub weight_decay: f64,
    pub val_fraction: f64,
    /// Validation rows come from a separate file instead of a split.
    pub val_file: bool,
    pub patience: usize,
    pub dropout: f64,
    pub noise: f64,
    pub dead_threshold: f64,
    /// Divergences (non-finite loss or gradient) survived by rolling back
    /// and halving the learning rate before training stops.
    pub max_retries: usize,
    /// Write a checkpoint every this many epochs (and at every new best).
    pub checkpoint_every: usize,
    /// ... and at least this often within an epoch.
    pub checkpoint_minutes: f64,
    pub seed: u64,
    pub threads: usize,
}

/// A default that depends on rows per dimension: the value for fewer than
/// 50, 200, 500, and for more (dropout and noise measured to help small sets).
pub(super) fn by_rows_per_dim(per_dim: f64, values: [f64; 4]) -> f64 {
    let band = [FEW_ROWS_PER_DIM, 200.0, 500.0].iter().take_while(|&&limit| per_dim >= limit).count();
    values[band]
}

/// Rows per whitened dimension below which the flow runs only on the
/// leading third of the principal components (measured: see README).
pub(super) const FEW_ROWS_PER_DIM: f64 = 50.0;

/// Training rows per input feature below which the density defaults to a
/// Gaussian with Ledoit-Wolf shrinkage instead of a flow. Measured on one
/// real dump (384-d sentence embeddings, default settings otherwise): the
/// flow's held-out log-likelihood trailed the Gaussian's by 345 nats per
/// vector at 1.4 training rows per feature and by 8 at 3.5, and led by 6 at
/// 4.7, 14 at 5.9 and 23 at 8.5.
pub(super) const GAUSSIAN_BELOW_ROWS_PER_FEATURE: f64 = 4.0;

impl FitOptions {
    /// Whether any option that only shapes a flow or its training was given.
    pub(super) fn asks_for_a_flow(&self) -> bool {
        self.background_noise.is_some()
            || self.epochs.is_some()
            || self.batch_size.is_some()
            || self.lr.is_some()
            || self.patience.is_some()
            || self.weight_decay.is_some()
            || self.grad_clip.is_some()
            || self.max_retries.is_some()
            || self.inject_nan_at_step.is_some()
            || self.method.is_some_and(|m| m != Method::Pca)
            || self.layers.is_some()
            || self.hidden.is_some()
            || self.depth.is_some()
            || self.clamp.is_some()
            || self.mixing.is_some()
            || self.lu_rate.is_some()
            || self.coupling.is_some()
            || self.bins.is_some()
            || self.tail_bound.is_some()
            || self.flow_dims.is_some()
            || self.dropout.is_some()
            || self.noise.is_some()
    }

    /// The kind asked for, or the one a kind's own option names when no
    /// kind is given: `--components` sizes a mixture, `--shrinkage` shrinks
    /// the (class-)Gaussian's covariance. Like any density option, either
    /// one fits exactly that model instead of searching.
    pub(super) fn implied_kind(&self, labelled: bool) -> Option<Kind> {
        let gaussian = if labelled { Kind::ClassGaussian } else { Kind::Gaussian };
        self.kind.or(self.components.map(|_| Kind::Mixture)).or(self.shrinkage.map(|_| gaussian))
    }

    /// The density kind: as asked; else, with fewer than
    /// [`GAUSSIAN_BELOW_ROWS_PER_FEATURE`] training rows per feature and no
    /// flow option given, the Gaussian (class-Gaussian with labels); else a
    /// flow. The second value says whether the size of the data chose it.
    pub(super) fn kind_for(&self, rows: usize, features: usize, labelled: bool) -> (Kind, bool) {
        match self.implied_kind(labelled) {
            Some(kind) => (kind, false),
            None if (rows as f64) < GAUSSIAN_BELOW_ROWS_PER_FEATURE * features as f64 && !self.asks_for_a_flow() => {
                (if labelled { Kind::ClassGaussian } else { Kind::Gaussian }, true)
            }
            None => (Kind::Flow, false),
        }
    }
}

impl Settings {
    /// Fill every unset option from the size of the training set:
    /// `n` training rows, `d` live dimensions.
    pub fn resolve(o: &FitOptions, n: usize, d: usize, val_file: bool, labelled: bool) -> Result<Settings> {
        let method = o.method.unwrap_or(Method::Pca);
        let kind = o.kind.unwrap_or_default();
        if kind != Kind::Flow && method != Method::Pca {
            return Err(Error::Invalid(
                "--kind gaussian, class-gaussian and mixture whiten with PCA; drop --method".into(),
            ));
        }
        if kind != Kind::Flow && o.background_noise.is_some() {
            return Err(Error::Invalid("--background-noise trains a background flow; it needs --kind flow".into()));
        }
        let per_dim = n as f64 / d as f64;
        let few = per_dim < FEW_ROWS_PER_DIM;
        // Class-conditional flows keep every dimension: class means on a
        // shared standard-normal remainder could not differ.
        let reduce = few && method == Method::Pca && kind == Kind::Flow && !labelled;
        let default_dims = if reduce { d.div_ceil(3).max(2.min(d)) } else { d };
        let flow_dims = o.flow_dims.unwrap_or(default_dims);
        if flow_dims == 0 || flow_dims > d {
            return Err(Error::Invalid(format!("--flow-dims must be between 1 and {d} (the live features)")));
        }
        let mixing = o.mixing.unwrap_or_default();
        if o.lu_rate.is_some() && mixing != Mixing::Lu {
            return Err(Error::Invalid("--lu-rate steps LU blocks; it needs --mixing lu".into()));
        }
        let batch_size = o.batch_size.unwrap_or(if n >= 20_000 { 256 } else { 128 }).clamp(1, n);
        let steps_per_epoch = n.div_ceil(batch_size);
        let s = Settings {
            kind,
            background_noise: o.background_noise,
            method,
            layers: if flow_dims < 2 || kind != Kind::Flow { 0 } else { o.layers.unwrap_or(6) },
            hidden: o.hidden.unwrap_or((2 * flow_dims).clamp(64, 512).next_multiple_of(32)),
            depth: o.depth.unwrap_or(2),
            clamp: o.clamp.unwrap_or(3.0),
            mixing,
            lu_rate: (mixing == Mixing::Lu).then(|| o.lu_rate.unwrap_or(super::optimizer::lu_rate(flow_dims) as f64)),
            coupling: match o.coupling {
                Some(CouplingKind::Spline) => Coupling::Spline {
                    bins: o.bins.unwrap_or(DEFAULT_BINS),
                    tail_bound: o.tail_bound.unwrap_or(DEFAULT_TAIL_BOUND),
                },
                _ => Coupling::Affine,
            },
            flow_dims,
            epochs: o.epochs.unwrap_or((20_000usize.div_ceil(steps_per_epoch)).clamp(20, 200)),
            batch_size,
            lr: o.lr.unwrap_or(1e-3),
            warmup_fraction: 0.02,
            grad_clip: o.grad_clip.unwrap_or(5.0),
            weight_decay: o.weight_decay.unwrap_or(0.0),
            val_fraction: if val_file { 0.0 } else { o.val_fraction.unwrap_or(DEFAULT_VAL_FRACTION) },
            val_file,
            patience: o.patience.unwrap_or(10),
            dropout: o.dropout.unwrap_or_else(|| by_rows_per_dim(per_dim, [0.2, 0.1, 0.1, 0.0])),
            noise: o.noise.unwrap_or_else(|| by_rows_per_dim(per_dim, [0.2, 0.1, 0.0, 0.0])),
            dead_threshold: o.dead_threshold.unwrap_or(DEFAULT_DEAD_THRESHOLD),
            max_retries: o.max_retries.unwrap_or(3),
            checkpoint_every: o.checkpoint_every.unwrap_or(1),
            checkpoint_minutes: o.checkpoint_minutes.unwrap_or(10.0),
            seed: o.seed.unwrap_or(0),
            threads: o.threads.unwrap_or_else(default_threads),
        };
        Ok(s)
    }

    /// The LU blocks' learning rate as a fraction of the schedule's.
    pub fn lu_block_rate(&self) -> f32 {
        self.lu_rate.map_or_else(|| super::optimizer::lu_rate(self.flow_dims), |r| r as f32)
    }
}
