//! `tidemark._core`: the Python bindings over the tidemark library crate.
//!
//! Only argument conversion lives here: arrays become [`Dataset`]s that read
//! the numpy buffer in place, library errors become Python exceptions, and
//! the GIL is released while the library works. The pure-Python package
//! (`tidemark/__init__.py`) normalises arguments and documents the API.

use numpy::{IntoPyArray, PyArray1, PyArray2, PyArrayMethods, PyReadonlyArray1, PyUntypedArrayMethods};
use pyo3::create_exception;
use pyo3::exceptions::{PyKeyboardInterrupt, PyOSError, PyValueError};
use pyo3::prelude::*;
use pyo3::types::PyDict;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;
use tidemark::calibrate::{self, Calibration as CoreCalibration};
use tidemark::data::{self, Dataset};
use tidemark::evaluate::{results_json, run_tables, EvaluateOptions, ScoreTable};
use tidemark::report::{write_report, ReportInput};
use tidemark::model::Model as CoreModel;
use tidemark::train::{self, Checkpoint, FitOptions, Run, Source};
use tidemark::{score, Error};

create_exception!(
    tidemark,
    Interrupted,
    PyKeyboardInterrupt,
    "A fit stopped on request (Ctrl-C); a checkpoint was written and the message says how to continue."
);

/// Library errors as Python exceptions: files that cannot be written are
/// `OSError`, a stopped fit is `Interrupted`, everything else (bad input,
/// bad settings, invalid model files) is `ValueError`.
fn py_err(e: Error) -> PyErr {
    match e {
        Error::Io { .. } => PyOSError::new_err(e.to_string()),
        Error::Interrupted(msg) => Interrupted::new_err(msg),
        other => PyValueError::new_err(other.to_string()),
    }
}

/// A file to read must open: otherwise the `OSError` subclass for its errno
/// (`FileNotFoundError`, `PermissionError`) naming the file, before the
/// library's own checks of its contents.
fn require_readable(path: &Path) -> PyResult<()> {
    std::fs::File::open(path).map(drop).map_err(|e| {
        let text = e.to_string();
        let reason = text.split(" (os error").next().unwrap_or(&text).to_string();
        match e.raw_os_error() {
            // OSError(errno, strerror, filename) becomes the errno's subclass.
            Some(code) => PyOSError::new_err((code, reason, path.display().to_string())),
            None => PyOSError::new_err(format!("{}: {reason}", path.display())),
        }
    })
}

/// A float32 C-contiguous numpy buffer, kept alive by a reference to its
/// array and read in place by the library (no copy).
struct PinnedRows {
    _owner: Py<PyAny>,
    ptr: *const f32,
    len: usize,
}

// SAFETY: the buffer is owned by the array `_owner` refers to, which stays
// alive as long as this value; numpy never moves the buffer of an array that
// is referenced. The library only reads it. Writing to the array from Python
// while a call reads it is a data race, as with any threaded numpy consumer
// (documented on the Python side).
unsafe impl Send for PinnedRows {}
unsafe impl Sync for PinnedRows {}

impl AsRef<[f32]> for PinnedRows {
    fn as_ref(&self) -> &[f32] {
        if self.len == 0 {
            return &[];
        }
        // SAFETY: see above; `ptr` is aligned (checked) and holds `len` values.
        unsafe { std::slice::from_raw_parts(self.ptr, self.len) }
    }
}

/// An array's rows, pinned for reading without the GIL. The caller (the
/// Python package) has already converted other dtypes and layouts once.
struct Rows {
    name: String,
    rows: usize,
    cols: usize,
    values: PinnedRows,
}

impl Rows {
    fn pin(name: &str, x: &Bound<'_, PyArray2<f32>>) -> PyResult<Rows> {
        let ptr = x.data() as *const f32;
        if !x.is_c_contiguous() || ptr.align_offset(std::mem::align_of::<f32>()) != 0 {
            return Err(PyValueError::new_err(format!("{name}: expected an aligned C-contiguous float32 array")));
        }
        let [rows, cols] = [x.shape()[0], x.shape()[1]];
        let values = PinnedRows { _owner: x.clone().into_any().unbind(), ptr, len: rows * cols };
        Ok(Rows { name: name.to_string(), rows, cols, values })
    }

    /// The dataset over the pinned buffer (every value checked).
    fn dataset(self) -> tidemark::Result<Dataset> {
        Ok(Dataset::shared(Path::new(&self.name), self.rows, self.cols, Box::new(self.values))?)
    }
}

