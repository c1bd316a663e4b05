//! Seeded time-uniform simulations of the anytime-valid guarantees.
//!
//! Limits are δ + 3σ, σ = sqrt(δ(1 − δ)/R), the binomial standard error of R Bernoulli(δ)
//! trials. True means are known by construction: Bernoulli(p) has mean p; Beta(1, b), drawn by
//! inversion x = 1 − (1 − u)^(1/b), has mean 1/(1 + b).

use rand::rngs::Xoshiro256PlusPlus;
use rand::{RngExt, SeedableRng};
use riskbound::estimate::anytime::evidence::ChangeDetector;
use riskbound::estimate::anytime::sequence::HoeffdingBoundary;
use riskbound::estimate::anytime::{Sequence, Tracker, TrackerSpec};

const DELTA: f64 = 0.05;

fn limit(reps: usize) -> f64 {
    DELTA + 3.0 * (DELTA * (1.0 - DELTA) / reps as f64).sqrt()
}

fn spec(grid: u32, boundary: HoeffdingBoundary) -> TrackerSpec {
    TrackerSpec {
        delta: DELTA,
        loss_max: 1.0,
        grid,
        hoeffding_boundary: boundary,
        sla_max_risk: None,
        shift_max_risk: None,
        change: None,
    }
}

/// The fraction of streams whose sequence ever misses μ on each side. With the running
/// intersection a miss at any t persists, so the state after the last loss tells.
fn ever_missed(binary: bool, mu: f64, n: usize, reps: usize, seed: u64, boundary: HoeffdingBoundary) {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let b = 1.0 / mu - 1.0;
    let mut miss = [[0usize; 2]; 3];
    for _ in 0..reps {
        // A coarse grid keeps the test fast; coarser only widens the betting sequence.
        let mut t = Tracker::new(spec(200, boundary));
        for _ in 0..n {
            let u: f64 = rng.random();
            t.push(if binary { f64::from(u < mu) } else { 1.0 - (1.0 - u).powf(1.0 / b) });
        }
        for (i, s) in Sequence::ALL.into_iter().enumerate() {
            let bd = t.bounds(s);
            miss[i][0] += usize::from(mu < bd.lower);
            miss[i][1] += usize::from(mu > bd.upper);
        }
    }
    for (i, s) in Sequence::ALL.into_iter().enumerate() {
        for (side, name) in ["lower", "upper"].iter().enumerate() {
            let rate = miss[i][side] as f64 / reps as f64;
            assert!(rate <= limit(reps), "{s} binary={binary} mu={mu}: {name} side missed in {rate} of streams");
        }
    }
}

#[test]
fn sequences_cover_the_mean_at_every_time_bernoulli() {
    ever_missed(true, 0.1, 2000, 600, 101, HoeffdingBoundary::Stitched);
    ever_missed(true, 0.5, 2000, 600, 102, HoeffdingBoundary::NormalMixture);
}

#[test]
fn sequences_cover_the_mean_at_every_time_continuous() {
    ever_missed(false, 0.2, 2000, 600, 103, HoeffdingBoundary::Stitched);
}

/// The SLA test at the boundary of its null (risk exactly θ) and under a drifting null (risk
/// alternating between θ/2 and θ in blocks): P(ever alarm) ≤ δ needs no stationarity.
#[test]
fn sla_test_false_alarms_stay_within_delta() {
    let reps = 1000;
    for (seed, drifting) in [(201u64, false), (202, true)] {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
        let theta = 0.1;
        let mut alarms = 0;
        for _ in 0..reps {
            let mut t = Tracker::new(TrackerSpec { sla_max_risk: Some(theta), ..spec(2, HoeffdingBoundary::Stitched) });
            for i in 0..4000 {
                let p = if drifting && (i / 250) % 2 == 0 { theta / 2.0 } else { theta };
                t.push(f64::from(rng.random::<f64>() < p));
            }
            alarms += usize::from(t.exceeded().unwrap().alarm_at().is_some());
        }
        let rate = alarms as f64 / reps as f64;
        assert!(rate <= limit(reps), "drifting={drifting}: false alarm rate {rate}");
    }
}

/// The change detector with A = m/δ: P(a false alarm in the first m labels) ≤ δ at the
/// boundary null; and after a real rise (0.10 → 0.20 at label 3000, θ = 0.15, the step of
/// docs/methods.md §2.8) it alarms in nearly every stream.
#[test]
fn change_detector_keeps_its_budget_and_catches_a_rise() {
    let reps = 1000;
    let m = 3000u64;
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(301);
    let mut alarms = 0;
    for _ in 0..reps {
        let a = ChangeDetector::threshold_for(m, DELTA);
        let mut t = Tracker::new(TrackerSpec { change: Some((0.1, a)), ..spec(2, HoeffdingBoundary::Stitched) });
        for _ in 0..m {
            t.push(f64::from(rng.random::<f64>() < 0.1));
        }
        alarms += usize::from(t.change().unwrap().alarm_at().is_some());
    }
    let rate = alarms as f64 / reps as f64;
    assert!(rate <= limit(reps), "false alarm rate {rate} within the first {m} labels");

    let reps = 200;
    let (mut caught, mut early) = (0, 0);
    for _ in 0..reps {
        let a = ChangeDetector::threshold_for(10_000, DELTA);
        let mut t = Tracker::new(TrackerSpec { change: Some((0.15, a)), ..spec(2, HoeffdingBoundary::Stitched) });
        for i in 0..8000 {
            t.push(f64::from(rng.random::<f64>() < if i < 3000 { 0.10 } else { 0.20 }));
        }
        match t.change().unwrap().alarm_at() {
            Some(at) if at <= 3000 => early += 1,
            Some(_) => caught += 1,
            None => {}
        }
    }
    assert!(early as f64 / reps as f64 <= limit(reps), "{early} alarms before the rise");
    assert!(caught as f64 >= 0.95 * reps as f64, "caught only {caught} of {reps} rises within 5000 labels");
}
