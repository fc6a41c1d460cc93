//! The `tidemark` command line: parses arguments and calls the library.

use clap::{Args, Parser, Subcommand};
use signal_hook::consts::{SIGINT, SIGTERM};
use signal_hook::iterator::Signals;
use std::ffi::OsString;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use tidemark::calibrate::{self, Calibration};
use tidemark::error::{EXIT_BAD_INPUT, EXIT_INTERRUPTED};
use tidemark::flow::Mixing;
use tidemark::model::{Kind, Model};
use tidemark::output::{self, check_files, note, FileKey, Input, Output};
use tidemark::preprocess::Method;
use tidemark::train::{default_threads, Budget, Checkpoint, CouplingKind, FitOptions, Run, ShrinkageOption, Source};
use tidemark::{check, columnar, data, demo, evaluate, input, report, score, stream, Error, Result};

#[derive(Parser)]
#[command(
    name = "tidemark",
    version,
    about = "Fit normalizing flows to embedding vectors and score new vectors for how in-distribution they are"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Fit a flow to embedding vectors (.npy, .safetensors or .csv) and save it.
    Fit(Box<FitArgs>),
    /// Score vectors with a fitted model: one row of scores per vector.
    #[command(after_help = score_columns_help())]
    Score {
        /// Model file from `tidemark fit` (.safetensors).
        model: PathBuf,
        /// Vectors to score (.npy, .safetensors, .csv, Parquet or Arrow IPC; - for .npy or an Arrow stream on standard input), as wide as the training data.
        data: PathBuf,
        /// Output file: .csv, .npy (float32, column names in a sidecar .json), .jsonl, .parquet, .arrow or .arrows; - for CSV on standard output.
        #[arg(short, long)]
        output: PathBuf,
        /// Columns to write, comma-separated [default: all the model has].
        #[arg(long, value_delimiter = ',')]
        columns: Vec<String>,
        /// Batch typicality test over consecutive batches of this many vectors.
        #[arg(long)]
        batch: Option<usize>,
        /// Significance of the batch test.
        #[arg(long, default_value_t = 0.01)]
        batch_alpha: f64,
        /// Where the batch test goes [default: OUTPUT with .batches.csv].
        #[arg(long)]
        batch_output: Option<PathBuf>,
        /// Calibration from `tidemark calibrate`: adds p_value and flagged columns and counts the flagged rows.
        #[arg(long)]
        calibration: Option<PathBuf>,
        /// Rows with a NaN or infinite value: error (stop, write nothing), flag (write with empty scores and a bad_row reason column) or skip (leave out); the count is printed.
        #[arg(long, value_enum, default_value = "error")]
        bad_rows: score::BadRows,
        /// Parquet or Arrow input: columns written unchanged beside the scores, in input order (.parquet, .arrow or .arrows output), comma-separated.
        #[arg(long, value_delimiter = ',')]
        keep: Vec<String>,
        /// With -o -: write an Arrow IPC stream to standard output instead of CSV.
        #[arg(long)]
        arrow_stdout: bool,
        #[command(flatten)]
        input: InputArgs,
        /// Worker threads (the default is every core).
        #[arg(long, default_value_t = default_threads())]
        threads: usize,
        /// Replace output files that already exist.
        #[arg(long)]
        force: bool,
    },
    /// Pick a threshold at a false-alarm rate from held-out in-distribution vectors (split-conformal).
    Calibrate {
        /// Model file from `tidemark fit` (.safetensors).
        model: PathBuf,
        /// Held-out in-distribution vectors, never used for fitting.
        held_out: PathBuf,
        /// Where the calibration goes (.json).
        #[arg(short, long)]
        output: PathBuf,
        /// Target false-alarm rate (share of in-distribution vectors flagged).
        #[arg(long)]
        false_alarm: f64,
        /// Score column to calibrate (see `tidemark score --help`); choose it with `tidemark evaluate` first.
        #[arg(long, default_value = "log_likelihood")]
        score: String,
        #[command(flatten)]
        input: InputArgs,
        /// Worker threads (the default is every core).
        #[arg(long, default_value_t = default_threads())]
        threads: usize,
        /// Replace output files that already exist.
        #[arg(long)]
        force: bool,
    },
    /// Measure how well each score separates in-distribution scores from known outlier sets.
    Evaluate {
        /// Scores of held-out in-distribution vectors (from `tidemark score`).
        #[arg(long)]
        id: PathBuf,
        /// An outlier set's scores, as NAME=FILE; repeat for several.
        #[arg(long, value_parser = parse_named, required = true)]
        ood: Vec<(String, PathBuf)>,
        /// Columns to evaluate, comma-separated [default: every score column].
        #[arg(long, value_delimiter = ',')]
        columns: Vec<String>,
        /// Full results as JSON.
        #[arg(short, long)]
        output: Option<PathBuf>,
        /// A self-contained HTML report with histograms, ROC curves and metrics.
        #[arg(long)]
        report: Option<PathBuf>,
        /// Calibration whose threshold the report draws and whose decision rates evaluate reports.
        #[arg(long)]
        calibration: Option<PathBuf>,
        /// Training log (from `fit --log`) whose curves the report draws.
        #[arg(long)]
        log: Option<PathBuf>,
        /// Bootstrap resamples for the 95% intervals.
        #[arg(long, default_value_t = 1000)]
        bootstrap: usize,
        /// Seed of the bootstrap resampling.
        #[arg(long, default_value_t = 0)]
        seed: u64,
        /// Replace output files that already exist.
        #[arg(long)]
        force: bool,
    },
    /// Split a file of vectors into PREFIX.train.npy, PREFIX.calibration.npy and PREFIX.test.npy.
    Split {
        /// Vectors to split (.npy, .safetensors, .csv, Parquet or Arrow).
        data: PathBuf,
        /// Shares of the rows for training, calibration and test, summing to 1.
        #[arg(long, value_delimiter = ',', default_value = "0.8,0.1,0.1")]
        fractions: Vec<f64>,
        /// Seed of the shuffle.
        #[arg(long, default_value_t = 0)]
        seed: u64,
        /// Split by position without shuffling (time-ordered data: fit on the past, test on the future).
        #[arg(long)]
        ordered: bool,
        /// Prefix of the output files.
        #[arg(short, long)]
        output: PathBuf,
        #[command(flatten)]
        input: InputArgs,
    },
    /// Measure training and scoring throughput of the flow on synthetic data.
    Bench {
        /// Width of the synthetic vectors.
        #[arg(long, default_value_t = 64)]
        dim: usize,
        /// Conditioner hidden width.
        #[arg(long, default_value_t = 128)]
        hidden: usize,
        /// Coupling layers.
        #[arg(long, default_value_t = 8)]
        layers: usize,
        /// Conditioner hidden layers.
        #[arg(long, default_value_t = 2)]
        depth: usize,
        /// Minibatch size.
        #[arg(long, default_value_t = 256)]
        batch: usize,
        /// Coupling transform.
        #[arg(long, value_enum, default_value_t = CouplingKind::Affine)]
        coupling: CouplingKind,
        /// Spline bins (with --coupling spline).
        #[arg(long, default_value_t = 8)]
        bins: usize,
        /// Worker threads.
        #[arg(long, default_value_t = 1)]
        threads: usize,
        /// Seconds per measurement.
        #[arg(long, default_value_t = 3.0)]
        seconds: f64,
        /// Also write the result as JSON.
        #[arg(long)]
        json: Option<PathBuf>,
        /// Replace output files that already exist.
        #[arg(long)]
        force: bool,
    },
    /// Print how a model was made and how it did.
    Inspect {
        /// Model file from `tidemark fit` (.safetensors).
        model: PathBuf,
        /// Print the raw metadata JSON instead.
        #[arg(long)]
        json: bool,
    },
    /// Draw vectors from a fitted model into a .npy file.
    Sample {
        /// Model file from `tidemark fit` (.safetensors).
        model: PathBuf,
        /// Vectors to draw.
        #[arg(short = 'n', long)]
        count: usize,
        /// Where the vectors go (.npy, float32).
        #[arg(short, long)]
        output: PathBuf,
        /// Seed of the draw.
        #[arg(long, default_value_t = 0)]
        seed: u64,
        /// Replace output files that already exist.
        #[arg(long)]
        force: bool,
    },
    /// Run the whole job on the shipped demo data and summarise it.
    Demo {
        /// Folder holding the demo's .npy files (from scripts/make_demo_data.py).
        #[arg(long, default_value = "demo-data")]
        data_dir: PathBuf,
        /// Folder for the model, calibrations, scores, evaluation and report.
        #[arg(long, default_value = "demo-out")]
        out_dir: PathBuf,
        /// Worker threads (the default is every core).
        #[arg(long, default_value_t = default_threads())]
        threads: usize,
    },
}

