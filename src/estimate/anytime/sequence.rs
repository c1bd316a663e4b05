//! The three confidence sequences for the mean of losses in [0, 1] since a reset point. Each
//! keeps its running intersection, so its bounds only ever tighten, and each is valid at every
//! t simultaneously: P(∃t: μ ∉ [L_t, U_t]) ≤ 2α, each side α on its own.

use serde::{Deserialize, Serialize};

use super::boundary::{self, Stitching};
use super::TRUNCATION;
use crate::estimate::Bounds;

/// Capital below this is treated as dead: the grid point is accepted for good and no longer
/// updated. Declaring a point accepted can only widen the sequence, so this is conservative;
/// it also keeps products away from subnormal numbers.
const DEAD: f64 = 1e-250;

/// One side of the betting sequence on a grid (docs/methods.md §1.6, algorithm BET-GRID): the
/// capital K⁻_t(m_j) = Π (1 − min(λ_i, c/(1 − m_j)) (x_i − m_j)) of every grid point
/// m_j = j/G still accepted. K⁻ is nondecreasing in m (the monotonicity lemma), so the rejected
/// points form an up-set: the first rejected point ends the accepted range for good (the running
/// intersection), and the reported bound is the smallest rejected grid point, at most 1/G above
/// the exact bound.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GridSide {
    /// Grid points below `first` are dead (accepted for good).
    first: u32,
    /// The capital of grid points first, first + 1, …; everything past the end is rejected.
    capital: Vec<f64>,
}

impl GridSide {
    pub fn new(grid: u32) -> GridSide {
        GridSide { first: 0, capital: vec![1.0; grid as usize + 1] }
    }

    /// Bets `bet` on "the mean is below m" at every live point, then drops what it rejected.
    /// Products, not logarithms: every factor is ≥ 1 − c = 1/2, and a live capital is < 1/α,
    /// so nothing overflows, and small capital is caught by [`DEAD`].
    pub fn push(&mut self, grid: u32, x: f64, bet: f64, inv_alpha: f64) {
        let g = f64::from(grid);
        let first = f64::from(self.first);
        for (k, c) in self.capital.iter_mut().enumerate() {
            let m = (first + k as f64) / g;
            let lambda = if m < 1.0 { bet.min(TRUNCATION / (1.0 - m)) } else { bet };
            *c *= 1.0 - lambda * (x - m);
        }
        if let Some(k) = self.capital.iter().position(|&c| c >= inv_alpha) {
            self.capital.truncate(k);
        }
        let dead = self.capital.iter().take_while(|&&c| c < DEAD).count();
        if dead > 0 {
            self.capital.drain(..dead);
            self.first += dead as u32;
        }
    }

    /// The smallest rejected grid point (1 when none is).
    pub fn upper(&self, grid: u32) -> f64 {
        ((self.first as usize + self.capital.len()) as f64 / f64::from(grid)).min(1.0)
    }

    /// Grid points still updated per loss.
    pub fn live(&self) -> usize {
        self.capital.len()
    }
}

/// The betting confidence sequence: the upper side on x, the lower side on 1 − x (the same
/// bets serve both, see [`super::PlugIn`]). O(G) time per loss at most, shrinking as the
/// sequence tightens; O(G) memory.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct BettingCs {
    grid: u32,
    upper: GridSide,
    lower: GridSide,
}

impl BettingCs {
    pub fn new(grid: u32) -> BettingCs {
        assert!(grid >= 2, "the grid needs at least two cells");
        BettingCs { grid, upper: GridSide::new(grid), lower: GridSide::new(grid) }
    }

    pub fn push(&mut self, x: f64, bet: f64, inv_alpha: f64) {
        self.upper.push(self.grid, x, bet, inv_alpha);
        self.lower.push(self.grid, 1.0 - x, bet, inv_alpha);
    }

    pub fn bounds(&self) -> Bounds {
        Bounds { lower: 1.0 - self.lower.upper(self.grid), upper: self.upper.upper(self.grid) }
    }

    /// Grid points still updated per loss, both sides.
    pub fn live(&self) -> usize {
        self.upper.live() + self.lower.live()
    }
}

/// The predictable plug-in empirical-Bernstein sequence (docs/methods.md §1.6(e)):
/// U_t = [Σ λ_i x_i + ln(1/α) + Σ v_i ψ_E(λ_i)] / Σ λ_i with λ_i the sequence bets capped at c,
/// v_i = 4 (x_i − x̄_{i−1})², ψ_E(λ) = (−ln(1 − λ) − λ)/4; L_t mirrors it. The centre x̄_{i−1} is
/// the plain running mean, as in `confseq`; before the first loss it is 0 for the lower side
/// and, by the mirror x → 1 − x, 1 for the upper side. O(1) per loss.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EmpiricalBernsteinCs {
    t: u64,
    sum: f64,
    weighted: f64,
    weights: f64,
    /// Σ v_i ψ_E(λ_i) of the lower and of the upper side (they differ only in v_1).
    penalty_lower: f64,
    penalty_upper: f64,
    lower: f64,
    upper: f64,
}

