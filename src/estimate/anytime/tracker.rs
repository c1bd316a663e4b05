//! Everything anytime-valid about one stream of losses since its reset point, in one value that
//! can be stored and resumed exactly (serde round trip, floats included).

use serde::{Deserialize, Serialize};

use super::evidence::{ChangeDetector, SlaTest};
use super::sequence::{BettingCs, EmpiricalBernsteinCs, HoeffdingBoundary, HoeffdingCs};
use super::{PlugIn, Sequence};
use crate::estimate::Bounds;

/// What a tracker computes. Two trackers with different specs are different statistical
/// objects: capital built under one α or θ says nothing under another, so a stored tracker
/// whose spec differs from the configured one is restarted, never reused.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrackerSpec {
    /// δ = 1 − C: each one-sided bound, and each alarm, errs with probability at most δ.
    pub delta: f64,
    /// The loss maximum B; losses are scaled to [0, 1] by it.
    pub loss_max: f64,
    /// Cells of the betting grid (the betting bounds are conservative by at most B/grid).
    pub grid: u32,
    pub hoeffding_boundary: HoeffdingBoundary,
    /// θ of "exceeded since reset", in loss units.
    pub sla_max_risk: Option<f64>,
    /// θ of the harmful-shift test (reference upper bound + tolerance), in loss units.
    pub shift_max_risk: Option<f64>,
    /// (θ in loss units, threshold A) of the change detector.
    pub change: Option<(f64, f64)>,
}

/// The default betting grid: 1000 cells, conservative by at most 0.001 B.
pub const DEFAULT_GRID: u32 = 1000;

/// One completion of the stream: the three confidence sequences and their plug-in bets.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct Sequences {
    bets: PlugIn,
    betting: BettingCs,
    bernstein: EmpiricalBernsteinCs,
    hoeffding: HoeffdingCs,
}

impl Sequences {
    fn new(spec: &TrackerSpec) -> Sequences {
        Sequences {
            bets: PlugIn::default(),
            betting: BettingCs::new(spec.grid),
            bernstein: EmpiricalBernsteinCs::default(),
            hoeffding: HoeffdingCs::new(spec.hoeffding_boundary),
        }
    }

    fn push(&mut self, x: f64, delta: f64) {
        let ln_inv = (1.0 / delta).ln();
        let bet = self.bets.bet(ln_inv);
        self.betting.push(x, bet, 1.0 / delta);
        self.bernstein.push(x, bet, ln_inv);
        self.hoeffding.push(x, delta);
        self.bets.push(x);
    }

    fn bounds(&self, s: Sequence) -> Bounds {
        match s {
            Sequence::BettingCs => self.betting.bounds(),
            Sequence::EmpiricalBernsteinCs => self.bernstein.bounds(),
            Sequence::HoeffdingCs => self.hoeffding.bounds(),
        }
    }
}

/// The state of one stream of predictions, each with a known loss or none (no label came).
///
/// A prediction without a label has an unknown loss in [0, B]. Two completions run side by side:
/// `low` takes it as 0 and gives the lower bounds and every alarm (their nulls are "the risk is at
/// most θ", and a completed loss ≤ the true one keeps each factor's conditional mean ≤ 1), `high`
/// takes it as B and gives the upper bounds. With every label in, both see the same losses.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Tracker {
    spec: TrackerSpec,
    /// Predictions taken since the reset, labelled or not.
    n: u64,
    /// Predictions with a known loss, and the sum of their scaled losses.
    labelled: u64,
    labelled_sum: f64,
    low: Sequences,
    high: Sequences,
    exceeded: Option<SlaTest>,
    shift: Option<SlaTest>,
    change: Option<ChangeDetector>,
}

impl Tracker {
    pub fn new(spec: TrackerSpec) -> Tracker {
        assert!(spec.delta > 0.0 && spec.delta < 1.0 && spec.loss_max > 0.0);
        let b = spec.loss_max;
        Tracker {
            n: 0,
            labelled: 0,
            labelled_sum: 0.0,
            low: Sequences::new(&spec),
            high: Sequences::new(&spec),
            exceeded: spec.sla_max_risk.map(|t| SlaTest::new(t / b)),
            shift: spec.shift_max_risk.map(|t| SlaTest::new(t / b)),
            change: spec.change.map(|(t, a)| ChangeDetector::new(t / b, a)),
            spec,
        }
    }

    pub fn spec(&self) -> &TrackerSpec {
        &self.spec
    }

    /// Takes one prediction's loss in [0, B]. The caller feeds predictions in an order that
    /// does not depend on their losses (prediction time), labelled or not.
    pub fn push(&mut self, loss: f64) {
        self.take(Some(loss));
    }

    /// Takes one prediction whose label never came: its loss is unknown.
    pub fn push_unknown(&mut self) {
        self.take(None);
    }

    fn take(&mut self, loss: Option<f64>) {
        let known = loss.map(|l| (l / self.spec.loss_max).clamp(0.0, 1.0));
        let (lo, hi) = (known.unwrap_or(0.0), known.unwrap_or(1.0));
        let ln_inv = (1.0 / self.spec.delta).ln();
        self.n += 1;
        if let Some(x) = known {
            self.labelled += 1;
            self.labelled_sum += x;
        }
        self.low.push(lo, self.spec.delta);
        self.high.push(hi, self.spec.delta);
        for test in [&mut self.exceeded, &mut self.shift].into_iter().flatten() {
            test.push(self.n, lo, ln_inv);
        }
        if let Some(c) = &mut self.change {
            c.push(self.n, lo);
        }
    }

    /// Predictions taken since the reset, labelled or not.
    pub fn n(&self) -> u64 {
        self.n
    }

    /// Predictions taken since the reset that had a label.
    pub fn labelled(&self) -> u64 {
        self.labelled
    }

    /// Mean loss of the labelled predictions since the reset, in loss units (0 before any).
    pub fn mean(&self) -> f64 {
        if self.labelled == 0 {
            0.0
        } else {
            self.labelled_sum / self.labelled as f64 * self.spec.loss_max
        }
    }

    /// Sum of the labelled predictions' losses since the reset, in loss units.
    pub fn labelled_sum(&self) -> f64 {
        self.labelled_sum * self.spec.loss_max
    }

    /// A sequence's current bounds, in loss units: the lower one from the completion with
    /// unknown losses at 0, the upper one from the completion with them at B.
    pub fn bounds(&self, s: Sequence) -> Bounds {
        let (lo, hi) = (self.low.bounds(s), self.high.bounds(s));
        Bounds { lower: lo.lower * self.spec.loss_max, upper: hi.upper.max(lo.lower) * self.spec.loss_max }
    }

    pub fn exceeded(&self) -> Option<&SlaTest> {
        self.exceeded.as_ref()
    }

    pub fn shift(&self) -> Option<&SlaTest> {
        self.shift.as_ref()
    }

    pub fn change(&self) -> Option<&ChangeDetector> {
        self.change.as_ref()
    }

    /// ln(1/δ): the level the SLA tests' log e-values must reach.
    pub fn log_threshold(&self) -> f64 {
        (1.0 / self.spec.delta).ln()
    }

    /// Grid points of the betting sequences still updated per loss (their current cost).
    pub fn betting_live_points(&self) -> usize {
        self.low.betting.live() + self.high.betting.live()
    }

    /// True when stored JSON has this layout (two completions). State written before the
    /// completions existed was fed in join order, whose guarantee fails when label delays depend
    /// on outcomes, so it is restarted rather than converted.
    pub fn is_current_layout(value: &serde_json::Value) -> bool {
        value.get("low").is_some() && value.get("high").is_some()
    }
}
