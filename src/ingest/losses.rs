//! The losses of one file, for the one-off modes (`bound`, `track`, `slices`) and the config's
//! reference files: which columns hold them, and one streaming pass that hands each row's loss
//! (or "no label yet") to the caller, every bad row a located error.

use std::collections::HashMap;
use std::io::Read;

use super::{for_each_row, DecodeError, Format, Row};
use crate::loss::{self, LossSpec};

/// Where the losses come from in each row.
#[derive(Clone, Debug, PartialEq)]
pub enum LossSource {
    /// A precomputed loss column.
    Column(String),
    /// A loss computed from a prediction and a label column.
    Compare { prediction: String, label: String },
}

/// Where the losses of a file come from: shared by `bound` and `track`.
#[derive(Clone, Debug)]
pub struct Input {
    /// Name used in messages (the path, or `<stdin>`).
    pub file_label: String,
    pub format: Format,
    pub source: LossSource,
    pub loss: LossSpec,
    pub group_by: Option<String>,
}

/// The i-th wanted cell of a row, or a located "missing value" error.
fn required<'a>(row: &Row<'a>, file: &str, columns: &[&str], i: usize) -> Result<&'a [u8], DecodeError> {
    row.cell(i).ok_or_else(|| DecodeError::cell(file, row.line, columns[i], "missing value"))
}

/// One loss of the file, in file order.
pub struct LossRow<'a> {
    /// The group's key bytes (`None` without a group column).
    pub key: Option<&'a [u8]>,
    pub line: u64,
    /// `None` when the row has no label (an empty or null label cell, or loss cell): its loss
    /// is unknown, and only the delay-robust bounds use the row.
    pub loss: Option<f64>,
    /// True when a regression loss was above the maximum and was clipped to it.
    pub clipped: bool,
}

/// Streams `src` once and hands every row's loss to `visit`, in file order. Any bad row stops
/// the pass with a located error. Returns the number of the last line read.
pub fn for_each_loss<R: Read>(
    input: &Input,
    src: R,
    mut visit: impl FnMut(LossRow<'_>) -> Result<(), DecodeError>,
) -> Result<u64, DecodeError> {
    each_row(input, &[], src, |row, _| visit(row))
}

/// Like [`for_each_loss`], also handing over the cells of the `extra` columns (each required:
/// a row without one is a located error), and for commands that need every row labelled: a
/// row without a label is a located error too.
pub fn for_each_loss_with<R: Read>(
    input: &Input,
    extra: &[&str],
    src: R,
    mut visit: impl FnMut(LossRow<'_>, &[&[u8]]) -> Result<(), DecodeError>,
) -> Result<u64, DecodeError> {
    let label = match &input.source {
        LossSource::Column(c) => c.clone(),
        LossSource::Compare { label, .. } => label.clone(),
    };
    // Only a label column can be blank here (see `each_row`).
    let file = input.file_label.clone();
    each_row(input, extra, src, |row, cells| match row.loss {
        Some(_) => visit(row, cells),
        None => {
            Err(DecodeError::cell(&file, row.line, &label, "missing value (this command needs every row labelled)"))
        }
    })
}

/// True when a label cell says "no label yet": absent, null or blank.
fn unlabelled(cell: Option<&[u8]>) -> bool {
    cell.is_none_or(|c| c.iter().all(u8::is_ascii_whitespace))
}

fn each_row<R: Read>(
    input: &Input,
    extra: &[&str],
    src: R,
    mut visit: impl FnMut(LossRow<'_>, &[&[u8]]) -> Result<(), DecodeError>,
) -> Result<u64, DecodeError> {
    let mut columns: Vec<&str> = match &input.source {
        LossSource::Column(c) => vec![c.as_str()],
        LossSource::Compare { prediction, label } => vec![prediction.as_str(), label.as_str()],
    };
    if let Some(g) = &input.group_by {
        columns.push(g.as_str());
    }
    let first_extra = columns.len();
    columns.extend_from_slice(extra);
    let file = input.file_label.as_str();
    let mut last_line = 1u64;
    for_each_row(src, input.format, file, &columns, |row| {
        let row = row?;
        last_line = row.line;
        let located = |i: usize, e: loss::CellError| DecodeError::cell(file, row.line, columns[i], e);
        // A blank label cell is a prediction whose label has not come; a blank precomputed loss
        // stays an error (it is more likely a bug upstream than a pending label).
        let compare = matches!(input.source, LossSource::Compare { .. });
        let (value, clipped) = match (&input.source, input.loss) {
            _ if compare && unlabelled(row.cell(1)) => {
                required(&row, file, &columns, 0)?;
                (None, false)
            }
            (LossSource::Column(_), LossSpec::Column { max }) => {
                let v = loss::parse_number(required(&row, file, &columns, 0)?).map_err(|e| located(0, e))?;
                (Some(loss::check_loss(v, max).map_err(|e| located(0, e))?), false)
            }
            (LossSource::Compare { .. }, LossSpec::ZeroOne) => {
                (Some(loss::zero_one(required(&row, file, &columns, 0)?, required(&row, file, &columns, 1)?)), false)
            }
            (LossSource::Compare { .. }, kind) => {
                let p = loss::parse_number(required(&row, file, &columns, 0)?).map_err(|e| located(0, e))?;
                let y = loss::parse_number(required(&row, file, &columns, 1)?).map_err(|e| located(1, e))?;
                let c = loss::regression(&kind, p, y);
                (Some(c.value), c.clipped)
            }
            (source, kind) => unreachable!("input pairs {source:?} with {kind:?}; validation forbids it"),
        };
        let key = match &input.group_by {
            None => None,
            Some(_) => Some(required(&row, file, &columns, first_extra - 1)?),
        };
        // A few extra columns at most: a small allocation per row only when asked for.
        let mut cells: Vec<&[u8]> = Vec::with_capacity(columns.len() - first_extra);
        for i in first_extra..columns.len() {
            cells.push(required(&row, file, &columns, i)?);
        }
        visit(LossRow { key, line: row.line, loss: value, clipped }, &cells)
    })?;
    Ok(last_line)
}

/// Groups in order of first appearance, found by key.
pub struct Groups<T> {
    pub items: Vec<(Option<String>, T)>,
    index: HashMap<Vec<u8>, usize>,
}

impl<T> Groups<T> {
    pub fn new() -> Self {
        Groups { items: Vec::new(), index: HashMap::new() }
    }

    /// The slot of `key`, created by `make` on first sight.
    pub fn slot(&mut self, key: Option<&[u8]>, make: impl FnOnce() -> T) -> usize {
        match key {
            None => {
                if self.items.is_empty() {
                    self.items.push((None, make()));
                }
                0
            }
            Some(key) => match self.index.get(key) {
                Some(&i) => i,
                None => {
                    let i = self.items.len();
                    self.index.insert(key.to_vec(), i);
                    self.items.push((Some(String::from_utf8_lossy(key).into_owned()), make()));
                    i
                }
            },
        }
    }
}

impl<T> Default for Groups<T> {
    fn default() -> Self {
        Self::new()
    }
}
