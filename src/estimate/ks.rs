//! The two-sample Kolmogorov–Smirnov test, two-sided, as scipy.stats.ks_2samp computes it: the
//! statistic D = sup |F_m − G_n| over the pooled values (ties handled by counting every value
//! ≤ x), and the exact p-value of D under the null for continuous data. Pure.

/// The statistic and its p-value.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Ks {
    pub statistic: f64,
    pub p_value: f64,
    /// True when the p-value is exact (the lattice-path count); false for the asymptotic
    /// Kolmogorov distribution used above [`EXACT_MAX`] per side.
    pub exact: bool,
}

/// Up to this many points per side the p-value is exact, as scipy's `method="auto"` does.
pub const EXACT_MAX: usize = 10_000;

/// D and its two-sided p-value. Both samples must be non-empty and free of NaN.
pub fn two_sample(a: &[f64], b: &[f64]) -> Ks {
    let mut x = a.to_vec();
    let mut y = b.to_vec();
    x.sort_by(f64::total_cmp);
    y.sort_by(f64::total_cmp);
    let (m, n) = (x.len(), y.len());
    assert!(m > 0 && n > 0, "ks needs two non-empty samples");
    // D·m·n = max |i·n − j·m| over the steps of the merged order, evaluated after every run of
    // equal values (integers: no rounding in the statistic).
    let (mut i, mut j, mut top) = (0usize, 0usize, 0i128);
    while i < m || j < n {
        let v = match (x.get(i), y.get(j)) {
            (Some(a), Some(b)) => a.min(*b),
            (Some(a), None) => *a,
            (None, Some(b)) => *b,
            (None, None) => unreachable!(),
        };
        while i < m && x[i] <= v {
            i += 1;
        }
        while j < n && y[j] <= v {
            j += 1;
        }
        top = top.max((i as i128 * n as i128 - j as i128 * m as i128).abs());
    }
    let statistic = top as f64 / (m as f64 * n as f64);
    if top == 0 {
        return Ks { statistic, p_value: 1.0, exact: true };
    }
    if m.max(n) <= EXACT_MAX {
        Ks { statistic, p_value: exact_p(m, n, top), exact: true }
    } else {
        let en = m as f64 * n as f64 / (m + n) as f64;
        Ks { statistic, p_value: kolmogorov_sf(en.sqrt() * statistic), exact: false }
    }
}

/// P(D·m·n ≥ h) under the null: every order of the m + n points is equally likely, so the
/// merged order is a uniform lattice path from (0, 0) to (m, n). The probability of first
/// reaching a point with |i·n − j·m| ≥ h is summed over those points, step probabilities
/// (m − i)/(m + n − i − j) and (n − j)/(m + n − i − j). Summing the exits (rather than 1 − P(stay
/// inside)) keeps small p-values accurate. O(m·n) time, O(n) memory.
fn exact_p(m: usize, n: usize, h: i128) -> f64 {
    let outside = |i: usize, j: usize| (i as i128 * n as i128 - j as i128 * m as i128).abs() >= h;
    // row[j] = P(reach (i, j) with every earlier point inside).
    let mut row = vec![0.0f64; n + 1];
    row[0] = 1.0;
    let mut p = 0.0;
    for i in 0..=m {
        for j in 0..=n {
            if i == 0 && j == 0 {
                continue;
            }
            // row[j] still holds (i − 1, j); row[j − 1] already holds (i, j − 1).
            let from_left = if i > 0 { row[j] * (m - (i - 1)) as f64 / (m + n - (i - 1) - j) as f64 } else { 0.0 };
            let from_down = if j > 0 { row[j - 1] * (n - (j - 1)) as f64 / (m + n - i - (j - 1)) as f64 } else { 0.0 };
            let v = from_left + from_down;
            if outside(i, j) {
                p += v;
                row[j] = 0.0;
            } else {
                row[j] = v;
            }
        }
    }
    p.clamp(0.0, 1.0)
}

/// The Kolmogorov distribution's survival function, 2 Σ_{k≥1} (−1)^{k−1} e^{−2k²x²}.
fn kolmogorov_sf(x: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    let mut s = 0.0;
    for k in 1..200 {
        let kf = k as f64;
        let t = (-2.0 * kf * kf * x * x).exp();
        s += if k % 2 == 1 { t } else { -t };
        if t < 1e-18 {
            break;
        }
    }
    (2.0 * s).clamp(0.0, 1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Check values from scipy's own test suite (scipy/stats/tests/test_stats.py,
    /// TestKSTwoSamples: testTwoVsFour, test100_110, testRepeatedValues).
    #[test]
    fn scipy_test_suite_values() {
        let r = two_sample(&[1.01, 2.01], &[1.0, 2.0, 3.0, 4.0]);
        assert_eq!(r.statistic, 0.5);
        assert!((r.p_value - 14.0 / 15.0).abs() < 1e-14, "{}", r.p_value);
        let a: Vec<f64> = (0..100).map(|i| 1.0 + 99.0 * i as f64 / 99.0).collect();
        let b: Vec<f64> = (0..110).map(|i| 1.0 + 99.0 * i as f64 / 109.0 + 20.1).collect();
        let r = two_sample(&a, &b);
        assert!((r.statistic - 232.0 / 1100.0).abs() < 1e-15);
        assert!((r.p_value - 0.015739183865607353).abs() < 1e-12, "{}", r.p_value);
        let x: Vec<f64> = [2.0; 3].iter().chain(&[3.0; 4]).chain(&[5.0; 5]).chain(&[6.0; 4]).copied().collect();
        let y: Vec<f64> = x.iter().map(|v| v + 1.0).collect();
        let r = two_sample(&x, &y);
        assert!((r.statistic - 5.0 / 16.0).abs() < 1e-15);
        assert!((r.p_value - 0.4262934613454952).abs() < 1e-12, "{}", r.p_value);
        assert!(r.exact);
    }
}
