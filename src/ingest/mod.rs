//! Input side of the data path: finds batch files (CSV with a header row, or JSON Lines),
//! decodes them into rows of named cells with every problem located by file, line and column,
//! and types the rows as predictions or labels. The caller decides whether a bad row stops the
//! read (`riskbound bound`) or is counted and skipped (the daemon).

pub mod decode;
pub mod losses;
pub mod points;
pub mod reader;
pub mod records;
pub mod watch;

pub use decode::{for_each_row, DecodeError, DecodeErrorKind, Format, Row};
