//! `riskbound track`: replays one file of labelled predictions in file order, per group, and
//! prints the anytime-valid bounds and SLA alarms as they evolve.
//!
//! Every printed line is covered by one guarantee for the whole replay: with probability at
//! least C, the true risk lies above every printed lower bound of a sequence (and, separately,
//! below every upper bound), at every line at once; an SLA alarm under the null errs with
//! probability at most 1 − C over the whole replay. That is what makes it safe to look after
//! every batch. The order of the file is the order of the evidence: it must not depend on the
//! losses (arrival order is fine; a file sorted by loss is not).
//!
//! Output streams as the file is read. A bad row stops the replay with a located error (exit
//! 2); the lines printed before it are valid for the rows before it.

use std::io::{Read, Write};

use serde_json::{json, Map, Value};

use crate::cmd::bound::{for_each_loss, Groups, Input};
use crate::estimate::anytime::evidence::ChangeDetector;
use crate::estimate::anytime::sequence::HoeffdingBoundary;
use crate::estimate::anytime::{Sequence, Tracker, TrackerSpec};
use crate::estimate::Confidence;
use crate::ingest::DecodeError;

/// The change detector's horizon when none is given: P(false alarm in the first 10^5 rows) ≤ δ.
pub use crate::config::DEFAULT_CHANGE_HORIZON;

/// Validated settings for one replay.
#[derive(Clone, Debug)]
pub struct Plan {
    pub input: Input,
    pub confidence: Confidence,
    pub every: u64,
    pub sla_max_risk: Option<f64>,
    pub change_horizon: u64,
    pub hoeffding_boundary: HoeffdingBoundary,
    pub grid: u32,
}