/// Rows for scoring with `model`: checked values and width.
fn scoring_rows(model: &CoreModel, rows: Rows) -> tidemark::Result<Dataset> {
    let x = rows.dataset()?;
    model.check_width(&x.path, x.cols)?;
    Ok(x)
}

/// A fitted model (use `tidemark.fit` or `tidemark.load`).
#[pyclass(frozen, module = "tidemark._core")]
struct Model {
    inner: Arc<CoreModel>,
}

#[pymethods]
impl Model {
    /// Write the model as a `.safetensors` file (atomically). A fitted
    /// model always serialises, so whatever fails here is the file: `OSError`.
    fn save(&self, py: Python<'_>, path: PathBuf) -> PyResult<()> {
        let m = Arc::clone(&self.inner);
        py.allow_threads(move || m.save(&path)).map_err(|e| PyOSError::new_err(e.to_string()))
    }

    /// Every score column this model produces, in output order.
    #[pyo3(signature = (calibrated = false))]
    fn columns(&self, calibrated: bool) -> Vec<String> {
        let mut columns = score::available_columns(&self.inner);
        if calibrated {
            columns.extend(["p_value".to_string(), "flagged".to_string()]);
        }
        columns
    }

    /// Scores of every row: {column: float64 array}, in the columns' order.
    #[pyo3(signature = (x, columns, calibration, threads))]
    fn score<'py>(
        &self,
        py: Python<'py>,
        x: &Bound<'py, PyArray2<f32>>,
        columns: Vec<String>,
        calibration: Option<&Calibration>,
        threads: usize,
    ) -> PyResult<Bound<'py, PyDict>> {
        let rows = Rows::pin("x", x)?;
        let m = Arc::clone(&self.inner);
        let cal = calibration.map(|c| c.inner.clone());
        let (names, values) = py
            .allow_threads(move || -> tidemark::Result<_> {
                if let Some(c) = &cal {
                    c.check_model(&m, Path::new("calibration"))?;
                }
                let x = scoring_rows(&m, rows)?;
                let decision = cal.as_ref().map(|c| c as &dyn score::Decision);
                let opts =
                    score::ScoreOptions { columns, threads, batch: None, decision, bad_rows: score::BadRows::Error };
                score::score_columns(&m, &x, &opts)
            })
            .map_err(py_err)?;
        let out = PyDict::new(py);
        for (name, column) in names.into_iter().zip(values) {
            out.set_item(name, column.into_pyarray(py))?;
        }
        Ok(out)
    }

    /// Calibrate `score` on held-out rows; returns the calibration and any warnings.
    fn calibrate(
        &self,
        py: Python<'_>,
        x: &Bound<'_, PyArray2<f32>>,
        false_alarm: f64,
        score: String,
        threads: usize,
    ) -> PyResult<(Calibration, Vec<String>)> {
        let rows = Rows::pin("x_held_out", x)?;
        let m = Arc::clone(&self.inner);
        let (cal, warnings) = py
            .allow_threads(move || {
                let x = scoring_rows(&m, rows)?;
                calibrate::calibrate(&m, &x, &score, false_alarm, threads)
            })
            .map_err(py_err)?;
        Ok((Calibration { inner: cal }, warnings))
    }

    /// `n` vectors drawn from the model, float32, n x input features.
    fn sample<'py>(&self, py: Python<'py>, n: usize, seed: u64) -> PyResult<Bound<'py, PyArray2<f32>>> {
        let m = Arc::clone(&self.inner);
        let s = py.allow_threads(move || m.sample(n, seed));
        s.data.into_pyarray(py).reshape([s.rows, s.cols])
    }

    /// The model's metadata as JSON (what `tidemark inspect --json` prints).
    fn info_json(&self) -> PyResult<String> {
        serde_json::to_string(&self.inner.meta).map_err(|e| PyValueError::new_err(e.to_string()))
    }

    /// How the model was made and how it did (what `tidemark inspect` prints).
    fn describe(&self) -> String {
        score::describe(&self.inner)
    }

    /// The checksum that ties calibrations to this model.
    fn fingerprint(&self) -> String {
        self.inner.fingerprint()
    }
}

/// A split-conformal calibration (use `Model.calibrate` or `tidemark.load_calibration`).
#[pyclass(frozen, module = "tidemark._core")]
struct Calibration {
    inner: CoreCalibration,
}

