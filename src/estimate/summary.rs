//! Sufficient statistics of a set of losses: additive, subtractable and exact, so that a window
//! can add the samples that join it and remove the ones that leave it and still hold exactly
//! the statistics a computation over all of its losses from scratch would give.

/// Fractional bits of the fixed-point losses: a loss scaled to [0, 1] is held as an integer
/// multiple of 2^-63 (exactly as f64 holds it down to 2^-11 of B, within 2^-64 below). Integer sums are
/// exact in any order and survive any sequence of additions and removals; floating-point sums
/// (even compensated) depend on the order and drift when losses are subtracted again.
pub const FRACTION_BITS: u32 = 63;
const ONE: u64 = 1 << FRACTION_BITS;
const ONE_F: f64 = ONE as f64;

/// Half a fixed-point step: the most rounding a scaled loss suffers on its way in. The bounds
/// widen by it when any loss was rounded, so they hold for the true losses, not the rounded
/// ones (2^-64 ≈ 5.4e-20 of B, far below what f64 prints).
pub const ROUNDING: f64 = 0.5 / ONE_F;

/// An unsigned 256-bit integer as (high, low) halves: the sum of squared fixed-point losses
/// (each up to 2^126) and n·Σx² − (Σx)² need more than 128 bits (below 2^254 for n < 2^64).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
struct U256 {
    hi: u128,
    lo: u128,
}

impl U256 {
    fn add(self, o: U256) -> U256 {
        let (lo, carry) = self.lo.overflowing_add(o.lo);
        U256 { hi: self.hi + o.hi + u128::from(carry), lo }
    }
    fn sub(self, o: U256) -> U256 {
        let (lo, borrow) = self.lo.overflowing_sub(o.lo);
        U256 { hi: self.hi - o.hi - u128::from(borrow), lo }
    }
    /// The full product of two 128-bit integers.
    fn product(a: u128, b: u128) -> U256 {
        let mask = u128::from(u64::MAX);
        let (a1, a0, b1, b0) = (a >> 64, a & mask, b >> 64, b & mask);
        let (p00, p01, p10, p11) = (a0 * b0, a0 * b1, a1 * b0, a1 * b1);
        let mid = (p00 >> 64) + (p01 & mask) + (p10 & mask);
        let lo = (p00 & mask) | (mid << 64);
        let hi = p11 + (p01 >> 64) + (p10 >> 64) + (mid >> 64);
        U256 { hi, lo }
    }
    /// Times a 64-bit integer (the caller keeps the product below 2^256).
    fn times(self, k: u64) -> U256 {
        let low = U256::product(self.lo, u128::from(k));
        U256 { hi: low.hi + self.hi * u128::from(k), lo: low.lo }
    }
    /// The integer nearest a non-negative finite f64 below 2^256.
    fn from_f64(v: f64) -> U256 {
        let two128 = 2f64.powi(128);
        let hi = (v / two128).floor();
        let lo = (v - hi * two128).max(0.0);
        U256 { hi: hi as u128, lo: lo.round() as u128 }
    }
    fn to_f64(self) -> f64 {
        self.hi as f64 * 2f64.powi(128) + self.lo as f64
    }
}

/// The exact sufficient statistics of losses in [0, B]: count, fixed-point sum and sum of
/// squares (scaled to [0, 1]), the counts at exactly 0 and exactly B (binary losses make the
/// exact binomial bound available), and how many losses the fixed point rounded.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct LossStats {
    n: u64,
    sum: u128,
    squares: U256,
    n_at_zero: u64,
    n_at_max: u64,
    n_rounded: u64,
}

/// One loss as the statistics hold it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Fixed {
    value: u64,
    at_zero: bool,
    at_max: bool,
    rounded: bool,
}

fn fixed(loss: f64, loss_max: f64) -> Fixed {
    let x = (loss / loss_max).clamp(0.0, 1.0);
    let scaled = x * ONE_F;
    let value = scaled.round() as u64;
    Fixed { value, at_zero: loss == 0.0, at_max: loss == loss_max, rounded: value as f64 != scaled }
}

