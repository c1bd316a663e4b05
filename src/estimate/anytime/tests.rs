use super::sequence::{BettingCs, GridSide};
use super::*;

fn lcg(seed: u64) -> impl FnMut() -> f64 {
    let mut s = seed;
    move || {
        s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// The textbook betting upper bound at time t: bisection on max_{s≤t} ln K⁻_s(m), logs summed
/// one by one (docs/methods.md §1.6, BET-UPPER with the sequence bets and caps c/(1 − m)).
fn exact_upper(xs: &[f64], alpha: f64) -> f64 {
    let mut plug = PlugIn::default();
    let bets: Vec<f64> = xs
        .iter()
        .map(|&x| {
            let b = plug.bet((1.0 / alpha).ln());
            plug.push(x);
            b
        })
        .collect();
    let rejected = |m: f64| {
        let (mut acc, mut best) = (0.0_f64, 0.0_f64);
        for (&x, &b) in xs.iter().zip(&bets) {
            let l = if m < 1.0 { b.min(TRUNCATION / (1.0 - m)) } else { b };
            acc += (1.0 - l * (x - m)).ln();
            best = best.max(acc);
        }
        best >= (1.0 / alpha).ln()
    };
    if !rejected(1.0) {
        return 1.0;
    }
    let (mut lo, mut hi) = (0.0, 1.0);
    while hi - lo > 1e-12 {
        let mid = 0.5 * (lo + hi);
        if rejected(mid) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    hi
}

#[test]
fn grid_sequence_is_within_one_cell_above_the_exact_bound() {
    let mut u = lcg(7);
    let xs: Vec<f64> = (0..3000).map(|_| if u() < 0.12 { 1.0 } else { u() * 0.3 }).collect();
    let g = 1000;
    let mut cs = BettingCs::new(g);
    let mut plug = PlugIn::default();
    for (t, &x) in xs.iter().enumerate() {
        let bet = plug.bet((1.0f64 / 0.05).ln());
        cs.push(x, bet, 20.0);
        plug.push(x);
        if [9, 99, 999, 2999].contains(&t) {
            let exact = exact_upper(&xs[..=t], 0.05);
            let grid = cs.bounds().upper;
            assert!(grid >= exact - 1e-12 && grid <= exact + 1.0 / g as f64 + 1e-12, "t={t}: {grid} vs {exact}");
        }
    }
}

#[test]
fn dead_points_only_widen() {
    // A side fed zeros kills its low points; its bound must still be what the full grid gives.
    let mut side = GridSide::new(200);
    let mut plug = PlugIn::default();
    for _ in 0..20_000 {
        let bet = plug.bet(20f64.ln());
        side.push(200, 0.0, bet, 20.0);
        plug.push(0.0);
    }
    let exact = exact_upper(&[0.0; 20_000], 0.05);
    assert!(side.upper(200) >= exact && side.upper(200) <= exact + 1.0 / 200.0, "{} vs {exact}", side.upper(200));
}

#[test]
fn zeta_matches_closed_forms_and_scipy() {
    use std::f64::consts::PI;
    // ζ(2) = π²/6 and ζ(4) = π⁴/90 (Euler); ζ(1.4) from scipy.special.zeta(1.4, 1), scipy 1.17.1.
    assert!((boundary::zeta(2.0) - PI * PI / 6.0).abs() < 1e-14);
    assert!((boundary::zeta(4.0) - PI.powi(4) / 90.0).abs() < 1e-14);
    assert!((boundary::zeta(1.4) - 3.1055472779775815).abs() < 1e-13);
}

#[test]
fn a_stored_tracker_resumes_exactly() {
    let spec = TrackerSpec {
        delta: 0.05,
        loss_max: 2.0,
        grid: 500,
        hoeffding_boundary: Default::default(),
        sla_max_risk: Some(0.3),
        shift_max_risk: Some(0.4),
        change: Some((0.3, 1e4)),
    };
    let mut u = lcg(11);
    let xs: Vec<f64> = (0..5000).map(|_| 2.0 * u() * u()).collect();
    let mut whole = Tracker::new(spec.clone());
    let mut split = Tracker::new(spec);
    for (i, &x) in xs.iter().enumerate() {
        whole.push(x);
        split.push(x);
        if i % 977 == 0 {
            let text = serde_json::to_string(&split).unwrap();
            split = serde_json::from_str(&text).unwrap();
        }
    }
    assert_eq!(whole, split);
}

#[test]
fn alarms_latch_and_stay_quiet_on_zeros() {
    let spec = |theta| TrackerSpec {
        delta: 0.01,
        loss_max: 1.0,
        grid: 100,
        hoeffding_boundary: Default::default(),
        sla_max_risk: Some(theta),
        shift_max_risk: None,
        change: Some((theta, 1e3)),
    };
    let mut quiet = Tracker::new(spec(0.2));
    for _ in 0..10_000 {
        quiet.push(0.0);
    }
    assert_eq!(quiet.exceeded().unwrap().alarm_at(), None);
    assert_eq!(quiet.change().unwrap().alarm_at(), None);
    let mut loud = Tracker::new(spec(0.2));
    for i in 0..2000 {
        loud.push(if i % 2 == 0 { 1.0 } else { 0.0 });
    }
    let at = loud.exceeded().unwrap().alarm_at().expect("a risk of 0.5 against θ = 0.2 alarms");
    for _ in 0..5000 {
        loud.push(0.0);
    }
    assert_eq!(loud.exceeded().unwrap().alarm_at(), Some(at), "an alarm stays raised");
    assert!(loud.change().unwrap().alarm_at().is_some());
}
