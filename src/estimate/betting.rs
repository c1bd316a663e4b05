//! The fixed-n betting (hedged-capital) bound of Waudby-Smith & Ramdas, "Estimating means of
//! bounded random variables by betting" (JRSS-B, 2023), §3–4.
//!
//! For a candidate mean m, a gambler who bets λ_t on "the mean is below m" turns capital 1 into
//! K⁻_t(m) = Π_{i≤t} (1 + λ_i (m − x_i)). If m is the true mean this is a nonnegative martingale,
//! so by Ville's inequality it reaches 1/δ with probability at most δ; every m whose capital
//! does reach 1/δ (at any t ≤ n: the running intersection) is rejected, and the upper bound is
//! the largest m not rejected. The lower bound mirrors it with K⁺_t(m) = Π (1 + λ_i (x_i − m)).
//!
//! Bets are the predictable plug-in ones for a fixed n, λ_t = sqrt(2 ln(1/δ) / (n σ̂²_{t−1})),
//! capped at 1 (the cap of the `confseq` package's fixed-n interval, so factors stay ≥ 0), with
//! σ̂²_t = (1/4 + Σ_{i≤t} (x_i − μ̂_i)²)/(t + 1) and μ̂_t = (1/2 + Σ_{i≤t} x_i)/(t + 1).
//! Because the bets do not depend on m, K⁻_t(m) is nondecreasing in m (docs/methods.md §1.6,
//! monotonicity lemma), so the accepted set is an interval and bisection finds its end with no
//! grid error. The result depends on the order of the losses: callers pass them in an order that
//! does not depend on their values (arrival order).
//!
//! Cost: O(n) memory for the bets, and one pass over the losses per candidate m. A pass
//! multiplies factors instead of adding logarithms (the product is renormalised only when it
//! leaves [1e-200, 1e200]) and stops at the first crossing; the search starts from a bracket set
//! by the mean and the kl bound, and interpolates the capital instead of halving blindly, so a
//! bound takes ~8 passes instead of the ~34 of bisection on [0, 1].

use super::{kl, Bounds};

/// Absolute tolerance of the search; results are on the conservative side of it.
pub const TOLERANCE: f64 = 1e-10;

#[derive(Clone, Copy, PartialEq, Eq)]
enum Side {
    Upper,
    Lower,
}

/// The predictable plug-in bets for a fixed sample size n = xs.len(), capped at 1.
fn fixed_n_bets(xs: &[f64], delta: f64) -> Vec<f64> {
    let n = xs.len() as f64;
    let scale = 2.0 * (1.0 / delta).ln() / n;
    let mut bets = Vec::with_capacity(xs.len());
    let (mut sum, mut sq) = (0.0_f64, 0.0_f64);
    let mut s2_prev = 0.25_f64;
    for (i, &x) in xs.iter().enumerate() {
        bets.push((scale / s2_prev).sqrt().min(1.0));
        let t = (i + 1) as f64;
        sum += x;
        let mu = (0.5 + sum) / (t + 1.0);
        sq += (x - mu) * (x - mu);
        s2_prev = (0.25 + sq) / (t + 1.0);
    }
    bets
}

