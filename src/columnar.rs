//! Columnar files in: Parquet and Arrow IPC (file or stream), read one
//! record batch at a time. The embedding is one list column (fixed-size or
//! variable-size list of floats, every row the same length) or a set of
//! float columns; labels may come from an integer column, and other columns
//! (ids, timestamps) can be carried through to the scores.

use crate::data::{DataError, Matrix};
use arrow_array::cast::AsArray;
use arrow_array::types::{Float16Type, Float32Type, Float64Type};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::{ArrowError, DataType, SchemaRef};
use std::fs::File;
use std::io::{BufReader, Read};
use std::path::{Path, PathBuf};

/// Rows per record batch asked of the readers: the libraries' default of
/// 1,024 rows costs a batch's bookkeeping every 1,024 wide rows.
pub const BATCH_ROWS: usize = 16_384;

/// Which columns hold the embedding.
#[derive(Clone, Debug, PartialEq)]
pub enum Features {
    /// One list column.
    List(String),
    /// These float columns, in this order.
    Named(Vec<String>),
    /// Every float column whose name starts with this, in file order.
    Prefix(String),
}

/// What to read from a columnar file besides the embedding's location.
#[derive(Clone, Debug, Default)]
pub struct Selection {
    /// Where the embedding is; `None` picks the only list column, or every
    /// column when all are floats.
    pub features: Option<Features>,
    /// Integer class labels.
    pub label_column: Option<String>,
    /// Columns carried unchanged into keyed output.
    pub keep: Vec<String>,
}

/// Is this path a columnar file (by its extension)?
pub fn is_columnar(path: &Path) -> bool {
    matches!(extension(path).as_str(), "parquet" | "pq" | "arrow" | "feather" | "ipc" | "arrows")
}

fn extension(path: &Path) -> String {
    path.extension().map(|e| e.to_string_lossy().to_ascii_lowercase()).unwrap_or_default()
}

fn fail<T>(path: &Path, msg: impl std::fmt::Display) -> Result<T, DataError> {
    Err(DataError { path: path.to_path_buf(), msg: msg.to_string() })
}

type Batches = Box<dyn Iterator<Item = Result<RecordBatch, ArrowError>> + Send>;

/// One record batch's worth of rows.
pub struct Chunk {
    /// 0-based index of the chunk's first row in the file.
    pub first_row: usize,
    pub x: Matrix,
    /// One label per row when a label column was named.
    pub labels: Option<Vec<i64>>,
    /// The kept columns of these rows (`None` when none were asked for).
    pub keep: Option<RecordBatch>,
}

/// A columnar file opened for reading batch by batch.
pub struct Reader {
    path: PathBuf,
    batches: Batches,
    plan: Plan,
    /// Rows the file says it holds, where the format records it.
    pub rows_hint: Option<usize>,
    next_row: usize,
    /// The embedding width: known from the schema, or set by the first row.
    dim: Option<usize>,
    /// A batch read ahead to learn the width of a variable-size list.
    peeked: Option<RecordBatch>,
    /// Refuse NaN and infinite values (otherwise they pass through).
    pub finite: bool,
    schema: SchemaRef,
}

/// Where, in the projected batches, each part of a row comes from.
#[derive(Clone, Debug)]
struct Plan {
    features: Located,
    label: Option<String>,
    keep: Vec<String>,
}

#[derive(Clone, Debug)]
enum Located {
    List(String),
    Columns(Vec<String>),
}

impl Reader {
    /// Open `path` (Parquet by `.parquet`/`.pq`, an Arrow IPC file by
    /// `.arrow`/`.feather`/`.ipc`, an Arrow IPC stream by `.arrows`).
    pub fn open(path: &Path, sel: &Selection) -> Result<Reader, DataError> {
        let file = open_regular(path)?;
        match extension(path).as_str() {
            "parquet" | "pq" => Reader::parquet(path, file, sel),
            "arrows" => Reader::ipc_stream(path, Box::new(BufReader::new(file)), sel),
            _ => Reader::ipc_file(path, file, sel),
        }
    }

