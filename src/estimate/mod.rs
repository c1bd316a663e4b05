//! Confidence bounds on the true mean of bounded losses. Pure functions: no I/O, no metrics,
//! no clocks. Input: a [`LossSummary`] of the losses of one window or group (plus the losses
//! themselves for methods that need their order). Output: one-sided lower and upper bounds, each
//! valid on its own with probability at least the stated confidence when the losses are i.i.d.
//! in [0, B] and were not used to choose the model being judged.
//!
//! Every method works on losses scaled to [0, 1] and scales back by B, so one implementation
//! serves every loss range. To add a method: one file here with a pure function, one variant in
//! [`Method`], one arm in [`bounds`] (see DEVELOPERS.md).

pub mod anytime;
pub mod bernstein;
pub mod betting;
pub mod binomial;
pub mod delay_dependence;
pub mod delay_robust;
pub mod hoeffding;
pub mod kernel;
pub mod kernel_betting;
pub mod kl;
pub mod ks;
pub mod seeded;
pub mod sla;
pub mod slices;
pub mod special;
mod summary;

pub use summary::{LossStats, LossSummary};

use std::fmt;

/// A confidence level C in (0, 1); δ = 1 − C is the error probability of each one-sided bound.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Confidence(f64);

impl Confidence {
    /// Checks 0 < c < 1 (NaN rejected).
    pub fn new(c: f64) -> Result<Self, EstimateError> {
        if c > 0.0 && c < 1.0 {
            Ok(Confidence(c))
        } else {
            Err(EstimateError::Confidence(c))
        }
    }
    /// The confidence C.
    pub fn level(self) -> f64 {
        self.0
    }
    /// δ = 1 − C, the error probability of one side.
    pub fn delta(self) -> f64 {
        1.0 - self.0
    }
}

/// A lower and an upper bound on the true mean, in the losses' own units.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Bounds {
    pub lower: f64,
    pub upper: f64,
}

impl Bounds {
    fn scaled(self, b: f64) -> Bounds {
        Bounds { lower: self.lower * b, upper: self.upper * b }
    }
    /// The trivial bounds [0, 1], returned where a method has too few samples to say more.
    pub const TRIVIAL: Bounds = Bounds { lower: 0.0, upper: 1.0 };
}

/// The fixed-sample bound methods. The names are the command-line and metric spellings.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Method {
    Hoeffding,
    EmpiricalBernstein,
    ClopperPearson,
    Kl,
    Betting,
}

impl Method {
    /// Every method, in report order.
    pub const ALL: [Method; 5] =
        [Method::Hoeffding, Method::EmpiricalBernstein, Method::ClopperPearson, Method::Kl, Method::Betting];

    /// The method's name as users type it and as metrics label it.
    pub fn name(self) -> &'static str {
        match self {
            Method::Hoeffding => "hoeffding",
            Method::EmpiricalBernstein => "empirical-bernstein",
            Method::ClopperPearson => "clopper-pearson",
            Method::Kl => "kl",
            Method::Betting => "betting",
        }
    }

    /// Parses a method name.
    pub fn parse(s: &str) -> Option<Method> {
        Method::ALL.into_iter().find(|m| m.name() == s)
    }

    /// True when the method needs the individual losses in arrival order, not just the
    /// sufficient statistics (n, mean, variance, error count).
    pub fn needs_losses(self) -> bool {
        matches!(self, Method::Betting)
    }

    /// True when the method is defined for these losses: Clopper-Pearson needs every loss to
    /// be exactly 0 or B; the others take any loss in [0, B].
    pub fn applies(self, s: &LossSummary) -> bool {
        match self {
            Method::ClopperPearson => s.is_binary(),
            _ => true,
        }
    }
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Why a bound could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EstimateError {
    #[error("confidence must be strictly between 0 and 1, got {0}")]
    Confidence(f64),
    #[error("no losses: a bound needs at least one sample")]
    Empty,
    #[error("clopper-pearson needs every loss to be exactly 0 or the loss maximum; {0} are strictly between")]
    NotBinary(u64),
    #[error("betting needs the individual losses, but only a summary was kept")]
    LossesNotKept,
}

/// Computes `method`'s lower and upper bounds on the mean loss, in the losses' own units.
///
/// `summary` holds the sufficient statistics; `betting` also reads `summary.losses()`, which
/// must then have been kept (see [`LossSummary::keeping_losses`]).
pub fn bounds(method: Method, summary: &LossSummary, confidence: Confidence) -> Result<Bounds, EstimateError> {
    let n = summary.n();
    if n == 0 {
        return Err(EstimateError::Empty);
    }
    let delta = confidence.delta();
    let mean = summary.mean_scaled();
    let raw = match method {
        Method::Hoeffding => hoeffding::bounds(n, mean, delta),
        Method::EmpiricalBernstein => bernstein::maurer_pontil(n, mean, summary.variance_unbiased_scaled(), delta),
        Method::ClopperPearson => {
            if !summary.is_binary() {
                return Err(EstimateError::NotBinary(summary.n_between()));
            }
            binomial::clopper_pearson(summary.n_at_max(), n, delta)
        }
        Method::Kl => kl::bounds(n, mean, delta),
        Method::Betting => {
            let xs = summary.losses().ok_or(EstimateError::LossesNotKept)?;
            betting::fixed_n(xs, delta)
        }
    };
    // Every method's interval contains the sample mean in exact arithmetic; in f64 the scaling
    // and a method's own rounding (betting's grid search, for one) can leave the printed mean a
    // few ulps outside. Widening to include it costs nothing in coverage and keeps the promise
    // "the bounds contain the observed mean" as the mean is printed.
    // Losses are held to 2^-63 of B (see [`summary::ROUNDING`]); where any was rounded the
    // bounds widen by the most that rounding can move the mean.
    let raw = widen_for_rounding(raw, summary.stats().n_rounded());
    let b = raw.scaled(summary.loss_max());
    let mean_out = summary.mean();
    Ok(Bounds { lower: b.lower.min(mean_out), upper: b.upper.max(mean_out) })
}

/// Widens scaled bounds by the fixed-point rounding when `rounded` losses were rounded.
pub fn widen_for_rounding(b: Bounds, rounded: u64) -> Bounds {
    if rounded == 0 {
        return b;
    }
    Bounds { lower: (b.lower - summary::ROUNDING).max(0.0), upper: (b.upper + summary::ROUNDING).min(1.0) }
}

#[cfg(test)]
mod tests;