#[derive(Debug, thiserror::Error)]
pub enum TrackError {
    /// The user's input: exit status 2.
    #[error("{0}")]
    Input(#[from] DecodeError),
    #[error("writing the output: {0}")]
    Output(#[from] std::io::Error),
}

impl Plan {
    fn spec(&self) -> TrackerSpec {
        let delta = self.confidence.delta();
        TrackerSpec {
            delta,
            loss_max: self.input.loss.max(),
            grid: self.grid,
            hoeffding_boundary: self.hoeffding_boundary,
            sla_max_risk: self.sla_max_risk,
            shift_max_risk: None,
            change: self.sla_max_risk.map(|t| (t, ChangeDetector::threshold_for(self.change_horizon, delta))),
        }
    }
}

/// One line of output: the JSON object of the format.
pub fn line(key: Option<&str>, t: &Tracker) -> Value {
    let mut bounds = Map::new();
    for s in Sequence::ALL {
        let b = t.bounds(s);
        let mut o = json!({"lower": b.lower, "upper": b.upper});
        if left_sequence(b, t.mean()) {
            o["note"] = json!(LEFT);
        }
        bounds.insert(s.name().to_string(), o);
    }
    let mut v = json!({"group": key, "n": t.n(), "mean": t.mean(), "bounds": Value::Object(bounds)});
    if t.labelled() < t.n() {
        v["unlabelled"] = json!(t.n() - t.labelled());
    }
    if let (Some(e), Some(c)) = (t.exceeded(), t.change()) {
        v["sla"] = json!({
            "exceeded_since_reset": e.alarm_at().is_some(),
            "change_detected": c.alarm_at().is_some(),
        });
    }
    v
}

fn write_table_row<W: Write>(out: &mut W, key: Option<&str>, t: &Tracker) -> std::io::Result<()> {
    let mut cells = vec![format!("{:<12}", key.unwrap_or("-")), format!("{:>9}", t.n()), format!("{:>9.6}", t.mean())];
    let mut crossed = Vec::new();
    for s in Sequence::ALL {
        let b = t.bounds(s);
        cells.push(format!("[{:.6}, {:.6}]", b.lower, b.upper));
        if left_sequence(b, t.mean()) {
            crossed.push(s.name());
        }
    }
    if let (Some(e), Some(c)) = (t.exceeded(), t.change()) {
        let flag = |a: Option<u64>| a.map_or("no".to_string(), |n| format!("yes@{n}"));
        cells.push(format!("{:>10}", flag(e.alarm_at())));
        cells.push(format!("{:>10}", flag(c.alarm_at())));
    }
    writeln!(out, "{}", cells.join("  "))?;
    if !crossed.is_empty() {
        writeln!(out, "{:<12} {}: {LEFT}", "", crossed.join(", "))?;
    }
    Ok(())
}

/// True when the running intersection no longer holds the mean: crossed (lower above
/// upper), or pinned while the mean moved on.
pub fn left_sequence(b: crate::estimate::Bounds, mean: f64) -> bool {
    b.lower > b.upper || mean < b.lower || mean > b.upper
}

/// What that means, in the table and in the JSON (`note`).
pub const LEFT: &str = "the mean left the sequence: the risk has not been constant since the start, so the sequence no longer describes it; bound windows of the file instead";

/// Replays `src` and writes one line per checkpoint to `out`.
pub fn run<R: Read, W: Write>(plan: &Plan, src: R, out: &mut W, as_json: bool) -> Result<(), TrackError> {
    let spec = plan.spec();
    let mut groups: Groups<Tracker> = Groups::new();
    let emit = |out: &mut W, key: Option<&str>, t: &Tracker| -> std::io::Result<()> {
        if as_json {
            serde_json::to_writer(&mut *out, &line(key, t))?;
            writeln!(out)
        } else {
            write_table_row(out, key, t)
        }
    };
    if !as_json {
        let mut head = vec![format!("{:<12}", "group"), format!("{:>9}", "n"), format!("{:>9}", "mean")];
        head.extend(Sequence::ALL.iter().map(|s| format!("{:<22}", s.name())));
        if plan.sla_max_risk.is_some() {
            head.push(format!("{:>10}", "exceeded"));
            head.push(format!("{:>10}", "changed"));
        }
        writeln!(out, "{}", head.join("  ").trim_end())?;
    }
    let mut write_error: Option<std::io::Error> = None;
    let last_line = for_each_loss(&plan.input, src, |row| {
        let i = groups.slot(row.key, || Tracker::new(spec.clone()));
        let (key, t) = &mut groups.items[i];
        match row.loss {
            Some(l) => t.push(l),
            None => t.push_unknown(),
        }
        if t.n() % plan.every == 0 && write_error.is_none() {
            write_error = emit(out, key.as_deref(), t).err();
        }
        Ok(())
    })?;
    if let Some(e) = write_error {
        return Err(e.into());
    }
    if groups.items.is_empty() {
        return Err(DecodeError::row(&plan.input.file_label, last_line + 1, "no data rows").into());
    }
    for (key, t) in &groups.items {
        if t.n() % plan.every != 0 {
            emit(out, key.as_deref(), t)?;
        }
    }
    if !as_json {
        writeln!(
            out,
            "confidence {}: every bound above holds at every line at once with probability ≥ {0} per side; \
             assumes the file order does not depend on the losses and losses bounded by {}; a row without a label \
             counts as 0 for lower bounds and alarms and as the maximum for upper bounds, so missing labels may depend \
             on the outcome",
            plan.confidence.level(),
            plan.input.loss.max()
        )?;
    }
    Ok(())
}

/// `riskbound track`: plan, replay, print a table or JSON lines as it goes.
pub fn main(a: &super::cli::TrackArgs) -> anyhow::Result<()> {
    let plan = a.plan()?;
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    a.input.with_reader(|src| Ok(run(&plan, src, &mut out, a.json)?))?;
    out.flush()?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::Bounds;

    #[test]
    fn crossed_or_pinned_intervals_have_left_the_mean() {
        assert!(left_sequence(Bounds { lower: 0.483, upper: 0.454 }, 0.47), "crossed");
        assert!(left_sequence(Bounds { lower: 0.13, upper: 0.13 }, 0.3), "pinned");
        assert!(!left_sequence(Bounds { lower: 0.1, upper: 0.2 }, 0.15));
    }
}