    /// Read an Arrow IPC stream from `input` (standard input in a pipe).
    pub fn ipc_stream(path: &Path, input: Box<dyn Read + Send>, sel: &Selection) -> Result<Reader, DataError> {
        let reader = arrow_ipc::reader::StreamReader::try_new(input, None)
            .or_else(|e| fail(path, format!("not a readable Arrow IPC stream: {e}")))?;
        let schema = reader.schema();
        let plan = Plan::new(path, &schema, sel)?;
        Ok(Reader::new(path, Box::new(reader), plan, None, &schema))
    }

    fn ipc_file(path: &Path, file: File, sel: &Selection) -> Result<Reader, DataError> {
        let reader = arrow_ipc::reader::FileReader::try_new_buffered(file, None)
            .or_else(|e| fail(path, format!("not a readable Arrow IPC file: {e}")))?;
        let schema = reader.schema();
        let plan = Plan::new(path, &schema, sel)?;
        Ok(Reader::new(path, Box::new(reader), plan, None, &schema))
    }

    fn parquet(path: &Path, file: File, sel: &Selection) -> Result<Reader, DataError> {
        use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
        use parquet::arrow::ProjectionMask;
        let builder = ParquetRecordBatchReaderBuilder::try_new(file)
            .or_else(|e| fail(path, format!("not a readable Parquet file: {e}")))?;
        let schema = builder.schema().clone();
        let plan = Plan::new(path, &schema, sel)?;
        let roots: Vec<usize> = plan.columns().iter().filter_map(|c| schema.index_of(c).ok()).collect();
        let mask = ProjectionMask::roots(builder.parquet_schema(), roots);
        let rows = usize::try_from(builder.metadata().file_metadata().num_rows()).ok();
        let reader = builder
            .with_batch_size(BATCH_ROWS)
            .with_projection(mask)
            .build()
            .or_else(|e| fail(path, format!("cannot read: {e}")))?;
        Ok(Reader::new(path, Box::new(reader), plan, rows, &schema))
    }

    fn new(path: &Path, batches: Batches, plan: Plan, rows_hint: Option<usize>, schema: &SchemaRef) -> Reader {
        let dim = plan.schema_width(schema);
        Reader {
            path: path.to_path_buf(),
            batches,
            plan,
            rows_hint,
            next_row: 0,
            dim,
            peeked: None,
            finite: true,
            schema: schema.clone(),
        }
    }

    /// The embedding width (reads ahead one batch for variable-size lists).
    pub fn dim(&mut self) -> Result<usize, DataError> {
        if let Some(d) = self.dim {
            return Ok(d);
        }
        while self.dim.is_none() {
            let Some(batch) = self.next_batch()? else {
                return fail(&self.path, "has zero rows");
            };
            self.dim = self.plan.first_width(&batch);
            self.peeked = Some(batch);
        }
        Ok(self.dim.unwrap_or(0))
    }

    fn next_batch(&mut self) -> Result<Option<RecordBatch>, DataError> {
        if let Some(b) = self.peeked.take() {
            return Ok(Some(b));
        }
        match self.batches.next() {
            None => Ok(None),
            Some(Ok(b)) => Ok(Some(b)),
            Some(Err(e)) => fail(&self.path, format!("after row {}: {e}", self.next_row)),
        }
    }

    /// The next batch of rows, checked (every value finite, every row the
    /// same width, no nulls); `None` at the end of the file.
    pub fn next_chunk(&mut self) -> Result<Option<Chunk>, DataError> {
        let dim = self.dim()?;
        loop {
            let Some(batch) = self.next_batch()? else { return Ok(None) };
            if batch.num_rows() == 0 {
                continue;
            }
            let first_row = self.next_row;
            let x = self.plan.rows(&self.path, &batch, first_row, dim, self.finite)?;
            let labels = match &self.plan.label {
                Some(name) => Some(labels_of(&self.path, &batch, name, first_row)?),
                None => None,
            };
            let keep = self.plan.kept(&self.path, &batch)?;
            self.next_row += batch.num_rows();
            return Ok(Some(Chunk { first_row, x, labels, keep }));
        }
    }

