//! The slice certificates by seeded simulation: the uniform deviation ε covers the true
//! supremum of |P g_S − P_n g_S| over the class in at least 1 − δ of windows; under the boundary
//! null (every slice's risk exactly θ) no slice is certified as violating more often than δ
//! allows; and a planted bad interval is found and certified.
//!
//! Limits are δ + 3σ, σ = sqrt(δ(1 − δ)/R) (binomial standard error of R windows).

use riskbound::estimate::slices::{self, max_prefix, max_subarray, max_suffix, Scanner, Seeded, Slice, Table};

const DELTA: f64 = 0.05;

fn limit(reps: usize) -> f64 {
    DELTA + 3.0 * (DELTA * (1.0 - DELTA) / reps as f64).sqrt()
}

/// x uniform on the grid {1/G, …, 1}; loss Bernoulli(p(x)). Returns the table and the grid.
fn window(rng: &mut Seeded, n: usize, p: &dyn Fn(f64) -> f64) -> Table {
    const G: u64 = 1000;
    let mut u = || (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64;
    let mut xs = Vec::with_capacity(n);
    let mut ls = Vec::with_capacity(n);
    for _ in 0..n {
        let x = ((u() * G as f64).floor() + 1.0) / G as f64;
        ls.push(f64::from(u() < p(x)));
        xs.push(x);
    }
    Table { losses: ls, categorical: vec![], numeric: vec![("x".into(), xs)] }
}

#[test]
fn uniform_deviation_covers_the_true_supremum() {
    // The class {(l − θ)·1_S}: thresholds and intervals on x. With x uniform on a grid of
    // 1000 values the population mass of each value is known exactly, so the true supremum of
    // (P_n − P) g_S over the class — the side the certificate P g_S ≥ P_n g_S − ε relies on —
    // is a max prefix / suffix / subarray over the grid.
    let theta = 0.15;
    let p = |x: f64| if x > 0.3 && x <= 0.4 { 0.3 } else { 0.08 };
    let reps = 300;
    let mut rng = Seeded::new(77);
    let mut misses = 0;
    let (mut var_misses, mut var_eps, mut u1_eps) = (0, Vec::new(), Vec::new());
    for _ in 0..reps {
        let t = window(&mut rng, 1000, &p);
        let scan = Scanner::new(&t, None, 1);
        let excess: Vec<f64> = t.losses.iter().map(|l| l - theta).collect();
        let u = slices::uniform(&scan, &excess, theta, 20, DELTA, &mut rng);
        let n = t.losses.len() as f64;
        let mut d = vec![0.0; 1000];
        for (v, dv) in d.iter_mut().enumerate() {
            let x = (v as f64 + 1.0) / 1000.0;
            *dv = (p(x) - theta) / 1000.0;
        }
        for (x, l) in t.numeric[0].1.iter().zip(&t.losses) {
            d[(x * 1000.0).round() as usize - 1] -= (l - theta) / n;
        }
        // d holds (P − P_n) per grid value; the side we need is P_n − P.
        let neg: Vec<f64> = d.iter().map(|v| -v).collect();
        let sup = [max_prefix(&neg), max_suffix(&neg), max_subarray(&neg)].into_iter().fold(0.0, f64::max);
        misses += usize::from(sup > u.deviation);
        let mean = t.losses.iter().sum::<f64>() / n;
        let ev = slices::variance_sensitive(&u, t.losses.len(), theta, mean, DELTA);
        var_misses += usize::from(sup > ev);
        var_eps.push(ev);
        u1_eps.push(u.deviation);
    }
    let rate = misses as f64 / reps as f64;
    let var_rate = var_misses as f64 / reps as f64;
    let avg = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    eprintln!(
        "uniform ε missed the true supremum in {misses} of {reps} windows (Theorem U1, mean ε {:.4}); \
         the variance-sensitive ε in {var_misses} (mean ε {:.4})",
        avg(&u1_eps),
        avg(&var_eps)
    );
    assert!(rate <= limit(reps), "ε missed the true supremum in {rate} of windows");
    assert!(var_rate <= limit(reps), "variance-sensitive ε missed the true supremum in {var_rate} of windows");
}

#[test]
fn no_slice_is_certified_under_the_boundary_null() {
    // Every slice has risk exactly θ: any certified violation is false.
    let theta = 0.15;
    let reps = 200usize;
    let mut rng = Seeded::new(78);
    let mut false_alarms = 0;
    for r in 0..reps {
        let mut t = window(&mut rng, 2000, &|_| theta);
        let mut u = || (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64;
        let region: Vec<String> = (0..2000).map(|_| ["a", "b", "c", "d"][(u() * 4.0) as usize].to_string()).collect();
        t.categorical.push(("region".into(), region));
        let plan = slices::Plan { theta, delta: DELTA, top: 10, seed: r as u64, sign_draws: 20, depth: 1 };
        let report = slices::analyze(&t, &plan);
        false_alarms += usize::from(report.slices.iter().any(|s| s.violates_sla));
    }
    let rate = false_alarms as f64 / reps as f64;
    eprintln!("boundary null: a slice was certified in {false_alarms} of {reps} windows");
    assert!(rate <= limit(reps), "a slice was falsely certified in {rate} of windows");
}

#[test]
fn a_planted_bad_interval_is_found_and_certified() {
    // The scenario of docs/methods.md §3.7: risk 0.30 on 0.30 < x ≤ 0.40, 0.08 elsewhere, θ = 0.15.
    let theta = 0.15;
    let mut rng = Seeded::new(79);
    let mut found = 0;
    for seed in 0..10 {
        let t = window(&mut rng, 20_000, &|x| if x > 0.3 && x <= 0.4 { 0.3 } else { 0.08 });
        let report = slices::analyze(&t, &slices::Plan { theta, delta: DELTA, top: 5, seed, sign_draws: 50, depth: 1 });
        let top = &report.slices[0];
        if let Slice::Interval { low, high, .. } = top.slice {
            // Overlaps the planted interval by at least 80% of its width, and is certified.
            let overlap = (high.min(0.4) - low.max(0.3)).max(0.0);
            if overlap >= 0.08 && top.violates_sla && top.lower > theta {
                found += 1;
            }
        }
    }
    eprintln!("planted interval found and certified in {found} of 10 windows");
    assert!(found >= 9, "the planted interval was found and certified in {found} of 10 windows");
}