#[derive(Args)]
struct InputArgs {
    /// Tensor to read from a .safetensors file holding several.
    #[arg(long)]
    tensor: Option<String>,
    /// Parquet or Arrow input: the list-of-floats column holding the embedding [default: the only list column].
    #[arg(long, conflicts_with_all = ["feature_columns", "column_prefix"])]
    column: Option<String>,
    /// Parquet or Arrow input: float columns holding the embedding, comma-separated, in this order.
    #[arg(long, value_delimiter = ',', conflicts_with = "column_prefix")]
    feature_columns: Vec<String>,
    /// Parquet or Arrow input: every float column whose name starts with this, in file order.
    #[arg(long)]
    column_prefix: Option<String>,
}

impl InputArgs {
    fn spec(&self) -> input::InputSpec {
        let features = if let Some(c) = &self.column {
            Some(columnar::Features::List(c.clone()))
        } else if !self.feature_columns.is_empty() {
            Some(columnar::Features::Named(self.feature_columns.clone()))
        } else {
            self.column_prefix.clone().map(columnar::Features::Prefix)
        };
        input::InputSpec {
            tensor: self.tensor.clone(),
            columns: columnar::Selection { features, ..Default::default() },
            ..Default::default()
        }
    }
}

#[derive(Args)]
struct FitArgs {
    /// Training vectors (.npy, .safetensors, .csv, Parquet or Arrow IPC), one row per vector.
    data: PathBuf,
    /// Where to write the model (.safetensors).
    #[arg(short, long)]
    output: PathBuf,
    #[command(flatten)]
    input: InputArgs,
    /// Integer class label per row (.npy or one-column .csv): fits a class-conditional model.
    #[arg(long, conflicts_with = "label_column")]
    labels: Option<PathBuf>,
    /// Parquet or Arrow input: integer column of class labels (fits a class-conditional model).
    #[arg(long)]
    label_column: Option<String>,
    /// Fit on a seeded uniform sample of at most this many rows, drawn while reading (any input format).
    #[arg(long)]
    max_rows: Option<usize>,
    /// Density model: flow, gaussian (full covariance), class-gaussian (class means, shared covariance; needs --labels) or mixture (Gaussian mixture, full covariances).
    #[arg(long, value_enum)]
    kind: Option<Kind>,
    /// Also train a background flow on training vectors with Gaussian noise of this scale (whitened units), for the log_likelihood_ratio score.
    #[arg(long)]
    background_noise: Option<f64>,
    /// Preprocessing before the flow [default: pca].
    #[arg(long, value_enum)]
    method: Option<Method>,
    /// Coupling layers [default: 6].
    #[arg(long)]
    layers: Option<usize>,
    /// Conditioner hidden width [default: 2 x flow dims, within 64..512].
    #[arg(long)]
    hidden: Option<usize>,
    /// Conditioner hidden layers [default: 2].
    #[arg(long)]
    depth: Option<usize>,
    /// Soft clamp of the coupling log-scale [default: 3].
    #[arg(long)]
    clamp: Option<f32>,
    /// Coupling transform: affine, or monotone rational-quadratic splines [default: affine].
    #[arg(long, value_enum)]
    coupling: Option<CouplingKind>,
    /// Spline bins (with --coupling spline) [default: 8].
    #[arg(long)]
    bins: Option<usize>,
    /// Splines act on [-B, B] (whitened units after ActNorm), the identity outside (with --coupling spline) [default: 3].
    #[arg(long)]
    tail_bound: Option<f32>,
    /// What mixes features between coupling layers [default: permutation].
    #[arg(long, value_enum)]
    mixing: Option<Mixing>,
    /// Leading principal components the flow models; the rest are standard normal [default: all, or a third when rows per dimension < 50].
    #[arg(long)]
    flow_dims: Option<usize>,
    /// Maximum epochs [default: by data size, 20..200].
    #[arg(long)]
    epochs: Option<usize>,
    /// Minibatch size [default: 128, or 256 from 20,000 rows].
    #[arg(long)]
    batch_size: Option<usize>,
    /// Peak learning rate (Adam; warm-up then cosine decay) [default: 0.001].
    #[arg(long)]
    lr: Option<f64>,
    /// Fraction of rows held out for validation and early stopping [default: 0.1].
    #[arg(long)]
    val_fraction: Option<f64>,
    /// Stop after this many epochs without a better validation NLL [default: 10].
    #[arg(long)]
    patience: Option<usize>,
    /// Dropout in the conditioner [default: by rows per dimension].
    #[arg(long)]
    dropout: Option<f64>,
    /// Gaussian noise added to whitened training vectors [default: by rows per dimension].
    #[arg(long)]
    noise: Option<f64>,
    /// A feature is dead when its std is at most this fraction of the largest std [default: 1e-6].
    #[arg(long)]
    dead_threshold: Option<f64>,
    /// Seed for the split, initialisation, shuffling, noise and dropout [default: 0].
    #[arg(long)]
    seed: Option<u64>,
    /// Worker threads [default: all cores].
    #[arg(long)]
    threads: Option<usize>,
    /// Covariance shrinkage of the Gaussian kinds: validated (the intensity with the best held-out log-likelihood, Ledoit-Wolf's among the candidates), ledoit-wolf, or an intensity in [0, 1) [default: validated].
    #[arg(long)]
    shrinkage: Option<ShrinkageOption>,
    /// Fit exactly the configuration the options give (a flow unless rows per feature are few) instead of comparing density kinds on the validation rows.
    #[arg(long)]
    no_search: bool,
    /// Wall-clock bound of the search over densities, e.g. 20m or 8h [default: 5 x the projected time of one flow at the settings table, at least 1 minute].
    #[arg(long)]
    budget: Option<Budget>,
    /// Components of the mixture kind [default: chosen on the validation rows among 1, 2, 4, ... 64].
    #[arg(long)]
    components: Option<usize>,
    /// Held-out in-distribution rows for validation and early stopping (instead of a split).
    #[arg(long)]
    val: Option<PathBuf>,
    /// Decoupled weight decay on conditioner weights [default: 0].
    #[arg(long)]
    weight_decay: Option<f64>,
    /// Clip the gradient to this global norm [default: 5].
    #[arg(long)]
    grad_clip: Option<f64>,
    /// Roll back and halve the learning rate this many times on a non-finite loss before giving up [default: 3].
    #[arg(long)]
    max_retries: Option<usize>,
    /// Checkpoint every N epochs, and at every new best [default: 1].
    #[arg(long)]
    checkpoint_every: Option<usize>,
    /// ... and at least every M minutes within an epoch [default: 10].
    #[arg(long)]
    checkpoint_minutes: Option<f64>,
    /// Where the latest checkpoint is kept [default: MODEL with .checkpoint.safetensors].
    #[arg(long)]
    checkpoint: Option<PathBuf>,
    /// Continue an interrupted run from its checkpoint (give the same data again).
    #[arg(long)]
    resume: Option<PathBuf>,
    /// Write a JSON-lines training log, one object per epoch.
    #[arg(long)]
    log: Option<PathBuf>,
    /// Test hook: make the gradient at this step non-finite once.
    #[arg(long, hide = true)]
    inject_nan_at_step: Option<usize>,
    /// JSON file of training options (same names as the flags, with underscores); flags override it.
    #[arg(long)]
    config: Option<PathBuf>,
    /// No progress output.
    #[arg(long, short)]
    quiet: bool,
    /// Replace output files that already exist (a resumed run may always
    /// rewrite its own model, log and checkpoint).
    #[arg(long)]
    force: bool,
}