    /// The names of the kept columns, in the order they were asked for.
    pub fn keep_names(&self) -> &[String] {
        &self.plan.keep
    }

    /// The kept columns' schema, in the order they were asked for.
    pub fn keep_schema(&self) -> SchemaRef {
        let fields: Vec<arrow_schema::Field> =
            self.plan.keep.iter().filter_map(|k| self.schema.field_with_name(k).ok().cloned()).collect();
        std::sync::Arc::new(arrow_schema::Schema::new(fields))
    }

    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// Every row of a columnar file in memory, with its labels if asked for;
/// with `sample`, a seeded uniform sample of that many rows (in file order),
/// drawn while streaming so memory is bounded by the sample.
pub fn read_all(
    path: &Path,
    sel: &Selection,
    sample: Option<(usize, u64)>,
    finite: bool,
) -> Result<(Matrix, Option<Vec<i64>>), DataError> {
    let mut reader = Reader::open(path, sel)?;
    reader.finite = finite;
    let dim = reader.dim()?;
    let mut keep = Reservoir::new(sample);
    while let Some(chunk) = reader.next_chunk()? {
        for r in 0..chunk.x.rows {
            keep.offer(chunk.first_row + r, chunk.x.row(r), chunk.labels.as_ref().map(|l| l[r]));
        }
    }
    let (x, labels) = keep.finish(dim);
    if x.rows == 0 {
        return fail(path, "has zero rows");
    }
    Ok((x, sel.label_column.as_ref().map(|_| labels)))
}

/// All rows, or a seeded uniform sample of them (Algorithm R), kept with
/// their positions so the result stays in input order.
pub struct Reservoir {
    cap: Option<usize>,
    rng: rand::rngs::StdRng,
    seen: usize,
    rows: Vec<(usize, Vec<f32>, i64)>,
    flat: Vec<f32>,
    labels: Vec<i64>,
}

impl Reservoir {
    pub fn new(sample: Option<(usize, u64)>) -> Reservoir {
        use rand::SeedableRng;
        let seed = sample.map_or(0, |s| s.1);
        Reservoir {
            cap: sample.map(|s| s.0),
            rng: rand::rngs::StdRng::seed_from_u64(seed),
            seen: 0,
            rows: Vec::new(),
            flat: Vec::new(),
            labels: Vec::new(),
        }
    }

    pub fn offer(&mut self, position: usize, row: &[f32], label: Option<i64>) {
        use rand::Rng;
        let label = label.unwrap_or(0);
        self.seen += 1;
        match self.cap {
            None => {
                self.flat.extend_from_slice(row);
                self.labels.push(label);
            }
            Some(cap) if self.rows.len() < cap => self.rows.push((position, row.to_vec(), label)),
            Some(cap) => {
                let j = self.rng.random_range(0..self.seen);
                if j < cap {
                    self.rows[j] = (position, row.to_vec(), label);
                }
            }
        }
    }

