//! CSV embeddings and labels, and the score files `evaluate` reads (CSV,
//! `.npy` with a `.json` sidecar, JSON lines). Every cell must be a finite
//! number; messages name the line and column.

use super::{fail, printable, read_text, DataError, Matrix};
use std::path::Path;

/// The non-blank records of CSV text with their line numbers.
fn csv_records(path: &Path, bytes: &[u8]) -> Result<Vec<(u64, csv::StringRecord)>, DataError> {
    let mut reader =
        csv::ReaderBuilder::new().has_headers(false).flexible(true).trim(csv::Trim::All).from_reader(bytes);
    let mut out = Vec::new();
    for rec in reader.records() {
        let rec = rec.or_else(|e| fail(path, format!("CSV error: {}", printable(&e.to_string(), 200))))?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        // A line of spaces is blank; a line of empty cells (",,") is not.
        if rec.len() == 1 && rec[0].is_empty() {
            continue;
        }
        out.push((line, rec));
    }
    Ok(out)
}

/// A first row with a cell that is not empty and not a number is a
/// header (an empty cell alone is a missing value, reported as such).
fn split_header(records: &mut Vec<(u64, csv::StringRecord)>) -> Option<Vec<String>> {
    let first = &records.first()?.1;
    if first.iter().all(|f| f.is_empty() || f.parse::<f64>().is_ok()) {
        return None;
    }
    let names = first.iter().map(|n| printable(n, 40)).collect();
    records.remove(0);
    Some(names)
}

/// "column 3" or "column 3 ('name')", 1-based.
fn column_name(header: Option<&[String]>, c: usize) -> String {
    match header.and_then(|h| h.get(c)) {
        Some(name) => format!("column {} ('{name}')", c + 1),
        None => format!("column {}", c + 1),
    }
}

/// One cell as a finite number.
fn number(path: &Path, line: u64, column: impl Fn() -> String, field: &str) -> Result<f64, DataError> {
    if field.is_empty() {
        return fail(path, format!("line {line}, {}: empty cell", column()));
    }
    match field.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => fail(path, format!("line {line}, {}: '{field}' is not a finite number", column())),
        Err(_) => fail(path, format!("line {line}, {}: '{}' is not a number", column(), printable(field, 40))),
    }
}

/// Records of a fixed width: every line must have `cols` fields.
fn check_width(path: &Path, line: u64, rec: &csv::StringRecord, cols: usize) -> Result<(), DataError> {
    if rec.len() != cols {
        return fail(path, format!("line {line} has {} fields, expected {cols}", rec.len()));
    }
    Ok(())
}

/// An embedding matrix from CSV text (header optional).
pub(super) fn parse_csv_matrix(path: &Path, bytes: &[u8]) -> Result<Matrix, DataError> {
    let mut records = csv_records(path, bytes)?;
    let header = split_header(&mut records);
    let cols = header.as_ref().map(Vec::len).or_else(|| records.first().map(|r| r.1.len())).unwrap_or(0);
    let mut data = Vec::new();
    for (line, rec) in &records {
        check_width(path, *line, rec, cols)?;
        for (c, field) in rec.iter().enumerate() {
            let column = || column_name(header.as_deref(), c);
            let v = number(path, *line, column, field)?;
            // Parsed as f32 directly: through f64 a decimal can round twice
            // and miss the float32 it was written from.
            let v32: f32 = field.parse().unwrap_or(f32::INFINITY);
            if !v32.is_finite() {
                return fail(path, format!("line {line}, {}: {v:e} is outside the float32 range", column()));
            }
            data.push(v32);
        }
    }
    Ok(Matrix::new(records.len(), cols, data))
}

/// Integer labels from one-column CSV text (header optional).
pub(super) fn parse_csv_labels(path: &Path, bytes: &[u8]) -> Result<Vec<i64>, DataError> {
    let mut records = csv_records(path, bytes)?;
    split_header(&mut records);
    records
        .iter()
        .map(|(line, rec)| {
            check_width(path, *line, rec, 1).or_else(|_| {
                fail(path, format!("line {line} has {} fields; a label file has one column", rec.len()))
            })?;
            rec[0]
                .parse::<i64>()
                .or_else(|_| fail(path, format!("line {line}: '{}' is not an integer label", printable(&rec[0], 40))))
        })
        .collect()
}

/// Read a score file written by `tidemark score`: CSV with a header, `.npy`
/// with its sidecar `.json` of column names, or JSON lines. Every value
/// must be a finite number. Returns the column names and the values column
/// by column.
pub fn read_score_table(path: &Path) -> Result<(Vec<String>, Vec<Vec<f64>>), DataError> {
    let (names, rows): (Vec<String>, Vec<Vec<f64>>) = match super::extension(path).as_str() {
        "csv" => csv_scores(path)?,
        "npy" => npy_scores(path)?,
        "jsonl" => jsonl_scores(path)?,
        other => {
            return fail(
                path,
                format!("unsupported score file type '.{}' (expected .csv, .npy or .jsonl)", printable(other, 20)),
            )
        }
    };
    if rows.is_empty() {
        return fail(path, "has no rows");
    }
    let columns = (0..names.len()).map(|c| rows.iter().map(|r| r[c]).collect()).collect();
    Ok((names, columns))
}