impl FitArgs {
    /// The training options given as flags (unchecked).
    fn options(&self) -> FitOptions {
        FitOptions {
            kind: self.kind,
            background_noise: self.background_noise,
            method: self.method,
            layers: self.layers,
            hidden: self.hidden,
            depth: self.depth,
            clamp: self.clamp,
            mixing: self.mixing,
            coupling: self.coupling,
            bins: self.bins,
            tail_bound: self.tail_bound,
            flow_dims: self.flow_dims,
            epochs: self.epochs,
            batch_size: self.batch_size,
            lr: self.lr,
            val_fraction: self.val_fraction,
            patience: self.patience,
            dropout: self.dropout,
            noise: self.noise,
            dead_threshold: self.dead_threshold,
            weight_decay: self.weight_decay,
            grad_clip: self.grad_clip,
            max_retries: self.max_retries,
            checkpoint_every: self.checkpoint_every,
            checkpoint_minutes: self.checkpoint_minutes,
            seed: self.seed,
            threads: self.threads,
            shrinkage: self.shrinkage,
            components: self.components,
            no_search: self.no_search,
            budget: self.budget,
            quiet: self.quiet,
            inject_nan_at_step: self.inject_nan_at_step,
        }
    }
}

fn fit(a: Box<FitArgs>) -> Result<()> {
    let flags = a.options();
    flags.check(&Source::Flags)?;
    let opts = match &a.config {
        Some(path) => flags.or(FitOptions::from_json_file(path)?),
        None => flags,
    };
    let resumed = a.resume.as_deref().map(Checkpoint::load).transpose()?;
    let checkpoint = a
        .checkpoint
        .clone()
        .or_else(|| a.resume.clone())
        .unwrap_or_else(|| a.output.with_extension("checkpoint.safetensors"));
    // A resumed run goes on writing the log it was writing.
    let log = a.log.clone().or_else(|| resumed.as_ref().and_then(|c| c.log_path()).map(Path::to_path_buf));
    check_fit_files(&a, resumed.as_ref(), &checkpoint, log.as_deref())?;
    let mut spec = a.input.spec();
    spec.columns.label_column = a.label_column.clone();
    spec.max_rows = a.max_rows;
    spec.seed = a.seed.unwrap_or(0);
    let read = input::open(&a.data, &spec)?;
    let x = read.data;
    let labels = match &a.labels {
        Some(_) if a.max_rows.is_some() => {
            return Err(Error::Invalid(
                "--max-rows with --labels FILE: put the labels in a column of the data file (--label-column)".into(),
            ))
        }
        Some(p) => {
            let l = data::read_labels(p)?;
            data::check_label_count(p, l.len(), x.rows)?;
            Some(l)
        }
        None => read.labels,
    };
    let val_spec = a.input.spec();
    let val = a.val.as_deref().map(|p| input::open(p, &val_spec).map(|i| i.data)).transpose()?;
    let stop = stop_on_signals();
    let found = FileKey::of(&checkpoint).inode();
    let run = Run {
        data: &x,
        val: val.as_ref(),
        labels: labels.as_deref(),
        output: Some(&a.output),
        checkpoint: Some(checkpoint.clone()),
        resume: resumed.as_ref(),
        log: log.as_deref(),
        stop: Some(&stop),
    };
    let model = match tidemark::train::fit_run(&run, &opts) {
        Err(Error::Interrupted(msg)) if checkpoint.exists() => {
            let added_log = log.as_deref().filter(|_| a.log.is_none());
            return Err(Error::Interrupted(format!(
                "{msg}; continue with: {}",
                resume_command(std::env::args_os(), &checkpoint, added_log)
            )));
        }
        result => result?,
    };
    model.save(&a.output)?;
    // The run is complete: its checkpoint has nothing left to resume. Only
    // a file this run wrote (a new inode) or resumed from is removed.
    let resumed_from_it = resumed.as_ref().is_some_and(|c| FileKey::of(c.path()).same(&FileKey::of(&checkpoint)));
    let written = FileKey::of(&checkpoint).inode().is_some_and(|now| Some(now) != found);
    if resumed_from_it || written {
        let _ = std::fs::remove_file(&checkpoint);
    }
    if !a.quiet {
        note(model.meta.fit_summary(&a.output));
    }
    Ok(())
}