    pub fn finish(mut self, dim: usize) -> (Matrix, Vec<i64>) {
        if self.cap.is_some() {
            self.rows.sort_by_key(|r| r.0);
            for (_, row, label) in self.rows {
                self.flat.extend_from_slice(&row);
                self.labels.push(label);
            }
        }
        let rows = self.labels.len();
        (Matrix::new(rows, dim, self.flat), self.labels)
    }
}

fn open_regular(path: &Path) -> Result<File, DataError> {
    let meta = std::fs::metadata(path).or_else(|e| fail(path, format!("cannot open: {e}")))?;
    if !meta.is_file() {
        return fail(path, "is not a regular file");
    }
    File::open(path).or_else(|e| fail(path, format!("cannot open: {e}")))
}

fn is_float(t: &DataType) -> bool {
    matches!(t, DataType::Float16 | DataType::Float32 | DataType::Float64)
}

fn list_item(t: &DataType) -> Option<&DataType> {
    match t {
        DataType::FixedSizeList(f, _) | DataType::List(f) | DataType::LargeList(f) => Some(f.data_type()),
        _ => None,
    }
}

impl Plan {
    fn new(path: &Path, schema: &SchemaRef, sel: &Selection) -> Result<Plan, DataError> {
        let field = |name: &str| {
            schema.field_with_name(name).or_else(|_| {
                let names: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
                fail(path, format!("has no column '{name}' (it has: {})", names.join(", ")))
            })
        };
        let features = match &sel.features {
            Some(Features::List(name)) => {
                let f = field(name)?;
                match list_item(f.data_type()) {
                    Some(item) if is_float(item) => Located::List(name.clone()),
                    _ => {
                        return fail(
                            path,
                            format!("column '{name}' is {}, expected a list of float32 or float64", f.data_type()),
                        )
                    }
                }
            }
            Some(Features::Named(names)) => {
                for n in names {
                    let f = field(n)?;
                    if !is_float(f.data_type()) {
                        return fail(path, format!("column '{n}' is {}, expected a float column", f.data_type()));
                    }
                }
                Located::Columns(names.clone())
            }
            Some(Features::Prefix(prefix)) => {
                let names: Vec<String> = schema
                    .fields()
                    .iter()
                    .filter(|f| f.name().starts_with(prefix.as_str()) && is_float(f.data_type()))
                    .map(|f| f.name().clone())
                    .collect();
                if names.is_empty() {
                    return fail(path, format!("has no float column whose name starts with '{prefix}'"));
                }
                Located::Columns(names)
            }
            None => Plan::default_features(path, schema, sel)?,
        };
        if let Some(l) = &sel.label_column {
            let f = field(l)?;
            if !f.data_type().is_integer() {
                return fail(path, format!("label column '{l}' is {}, expected integers", f.data_type()));
            }
        }
        for k in &sel.keep {
            field(k)?;
        }
        Ok(Plan { features, label: sel.label_column.clone(), keep: sel.keep.clone() })
    }

    /// The only list-of-floats column; or, when there is none, every float
    /// column not named as labels or kept.
    fn default_features(path: &Path, schema: &SchemaRef, sel: &Selection) -> Result<Located, DataError> {
        let lists: Vec<&str> = schema
            .fields()
            .iter()
            .filter(|f| list_item(f.data_type()).is_some_and(is_float))
            .map(|f| f.name().as_str())
            .collect();
        match lists.as_slice() {
            [one] => return Ok(Located::List(one.to_string())),
            [] => {}
            many => {
                return fail(path, format!("has several list columns ({}): name one with --column", many.join(", ")))
            }
        }
        let other = |n: &String| sel.label_column.as_ref() != Some(n) && !sel.keep.contains(n);
        let floats: Vec<String> = schema
            .fields()
            .iter()
            .filter(|f| is_float(f.data_type()))
            .map(|f| f.name().clone())
            .filter(other)
            .collect();
        let rest: Vec<&str> = schema
            .fields()
            .iter()
            .filter(|f| !is_float(f.data_type()) && other(f.name()))
            .map(|f| f.name().as_str())
            .collect();
        if floats.is_empty() || !rest.is_empty() {
            return fail(
                path,
                "cannot tell which columns hold the embedding: name a list column with --column, or float columns with --feature-columns or --column-prefix",
            );
        }
        Ok(Located::Columns(floats))
    }

    /// Every column the reader needs.
    fn columns(&self) -> Vec<String> {
        let mut c = match &self.features {
            Located::List(n) => vec![n.clone()],
            Located::Columns(names) => names.clone(),
        };
        c.extend(self.label.iter().cloned());
        c.extend(self.keep.iter().cloned());
        c
    }

    fn schema_width(&self, schema: &SchemaRef) -> Option<usize> {
        match &self.features {
            Located::Columns(names) => Some(names.len()),
            Located::List(n) => match schema.field_with_name(n).map(|f| f.data_type()) {
                Ok(DataType::FixedSizeList(_, w)) => usize::try_from(*w).ok(),
                _ => None,
            },
        }
    }