impl LossStats {
    /// Adds one loss in [0, `loss_max`].
    pub fn push(&mut self, loss: f64, loss_max: f64) {
        let f = fixed(loss, loss_max);
        self.n += 1;
        self.sum += u128::from(f.value);
        self.squares = self.squares.add(U256::product(u128::from(f.value), u128::from(f.value)));
        self.n_at_zero += u64::from(f.at_zero);
        self.n_at_max += u64::from(f.at_max);
        self.n_rounded += u64::from(f.rounded);
    }

    /// Removes one loss added before with the same `loss_max` (the caller guarantees it was
    /// added: removing what never was is a logic error, caught in debug builds).
    pub fn remove(&mut self, loss: f64, loss_max: f64) {
        let f = fixed(loss, loss_max);
        debug_assert!(self.n > 0 && self.sum >= u128::from(f.value), "removing a loss never added");
        self.n -= 1;
        self.sum -= u128::from(f.value);
        self.squares = self.squares.sub(U256::product(u128::from(f.value), u128::from(f.value)));
        self.n_at_zero -= u64::from(f.at_zero);
        self.n_at_max -= u64::from(f.at_max);
        self.n_rounded -= u64::from(f.rounded);
    }

    /// Statistics rebuilt from totals kept elsewhere, in loss units: `sum` and `squares` are the
    /// sums of the losses and of their squares (as the exported series carry them, so the fleet
    /// view can pool replicas). `binary` says every loss is 0 or B (then `sum / B` is the count
    /// at B and everything is exact); otherwise every loss counts as rounded, and a caller that
    /// got the totals through f64 allows for their rounding itself.
    pub fn from_totals(n: u64, sum: f64, squares: f64, loss_max: f64, binary: bool) -> LossStats {
        if binary {
            let k = (sum / loss_max).round().clamp(0.0, n as f64) as u64;
            let one = U256::product(u128::from(ONE), u128::from(ONE));
            return LossStats {
                n,
                sum: u128::from(k) * u128::from(ONE),
                squares: one.times(k),
                n_at_zero: n - k,
                n_at_max: k,
                n_rounded: 0,
            };
        }
        let s = (sum / loss_max).clamp(0.0, n as f64);
        let q = (squares / (loss_max * loss_max)).clamp(0.0, n as f64);
        LossStats {
            n,
            sum: (s * ONE_F).round() as u128,
            squares: U256::from_f64(q * ONE_F * ONE_F),
            n_at_zero: 0,
            n_at_max: 0,
            n_rounded: n,
        }
    }

    /// Number of losses.
    pub fn n(&self) -> u64 {
        self.n
    }
    /// Sum of the scaled losses (in units of B).
    pub fn sum_scaled(&self) -> f64 {
        self.sum as f64 / ONE_F
    }
    /// Sum of the squared scaled losses.
    pub fn squares_scaled(&self) -> f64 {
        self.squares.to_f64() / (ONE_F * ONE_F)
    }
    /// Mean of the scaled losses (0 when empty). For binary losses k/n exactly as f64 rounds it:
    /// k·2^63 and n are exact, and scaling by a power of two commutes with rounding.
    pub fn mean_scaled(&self) -> f64 {
        if self.n == 0 {
            0.0
        } else {
            (self.sum as f64 / self.n as f64 / ONE_F).clamp(0.0, 1.0)
        }
    }
    /// Unbiased sample variance of the scaled losses (0 for n < 2), from the exact integer
    /// n·Σx² − (Σx)², rounded once.
    pub fn variance_unbiased_scaled(&self) -> f64 {
        if self.n < 2 {
            return 0.0;
        }
        let spread = self.squares.times(self.n).sub(U256::product(self.sum, self.sum));
        let pairs = self.n as f64 * (self.n - 1) as f64;
        (spread.to_f64() / pairs / (ONE_F * ONE_F)).max(0.0)
    }
    /// Number of losses exactly equal to B (the error count for 0-1 loss).
    pub fn n_at_max(&self) -> u64 {
        self.n_at_max
    }
    /// Number of losses strictly between 0 and B.
    pub fn n_between(&self) -> u64 {
        self.n - self.n_at_zero - self.n_at_max
    }
    /// Number of losses the fixed point rounded (0 for binary losses and for losses that are
    /// multiples of 2^-63 of B).
    pub fn n_rounded(&self) -> u64 {
        self.n_rounded
    }
}

