//! An anytime-valid alarm for "the inputs changed": the sequential kernel two-sample test by
//! betting (Shekhar & Ramdas, "Nonparametric two-sample testing by betting", IEEE Trans.
//! Inf. Theory 70, 2024; arXiv 2112.09162), in a form for a fixed reference sample against a
//! stream of current points. Pure.
//!
//! Pairs (X_t, Y_t) arrive: X_t a reference point drawn without replacement (seeded), Y_t the
//! next current point. The witness f_t(z) = (1/|W|) Σ_{(x, y) ∈ W} [k(x, z) − k(y, z)] is built
//! from a window W of past pairs only, and the payoff is g_t = (f_t(X_t) − f_t(Y_t))/2 ∈ [−1, 1]
//! (k ∈ [0, 1]). Under H0 (reference and current points i.i.d. from one distribution) X_t and
//! Y_t are exchangeable given the past, so E[g_t | past] = 0 and every wealth Π (1 + λ g_t) with
//! a fixed λ ∈ (0, 1) is a nonnegative martingale; so is their average over a grid of λ. By
//! Ville's inequality, P(the average ever reaches 1/δ) ≤ δ, however long the stream and however
//! often it is looked at. Under a shift the witness aligns with the difference of the mean
//! embeddings, E[g_t] > 0, and the wealth grows.
//!
//! What it needs: the kernel's bandwidth and the standardisation fixed before the pairs, from
//! reference points that are never paired (a bandwidth computed from paired points would make
//! X_t and Y_t not exchangeable); reference points never reused (an empirical reference drawn
//! with replacement is not the reference distribution, and the test would reject it in the end).
//! So the alarm can run for as many pairs as the reference has unpaired points.

use std::collections::VecDeque;

/// One standardised point: numeric coordinates and categorical codes.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Point {
    pub numeric: Vec<f64>,
    pub categorical: Vec<u32>,
}

impl Point {
    fn dist2(&self, o: &Point) -> f64 {
        let num: f64 = self.numeric.iter().zip(&o.numeric).map(|(a, b)| (a - b) * (a - b)).sum();
        num + self.categorical.iter().zip(&o.categorical).filter(|(a, b)| a != b).count() as f64
    }
}

/// The bets: fixed fractions of the wealth, averaged (a mixture of martingales is one).
pub const BETS: [f64; 6] = [0.025, 0.05, 0.1, 0.2, 0.4, 0.8];

/// No bet before this many past pairs: a witness from a handful of pairs is mostly noise.
pub const BET_AFTER: usize = 10;

/// The sequential two-sample test's state (serialised whole for the daemon's durable state).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ShiftBetting {
    /// 1/(2σ²) of the Gaussian kernel.
    inv_two_sigma2: f64,
    memory: usize,
    past: VecDeque<(Point, Point)>,
    log_wealth: [f64; BETS.len()],
    pairs: u64,
    log_threshold: f64,
    fired_at: Option<u64>,
}

impl ShiftBetting {
    /// A test at bandwidth `sigma`, witness from the newest `memory` pairs, false-alarm
    /// probability `delta` over the whole stream.
    pub fn new(sigma: f64, memory: usize, delta: f64) -> ShiftBetting {
        assert!(sigma > 0.0 && sigma.is_finite() && memory >= BET_AFTER && delta > 0.0 && delta < 1.0);
        ShiftBetting {
            inv_two_sigma2: 1.0 / (2.0 * sigma * sigma),
            memory,
            past: VecDeque::with_capacity(memory),
            log_wealth: [0.0; BETS.len()],
            pairs: 0,
            log_threshold: (1.0 / delta).ln(),
            fired_at: None,
        }
    }

    fn k(&self, a: &Point, b: &Point) -> f64 {
        (-a.dist2(b) * self.inv_two_sigma2).exp()
    }

