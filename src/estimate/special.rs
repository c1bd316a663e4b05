//! Special functions behind the exact binomial bound: ln B(a, b), the regularized incomplete
//! beta function I_x(a, b) with both tails, and its inverse (beta quantiles).
//!
//! Why not a crate: the inverses in statrs, special and puruspe hang, panic or lose accuracy on
//! exactly the inputs a Clopper-Pearson bound produces (k = 0 upper bounds with n ≥ 10^6, tail
//! targets of 1e-6), measured when the crates were chosen. The forward `statrs::beta_reg` also returns
//! the far tail as `1 − (near tail)`, which costs relative precision when the wanted tail is the
//! small one. So this file computes whichever tail the continued fraction gives accurately and
//! inverts on the tail the caller asked for, with a bracketed, iteration-capped solver (it can
//! not hang: every loop has a hard cap). statrs supplies `ln_gamma` for small arguments only.

use statrs::function::gamma::ln_gamma;

const LN_SQRT_2PI: f64 = 0.918_938_533_204_672_8;

/// ln Γ(x) − [(x − ½) ln x − x + ½ ln 2π] for x ≥ 10, by the Stirling series. At x = 10 the
/// first omitted term is below 1e-18, so the series is exact to double precision here.
fn stirling_correction(x: f64) -> f64 {
    let x2 = 1.0 / (x * x);
    (1.0 / 12.0
        + x2 * (-1.0 / 360.0
            + x2 * (1.0 / 1260.0
                + x2 * (-1.0 / 1680.0
                    + x2 * (1.0 / 1188.0
                        + x2 * (-691.0 / 360_360.0 + x2 * (1.0 / 156.0 + x2 * (-3617.0 / 122_400.0))))))))
        / x
}

/// ln B(a, b) for a, b > 0. For large arguments ln Γ(a) + ln Γ(b) − ln Γ(a + b) cancels
/// catastrophically (at b = 10^6 each term is ~10^7), so the large-argument branches expand
/// the ratio analytically and only the small Stirling corrections are subtracted.
pub fn ln_beta(a: f64, b: f64) -> f64 {
    let p = a.min(b);
    let q = a.max(b);
    let r = p / (p + q);
    if p >= 10.0 {
        let corr = stirling_correction(p) + stirling_correction(q) - stirling_correction(p + q);
        -0.5 * q.ln() + LN_SQRT_2PI + corr + (p - 0.5) * r.ln() + q * (-r).ln_1p()
    } else if q >= 10.0 {
        let corr = stirling_correction(q) - stirling_correction(p + q);
        ln_gamma(p) + corr + p - p * (p + q).ln() + (q - 0.5) * (-r).ln_1p()
    } else {
        ln_gamma(p) + ln_gamma(q) - ln_gamma(p + q)
    }
}

/// Continued fraction for I_x(a, b) (modified Lentz). Converges fast for x < (a+1)/(a+b+2);
/// needs O(sqrt(max(a, b))) terms in the worst case, so the cap is generous but finite.
fn beta_continued_fraction(a: f64, b: f64, x: f64) -> f64 {
    const MAX_TERMS: usize = 200_000;
    const EPS: f64 = 1e-16;
    const TINY: f64 = 1e-300;
    let qab = a + b;
    let qap = a + 1.0;
    let qam = a - 1.0;
    let mut c = 1.0;
    let mut d = 1.0 - qab * x / qap;
    if d.abs() < TINY {
        d = TINY;
    }
    d = 1.0 / d;
    let mut h = d;
    for m in 1..=MAX_TERMS {
        let m = m as f64;
        let m2 = 2.0 * m;
        // One step of the modified Lentz method, each quotient guarded away from 0 by TINY.
        let mut step = |aa: f64| -> f64 {
            d = 1.0 + aa * d;
            if d.abs() < TINY {
                d = TINY;
            }
            c = 1.0 + aa / c;
            if c.abs() < TINY {
                c = TINY;
            }
            d = 1.0 / d;
            d * c
        };
        h *= step(m * (b - m) * x / ((qam + m2) * (a + m2)));
        let del = step(-(a + m) * (qab + m) * x / ((a + m2) * (qap + m2)));
        h *= del;
        if (del - 1.0).abs() < EPS {
            break;
        }
    }
    h
}