/// What the bounds need to know about a set of losses in [0, B]: the exact [`LossStats`] and,
/// only when asked for, the losses themselves (scaled to [0, 1], in arrival order) for betting
/// — all of them, or a uniform subsample of them (see [`LossSummary::with_sample`]).
#[derive(Clone, Debug)]
pub struct LossSummary {
    loss_max: f64,
    stats: LossStats,
    losses: Option<Vec<f64>>,
}

impl LossSummary {
    /// An empty summary for losses in [0, `loss_max`], keeping only statistics (O(1) memory).
    pub fn new(loss_max: f64) -> Self {
        assert!(loss_max > 0.0 && loss_max.is_finite(), "loss maximum must be positive and finite");
        LossSummary { loss_max, stats: LossStats::default(), losses: None }
    }

    /// Like [`LossSummary::new`], but also keeps every loss (O(n) memory), as betting needs.
    pub fn keeping_losses(loss_max: f64) -> Self {
        LossSummary { losses: Some(Vec::new()), ..LossSummary::new(loss_max) }
    }

    /// A summary of statistics kept elsewhere, with (for betting) a uniform subsample of the
    /// losses in arrival order, in loss units: the methods that need the losses then run on the
    /// subsample at its own n.
    pub fn with_sample(loss_max: f64, stats: LossStats, sample: Option<&[f64]>) -> Self {
        let losses = sample.map(|xs| xs.iter().map(|l| (l / loss_max).clamp(0.0, 1.0)).collect());
        LossSummary { losses, ..LossSummary { stats, ..LossSummary::new(loss_max) } }
    }

    /// Adds one loss. The caller has checked 0 ≤ loss ≤ B (ingest rejects other rows).
    pub fn push(&mut self, loss: f64) {
        debug_assert!((0.0..=self.loss_max).contains(&loss), "loss {loss} outside [0, {}]", self.loss_max);
        self.stats.push(loss, self.loss_max);
        if let Some(v) = self.losses.as_mut() {
            v.push((loss / self.loss_max).clamp(0.0, 1.0));
        }
    }

