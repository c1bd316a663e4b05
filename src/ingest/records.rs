//! Typed records from batch files: a prediction or a label, with its request id and event time.
//! Bad rows become [`Reject`]s with a reason from a fixed set (the reasons are metric label
//! values, so the set is closed) and the rest of the file is kept.

use std::fmt;

use super::decode::{for_each_row, DecodeError, Format};

/// Whether a file holds predictions or labels. The names are the `kind` label values.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Kind {
    Prediction,
    Label,
}

impl Kind {
    /// The label value.
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Prediction => "prediction",
            Kind::Label => "label",
        }
    }
}

/// Why a row was not used. The names are the `reason` label of `riskbound_rows_rejected_total`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum RejectReason {
    /// A configured column is absent or empty in this row.
    MissingValue,
    /// The time is neither RFC 3339 nor Unix seconds.
    BadTimestamp,
    /// A number was expected (regression prediction or label, loss column) and not found.
    BadNumber,
    /// A loss column value outside [0, loss_max].
    OutOfRange,
    /// A ragged CSV row, invalid JSON, or a value of the wrong JSON type.
    MalformedRow,
    /// The row is longer than `max_row_bytes`.
    RowTooLong,
    /// A prediction id seen before.
    DuplicatePrediction,
    /// The same label again for an id that already has it.
    DuplicateLabel,
    /// A different label for an id that already has one.
    ConflictingLabel,
    /// A label whose prediction waited longer than `label_wait` (already dropped as unlabelled).
    LateLabel,
    /// A configured column is missing from the file's header: every row of the file.
    MissingColumn,
    /// An event time further ahead of the wall clock than `future_tolerance`: it would move
    /// event time (and so every window and expiry) into the future.
    FutureTimestamp,
}

impl RejectReason {
    /// Every reason, so that each counter series exists from the start.
    pub const ALL: [RejectReason; 12] = [
        RejectReason::MissingValue,
        RejectReason::BadTimestamp,
        RejectReason::BadNumber,
        RejectReason::OutOfRange,
        RejectReason::MalformedRow,
        RejectReason::RowTooLong,
        RejectReason::DuplicatePrediction,
        RejectReason::DuplicateLabel,
        RejectReason::ConflictingLabel,
        RejectReason::LateLabel,
        RejectReason::MissingColumn,
        RejectReason::FutureTimestamp,
    ];
    /// True when rows of a prediction file (`labels == false`) or of a label file can be
    /// rejected for this reason; only those series are exported.
    pub fn possible_for(self, labels: bool) -> bool {
        match self {
            RejectReason::DuplicatePrediction => !labels,
            RejectReason::DuplicateLabel
            | RejectReason::ConflictingLabel
            | RejectReason::LateLabel
            | RejectReason::OutOfRange => labels,
            _ => true,
        }
    }
    /// The label value.
    pub fn as_str(self) -> &'static str {
        match self {
            RejectReason::MissingValue => "missing_value",
            RejectReason::BadTimestamp => "bad_timestamp",
            RejectReason::BadNumber => "bad_number",
            RejectReason::OutOfRange => "out_of_range",
            RejectReason::MalformedRow => "malformed_row",
            RejectReason::RowTooLong => "row_too_long",
            RejectReason::DuplicatePrediction => "duplicate_prediction",
            RejectReason::DuplicateLabel => "duplicate_label",
            RejectReason::ConflictingLabel => "conflicting_label",
            RejectReason::LateLabel => "late_label",
            RejectReason::MissingColumn => "missing_column",
            RejectReason::FutureTimestamp => "future_timestamp",
        }
    }
    /// Parses a label value.
    pub fn parse(s: &str) -> Option<RejectReason> {
        RejectReason::ALL.into_iter().find(|r| r.as_str() == s)
    }
}

impl fmt::Display for RejectReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A rejected row: where, why, and the decoder's words.
#[derive(Clone, Debug, PartialEq)]
pub struct Reject {
    pub line: u64,
    pub reason: RejectReason,
    pub message: String,
}

/// One good row: request id, event time in ms since the Unix epoch, and the value cell
/// (prediction, label or loss) as written.
#[derive(Clone, Debug, PartialEq)]
pub struct Record {
    pub line: u64,
    pub id: String,
    pub time_ms: i64,
    pub value: String,
    /// The cells of the configured slice feature columns, in config order (predictions only).
    pub features: Vec<String>,
}

/// Parses an event time: RFC 3339 (`2026-12-01T10:00:00Z`, any offset) or Unix seconds
/// (integer or fractional).
pub fn parse_time_ms(s: &str) -> Option<i64> {
    let s = s.trim();
    if let Ok(v) = s.parse::<f64>() {
        // Years 1970..=9999 only: anything else is a unit mistake (ms written as seconds).
        return (v.is_finite() && (0.0..253_402_300_800.0).contains(&v)).then(|| (v * 1000.0).round() as i64);
    }
    let t = time::OffsetDateTime::parse(s, &time::format_description::well_known::Rfc3339).ok()?;
    let ms = t.unix_timestamp_nanos() / 1_000_000;
    i64::try_from(ms).ok()
}

