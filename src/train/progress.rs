//! Training progress on standard error.

use crate::output::note;
use indicatif::{ProgressBar, ProgressStyle};
use std::io::IsTerminal;
use std::time::Instant;

/// Training progress on stderr: on a terminal a bar that moves every step,
/// its time estimate from the steps of this run only (a resumed run starts
/// part-way); otherwise one line per epoch.
pub(super) struct Progress {
    bar: Option<ProgressBar>,
    quiet: bool,
    started: Instant,
}

impl Progress {
    pub(super) fn new(total_steps: usize, done: usize, quiet: bool) -> Progress {
        let bar = (!quiet && std::io::stderr().is_terminal()).then(|| {
            let bar = ProgressBar::new(total_steps as u64);
            if let Ok(style) =
                ProgressStyle::with_template("{bar:30} step {pos}/{len} {msg} [{elapsed_precise} < {eta_precise}]")
            {
                bar.set_style(style);
            }
            bar.set_position(done as u64);
            bar.reset_eta();
            bar.reset_elapsed();
            bar
        });
        Progress { bar, quiet, started: Instant::now() }
    }

    /// Steps done so far, counting those before a resume.
    pub(super) fn step(&self, done: usize) {
        if let Some(bar) = &self.bar {
            bar.set_position(done as u64);
        }
    }

    pub(super) fn epoch(&self, epoch: usize, epochs: usize, train: f64, val: f64, rate: f64, improved: bool) {
        let mark = if improved { " *" } else { "" };
        let msg = format!("train NLL {train:.4} val NLL {val:.4} nats/dim, {rate:.0} vec/s{mark}");
        match &self.bar {
            Some(bar) => bar.set_message(format!("epoch {epoch}/{epochs} {msg}")),
            None if !self.quiet => {
                note(format!("epoch {epoch:>4}  {msg}  ({:.1}s)", self.started.elapsed().as_secs_f64()))
            }
            None => {}
        }
    }

    pub(super) fn note(&self, msg: &str) {
        match &self.bar {
            Some(bar) => bar.println(msg),
            None => note(msg),
        }
    }

    pub(super) fn finish(&self) {
        if let Some(bar) = &self.bar {
            bar.finish();
        }
    }
}