    /// The exact statistics.
    pub fn stats(&self) -> &LossStats {
        &self.stats
    }
    /// The declared loss maximum B.
    pub fn loss_max(&self) -> f64 {
        self.loss_max
    }
    /// Number of losses.
    pub fn n(&self) -> u64 {
        self.stats.n()
    }
    /// Mean loss in the losses' own units.
    pub fn mean(&self) -> f64 {
        self.mean_scaled() * self.loss_max
    }
    /// Sum of the losses in their own units (exact for 0-1 loss: k errors give k).
    pub fn sum(&self) -> f64 {
        self.stats.sum_scaled() * self.loss_max
    }
    /// Mean of the losses scaled to [0, 1].
    pub fn mean_scaled(&self) -> f64 {
        self.stats.mean_scaled()
    }
    /// Unbiased sample variance of the scaled losses (0 for n < 2).
    pub fn variance_unbiased_scaled(&self) -> f64 {
        self.stats.variance_unbiased_scaled()
    }
    /// Number of losses exactly equal to B (the error count for 0-1 loss).
    pub fn n_at_max(&self) -> u64 {
        self.stats.n_at_max()
    }
    /// Number of losses strictly between 0 and B.
    pub fn n_between(&self) -> u64 {
        self.stats.n_between()
    }
    /// True when every loss is exactly 0 or B.
    pub fn is_binary(&self) -> bool {
        self.n_between() == 0
    }
    /// The scaled losses (all, or the subsample) in arrival order, if they were kept.
    pub fn losses(&self) -> Option<&[f64]> {
        self.losses.as_deref()
    }
    /// How many losses a method reads: the subsample's size for the methods that need the
    /// losses, else every loss.
    pub fn used_by(&self, method: super::Method) -> u64 {
        match (&self.losses, method.needs_losses()) {
            (Some(v), true) => v.len() as u64,
            _ => self.n(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn additions_and_removals_in_any_order_give_the_direct_statistics() {
        let mut rng = crate::estimate::seeded::Seeded::new(23);
        for _ in 0..200 {
            let b = [1.0, 16.0, 0.3][rng.below(3) as usize];
            let xs: Vec<f64> = (0..1 + rng.below(300)).map(|_| b * rng.uniform()).collect();
            let keep = rng.below(xs.len() as u64 + 1) as usize;
            let mut direct = LossStats::default();
            xs[..keep].iter().for_each(|&x| direct.push(x, b));
            // All of them, then the tail removed in a shuffled order.
            let mut moved = LossStats::default();
            xs.iter().rev().for_each(|&x| moved.push(x, b));
            let mut tail: Vec<f64> = xs[keep..].to_vec();
            for i in (1..tail.len()).rev() {
                tail.swap(i, rng.below(i as u64 + 1) as usize);
            }
            tail.iter().for_each(|&x| moved.remove(x, b));
            assert_eq!(moved, direct);
            assert_eq!(moved.mean_scaled().to_bits(), direct.mean_scaled().to_bits());
        }
    }

    #[test]
    fn statistics_rebuilt_from_exported_totals_match_the_pushed_ones() {
        // Binary: exact, bit for bit.
        let mut s = LossStats::default();
        (0..10_007u64).for_each(|i| s.push(if i % 5 == 0 { 1.0 } else { 0.0 }, 1.0));
        let t = LossStats::from_totals(s.n(), s.sum_scaled(), s.squares_scaled(), 1.0, true);
        assert_eq!(t, s);
        // Other losses: the mean and variance to f64 precision.
        let mut rng = crate::estimate::seeded::Seeded::new(5);
        let mut s = LossStats::default();
        (0..5_000).for_each(|_| s.push(7.0 * rng.uniform(), 7.0));
        let t = LossStats::from_totals(s.n(), s.sum_scaled() * 7.0, s.squares_scaled() * 49.0, 7.0, false);
        assert!((t.mean_scaled() - s.mean_scaled()).abs() < 1e-15, "{} {}", t.mean_scaled(), s.mean_scaled());
        let (a, b) = (t.variance_unbiased_scaled(), s.variance_unbiased_scaled());
        assert!((a - b).abs() < 1e-12 * b, "{a} {b}");
        assert_eq!(t.n_rounded(), 5_000);
    }

    #[test]
    fn binary_losses_give_k_over_n_exactly() {
        let mut s = LossStats::default();
        (0..1_000_003u64).for_each(|i| s.push(if i % 7 == 0 { 1.0 } else { 0.0 }, 1.0));
        assert_eq!(s.mean_scaled(), 142_858.0 / 1_000_003.0);
        assert_eq!(s.sum_scaled(), 142_858.0);
        assert_eq!((s.n_at_max(), s.n_between(), s.n_rounded()), (142_858, 0, 0));
    }

    #[test]
    fn the_wide_product_matches_u128_where_it_fits_and_carries_beyond() {
        for (a, b) in [(0u128, 5u128), (u64::MAX as u128, u64::MAX as u128), (1 << 100, 1 << 20), (12345, 67890)] {
            let p = U256::product(a, b);
            assert_eq!((p.hi, p.lo), (0, a * b));
        }
        let p = U256::product(u128::MAX, u128::MAX); // (2^128 − 1)² = 2^256 − 2^129 + 1
        assert_eq!((p.hi, p.lo), (u128::MAX - 1, 1));
        let q = U256 { hi: 0, lo: u128::MAX }.add(U256 { hi: 0, lo: 1 });
        assert_eq!((q.hi, q.lo), (1, 0));
        assert_eq!(q.sub(U256 { hi: 0, lo: 1 }), U256 { hi: 0, lo: u128::MAX });
        assert_eq!(U256 { hi: 1, lo: 3 }.times(4), U256 { hi: 4, lo: 12 });
    }

    #[test]
    fn the_variance_matches_the_two_pass_formula() {
        let xs = [0.1, 0.25, 0.7, 0.0, 1.0, 0.33];
        let mut s = LossStats::default();
        xs.iter().for_each(|&x| s.push(x, 1.0));
        let m = xs.iter().sum::<f64>() / 6.0;
        let v = xs.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / 5.0;
        assert!((s.variance_unbiased_scaled() - v).abs() < 1e-9, "{} vs {v}", s.variance_unbiased_scaled());
    }
}
