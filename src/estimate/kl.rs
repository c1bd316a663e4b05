//! The Chernoff-Hoeffding relative-entropy bound (Hoeffding 1963, Theorem 1; Langford 2005):
//! for independent losses in [0, 1] with mean μ, P(x̄ ≤ μ − t) ≤ exp(−n kl(μ − t ‖ μ)), so
//!   U = sup{q ≥ x̄ : kl(x̄ ‖ q) ≤ ln(1/δ)/n},   L = inf{q ≤ x̄ : kl(x̄ ‖ q) ≤ ln(1/δ)/n}.
//! Valid for any losses in [0, 1], not only 0-1 ones (the proof uses E e^{λX} ≤ 1 − μ + μe^λ).

use super::Bounds;

/// Bernoulli relative entropy kl(p ‖ q), with 0 ln 0 = 0; +∞ when q is 0 or 1 and p is not.
pub fn kl_bernoulli(p: f64, q: f64) -> f64 {
    let mut out = 0.0;
    if p > 0.0 {
        out += p * (p / q).ln();
    }
    if p < 1.0 {
        out += (1.0 - p) * ((1.0 - p) / (1.0 - q)).ln();
    }
    out
}

/// Absolute tolerance of the root: the returned bounds are within this of the exact ones, on
/// the conservative side.
pub const TOLERANCE: f64 = 1e-12;

fn upper(mean: f64, eps: f64) -> f64 {
    if mean >= 1.0 {
        return 1.0;
    }
    if mean <= 0.0 {
        // kl(0 ‖ q) = −ln(1 − q): closed form.
        return -(-eps).exp_m1();
    }
    // kl(x̄ ‖ q) increases in q on [x̄, 1); bisection keeps the bracket [ok, too far].
    let (mut lo, mut hi) = (mean, 1.0);
    while hi - lo > TOLERANCE {
        let mid = 0.5 * (lo + hi);
        if kl_bernoulli(mean, mid) <= eps {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    hi
}

/// Lower and upper bounds on the mean of n losses in [0, 1] with sample mean `mean`.
pub fn bounds(n: u64, mean: f64, delta: f64) -> Bounds {
    let eps = (1.0 / delta).ln() / n as f64;
    Bounds { lower: (1.0 - upper(1.0 - mean, eps)).max(0.0), upper: upper(mean, eps) }
}
