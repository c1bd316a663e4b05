//! Losses from data: how one labelled prediction becomes a number in [0, B].
//!
//! Bounds certify the mean of exactly the loss computed here, so clipping is part of the
//! definition: `absolute` and `squared` errors larger than the declared maximum count as the
//! maximum (the bound is then on the clipped risk, which is never above the unclipped one).

use std::fmt;

/// How a loss is obtained from a row.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum LossSpec {
    /// `prediction ≠ label`, compared as strings: 1 for a miss, 0 for a hit.
    ZeroOne,
    /// |prediction − label|, clipped at `max`.
    Absolute { max: f64 },
    /// (prediction − label)², clipped at `max`.
    Squared { max: f64 },
    /// A precomputed loss column whose values must lie in [0, `max`].
    Column { max: f64 },
}

impl LossSpec {
    /// The loss maximum B.
    pub fn max(&self) -> f64 {
        match *self {
            LossSpec::ZeroOne => 1.0,
            LossSpec::Absolute { max } | LossSpec::Squared { max } | LossSpec::Column { max } => max,
        }
    }
    /// The name users write for the loss.
    pub fn name(&self) -> &'static str {
        match self {
            LossSpec::ZeroOne => "zero-one",
            LossSpec::Absolute { .. } => "absolute",
            LossSpec::Squared { .. } => "squared",
            LossSpec::Column { .. } => "column",
        }
    }
    /// True when the loss takes only the values 0 and B.
    pub fn is_binary(&self) -> bool {
        matches!(self, LossSpec::ZeroOne)
    }
}

/// Why a cell could not be turned into a loss.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CellError {
    #[error("not valid UTF-8")]
    NotUtf8,
    #[error("empty value")]
    Empty,
    #[error("{0:?} is not a number")]
    NotNumber(String),
    #[error("{0} is not a finite number")]
    NotFinite(String),
    #[error("loss {value} is below 0")]
    Negative { value: f64 },
    #[error("loss {value} is above the declared maximum {max}")]
    AboveMax { value: f64, max: f64 },
}

/// Parses a finite number; surrounding ASCII spaces are allowed, NaN and ±inf are not.
pub fn parse_number(raw: &[u8]) -> Result<f64, CellError> {
    let s = std::str::from_utf8(raw).map_err(|_| CellError::NotUtf8)?.trim();
    if s.is_empty() {
        return Err(CellError::Empty);
    }
    let v: f64 = s.parse().map_err(|_| CellError::NotNumber(s.to_string()))?;
    if v.is_finite() {
        Ok(v)
    } else {
        Err(CellError::NotFinite(s.to_string()))
    }
}

/// Validates a precomputed loss against [0, max].
pub fn check_loss(value: f64, max: f64) -> Result<f64, CellError> {
    if value < 0.0 {
        Err(CellError::Negative { value })
    } else if value > max {
        Err(CellError::AboveMax { value, max })
    } else {
        Ok(value)
    }
}

/// The result of one regression loss: its value and whether it was clipped.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Clipped {
    pub value: f64,
    pub clipped: bool,
}

/// A regression loss from numeric prediction and label, clipped at `max`.
pub fn regression(kind: &LossSpec, prediction: f64, label: f64) -> Clipped {
    let d = prediction - label;
    let (raw, max) = match *kind {
        LossSpec::Absolute { max } => (d.abs(), max),
        LossSpec::Squared { max } => (d * d, max),
        _ => unreachable!("regression() called with a non-regression loss"),
    };
    if raw > max || !raw.is_finite() {
        Clipped { value: max, clipped: true }
    } else {
        Clipped { value: raw, clipped: false }
    }
}

/// The 0-1 loss of a prediction against a label, compared as byte strings.
pub fn zero_one(prediction: &[u8], label: &[u8]) -> f64 {
    if prediction == label {
        0.0
    } else {
        1.0
    }
}

impl fmt::Display for LossSpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            LossSpec::ZeroOne => f.write_str("zero-one"),
            other => write!(f, "{} (max {})", other.name(), other.max()),
        }
    }
}
