//! `riskbound bound`: bounds on the true risk of one file of labelled predictions, per group.
//!
//! Reads the file once, streaming; each group keeps O(1) statistics, plus its losses only when
//! the betting method is asked for (betting depends on the order of the losses). Any bad row
//! stops the command with a located error and no partial output: a bound computed from a file
//! with silently skipped rows would certify data the user did not give.

use std::collections::HashMap;
use std::io::{Read, Write};
use std::time::{Duration, Instant};

use crate::estimate::{self, Bounds, Confidence, LossSummary, Method};
use crate::ingest::{for_each_row, DecodeError, Format, Row};
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

/// Validated settings for one run.
#[derive(Clone, Debug)]
pub struct Plan {
    pub input: Input,
    pub confidence: Confidence,
    /// Methods asked for explicitly; empty means every method that applies.
    pub methods: Vec<Method>,
}

/// The bounds of one group.
#[derive(Clone, Debug)]
pub struct GroupReport {
    /// The group's key, or `None` without `--group-by`.
    pub key: Option<String>,
    pub n: u64,
    pub mean: f64,
    /// Losses that were clipped at the declared maximum (regression losses only).
    pub clipped: u64,
    pub bounds: Vec<(Method, Bounds)>,
    /// Rows without a label, and the group's delay-robust bounds (every row, a missing label
    /// counted at 0 below and at the loss maximum above); empty when every row is labelled.
    pub unlabelled: u64,
    pub delay_robust: Vec<(Method, Bounds)>,
}

/// The whole result, groups in order of first appearance.
#[derive(Clone, Debug)]
pub struct Report {
    pub confidence: Confidence,
    pub loss: LossSpec,
    pub groups: Vec<GroupReport>,
    /// Time spent reading and decoding, and computing each method (summed over groups).
    pub timings: Vec<(String, Duration)>,
}

