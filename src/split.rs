//! `tidemark split`: one file of vectors into training, calibration and test
//! files (`.npy`, float32), by a seeded shuffle or, for time-ordered data,
//! by position.

use crate::data::Dataset;
use crate::error::{Error, Result};
use rand::rngs::StdRng;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use std::path::{Path, PathBuf};

/// The parts, in order, and the file name each gets after the prefix.
pub const PARTS: [&str; 3] = ["train", "calibration", "test"];

/// Checked settings of a split.
#[derive(Clone, Debug, PartialEq)]
pub struct Split {
    /// Share of the rows in each part of [`PARTS`]; they sum to 1.
    pub fractions: [f64; 3],
    pub seed: u64,
    /// Split by position (first rows to training) instead of shuffling.
    pub ordered: bool,
}

impl Split {
    /// Check the `--fractions` values: three shares in [0, 1] summing to 1.
    pub fn new(fractions: &[f64], seed: u64, ordered: bool) -> Result<Split> {
        let [a, b, c] = fractions else {
            return Err(Error::Invalid(format!(
                "--fractions: give three shares (train, calibration, test), got {}",
                fractions.len()
            )));
        };
        let f = [*a, *b, *c];
        if f.iter().any(|v| !(0.0..=1.0).contains(v)) || ((a + b + c) - 1.0).abs() > 1e-6 {
            return Err(Error::Invalid(format!(
                "--fractions: shares must lie in [0, 1] and sum to 1, got {a},{b},{c}"
            )));
        }
        Ok(Split { fractions: f, seed, ordered })
    }

    /// Row indices of each part: rounded shares, the remainder to training.
    pub fn assign(&self, rows: usize) -> [Vec<usize>; 3] {
        let mut order: Vec<usize> = (0..rows).collect();
        if !self.ordered {
            order.shuffle(&mut StdRng::seed_from_u64(self.seed));
        }
        let calibration = (self.fractions[1] * rows as f64).round() as usize;
        let test = ((self.fractions[2] * rows as f64).round() as usize).min(rows - calibration);
        let train = rows - calibration - test;
        let mut parts = [
            order[..train].to_vec(),
            order[train..train + calibration].to_vec(),
            order[train + calibration..].to_vec(),
        ];
        // Each file keeps the input's row order.
        for p in &mut parts {
            p.sort_unstable();
        }
        parts
    }
}

/// The file of part `name` for `prefix`: PREFIX.train.npy and so on.
pub fn part_path(prefix: &Path, name: &str) -> PathBuf {
    let mut s = prefix.as_os_str().to_owned();
    s.push(format!(".{name}.npy"));
    PathBuf::from(s)
}

/// Write the parts of `x` next to `prefix`; returns (file, rows) of each
/// part written (parts with no rows are not written).
pub fn run(x: &Dataset, prefix: &Path, split: &Split) -> Result<Vec<(PathBuf, usize)>> {
    let mut written = Vec::new();
    let mut row = vec![0.0f32; x.cols];
    for (name, idx) in PARTS.iter().zip(split.assign(x.rows)) {
        if idx.is_empty() {
            continue;
        }
        let path = part_path(prefix, name);
        crate::output::write_atomic(&path, |w| {
            let io = |source| Error::Io { path: path.clone(), source };
            crate::data::write_npy_header(w, idx.len(), x.cols).map_err(io)?;
            for &r in &idx {
                x.row_into(r, &mut row);
                for v in &row {
                    w.write_all(&v.to_le_bytes()).map_err(io)?;
                }
            }
            Ok(())
        })?;
        written.push((path, idx.len()));
    }
    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parts_cover_every_row_once_with_rounded_shares() {
        let s = Split::new(&[0.8, 0.1, 0.1], 7, false).unwrap();
        let parts = s.assign(1003);
        assert_eq!(parts.iter().map(Vec::len).collect::<Vec<_>>(), vec![803, 100, 100]);
        let mut all: Vec<usize> = parts.concat();
        all.sort_unstable();
        assert_eq!(all, (0..1003).collect::<Vec<_>>());
        // Seeded: the same seed gives the same parts, another seed others.
        assert_eq!(parts, s.assign(1003));
        assert_ne!(parts, Split { seed: 8, ..s.clone() }.assign(1003));
        // By position: training first, then calibration, then test.
        let ordered = Split { ordered: true, ..s }.assign(10);
        assert_eq!(ordered, [(0..8).collect::<Vec<_>>(), vec![8], vec![9]]);
    }

    #[test]
    fn fractions_are_checked() {
        assert!(Split::new(&[0.8, 0.2], 0, false).is_err());
        assert!(Split::new(&[0.8, 0.1, 0.2], 0, false).is_err());
        assert!(Split::new(&[1.1, -0.05, -0.05], 0, false).is_err());
        assert!(Split::new(&[0.7, 0.3, 0.0], 0, false).is_ok());
    }
}
