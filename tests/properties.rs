//! Property tests of the bounds engine (proptest): ordering and range, monotonicity in the
//! error count, and no widening with more samples at the same mean.

use proptest::prelude::*;
use riskbound::estimate::{self, Bounds, Confidence, LossSummary, Method};

const EPS: f64 = 1e-12;

fn binary(k: u64, n: u64, loss_max: f64) -> LossSummary {
    let mut s = LossSummary::keeping_losses(loss_max);
    // Interleave errors evenly so the betting order is not adversarial.
    for i in 0..n {
        let err = (i + 1) * k / n > i * k / n;
        s.push(if err { loss_max } else { 0.0 });
    }
    s
}

fn all(s: &LossSummary, c: f64) -> Vec<(Method, Bounds)> {
    let conf = Confidence::new(c).unwrap();
    Method::ALL.into_iter().filter(|m| m.applies(s)).map(|m| (m, estimate::bounds(m, s, conf).unwrap())).collect()
}

/// The methods whose bounds depend only on (n, k): betting also depends on the order of the
/// losses and on bets learned from them, so these two monotonicity laws are not its to keep.
const SUFFICIENT: [Method; 4] = [Method::Hoeffding, Method::EmpiricalBernstein, Method::ClopperPearson, Method::Kl];

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn bounds_are_ordered_and_in_range_for_binary_losses(n in 1u64..400, frac in 0.0f64..=1.0, c in 0.5f64..0.9999, bmax in prop::sample::select(vec![1.0, 2.5, 100.0])) {
        let k = (frac * n as f64).round() as u64;
        let s = binary(k, n, bmax);
        for (m, b) in all(&s, c) {
            prop_assert!(0.0 <= b.lower && b.lower <= s.mean() + EPS * bmax, "{m}: lower {} mean {}", b.lower, s.mean());
            prop_assert!(s.mean() <= b.upper + EPS * bmax && b.upper <= bmax, "{m}: upper {} mean {}", b.upper, s.mean());
        }
    }

    #[test]
    fn bounds_are_ordered_and_in_range_for_any_losses(xs in prop::collection::vec(0.0f64..=1.0, 1..200), c in 0.5f64..0.9999) {
        let mut s = LossSummary::keeping_losses(1.0);
        for &x in &xs { s.push(x); }
        for (m, b) in all(&s, c) {
            prop_assert!(0.0 <= b.lower && b.lower <= s.mean() + EPS, "{m}: {b:?} mean {}", s.mean());
            prop_assert!(s.mean() <= b.upper + EPS && b.upper <= 1.0, "{m}: {b:?} mean {}", s.mean());
        }
    }

    #[test]
    fn more_errors_never_lower_either_bound(n in 2u64..500, frac in 0.0f64..1.0, c in 0.5f64..0.9999) {
        let k = ((frac * n as f64) as u64).min(n - 1);
        let conf = Confidence::new(c).unwrap();
        let (s0, s1) = (binary(k, n, 1.0), binary(k + 1, n, 1.0));
        for m in SUFFICIENT {
            let (b0, b1) = (estimate::bounds(m, &s0, conf).unwrap(), estimate::bounds(m, &s1, conf).unwrap());
            prop_assert!(b1.lower >= b0.lower - EPS, "{m} n={n} k={k}: lower {} -> {}", b0.lower, b1.lower);
            prop_assert!(b1.upper >= b0.upper - EPS, "{m} n={n} k={k}: upper {} -> {}", b0.upper, b1.upper);
        }
    }

    #[test]
    fn more_samples_at_the_same_mean_never_widen(n in 1u64..400, frac in 0.0f64..=1.0, mult in 2u64..6, c in 0.5f64..0.9999) {
        let k = (frac * n as f64).round() as u64;
        let conf = Confidence::new(c).unwrap();
        let (s0, s1) = (binary(k, n, 1.0), binary(k * mult, n * mult, 1.0));
        for m in [Method::Hoeffding, Method::Kl, Method::ClopperPearson] {
            let (b0, b1) = (estimate::bounds(m, &s0, conf).unwrap(), estimate::bounds(m, &s1, conf).unwrap());
            prop_assert!(b1.upper <= b0.upper + EPS, "{m} n={n} k={k} x{mult}: upper {} -> {}", b0.upper, b1.upper);
            prop_assert!(b1.lower >= b0.lower - EPS, "{m} n={n} k={k} x{mult}: lower {} -> {}", b0.lower, b1.lower);
        }
    }
}
