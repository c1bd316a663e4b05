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
pub use crate::estimate::slices::parse_slice;
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
    /// With a score column and 0/1 labels: also bound the error of a threshold re-tuned on the
    /// window, uniformly over all thresholds.
    pub score: Option<String>,
    /// Slices fixed before the data: bounded on the whole window at δ/M each (Bonferroni).
    pub registered: Vec<Slice>,
}

/// The score and 0/1 label of each row, when asked for.
#[derive(Default)]
struct Scored {
    scores: Vec<f64>,
    labels: Vec<bool>,
}

/// Reads the window.
fn read<R: Read>(plan: &Plan, src: R) -> Result<(Table, Scored), DecodeError> {
    let b = plan.input.loss.max();
    let mut extra: Vec<&str> = plan.categorical.iter().chain(&plan.numeric).map(String::as_str).collect();
    let label_column = match &plan.input.source {
        crate::cmd::bound::LossSource::Compare { label, .. } => Some(label.as_str()),
        crate::cmd::bound::LossSource::Column(_) => None,
    };
    if let (Some(score), Some(label)) = (&plan.score, label_column) {
        extra.push(score.as_str());
        extra.push(label);
    }
    let mut scored = Scored::default();
    let mut t = Table {
        losses: Vec::new(),
        categorical: plan.categorical.iter().map(|c| (c.clone(), Vec::new())).collect(),
        numeric: plan.numeric.iter().map(|c| (c.clone(), Vec::new())).collect(),
    };
    let file = plan.input.file_label.clone();
    let nc = plan.categorical.len();
    let last = for_each_loss_with(&plan.input, &extra, src, |row, cells| {
        t.losses.push(row.loss.unwrap_or(0.0) / b);
        let features = nc + plan.numeric.len();
        if cells.len() > features {
            let sv = loss::parse_number(cells[features])
                .map_err(|e| DecodeError::cell(&file, row.line, extra[features], e))?;
            let y = match cells[features + 1] {
                b"1" | b"true" => true,
                b"0" | b"false" => false,
                _ => {
                    return Err(DecodeError::cell(
                        &file,
                        row.line,
                        extra[features + 1],
                        "a threshold needs labels 0 or 1",
                    ))
                }
            };
            scored.scores.push(sv);
            scored.labels.push(y);
        }
        for (i, c) in cells.iter().take(features).enumerate() {
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
    Ok((t, scored))
}

/// The registered slices' bounds (estimate/slices.rs: δ/M each), as JSON.
fn registered(plan: &Plan, t: &Table) -> Value {
    let b = plan.input.loss.max();
    let delta = plan.confidence.delta() / plan.registered.len().max(1) as f64;
    let list = plan
        .registered
        .iter()
        .zip(slices::registered(t, &plan.registered, plan.confidence.delta()))
        .map(|(s, r)| {
            let mut v = slice_json(s);
            let o = v.as_object_mut().expect("an object");
            o.insert("description".into(), json!(s.describe()));
            o.insert("n".into(), json!(r.n));
            o.insert("mean".into(), json!(r.mean * b));
            o.insert("lower".into(), json!(r.bounds.lower * b));
            o.insert("upper".into(), json!(r.bounds.upper * b));
            o.insert("delta".into(), json!(delta));
            o.insert("method".into(), json!(r.method));
            o.insert("violates_sla".into(), json!(r.bounds.lower * b > plan.sla_max_risk));
            v
        })
        .collect();
    Value::Array(list)
}

fn recalibrated(plan: &Plan, scored: &Scored) -> Value {
    if plan.score.is_none() || scored.scores.is_empty() {
        return Value::Null;
    }
    // Its own share of δ would be spent beside the slice certificates; it is a separate
    // question about a different class, reported at the full confidence.
    let mut rng = slices::Seeded::new(plan.seed ^ 0x5eed);
    let r = slices::recalibrated(&scored.scores, &scored.labels, plan.sign_draws, plan.confidence.delta(), &mut rng);
    json!({
        "score": plan.score,
        "best_threshold": r.threshold,
        "rule": "predict 1 when score > best_threshold (null: always 1)",
        "empirical_risk": r.empirical_risk,
        "rademacher": r.rademacher,
        "sign_draws": r.sign_draws,
        "deviation": r.deviation,
        "upper": r.upper,
        "confidence": plan.confidence.level(),
    })
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
    let (t, scored) = read(plan, src)?;
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
            "deviation": report.deviation * b,
            "delta": report.uniform_delta,
            "mcdiarmid_deviation": report.uniform.deviation * b,
            "variance_sensitive_deviation": report.variance_deviation * b,
            "form": if report.variance_deviation < report.uniform.deviation { "variance-sensitive" } else { "mcdiarmid" },
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
        "recalibrated_threshold": recalibrated(plan, &scored),
        "registered": registered(plan, &t),
    }))
}

