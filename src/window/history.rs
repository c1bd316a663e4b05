//! The evaluation history: what a model's snapshot said at each point of its event clock, as
//! the status page charts it and the report files it. Points are made from a [`ModelSnapshot`]
//! (so the page, /metrics and the history never compute a number twice) and stored as JSON
//! with round-trip floats, so a replay that writes the same snapshot writes the same text.

use serde::{Deserialize, Serialize};

use super::ModelSnapshot;
use crate::config::DecideOn;
use crate::estimate::sla::SlaState;

/// How many of a window's worst slices a point keeps (violating ones are always kept).
pub const SLICES_KEPT: usize = 3;

/// One bound, by method name.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct BoundPoint {
    pub method: String,
    pub lower: f64,
    pub upper: f64,
}

/// A slice as the history keeps it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SlicePoint {
    pub description: String,
    pub n: u64,
    pub mean: f64,
    pub lower: f64,
    pub upper: f64,
    pub certified_by: String,
    pub violates: bool,
}

/// One window at one point.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WindowPoint {
    pub name: String,
    pub n: u64,
    pub mean: f64,
    /// Bounds on the labelled samples.
    pub labelled: Vec<BoundPoint>,
    /// Delay-robust bounds on the cohort (every unknown loss at its worst).
    pub robust: Vec<BoundPoint>,
    pub predictions: u64,
    pub unlabelled: u64,
    /// SLA state and reason (None without an SLA).
    pub state: Option<String>,
    pub reason: Option<String>,
    pub slices: Vec<SlicePoint>,
}

/// One alarm at one point.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct AlarmPoint {
    pub test: String,
    pub log_evidence: f64,
    pub log_threshold: f64,
    pub fired: bool,
}

/// A model's snapshot at one point of its event clock.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HistoryPoint {
    /// The model's event clock (ms): the newest event time it had taken.
    pub t_ms: i64,
    pub windows: Vec<WindowPoint>,
    pub alarms: Vec<AlarmPoint>,
    pub label_coverage: Option<f64>,
    pub awaiting: u64,
}

fn bound_points(b: &[(crate::estimate::Method, crate::estimate::Bounds)]) -> Vec<BoundPoint> {
    b.iter().map(|(m, b)| BoundPoint { method: m.name().to_string(), lower: b.lower, upper: b.upper }).collect()
}

impl HistoryPoint {
    /// The point of a snapshot taken when the event clock stood at `t_ms`.
    pub fn of(s: &ModelSnapshot, t_ms: i64) -> HistoryPoint {
        let windows = s
            .windows
            .iter()
            .map(|w| {
                let slices = w.slices.as_ref().map_or_else(Vec::new, |sl| {
                    sl.top
                        .iter()
                        .enumerate()
                        .filter(|(i, l)| *i < SLICES_KEPT || l.violates)
                        .map(|(_, l)| SlicePoint {
                            description: l.description.clone(),
                            n: l.n,
                            mean: l.mean,
                            lower: l.lower,
                            upper: l.upper,
                            certified_by: l.certified_by.to_string(),
                            violates: l.violates,
                        })
                        .collect()
                });
                WindowPoint {
                    name: w.name.clone(),
                    n: w.n,
                    mean: w.mean,
                    labelled: bound_points(&w.bounds),
                    robust: w.cohort.as_ref().map_or_else(Vec::new, |c| bound_points(&c.bounds)),
                    predictions: w.cohort.as_ref().map_or(0, |c| c.predictions),
                    unlabelled: w.cohort.as_ref().map_or(0, |c| c.unlabelled),
                    state: w.state.map(|(st, _)| st.as_str().to_string()),
                    reason: w.state.map(|(_, r)| r.describe().to_string()),
                    slices,
                }
            })
            .collect();
        let mut alarms: Vec<AlarmPoint> = s
            .anytime
            .alarms
            .iter()
            .map(|a| AlarmPoint {
                test: a.test.as_str().to_string(),
                log_evidence: a.log_evidence,
                log_threshold: a.log_threshold,
                fired: a.fired_at.is_some(),
            })
            .collect();
        if let Some(a) = s.input_shift.as_ref().and_then(|sh| sh.alarm.as_ref()) {
            alarms.push(AlarmPoint {
                test: INPUT_SHIFT_TEST.to_string(),
                log_evidence: a.log_evidence,
                log_threshold: a.log_threshold,
                fired: a.fired_at.is_some(),
            });
        }
        HistoryPoint { t_ms, windows, alarms, label_coverage: s.label_coverage, awaiting: s.awaiting }
    }

    /// The snapshot itself as the newest point, when the clock has moved past the last kept
    /// one: the charts draw the kept history and then this (read in place, not copied).
    pub fn now(s: &ModelSnapshot) -> Option<HistoryPoint> {
        let t = s.event_clock_ms?;
        s.history.last().is_none_or(|p| p.t_ms < t).then(|| HistoryPoint::of(s, t))
    }

    pub fn to_json(&self) -> String {
        serde_json::to_string(self).expect("a history point always serialises")
    }

    pub fn parse(json: &str) -> Option<HistoryPoint> {
        serde_json::from_str(json).ok()
    }
}

/// The `test` of the input-shift alarm (the label /metrics gives it too).
pub const INPUT_SHIFT_TEST: &str = "input-shift";

/// Which of a window point's bounds decide its SLA state (the band the charts draw).
pub fn deciding<'a>(w: &'a WindowPoint, decide_on: DecideOn, method: &str) -> Option<&'a BoundPoint> {
    let set = match decide_on {
        DecideOn::DelayRobust => &w.robust,
        DecideOn::LabelledOnly => &w.labelled,
    };
    set.iter().find(|b| b.method == method)
}

/// The order states are ranked in when points are merged for a chart: the worst wins.
pub fn state_rank(s: Option<&str>) -> u8 {
    match s {
        Some(x) if x == SlaState::Violated.as_str() => 3,
        Some(x) if x == SlaState::Inconclusive.as_str() => 2,
        Some(x) if x == SlaState::Ok.as_str() => 1,
        _ => 0,
    }
}
