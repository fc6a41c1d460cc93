//! Data in: embedding matrices from `.npy`, `.safetensors` and `.csv` files,
//! and integer class labels; every value checked before it reaches a model.

use half::{bf16, f16};
use std::fmt;
use std::io::Read;
use std::path::{Path, PathBuf};

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

/// Element encodings a memory-mapped `.npy` may hold.
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
    Mapped { map: memmap2::Mmap, offset: usize, elem: Elem, big_endian: bool, fortran: bool },
}

impl Dataset {
    /// Open embeddings for streaming: `.npy` and `.safetensors` are
    /// memory-mapped, CSV is read into memory. Every value is checked.
    pub fn open(path: &Path, tensor: Option<&str>) -> Result<Dataset, DataError> {
        let ds = match extension(path).as_str() {
            "npy" => Dataset::map_npy(path)?,
            "safetensors" => Dataset::map_safetensors(path, tensor)?,
            "csv" => Dataset::from_matrix(path, read_csv_matrix(path)?),
            other => {
                return fail(path, format!("unsupported file type '.{other}' (expected .npy, .safetensors or .csv)"))
            }
        };
        ds.check_values()?;
        Ok(ds)
    }

    fn map(path: &Path) -> Result<memmap2::Mmap, DataError> {
        let file = open(path)?;
        // SAFETY: the map is read-only; a file changed underneath by another
        // process could change values, which the data checksum on resume catches.
        unsafe { memmap2::Mmap::map(&file) }.or_else(|e| fail(path, format!("cannot map: {e}")))
    }

    fn map_npy(path: &Path) -> Result<Dataset, DataError> {
        let (header, offset) = npy_header(path)?;
        check_matrix_shape(path, &header.shape)?;
        let elem = match &header.descr[1..] {
            "f2" => Elem::F16,
            "f4" => Elem::F32,
            "f8" => Elem::F64,
            _ => {
                let d = &header.descr;
                return fail(
                    path,
                    format!("unsupported dtype '{d}' for embeddings (expected float32, float64 or float16)"),
                );
            }
        };
        let map = Dataset::map(path)?;
        let (rows, cols) = (header.shape[0], header.shape[1]);
        let need = rows * cols * elem.width();
        let have = map.len().saturating_sub(offset);
        if have < need {
            return fail(path, format!("truncated: shape {:?} needs {need} data bytes, file has {have}", header.shape));
        }
        let (big_endian, fortran) = (header.descr.starts_with('>'), header.fortran_order);
        Ok(Dataset {
            path: path.to_path_buf(),
            rows,
            cols,
            storage: Storage::Mapped { map, offset, elem, big_endian, fortran },
        })
    }

