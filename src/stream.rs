//! Scores for rows that arrive in record batches (Parquet, Arrow IPC files,
//! Arrow IPC streams on standard input): each batch is checked, scored and
//! written before the next is read, so memory is bounded by a batch, not by
//! the file. Columns named with `--keep` are written beside the scores, in
//! input order, so the results join back to the source table.

use crate::columnar::{Chunk, Reader};
use crate::data::Dataset;
use crate::error::{Error, Result};
use crate::model::Model;
use crate::score::{self, BadRows, ChunkScorer, Format, ScoreOptions, ScoreSummary};
use arrow_array::{ArrayRef, BooleanArray, Float64Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema, SchemaRef};
use std::io::Write;
use std::path::Path;
use std::sync::Arc;

/// Where streamed scores go, chosen by the output's extension: `.parquet`,
/// `.arrow` (IPC file), `.arrows` (IPC stream), or a row format of
/// [`score::Format`]. `-` is CSV on standard output, or an Arrow IPC stream
/// with `arrow_stdout`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Target {
    Rows(Format),
    Parquet,
    IpcFile,
    IpcStream,
}

impl Target {
    pub fn of(path: &Path, arrow_stdout: bool) -> Result<Target> {
        if crate::output::is_stdout(path) {
            return Ok(if arrow_stdout { Target::IpcStream } else { Target::Rows(Format::Csv) });
        }
        let ext = path.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase);
        match ext.as_deref() {
            Some("parquet" | "pq") => Ok(Target::Parquet),
            Some("arrow" | "feather" | "ipc") => Ok(Target::IpcFile),
            Some("arrows") => Ok(Target::IpcStream),
            Some("npy") => Err(Error::Invalid(format!(
                "{}: a streamed input's row count is known only at its end, so its scores go to .parquet, .arrow, .arrows, .csv or .jsonl, not .npy",
                path.display()
            ))),
            _ => Format::of(path).map(Target::Rows),
        }
    }

    fn columnar(self) -> bool {
        !matches!(self, Target::Rows(_))
    }
}

/// Score every batch of `reader` into `output`. Rows with NaN or infinite
/// values are handled as `opts.bad_rows` says; with `BadRows::Error` the run
/// stops at the first and nothing is written.
pub fn score_batches(
    model: &Model,
    reader: &mut Reader,
    output: &Path,
    target: Target,
    opts: &ScoreOptions,
) -> Result<ScoreSummary> {
    if !reader.keep_names().is_empty() && !target.columnar() {
        return Err(Error::Invalid(format!(
            "{}: --keep writes its columns beside the scores in .parquet, .arrow or .arrows output",
            output.display()
        )));
    }
    let path = reader.path().to_path_buf();
    let dim = reader.dim()?;
    model.check_width(&path, dim)?;
    reader.finite = false;
    let mut chunks = ChunkScorer::new(model, opts, crate::columnar::BATCH_ROWS)?;
    let header = chunks.columns.clone();
    let keep_schema = reader.keep_schema();
    let flag = opts.bad_rows == BadRows::Flag;
    let mut bad_rows: Vec<(usize, String)> = Vec::new();
    let mut progress = crate::progress::Progress::new(reader.rows_hint.unwrap_or(0), "rows scored");
    let mut run = |sink: &mut dyn Sink| -> Result<()> {
        while let Some(Chunk { first_row, x, keep, .. }) = reader.next_chunk()? {
            let x = Dataset::from_matrix(&path, x);
            let local = score::find_bad_rows(&x);
            if let (BadRows::Error, Some((r, _))) = (opts.bad_rows, local.first()) {
                return Err(score::bad_row_error(&x, *r, first_row));
            }
            let (order, good) = score::sort_rows(0..x.rows, &mut local.iter().peekable());
            let values = chunks.score(&x, &good);
            sink.write(keep.as_ref(), &order, values, flag)?;
            progress.advance(x.rows);
            bad_rows.extend(local.iter().map(|(r, why)| (first_row + r, why.clone())));
        }
        Ok(())
    };
    write_target(output, target, &header, keep_schema, flag, &mut run)?;
    progress.finish();
    let mut summary = chunks.finish()?;
    summary.bad = bad_rows;
    Ok(summary)
}

