//! Which reader a data path goes to: the row formats of [`crate::data`]
//! (`.npy`, `.safetensors`, `.csv`) or the columnar formats of
//! [`crate::columnar`] (Parquet, Arrow IPC), optionally keeping only a
//! seeded uniform sample of the rows.

use crate::columnar::{self, Selection};
use crate::data::{DataError, Dataset};
use std::path::Path;

/// How to read one data file.
#[derive(Clone, Debug, Default)]
pub struct InputSpec {
    /// Tensor of a `.safetensors` file holding several.
    pub tensor: Option<String>,
    /// Columns of a Parquet or Arrow file.
    pub columns: Selection,
    /// Keep a seeded uniform sample of at most this many rows.
    pub max_rows: Option<usize>,
    pub seed: u64,
    /// Pass NaN and infinite values through, for a caller that checks each
    /// row itself (`score --bad-rows`).
    pub unchecked: bool,
}

/// Rows read from one file, with labels when they came from a column.
pub struct Input {
    pub data: Dataset,
    pub labels: Option<Vec<i64>>,
}

/// Open `path` as `spec` says. A row format is memory-mapped where it can
/// be (a sample is gathered into memory); a columnar file is streamed batch
/// by batch into memory, or into a sample.
pub fn open(path: &Path, spec: &InputSpec) -> Result<Input, DataError> {
    let fail = |msg: &str| Err(DataError { path: path.to_path_buf(), msg: msg.to_string() });
    if columnar::is_columnar(path) {
        if spec.tensor.is_some() {
            return fail("--tensor is for .safetensors files; name columns with --column or --feature-columns");
        }
        let sample = spec.max_rows.map(|n| (n, spec.seed));
        let (m, labels) = columnar::read_all(path, &spec.columns, sample, !spec.unchecked)?;
        return Ok(Input { data: Dataset::from_matrix(path, m), labels });
    }
    let c = &spec.columns;
    if c.features.is_some() || c.label_column.is_some() || !c.keep.is_empty() {
        return fail("column options (--column, --feature-columns, --column-prefix, --label-column, --keep) need a Parquet or Arrow file");
    }
    let data = if spec.unchecked {
        Dataset::open_unchecked(path, spec.tensor.as_deref())?
    } else {
        Dataset::open(path, spec.tensor.as_deref())?
    };
    let data = match spec.max_rows {
        Some(n) if n < data.rows => {
            let idx = sample_rows(data.rows, n, spec.seed);
            let mut values = Vec::new();
            data.gather(&idx, &mut values);
            Dataset::from_matrix(path, crate::data::Matrix::new(idx.len(), data.cols, values))
        }
        _ => data,
    };
    Ok(Input { data, labels: None })
}

/// `n` distinct row indices out of `total`, drawn uniformly with `seed`, in
/// increasing order.
pub fn sample_rows(total: usize, n: usize, seed: u64) -> Vec<usize> {
    use rand::SeedableRng;
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let mut idx = rand::seq::index::sample(&mut rng, total, n.min(total)).into_vec();
    idx.sort_unstable();
    idx
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sample_rows_are_distinct_sorted_and_seeded() {
        let a = sample_rows(1000, 100, 7);
        assert_eq!(a.len(), 100);
        assert!(a.windows(2).all(|w| w[0] < w[1]));
        assert_eq!(a, sample_rows(1000, 100, 7));
        assert_ne!(a, sample_rows(1000, 100, 8));
        assert_eq!(sample_rows(5, 10, 0), vec![0, 1, 2, 3, 4]);
    }
}

/// Rows to score: a whole file at hand, or batches read one at a time.
pub enum ScoreInput {
    Whole(Dataset),
    Batches(columnar::Reader),
}

/// Open `path` for scoring, values unchecked (the scorer checks each row):
/// a columnar file, or an Arrow IPC stream on standard input (`-`), is read
/// batch by batch; a `.npy` on standard input is spooled to a temporary file
/// first (its header gives no way to stream it row by row through a pipe
/// and still check its size).
pub fn open_for_scoring(path: &Path, spec: &InputSpec) -> Result<ScoreInput, DataError> {
    if crate::output::is_stdout(path) {
        return stdin_input(spec);
    }
    if columnar::is_columnar(path) {
        return Ok(ScoreInput::Batches(columnar::Reader::open(path, &spec.columns)?));
    }
    let spec = InputSpec { unchecked: true, ..spec.clone() };
    Ok(ScoreInput::Whole(open(path, &spec)?.data))
}

const NPY_MAGIC: &[u8] = b"\x93NUMPY";

fn stdin_input(spec: &InputSpec) -> Result<ScoreInput, DataError> {
    use std::io::BufRead;
    let name = Path::new("<standard input>");
    let fail = |msg: String| DataError { path: name.to_path_buf(), msg };
    let mut input = std::io::BufReader::with_capacity(1 << 20, std::io::stdin());
    let head = input.fill_buf().map_err(|e| fail(format!("cannot read: {e}")))?;
    if head.is_empty() {
        return Err(fail("is empty".into()));
    }
    if !head.starts_with(NPY_MAGIC) {
        return Ok(ScoreInput::Batches(columnar::Reader::ipc_stream(name, Box::new(input), &spec.columns)?));
    }
    let c = &spec.columns;
    if c.features.is_some() || c.label_column.is_some() || !c.keep.is_empty() {
        return Err(fail("column options need an Arrow IPC stream, not .npy".into()));
    }
    let spool = Spool::new();
    let mut file = std::fs::File::create(&spool.0).map_err(|e| fail(format!("cannot spool: {e}")))?;
    std::io::copy(&mut input, &mut file).map_err(|e| fail(format!("cannot spool: {e}")))?;
    drop(file);
    let data = Dataset::open_unchecked(&spool.0, None).map_err(|e| fail(e.msg))?;
    // The map stays valid after the name is gone.
    drop(spool);
    Ok(ScoreInput::Whole(Dataset::renamed(data, name)))
}

/// A temporary file of ours, removed when dropped.
struct Spool(std::path::PathBuf);

impl Spool {
    fn new() -> Spool {
        Spool(std::env::temp_dir().join(format!(".tidemark-stdin.{}.npy", std::process::id())))
    }
}

impl Drop for Spool {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.0);
    }
}