    /// Takes one pair: a reference point never used before, and the next current point.
    pub fn push(&mut self, x: Point, y: Point) {
        if self.past.len() >= BET_AFTER {
            let (mut fx, mut fy) = (0.0, 0.0);
            for (px, py) in &self.past {
                fx += self.k(px, &x) - self.k(py, &x);
                fy += self.k(px, &y) - self.k(py, &y);
            }
            let w = self.past.len() as f64;
            let g = ((fx - fy) / (2.0 * w)).clamp(-1.0, 1.0);
            for (lw, lambda) in self.log_wealth.iter_mut().zip(BETS) {
                *lw += (lambda * g).ln_1p();
            }
        }
        if self.past.len() == self.memory {
            self.past.pop_front();
        }
        self.past.push_back((x, y));
        self.pairs += 1;
        if self.fired_at.is_none() && self.log_evidence() >= self.log_threshold {
            self.fired_at = Some(self.pairs);
        }
    }

    /// ln of the average wealth: the e-value of "no shift" so far.
    pub fn log_evidence(&self) -> f64 {
        let top = self.log_wealth.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let s: f64 = self.log_wealth.iter().map(|l| (l - top).exp()).sum();
        top + (s / BETS.len() as f64).ln()
    }

    /// ln(1/δ).
    pub fn log_threshold(&self) -> f64 {
        self.log_threshold
    }

    /// The pair count at which the evidence first reached 1/δ (latched).
    pub fn fired_at(&self) -> Option<u64> {
        self.fired_at
    }

    /// True when `other` was made with the same bandwidth, memory and δ (its evidence is
    /// evidence for the same test).
    pub fn same_test(&self, other: &ShiftBetting) -> bool {
        (self.inv_two_sigma2, self.memory, self.log_threshold)
            == (other.inv_two_sigma2, other.memory, other.log_threshold)
    }

    pub fn pairs(&self) -> u64 {
        self.pairs
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::seeded::Seeded;

    fn normal(rng: &mut Seeded) -> f64 {
        let u = 1.0 - rng.uniform();
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * rng.uniform()).cos()
    }

    fn point(rng: &mut Seeded, shift: f64) -> Point {
        Point { numeric: vec![normal(rng) + shift, normal(rng)], categorical: vec![] }
    }

    /// Stream `pairs` pairs, the current side shifted by `shift` from pair `change` on; the pair
    /// count at the alarm, if any.
    fn stream(seed: u64, pairs: u64, change: u64, shift: f64) -> Option<u64> {
        let mut rng = Seeded::new(seed);
        // σ = 1.67, the median distance between two 2-D standard normals: their difference is
        // N(0, 2I), so the squared distance is 2·χ²₂, with median 4 ln 2 (√(4 ln 2) = 1.665).
        let mut t = ShiftBetting::new(1.67, 100, 0.05);
        for i in 0..pairs {
            let x = point(&mut rng, 0.0);
            let y = point(&mut rng, if i >= change { shift } else { 0.0 });
            t.push(x, y);
            if t.fired_at().is_some() {
                break;
            }
        }
        t.fired_at()
    }

    /// Under the null, P(ever a false alarm) ≤ δ: on 400 seeded streams of 2000 pairs the
    /// alarms stay within 400·δ + 3 standard deviations (Ville's inequality makes the true rate
    /// lower still).
    #[test]
    fn false_alarms_on_null_streams_stay_within_delta() {
        let streams = 400u64;
        let alarms = (0..streams).filter(|&s| stream(s, 2000, u64::MAX, 0.0).is_some()).count();
        let limit = streams as f64 * 0.05 + 3.0 * (streams as f64 * 0.05 * 0.95).sqrt();
        println!("null streams with an alarm: {alarms} of {streams} (limit {limit:.1})");
        assert!((alarms as f64) <= limit, "{alarms} false alarms of {streams}");
    }

    /// After a shift of 0.75 standard deviations in one coordinate at pair 300, the alarm comes
    /// in every one of 100 streams, and not before the change in most.
    #[test]
    fn a_shift_is_caught_soon_after_it_happens() {
        let mut delays = Vec::new();
        let mut early = 0;
        for s in 0..100 {
            match stream(1000 + s, 3000, 300, 0.75) {
                Some(at) if at < 300 => early += 1,
                Some(at) => delays.push(at - 300),
                None => panic!("stream {s}: no alarm in 2700 shifted pairs"),
            }
        }
        delays.sort_unstable();
        let median = delays[delays.len() / 2];
        println!(
            "alarm delay after the shift: median {median} pairs, max {}; {early} before it",
            delays.last().unwrap()
        );
        assert!(early <= 10, "{early} alarms before the change");
        assert!(median < 300, "median delay {median}");
    }
}