/// Open the sink for `target`, run `body` on it, and finish the file
/// (atomically, for a path).
fn write_target(
    output: &Path,
    target: Target,
    header: &[String],
    keep: SchemaRef,
    flag: bool,
    body: &mut dyn FnMut(&mut dyn Sink) -> Result<()>,
) -> Result<()> {
    let io = |e: std::io::Error| Error::Io { path: output.to_path_buf(), source: e };
    let arrow =
        |e: arrow_schema::ArrowError| Error::Io { path: output.to_path_buf(), source: std::io::Error::other(e) };
    let schema = out_schema(&keep, header, flag);
    match target {
        Target::Rows(format) => crate::output::write_atomic(output, |w| {
            let mut names = header.to_vec();
            if flag {
                names.push("bad_row".into());
            }
            if format == Format::Csv {
                writeln!(w, "{}", names.join(",")).map_err(io)?;
            }
            body(&mut RowSink { w, format, names, path: output })
        }),
        Target::IpcStream if crate::output::is_stdout(output) => {
            let stdout = std::io::stdout();
            let w = std::io::BufWriter::new(stdout.lock());
            let mut sink = ArrowSink {
                schema: schema.clone(),
                writer: arrow_ipc::writer::StreamWriter::try_new(w, &schema).map_err(arrow)?,
                path: output,
            };
            body(&mut sink)?;
            sink.writer.finish().map_err(arrow)
        }
        _ => crate::output::write_atomic_via(output, |tmp| {
            let file = std::fs::File::create(tmp).map_err(io)?;
            let w = std::io::BufWriter::new(file);
            match target {
                Target::Parquet => {
                    let props = parquet::file::properties::WriterProperties::builder()
                        .set_compression(parquet::basic::Compression::SNAPPY)
                        .build();
                    let writer = parquet::arrow::ArrowWriter::try_new(w, schema.clone(), Some(props))
                        .map_err(|e| Error::Io { path: output.to_path_buf(), source: std::io::Error::other(e) })?;
                    let mut sink = ArrowSink { schema, writer, path: output };
                    body(&mut sink)?;
                    sink.writer
                        .close()
                        .map(|_| ())
                        .map_err(|e| Error::Io { path: output.to_path_buf(), source: std::io::Error::other(e) })
                }
                Target::IpcFile => {
                    let writer = arrow_ipc::writer::FileWriter::try_new(w, &schema).map_err(arrow)?;
                    let mut sink = ArrowSink { schema, writer, path: output };
                    body(&mut sink)?;
                    sink.writer.finish().map_err(arrow)
                }
                _ => {
                    let writer = arrow_ipc::writer::StreamWriter::try_new(w, &schema).map_err(arrow)?;
                    let mut sink = ArrowSink { schema, writer, path: output };
                    body(&mut sink)?;
                    sink.writer.finish().map_err(arrow)
                }
            }
        }),
    }
}

/// The output table: kept columns, then one float64 column per score (null
/// for a bad row), then `bad_row` (the reason, null for a scored row) when
/// bad rows are flagged.
fn out_schema(keep: &SchemaRef, header: &[String], flag: bool) -> SchemaRef {
    let mut fields: Vec<Field> = keep.fields().iter().map(|f| f.as_ref().clone()).collect();
    fields.extend(header.iter().map(|c| Field::new(c, DataType::Float64, true)));
    if flag {
        fields.push(Field::new("bad_row", DataType::Utf8, true));
    }
    Arc::new(Schema::new(fields))
}