/// `fit`'s outputs against its inputs. A resumed run may rewrite the model,
/// log and checkpoint it was writing; anything else that exists needs
/// `--force`, and a checkpoint left by an earlier run is pointed out.
fn check_fit_files(a: &FitArgs, resumed: Option<&Checkpoint>, checkpoint: &Path, log: Option<&Path>) -> Result<()> {
    let same = |x: &Path, y: &Path| FileKey::of(x).same(&FileKey::of(y));
    let own = |recorded: Option<&Path>, path: &Path| recorded.is_some_and(|r| same(r, path));
    let mut inputs = vec![Input { flag: "DATA", path: &a.data }];
    let named = [("--labels", &a.labels), ("--val", &a.val), ("--config", &a.config), ("--resume", &a.resume)];
    inputs.extend(named.iter().filter_map(|(flag, p)| p.as_deref().map(|path| Input { flag, path })));
    let mut outputs = vec![
        Output {
            flag: "-o",
            path: &a.output,
            replace: a.force || own(resumed.and_then(Checkpoint::model_path), &a.output),
            may_be: None,
        },
        Output {
            flag: "--checkpoint",
            path: checkpoint,
            // An existing checkpoint gets its own message.
            replace: true,
            may_be: Some("--resume"),
        },
    ];
    if let Some(log) = log {
        let replace = a.force || own(resumed.and_then(Checkpoint::log_path), log);
        outputs.push(Output { flag: "--log", path: log, replace, may_be: None });
    }
    // Inputs first; then a checkpoint left by an interrupted run, which
    // explains the existing model and log too; then other existing files.
    let anything: Vec<Output> = outputs.iter().map(|o| Output { replace: true, ..*o }).collect();
    check_files(&inputs, &anything)?;
    let own_checkpoint = resumed.is_some_and(|c| same(c.path(), checkpoint));
    if !own_checkpoint && !a.force && std::fs::symlink_metadata(checkpoint).is_ok() {
        return Err(Error::Invalid(format!(
            "{}: a checkpoint of an earlier run is here; continue it with --resume {}, or pass --force to start over",
            checkpoint.display(),
            checkpoint.display()
        )));
    }
    check_files(&inputs, &outputs)
}