#[pymethods]
impl Calibration {
    /// Write the calibration as JSON (the CLI's format, atomically).
    fn save(&self, path: PathBuf) -> PyResult<()> {
        self.inner.save(&path).map_err(py_err)
    }

    /// The calibration file's fields as JSON.
    fn to_json(&self) -> PyResult<String> {
        serde_json::to_string(&self.inner).map_err(|e| PyValueError::new_err(e.to_string()))
    }

    /// Conformal p-value of each raw score value.
    fn p_values<'py>(&self, py: Python<'py>, values: PyReadonlyArray1<'py, f64>) -> Bound<'py, PyArray1<f64>> {
        let p: Vec<f64> = values.as_array().iter().map(|&v| self.inner.p_value(v)).collect();
        p.into_pyarray(py)
    }
}

/// Read a model file.
#[pyfunction]
fn load(py: Python<'_>, path: PathBuf) -> PyResult<Model> {
    require_readable(&path)?;
    let m = py.allow_threads(move || CoreModel::load(&path)).map_err(py_err)?;
    Ok(Model { inner: Arc::new(m) })
}

/// Read a calibration file.
#[pyfunction]
fn load_calibration(path: PathBuf) -> PyResult<Calibration> {
    require_readable(&path)?;
    Ok(Calibration { inner: CoreCalibration::load(&path).map_err(py_err)? })
}

/// Fit a model; `options` is a JSON object of fit options (the names of
/// the config file). While the library
/// trains on a worker thread, this thread checks for Ctrl-C (Python's
/// signal handlers run only here): on one, training stops after its current
/// step and writes a checkpoint, and `Interrupted` is raised.
#[pyfunction]
#[pyo3(signature = (x, labels, val, *, options, config, checkpoint, resume, log, quiet))]
#[allow(clippy::too_many_arguments)]
fn fit(
    py: Python<'_>,
    x: &Bound<'_, PyArray2<f32>>,
    labels: Option<PyReadonlyArray1<'_, i64>>,
    val: Option<&Bound<'_, PyArray2<f32>>>,
    options: &str,
    config: Option<PathBuf>,
    checkpoint: PathBuf,
    resume: Option<PathBuf>,
    log: Option<PathBuf>,
    quiet: bool,
) -> PyResult<Model> {
    let origin = Path::new("options");
    let mut opts = FitOptions::from_json(origin, options).map_err(py_err)?;
    opts.check(&Source::Config(origin)).map_err(py_err)?;
    opts.quiet = quiet;
    if let Some(config) = &config {
        require_readable(config)?;
        opts = opts.or(FitOptions::from_json_file(config).map_err(py_err)?);
    }
    let labels: Option<Vec<i64>> = labels.map(|l| l.as_array().to_vec());
    let rows = Rows::pin("x", x)?;
    let val_rows = val.map(|v| Rows::pin("val", v)).transpose()?;
    let stop = AtomicBool::new(false);
    let result = py.allow_threads(|| {
        let x = rows.dataset()?;
        let val = val_rows.map(Rows::dataset).transpose()?;
        let resumed = resume.as_deref().map(Checkpoint::load).transpose()?;
        if let Some(l) = &labels {
            data::check_label_count(Path::new("labels"), l.len(), x.rows)?;
        }
        let run = Run {
            data: &x,
            val: val.as_ref(),
            labels: labels.as_deref(),
            output: None,
            checkpoint: Some(checkpoint.clone()),
            resume: resumed.as_ref(),
            log: log.as_deref(),
            stop: Some(&stop),
            deadline: None,
        };
        fit_watching_signals(&run, &opts, &stop)
    });
    match result {
        Ok(model) => {
            // The run is complete: its checkpoint has nothing left to resume.
            let _ = std::fs::remove_file(&checkpoint);
            Ok(Model { inner: Arc::new(model) })
        }
        // A pending KeyboardInterrupt became the stop request, which
        // `Error::Interrupted` reports.
        Err(e) => Err(py_err(e)),
    }
}