/// A writer of one chunk's scores.
trait Sink {
    /// `order` says, row by row, where the row's scores are in `values` or
    /// why it was not scored.
    fn write(
        &mut self,
        keep: Option<&RecordBatch>,
        order: &[std::result::Result<usize, &str>],
        values: &[f64],
        flag: bool,
    ) -> Result<()>;
}

struct RowSink<'w> {
    w: &'w mut dyn Write,
    format: Format,
    names: Vec<String>,
    path: &'w Path,
}

impl Sink for RowSink<'_> {
    fn write(
        &mut self,
        _keep: Option<&RecordBatch>,
        order: &[std::result::Result<usize, &str>],
        values: &[f64],
        flag: bool,
    ) -> Result<()> {
        let width = self.names.len() - usize::from(flag);
        let empty = vec![f64::NAN; width];
        for place in order {
            let (row, reason) = match place {
                Ok(k) => (&values[k * width..(k + 1) * width], None),
                Err(_) if !flag => continue,
                Err(why) => (&empty[..], Some(*why)),
            };
            score::write_row(self.w, self.format, &self.names, row, flag.then_some(reason))
                .map_err(|source| Error::Io { path: self.path.to_path_buf(), source })?;
        }
        Ok(())
    }
}

/// What the Arrow IPC writers and the Parquet writer have in common.
trait BatchWriter {
    fn put(&mut self, batch: &RecordBatch) -> std::result::Result<(), String>;
}

impl<W: Write> BatchWriter for arrow_ipc::writer::FileWriter<W> {
    fn put(&mut self, batch: &RecordBatch) -> std::result::Result<(), String> {
        self.write(batch).map_err(|e| e.to_string())
    }
}

impl<W: Write> BatchWriter for arrow_ipc::writer::StreamWriter<W> {
    fn put(&mut self, batch: &RecordBatch) -> std::result::Result<(), String> {
        self.write(batch).map_err(|e| e.to_string())
    }
}

impl<W: Write + Send> BatchWriter for parquet::arrow::ArrowWriter<W> {
    fn put(&mut self, batch: &RecordBatch) -> std::result::Result<(), String> {
        self.write(batch).map_err(|e| e.to_string())
    }
}

struct ArrowSink<'p, B: BatchWriter> {
    schema: SchemaRef,
    writer: B,
    path: &'p Path,
}

impl<B: BatchWriter> Sink for ArrowSink<'_, B> {
    fn write(
        &mut self,
        keep: Option<&RecordBatch>,
        order: &[std::result::Result<usize, &str>],
        values: &[f64],
        flag: bool,
    ) -> Result<()> {
        let fail = |msg: String| Error::Io { path: self.path.to_path_buf(), source: std::io::Error::other(msg) };
        // Skipped rows leave the kept columns too.
        let kept_rows: Vec<bool> = order.iter().map(|p| p.is_ok() || flag).collect();
        let mut columns: Vec<ArrayRef> = match keep {
            Some(k) if kept_rows.iter().all(|&b| b) => k.columns().to_vec(),
            Some(k) => arrow_select::filter::filter_record_batch(k, &BooleanArray::from(kept_rows.clone()))
                .map_err(|e| fail(e.to_string()))?
                .columns()
                .to_vec(),
            None => Vec::new(),
        };
        let places: Vec<&std::result::Result<usize, &str>> = order.iter().filter(|p| p.is_ok() || flag).collect();
        let scores = self.schema.fields().len() - columns.len() - usize::from(flag);
        for c in 0..scores {
            let col: Float64Array = places.iter().map(|p| p.as_ref().ok().map(|&k| values[k * scores + c])).collect();
            columns.push(Arc::new(col));
        }
        if flag {
            let why: StringArray = places.iter().map(|p| p.as_ref().err().copied()).collect();
            columns.push(Arc::new(why));
        }
        let batch = RecordBatch::try_new(self.schema.clone(), columns).map_err(|e| fail(e.to_string()))?;
        self.writer.put(&batch).map_err(fail)
    }
}