    /// The width of the first non-null list in `batch`.
    fn first_width(&self, batch: &RecordBatch) -> Option<usize> {
        let Located::List(name) = &self.features else { return None };
        let col = batch.column_by_name(name)?;
        let widths: Box<dyn Iterator<Item = (bool, usize)>> = if let Some(l) = col.as_list_opt::<i32>() {
            Box::new((0..l.len()).map(move |i| (l.is_null(i), l.value_length(i) as usize)))
        } else if let Some(l) = col.as_list_opt::<i64>() {
            Box::new((0..l.len()).map(move |i| (l.is_null(i), l.value_length(i) as usize)))
        } else {
            return None;
        };
        widths.filter(|(null, _)| !null).map(|(_, w)| w).next()
    }

    fn rows(
        &self,
        path: &Path,
        batch: &RecordBatch,
        first_row: usize,
        dim: usize,
        finite: bool,
    ) -> Result<Matrix, DataError> {
        let n = batch.num_rows();
        let mut out = vec![0.0f32; n * dim];
        match &self.features {
            Located::List(name) => {
                let col = column(path, batch, name)?;
                list_rows(path, name, col, first_row, dim, finite, &mut out)?;
            }
            Located::Columns(names) => {
                for (j, name) in names.iter().enumerate() {
                    let col = column(path, batch, name)?;
                    let values = floats(col).ok_or_else(|| type_error(path, name, col.data_type()))?;
                    for r in 0..n {
                        if col.is_null(r) {
                            return fail(path, format!("row {}, column '{name}' is null", first_row + r));
                        }
                        out[r * dim + j] = checked(path, first_row + r, name, None, values.get(r), finite)?;
                    }
                }
            }
        }
        Ok(Matrix::new(n, dim, out))
    }

    fn kept(&self, path: &Path, batch: &RecordBatch) -> Result<Option<RecordBatch>, DataError> {
        if self.keep.is_empty() {
            return Ok(None);
        }
        let schema = batch.schema();
        let indices: Vec<usize> = self.keep.iter().filter_map(|k| schema.index_of(k).ok()).collect();
        batch.project(&indices).map(Some).or_else(|e| fail(path, format!("cannot carry kept columns: {e}")))
    }
}

fn column<'b>(path: &Path, batch: &'b RecordBatch, name: &str) -> Result<&'b ArrayRef, DataError> {
    batch
        .column_by_name(name)
        .ok_or_else(|| DataError { path: path.to_path_buf(), msg: format!("has no column '{name}'") })
}

fn type_error(path: &Path, name: &str, t: &DataType) -> DataError {
    DataError { path: path.to_path_buf(), msg: format!("column '{name}' is {t}, expected float32 or float64 values") }
}

/// Float values of any width, read as f64 (f32 and f16 widen exactly).
enum Floats<'a> {
    F16(&'a arrow_array::Float16Array),
    F32(&'a arrow_array::Float32Array),
    F64(&'a arrow_array::Float64Array),
}

impl Floats<'_> {
    fn get(&self, i: usize) -> f64 {
        match self {
            Floats::F16(a) => a.value(i).to_f64(),
            Floats::F32(a) => a.value(i) as f64,
            Floats::F64(a) => a.value(i),
        }
    }
}

fn floats(a: &dyn Array) -> Option<Floats<'_>> {
    if let Some(a) = a.as_primitive_opt::<Float32Type>() {
        Some(Floats::F32(a))
    } else if let Some(a) = a.as_primitive_opt::<Float64Type>() {
        Some(Floats::F64(a))
    } else {
        a.as_primitive_opt::<Float16Type>().map(Floats::F16)
    }
}

/// A value as f32, or an error naming the row and column when it is not
/// finite or does not fit in float32.
fn checked(path: &Path, row: usize, name: &str, item: Option<usize>, v: f64, finite: bool) -> Result<f32, DataError> {
    let x = v as f32;
    if x.is_finite() || !finite {
        return Ok(x);
    }
    let what = if v.is_nan() {
        "NaN"
    } else if v.is_infinite() {
        "infinite"
    } else {
        "outside the float32 range"
    };
    let at = match item {
        Some(j) => format!("column '{name}', value {j}"),
        None => format!("column '{name}'"),
    };
    fail(path, format!("row {row}, {at} is {what}"))
}

