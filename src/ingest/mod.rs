//! Input side of the data path: turns a batch file (CSV with a header row, or JSON Lines) into
//! rows of named cells, with every problem located by file, line and column. Input: a byte
//! stream and the column names wanted. Output: for each row, the wanted cells in the order asked,
//! or a row-level error; the caller decides whether a bad row stops the read (`riskbound bound`)
//! or is counted and skipped.

pub mod decode;

pub use decode::{for_each_row, DecodeError, Format, Row};