/// Why the command failed. All of these are the user's input, so `main` exits with status 2.
#[derive(Debug, thiserror::Error)]
pub enum BoundError {
    #[error("{0}")]
    Input(#[from] DecodeError),
    #[error("{file}: group {group}: {source}")]
    Method { file: String, group: String, source: estimate::EstimateError },
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

struct Group {
    summary: LossSummary,
    clipped: u64,
    /// Every row in file order, each its own group: the file order fixes every row's place,
    /// whether or not it has a label.
    cohort: estimate::delay_robust::Cohort,
}

/// Runs the plan over `src`.
pub fn run<R: Read>(plan: &Plan, src: R) -> Result<Report, BoundError> {
    let keep_losses = plan.methods.is_empty() || plan.methods.iter().any(|m| m.needs_losses());
    let loss_max = plan.input.loss.max();
    let new_summary = || if keep_losses { LossSummary::keeping_losses(loss_max) } else { LossSummary::new(loss_max) };
    let file = plan.input.file_label.as_str();
    let mut groups: Groups<Group> = Groups::new();
    let started = Instant::now();
    let last_line = for_each_loss(&plan.input, src, |row| {
        let i = groups.slot(row.key, || Group {
            summary: new_summary(),
            clipped: 0,
            cohort: estimate::delay_robust::Cohort::default(),
        });
        let g = &mut groups.items[i].1;
        match row.loss {
            Some(l) => {
                g.summary.push(l);
                g.cohort.push_group([l], 0);
            }
            None => g.cohort.push_group([], 1),
        }
        g.clipped += u64::from(row.clipped);
        Ok(())
    })?;
    let mut timings = vec![("read".to_string(), started.elapsed())];

    if groups.items.is_empty() {
        return Err(DecodeError::row(file, last_line + 1, "no data rows").into());
    }

    let mut per_method: HashMap<Method, Duration> = HashMap::new();
    let mut reports = Vec::with_capacity(groups.items.len());
    for (key, g) in groups.items {
        let methods: Vec<Method> = if plan.methods.is_empty() {
            Method::ALL.into_iter().filter(|m| m.applies(&g.summary)).collect()
        } else {
            plan.methods.clone()
        };
        let unlabelled = g.cohort.unknown();
        let mut delay_robust = Vec::new();
        if unlabelled > 0 {
            for &m in &methods {
                let b = estimate::delay_robust::bounds(m, &g.cohort, loss_max, plan.confidence).map_err(|source| {
                    BoundError::Method {
                        file: file.to_string(),
                        group: key.clone().unwrap_or_else(|| "(all rows)".to_string()),
                        source,
                    }
                })?;
                delay_robust.push((m, b));
            }
        }
        let mut bounds = Vec::with_capacity(methods.len());
        for m in methods.into_iter().filter(|_| g.summary.n() > 0) {
            let t = Instant::now();
            let b = estimate::bounds(m, &g.summary, plan.confidence).map_err(|source| BoundError::Method {
                file: file.to_string(),
                group: key.clone().unwrap_or_else(|| "(all rows)".to_string()),
                source,
            })?;
            *per_method.entry(m).or_default() += t.elapsed();
            bounds.push((m, b));
        }
        reports.push(GroupReport {
            key,
            n: g.summary.n(),
            mean: g.summary.mean(),
            clipped: g.clipped,
            bounds,
            unlabelled,
            delay_robust,
        });
    }
    let mut methods: Vec<_> = per_method.into_iter().collect();
    methods.sort();
    timings.extend(methods.into_iter().map(|(m, d)| (m.name().to_string(), d)));
    Ok(Report { confidence: plan.confidence, loss: plan.input.loss, groups: reports, timings })
}

/// The JSON document: `{"confidence": C, "groups": [{"group", "n", "mean", "bounds"}]}`.
pub fn to_json(report: &Report) -> serde_json::Value {
    use serde_json::{json, Map, Value};
    let groups: Vec<Value> = report
        .groups
        .iter()
        .map(|g| {
            let as_map = |bs: &[(Method, Bounds)]| {
                let mut m = Map::new();
                for (method, b) in bs {
                    m.insert(method.name().to_string(), json!({"lower": b.lower, "upper": b.upper}));
                }
                Value::Object(m)
            };
            let mut v = json!({"group": g.key, "n": g.n, "mean": g.mean, "bounds": as_map(&g.bounds)});
            if g.unlabelled > 0 {
                v["unlabelled"] = json!(g.unlabelled);
                v["delay_robust"] = as_map(&g.delay_robust);
            }
            v
        })
        .collect();
    json!({"confidence": report.confidence.level(), "groups": groups})
}

/// An aligned table for people, with the assumptions the numbers rest on.
pub fn write_table<W: Write>(report: &Report, out: &mut W) -> std::io::Result<()> {
    let c = report.confidence;
    writeln!(
        out,
        "loss: {}   confidence: {} (each bound one-sided, error probability {:.3e})",
        report.loss,
        c.level(),
        c.delta()
    )?;
    let grouped = report.groups.iter().any(|g| g.key.is_some());
    let mut rows: Vec<[String; 6]> = vec![["group", "n", "mean", "method", "lower", "upper"].map(String::from)];
    for g in &report.groups {
        for (i, (m, b)) in g.bounds.iter().enumerate() {
            let first = i == 0;
            rows.push([
                if first { g.key.clone().unwrap_or_default() } else { String::new() },
                if first { g.n.to_string() } else { String::new() },
                if first { format!("{:.6}", g.mean) } else { String::new() },
                m.name().to_string(),
                format!("{:.6}", b.lower),
                format!("{:.6}", b.upper),
            ]);
        }
    }
    let skip = usize::from(!grouped);
    let mut widths = [0usize; 6];
    for r in &rows {
        for (w, cell) in widths.iter_mut().zip(r) {
            *w = (*w).max(cell.chars().count());
        }
    }
    for r in &rows {
        let mut line = String::new();
        for (i, cell) in r.iter().enumerate().skip(skip) {
            if i > skip {
                line.push_str("  ");
            }
            if i <= 3 && i != 1 {
                line.push_str(&format!("{:<w$}", cell, w = widths[i]));
            } else {
                line.push_str(&format!("{:>w$}", cell, w = widths[i]));
            }
        }
        writeln!(out, "{}", line.trim_end())?;
    }
    for g in report.groups.iter().filter(|g| g.clipped > 0) {
        writeln!(
            out,
            "note: {} loss(es){} were above the maximum {} and count as {} (the bound is on the clipped loss)",
            g.clipped,
            g.key.as_ref().map(|k| format!(" in group {k}")).unwrap_or_default(),
            report.loss.max(),
            report.loss.max()
        )?;
    }
    for g in report.groups.iter().filter(|g| g.unlabelled > 0) {
        writeln!(
            out,
            "delay-robust{}: {} rows, {} without a label (counted as 0 for the lower bound and {} for the upper):",
            g.key.as_ref().map(|k| format!(" (group {k})")).unwrap_or_default(),
            g.n + g.unlabelled,
            g.unlabelled,
            report.loss.max()
        )?;
        for (m, b) in &g.delay_robust {
            writeln!(out, "  {:<20}  {:.6}  {:.6}", m.name(), b.lower, b.upper)?;
        }
    }
    if report.groups.iter().any(|g| g.unlabelled > 0) {
        writeln!(
            out,
            "assumes: rows are i.i.d. within each group and losses bounded by {}; the bounds above the delay-robust \
             lines also assume the missing labels are not missing because of the outcome, the delay-robust ones do not",
            report.loss.max()
        )?;
    } else {
        writeln!(
            out,
            "assumes: losses are i.i.d. within each group, bounded by {}, and labels were not chosen by outcome",
            report.loss.max()
        )?;
    }
    Ok(())
}
