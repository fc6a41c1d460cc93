//! Data in: embedding matrices from `.npy`, `.safetensors` and `.csv` files,
//! and integer class labels; every value checked before it reaches a model.

use half::{bf16, f16};
use std::fmt;
use std::io::Read;

mod npy;
mod tables;

pub use npy::{write_npy, write_npy_header};
use std::path::{Path, PathBuf};
pub use tables::read_score_table;

/// A problem with an input file, always naming the file.
#[derive(Debug, thiserror::Error)]
#[error("{}: {msg}", path.display())]
pub struct DataError {
    pub path: PathBuf,
    pub msg: String,
}

fn fail<T>(path: &Path, msg: impl fmt::Display) -> Result<T, DataError> {
    Err(DataError { path: path.to_path_buf(), msg: msg.to_string() })
}

/// A dense row-major matrix of f32: one embedding vector per row.
#[derive(Clone, Debug, PartialEq)]
pub struct Matrix {
    pub rows: usize,
    pub cols: usize,
    pub data: Vec<f32>,
}

impl Matrix {
    pub fn new(rows: usize, cols: usize, data: Vec<f32>) -> Matrix {
        assert_eq!(rows * cols, data.len());
        Matrix { rows, cols, data }
    }

    pub fn row(&self, r: usize) -> &[f32] {
        &self.data[r * self.cols..(r + 1) * self.cols]
    }

    /// The rows at `idx`, in that order.
    pub fn select_rows(&self, idx: &[usize]) -> Matrix {
        let mut data = Vec::with_capacity(idx.len() * self.cols);
        for &r in idx {
            data.extend_from_slice(self.row(r));
        }
        Matrix::new(idx.len(), self.cols, data)
    }
}

/// Element encodings of mapped embeddings.
#[derive(Clone, Copy, Debug)]
enum Elem {
    F16,
    BF16,
    F32,
    F64,
}

impl Elem {
    fn width(self) -> usize {
        match self {
            Elem::F16 | Elem::BF16 => 2,
            Elem::F32 => 4,
            Elem::F64 => 8,
        }
    }
}

/// File formats embeddings are read from, chosen by extension.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    Npy,
    Safetensors,
    Csv,
}

impl Format {
    pub fn of(path: &Path) -> Result<Format, DataError> {
        match extension(path).as_str() {
            "npy" => Ok(Format::Npy),
            "safetensors" => Ok(Format::Safetensors),
            "csv" => Ok(Format::Csv),
            other => fail(
                path,
                format!("unsupported file type '.{}' (expected .npy, .safetensors or .csv)", printable(other, 20)),
            ),
        }
    }
}

/// A file's bytes: memory-mapped, or in memory.
pub enum Bytes {
    Mapped(memmap2::Mmap),
    Owned(Vec<u8>),
}

impl std::ops::Deref for Bytes {
    type Target = [u8];
    fn deref(&self) -> &[u8] {
        match self {
            Bytes::Mapped(m) => m,
            Bytes::Owned(v) => v,
        }
    }
}

/// Rows of embeddings for the pipeline: in memory (CSV), a `.npy` or
/// `.safetensors` file memory-mapped so that a dump larger than memory is
/// never copied whole, or row-major f32 values owned by a caller (a numpy
/// array in the Python bindings) and read where they lie.
pub struct Dataset {
    pub path: PathBuf,
    pub rows: usize,
    pub cols: usize,
    storage: Storage,
}

/// Row-major f32 values owned elsewhere, kept alive as long as the dataset.
pub type SharedRows = Box<dyn AsRef<[f32]> + Send + Sync>;

enum Storage {
    Owned(Vec<f32>),
    Shared(SharedRows),
    Encoded { bytes: Bytes, offset: usize, elem: Elem, big_endian: bool, fortran: bool },
}

impl Dataset {
    /// Open embeddings for streaming: `.npy` and `.safetensors` are
    /// memory-mapped, CSV is read into memory. Every value is checked.
    pub fn open(path: &Path, tensor: Option<&str>) -> Result<Dataset, DataError> {
        let ds = Dataset::open_unchecked(path, tensor)?;
        ds.check_values()?;
        Ok(ds)
    }