/// The command that continues an interrupted fit: this one as typed, with
/// `--resume CHECKPOINT` in place of any `--checkpoint` or `--resume`, plus
/// the log the run was writing when it was not named; quoted for a shell.
fn resume_command(args: impl Iterator<Item = OsString>, checkpoint: &Path, log: Option<&Path>) -> String {
    let mut words: Vec<String> = Vec::new();
    let mut args = args.map(|a| a.to_string_lossy().into_owned());
    while let Some(arg) = args.next() {
        if arg == "--resume" || arg == "--checkpoint" {
            args.next();
        } else if !arg.starts_with("--resume=") && !arg.starts_with("--checkpoint=") {
            words.push(arg);
        }
    }
    words.extend(["--resume".to_string(), checkpoint.display().to_string()]);
    if let Some(log) = log {
        words.extend(["--log".to_string(), log.display().to_string()]);
    }
    words.iter().map(|w| shell_quote(w)).collect::<Vec<_>>().join(" ")
}

/// A word as a POSIX shell reads it back unchanged.
fn shell_quote(word: &str) -> String {
    let plain = |c: char| c.is_ascii_alphanumeric() || "_-./=:,@%+".contains(c);
    if !word.is_empty() && word.chars().all(plain) {
        word.to_string()
    } else {
        format!("'{}'", word.replace('\'', r"'\''"))
    }
}

