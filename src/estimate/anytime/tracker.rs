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

/// The state of one stream.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Tracker {
    spec: TrackerSpec,
    n: u64,
    sum: f64,
    bets: PlugIn,
    betting: BettingCs,
    bernstein: EmpiricalBernsteinCs,
    hoeffding: HoeffdingCs,
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
            sum: 0.0,
            bets: PlugIn::default(),
            betting: BettingCs::new(spec.grid),
            bernstein: EmpiricalBernsteinCs::default(),
            hoeffding: HoeffdingCs::new(spec.hoeffding_boundary),
            exceeded: spec.sla_max_risk.map(|t| SlaTest::new(t / b)),
            shift: spec.shift_max_risk.map(|t| SlaTest::new(t / b)),
            change: spec.change.map(|(t, a)| ChangeDetector::new(t / b, a)),
            spec,
        }
    }

    pub fn spec(&self) -> &TrackerSpec {
        &self.spec
    }

    /// Takes one loss in [0, B]. The caller feeds losses in an order that does not depend on
    /// their values.
    pub fn push(&mut self, loss: f64) {
        let x = (loss / self.spec.loss_max).clamp(0.0, 1.0);
        let ln_inv = (1.0 / self.spec.delta).ln();
        let bet = self.bets.bet(ln_inv);
        self.n += 1;
        self.sum += x;
        self.betting.push(x, bet, 1.0 / self.spec.delta);
        self.bernstein.push(x, bet, ln_inv);
        self.hoeffding.push(x, self.spec.delta);
        for test in [&mut self.exceeded, &mut self.shift].into_iter().flatten() {
            test.push(self.n, x, bet, ln_inv);
        }
        if let Some(c) = &mut self.change {
            c.push(self.n, x);
        }
        self.bets.push(x);
    }

    /// Losses taken since the reset.
    pub fn n(&self) -> u64 {
        self.n
    }

    /// Mean loss since the reset, in loss units (0 before the first loss).
    pub fn mean(&self) -> f64 {
        if self.n == 0 {
            0.0
        } else {
            self.sum / self.n as f64 * self.spec.loss_max
        }
    }

    /// A sequence's current bounds, in loss units.
    pub fn bounds(&self, s: Sequence) -> Bounds {
        let b = match s {
            Sequence::BettingCs => self.betting.bounds(),
            Sequence::EmpiricalBernsteinCs => self.bernstein.bounds(),
            Sequence::HoeffdingCs => self.hoeffding.bounds(),
        };
        Bounds { lower: b.lower * self.spec.loss_max, upper: b.upper * self.spec.loss_max }
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

    /// Grid points of the betting sequence still updated per loss (its current cost).
    pub fn betting_live_points(&self) -> usize {
        self.betting.live()
    }
}