    /// [`Dataset::open`] without the check for NaN and infinite values, for
    /// a caller that checks each row itself (`score --bad-rows`).
    pub fn open_unchecked(path: &Path, tensor: Option<&str>) -> Result<Dataset, DataError> {
        let format = Format::of(path)?;
        let bytes = match format {
            Format::Csv => Bytes::Owned(read_file(path)?),
            Format::Npy | Format::Safetensors => map_file(path)?,
        };
        Dataset::from_bytes(path, format, bytes, tensor)
    }

    /// Embeddings from the contents of a file in `format` (`path` names it
    /// in messages); every size is checked against `bytes` and every value
    /// is checked.
    pub fn from_bytes(path: &Path, format: Format, bytes: Bytes, tensor: Option<&str>) -> Result<Dataset, DataError> {
        let ds = match format {
            Format::Npy => Dataset::from_npy(path, bytes)?,
            Format::Safetensors => Dataset::from_safetensors(path, bytes, tensor)?,
            Format::Csv => Dataset::from_matrix(path, tables::parse_csv_matrix(path, &bytes)?),
        };
        if ds.rows == 0 {
            return fail(&ds.path, "has zero rows");
        }
        if ds.cols == 0 {
            return fail(&ds.path, "has zero columns");
        }
        Ok(ds)
    }

    fn from_npy(path: &Path, bytes: Bytes) -> Result<Dataset, DataError> {
        let a = npy::parse(path, &bytes)?;
        check_matrix_shape(path, &a.shape)?;
        let elem = match a.scalar {
            npy::Scalar::F16 => Elem::F16,
            npy::Scalar::F32 => Elem::F32,
            npy::Scalar::F64 => Elem::F64,
            _ => {
                return fail(
                    path,
                    format!("unsupported dtype '{}' for embeddings (expected float32, float64 or float16)", a.descr),
                )
            }
        };
        let (rows, cols) = (a.shape[0], a.shape[1]);
        let storage =
            Storage::Encoded { bytes, offset: a.offset, elem, big_endian: a.big_endian, fortran: a.fortran_order };
        Ok(Dataset { path: path.to_path_buf(), rows, cols, storage })
    }

    fn from_safetensors(path: &Path, bytes: Bytes, tensor: Option<&str>) -> Result<Dataset, DataError> {
        let (offset, rows, cols, elem) = locate_tensor(path, &bytes, tensor)?;
        let storage = Storage::Encoded { bytes, offset, elem, big_endian: false, fortran: false };
        Ok(Dataset { path: path.to_path_buf(), rows, cols, storage })
    }

    /// The same rows under another name (for messages).
    pub fn renamed(mut self, path: &Path) -> Dataset {
        self.path = path.to_path_buf();
        self
    }

    /// Rows already in memory (no file behind them).
    pub fn in_memory(m: Matrix) -> Dataset {
        Dataset::from_matrix(Path::new("<memory>"), m)
    }

    pub fn from_matrix(path: &Path, m: Matrix) -> Dataset {
        Dataset { path: path.to_path_buf(), rows: m.rows, cols: m.cols, storage: Storage::Owned(m.data) }
    }

    /// `rows` x `cols` row-major values read in place, without a copy;
    /// `name` stands for the file in messages. Every value is checked.
    pub fn shared(name: &Path, rows: usize, cols: usize, values: SharedRows) -> Result<Dataset, DataError> {
        let len = (*values).as_ref().len();
        if rows.checked_mul(cols) != Some(len) {
            return fail(name, format!("{rows} x {cols} values expected, {len} given"));
        }
        let ds = Dataset { path: name.to_path_buf(), rows, cols, storage: Storage::Shared(values) };
        ds.check_values()?;
        Ok(ds)
    }