/// max_t ln K_t(m) − ln(1/δ) for candidate mean `m`: ≥ 0 means m is rejected. The pass runs to
/// the end even after a crossing, because the search interpolates the size of the excess, and a
/// value cut off at the first crossing is always ≈ 0.
fn excess(xs: &[f64], bets: &[f64], m: f64, side: Side, ln_threshold: f64) -> f64 {
    // The capital is p · e^offset. The running product is a serial chain of multiplies, so it
    // is split into blocks of 8: each block's local prefix products are independent of the
    // other blocks (the CPU overlaps them), and only one multiply per block joins the chain.
    // p is renormalised only when it leaves [1e-200, 1e200]; within a block the local product
    // lies in [0, 2^8], so nothing overflows in between.
    const BLOCK: usize = 8;
    let sign = if side == Side::Upper { 1.0 } else { -1.0 };
    let mut offset = 0.0_f64;
    let mut p = 1.0_f64;
    let mut best = 1.0_f64; // largest capital in the current scale (K_0 = 1)
    let mut best_ln = 0.0_f64; // largest ln K seen before the current scale
    let mut local = [0.0_f64; BLOCK];
    let split = xs.len() - xs.len() % BLOCK;
    for (xc, lc) in xs[..split].chunks_exact(BLOCK).zip(bets[..split].chunks_exact(BLOCK)) {
        let mut acc = 1.0_f64;
        for j in 0..BLOCK {
            acc *= 1.0 + sign * lc[j] * (m - xc[j]);
            local[j] = acc;
        }
        let local_max = local.iter().fold(0.0_f64, |a, &b| a.max(b));
        best = best.max(p * local_max);
        let before = p;
        p *= acc;
        if !(1e-200..=1e200).contains(&p) {
            best_ln = best_ln.max(offset + best.ln());
            if acc <= 0.0 {
                // A factor of exactly 0: the capital is 0 from here on and can never recover.
                return best_ln - ln_threshold;
            }
            // ln p from its two factors, so a product that underflowed is not read as 0.
            offset += before.ln() + acc.ln();
            p = 1.0;
            best = 1.0;
        }
    }
    for (&x, &lam) in xs[split..].iter().zip(&bets[split..]) {
        p *= 1.0 + sign * lam * (m - x);
        best = best.max(p);
    }
    best_ln.max(offset + best.ln()) - ln_threshold
}

/// One side's search: the losses, their bets, the side and the threshold ln(1/δ), and, for the
/// grouped form, the end (exclusive index) of each group: the capital is looked at only there.
struct Search<'a> {
    xs: &'a [f64],
    bets: &'a [f64],
    side: Side,
    ln_thr: f64,
    ends: Option<&'a [usize]>,
}

/// An evaluated candidate: the mean m and its excess.
#[derive(Clone, Copy)]
struct Point {
    m: f64,
    h: f64,
}

impl Search<'_> {
    fn at(&self, m: f64) -> Point {
        let h = match self.ends {
            None => excess(self.xs, self.bets, m, self.side, self.ln_thr),
            Some(ends) => excess_at_ends(self.xs, self.bets, ends, m, self.side, self.ln_thr),
        };
        Point { m, h }
    }
}

/// Finds the boundary between an accepted candidate `a` (excess < 0) and a rejected one `r`
/// (excess ≥ 0) to within [`TOLERANCE`], returning the rejected end (conservative).
///
/// Regula falsi with the Illinois modification: the excess is monotone in m, so interpolating
/// it lands near the boundary in a handful of passes where bisection needs ~30. Every third
/// step is a plain bisection and interpolated points keep TOLERANCE/4 away from the ends, so the
/// bracket always closes: at worst this costs 1.5× the passes of bisection.
fn boundary(search: &Search<'_>, mut a: Point, mut r: Point) -> f64 {
    let mut last_kept: Option<bool> = None; // which end stayed put on the previous step
    let mut step = 0u32;
    while (r.m - a.m).abs() > TOLERANCE {
        step += 1;
        let width = r.m - a.m;
        let c = if step.is_multiple_of(3) || !(a.h.is_finite() && r.h.is_finite()) || r.h <= a.h {
            0.5 * (a.m + r.m)
        } else {
            let t = (-a.h / (r.h - a.h)).clamp(0.0, 1.0);
            let guard = (0.25 * TOLERANCE / width.abs()).min(0.5);
            a.m + width * t.clamp(guard, 1.0 - guard)
        };
        let pc = search.at(c);
        if pc.h >= 0.0 {
            r = pc;
            if last_kept == Some(true) {
                a.h *= 0.5;
            }
            last_kept = Some(true);
        } else {
            a = pc;
            if last_kept == Some(false) {
                r.h *= 0.5;
            }
            last_kept = Some(false);
        }
    }
    r.m
}

/// One end of the interval: the supremum (upper side) or infimum (lower side) of accepted m.
fn end(search: &Search<'_>, mean: f64, guess: f64) -> f64 {
    let (far, near) = match search.side {
        Side::Upper => (1.0, 0.0),
        Side::Lower => (0.0, 1.0),
    };
    let p_far = search.at(far);
    if p_far.h < 0.0 {
        return far;
    }
    // Narrow the bracket: the mean is almost always accepted and the kl bound almost always
    // rejected; each guess is checked, so a wrong guess only costs one pass.
    let p_mean = search.at(mean);
    let (mut a, mut r) = if p_mean.h < 0.0 {
        (p_mean, p_far)
    } else {
        let p_near = search.at(near);
        if p_near.h >= 0.0 {
            return near;
        }
        (p_near, p_mean)
    };
    if (guess - a.m) * (r.m - guess) > 0.0 {
        let pg = search.at(guess);
        if pg.h >= 0.0 {
            r = pg;
        } else {
            a = pg;
        }
    }
    boundary(search, a, r)
}