/// The document as a table for people: the certificates' figures, then one line per slice,
/// the registered slices and the re-tuned threshold.
pub fn write_table<W: std::io::Write>(doc: &Value, out: &mut W) -> std::io::Result<()> {
    let f = |v: &Value| v.as_f64().map_or("-".to_string(), |x| format!("{x:.4}"));
    let u = &doc["uniform"];
    writeln!(
        out,
        "{} rows; sla_max_risk {}; confidence {}; seed {}",
        doc["n"], doc["sla_max_risk"], doc["confidence"], doc["seed"]
    )?;
    writeln!(
        out,
        "uniform certificate: deviation {} ({} form; Rademacher {} over {} sign draws); split-confirm: {} slices confirmed",
        f(&u["deviation"]),
        u["form"].as_str().unwrap_or(""),
        f(&u["rademacher"]),
        u["sign_draws"],
        doc["split_confirm"]["slices_confirmed"]
    )?;
    writeln!(out)?;
    writeln!(
        out,
        "{:<4} {:<36} {:>8} {:>8} {:>8} {:>8}  {:<14} violates",
        "rank", "slice", "n", "mean", "lower", "upper", "certified by"
    )?;
    let rows = doc["slices"].as_array().map_or(&[][..], Vec::as_slice);
    if rows.is_empty() {
        writeln!(out, "(no slice with risk above the SLA in the discovery half)")?;
    }
    // One line per slice; `by` is the key naming its certificate (found) or method (registered).
    let line = |out: &mut W, rank: String, s: &Value, by: &str| {
        writeln!(
            out,
            "{:<4} {:<36} {:>8} {:>8} {:>8} {:>8}  {:<14} {}",
            rank,
            s["description"].as_str().unwrap_or(""),
            s["n"],
            f(&s["mean"]),
            f(&s["lower"]),
            f(&s["upper"]),
            s[by].as_str().unwrap_or(""),
            if s["violates_sla"].as_bool() == Some(true) { "yes" } else { "no" }
        )
    };
    for (i, s) in rows.iter().enumerate() {
        line(out, (i + 1).to_string(), s, "certified_by")?;
    }
    if let Some(reg) = doc["registered"].as_array().filter(|r| !r.is_empty()) {
        writeln!(out, "\nregistered slices (fixed in advance, δ/M each):")?;
        for s in reg {
            line(out, String::new(), s, "method")?;
        }
    }
    let r = &doc["recalibrated_threshold"];
    if r.is_object() {
        writeln!(
            out,
            "\nre-tuned threshold on {}: best {} (error {}), upper bound {} for every threshold at once",
            r["score"].as_str().unwrap_or(""),
            r["best_threshold"],
            f(&r["empirical_risk"]),
            f(&r["upper"])
        )?;
    }
    writeln!(out, "\nThe localized figure is a diagnostic only (its constants are recalled, not confirmed); --json prints everything.")
}

/// `riskbound slices`: plan, scan, print a table or one JSON document.
pub fn main(a: &super::cli::SlicesArgs) -> anyhow::Result<()> {
    use anyhow::Context;
    use std::io::Write;
    let plan = a.plan()?;
    let doc = a.input.with_reader(|src| Ok(run(&plan, src, a.timings).map_err(super::bound::BoundError::from)?))?;
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    if a.json {
        serde_json::to_writer(&mut out, &doc).context("writing JSON")?;
        writeln!(out)?;
    } else {
        write_table(&doc, &mut out)?;
    }
    out.flush()?;
    Ok(())
}