impl Default for EmpiricalBernsteinCs {
    fn default() -> Self {
        EmpiricalBernsteinCs {
            t: 0,
            sum: 0.0,
            weighted: 0.0,
            weights: 0.0,
            penalty_lower: 0.0,
            penalty_upper: 0.0,
            lower: 0.0,
            upper: 1.0,
        }
    }
}

impl EmpiricalBernsteinCs {
    pub fn push(&mut self, x: f64, bet: f64, ln_inv_alpha: f64) {
        let lambda = bet.min(TRUNCATION);
        let (centre_lower, centre_upper) =
            if self.t == 0 { (0.0, 1.0) } else { (self.sum / self.t as f64, self.sum / self.t as f64) };
        let psi = (-(-lambda).ln_1p() - lambda) / 4.0;
        self.weighted += lambda * x;
        self.weights += lambda;
        self.penalty_lower += 4.0 * (x - centre_lower) * (x - centre_lower) * psi;
        self.penalty_upper += 4.0 * (x - centre_upper) * (x - centre_upper) * psi;
        let u = (self.weighted + ln_inv_alpha + self.penalty_upper) / self.weights;
        let l = (self.weighted - ln_inv_alpha - self.penalty_lower) / self.weights;
        self.upper = self.upper.min(u.min(1.0));
        self.lower = self.lower.max(l.max(0.0));
        self.t += 1;
        self.sum += x;
    }

    pub fn bounds(&self) -> Bounds {
        Bounds { lower: self.lower, upper: self.upper.max(self.lower) }
    }
}

/// Which time-uniform boundary the Hoeffding sequence uses.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum HoeffdingBoundary {
    /// Polynomial stitching (Howard et al. 2021, Thm 1): ~sqrt(t ln ln t) growth, the default.
    #[default]
    Stitched,
    /// The one-sided normal mixture: tighter near its tuning point, ~sqrt(t ln t) growth.
    NormalMixture,
}

impl HoeffdingBoundary {
    pub fn name(self) -> &'static str {
        match self {
            HoeffdingBoundary::Stitched => "stitched",
            HoeffdingBoundary::NormalMixture => "normal-mixture",
        }
    }

    pub fn parse(s: &str) -> Option<HoeffdingBoundary> {
        [HoeffdingBoundary::Stitched, HoeffdingBoundary::NormalMixture].into_iter().find(|b| b.name() == s)
    }
}

/// The labels from which the Hoeffding boundaries are tuned to be tight: intrinsic time
/// V = t/4, so stitching starts at v_min = 25 and the mixture is optimised at V = 250. A choice
/// of ours (the bound is valid for any value fixed in advance), set for windows of hundreds to
/// thousands of labels.
pub const HOEFFDING_TIGHT_FROM: f64 = 100.0;
pub const HOEFFDING_MIXTURE_AT: f64 = 1000.0;

/// Hoeffding's bound made time-uniform: x̄_t ± u(t/4)/t with the running intersection. O(1)
/// per loss (a few logarithms; the mixture needs a short root search).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HoeffdingCs {
    boundary: HoeffdingBoundary,
    t: u64,
    sum: f64,
    lower: f64,
    upper: f64,
}

impl HoeffdingCs {
    pub fn new(boundary: HoeffdingBoundary) -> HoeffdingCs {
        HoeffdingCs { boundary, t: 0, sum: 0.0, lower: 0.0, upper: 1.0 }
    }

    /// The boundary u(t/4) on the sum, one-sided at α.
    pub fn radius_of_sum(boundary: HoeffdingBoundary, t: u64, alpha: f64) -> f64 {
        let v = t as f64 / 4.0;
        match boundary {
            HoeffdingBoundary::Stitched => Stitching::sub_gaussian(HOEFFDING_TIGHT_FROM / 4.0).bound(v, alpha),
            HoeffdingBoundary::NormalMixture => {
                // ρ from the two-sided rule at 2α, as for the one-sided mixture in docs/methods.md §2.4(b).
                let rho = boundary::normal_mixture_rho(HOEFFDING_MIXTURE_AT / 4.0, 2.0 * alpha);
                boundary::normal_mixture_one_sided(v, alpha, rho)
            }
        }
    }

    pub fn push(&mut self, x: f64, alpha: f64) {
        self.t += 1;
        self.sum += x;
        let mean = self.sum / self.t as f64;
        let r = Self::radius_of_sum(self.boundary, self.t, alpha) / self.t as f64;
        self.upper = self.upper.min((mean + r).min(1.0));
        self.lower = self.lower.max((mean - r).max(0.0));
    }

    pub fn bounds(&self) -> Bounds {
        Bounds { lower: self.lower, upper: self.upper.max(self.lower) }
    }
}