/// Most values `sample` draws (4 GiB of float32): a guard against a typo in
/// `-n`, well above any sample a check of a model needs.
const MAX_SAMPLE_VALUES: usize = 1 << 30;

fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Fit(a) => fit(a),
        Command::Score {
            model,
            data: path,
            output,
            columns,
            batch,
            batch_alpha,
            batch_output,
            calibration,
            bad_rows,
            keep,
            arrow_stdout,
            input: input_args,
            threads,
            force,
        } => {
            let threads = check::threads("--threads", threads)?;
            let batch = match batch {
                Some(size) => {
                    let size = check::count("--batch", size, 1, 1 << 30)?;
                    let alpha = check::open_unit("--batch-alpha", batch_alpha)?;
                    Some(score::BatchTest::new(size, alpha, batch_output, &output)?)
                }
                None => None,
            };
            let sidecar = is_npy(&output).then(|| output.with_extension("json"));
            let mut inputs = vec![Input { flag: "MODEL", path: &model }, Input { flag: "DATA", path: &path }];
            inputs.extend(calibration.as_deref().map(|path| Input { flag: "--calibration", path }));
            let mut outputs = vec![Output { flag: "-o", path: &output, replace: force, may_be: None }];
            if let Some(side) = &sidecar {
                outputs.push(Output { flag: "-o's .json sidecar", path: side, replace: force, may_be: None });
            }
            if let Some(b) = &batch {
                outputs.push(Output { flag: "--batch-output", path: &b.output, replace: force, may_be: None });
            }
            check_files(&inputs, &outputs)?;
            let m = Model::load(&model)?;
            let calibration = match &calibration {
                Some(p) => {
                    let c = Calibration::load(p)?;
                    c.check_model(&m, p)?;
                    Some(c)
                }
                None => None,
            };
            let mut spec = input_args.spec();
            spec.columns.keep = keep;
            let decision = calibration.as_ref().map(|c| c as &dyn score::Decision);
            let opts = score::ScoreOptions { columns, threads, batch, decision, bad_rows };
            // Rows are checked for NaN and infinity by score itself (--bad-rows).
            let summary = match input::open_for_scoring(&path, &spec)? {
                input::ScoreInput::Whole(x) => {
                    m.check_width(&path, x.cols)?;
                    if arrow_stdout {
                        return Err(Error::Invalid(
                            "--arrow-stdout needs a Parquet or Arrow input (or an Arrow IPC stream on standard input)"
                                .into(),
                        ));
                    }
                    score::score_to_file(&m, &x, &output, &opts)?
                }
                input::ScoreInput::Batches(mut reader) => {
                    let target = stream::Target::of(&output, arrow_stdout)?;
                    stream::score_batches(&m, &mut reader, &output, target, &opts)?
                }
            };
            note(score_summary(&output, &summary, calibration.as_ref(), bad_rows));
            Ok(())
        }
        Command::Calibrate { model, held_out, output, false_alarm, score, input: input_args, threads, force } => {
            let threads = check::threads("--threads", threads)?;
            let false_alarm = check::open_unit("--false-alarm", false_alarm)?;
            check_files(
                &[Input { flag: "MODEL", path: &model }, Input { flag: "HELD_OUT", path: &held_out }],
                &[Output { flag: "-o", path: &output, replace: force, may_be: None }],
            )?;
            let m = Model::load(&model)?;
            let x = input::open(&held_out, &input_args.spec())?.data;
            m.check_width(&held_out, x.cols)?;
            let (cal, warnings) = calibrate::calibrate(&m, &x, &score, false_alarm, threads)?;
            for w in warnings {
                note(format!("warning: {w}"));
            }
            cal.save(&output)?;
            note(format!(
                "{}: {} flagged when {} {} {:.6} (conformal rank {} of {} held-out vectors, false-alarm rate {})",
                output.display(),
                cal.score,
                cal.score,
                match cal.direction {
                    calibrate::Direction::Higher => "is above",
                    calibrate::Direction::Lower => "is below",
                    calibrate::Direction::TwoSided => "is this far from its median:",
                },
                cal.threshold_raw,
                cal.rank,
                cal.rows,
                cal.false_alarm
            ));
            Ok(())
        }
        Command::Evaluate { id, ood, columns, output, report, calibration, log, bootstrap, seed, force } => {
            let bootstrap = check::count("--bootstrap", bootstrap, 1, 1_000_000)?;
            let ood_flags: Vec<String> = ood.iter().map(|(name, _)| format!("--ood {name}")).collect();
            let mut inputs = vec![Input { flag: "--id", path: &id }];
            inputs.extend(ood.iter().zip(&ood_flags).map(|((_, path), flag)| Input { flag, path }));
            inputs.extend(calibration.as_deref().map(|path| Input { flag: "--calibration", path }));
            inputs.extend(log.as_deref().map(|path| Input { flag: "--log", path }));
            let outputs: Vec<Output> = [("-o", &output), ("--report", &report)]
                .into_iter()
                .filter_map(|(flag, p)| p.as_deref().map(|path| Output { flag, path, replace: force, may_be: None }))
                .collect();
            check_files(&inputs, &outputs)?;
            let calibration = calibration.as_deref().map(Calibration::load).transpose()?;
            let log = log.as_deref().map(tidemark::train::read_log).transpose()?;
            let evaluated = evaluate::run(&evaluate::EvaluateOptions {
                id: &id,
                ood: &ood,
                columns: &columns,
                bootstrap,
                seed,
                output: output.as_deref(),
                calibration: calibration.as_ref(),
            })?;
            for line in &evaluated.notes {
                note(line);
            }
            if let Some(path) = &report {
                let input =
                    report::ReportInput { evaluated: &evaluated, calibration: calibration.as_ref(), log: log.as_ref() };
                report::write_report(path, &input)?;
            }
            output::print(evaluate::table(&evaluated))?;
            Ok(())
        }
        Command::Split { data: path, fractions, seed, ordered, output, input: input_args } => {
            let split = tidemark::split::Split::new(&fractions, seed, ordered)?;
            let x = input::open(&path, &input_args.spec())?.data;
            for (file, rows) in tidemark::split::run(&x, &output, &split)? {
                note(format!("wrote {} ({rows} rows)", file.display()));
            }
            Ok(())
        }
        Command::Bench { dim, hidden, layers, depth, batch, coupling, bins, threads, seconds, json, force } => {
            let cfg = tidemark::bench::BenchConfig {
                coupling: match coupling {
                    CouplingKind::Affine => tidemark::flow::Coupling::Affine,
                    CouplingKind::Spline => tidemark::flow::Coupling::Spline {
                        bins: check::count("--bins", bins, 2, tidemark::flow::spline::MAX_BINS)?,
                        tail_bound: 3.0,
                    },
                },
                dim: check::count("--dim", dim, 2, 1 << 16)?,
                hidden: check::count("--hidden", hidden, 1, 1 << 16)?,
                layers: check::count("--layers", layers, 1, 1024)?,
                depth: check::count("--depth", depth, 1, 64)?,
                batch: check::count("--batch", batch, 1, 1 << 20)?,
                threads: check::threads("--threads", threads)?,
                seconds: check::positive("--seconds", seconds).and_then(|s| {
                    if s <= 86_400.0 {
                        Ok(s)
                    } else {
                        Err(Error::Invalid(format!("--seconds: must be at most a day (86400), got {s}")))
                    }
                })?,
            };
            if let Some(path) = &json {
                check_files(&[], &[Output { flag: "--json", path, replace: force, may_be: None }])?;
            }
            let result = tidemark::bench::run(&cfg);
            output::print(format!("{}\n", tidemark::bench::describe(&result)))?;
            if let Some(path) = json {
                let text = serde_json::to_string_pretty(&result).map_err(|e| Error::Invalid(e.to_string()))?;
                output::write_atomic(&path, |w| {
                    writeln!(w, "{text}").map_err(|source| Error::Io { path: path.clone(), source })
                })?;
            }
            Ok(())
        }
        Command::Inspect { model, json } => {
            let m = Model::load(&model)?;
            if json {
                output::print(format!("{}\n", m.meta.to_json()))
            } else {
                output::print(score::describe(&m))
            }
        }
        Command::Sample { model, count, output, seed, force } => {
            check::count("-n", count, 1, MAX_SAMPLE_VALUES)?;
            check_files(
                &[Input { flag: "MODEL", path: &model }],
                &[Output { flag: "-o", path: &output, replace: force, may_be: None }],
            )?;
            let m = Model::load(&model)?;
            let per_vector = m.meta.input_dim.max(1);
            check::count("-n", count, 1, MAX_SAMPLE_VALUES / per_vector).map_err(|_| {
                Error::Invalid(format!(
                    "-n: {count} vectors of {per_vector} values exceed the {MAX_SAMPLE_VALUES} values sample draws at most"
                ))
            })?;
            let samples = m.sample(count, seed);
            output::write_atomic(&output, |w| {
                data::write_npy(w, &samples).map_err(|source| Error::Io { path: output.clone(), source })
            })
        }
        Command::Demo { data_dir, out_dir, threads } => {
            demo::run(&data_dir, &out_dir, check::threads("--threads", threads)?)
        }
    }
}