/// Which columns of a file hold what.
pub struct Columns<'a> {
    pub id: &'a str,
    pub time: &'a str,
    pub value: &'a str,
    /// Slice feature columns to carry along (empty for label files and for models without
    /// slices); a row missing one is rejected like a row missing its value.
    pub features: &'a [String],
}

/// Decodes every row of one file, calling `on_record` for good rows and `on_reject` for bad
/// ones. A file-level problem (a configured column missing from the CSV header, an empty file)
/// is returned as an error: the file is then recorded with all of its rows unusable.
pub fn decode_records<R: std::io::Read>(
    src: R,
    format: Format,
    file_label: &str,
    columns: &Columns<'_>,
    max_row_bytes: u64,
    mut on_record: impl FnMut(Record),
    mut on_reject: impl FnMut(Reject),
) -> Result<u64, DecodeError> {
    let mut names = vec![columns.id, columns.time, columns.value];
    names.extend(columns.features.iter().map(String::as_str));
    for_each_row(src, format, file_label, &names, |row| {
        let row = match row {
            Ok(r) => r,
            Err(e) => {
                on_reject(Reject {
                    line: e.line.unwrap_or(0),
                    reason: RejectReason::MalformedRow,
                    message: e.to_string(),
                });
                return Ok(());
            }
        };
        let text = |i: usize| -> Result<String, Reject> {
            let cell = row.cell(i).unwrap_or_default();
            let s = std::str::from_utf8(cell).map_err(|_| Reject {
                line: row.line,
                reason: RejectReason::MalformedRow,
                message: format!("{file_label}:{}: column {}: not valid UTF-8", row.line, names[i]),
            })?;
            if s.trim().is_empty() {
                return Err(Reject {
                    line: row.line,
                    reason: RejectReason::MissingValue,
                    message: format!("{file_label}:{}: column {}: missing value", row.line, names[i]),
                });
            }
            Ok(s.to_string())
        };
        let total: usize = (0..row.len()).map(|i| row.cell(i).map_or(0, <[u8]>::len)).sum();
        if total as u64 > max_row_bytes {
            on_reject(Reject {
                line: row.line,
                reason: RejectReason::RowTooLong,
                message: format!("{file_label}:{}: row: longer than max_row_bytes ({max_row_bytes})", row.line),
            });
            return Ok(());
        }
        let result = (|| {
            let id = text(0)?;
            let t = text(1)?;
            let value = text(2)?;
            let time_ms = parse_time_ms(&t).ok_or_else(|| Reject {
                line: row.line,
                reason: RejectReason::BadTimestamp,
                message: format!(
                    "{file_label}:{}: column {}: {t:?} is neither RFC 3339 nor Unix seconds",
                    row.line, names[1]
                ),
            })?;
            let features = (3..names.len()).map(|i| text(i).map(|f| f.trim().to_string())).collect::<Result<_, _>>()?;
            Ok(Record { line: row.line, id: id.trim().to_string(), time_ms, value, features })
        })();
        match result {
            Ok(r) => on_record(r),
            Err(r) => on_reject(r),
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_in_both_forms() {
        assert_eq!(parse_time_ms("1700000000"), Some(1_700_000_000_000));
        assert_eq!(parse_time_ms("1700000000.25"), Some(1_700_000_000_250));
        // 2023-11-14T22:13:20Z is Unix time 1700000000 (date(1) -u -d @1700000000).
        assert_eq!(parse_time_ms("2023-11-14T22:13:20Z"), Some(1_700_000_000_000));
        assert_eq!(parse_time_ms("2023-11-14T23:13:20+01:00"), Some(1_700_000_000_000));
        assert_eq!(parse_time_ms("yesterday"), None);
        assert_eq!(parse_time_ms("-5"), None);
        assert_eq!(parse_time_ms("1700000000000000"), None, "ms written as seconds is out of range");
    }

    #[test]
    fn bad_rows_are_rejected_with_reasons_and_good_rows_kept() {
        let body = b"rid,ts,p\na,1700000000,x\nb,noon,y\nc,1700000001\n,1700000002,z\nd,1700000003,w\n";
        let mut good = Vec::new();
        let mut bad = Vec::new();
        let cols = Columns { id: "rid", time: "ts", value: "p", features: &[] };
        decode_records(&body[..], Format::Csv, "f.csv", &cols, 1 << 20, |r| good.push(r), |r| bad.push(r)).unwrap();
        assert_eq!(good.iter().map(|r| r.id.as_str()).collect::<Vec<_>>(), ["a", "d"]);
        let reasons: Vec<_> = bad.iter().map(|r| (r.line, r.reason)).collect();
        assert_eq!(
            reasons,
            [(3, RejectReason::BadTimestamp), (4, RejectReason::MalformedRow), (5, RejectReason::MissingValue)]
        );
        assert!(bad[0].message.starts_with("f.csv:3: column ts:"));
    }
}
