//! Slices of a window: the scan for the worst ones and the certificates that survive the
//! selection (Bartlett & Mendelson 2002; Bartlett, Bousquet & Mendelson 2005). Pure: rows in, numbers out; signs and splits come from
//! a recorded seed, so every result can be reproduced.
//!
//! The class. For categorical features every value, and conjunctions of up to `depth` of them;
//! for numeric features every threshold {x ≤ t}, {x > t} and interval {a < x ≤ b}, ties grouped
//! (the class restricted to the sample only tells unique values apart). The slice functions are
//! g_S(z) = (l − θ)·1_S(x) with losses scaled to [0, 1]: range [−θ, 1 − θ], width D = 1.
//!
//! The scan (§3.4 a): for a weight vector w, sup_S Σ_{i∈S} w_i is a max group sum (categories),
//! a max prefix or suffix sum (thresholds) or a max subarray (intervals, Kadane) over the unique
//! values in sorted order: O(n) per feature after one sort, O(d·n·(log n + k)) for k weight
//! vectors. The same code computes the scan statistic (w = l − θ) and each Rademacher supremum
//! (w = s·(l − θ)).
//!
//! The certificates, each valid for how the slice was found:
//! - `split-confirm`: discover on a seeded half, confirm on the other half with the exact
//!   binomial bound (0-1 loss) or betting (bounded loss), at δ_split / K over the K slices kept;
//! - `uniform` (Theorem U1 of §3.2, McDiarmid over sample and signs): with probability ≥ 1 − δ,
//!   for every S at once, P g_S ≥ P_n g_S − ε with ε = 2 R̃_k + sqrt((9 + 4/k) ln(1/δ) / (2n)).
//!   P g_S = P(S)(R(S) − θ) > 0 means R(S) > θ, and since P(S) ≤ 1 the risk of S is at least
//!   θ + (P_n g_S − ε) whenever that is positive.
//! - `localized`: the fixed point of a sub-root function built from one sign vector (§4.3). Its
//!   constants are recalled, not confirmed against Bartlett, Bousquet & Mendelson (2005,
//!   Ann. Statist. 33(4), Theorem 4.1), so it is reported as a diagnostic and never certifies.

use std::collections::HashMap;

use super::{betting, binomial, Bounds};
pub use crate::estimate::seeded::Seeded;

mod certificates;
mod kernels;
mod language;
mod recalibrated;
mod scan;

pub use certificates::*;
use kernels::*;
pub use language::*;
pub use recalibrated::*;
pub use scan::*;

#[cfg(test)]
mod tests;

/// What one analysis asks for.
#[derive(Clone, Debug)]
pub struct Plan {
    /// θ scaled to [0, 1].
    pub theta: f64,
    /// Total error probability: half to split-confirm, half to the uniform certificate.
    pub delta: f64,
    pub top: usize,
    pub seed: u64,
    pub sign_draws: usize,
    pub depth: usize,
}

/// One reported slice, in loss units scaled to [0, 1].
#[derive(Clone, Debug)]
pub struct SliceReport {
    pub slice: Slice,
    /// Rows of the whole window in the slice, and their mean loss.
    pub n: u64,
    pub mean: f64,
    pub lower: f64,
    pub upper: f64,
    /// "split-confirm" or "uniform": the certificate behind `lower`/`upper`.
    pub certified_by: &'static str,
    pub violates_sla: bool,
}

/// The analysis of one window.
#[derive(Clone, Debug)]
pub struct Report {
    pub n: usize,
    /// Theorem U1 at half the uniform δ.
    pub uniform: Uniform,
    /// ε of the variance-sensitive form (docs/methods.md §3.3) at the other half.
    pub variance_deviation: f64,
    /// The ε applied to every slice: the smaller of the two (each at half the uniform δ, so
    /// taking the smaller after seeing both is valid by the union bound).
    pub deviation: f64,
    pub localized: Localized,
    /// δ of each certificate: split-confirm spends `split_delta / confirmed` per slice.
    pub split_delta: f64,
    pub confirmed: usize,
    pub uniform_delta: f64,
    pub slices: Vec<SliceReport>,
}