/// Both tails of the beta distribution at x: (I_x(a, b), 1 − I_x(a, b)). The tail that the
/// continued fraction computes directly keeps full relative precision; the other is 1 − it.
pub fn beta_tails(x: f64, a: f64, b: f64) -> (f64, f64) {
    if x <= 0.0 {
        return (0.0, 1.0);
    }
    if x >= 1.0 {
        return (1.0, 0.0);
    }
    if x < (a + 1.0) / (a + b + 2.0) {
        let ln_front = a * x.ln() + b * (-x).ln_1p() - ln_beta(a, b) - a.ln();
        let lower = (ln_front + beta_continued_fraction(a, b, x).ln()).exp();
        (lower, 1.0 - lower)
    } else {
        let y = 1.0 - x;
        let ln_front = b * y.ln() + a * x.ln() - ln_beta(a, b) - b.ln();
        let upper = (ln_front + beta_continued_fraction(b, a, y).ln()).exp();
        (1.0 - upper, upper)
    }
}

/// ln of the beta density at x.
fn ln_beta_density(x: f64, a: f64, b: f64) -> f64 {
    (a - 1.0) * x.ln() + (b - 1.0) * (-x).ln_1p() - ln_beta(a, b)
}

/// Which tail a quantile target refers to.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Tail {
    /// Solve I_x(a, b) = p.
    Lower,
    /// Solve 1 − I_x(a, b) = q.
    Upper,
}

/// The x in [0, 1] whose `tail` probability under Beta(a, b) equals `target`.
///
/// Callers pass the small tail probability itself (δ, not 1 − δ) so that no precision is lost
/// forming 1 − δ. Closed forms cover a = 1 and b = 1; otherwise safeguarded Newton steps on
/// ln(tail) inside a bracket that shrinks every iteration, falling back to bisection (in log x
/// while the bracket spans orders of magnitude). At most 400 iterations.
pub fn beta_quantile(tail: Tail, target: f64, a: f64, b: f64) -> f64 {
    if target.is_nan() || target <= 0.0 {
        return if tail == Tail::Lower { 0.0 } else { 1.0 };
    }
    if target >= 1.0 {
        return if tail == Tail::Lower { 1.0 } else { 0.0 };
    }
    // Closed forms: Beta(1, b) has CDF 1 − (1 − x)^b, Beta(a, 1) has CDF x^a.
    if a == 1.0 {
        let ln_survival = match tail {
            Tail::Lower => (-target).ln_1p(),
            Tail::Upper => target.ln(),
        };
        return -(ln_survival / b).exp_m1();
    }
    if b == 1.0 {
        let ln_cdf = match tail {
            Tail::Lower => target.ln(),
            Tail::Upper => (-target).ln_1p(),
        };
        return (ln_cdf / a).exp();
    }

    let ln_target = target.ln();
    // g(x) = ln(tail(x)) − ln(target), oriented so that g increases with x.
    let eval = |x: f64| -> (f64, f64) {
        let (lo_t, up_t) = beta_tails(x, a, b);
        let t = if tail == Tail::Lower { lo_t } else { up_t };
        let ln_t = t.ln();
        let ln_ratio = ln_beta_density(x, a, b) - ln_t; // d ln(tail)/dx magnitude
        match tail {
            Tail::Lower => (ln_t - ln_target, ln_ratio.exp()),
            Tail::Upper => (ln_target - ln_t, ln_ratio.exp()),
        }
    };

    let mut lo = 0.0_f64;
    let mut hi = 1.0_f64;
    let mut x = a / (a + b);
    for _ in 0..400 {
        let (g, slope) = eval(x);
        if g == 0.0 {
            return x;
        }
        if g > 0.0 {
            hi = x;
        } else {
            lo = x;
        }
        let newton = x - g / slope;
        let step_ok = g.is_finite() && slope.is_finite() && slope > 0.0 && newton > lo && newton < hi;
        let next = if step_ok {
            newton
        } else if lo > 0.0 && hi / lo > 4.0 {
            (lo * hi).sqrt()
        } else if lo == 0.0 && hi < 0.25 {
            // The root is tiny: bisect in log x from the smallest normal double.
            (0.5 * (f64::MIN_POSITIVE.ln() + hi.ln())).exp()
        } else {
            0.5 * (lo + hi)
        };
        if (next - x).abs() <= 4.0 * f64::EPSILON * x || hi - lo <= 2.0 * f64::EPSILON * hi {
            return next;
        }
        x = next;
    }
    x
}

#[cfg(test)]
mod tests;
