//! Hoeffding's bound (Hoeffding 1963, Theorem 2): P(μ − x̄ ≥ t) ≤ exp(−2nt²) for independent
//! losses in [0, 1], so x̄ ± sqrt(ln(1/δ)/(2n)) bounds μ on each side at level δ. Never the
//! tightest; kept as a distribution-free ceiling that anyone can check by hand.

use super::Bounds;

/// Lower and upper bounds on the mean of n losses in [0, 1] with sample mean `mean`.
pub fn bounds(n: u64, mean: f64, delta: f64) -> Bounds {
    let radius = ((1.0 / delta).ln() / (2.0 * n as f64)).sqrt();
    Bounds { lower: (mean - radius).max(0.0), upper: (mean + radius).min(1.0) }
}