type Rows = (Vec<String>, Vec<Vec<f64>>);

fn csv_scores(path: &Path) -> Result<Rows, DataError> {
    let mut records = csv_records(path, &super::read_file(path)?)?;
    let names = split_header(&mut records).ok_or_else(|| DataError {
        path: path.to_path_buf(),
        msg: "has no header row naming the score columns".into(),
    })?;
    // Rows that `score --bad-rows flag` wrote without scores are left out.
    let flag = names.iter().position(|n| n == BAD_ROW);
    let rows = records
        .iter()
        .filter(|(_, rec)| flag.is_none_or(|f| rec.get(f).is_none_or(str::is_empty)))
        .map(|(line, rec)| {
            check_width(path, *line, rec, names.len())?;
            rec.iter()
                .enumerate()
                .filter(|(c, _)| Some(*c) != flag)
                .map(|(c, f)| number(path, *line, || format!("column '{}'", names[c]), f))
                .collect()
        })
        .collect::<Result<_, _>>()?;
    let names = names.into_iter().filter(|n| n != BAD_ROW).collect();
    Ok((names, rows))
}

fn npy_scores(path: &Path) -> Result<Rows, DataError> {
    let ds = crate::data::Dataset::open_unchecked(path, None)?;
    let m = ds.to_matrix();
    let side = path.with_extension("json");
    let text = read_text(&side).map_err(|e| DataError {
        path: side.clone(),
        msg: format!("cannot read the column names beside {}: {}", path.display(), e.msg),
    })?;
    let doc: serde_json::Value = serde_json::from_str(&text).or_else(|e| fail(&side, format!("bad JSON: {e}")))?;
    let names: Vec<String> = doc["columns"]
        .as_array()
        .map(|a| a.iter().filter_map(|v| v.as_str().map(|s| printable(s, 40))).collect())
        .unwrap_or_default();
    if names.len() != m.cols {
        return fail(&side, format!("names {} columns but {} has {}", names.len(), path.display(), m.cols));
    }
    // Rows that `score --bad-rows flag` wrote without scores (1 in their
    // bad_row column) are left out; every other value must be finite.
    let flag = names.iter().position(|n| n == BAD_ROW);
    let mut rows = Vec::with_capacity(m.rows);
    for r in 0..m.rows {
        let row = m.row(r);
        if flag.is_some_and(|f| row[f] != 0.0) {
            continue;
        }
        if let Some((c, what)) = ds.bad_value(r, row) {
            return fail(path, format!("row {r}, column {c} (0-based) is {what}"));
        }
        rows.push(row.iter().enumerate().filter(|(c, _)| Some(*c) != flag).map(|(_, &v)| v as f64).collect());
    }
    Ok((names.into_iter().filter(|n| n != BAD_ROW).collect(), rows))
}

/// The column `score --bad-rows flag` adds: why a row was not scored.
const BAD_ROW: &str = "bad_row";

fn jsonl_scores(path: &Path) -> Result<Rows, DataError> {
    let text = read_text(path)?;
    let mut names: Vec<String> = Vec::new();
    let mut rows = Vec::new();
    for (i, line) in text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty()) {
        let n = i + 1;
        let obj: serde_json::Map<String, serde_json::Value> =
            serde_json::from_str(line).or_else(|e| fail(path, format!("line {n}: {e}")))?;
        if names.is_empty() {
            names = obj.keys().filter(|k| *k != BAD_ROW).cloned().collect();
        }
        // A row `score --bad-rows flag` wrote without scores is left out.
        if obj.get(BAD_ROW).is_some_and(|v| !v.is_null()) {
            continue;
        }
        let row = names
            .iter()
            .map(|name| {
                let shown = printable(name, 40);
                match obj.get(name) {
                    Some(serde_json::Value::Null) => {
                        fail(path, format!("line {n}, column '{shown}': null (an undefined score)"))
                    }
                    Some(v) => v.as_f64().filter(|v| v.is_finite()).ok_or(()).or_else(|_| {
                        fail(
                            path,
                            format!("line {n}, column '{shown}': {} is not a number", printable(&v.to_string(), 40)),
                        )
                    }),
                    None => fail(path, format!("line {n}: missing column '{shown}'")),
                }
            })
            .collect::<Result<Vec<f64>, _>>()?;
        rows.push(row);
    }
    Ok((names, rows))
}
