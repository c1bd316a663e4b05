//! Feature points from a file: named numeric and categorical columns of every row, for the
//! label-free input-shift tests. Every problem is located (file, line, column).

use std::collections::HashMap;
use std::io::Read;

use super::decode::{for_each_row, DecodeError, DecodeErrorKind, Format};
use crate::estimate::kernel::Points;

/// Codes categorical values as integers, shared by the samples being compared so that equal
/// strings get equal codes.
#[derive(Clone, Debug, Default)]
pub struct Coder {
    codes: Vec<HashMap<Vec<u8>, u32>>,
}

impl Coder {
    fn code(&mut self, column: usize, value: &[u8]) -> u32 {
        if self.codes.len() <= column {
            self.codes.resize_with(column + 1, HashMap::new);
        }
        let map = &mut self.codes[column];
        let next = map.len() as u32;
        *map.entry(value.to_vec()).or_insert(next)
    }

    /// The code of `value` without adding it: a value the reference never had gets a code of
    /// its own from a hash (high bit set, so it never equals a reference code; two unseen values
    /// share one only on a 31-bit hash collision, which only understates a difference).
    pub fn lookup(&self, column: usize, value: &[u8]) -> u32 {
        if let Some(&c) = self.codes.get(column).and_then(|m| m.get(value)) {
            return c;
        }
        let mut h: u32 = 0x811c_9dc5;
        for b in value {
            h ^= u32::from(*b);
            h = h.wrapping_mul(0x0100_0193);
        }
        h | 0x8000_0000
    }
}

/// The rows of `src`: `numeric` columns parsed as finite numbers, `categorical` columns as
/// non-empty strings. A file without a data row is an error.
pub fn read_points<R: Read>(
    src: R,
    format: Format,
    file: &str,
    numeric: &[String],
    categorical: &[String],
    coder: &mut Coder,
) -> Result<Points, DecodeError> {
    let columns: Vec<&str> = numeric.iter().chain(categorical).map(String::as_str).collect();
    let mut points = Points { dims: numeric.len(), cats: categorical.len(), ..Points::default() };
    let mut rows = 0u64;
    for_each_row(src, format, file, &columns, |row| {
        let row = row?;
        for (i, name) in columns.iter().enumerate() {
            let cell = row
                .cell(i)
                .filter(|c| !c.iter().all(u8::is_ascii_whitespace))
                .ok_or_else(|| DecodeError::cell(file, row.line, name, "missing value"))?;
            if i < numeric.len() {
                let v = crate::loss::parse_number(cell).map_err(|e| DecodeError::cell(file, row.line, name, e))?;
                points.numeric.push(v);
            } else {
                points.categorical.push(coder.code(i - numeric.len(), cell));
            }
        }
        rows += 1;
        Ok(())
    })?;
    if rows == 0 {
        return Err(DecodeError {
            file: file.to_string(),
            line: None,
            column: None,
            reason: "no data rows".into(),
            kind: DecodeErrorKind::Empty,
        });
    }
    Ok(points)
}

/// A seeded uniform subsample of at most `max` points (all of them when there are fewer), in
/// their file order.
pub fn subsample(points: &Points, max: usize, seed: u64) -> Points {
    let n = points.len();
    if n <= max {
        return points.clone();
    }
    let mut rng = crate::estimate::seeded::Seeded::new(seed);
    let mut order: Vec<usize> = (0..n).collect();
    for i in 0..max {
        let j = i + rng.below((n - i) as u64) as usize;
        order.swap(i, j);
    }
    let mut keep = order[..max].to_vec();
    keep.sort_unstable();
    points.select(&keep)
}
