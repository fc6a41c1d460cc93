//! The `fit` command: its flags, the files it may write and read, and
//! the command line that resumes an interrupted run.

use crate::{stop_on_signals, InputArgs};
use clap::Args;
use std::ffi::OsString;
use std::path::{Path, PathBuf};
use tidemark::flow::Mixing;
use tidemark::model::Kind;
use tidemark::output::{check_files, note, FileKey, Input, Output};
use tidemark::preprocess::Method;
use tidemark::train::{Budget, Checkpoint, CouplingKind, FitOptions, Run, ShrinkageOption, Source};
use tidemark::{data, input, Error, Result};

#[derive(Args)]
pub(crate) struct FitArgs {
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
    /// LU blocks' learning rate as a fraction of the schedule's (with --mixing lu) [default: 0.2 x 384 / D, at most 1].
    #[arg(long)]
    lu_rate: Option<f64>,
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
    /// Covariance shrinkage of the Gaussian kinds: validated (the intensity with the best held-out log-likelihood, Ledoit-Wolf's among the candidates), ledoit-wolf, or an intensity in [0, 1) [default: validated]. Without --kind, fits one Gaussian (class-gaussian with labels).
    #[arg(long)]
    shrinkage: Option<ShrinkageOption>,
    /// Fit exactly the configuration the options give (a flow unless rows per feature are few) instead of comparing density kinds on the validation rows.
    #[arg(long)]
    no_search: bool,
    /// Wall-clock bound of the whole search over densities, e.g. 20m or 8h; a given budget also buys further local rounds of flows while they gain [default: the Gaussian's and mixture's time plus 1.5 x the projected time of the race of flows, at least 1 minute].
    #[arg(long)]
    budget: Option<Budget>,
    /// Components of the mixture kind [default: chosen on the validation rows among 1, 2, 4, ... 64, then the counts halfway to the best one's neighbours]. Without --kind, fits one mixture.
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
            lu_rate: self.lu_rate,
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

pub(crate) fn fit(a: Box<FitArgs>) -> Result<()> {
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
        deadline: None,
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

#[cfg(test)]
mod tests {
    use super::*;

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