/// The score columns and which way each is anomalous, for `score --help`.
fn score_columns_help() -> String {
    let mut s = String::from("Columns (which ones a model has depends on how it was fitted):\n");
    for c in score::ALL_COLUMNS {
        s.push_str(&format!("  {c:<30}{}\n", score::column_help(c)));
    }
    s
}

/// The line `score` ends with: rows written, bad rows, flagged rows.
fn score_summary(
    output: &std::path::Path,
    summary: &score::ScoreSummary,
    calibration: Option<&Calibration>,
    mode: score::BadRows,
) -> String {
    let mut line = format!("{}: {} rows scored", output.display(), summary.scored);
    let bad = summary.bad.len();
    match mode {
        score::BadRows::Flag => {
            line.push_str(&format!(", {bad} bad rows written with empty scores and a bad_row reason"))
        }
        score::BadRows::Skip => line.push_str(&format!(", {bad} bad rows skipped")),
        score::BadRows::Error => line.push_str(", 0 bad rows"),
    }
    if let (Some(n), Some(c)) = (summary.flagged, calibration) {
        let share = 100.0 * n as f64 / summary.scored.max(1) as f64;
        line.push_str(&format!("; {n} flagged ({share:.2}%) by {} at false-alarm rate {}", c.score, c.false_alarm));
    }
    line
}

