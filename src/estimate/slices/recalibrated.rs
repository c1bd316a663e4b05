//! A decision threshold re-tuned on the same window: the uniform bound over every threshold.

use super::*;

/// The uniform bound over a re-tuned decision threshold (docs/methods.md §3.4 a): the classifier
/// predicts 1 when score > t, loss l_t = 1[(score > t) ≠ y]. With t chosen on the same window
/// (for example to minimise its error), the fixed-predictor bounds no longer apply; Theorem U1
/// over the class {l_t : t} does: R(t) ≤ R_n(t) + ε for every t at once.
#[derive(Clone, Debug, PartialEq)]
pub struct Recalibrated {
    /// The threshold with the smallest window error (`None`: below every score, all predicted 1).
    pub threshold: Option<f64>,
    pub empirical_risk: f64,
    pub rademacher: f64,
    pub sign_draws: usize,
    pub deviation: f64,
    /// empirical_risk + deviation, capped at 1: valid whichever threshold was picked.
    pub upper: f64,
}

/// Σ s_i l_t(z_i) = Σ s_i (1 − y_i) + Σ_{score_i ≤ t} s_i (2 y_i − 1), so the supremum over t is
/// Σ s_i (1 − y_i) plus the max prefix sum of s_i (2 y_i − 1) in score order, ties grouped.
/// `groups` are the tie groups (row indices) in increasing score order.
pub(super) fn threshold_sup(groups: &[Vec<u32>], y: &[bool], s: &[f64]) -> f64 {
    let base: f64 = s.iter().zip(y).filter(|(_, &yi)| !yi).map(|(si, _)| si).sum();
    let g: Vec<f64> = groups
        .iter()
        .map(|rows| rows.iter().map(|&i| s[i as usize] * if y[i as usize] { 1.0 } else { -1.0 }).sum())
        .collect();
    base + max_prefix(&g)
}

pub fn recalibrated(scores: &[f64], y: &[bool], k: usize, delta: f64, rng: &mut Seeded) -> Recalibrated {
    let n = scores.len();
    let mut order: Vec<u32> = (0..n as u32).collect();
    order.sort_by(|&a, &b| scores[a as usize].total_cmp(&scores[b as usize]));
    let mut groups: Vec<Vec<u32>> = Vec::new();
    let mut values: Vec<f64> = Vec::new();
    for &i in &order {
        let v = scores[i as usize];
        if values.last() != Some(&v) {
            values.push(v);
            groups.push(Vec::new());
        }
        groups.last_mut().expect("pushed").push(i);
    }
    // Window errors for t below every score (all predicted 1), then t = each unique score.
    let mut errors = y.iter().filter(|&&yi| !yi).count() as i64;
    let (mut best, mut best_t) = (errors, None);
    for (v, rows) in values.iter().zip(&groups) {
        for &i in rows {
            errors += if y[i as usize] { 1 } else { -1 };
        }
        if errors < best {
            best = errors;
            best_t = Some(*v);
        }
    }
    let mut s = vec![0.0; n];
    let mut total = 0.0;
    for _ in 0..k.max(1) {
        for si in s.iter_mut() {
            *si = rng.sign();
        }
        let sign_mean = s.iter().sum::<f64>() / n as f64;
        total += threshold_sup(&groups, y, &s) / n as f64 - 0.5 * sign_mean;
    }
    let rademacher = total / k.max(1) as f64;
    let deviation = 2.0 * rademacher + ((9.0 + 4.0 / k.max(1) as f64) * (1.0 / delta).ln() / (2.0 * n as f64)).sqrt();
    let empirical_risk = best as f64 / n as f64;
    Recalibrated {
        threshold: best_t,
        empirical_risk,
        rademacher,
        sign_draws: k.max(1),
        deviation,
        upper: (empirical_risk + deviation).min(1.0),
    }
}
