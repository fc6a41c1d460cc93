//! The `.npy` format (numpy format versions 1.0, 2.0 and 3.0): the header
//! parsed with every size checked against the bytes at hand before anything
//! is allocated, and the float32 writer.

use super::{fail, printable, DataError, Matrix};
use std::path::Path;

/// Element types of `.npy` arrays this tool reads.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Scalar {
    F16,
    F32,
    F64,
    I8,
    U8,
    I16,
    U16,
    I32,
    U32,
    I64,
    U64,
    Bool,
}

impl Scalar {
    pub(crate) fn width(self) -> usize {
        match self {
            Scalar::I8 | Scalar::U8 | Scalar::Bool => 1,
            Scalar::F16 | Scalar::I16 | Scalar::U16 => 2,
            Scalar::F32 | Scalar::I32 | Scalar::U32 => 4,
            Scalar::F64 | Scalar::I64 | Scalar::U64 => 8,
        }
    }

    fn from_code(code: &str) -> Option<Scalar> {
        Some(match code {
            "f2" => Scalar::F16,
            "f4" => Scalar::F32,
            "f8" => Scalar::F64,
            "i1" => Scalar::I8,
            "u1" => Scalar::U8,
            "i2" => Scalar::I16,
            "u2" => Scalar::U16,
            "i4" => Scalar::I32,
            "u4" => Scalar::U32,
            "i8" => Scalar::I64,
            "u8" => Scalar::U64,
            "b1" => Scalar::Bool,
            _ => return None,
        })
    }
}

/// What a `.npy` header says, checked against the file it came from.
#[derive(Debug)]
pub(crate) struct NpyArray {
    /// The dtype string as written (printable form), for messages.
    pub descr: String,
    pub scalar: Scalar,
    pub big_endian: bool,
    pub fortran_order: bool,
    pub shape: Vec<usize>,
    /// Byte offset where the data starts.
    pub offset: usize,
    /// Bytes of data the shape needs; `offset + data_len` is within the file.
    pub data_len: usize,
}

/// Parse and check the header of the `.npy` file `bytes` (named `path` in
/// messages): the dtype is one we read, the element count does not
/// overflow, and the data the shape needs is in the file.
pub(crate) fn parse(path: &Path, bytes: &[u8]) -> Result<NpyArray, DataError> {
    if bytes.len() < 8 || &bytes[..6] != b"\x93NUMPY" {
        return fail(path, "is not a .npy file (bad magic string)");
    }
    let prefix = match bytes[6] {
        1 => 10,
        2 | 3 => 12,
        v => return fail(path, format!("unsupported .npy format version {v}.{}", bytes[7])),
    };
    let header_len = match bytes.get(8..prefix) {
        Some(&[a, b]) => u16::from_le_bytes([a, b]) as usize,
        Some(&[a, b, c, d]) => u32::from_le_bytes([a, b, c, d]) as usize,
        _ => return fail(path, "truncated .npy header"),
    };
    let Some(text) = bytes.get(prefix..prefix.saturating_add(header_len)) else {
        return fail(
            path,
            format!("truncated .npy header: it claims {header_len} bytes, the file has {}", bytes.len() - prefix),
        );
    };
    let text = std::str::from_utf8(text).or_else(|_| fail(path, ".npy header is not text"))?;
    let (descr, fortran_order, shape) = parse_dict(text).or_else(|msg| fail(path, format!(".npy header: {msg}")))?;
    let (big_endian, scalar) = dtype(&descr).ok_or_else(|| DataError {
        path: path.to_path_buf(),
        msg: format!("unsupported dtype '{}'", printable(&descr, 40)),
    })?;
    let data_len = shape
        .iter()
        .try_fold(scalar.width(), |n, &d| n.checked_mul(d))
        .ok_or_else(|| DataError { path: path.to_path_buf(), msg: format!("shape {shape:?} is too large") })?;
    let offset = prefix + header_len;
    let have = bytes.len() - offset;
    if have < data_len {
        return fail(path, format!("truncated: shape {shape:?} needs {data_len} data bytes, file has {have}"));
    }
    Ok(NpyArray { descr: printable(&descr, 40), scalar, big_endian, fortran_order, shape, offset, data_len })
}

/// Byte order and element type of a numpy dtype string such as `<f4`.
fn dtype(descr: &str) -> Option<(bool, Scalar)> {
    let order = descr.as_bytes().first()?;
    if !matches!(order, b'<' | b'>' | b'|' | b'=') {
        return None;
    }
    Some((*order == b'>', Scalar::from_code(descr.get(1..)?)?))
}