/// Is this output a `.npy` file (written with a `.json` sidecar)?
fn is_npy(path: &Path) -> bool {
    !output::is_stdout(path) && path.extension().is_some_and(|e| e.eq_ignore_ascii_case("npy"))
}

/// `NAME=FILE` for `--ood`.
fn parse_named(s: &str) -> std::result::Result<(String, PathBuf), String> {
    match s.split_once('=') {
        Some((name, path)) if !name.is_empty() && !path.is_empty() => Ok((name.to_string(), PathBuf::from(path))),
        _ => Err(format!("expected NAME=FILE, got '{s}'")),
    }
}

/// SIGINT and SIGTERM set the returned flag, so training stops after its
/// current step and checkpoints. A second signal ends the process at once,
/// removing the temporary files being written first (outputs are only ever
/// renamed into place, so nothing is left half-written).
fn stop_on_signals() -> Arc<AtomicBool> {
    let stop = Arc::new(AtomicBool::new(false));
    let flag = Arc::clone(&stop);
    match Signals::new([SIGINT, SIGTERM]) {
        Ok(mut signals) => {
            std::thread::spawn(move || {
                for _ in signals.forever() {
                    if flag.swap(true, Ordering::SeqCst) {
                        output::remove_temporaries();
                        std::process::exit(EXIT_INTERRUPTED.into());
                    }
                }
            });
        }
        Err(e) => note(format!("warning: cannot catch SIGINT/SIGTERM ({e}); an interrupted fit will not checkpoint")),
    }
    stop
}

fn main() -> ExitCode {
    tidemark::error::install_panic_hook();
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            // Help and version go to stdout with status 0; usage errors are bad input.
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { EXIT_BAD_INPUT } else { 0 });
        }
    };
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) if e.is_broken_pipe() => ExitCode::SUCCESS,
        Err(e @ Error::Interrupted(_)) => {
            note(&e);
            ExitCode::from(e.exit_code())
        }
        Err(e) => {
            note(format!("error: {e}"));
            ExitCode::from(e.exit_code())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    /// Every positional argument and option of every subcommand says what
    /// it is for in `--help`.
    #[test]
    fn every_argument_has_a_help_line() {
        let cli = Cli::command();
        for sub in cli.get_subcommands() {
            for arg in sub.get_arguments().filter(|a| !a.is_hide_set()) {
                let id = arg.get_id().as_str();
                if id == "help" || id == "version" {
                    continue;
                }
                assert!(arg.get_help().is_some(), "tidemark {} {id} has no help line", sub.get_name());
            }
        }
    }

    #[test]
    fn the_resume_command_keeps_every_option_and_reads_back_through_a_shell() {
        let typed = ["tidemark", "fit", "my data.npy", "-o", "m.safetensors", "--checkpoint", "ck", "--hidden", "64"];
        let cmd = resume_command(typed.iter().map(OsString::from), Path::new("ck"), Some(Path::new("it's.log")));
        assert_eq!(cmd, r"tidemark fit 'my data.npy' -o m.safetensors --hidden 64 --resume ck --log 'it'\''s.log'");
        // POSIX sh reads the words back as they were.
        let out = std::process::Command::new("sh").arg("-c").arg(format!("printf '%s\\n' {cmd}")).output().unwrap();
        let words: Vec<String> = String::from_utf8(out.stdout).unwrap().lines().map(String::from).collect();
        assert_eq!(words[2], "my data.npy");
        assert_eq!(words.last().unwrap(), "it's.log");
    }
}
