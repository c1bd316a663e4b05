//! Streaming row decoder for CSV and JSON Lines, by column name.
//!
//! Both formats are read once, row by row, with O(row) memory. CSV uses the header row to map
//! names to positions; JSON Lines reads each line on its own (so one malformed line is one bad
//! row, not the end of the file — serde_json's stream deserializer stops at the first error).
//! Cells are handed out as bytes: labels are compared as byte strings and numbers are parsed
//! by the caller, which also owns the policy for missing values.

use std::fmt;
use std::io::{BufRead, BufReader, Read};
use std::path::Path;

/// The two batch-file formats.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    Csv,
    Jsonl,
}

impl Format {
    /// The format implied by a file name's extension (.csv, .jsonl, .ndjson).
    pub fn from_path(path: &Path) -> Option<Format> {
        match path.extension()?.to_str()?.to_ascii_lowercase().as_str() {
            "csv" => Some(Format::Csv),
            "jsonl" | "ndjson" => Some(Format::Jsonl),
            _ => None,
        }
    }
    /// Parses `csv` or `jsonl`.
    pub fn parse(s: &str) -> Option<Format> {
        match s {
            "csv" => Some(Format::Csv),
            "jsonl" | "ndjson" => Some(Format::Jsonl),
            _ => None,
        }
    }
}

/// A located problem with the input: `FILE:LINE: column NAME: reason` for a cell,
/// `FILE:LINE: row: reason` for a whole row, `FILE: reason` when no line applies.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DecodeError {
    pub file: String,
    pub line: Option<u64>,
    pub column: Option<String>,
    pub reason: String,
    pub kind: DecodeErrorKind,
}

/// What kind of problem a [`DecodeError`] is, for callers that count them.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DecodeErrorKind {
    /// One row or cell is bad; the rest of the file can be read.
    Row,
    /// A wanted column is not in the CSV header: no row of the file is usable.
    MissingColumn,
    /// No header row at all.
    Empty,
    /// Reading failed.
    Io,
}

impl DecodeError {
    /// An error about one cell.
    pub fn cell(file: &str, line: u64, column: &str, reason: impl fmt::Display) -> Self {
        DecodeError {
            file: file.to_string(),
            line: Some(line),
            column: Some(column.to_string()),
            reason: reason.to_string(),
            kind: DecodeErrorKind::Row,
        }
    }
    /// An error about a whole row.
    pub fn row(file: &str, line: u64, reason: impl fmt::Display) -> Self {
        DecodeError {
            file: file.to_string(),
            line: Some(line),
            column: None,
            reason: reason.to_string(),
            kind: DecodeErrorKind::Row,
        }
    }
    fn file(file: &str, reason: impl fmt::Display) -> Self {
        DecodeError {
            file: file.to_string(),
            line: None,
            column: None,
            reason: reason.to_string(),
            kind: DecodeErrorKind::Io,
        }
    }
    fn with_kind(mut self, kind: DecodeErrorKind) -> Self {
        self.kind = kind;
        self
    }
}

impl fmt::Display for DecodeError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match (self.line, &self.column) {
            (Some(l), Some(c)) => write!(f, "{}:{}: column {}: {}", self.file, l, c, self.reason),
            (Some(l), None) => write!(f, "{}:{}: row: {}", self.file, l, self.reason),
            (None, _) => write!(f, "{}: {}", self.file, self.reason),
        }
    }
}

impl std::error::Error for DecodeError {}

/// One decoded row: its 1-based line number and the wanted cells, in the order asked for.
pub struct Row<'a> {
    pub line: u64,
    cells: Cells<'a>,
}

// Borrowed views, so that decoding a CSV row allocates nothing.
enum Cells<'a> {
    Csv { record: &'a csv::ByteRecord, positions: &'a [usize] },
    Json(&'a [Option<Vec<u8>>]),
}

impl<'a> Row<'a> {
    /// The i-th wanted cell; `None` when the JSON key is absent or null.
    pub fn cell(&self, i: usize) -> Option<&'a [u8]> {
        match self.cells {
            Cells::Csv { record, positions } => record.get(positions[i]),
            Cells::Json(cells) => cells[i].as_deref(),
        }
    }
    /// The number of wanted cells.
    pub fn len(&self) -> usize {
        match self.cells {
            Cells::Csv { positions, .. } => positions.len(),
            Cells::Json(cells) => cells.len(),
        }
    }
    /// True when no cells were asked for.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// Reads every row of `src`, calling `visit` with each decoded row or row-level error.