/// Scans `t` for slices whose risk exceeds θ and certifies what it finds (module comment).
pub fn analyze(t: &Table, plan: &Plan) -> Report {
    let n = t.losses.len();
    let binary = t.losses.iter().all(|&l| l == 0.0 || l == 1.0);
    let (split_delta, uniform_delta) = (plan.delta / 2.0, plan.delta / 2.0);
    let mut rng = Seeded::new(plan.seed);
    // The seeded split: discover on half A, confirm on half B.
    let mut perm: Vec<u32> = (0..n as u32).collect();
    for i in (1..n).rev() {
        let j = (rng.next_u64() % (i as u64 + 1)) as usize;
        perm.swap(i, j);
    }
    let (half_a, half_b) = perm.split_at(n / 2);
    let scan_a = Scanner::new(t, Some(half_a), plan.depth);
    let excess_a: Vec<f64> = half_a.iter().map(|&r| t.losses[r as usize] - plan.theta).collect();
    let found = distinct_row_sets(scan_a.candidates(&excess_a), plan.top, |s| {
        half_a.iter().copied().filter(|&r| contains(t, s, r as usize)).collect()
    });
    let confirmed = found.len();
    let per_slice = split_delta / confirmed.max(1) as f64;

    let scan = Scanner::new(t, None, plan.depth);
    let excess: Vec<f64> = t.losses.iter().map(|&l| l - plan.theta).collect();
    let uniform = uniform(&scan, &excess, plan.theta, plan.sign_draws.max(1), uniform_delta / 2.0, &mut rng);
    let mean = t.losses.iter().sum::<f64>() / n.max(1) as f64;
    let variance_deviation = variance_sensitive(&uniform, n, plan.theta, mean, uniform_delta / 2.0);
    let deviation = uniform.deviation.min(variance_deviation);
    let localized = localized(&scan, &excess, plan.delta, &mut rng);

    // Report what either route found: the split's discoveries and the full window's worst.
    // Each set of rows once: a slice selecting the same rows as one already reported is the
    // same slice under another description.
    let members = |s: &Slice| -> Vec<u32> { (0..n as u32).filter(|&r| contains(t, s, r as usize)).collect() };
    let mut slices: Vec<(Slice, bool)> = found.into_iter().map(|s| (s, true)).collect();
    let mut reported: std::collections::HashSet<Vec<u32>> = slices.iter().map(|(s, _)| members(s)).collect();
    for s in distinct_row_sets(scan.candidates(&excess), plan.top, members) {
        if reported.insert(members(&s)) {
            slices.push((s, false));
        }
    }
    let mut reports: Vec<SliceReport> = slices
        .into_iter()
        .map(|(slice, split_found)| {
            let members: Vec<usize> = (0..n).filter(|&r| contains(t, &slice, r)).collect();
            let sum: f64 = members.iter().map(|&r| t.losses[r]).sum();
            let n_s = members.len();
            let scan_stat = (sum - plan.theta * n_s as f64) / n as f64;
            let uniform_lower =
                if scan_stat - deviation > 0.0 { (plan.theta + scan_stat - deviation).min(1.0) } else { 0.0 };
            let (mut lower, mut upper, mut by) = (uniform_lower, 1.0, "uniform");
            if split_found {
                let held: Vec<f64> = half_b
                    .iter()
                    .filter(|&&r| contains(t, &slice, r as usize))
                    .map(|&r| t.losses[r as usize])
                    .collect();
                let b = confirm(&held, binary, per_slice);
                if b.lower >= uniform_lower {
                    (lower, upper, by) = (b.lower, b.upper, "split-confirm");
                }
            }
            SliceReport {
                slice,
                n: n_s as u64,
                mean: if n_s == 0 { 0.0 } else { sum / n_s as f64 },
                lower,
                upper,
                certified_by: by,
                violates_sla: lower > plan.theta,
            }
        })
        .collect();
    reports.sort_by(|a, b| b.lower.total_cmp(&a.lower).then(b.mean.total_cmp(&a.mean)));
    reports.truncate(plan.top);
    Report {
        n,
        uniform,
        variance_deviation,
        deviation,
        localized,
        split_delta,
        confirmed,
        uniform_delta,
        slices: reports,
    }
}

/// The first `top` candidates with positive excess whose row sets (as `rows` gives them) are
/// distinct: a conjunction selecting exactly the rows of one of its parts takes no second slot,
/// and does not count in split-confirm's K. Of slices with the same rows, the one with the
/// fewest parts is kept (the shorter description of the same set).
fn distinct_row_sets(candidates: Vec<Found>, top: usize, rows: impl Fn(&Slice) -> Vec<u32>) -> Vec<Slice> {
    let parts = |s: &Slice| match s {
        Slice::Conjunction { parts } => parts.len(),
        _ => 1,
    };
    let mut seen: HashMap<Vec<u32>, usize> = HashMap::new();
    let mut out: Vec<Slice> = Vec::new();
    for f in candidates.into_iter().filter(|f| f.sum > 0.0) {
        match seen.get(&rows(&f.slice)) {
            Some(&i) => {
                if parts(&f.slice) < parts(&out[i]) {
                    out[i] = f.slice;
                }
            }
            None if out.len() == top => break,
            None => {
                seen.insert(rows(&f.slice), out.len());
                out.push(f.slice);
            }
        }
    }
    out
}

/// A registered slice's bounds on the whole window (scaled losses).
#[derive(Clone, Debug)]
pub struct Registered {
    pub n: u64,
    pub mean: f64,
    pub bounds: Bounds,
    /// "clopper-pearson" for 0-1 losses, "betting" otherwise.
    pub method: &'static str,
}

/// Slices fixed before the data need no protection from selection: a fixed-predictor bound
/// on the whole window at δ/M each (Bonferroni over the M of them).
pub fn registered(t: &Table, fixed: &[Slice], delta: f64) -> Vec<Registered> {
    let binary = t.losses.iter().all(|&l| l == 0.0 || l == 1.0);
    let per = delta / fixed.len().max(1) as f64;
    fixed
        .iter()
        .map(|s| {
            let held: Vec<f64> = (0..t.losses.len()).filter(|&r| contains(t, s, r)).map(|r| t.losses[r]).collect();
            Registered {
                n: held.len() as u64,
                mean: if held.is_empty() { 0.0 } else { held.iter().sum::<f64>() / held.len() as f64 },
                bounds: confirm(&held, binary, per),
                method: if binary { "clopper-pearson" } else { "betting" },
            }
        })
        .collect()
}
