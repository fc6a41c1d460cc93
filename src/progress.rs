//! Progress for `score`, `calibrate` and `evaluate`: a bar on standard
//! error, only on a terminal and only once the work has taken more than a
//! second (short runs print nothing).

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::time::{Duration, Instant};

/// How long work runs before its bar appears.
const SHOW_AFTER: Duration = Duration::from_secs(1);

pub struct Progress {
    bar: ProgressBar,
    started: Instant,
    terminal: bool,
    shown: bool,
}

impl Progress {
    /// Progress over `total` units of `what` (rows, resamples).
    pub fn new(total: usize, what: &str) -> Progress {
        let bar = ProgressBar::with_draw_target(Some(total as u64), ProgressDrawTarget::hidden());
        if let Ok(style) = ProgressStyle::with_template(&format!(
            "{{bar:30}} {{pos}}/{{len}} {what} [{{elapsed_precise}} < {{eta_precise}}]"
        )) {
            bar.set_style(style);
        }
        Progress { bar, started: Instant::now(), terminal: std::io::stderr().is_terminal(), shown: false }
    }

    /// `done` more units finished.
    pub fn advance(&mut self, done: usize) {
        self.bar.inc(done as u64);
        if self.terminal && !self.shown && self.started.elapsed() > SHOW_AFTER {
            self.bar.set_draw_target(ProgressDrawTarget::stderr());
            self.shown = true;
        }
    }

    /// Remove the bar (the caller prints its own summary line).
    pub fn finish(&self) {
        self.bar.finish_and_clear();
    }
}
