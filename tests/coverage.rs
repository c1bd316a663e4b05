//! Seeded coverage simulation: for each method, on binary and continuous losses at several true
//! means and sample sizes, the one-sided miss rates P(mu > U) and P(mu < L) stay within
//! delta + 3 sigma, sigma = sqrt(delta (1 - delta) / R) (the binomial standard error of R
//! Bernoulli(delta) trials). The true means are known by construction: Bernoulli(p) has mean p
//! and Beta(1, b), drawn by inversion x = 1 - (1 - u)^(1/b), has mean 1/(1 + b).

use rand::rngs::Xoshiro256PlusPlus;
use rand::{RngExt, SeedableRng};
use riskbound::estimate::{self, Confidence, LossSummary, Method};

const REPS: usize = 2000;
const DELTA: f64 = 0.05;

fn simulate(binary: bool, mu: f64, n: usize, seed: u64) {
    let conf = Confidence::new(1.0 - DELTA).unwrap();
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let b = 1.0 / mu - 1.0;
    let mut miss_upper = [0usize; 5];
    let mut miss_lower = [0usize; 5];
    for _ in 0..REPS {
        let mut s = LossSummary::keeping_losses(1.0);
        for _ in 0..n {
            let u: f64 = rng.random();
            s.push(if binary { f64::from(u < mu) } else { 1.0 - (1.0 - u).powf(1.0 / b) });
        }
        for (i, m) in Method::ALL.into_iter().enumerate() {
            if !m.applies(&s) {
                continue;
            }
            let bd = estimate::bounds(m, &s, conf).unwrap();
            miss_upper[i] += usize::from(mu > bd.upper);
            miss_lower[i] += usize::from(mu < bd.lower);
        }
    }
    let limit = DELTA + 3.0 * (DELTA * (1.0 - DELTA) / REPS as f64).sqrt();
    for (i, m) in Method::ALL.into_iter().enumerate() {
        let (up, lo) = (miss_upper[i] as f64 / REPS as f64, miss_lower[i] as f64 / REPS as f64);
        assert!(up <= limit, "{m} binary={binary} mu={mu} n={n}: upper miss rate {up} > {limit}");
        assert!(lo <= limit, "{m} binary={binary} mu={mu} n={n}: lower miss rate {lo} > {limit}");
    }
}

#[test]
fn binary_losses_small_n() {
    for (i, mu) in [0.05, 0.2, 0.5].into_iter().enumerate() {
        simulate(true, mu, 20, 11 + i as u64);
    }
}

#[test]
fn binary_losses_moderate_n() {
    for (i, mu) in [0.05, 0.2, 0.5].into_iter().enumerate() {
        simulate(true, mu, 300, 21 + i as u64);
    }
}

#[test]
fn continuous_losses_small_n() {
    for (i, mu) in [0.05, 0.2, 0.5].into_iter().enumerate() {
        simulate(false, mu, 20, 31 + i as u64);
    }
}

#[test]
fn continuous_losses_moderate_n() {
    for (i, mu) in [0.05, 0.2, 0.5].into_iter().enumerate() {
        simulate(false, mu, 300, 41 + i as u64);
    }
}