/// Train on a worker thread; this thread looks for Ctrl-C every 50 ms and
/// raises the stop flag on one (the KeyboardInterrupt itself is consumed:
/// the run reports the stop as `Error::Interrupted`, or completes when it
/// was already past its last check).
fn fit_watching_signals(run: &Run, opts: &FitOptions, stop: &AtomicBool) -> tidemark::Result<CoreModel> {
    let watcher = std::thread::current();
    std::thread::scope(|s| {
        let worker = s.spawn(|| {
            let r = train::fit_run(run, opts);
            watcher.unpark();
            r
        });
        while !worker.is_finished() {
            std::thread::park_timeout(Duration::from_millis(50));
            if !stop.load(Ordering::SeqCst) && Python::with_gil(|py| py.check_signals()).is_err() {
                stop.store(true, Ordering::SeqCst);
            }
        }
        worker.join().unwrap_or_else(|_| Err(Error::Invalid("the training thread panicked".into())))
    })
}

/// Score columns as the package passes them: (name, float64 array) pairs.
type Columns<'py> = Vec<(String, PyReadonlyArray1<'py, f64>)>;

/// One score table from its columns; `name` stands for its file.
fn table(name: &str, columns: Columns<'_>) -> PyResult<ScoreTable> {
    let mut names = Vec::new();
    let mut values: Vec<Vec<f64>> = Vec::new();
    for (c, v) in columns {
        let v = v.as_array().to_vec();
        if v.is_empty() || values.first().is_some_and(|f| f.len() != v.len()) {
            return Err(PyValueError::new_err(format!(
                "{name}: column '{c}' has {} values; every column needs the same number, at least one",
                v.len()
            )));
        }
        names.push(c);
        values.push(v);
    }
    Ok(ScoreTable { path: PathBuf::from(name), columns: names, values })
}

/// Detection metrics of every common score column, as the CLI's results
/// JSON; writes `output` and `report` when given.
#[pyfunction]
#[pyo3(signature = (id, ood, columns, bootstrap, seed, output, report, calibration, log))]
#[allow(clippy::too_many_arguments)]
fn evaluate(
    py: Python<'_>,
    id: Columns<'_>,
    ood: Vec<(String, Columns<'_>)>,
    columns: Vec<String>,
    bootstrap: usize,
    seed: u64,
    output: Option<PathBuf>,
    report: Option<PathBuf>,
    calibration: Option<&Calibration>,
    log: Option<PathBuf>,
) -> PyResult<String> {
    let id = table("id_scores", id)?;
    let ood: Vec<(String, ScoreTable)> =
        ood.into_iter().map(|(n, t)| Ok((n.clone(), table(&n, t)?))).collect::<PyResult<_>>()?;
    if let Some(path) = &log {
        require_readable(path)?;
    }
    let cal = calibration.map(|c| c.inner.clone());
    py.allow_threads(move || {
        let log = log.as_deref().map(train::read_log).transpose()?;
        let id_path = id.path.clone();
        let o = EvaluateOptions {
            id: &id_path,
            ood: &[],
            columns: &columns,
            bootstrap,
            seed,
            output: output.as_deref(),
            calibration: cal.as_ref(),
        };
        let evaluated = run_tables(&o, id, ood)?;
        if let Some(path) = &report {
            let input = ReportInput { evaluated: &evaluated, calibration: cal.as_ref(), log: log.as_ref() };
            write_report(path, &input)?;
        }
        Ok(results_json(&evaluated, &o).to_string())
    })
    .map_err(py_err)
}

/// The library's default worker threads (all cores).
#[pyfunction]
fn default_threads() -> usize {
    train::default_threads()
}

/// Test hook: the address of the buffer the library reads for `x` (the
/// array's own buffer when no copy is made).
#[pyfunction]
fn _data_address(x: &Bound<'_, PyArray2<f32>>) -> PyResult<usize> {
    let ds = Rows::pin("x", x)?.dataset().map_err(py_err)?;
    Ok(ds.as_slice().map_or(0, |s| s.as_ptr() as usize))
}

#[pymodule]
fn _core(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("Interrupted", m.py().get_type::<Interrupted>())?;
    m.add_class::<Model>()?;
    m.add_class::<Calibration>()?;
    m.add_function(wrap_pyfunction!(fit, m)?)?;
    m.add_function(wrap_pyfunction!(load, m)?)?;
    m.add_function(wrap_pyfunction!(load_calibration, m)?)?;
    m.add_function(wrap_pyfunction!(evaluate, m)?)?;
    m.add_function(wrap_pyfunction!(default_threads, m)?)?;
    m.add_function(wrap_pyfunction!(_data_address, m)?)?;
    Ok(())
}
