//! `riskbound slices`: finds the worst slices of one file of labelled predictions and says,
//! with a stated confidence, which are certainly over the SLA — with certificates that survive
//! the search (estimate/slices.rs).
//!
//! The file is one window: i.i.d. rows, losses bounded by the declared maximum, labels not
//! selected by outcome. Any bad row (including a missing or non-numeric feature cell) stops the
//! command with a located error and no output.

use std::io::Read;

use serde_json::{json, Value};

use crate::cmd::bound::{for_each_loss_with, Input};
use crate::estimate::slices::{self, Slice, Table};
use crate::estimate::Confidence;
use crate::ingest::DecodeError;
use crate::loss;

/// Validated settings.
#[derive(Clone, Debug)]
pub struct Plan {
    pub input: Input,
    pub categorical: Vec<String>,
    pub numeric: Vec<String>,
    pub depth: usize,
    pub sla_max_risk: f64,
    pub confidence: Confidence,
    pub top: usize,
    pub seed: u64,
    pub sign_draws: usize,
}

/// Reads the window.
pub fn read<R: Read>(plan: &Plan, src: R) -> Result<Table, DecodeError> {
    let b = plan.input.loss.max();
    let extra: Vec<&str> = plan.categorical.iter().chain(&plan.numeric).map(String::as_str).collect();
    let mut t = Table {
        losses: Vec::new(),
        categorical: plan.categorical.iter().map(|c| (c.clone(), Vec::new())).collect(),
        numeric: plan.numeric.iter().map(|c| (c.clone(), Vec::new())).collect(),
    };
    let file = plan.input.file_label.clone();
    let nc = plan.categorical.len();
    let last = for_each_loss_with(&plan.input, &extra, src, |row, cells| {
        t.losses.push(row.loss / b);
        for (i, c) in cells.iter().enumerate() {
            if i < nc {
                t.categorical[i].1.push(String::from_utf8_lossy(c).into_owned());
            } else {
                let v = loss::parse_number(c).map_err(|e| DecodeError::cell(&file, row.line, extra[i], e))?;
                t.numeric[i - nc].1.push(v);
            }
        }
        Ok(())
    })?;
    if t.losses.is_empty() {
        return Err(DecodeError::row(&file, last + 1, "no data rows"));
    }
    Ok(t)
}

fn slice_json(s: &Slice) -> Value {
    let (value, low, high, parts) = match s {
        Slice::Category { value, .. } => (json!(value), Value::Null, Value::Null, Value::Null),
        Slice::Conjunction { parts } => {
            let p: Vec<Value> = parts.iter().map(|(f, v)| json!({"feature": f, "value": v})).collect();
            (Value::Null, Value::Null, Value::Null, Value::Array(p))
        }
        Slice::Threshold { low, high, .. } => (Value::Null, json!(low), json!(high), Value::Null),
        Slice::Interval { low, high, .. } => (Value::Null, json!(low), json!(high), Value::Null),
    };
    json!({"feature": s.feature(), "kind": s.kind(), "value": value, "low": low, "high": high, "parts": parts})
}

/// Seconds spent indexing the window (sorts and groupings) and on the uniform certificate's
/// sign draws, measured apart from the rest for the benchmark (bench/slices_bench.py).
pub fn time_scan(plan: &Plan, t: &Table) -> (f64, f64, f64) {
    let theta = plan.sla_max_risk / plan.input.loss.max();
    let started = std::time::Instant::now();
    let scan = slices::Scanner::new(t, None, plan.depth);
    let index = started.elapsed().as_secs_f64();
    let excess: Vec<f64> = t.losses.iter().map(|l| l - theta).collect();
    let started = std::time::Instant::now();
    let u = slices::uniform(
        &scan,
        &excess,
        theta,
        plan.sign_draws,
        plan.confidence.delta() / 2.0,
        &mut slices::Seeded::new(plan.seed),
    );
    (index, started.elapsed().as_secs_f64(), u.rademacher)
}

/// Runs the analysis and returns the JSON document; with `timings`, prints the scan's time
/// split to standard error first.
pub fn run<R: Read>(plan: &Plan, src: R, timings: bool) -> Result<Value, DecodeError> {
    let started = std::time::Instant::now();
    let t = read(plan, src)?;
    if timings {
        eprintln!("timing read {:.6}", started.elapsed().as_secs_f64());
        let (index, scan, r) = time_scan(plan, &t);
        eprintln!("timing index {index:.6}\ntiming scan {scan:.6}\nrademacher {r:.17}");
    }
    let b = plan.input.loss.max();
    let report = slices::analyze(
        &t,
        &slices::Plan {
            theta: plan.sla_max_risk / b,
            delta: plan.confidence.delta(),
            top: plan.top,
            seed: plan.seed,
            sign_draws: plan.sign_draws,
            depth: plan.depth,
        },
    );
    let list: Vec<Value> = report
        .slices
        .iter()
        .map(|s| {
            let mut v = slice_json(&s.slice);
            let o = v.as_object_mut().expect("an object");
            o.insert("description".into(), json!(s.slice.describe()));
            o.insert("n".into(), json!(s.n));
            o.insert("mean".into(), json!(s.mean * b));
            o.insert("lower".into(), json!(s.lower * b));
            o.insert("upper".into(), json!(s.upper * b));
            o.insert("certified_by".into(), json!(s.certified_by));
            o.insert("violates_sla".into(), json!(s.violates_sla));
            v
        })
        .collect();
    Ok(json!({
        "n": report.n,
        "sla_max_risk": plan.sla_max_risk,
        "confidence": plan.confidence.level(),
        "seed": plan.seed,
        "uniform": {
            "rademacher": report.uniform.rademacher * b,
            "sign_draws": report.uniform.sign_draws,
            "deviation": report.uniform.deviation * b,
            "delta": report.uniform_delta,
        },
        "split_confirm": {"delta": report.split_delta, "slices_confirmed": report.confirmed,
                          "delta_per_slice": report.split_delta / report.confirmed.max(1) as f64},
        "localized": {
            "fixed_point": report.localized.fixed_point,
            "deviation": report.localized.deviation * b,
            "diagnostic_only": true,
            "note": "constants of Bartlett, Bousquet & Mendelson (2005) Thm 4.1 as recalled, not confirmed; never used to certify",
        },
        "slices": list,
    }))
}
