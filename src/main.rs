//! The `tidemark` command line: parses arguments and calls the library.

use clap::{Args, Parser, Subcommand};
use signal_hook::consts::{SIGINT, SIGTERM};
use signal_hook::flag;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use tidemark::calibrate::{self, Calibration};
use tidemark::flow::Mixing;
use tidemark::model::{Kind, Model};
use tidemark::preprocess::Method;
use tidemark::train::{default_threads, FitOptions, Run};
use tidemark::{data, demo, evaluate, score, Result};

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
    Fit(FitArgs),
    /// Score vectors with a fitted model: one row of scores per vector.
    Score {
        model: PathBuf,
        data: PathBuf,
        /// Output file: .csv, .npy (float32, column names in a sidecar .json) or .jsonl; - for CSV on standard output.
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
        /// Calibration from `tidemark calibrate`: adds p_value and flagged columns.
        #[arg(long)]
        calibration: Option<PathBuf>,
        #[command(flatten)]
        input: InputArgs,
        #[arg(long, default_value_t = default_threads())]
        threads: usize,
    },
    /// Pick a threshold at a false-alarm rate from held-out in-distribution vectors (split-conformal).
    Calibrate {
        model: PathBuf,
        /// Held-out in-distribution vectors, never used for fitting.
        held_out: PathBuf,
        /// Where the calibration goes (.json).
        #[arg(short, long)]
        output: PathBuf,
        /// Target false-alarm rate (share of in-distribution vectors flagged).
        #[arg(long)]
        false_alarm: f64,
        /// Score column to calibrate.
        #[arg(long, default_value = "log_likelihood")]
        score: String,
        #[command(flatten)]
        input: InputArgs,
        #[arg(long, default_value_t = default_threads())]
        threads: usize,
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
        /// Calibration whose threshold the report draws.
        #[arg(long)]
        calibration: Option<PathBuf>,
        /// Training log (from `fit --log`) whose curves the report draws.
        #[arg(long)]
        log: Option<PathBuf>,
        /// Bootstrap resamples for the 95% intervals.
        #[arg(long, default_value_t = 1000)]
        bootstrap: usize,
        #[arg(long, default_value_t = 0)]
        seed: u64,
    },
    /// Measure training and scoring throughput of the flow on synthetic data.
    Bench {
        #[arg(long, default_value_t = 64)]
        dim: usize,
        #[arg(long, default_value_t = 128)]
        hidden: usize,
        #[arg(long, default_value_t = 8)]
        layers: usize,
        #[arg(long, default_value_t = 2)]
        depth: usize,
        #[arg(long, default_value_t = 256)]
        batch: usize,
        #[arg(long, default_value_t = 1)]
        threads: usize,
        /// Seconds per measurement.
        #[arg(long, default_value_t = 3.0)]
        seconds: f64,
        /// Also write the result as JSON.
        #[arg(long)]
        json: Option<PathBuf>,
    },
    /// Print how a model was made and how it did.
    Inspect {
        model: PathBuf,
        /// Print the raw metadata JSON instead.
        #[arg(long)]
        json: bool,
    },
    /// Draw vectors from a fitted model into a .npy file.
    Sample {
        model: PathBuf,
        #[arg(short = 'n', long)]
        count: usize,
        #[arg(short, long)]
        output: PathBuf,
        #[arg(long, default_value_t = 0)]
        seed: u64,
    },
    /// Run the whole job on the shipped demo data and summarise it.
    Demo {
        #[arg(long, default_value = "demo-data")]
        data_dir: PathBuf,
        #[arg(long, default_value = "demo-out")]
        out_dir: PathBuf,
        #[arg(long, default_value_t = default_threads())]
        threads: usize,
    },
}

#[derive(Args)]
struct InputArgs {
    /// Tensor to read from a .safetensors file holding several.
    #[arg(long)]
    tensor: Option<String>,
}

#[derive(Args)]
struct FitArgs {
    data: PathBuf,
    /// Where to write the model (.safetensors).
    #[arg(short, long)]
    output: PathBuf,
    #[command(flatten)]
    input: InputArgs,
    /// Integer class label per row (.npy or one-column .csv): fits a class-conditional model.
    #[arg(long)]
    labels: Option<PathBuf>,
    /// Density model: flow, gaussian (full covariance) or class-gaussian (class means, shared covariance; needs --labels).
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
}

fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Fit(a) => {
            let x = data::Dataset::open(&a.data, a.input.tensor.as_deref())?;
            let labels = match &a.labels {
                Some(p) => {
                    let l = data::read_labels(p)?;
                    data::check_label_count(p, l.len(), x.rows)?;
                    Some(l)
                }
                None => None,
            };
            let opts = FitOptions {
                kind: a.kind,
                background_noise: a.background_noise,
                method: a.method,
                layers: a.layers,
                hidden: a.hidden,
                depth: a.depth,
                clamp: a.clamp,
                mixing: a.mixing,
                flow_dims: a.flow_dims,
                epochs: a.epochs,
                batch_size: a.batch_size,
                lr: a.lr,
                val_fraction: a.val_fraction,
                patience: a.patience,
                dropout: a.dropout,
                noise: a.noise,
                dead_threshold: a.dead_threshold,
                weight_decay: a.weight_decay,
                grad_clip: a.grad_clip,
                max_retries: a.max_retries,
                checkpoint_every: a.checkpoint_every,
                checkpoint_minutes: a.checkpoint_minutes,
                seed: a.seed,
                threads: a.threads,
                quiet: a.quiet,
                inject_nan_at_step: a.inject_nan_at_step,
            };
            let opts = match &a.config {
                Some(path) => opts.or(FitOptions::from_json_file(path)?),
                None => opts,
            };
            let val = a.val.as_deref().map(|p| data::Dataset::open(p, a.input.tensor.as_deref())).transpose()?;
            let stop = stop_on_signals();
            let checkpoint = a
                .checkpoint
                .clone()
                .or_else(|| a.resume.clone())
                .unwrap_or_else(|| a.output.with_extension("checkpoint.safetensors"));
            let run = Run {
                data: &x,
                val: val.as_ref(),
                labels: labels.as_deref(),
                output: Some(&a.output),
                checkpoint: Some(checkpoint),
                resume: a.resume.as_deref(),
                log: a.log.as_deref(),
                stop: Some(&stop),
            };
            let model = tidemark::train::fit_run(&run, &opts)?;
            model.save(&a.output)?;
            // The run is complete: its checkpoint has nothing left to resume.
            if let Some(ck) = &run.checkpoint {
                let _ = std::fs::remove_file(ck);
            }
            if !a.quiet {
                eprintln!("{}", model.meta.fit_summary(&a.output));
            }
            Ok(())
        }
        Command::Score {
            model,
            data: path,
            output,
            columns,
            batch,
            batch_alpha,
            batch_output,
            calibration,
            input,
            threads,
        } => {
            let m = Model::load(&model)?;
            let calibration = match &calibration {
                Some(p) => {
                    let c = Calibration::load(p)?;
                    c.check_model(&m, p)?;
                    Some(c)
                }
                None => None,
            };
            let x = data::Dataset::open(&path, input.tensor.as_deref())?;
            m.check_width(&path, x.cols)?;
            let batch = match batch {
                Some(size) => Some(score::BatchTest::new(size, batch_alpha, batch_output, &output)?),
                None => None,
            };
            score::score_to_file(&m, &x, &output, &score::ScoreOptions { columns, threads, batch, calibration })
        }
        Command::Calibrate { model, held_out, output, false_alarm, score, input, threads } => {
            let m = Model::load(&model)?;
            let x = data::Dataset::open(&held_out, input.tensor.as_deref())?;
            m.check_width(&held_out, x.cols)?;
            let (cal, warnings) = calibrate::calibrate(&m, &x, &score, false_alarm, threads)?;
            for w in warnings {
                eprintln!("warning: {w}");
            }
            cal.save(&output)?;
            eprintln!(
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
            );
            Ok(())
        }
        Command::Evaluate { id, ood, columns, output, report, calibration, log, bootstrap, seed } => {
            let calibration = calibration.as_deref().map(Calibration::load).transpose()?;
            let log = log.as_deref().map(tidemark::train::read_log).transpose()?;
            let results = evaluate::run(&evaluate::EvaluateOptions {
                id: &id,
                ood: &ood,
                columns: &columns,
                bootstrap,
                seed,
                output: output.as_deref(),
                report: report.as_deref(),
                calibration: calibration.as_ref(),
                log: log.as_deref(),
            })?;
            print!("{}", evaluate::table(&results));
            Ok(())
        }
        Command::Bench { dim, hidden, layers, depth, batch, threads, seconds, json } => {
            let cfg = tidemark::bench::BenchConfig { dim, hidden, layers, depth, batch, threads, seconds };
            let result = tidemark::bench::run(&cfg);
            println!("{}", tidemark::bench::describe(&result));
            if let Some(path) = json {
                let text = serde_json::to_string_pretty(&result).expect("result serializes");
                tidemark::output::write_atomic(&path, |w| {
                    writeln!(w, "{text}").map_err(|source| tidemark::Error::Io { path: path.clone(), source })
                })?;
            }
            Ok(())
        }
        Command::Inspect { model, json } => {
            let m = Model::load(&model)?;
            if json {
                println!("{}", m.meta.to_json());
            } else {
                print!("{}", m.meta.describe());
            }
            Ok(())
        }
        Command::Sample { model, count, output, seed } => {
            let m = Model::load(&model)?;
            let samples = m.sample(count, seed);
            tidemark::output::write_atomic(&output, |w| {
                data::write_npy(w, &samples).map_err(|source| tidemark::Error::Io { path: output.clone(), source })
            })
        }
        Command::Demo { data_dir, out_dir, threads } => demo::run(&data_dir, &out_dir, threads),
    }
}

/// `NAME=FILE` for `--ood`.
fn parse_named(s: &str) -> std::result::Result<(String, PathBuf), String> {
    match s.split_once('=') {
        Some((name, path)) if !name.is_empty() && !path.is_empty() => Ok((name.to_string(), PathBuf::from(path))),
        _ => Err(format!("expected NAME=FILE, got '{s}'")),
    }
}

/// SIGINT and SIGTERM set the returned flag, so training stops after its
/// current step and checkpoints; a second signal exits at once (files are
/// only ever renamed into place, so nothing is left half-written).
fn stop_on_signals() -> Arc<AtomicBool> {
    let stop = Arc::new(AtomicBool::new(false));
    for sig in [SIGINT, SIGTERM] {
        // Registration fails only for forbidden signals; these two are allowed.
        let _ = flag::register_conditional_shutdown(sig, 130, Arc::clone(&stop));
        let _ = flag::register(sig, Arc::clone(&stop));
    }
    stop
}

fn main() -> ExitCode {
    match run(Cli::parse()) {
        Ok(()) => ExitCode::SUCCESS,
        // A reader that stopped early (`| head`) is not an error.
        Err(tidemark::Error::Io { source, .. }) if source.kind() == std::io::ErrorKind::BrokenPipe => ExitCode::SUCCESS,
        Err(e @ tidemark::Error::Interrupted(_)) => {
            eprintln!("{e}");
            ExitCode::from(130)
        }
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::FAILURE
        }
    }
}
