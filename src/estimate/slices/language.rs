//! The slice language: what a slice is, whether a row is in it, and the text form registered
//! slices are written in (config and command line alike).

use super::*;

/// A slice of the window, as reported.
#[derive(Clone, Debug, PartialEq)]
pub enum Slice {
    Category {
        feature: String,
        value: String,
    },
    Conjunction {
        parts: Vec<(String, String)>,
    },
    /// {x ≤ high} when `low` is None, {x > low} when `high` is None.
    Threshold {
        feature: String,
        low: Option<f64>,
        high: Option<f64>,
    },
    /// {low < x ≤ high}.
    Interval {
        feature: String,
        low: f64,
        high: f64,
    },
}

impl Slice {
    pub fn kind(&self) -> &'static str {
        match self {
            Slice::Category { .. } => "category",
            Slice::Conjunction { .. } => "conjunction",
            Slice::Threshold { .. } => "threshold",
            Slice::Interval { .. } => "interval",
        }
    }

    /// The feature (for a conjunction, its features joined by `&`).
    pub fn feature(&self) -> String {
        match self {
            Slice::Category { feature, .. } | Slice::Threshold { feature, .. } | Slice::Interval { feature, .. } => {
                feature.clone()
            }
            Slice::Conjunction { parts } => parts.iter().map(|(f, _)| f.as_str()).collect::<Vec<_>>().join("&"),
        }
    }

    /// A short human description, e.g. `region=north-east`, `0.3 < weight_kg <= 0.4`.
    pub fn describe(&self) -> String {
        match self {
            Slice::Category { feature, value } => format!("{feature}={value}"),
            Slice::Conjunction { parts } => {
                parts.iter().map(|(f, v)| format!("{f}={v}")).collect::<Vec<_>>().join(" & ")
            }
            Slice::Threshold { feature, low: None, high: Some(h) } => format!("{feature} <= {h}"),
            Slice::Threshold { feature, low: Some(l), .. } => format!("{feature} > {l}"),
            Slice::Threshold { feature, .. } => format!("{feature} (all)"),
            Slice::Interval { feature, low, high } => format!("{low} < {feature} <= {high}"),
        }
    }
}

/// True when row `r` of `t` is in `s`.
pub fn contains(t: &Table, s: &Slice, r: usize) -> bool {
    let cat = |f: &str, v: &str| t.categorical.iter().find(|c| c.0 == f).is_some_and(|c| c.1[r] == v);
    let num = |f: &str| t.numeric.iter().find(|c| c.0 == f).map(|c| c.1[r]);
    match s {
        Slice::Category { feature, value } => cat(feature, value),
        Slice::Conjunction { parts } => parts.iter().all(|(f, v)| cat(f, v)),
        Slice::Threshold { feature, low, high } => {
            num(feature).is_some_and(|x| low.is_none_or(|l| x > l) && high.is_none_or(|h| x <= h))
        }
        Slice::Interval { feature, low, high } => num(feature).is_some_and(|x| x > *low && x <= *high),
    }
}

/// Why a registered slice's text was refused. The messages name no command-line flag: the
/// config's `slices.registered` uses the same language.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum SliceSyntaxError {
    #[error("{0:?} is not a number")]
    NotANumber(String),
    #[error("{0:?} is not one of the numeric features")]
    NotNumeric(String),
    #[error("{0:?} is not one of the categorical features")]
    NotCategorical(String),
    #[error("{0:?}: write F=V, F=V&G=W, F<=T, F>T or A<F<=B")]
    Shape(String),
}

/// Parses a registered slice: `F=V`, `F=V&G=W` (a conjunction), `F<=T`, `F>T`, or `A<F<=B`.
/// `categorical` and `numeric` are the feature names it may use.
pub fn parse_slice(text: &str, categorical: &[String], numeric: &[String]) -> Result<Slice, SliceSyntaxError> {
    let num = |s: &str| s.trim().parse::<f64>().map_err(|_| SliceSyntaxError::NotANumber(s.trim().to_string()));
    let numeric_feature = |f: &str| -> Result<String, SliceSyntaxError> {
        let f = f.trim();
        numeric.iter().find(|n| n.as_str() == f).cloned().ok_or_else(|| SliceSyntaxError::NotNumeric(f.to_string()))
    };
    if let Some((left, right)) = text.split_once("<=") {
        if let Some((low, feature)) = left.split_once('<') {
            return Ok(Slice::Interval { feature: numeric_feature(feature)?, low: num(low)?, high: num(right)? });
        }
        return Ok(Slice::Threshold { feature: numeric_feature(left)?, low: None, high: Some(num(right)?) });
    }
    if let Some((feature, t)) = text.split_once('>') {
        return Ok(Slice::Threshold { feature: numeric_feature(feature)?, low: Some(num(t)?), high: None });
    }
    let mut parts = Vec::new();
    for p in text.split('&') {
        let (f, v) = p.split_once('=').ok_or_else(|| SliceSyntaxError::Shape(p.to_string()))?;
        let f = f.trim();
        if !categorical.iter().any(|c| c == f) {
            return Err(SliceSyntaxError::NotCategorical(f.to_string()));
        }
        parts.push((f.to_string(), v.trim().to_string()));
    }
    Ok(match parts.len() {
        1 => {
            let (feature, value) = parts.pop().expect("one part");
            Slice::Category { feature, value }
        }
        _ => Slice::Conjunction { parts },
    })
}
