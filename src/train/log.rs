//! The JSON-lines training log: one line per epoch, then one per candidate of a search.

use super::*;

/// One line of the JSON-lines training log (NLLs in nats per dimension,
/// input space; `grad_norm` is the epoch's mean before clipping).
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct LogEntry {
    pub epoch: usize,
    pub step: usize,
    pub lr: f64,
    pub train_nll: f64,
    pub val_nll: f64,
    pub grad_norm: f64,
    pub seconds: f64,
    /// The flow of a search this epoch belongs to (absent for a single run).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub candidate: Option<String>,
}

/// A training log read back: every epoch line and, after a search, one line
/// per candidate density (`{"candidate_result": {...}}`).
#[derive(Clone, Debug, Default)]
pub struct TrainingLog {
    pub epochs: Vec<LogEntry>,
    pub candidates: Vec<Candidate>,
}

/// A line of the log as written: an epoch, or a candidate's result.
#[derive(serde::Serialize)]
#[serde(untagged)]
enum LogLine<'a> {
    Result { candidate_result: &'a Candidate },
    Epoch(&'a LogEntry),
}

/// Read a JSON-lines training log written by `fit --log`.
pub fn read_log(path: &Path) -> Result<TrainingLog> {
    let text = crate::data::read_text(path)?;
    let mut log = TrainingLog::default();
    for (i, l) in text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty()) {
        let bad = |e: serde_json::Error| {
            let e = crate::data::printable(&e.to_string(), 300);
            Error::Invalid(format!("{}: line {}: not a training log entry ({e})", path.display(), i + 1))
        };
        // Parsed by its key rather than as an untagged enum, so that a wrong
        // field is named instead of "did not match any variant".
        let mut value: serde_json::Value = serde_json::from_str(l).map_err(bad)?;
        match value.as_object_mut().and_then(|o| o.remove("candidate_result")) {
            Some(c) => log.candidates.push(serde_json::from_value(c).map_err(bad)?),
            None => log.epochs.push(serde_json::from_value(value).map_err(bad)?),
        }
    }
    Ok(log)
}

/// Write the run's log (atomically): its epochs, then the candidates' results.
pub(crate) fn write_log(run: &Run, epochs: &[LogEntry], candidates: &[Candidate]) -> Result<()> {
    let Some(path) = run.log else { return Ok(()) };
    let lines =
        epochs.iter().map(LogLine::Epoch).chain(candidates.iter().map(|c| LogLine::Result { candidate_result: c }));
    crate::output::write_atomic(path, |w| {
        for line in lines {
            let line = serde_json::to_string(&line).map_err(|e| Error::Invalid(e.to_string()))?;
            writeln!(w, "{line}").map_err(|source| Error::Io { path: path.to_path_buf(), source })?;
        }
        Ok(())
    })
}
