//! Do label delays depend on outcomes? The two-sample Kolmogorov–Smirnov test of the delays of
//! the labelled samples with a bad outcome against those with a good one (0-1 loss: error against
//! correct; a bounded loss: above the median loss against at or below it).
//!
//! Censoring. A prediction still waiting has a right-censored delay and an unknown outcome, so it
//! belongs to neither group. Under H0 (the delay is independent of the loss, predictions i.i.d.),
//! whether a label has come by now depends only on its delay and the prediction's age, never on
//! its outcome, so among the labelled samples the outcome is still independent of the delay:
//! given the delays, the outcome labels are exchangeable and the KS statistic has its
//! permutation (two-sample) null. The test is therefore valid on the delays that did arrive. What
//! censoring costs is power: while no label of a bad outcome has come back, there is nothing to
//! compare, and only the delay-robust bounds protect the SLA state.
//!
//! The p-value is the asymptotic Kolmogorov distribution with Stephens' small-sample correction,
//! Q((√nₑ + 0.12 + 0.11/√nₑ)·D), nₑ = n₁n₂/(n₁+n₂) (Stephens 1970, JRSS-B 32; Press et al.,
//! Numerical Recipes, §14.3). Ties (delays equal to the millisecond) make it conservative.
//! It is a per-look test: a ticket, not a page.

/// The outcome groups' names, bad first: the `outcome` label values.
pub const BINARY_GROUPS: [&str; 2] = ["error", "correct"];
pub const BOUNDED_GROUPS: [&str; 2] = ["above_median", "at_or_below_median"];

/// One group's delays, summarised.
#[derive(Clone, Debug, PartialEq)]
pub struct DelayGroup {
    pub outcome: &'static str,
    pub n: u64,
    /// Median and 90th percentile of the delays, seconds (`None` when the group is empty).
    pub median_s: Option<f64>,
    pub p90_s: Option<f64>,
}

/// The test's result.
#[derive(Clone, Debug, PartialEq)]
pub struct DelayDependence {
    pub groups: [DelayGroup; 2],
    /// KS statistic D and its p-value (`None` while a group is empty).
    pub statistic: Option<f64>,
    pub p_value: Option<f64>,
    /// The level α the test is run at.
    pub level: f64,
    /// p ≤ α.
    pub dependent: bool,
}

/// Q_KS(λ) = 2 Σ_{k≥1} (−1)^{k−1} e^{−2k²λ²}, the Kolmogorov survival function.
pub fn kolmogorov_sf(lambda: f64) -> f64 {
    if lambda <= 0.0 {
        return 1.0;
    }
    if lambda < 0.27 {
        // The alternating series converges slowly here and the value is 1 to double precision.
        return 1.0;
    }
    let (mut sum, mut sign) = (0.0_f64, 1.0_f64);
    for k in 1..=100 {
        let kf = k as f64;
        let term = (-2.0 * kf * kf * lambda * lambda).exp();
        sum += sign * term;
        if term < 1e-18 {
            break;
        }
        sign = -sign;
    }
    (2.0 * sum).clamp(0.0, 1.0)
}

/// The two-sample KS statistic D = sup |F₁ − F₂| (ties handled by moving past every equal value
/// on both sides before comparing, as scipy's `ks_2samp` does).
pub fn ks_statistic(a: &mut [f64], b: &mut [f64]) -> f64 {
    a.sort_unstable_by(f64::total_cmp);
    b.sort_unstable_by(f64::total_cmp);
    let (na, nb) = (a.len() as f64, b.len() as f64);
    let (mut i, mut j, mut d) = (0usize, 0usize, 0.0_f64);
    while i < a.len() && j < b.len() {
        let v = a[i].min(b[j]);
        while i < a.len() && a[i] <= v {
            i += 1;
        }
        while j < b.len() && b[j] <= v {
            j += 1;
        }
        d = d.max((i as f64 / na - j as f64 / nb).abs());
    }
    d
}

