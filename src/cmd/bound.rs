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
pub use crate::ingest::losses::{for_each_loss, for_each_loss_with, Groups, Input, LossRow, LossSource};
use crate::ingest::DecodeError;
use crate::loss::LossSpec;

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
            cohort: estimate::delay_robust::Cohort::new(loss_max),
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

/// `riskbound bound`: plan, run, print a table or one JSON document.
pub fn main(a: &super::cli::BoundArgs) -> anyhow::Result<()> {
    use anyhow::Context;
    let plan = a.plan()?;
    let report = a.input.with_reader(|src| Ok(run(&plan, src)?))?;
    if a.timings {
        for (phase, d) in &report.timings {
            eprintln!("timing {phase} {:.6}", d.as_secs_f64());
        }
    }
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    if a.json {
        serde_json::to_writer(&mut out, &to_json(&report)).context("writing JSON")?;
        writeln!(out)?;
    } else {
        write_table(&report, &mut out)?;
    }
    out.flush()?;
    Ok(())
}