    fn map_safetensors(path: &Path, tensor: Option<&str>) -> Result<Dataset, DataError> {
        let map = Dataset::map(path)?;
        let (offset, rows, cols, elem) = locate_tensor(path, &map, tensor)?;
        let storage = Storage::Mapped { map, offset, elem, big_endian: false, fortran: false };
        Ok(Dataset { path: path.to_path_buf(), rows, cols, storage })
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
            Storage::Mapped { .. } => None,
        }
    }

    fn value(&self, r: usize, c: usize) -> f32 {
        match &self.storage {
            Storage::Owned(v) => v[r * self.cols + c],
            Storage::Shared(v) => (**v).as_ref()[r * self.cols + c],
            Storage::Mapped { map, offset, elem, big_endian, fortran } => {
                let i = if *fortran { c * self.rows + r } else { r * self.cols + c };
                let b = element(&map[*offset..], i, elem.width(), *big_endian);
                match elem {
                    Elem::F16 => f16::from_le_bytes([b[0], b[1]]).to_f32(),
                    Elem::BF16 => bf16::from_le_bytes([b[0], b[1]]).to_f32(),
                    Elem::F32 => f32::from_le_bytes([b[0], b[1], b[2], b[3]]),
                    Elem::F64 => f64::from_le_bytes(b) as f32,
                }
            }
        }
    }

    /// Copy row `r` into `out` (`cols` values).
    pub fn row_into(&self, r: usize, out: &mut [f32]) {
        match &self.storage {
            Storage::Owned(v) => out.copy_from_slice(&v[r * self.cols..(r + 1) * self.cols]),
            Storage::Shared(v) => out.copy_from_slice(&(**v).as_ref()[r * self.cols..(r + 1) * self.cols]),
            Storage::Mapped { map, offset, elem: Elem::F32, big_endian: false, fortran: false } => {
                let bytes = &map[offset + r * self.cols * 4..offset + (r + 1) * self.cols * 4];
                for (o, b) in out.iter_mut().zip(bytes.chunks_exact(4)) {
                    *o = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
                }
            }
            Storage::Mapped { .. } => {
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
        if self.rows == 0 {
            return fail(&self.path, "has zero rows");
        }
        if self.cols == 0 {
            return fail(&self.path, "has zero columns");
        }
        let mut row = vec![0.0f32; self.cols];
        for r in 0..self.rows {
            self.row_into(r, &mut row);
            if let Some(c) = row.iter().position(|v| !v.is_finite()) {
                let what = if row[c].is_nan() { "NaN" } else { "infinite" };
                return fail(&self.path, format!("row {r}, column {c} (0-based) is {what}"));
            }
        }
        Ok(())
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
    let labels = match extension(path).as_str() {
        "npy" => {
            let (header, bytes) = read_npy(path)?;
            if header.shape.len() > 2 || (header.shape.len() == 2 && header.shape[1] != 1) {
                return fail(path, format!("labels must be 1-D (or one column), found shape {:?}", header.shape));
            }
            let n = header.shape.first().copied().unwrap_or(1);
            decode_ints(path, &header.descr, &bytes, n)?
        }
        "csv" => read_csv_labels(path)?,
        other => return fail(path, format!("unsupported label file type '.{other}' (expected .npy or .csv)")),
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

fn open(path: &Path) -> Result<std::fs::File, DataError> {
    std::fs::File::open(path).or_else(|e| fail(path, format!("cannot open: {e}")))
}

// ---------------------------------------------------------------- .npy

/// The parts of a `.npy` header this tool uses.
#[derive(Debug)]
struct NpyHeader {
    descr: String,
    fortran_order: bool,
    shape: Vec<usize>,
}

/// Parse the header of a `.npy` file (format versions 1.0, 2.0 and 3.0);
/// returns it with the byte offset where the data starts.
fn npy_header(path: &Path) -> Result<(NpyHeader, usize), DataError> {
    let mut f = std::io::BufReader::new(open(path)?);
    let mut magic = [0u8; 8];
    if f.read_exact(&mut magic).is_err() || &magic[..6] != b"\x93NUMPY" {
        return fail(path, "is not a .npy file (bad magic string)");
    }
    let header_len = match magic[6] {
        1 => {
            let mut b = [0u8; 2];
            f.read_exact(&mut b).or_else(|_| fail(path, "truncated .npy header"))?;
            u16::from_le_bytes(b) as usize
        }
        2 | 3 => {
            let mut b = [0u8; 4];
            f.read_exact(&mut b).or_else(|_| fail(path, "truncated .npy header"))?;
            u32::from_le_bytes(b) as usize
        }
        v => return fail(path, format!("unsupported .npy format version {v}.{}", magic[7])),
    };
    let mut text = vec![0u8; header_len];
    f.read_exact(&mut text).or_else(|_| fail(path, "truncated .npy header"))?;
    let text = String::from_utf8(text).or_else(|_| fail(path, ".npy header is not text"))?;
    let header = parse_npy_header(&text).ok_or_else(|| DataError {
        path: path.to_path_buf(),
        msg: format!("cannot parse .npy header {}", text.trim()),
    })?;
    if dtype_width(&header.descr).is_none() {
        return fail(path, format!("unsupported dtype '{}'", header.descr));
    }
    let prefix = if magic[6] == 1 { 10 } else { 12 };
    Ok((header, prefix + header_len))
}

/// Parse the header and read the raw data bytes of a `.npy` file.
fn read_npy(path: &Path) -> Result<(NpyHeader, Vec<u8>), DataError> {
    let (header, offset) = npy_header(path)?;
    let mut f = std::io::BufReader::new(open(path)?);
    std::io::copy(&mut (&mut f).take(offset as u64), &mut std::io::sink())
        .or_else(|e| fail(path, format!("read error: {e}")))?;
    let expected = header.shape.iter().product::<usize>() * dtype_width(&header.descr).unwrap_or(0);
    let mut bytes = Vec::with_capacity(expected);
    f.take(expected as u64).read_to_end(&mut bytes).or_else(|e| fail(path, format!("read error: {e}")))?;
    if bytes.len() < expected {
        return fail(
            path,
            format!("truncated: shape {:?} needs {expected} data bytes, file has {}", header.shape, bytes.len()),
        );
    }
    Ok((header, bytes))
}

/// Parse the Python dict literal of a `.npy` header, e.g.
/// `{'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }`.
fn parse_npy_header(text: &str) -> Option<NpyHeader> {
    let value_after = |key: &str| -> Option<&str> {
        let at = text.find(&format!("'{key}'")).or_else(|| text.find(&format!("\"{key}\"")))?;
        let rest = &text[at + key.len() + 2..];
        Some(rest[rest.find(':')? + 1..].trim_start())
    };
    let descr_raw = value_after("descr")?;
    let quote = descr_raw.chars().next()?;
    let descr = descr_raw[1..].split(quote).next()?.to_string();
    let fortran_order = value_after("fortran_order")?.starts_with("True");
    let shape_raw = value_after("shape")?;
    let inner = &shape_raw[shape_raw.find('(')? + 1..shape_raw.find(')')?];
    let shape = inner
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(|s| s.trim_end_matches('L').parse().ok())
        .collect::<Option<Vec<usize>>>()?;
    Some(NpyHeader { descr, fortran_order, shape })
}

/// Bytes per element of a numpy dtype string, for the dtypes we read.
fn dtype_width(descr: &str) -> Option<usize> {
    let (order, kind) = descr.split_at(1);
    if !matches!(order, "<" | ">" | "|" | "=") {
        return None;
    }
    match kind {
        "f2" | "i2" | "u2" => Some(2),
        "f4" | "i4" | "u4" => Some(4),
        "f8" | "i8" | "u8" => Some(8),
        "i1" | "u1" | "b1" => Some(1),
        _ => None,
    }
}

/// Copy `n` elements of `width` bytes each, flipping byte order when the
/// file is big-endian, so decoders below always see little-endian bytes.
fn element(bytes: &[u8], i: usize, width: usize, big_endian: bool) -> [u8; 8] {
    let mut out = [0u8; 8];
    out[..width].copy_from_slice(&bytes[i * width..(i + 1) * width]);
    if big_endian {
        out[..width].reverse();
    }
    out
}

fn decode_ints(path: &Path, descr: &str, bytes: &[u8], n: usize) -> Result<Vec<i64>, DataError> {
    let big = descr.starts_with('>');
    let width = dtype_width(descr).unwrap_or(0);
    let conv: fn([u8; 8]) -> i64 = match &descr[1..] {
        "i1" => |b| b[0] as i8 as i64,
        "u1" => |b| b[0] as i64,
        "i2" => |b| i16::from_le_bytes([b[0], b[1]]) as i64,
        "u2" => |b| u16::from_le_bytes([b[0], b[1]]) as i64,
        "i4" => |b| i32::from_le_bytes([b[0], b[1], b[2], b[3]]) as i64,
        "u4" => |b| u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as i64,
        "i8" => i64::from_le_bytes,
        "u8" => |b| u64::from_le_bytes(b).min(i64::MAX as u64) as i64,
        _ => return fail(path, format!("unsupported dtype '{descr}' for labels (expected an integer dtype)")),
    };
    Ok((0..n).map(|i| conv(element(bytes, i, width, big))).collect())
}

fn check_matrix_shape(path: &Path, shape: &[usize]) -> Result<(), DataError> {
    if shape.len() != 2 {
        return fail(path, format!("expected a 2-D array (rows x features), found {}-D shape {shape:?}", shape.len()));
    }
    Ok(())
}

/// Write a float32 2-D `.npy` file (format 1.0) to `w`.
pub fn write_npy<W: std::io::Write + ?Sized>(w: &mut W, m: &Matrix) -> std::io::Result<()> {
    write_npy_header(w, m.rows, m.cols)?;
    let mut buf = Vec::with_capacity(m.data.len() * 4);
    for v in &m.data {
        buf.extend_from_slice(&v.to_le_bytes());
    }
    w.write_all(&buf)
}

/// The header of a float32 2-D `.npy` file (format 1.0) of `rows x cols`;
/// the little-endian values follow, row by row.
pub fn write_npy_header<W: std::io::Write + ?Sized>(w: &mut W, rows: usize, cols: usize) -> std::io::Result<()> {
    let mut header = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': ({rows}, {cols}), }}");
    // Pad so that magic + length + header + newline is a multiple of 64.
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat(unpadded.next_multiple_of(64) - unpadded));
    header.push('\n');
    w.write_all(b"\x93NUMPY\x01\x00")?;
    w.write_all(&(header.len() as u16).to_le_bytes())?;
    w.write_all(header.as_bytes())
}

// ---------------------------------------------------------------- .safetensors

/// Find the 2-D tensor to read in a safetensors file: its byte offset in
/// the file, its shape and its element type.
fn locate_tensor(path: &Path, bytes: &[u8], tensor: Option<&str>) -> Result<(usize, usize, usize, Elem), DataError> {
    let st = safetensors::SafeTensors::deserialize(bytes)
        .or_else(|e| fail(path, format!("not a valid safetensors file ({e})")))?;
    let mut names: Vec<&str> = st.names().into_iter().collect();
    names.sort();
    let name = match (tensor, names.as_slice()) {
        (Some(t), _) => t,
        (None, [only]) => only,
        (None, []) => return fail(path, "holds no tensors"),
        (None, _) => {
            return fail(path, format!("holds several tensors; choose one with --tensor: {}", names.join(", ")))
        }
    };
    let view =
        st.tensor(name).or_else(|_| fail(path, format!("has no tensor '{name}' (it has: {})", names.join(", "))))?;
    let shape = view.shape();
    if shape.len() != 2 {
        return fail(path, format!("tensor '{name}' is {}-D {shape:?}; expected 2-D (rows x features)", shape.len()));
    }
    use safetensors::Dtype;
    let elem = match view.dtype() {
        Dtype::F32 => Elem::F32,
        Dtype::F64 => Elem::F64,
        Dtype::F16 => Elem::F16,
        Dtype::BF16 => Elem::BF16,
        other => {
            return fail(
                path,
                format!("tensor '{name}' has unsupported dtype {other:?} (expected F32, F64, F16 or BF16)"),
            )
        }
    };
    let offset = view.data().as_ptr() as usize - bytes.as_ptr() as usize;
    Ok((offset, shape[0], shape[1], elem))
}

// ---------------------------------------------------------------- .csv

fn csv_records(path: &Path) -> Result<Vec<(u64, csv::StringRecord)>, DataError> {
    let mut reader =
        csv::ReaderBuilder::new().has_headers(false).flexible(true).trim(csv::Trim::All).from_reader(open(path)?);
    let mut out = Vec::new();
    for rec in reader.records() {
        let rec = rec.or_else(|e| fail(path, format!("CSV error: {e}")))?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        if rec.iter().all(str::is_empty) {
            continue;
        }
        out.push((line, rec));
    }
    Ok(out)
}

/// A first row with any field that is not a number is a header.
fn split_header(records: &mut Vec<(u64, csv::StringRecord)>) -> Option<Vec<String>> {
    let first = &records.first()?.1;
    if first.iter().all(|f| f.parse::<f64>().is_ok()) {
        return None;
    }
    let names = first.iter().map(str::to_string).collect();
    records.remove(0);
    Some(names)
}

fn read_csv_matrix(path: &Path) -> Result<Matrix, DataError> {
    let mut records = csv_records(path)?;
    let header = split_header(&mut records);
    let cols = header.as_ref().map(Vec::len).or_else(|| records.first().map(|r| r.1.len())).unwrap_or(0);
    let mut data = Vec::with_capacity(records.len() * cols);
    for (line, rec) in &records {
        if rec.len() != cols {
            return fail(path, format!("line {line} has {} fields, expected {cols}", rec.len()));
        }
        for (c, field) in rec.iter().enumerate() {
            let v: f64 = field.parse().or_else(|_| {
                let col = match &header {
                    Some(names) => format!("column {} ('{}')", c + 1, names[c]),
                    None => format!("column {}", c + 1),
                };
                fail(path, format!("line {line}, {col}: '{field}' is not a number"))
            })?;
            data.push(v as f32);
        }
    }
    Ok(Matrix::new(records.len(), cols, data))
}

fn read_csv_labels(path: &Path) -> Result<Vec<i64>, DataError> {
    let mut records = csv_records(path)?;
    if records.first().is_some_and(|(_, r)| r.len() == 1 && r[0].parse::<i64>().is_err()) {
        records.remove(0);
    }
    records
        .iter()
        .map(|(line, rec)| {
            if rec.len() != 1 {
                return fail(path, format!("line {line} has {} fields; a label file has one column", rec.len()));
            }
            rec[0].parse::<i64>().or_else(|_| fail(path, format!("line {line}: '{}' is not an integer label", &rec[0])))
        })
        .collect()
}

// ---------------------------------------------------------------- score files

/// Read a score file written by `tidemark score`: CSV with a header, `.npy`
/// with its sidecar `.json` of column names, or JSON lines (null = NaN).
/// Returns the column names and the values column by column.
pub fn read_score_table(path: &Path) -> Result<(Vec<String>, Vec<Vec<f64>>), DataError> {
    let (names, rows): (Vec<String>, Vec<Vec<f64>>) = match extension(path).as_str() {
        "csv" => {
            let mut records = csv_records(path)?;
            let names = split_header(&mut records).ok_or_else(|| DataError {
                path: path.to_path_buf(),
                msg: "has no header row naming the score columns".into(),
            })?;
            let rows = records
                .iter()
                .map(|(line, rec)| {
                    if rec.len() != names.len() {
                        return fail(path, format!("line {line} has {} fields, expected {}", rec.len(), names.len()));
                    }
                    rec.iter()
                        .enumerate()
                        .map(|(c, f)| {
                            f.parse::<f64>().or_else(|_| {
                                fail(path, format!("line {line}, column '{}': '{f}' is not a number", names[c]))
                            })
                        })
                        .collect()
                })
                .collect::<Result<_, _>>()?;
            (names, rows)
        }
        "npy" => {
            let m = read_matrix(path, None)?;
            let side = path.with_extension("json");
            let text = std::fs::read_to_string(&side)
                .or_else(|e| fail(&side, format!("cannot read the column names beside {}: {e}", path.display())))?;
            let doc: serde_json::Value =
                serde_json::from_str(&text).or_else(|e| fail(&side, format!("bad JSON: {e}")))?;
            let names: Vec<String> = doc["columns"]
                .as_array()
                .map(|a| a.iter().filter_map(|v| v.as_str().map(str::to_string)).collect())
                .unwrap_or_default();
            if names.len() != m.cols {
                return fail(&side, format!("names {} columns but {} has {}", names.len(), path.display(), m.cols));
            }
            (names, (0..m.rows).map(|r| m.row(r).iter().map(|&v| v as f64).collect()).collect())
        }
        "jsonl" => {
            let text = std::fs::read_to_string(path).or_else(|e| fail(path, format!("cannot read: {e}")))?;
            let mut names: Vec<String> = Vec::new();
            let mut rows = Vec::new();
            for (i, line) in text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty()) {
                let obj: serde_json::Map<String, serde_json::Value> =
                    serde_json::from_str(line).or_else(|e| fail(path, format!("line {}: {e}", i + 1)))?;
                if names.is_empty() {
                    names = obj.keys().cloned().collect();
                }
                let row = names
                    .iter()
                    .map(|n| match obj.get(n) {
                        Some(serde_json::Value::Null) => Ok(f64::NAN),
                        Some(v) => v
                            .as_f64()
                            .ok_or(())
                            .or_else(|_| fail(path, format!("line {}: '{n}' is not a number", i + 1))),
                        None => fail(path, format!("line {}: missing '{n}'", i + 1)),
                    })
                    .collect::<Result<Vec<f64>, _>>()?;
                rows.push(row);
            }
            (names, rows)
        }
        other => return fail(path, format!("unsupported score file type '.{other}' (expected .csv, .npy or .jsonl)")),
    };
    if rows.is_empty() {
        return fail(path, "has no rows");
    }
    let columns = (0..names.len()).map(|c| rows.iter().map(|r| r[c]).collect()).collect();
    Ok((names, columns))
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
    fn parses_header_variants() {
        let h = parse_npy_header("{'descr': '<f8', 'fortran_order': True, 'shape': (3, 4), }").unwrap();
        assert_eq!((h.descr.as_str(), h.fortran_order, h.shape), ("<f8", true, vec![3, 4]));
        let h = parse_npy_header("{'descr': '|u1', 'fortran_order': False, 'shape': (7,), }").unwrap();
        assert_eq!(h.shape, vec![7]);
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
}