///
/// Returns the number of rows seen (good and bad). Stops early when `visit` returns an error,
/// and returns that error. File-level problems (an I/O error, no header row, a wanted column
/// missing from the CSV header) end the read with an error of their own.
pub fn for_each_row<R: Read, F>(
    src: R,
    format: Format,
    file: &str,
    columns: &[&str],
    visit: F,
) -> Result<u64, DecodeError>
where
    F: FnMut(Result<Row<'_>, DecodeError>) -> Result<(), DecodeError>,
{
    match format {
        Format::Csv => csv_rows(src, file, columns, visit),
        Format::Jsonl => jsonl_rows(src, file, columns, visit),
    }
}

fn csv_rows<R: Read, F>(src: R, file: &str, columns: &[&str], mut visit: F) -> Result<u64, DecodeError>
where
    F: FnMut(Result<Row<'_>, DecodeError>) -> Result<(), DecodeError>,
{
    let mut rdr = csv::ReaderBuilder::new().has_headers(false).flexible(true).from_reader(src);
    let mut record = csv::ByteRecord::new();
    let has_header = rdr.read_byte_record(&mut record).map_err(|e| csv_error(file, e))?;
    if !has_header {
        return Err(DecodeError::row(file, 1, "empty input: no header row").with_kind(DecodeErrorKind::Empty));
    }
    let header: Vec<String> = record
        .iter()
        .enumerate()
        .map(|(i, h)| {
            let s = String::from_utf8_lossy(h);
            // A UTF-8 byte-order mark written by spreadsheet exports is not part of the name.
            let s = if i == 0 { s.trim_start_matches('\u{feff}') } else { &s };
            s.trim().to_string()
        })
        .collect();
    let mut positions = Vec::with_capacity(columns.len());
    for &c in columns {
        match header.iter().position(|h| h == c) {
            Some(p) => positions.push(p),
            None => {
                return Err(DecodeError::cell(
                    file,
                    1,
                    c,
                    format!("not in the header (columns: {})", header.join(", ")),
                )
                .with_kind(DecodeErrorKind::MissingColumn));
            }
        }
    }
    let width = header.len();
    let mut rows = 0u64;
    loop {
        match rdr.read_byte_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {
                rows += 1;
                let line = record.position().map_or(0, |p| p.line());
                if record.len() != width {
                    // A truncated last line from a crashed writer lands here too.
                    if record.len() == 1 && record.get(0).is_some_and(|f| f.is_empty()) {
                        rows -= 1; // a blank line is not a row
                        continue;
                    }
                    visit(Err(DecodeError::row(
                        file,
                        line,
                        format!("has {} fields, the header has {}", record.len(), width),
                    )))?;
                    continue;
                }
                visit(Ok(Row { line, cells: Cells::Csv { record: &record, positions: &positions } }))?;
            }
            Err(e) => {
                rows += 1;
                let line = e.position().map_or(0, |p| p.line());
                if e.is_io_error() {
                    return Err(csv_error(file, e));
                }
                visit(Err(DecodeError::row(file, line, e)))?;
            }
        }
    }
    Ok(rows)
}

fn csv_error(file: &str, e: csv::Error) -> DecodeError {
    match e.position() {
        Some(p) => DecodeError::row(file, p.line(), e),
        None => DecodeError::file(file, e),
    }
}

fn jsonl_rows<R: Read, F>(src: R, file: &str, columns: &[&str], mut visit: F) -> Result<u64, DecodeError>
where
    F: FnMut(Result<Row<'_>, DecodeError>) -> Result<(), DecodeError>,
{
    let mut reader = BufReader::with_capacity(1 << 16, src);
    let mut buf = Vec::new();
    let mut owned: Vec<Option<Vec<u8>>> = vec![None; columns.len()];
    let mut line = 0u64;
    let mut rows = 0u64;
    loop {
        buf.clear();
        let read =
            reader.read_until(b'\n', &mut buf).map_err(|e| DecodeError::file(file, format!("read error: {e}")))?;
        if read == 0 {
            break;
        }
        line += 1;
        let mut text: &[u8] = &buf;
        if line == 1 && text.starts_with(b"\xEF\xBB\xBF") {
            text = &text[3..];
        }
        if text.iter().all(|b| b.is_ascii_whitespace()) {
            continue;
        }
        rows += 1;
        let obj: serde_json::Map<String, serde_json::Value> = match serde_json::from_slice(text) {
            Ok(serde_json::Value::Object(m)) => m,
            Ok(other) => {
                visit(Err(DecodeError::row(file, line, format!("expected a JSON object, got {}", json_kind(&other)))))?;
                continue;
            }
            Err(e) => {
                visit(Err(DecodeError::row(file, line, format!("invalid JSON: {e}"))))?;
                continue;
            }
        };
        let mut bad = None;
        for (slot, &c) in owned.iter_mut().zip(columns) {
            *slot = match obj.get(c) {
                None | Some(serde_json::Value::Null) => None,
                Some(serde_json::Value::String(s)) => Some(s.as_bytes().to_vec()),
                Some(serde_json::Value::Number(n)) => Some(n.to_string().into_bytes()),
                Some(serde_json::Value::Bool(b)) => Some(b.to_string().into_bytes()),
                Some(other) => {
                    bad = Some(DecodeError::cell(
                        file,
                        line,
                        c,
                        format!("expected a string or number, got {}", json_kind(other)),
                    ));
                    None
                }
            };
        }
        if let Some(e) = bad {
            visit(Err(e))?;
            continue;
        }
        visit(Ok(Row { line, cells: Cells::Json(&owned) }))?;
    }
    Ok(rows)
}

fn json_kind(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

#[cfg(test)]
mod tests;