/// Lower and upper fixed-n betting bounds on the mean of losses `xs` in [0, 1], each one-sided
/// at level δ. The bounds are widened, if needed, to contain the sample mean: an unusual order
/// of losses can make the betting set exclude it, and widening never breaks validity.
pub fn fixed_n(xs: &[f64], delta: f64) -> Bounds {
    if xs.is_empty() {
        return Bounds::TRIVIAL;
    }
    let bets = fixed_n_bets(xs, delta);
    let ln_thr = (1.0 / delta).ln();
    let mean = xs.iter().sum::<f64>() / xs.len() as f64;
    let guide = kl::bounds(xs.len() as u64, mean, delta);
    let upper = end(&Search { xs, bets: &bets, side: Side::Upper, ln_thr, ends: None }, mean, guide.upper);
    let lower = end(&Search { xs, bets: &bets, side: Side::Lower, ln_thr, ends: None }, mean, guide.lower);
    Bounds { lower: lower.min(mean).max(0.0), upper: upper.max(mean).min(1.0) }
}

/// The plug-in bets of [`fixed_n_bets`], frozen within each group: every loss of a group gets
/// the bet known before the group began, and the variance estimate behind it is taken from the
/// sums of the past groups (σ̂² = (1/4 + Σx² − (Σx)²/t)/(t + 1)), not from running means, so
/// neither the product over a group nor any later bet depends on the order inside a group.
fn grouped_bets(xs: &[f64], ends: &[usize], delta: f64) -> Vec<f64> {
    let n = xs.len() as f64;
    let scale = 2.0 * (1.0 / delta).ln() / n;
    let mut bets = Vec::with_capacity(xs.len());
    let (mut sum, mut sq, mut t) = (0.0_f64, 0.0_f64, 0.0_f64);
    let mut start = 0;
    for &stop in ends {
        let s2 = if t > 0.0 { (0.25 + (sq - sum * sum / t).max(0.0)) / (t + 1.0) } else { 0.25 };
        let bet = (scale / s2).sqrt().min(1.0);
        for &x in &xs[start..stop] {
            bets.push(bet);
            t += 1.0;
            sum += x;
            sq += x * x;
        }
        start = stop;
    }
    bets
}

/// max over group ends of ln K(m) − ln(1/δ): the capital observed only where a group ends, which
/// is a nonnegative supermartingale in the groups (the bets are fixed before each group, the
/// losses of a group are independent of the past), so Ville's inequality holds for it.
fn excess_at_ends(xs: &[f64], bets: &[f64], ends: &[usize], m: f64, side: Side, ln_thr: f64) -> f64 {
    let sign = if side == Side::Upper { 1.0 } else { -1.0 };
    let (mut offset, mut p) = (0.0_f64, 1.0_f64);
    let mut best_ln = 0.0_f64;
    let mut start = 0;
    for &stop in ends {
        for (&x, &lam) in xs[start..stop].iter().zip(&bets[start..stop]) {
            let f = 1.0 + sign * lam * (m - x);
            if f <= 0.0 {
                return best_ln - ln_thr;
            }
            p *= f;
            if !(1e-200..=1e200).contains(&p) {
                offset += p.ln();
                p = 1.0;
            }
        }
        best_ln = best_ln.max(offset + p.ln());
        start = stop;
    }
    best_ln - ln_thr
}

