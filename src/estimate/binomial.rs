//! The exact binomial (Clopper-Pearson 1934) bounds for 0-1 losses, by binomial tail inversion:
//!   U = max{p : P_Bin(n,p)(X ≤ k) ≥ δ} = BetaInv(1 − δ; k + 1, n − k),  U = 1 when k = n,
//!   L = min{p : P_Bin(n,p)(X ≥ k) ≥ δ} = BetaInv(δ; k, n − k + 1),      L = 0 when k = 0,
//! using P(Bin(n, p) ≤ k) = 1 − I_p(k + 1, n − k). Coverage is at least 1 − δ for every p.

use super::special::{beta_quantile, Tail};
use super::Bounds;

/// Lower and upper bounds on the error rate from k errors among n samples.
pub fn clopper_pearson(k: u64, n: u64, delta: f64) -> Bounds {
    debug_assert!(k <= n);
    let (kf, nf) = (k as f64, n as f64);
    let upper = if k >= n { 1.0 } else { beta_quantile(Tail::Upper, delta, kf + 1.0, nf - kf) };
    let lower = if k == 0 { 0.0 } else { beta_quantile(Tail::Lower, delta, kf, nf - kf + 1.0) };
    Bounds { lower, upper }
}
