//! Anytime-valid bounds and alarms: confidence sequences for the risk since a reset point, and
//! the sequential tests that page. Pure state machines: one loss in, O(1) or O(grid) work, no
//! I/O. Every object here is a nonnegative (super)martingale argument plus Ville's inequality
//! (Ville 1939; Howard et al. 2021, §2), so its guarantee holds at every label simultaneously: a daemon that
//! looks after every batch, forever, keeps the stated false-alarm probability.
//!
//! The guarantees assume the losses are fed in an order that does not depend on their values
//! (arrival order, or a seeded shuffle inside a batch). The confidence sequences also assume a
//! constant conditional mean; the SLA test and the change detector do not (§2.5): their nulls
//! are "the conditional risk never exceeded θ", which is what an alarm needs.
//!
//! Losses are scaled to [0, 1] by the caller; θ likewise.

pub mod boundary;
pub mod evidence;
pub mod sequence;
mod tracker;

pub use tracker::{Tracker, TrackerSpec, DEFAULT_GRID};

use std::fmt;

use serde::{Deserialize, Serialize};

/// The truncation c of the betting sequences' bets: each factor stays ≥ 1 − c > 0, so capital
/// never hits 0 (docs/methods.md §1.6(c); the value `confseq` uses).
pub const TRUNCATION: f64 = 0.5;

/// The anytime-valid sequences. The names are the command-line, JSON and metric spellings.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Sequence {
    /// The hedged-capital betting confidence sequence on a grid (Waudby-Smith & Ramdas 2023).
    BettingCs,
    /// The predictable plug-in empirical-Bernstein sequence (Waudby-Smith & Ramdas 2023, Thm 2).
    EmpiricalBernsteinCs,
    /// Hoeffding's sub-Gaussian bound made time-uniform by polynomial stitching (Howard,
    /// Ramdas, McAuliffe & Sekhon 2021, Thm 1).
    HoeffdingCs,
}

impl Sequence {
    pub const ALL: [Sequence; 3] = [Sequence::BettingCs, Sequence::EmpiricalBernsteinCs, Sequence::HoeffdingCs];

    pub fn name(self) -> &'static str {
        match self {
            Sequence::BettingCs => "betting-cs",
            Sequence::EmpiricalBernsteinCs => "empirical-bernstein-cs",
            Sequence::HoeffdingCs => "hoeffding-cs",
        }
    }

    pub fn parse(s: &str) -> Option<Sequence> {
        Sequence::ALL.into_iter().find(|m| m.name() == s)
    }
}

impl fmt::Display for Sequence {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// The predictable plug-in estimates behind every bet: μ̂_t = (1/2 + Σx)/(t + 1) and
/// σ̂²_t = (1/4 + Σ (x_i − μ̂_i)²)/(t + 1), known before the next loss is seen.
///
/// They are symmetric under x → 1 − x (prior mean 1/2), so one bet serves the upper side on x
/// and the lower side on 1 − x.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct PlugIn {
    t: u64,
    sum: f64,
    sq: f64,
}

impl PlugIn {
    /// The confidence-sequence bet for the next loss, λ_t = sqrt(2 ln(1/α) / (σ̂²_{t−1} t ln(1 + t)))
    /// with t counting from 1 (untruncated; each user caps it as its construction requires).
    pub fn bet(&self, ln_inv_alpha: f64) -> f64 {
        let t = (self.t + 1) as f64;
        let s2 = (0.25 + self.sq) / t;
        (2.0 * ln_inv_alpha / (s2 * t * t.ln_1p())).sqrt()
    }

    /// Takes loss `x` into the estimates (after it has been bet on).
    pub fn push(&mut self, x: f64) {
        self.t += 1;
        self.sum += x;
        let mu = (0.5 + self.sum) / (self.t + 1) as f64;
        self.sq += (x - mu) * (x - mu);
    }
}

#[cfg(test)]
mod tests;