/// Fixed-n betting bounds on the mean of losses `xs` in [0, 1] that arrive in groups (`ends`:
/// the exclusive end index of each group, increasing, the last = xs.len()), where the order
/// inside a group carries no meaning: bets are frozen within a group and the capital is looked
/// at only at group ends, so any order inside a group gives the same bounds. Each side at δ,
/// widened to contain the mean as [`fixed_n`] is.
pub fn grouped(xs: &[f64], ends: &[usize], delta: f64) -> Bounds {
    if xs.is_empty() {
        return Bounds::TRIVIAL;
    }
    debug_assert_eq!(ends.last().copied(), Some(xs.len()), "the last group ends at the last loss");
    let bets = grouped_bets(xs, ends, delta);
    let ln_thr = (1.0 / delta).ln();
    let mean = xs.iter().sum::<f64>() / xs.len() as f64;
    let guide = kl::bounds(xs.len() as u64, mean, delta);
    let ends = Some(ends);
    let upper = end(&Search { xs, bets: &bets, side: Side::Upper, ln_thr, ends }, mean, guide.upper);
    let lower = end(&Search { xs, bets: &bets, side: Side::Lower, ln_thr, ends }, mean, guide.lower);
    Bounds { lower: lower.min(mean).max(0.0), upper: upper.max(mean).min(1.0) }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The textbook form: max over t of the cumulative sum of log factors, no tricks.
    fn excess_naive(xs: &[f64], bets: &[f64], m: f64, side: Side, ln_thr: f64) -> f64 {
        let sign = if side == Side::Upper { 1.0 } else { -1.0 };
        let (mut acc, mut best) = (0.0_f64, 0.0_f64);
        for (&x, &l) in xs.iter().zip(bets) {
            acc += (1.0 + sign * l * (m - x)).ln();
            best = best.max(acc);
        }
        best - ln_thr
    }

    #[test]
    fn blocked_product_equals_the_sum_of_logs() {
        // Orders that drive the capital through 1e±200 and back: long runs of zeros then ones.
        let mut xs: Vec<f64> = Vec::new();
        let mut state = 12345u64;
        for i in 0..20_003 {
            state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            let u = (state >> 11) as f64 / (1u64 << 53) as f64;
            xs.push(if i < 9000 {
                0.0
            } else if i < 12000 {
                1.0
            } else {
                u
            });
        }
        let bets = fixed_n_bets(&xs, 0.01);
        let thr = 100f64.ln();
        for m in [0.0, 0.05, 0.3, 0.45, 0.5, 0.62, 0.9, 1.0] {
            for side in [Side::Upper, Side::Lower] {
                let (fast, slow) = (excess(&xs, &bets, m, side, thr), excess_naive(&xs, &bets, m, side, thr));
                assert!((fast - slow).abs() <= 1e-9 * slow.abs().max(1.0) || fast == slow, "m={m}: {fast} vs {slow}");
            }
        }
    }

    #[test]
    fn grouped_with_one_loss_per_group_is_close_to_the_plain_bound() {
        let mut state = 99u64;
        let xs: Vec<f64> = (0..500)
            .map(|_| {
                state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                ((state >> 11) as f64 / (1u64 << 53) as f64).powi(3)
            })
            .collect();
        let ends: Vec<usize> = (1..=xs.len()).collect();
        let (a, b) = (fixed_n(&xs, 0.05), grouped(&xs, &ends, 0.05));
        // The variance estimates differ (sums instead of running means), the bounds barely.
        assert!((a.lower - b.lower).abs() < 0.01 && (a.upper - b.upper).abs() < 0.01, "{a:?} vs {b:?}");
    }

    #[test]
    fn grouped_ignores_the_order_inside_a_group() {
        let mut xs: Vec<f64> = Vec::new();
        let mut ends = Vec::new();
        for g in 0..40 {
            for i in 0..25 {
                xs.push(if (g * 25 + i) % 7 == 0 { 1.0 } else { 0.1 });
            }
            ends.push(xs.len());
        }
        let a = grouped(&xs, &ends, 0.05);
        for chunk in xs.chunks_mut(25) {
            chunk.reverse();
        }
        let b = grouped(&xs, &ends, 0.05);
        // Equal up to rounding in the products and the search's tolerance.
        assert!((a.lower - b.lower).abs() < 1e-9 && (a.upper - b.upper).abs() < 1e-9, "{a:?} vs {b:?}");
    }

    #[test]
    fn adversarial_order_still_contains_the_mean() {
        let mut xs = vec![0.0; 900];
        xs.extend(std::iter::repeat_n(1.0, 100));
        let b = fixed_n(&xs, 0.05);
        assert!(b.lower <= 0.1 && 0.1 <= b.upper, "{b:?}");
    }
}