fn list_rows(
    path: &Path,
    name: &str,
    col: &ArrayRef,
    first_row: usize,
    dim: usize,
    finite: bool,
    out: &mut [f32],
) -> Result<(), DataError> {
    // (offset, length) of each row's values in the child array.
    let spans: Vec<Option<(usize, usize)>> = if let Some(l) = col.as_fixed_size_list_opt() {
        let w = l.value_length() as usize;
        (0..l.len()).map(|i| (!l.is_null(i)).then(|| (l.value_offset_at(i), w))).collect()
    } else if let Some(l) = col.as_list_opt::<i32>() {
        let o = l.value_offsets();
        (0..l.len()).map(|i| (!l.is_null(i)).then(|| (o[i] as usize, (o[i + 1] - o[i]) as usize))).collect()
    } else if let Some(l) = col.as_list_opt::<i64>() {
        let o = l.value_offsets();
        (0..l.len()).map(|i| (!l.is_null(i)).then(|| (o[i] as usize, (o[i + 1] - o[i]) as usize))).collect()
    } else {
        return Err(type_error(path, name, col.data_type()));
    };
    let child = match col.data_type() {
        DataType::FixedSizeList(..) => col.as_fixed_size_list().values(),
        DataType::List(_) => col.as_list::<i32>().values(),
        _ => col.as_list::<i64>().values(),
    };
    let values = floats(child.as_ref()).ok_or_else(|| type_error(path, name, child.data_type()))?;
    // float32 without nulls, the common case: rows are copied whole and
    // checked after; the per-value path only runs to name a bad value.
    let fast = match &values {
        Floats::F32(a) if child.null_count() == 0 => Some(a.values()),
        _ => None,
    };
    for (r, span) in spans.iter().enumerate() {
        let row = first_row + r;
        let Some((start, len)) = *span else {
            return fail(path, format!("row {row}, column '{name}' is null"));
        };
        if len != dim {
            return fail(path, format!("row {row}, column '{name}' has {len} values; earlier rows have {dim}"));
        }
        if let Some(vals) = fast {
            let dst = &mut out[r * dim..(r + 1) * dim];
            dst.copy_from_slice(&vals[start..start + dim]);
            let bad = if finite { dst.iter().position(|v| !v.is_finite()) } else { None };
            match bad {
                Some(j) => return checked(path, row, name, Some(j), dst[j] as f64, finite).map(drop),
                None => continue,
            }
        }
        for j in 0..dim {
            if child.is_null(start + j) {
                return fail(path, format!("row {row}, column '{name}', value {j} is null"));
            }
            out[r * dim + j] = checked(path, row, name, Some(j), values.get(start + j), finite)?;
        }
    }
    Ok(())
}

fn labels_of(path: &Path, batch: &RecordBatch, name: &str, first_row: usize) -> Result<Vec<i64>, DataError> {
    let col = column(path, batch, name)?;
    let as_i64 = integer_reader(col).ok_or_else(|| DataError {
        path: path.to_path_buf(),
        msg: format!("label column '{name}' is {}, expected integers", col.data_type()),
    })?;
    (0..col.len())
        .map(|r| match as_i64(r) {
            Some(v) if !col.is_null(r) => Ok(v),
            _ => fail(path, format!("row {}, label column '{name}' is null or out of range", first_row + r)),
        })
        .collect()
}

/// A reader of integer values of any width as i64 (`None` where a u64 does
/// not fit).
fn integer_reader(col: &ArrayRef) -> Option<Box<dyn Fn(usize) -> Option<i64> + '_>> {
    use arrow_array::types::*;
    macro_rules! try_int {
        ($t:ty) => {
            if let Some(a) = col.as_primitive_opt::<$t>() {
                return Some(Box::new(move |i| i64::try_from(a.value(i)).ok()));
            }
        };
    }
    try_int!(Int8Type);
    try_int!(Int16Type);
    try_int!(Int32Type);
    try_int!(Int64Type);
    try_int!(UInt8Type);
    try_int!(UInt16Type);
    try_int!(UInt32Type);
    try_int!(UInt64Type);
    None
}
