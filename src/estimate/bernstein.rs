//! Empirical Bernstein bound of Maurer & Pontil (2009), Theorem 4: for n ≥ 2 i.i.d. losses in
//! [0, 1] with unbiased sample variance V, with probability at least 1 − δ
//!   μ ≤ x̄ + sqrt(2 V ln(2/δ) / n) + 7 ln(2/δ) / (3(n − 1)),
//! and the mirror statement for the lower side. The 2 in ln(2/δ) is the theorem's own union of
//! a Bennett bound and a bound on the sample standard deviation, so each side is level δ.

use super::Bounds;

/// Lower and upper bounds; [0, 1] for n < 2, where the theorem says nothing.
pub fn maurer_pontil(n: u64, mean: f64, variance_unbiased: f64, delta: f64) -> Bounds {
    if n < 2 {
        return Bounds::TRIVIAL;
    }
    let nf = n as f64;
    let l = (2.0 / delta).ln();
    let radius = (2.0 * variance_unbiased * l / nf).sqrt() + 7.0 * l / (3.0 * (nf - 1.0));
    Bounds { lower: (mean - radius).max(0.0), upper: (mean + radius).min(1.0) }
}