/// The asymptotic two-sided p-value of D for samples of sizes n1 and n2 (Stephens' correction).
pub fn ks_p_value(d: f64, n1: u64, n2: u64) -> f64 {
    let ne = (n1 as f64 * n2 as f64) / (n1 + n2) as f64;
    let s = ne.sqrt();
    kolmogorov_sf((s + 0.12 + 0.11 / s) * d)
}

fn quantile(sorted: &[f64], q: f64) -> Option<f64> {
    if sorted.is_empty() {
        return None;
    }
    let i = ((sorted.len() as f64 * q).ceil() as usize).clamp(1, sorted.len()) - 1;
    Some(sorted[i])
}

/// Tests whether delays (ms) depend on the losses (in [0, B]) at level `alpha`. `binary` says
/// the losses are 0 or B.
pub fn test(rows: &[(f64, i64)], loss_max: f64, binary: bool, alpha: f64) -> DelayDependence {
    let (names, bad): ([&'static str; 2], Box<dyn Fn(f64) -> bool>) = if binary {
        (BINARY_GROUPS, Box::new(move |l: f64| l >= loss_max))
    } else {
        let mut losses: Vec<f64> = rows.iter().map(|r| r.0).collect();
        losses.sort_unstable_by(f64::total_cmp);
        let median = quantile(&losses, 0.5).unwrap_or(0.0);
        (BOUNDED_GROUPS, Box::new(move |l: f64| l > median))
    };
    let (mut a, mut b): (Vec<f64>, Vec<f64>) = (Vec::new(), Vec::new());
    for &(l, d) in rows {
        let s = d.max(0) as f64 / 1000.0;
        if bad(l) {
            a.push(s);
        } else {
            b.push(s);
        }
    }
    let (statistic, p_value) = if a.is_empty() || b.is_empty() {
        (None, None)
    } else {
        let d = ks_statistic(&mut a, &mut b);
        (Some(d), Some(ks_p_value(d, a.len() as u64, b.len() as u64)))
    };
    let group = |outcome, v: &[f64]| DelayGroup {
        outcome,
        n: v.len() as u64,
        median_s: quantile(v, 0.5),
        p90_s: quantile(v, 0.9),
    };
    DelayDependence {
        groups: [group(names[0], &a), group(names[1], &b)],
        statistic,
        p_value,
        level: alpha,
        dependent: p_value.is_some_and(|p| p <= alpha),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn statistic_matches_scipy_examples() {
        // scipy/scipy scipy/stats/tests/test_stats.py, TestKSTwoSamples: testTwoVsFour gives
        // D = 1/2; test100_110 gives D = 232/1100; testRepeatedValues gives D = 5/16.
        let d = ks_statistic(&mut [1.01, 2.01], &mut [1.0, 2.0, 3.0, 4.0]);
        assert!((d - 0.5).abs() < 1e-15);
        let mut x: Vec<f64> = (0..100).map(|i| 1.0 + 99.0 * i as f64 / 99.0).collect();
        let mut y: Vec<f64> = (0..110).map(|i| 1.0 + 99.0 * i as f64 / 109.0 + 20.1).collect();
        assert!((ks_statistic(&mut x, &mut y) - 232.0 / 1100.0).abs() < 1e-12);
        let base = [[2.0; 3].as_slice(), &[3.0; 4], &[5.0; 5], &[6.0; 4]].concat();
        let mut shifted: Vec<f64> = base.iter().map(|v| v + 1.0).collect();
        assert!((ks_statistic(&mut base.clone(), &mut shifted) - 5.0 / 16.0).abs() < 1e-15);
    }

    #[test]
    fn kolmogorov_sf_matches_closed_values() {
        // Q(λ) at λ = 1.358 is the textbook 5% point of the Kolmogorov distribution (Smirnov
        // 1948 table; from memory); scipy.special.kolmogorov(1.0) = 0.26999967167735456
        // (scipy 1.17.1, computed once and quoted).
        assert!((kolmogorov_sf(1.358) - 0.05).abs() < 2e-4);
        assert!((kolmogorov_sf(1.0) - 0.26999967167735456).abs() < 1e-12);
        assert_eq!(kolmogorov_sf(0.1), 1.0);
    }
}