/// Parse the Python dict literal of a `.npy` header, e.g.
/// `{'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }`:
/// exactly the keys `descr`, `fortran_order` and `shape`, each once.
fn parse_dict(text: &str) -> Result<(String, bool, Vec<usize>), String> {
    let mut c = Cursor(text.trim());
    c.expect('{')?;
    let (mut descr, mut fortran, mut shape) = (None, None, None);
    while !c.eat('}') {
        let key = c.string()?;
        c.expect(':')?;
        let repeated = match key {
            "descr" => {
                let d = c.string().map_err(|_| "descr is not a string (structured dtypes are not read)")?;
                descr.replace(d.to_string()).is_some()
            }
            "fortran_order" => fortran.replace(c.boolean()?).is_some(),
            "shape" => shape.replace(c.tuple()?).is_some(),
            other => return Err(format!("unexpected key '{}'", printable(other, 40))),
        };
        if repeated {
            return Err(format!("key '{key}' given twice"));
        }
        if !c.eat(',') {
            c.expect('}')?;
            break;
        }
    }
    if !c.0.trim().is_empty() {
        return Err("text after the closing brace".into());
    }
    match (descr, fortran, shape) {
        (Some(d), Some(f), Some(s)) => Ok((d, f, s)),
        _ => Err("needs the keys 'descr', 'fortran_order' and 'shape'".into()),
    }
}

/// The unparsed rest of a header.
struct Cursor<'a>(&'a str);

impl<'a> Cursor<'a> {
    /// Skip whitespace, then take `ch` if it is next.
    fn eat(&mut self, ch: char) -> bool {
        self.0 = self.0.trim_start();
        match self.0.strip_prefix(ch) {
            Some(rest) => {
                self.0 = rest;
                true
            }
            None => false,
        }
    }

    fn expect(&mut self, ch: char) -> Result<(), String> {
        if self.eat(ch) {
            Ok(())
        } else {
            Err(format!("expected '{ch}' before '{}'", printable(self.0, 20)))
        }
    }

    /// A quoted string without escapes (numpy writes none in these fields).
    fn string(&mut self) -> Result<&'a str, String> {
        let quote = if self.eat('\'') {
            '\''
        } else if self.eat('"') {
            '"'
        } else {
            return Err(format!("expected a quoted string before '{}'", printable(self.0, 20)));
        };
        let end = self.0.find(quote).ok_or("unterminated string")?;
        let s = &self.0[..end];
        self.0 = &self.0[end + 1..];
        Ok(s)
    }

    fn boolean(&mut self) -> Result<bool, String> {
        self.0 = self.0.trim_start();
        for (word, value) in [("True", true), ("False", false)] {
            if let Some(rest) = self.0.strip_prefix(word) {
                self.0 = rest;
                return Ok(value);
            }
        }
        Err("fortran_order is not True or False".into())
    }

    /// A tuple of non-negative integers: `()`, `(7,)`, `(3, 4)`.
    fn tuple(&mut self) -> Result<Vec<usize>, String> {
        let malformed = || "malformed shape (expected a tuple of non-negative integers)".to_string();
        if !self.eat('(') {
            return Err(malformed());
        }
        let mut dims = Vec::new();
        while !self.eat(')') {
            self.0 = self.0.trim_start();
            let digits = self.0.find(|ch: char| !ch.is_ascii_digit()).unwrap_or(self.0.len());
            if digits == 0 {
                return Err(malformed());
            }
            let dim =
                self.0[..digits].parse().map_err(|_| format!("shape dimension {} is too large", &self.0[..digits]))?;
            dims.push(dim);
            self.0 = self.0[digits..].strip_prefix('L').unwrap_or(&self.0[digits..]);
            if !self.eat(',') {
                if !self.eat(')') {
                    return Err(malformed());
                }
                break;
            }
        }
        Ok(dims)
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_header_variants() {
        let (d, f, s) = parse_dict("{'descr': '<f8', 'fortran_order': True, 'shape': (3, 4), }").unwrap();
        assert_eq!((d.as_str(), f, s), ("<f8", true, vec![3, 4]));
        let (_, _, s) = parse_dict("{\"descr\": \"|u1\", \"shape\": (7L,), \"fortran_order\": False}").unwrap();
        assert_eq!(s, vec![7]);
        assert_eq!(
            parse_dict("{'descr': '<f4', 'fortran_order': False, 'shape': (), }").unwrap().2,
            Vec::<usize>::new()
        );
    }

    #[test]
    fn refuses_malformed_headers() {
        for bad in [
            "",
            "{'descr': '<f4', 'fortran_order': False, 'shape': )3, 4(, }",
            "{'descr': '<f4', 'fortran_order': False, 'shape': (3, -4), }",
            "{'descr': '<f4', 'fortran_order': False, 'shape': (99999999999999999999999,), }",
            "{'descr': '<f4', 'fortran_order': False, }",
            "{'descr': '<f4', 'descr': '<f4', 'fortran_order': False, 'shape': (1,)}",
            "{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (1,)}",
            "{'descr': '<f4', 'fortran_order': Maybe, 'shape': (1,)}",
        ] {
            assert!(parse_dict(bad).is_err(), "{bad}");
        }
        assert!(dtype("").is_none() && dtype("é4").is_none() && dtype("<").is_none() && dtype("<c8").is_none());
    }
}
