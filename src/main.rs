//! The `tidemark` command line: parses arguments and calls the library.

use clap::{Args, Parser, Subcommand};
use signal_hook::consts::{SIGINT, SIGTERM};
use signal_hook::iterator::Signals;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use tidemark::calibrate::{self, Calibration};
use tidemark::error::{EXIT_BAD_INPUT, EXIT_INTERRUPTED};
use tidemark::model::Model;
use tidemark::output::{self, check_files, note, Input, Output};
use tidemark::train::{default_threads, CouplingKind};
use tidemark::{check, columnar, data, demo, evaluate, input, report, score, stream, Error, Result};

/// Each command's plumbing that outgrew this file.
mod cli {
    pub(crate) mod fit;
}
use cli::fit::{fit, FitArgs};

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
}