    /// The values as one row-major slice when they are held that way (in
    /// memory or shared; not for files, which are decoded row by row).
    pub fn as_slice(&self) -> Option<&[f32]> {
        match &self.storage {
            Storage::Owned(v) => Some(v),
            Storage::Shared(v) => Some((**v).as_ref()),
            Storage::Encoded { .. } => None,
        }
    }

    fn value(&self, r: usize, c: usize) -> f32 {
        match &self.storage {
            Storage::Owned(v) => v[r * self.cols + c],
            Storage::Shared(v) => (**v).as_ref()[r * self.cols + c],
            Storage::Encoded { bytes, offset, elem, big_endian, fortran } => {
                let i = if *fortran { c * self.rows + r } else { r * self.cols + c };
                let b = element(&bytes[*offset..], i, elem.width(), *big_endian);
                match elem {
                    Elem::F16 => f16::from_le_bytes([b[0], b[1]]).to_f32(),
                    Elem::BF16 => bf16::from_le_bytes([b[0], b[1]]).to_f32(),
                    Elem::F32 => f32::from_le_bytes([b[0], b[1], b[2], b[3]]),
                    Elem::F64 => f64::from_le_bytes(b) as f32,
                }
            }
        }
    }

    /// The stored float64 value at (r, c) before it became float32, for
    /// files that hold float64.
    fn wide_value(&self, r: usize, c: usize) -> Option<f64> {
        match &self.storage {
            Storage::Encoded { bytes, offset, elem: Elem::F64, big_endian, fortran } => {
                let i = if *fortran { c * self.rows + r } else { r * self.cols + c };
                Some(f64::from_le_bytes(element(&bytes[*offset..], i, 8, *big_endian)))
            }
            _ => None,
        }
    }

    /// Copy row `r` into `out` (`cols` values).
    pub fn row_into(&self, r: usize, out: &mut [f32]) {
        match &self.storage {
            Storage::Owned(v) => out.copy_from_slice(&v[r * self.cols..(r + 1) * self.cols]),
            Storage::Shared(v) => out.copy_from_slice(&(**v).as_ref()[r * self.cols..(r + 1) * self.cols]),
            Storage::Encoded { bytes, offset, elem: Elem::F32, big_endian: false, fortran: false } => {
                let bytes = &bytes[offset + r * self.cols * 4..offset + (r + 1) * self.cols * 4];
                for (o, b) in out.iter_mut().zip(bytes.chunks_exact(4)) {
                    *o = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
                }
            }
            Storage::Encoded { .. } => {
                for (c, o) in out.iter_mut().enumerate() {
                    *o = self.value(r, c);
                }
            }
        }
    }

    /// The rows at `idx`, in that order, into `out` (resized).
    pub fn gather(&self, idx: &[usize], out: &mut Vec<f32>) {
        out.resize(idx.len() * self.cols, 0.0);
        for (k, &r) in idx.iter().enumerate() {
            self.row_into(r, &mut out[k * self.cols..(k + 1) * self.cols]);
        }
    }

    /// All rows as an in-memory matrix (for small data and tests).
    pub fn to_matrix(&self) -> Matrix {
        let idx: Vec<usize> = (0..self.rows).collect();
        let mut data = Vec::new();
        self.gather(&idx, &mut data);
        Matrix::new(self.rows, self.cols, data)
    }

    /// A 64-bit fingerprint of shape and values, to recognise the same data on resume.
    pub fn checksum(&self) -> u64 {
        let mut h = mix64(self.rows as u64 ^ mix64(self.cols as u64));
        let mut row = vec![0.0f32; self.cols];
        for r in 0..self.rows {
            self.row_into(r, &mut row);
            for v in &row {
                h = mix64(h ^ v.to_bits() as u64);
            }
        }
        h
    }

    fn check_values(&self) -> Result<(), DataError> {
        let mut row = vec![0.0f32; self.cols];
        for r in 0..self.rows {
            self.row_into(r, &mut row);
            if let Some((c, what)) = self.bad_value(r, &row) {
                return fail(&self.path, format!("row {r}, column {c} (0-based) is {what}"));
            }
        }
        Ok(())
    }

    /// The first NaN, infinite or out-of-float32-range value of row `r`
    /// (read into `row`): its column and what it is.
    pub fn bad_value(&self, r: usize, row: &[f32]) -> Option<(usize, String)> {
        let c = row.iter().position(|v| !v.is_finite())?;
        let what = match self.wide_value(r, c) {
            Some(w) if w.is_finite() => format!("{w:e}, outside the float32 range"),
            _ if row[c].is_nan() => "NaN".to_string(),
            _ => "infinite".to_string(),
        };
        Some((c, what))
    }
}

/// A cheap, well-mixed 64-bit hash (the splitmix64 finaliser), for
/// checksums, derived seeds and dropout mask keys.
pub fn mix64(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Read an embedding matrix into memory, choosing the format by extension,
/// with every value checked (see [`Dataset::open`] for large files).
pub fn read_matrix(path: &Path, tensor: Option<&str>) -> Result<Matrix, DataError> {
    Ok(Dataset::open(path, tensor)?.to_matrix())
}

/// Read one integer class label per row from `.npy` (any integer dtype) or
/// a one-column `.csv` (header optional).
pub fn read_labels(path: &Path) -> Result<Vec<i64>, DataError> {
    let format = match extension(path).as_str() {
        "npy" => Format::Npy,
        "csv" => Format::Csv,
        other => {
            return fail(
                path,
                format!("unsupported label file type '.{}' (expected .npy or .csv)", printable(other, 20)),
            )
        }
    };
    parse_labels(path, format, &read_file(path)?)
}

/// Labels from the contents of a label file in `format` (`.npy` or `.csv`).
pub fn parse_labels(path: &Path, format: Format, bytes: &[u8]) -> Result<Vec<i64>, DataError> {
    let labels = match format {
        Format::Npy => {
            let a = npy::parse(path, bytes)?;
            if a.shape.len() > 2 || (a.shape.len() == 2 && a.shape[1] != 1) {
                return fail(path, format!("labels must be 1-D (or one column), found shape {:?}", a.shape));
            }
            decode_ints(path, &a, &bytes[a.offset..a.offset + a.data_len])?
        }
        Format::Csv => tables::parse_csv_labels(path, bytes)?,
        Format::Safetensors => return fail(path, "labels are read from .npy or .csv files"),
    };
    if labels.is_empty() {
        return fail(path, "has zero labels");
    }
    Ok(labels)
}

/// Labels must pair one to one with the data rows.
pub fn check_label_count(path: &Path, labels: usize, rows: usize) -> Result<(), DataError> {
    if labels != rows {
        return fail(path, format!("has {labels} labels but the data has {rows} rows"));
    }
    Ok(())
}

fn extension(path: &Path) -> String {
    path.extension().and_then(|e| e.to_str()).unwrap_or("").to_ascii_lowercase()
}

/// `s` with control and invisible formatting characters escaped and cut
/// to `max` characters: for messages and listings that show text taken
/// from a file, which must not drive the terminal.
pub fn printable(s: &str, max: usize) -> String {
    let mut out = String::new();
    for (i, ch) in s.chars().enumerate() {
        if i == max {
            out.push_str("...");
            break;
        }
        if drives_terminal(ch) {
            out.extend(ch.escape_unicode());
        } else {
            out.push(ch);
        }
    }
    out
}

/// Control characters, and the invisible ones that reorder or hide text.
pub fn drives_terminal(ch: char) -> bool {
    ch.is_control()
        || matches!(ch, '\u{200B}'..='\u{200F}' | '\u{202A}'..='\u{202E}' | '\u{2066}'..='\u{2069}' | '\u{FEFF}')
}

/// Open a file for reading. Only regular files: a directory gets a clear
/// message, and a pipe or device (which could block forever or never end)
/// is refused before it is opened.
pub fn open_file(path: &Path) -> Result<std::fs::File, DataError> {
    let meta = std::fs::metadata(path).or_else(|e| fail(path, format!("cannot open: {e}")))?;
    if meta.is_dir() {
        return fail(path, "is a directory, not a file");
    }
    if !meta.is_file() {
        return fail(path, "is not a regular file (pipes and devices are not read)");
    }
    std::fs::File::open(path).or_else(|e| fail(path, format!("cannot open: {e}")))
}

/// The whole of a regular file (see [`open_file`]), reading no more than
/// the length it had when opened.
pub fn read_file(path: &Path) -> Result<Vec<u8>, DataError> {
    let file = open_file(path)?;
    let len = file.metadata().map(|m| m.len()).or_else(|e| fail(path, format!("cannot read: {e}")))?;
    let mut bytes = Vec::new();
    file.take(len).read_to_end(&mut bytes).or_else(|e| fail(path, format!("cannot read: {e}")))?;
    Ok(bytes)
}

/// A regular file as UTF-8 text.
pub fn read_text(path: &Path) -> Result<String, DataError> {
    String::from_utf8(read_file(path)?)
        .or_else(|e| fail(path, format!("is not UTF-8 text (invalid byte at offset {})", e.utf8_error().valid_up_to())))
}

/// Memory-map a regular file (see [`open_file`]).
fn map_file(path: &Path) -> Result<Bytes, DataError> {
    let file = open_file(path)?;
    if file.metadata().map(|m| m.len()).unwrap_or(0) == 0 {
        return fail(path, "is empty");
    }
    // SAFETY: the map is read-only; a file changed underneath by another
    // process could change values, which the data checksum on resume catches.
    let map = unsafe { memmap2::Mmap::map(&file) }.or_else(|e| fail(path, format!("cannot map: {e}")))?;
    Ok(Bytes::Mapped(map))
}

/// Copy element `i` of `width` bytes, flipping byte order when the file is
/// big-endian, so decoders always see little-endian bytes.
fn element(bytes: &[u8], i: usize, width: usize, big_endian: bool) -> [u8; 8] {
    let mut out = [0u8; 8];
    out[..width].copy_from_slice(&bytes[i * width..(i + 1) * width]);
    if big_endian {
        out[..width].reverse();
    }
    out
}

/// Integer labels from `.npy` data (`data` is exactly the array's bytes).
fn decode_ints(path: &Path, a: &npy::NpyArray, data: &[u8]) -> Result<Vec<i64>, DataError> {
    use npy::Scalar;
    let conv: fn([u8; 8]) -> i64 = match a.scalar {
        Scalar::I8 => |b| b[0] as i8 as i64,
        Scalar::U8 => |b| b[0] as i64,
        Scalar::I16 => |b| i16::from_le_bytes([b[0], b[1]]) as i64,
        Scalar::U16 => |b| u16::from_le_bytes([b[0], b[1]]) as i64,
        Scalar::I32 => |b| i32::from_le_bytes([b[0], b[1], b[2], b[3]]) as i64,
        Scalar::U32 => |b| u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as i64,
        Scalar::I64 => i64::from_le_bytes,
        Scalar::U64 => |b| u64::from_le_bytes(b).min(i64::MAX as u64) as i64,
        _ => return fail(path, format!("unsupported dtype '{}' for labels (expected an integer dtype)", a.descr)),
    };
    let width = a.scalar.width();
    Ok((0..data.len() / width).map(|i| conv(element(data, i, width, a.big_endian))).collect())
}

fn check_matrix_shape(path: &Path, shape: &[usize]) -> Result<(), DataError> {
    if shape.len() != 2 {
        return fail(path, format!("expected a 2-D array (rows x features), found {}-D shape {shape:?}", shape.len()));
    }
    Ok(())
}

/// Find the 2-D tensor to read in a safetensors file: its byte offset in
/// the file, its shape and its element type.
fn locate_tensor(path: &Path, bytes: &[u8], tensor: Option<&str>) -> Result<(usize, usize, usize, Elem), DataError> {
    let st = safetensors::SafeTensors::deserialize(bytes)
        .or_else(|e| fail(path, format!("not a valid safetensors file ({})", printable(&e.to_string(), 200))))?;
    let mut names: Vec<String> = st.names().into_iter().map(|n| printable(n, 60)).collect();
    names.sort();
    let listing = || {
        let shown: Vec<&str> = names.iter().take(20).map(String::as_str).collect();
        let more = if names.len() > 20 { format!(" and {} more", names.len() - 20) } else { String::new() };
        format!("{}{more}", shown.join(", "))
    };
    let name = match (tensor, st.names().as_slice()) {
        (Some(t), _) => t.to_string(),
        (None, [only]) => only.to_string(),
        (None, []) => return fail(path, "holds no tensors"),
        (None, _) => return fail(path, format!("holds several tensors; choose one with --tensor: {}", listing())),
    };
    let shown = printable(&name, 60);
    let view = st.tensor(&name).or_else(|_| fail(path, format!("has no tensor '{shown}' (it has: {})", listing())))?;
    let shape = view.shape();
    let &[rows, cols] = shape else {
        return fail(path, format!("tensor '{shown}' is {}-D {shape:?}; expected 2-D (rows x features)", shape.len()));
    };
    use safetensors::Dtype;
    let elem = match view.dtype() {
        Dtype::F32 => Elem::F32,
        Dtype::F64 => Elem::F64,
        Dtype::F16 => Elem::F16,
        Dtype::BF16 => Elem::BF16,
        other => {
            return fail(
                path,
                format!("tensor '{shown}' has unsupported dtype {other:?} (expected F32, F64, F16 or BF16)"),
            )
        }
    };
    let need = rows.checked_mul(cols).and_then(|n| n.checked_mul(elem.width()));
    if need != Some(view.data().len()) {
        return fail(
            path,
            format!("tensor '{shown}': shape {shape:?} does not match its {} data bytes", view.data().len()),
        );
    }
    let offset = view.data().as_ptr() as usize - bytes.as_ptr() as usize;
    Ok((offset, rows, cols, elem))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Shared rows are read where they lie (the slice the dataset reads is
    /// the caller's), row by row as given, and checked like a file's.
    #[test]
    fn shared_rows_are_read_in_place_and_checked() {
        let values: Vec<f32> = (0..6).map(|v| v as f32).collect();
        let ptr = values.as_ptr();
        let ds = Dataset::shared(Path::new("x"), 2, 3, Box::new(values)).unwrap();
        assert_eq!(ds.as_slice().unwrap().as_ptr(), ptr);
        let mut row = [0.0f32; 3];
        ds.row_into(1, &mut row);
        assert_eq!(row, [3.0, 4.0, 5.0]);
        assert_eq!(ds.to_matrix().data, vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0]);
        let nan = Dataset::shared(Path::new("x"), 2, 2, Box::new(vec![0.0, 1.0, f32::NAN, 2.0])).err().unwrap();
        assert_eq!(nan.to_string(), "x: row 1, column 0 (0-based) is NaN");
        let short = Dataset::shared(Path::new("x"), 2, 2, Box::new(vec![0.0f32; 3])).err().unwrap();
        assert_eq!(short.to_string(), "x: 2 x 2 values expected, 3 given");
    }

    #[test]
    fn npy_round_trip() {
        let m = Matrix::new(2, 3, vec![1.0, -2.5, 3.25, 0.0, 1e-8, 7.0]);
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("m.npy");
        let mut f = std::fs::File::create(&p).unwrap();
        write_npy(&mut f, &m).unwrap();
        drop(f);
        assert_eq!(read_matrix(&p, None).unwrap(), m);
        // The whole header block is 64-byte aligned, as numpy writes it.
        let bytes = std::fs::read(&p).unwrap();
        assert_eq!((bytes.len() - 24) % 64, 0);
    }

    #[test]
    fn printable_escapes_terminal_codes() {
        assert_eq!(printable("a\u{1b}[2Jb\u{202E}c", 100), "a\\u{1b}[2Jb\\u{202e}c");
        assert_eq!(printable("abcdef", 3), "abc...");
    }
}
