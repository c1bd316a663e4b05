//! Bounds that stay true whatever the label delays depend on. A window's *cohort* is every
//! prediction made in its prediction-time range, labelled or not; a prediction without a label
//! (still pending, or expired) has an unknown loss somewhere in [0, B]. The lower bound takes
//! every unknown loss as 0, the upper bound as B: the worst-case completions of partial
//! identification (Manski, "Partial Identification of Probability Distributions", 2003, ch. 1;
//! Horowitz & Manski, JASA 95, 2000). Both hold whether the labels are missing at random, by
//! feature, or because of the outcome itself — a late parcel whose lateness is known only after
//! its promised time — because they assume nothing about which labels are missing.
//!
//! What they do assume: the cohort's losses (observed and unobserved alike) are i.i.d. draws,
//! and the cohort is chosen by prediction time alone (never by which labels came back).
//!
//! Why each method stays valid:
//! - Hoeffding, kl and Clopper–Pearson are functions of the mean that increase with it, so the
//!   completion with every unknown at B (at 0) gives the largest upper (smallest lower) bound of
//!   any completion, the true one included.
//! - Maurer–Pontil's bound increases with both the mean and the sample variance, so the upper
//!   side uses the largest mean and the largest sample variance any completion can have (and the
//!   lower side the smallest mean with that variance): at least the true completion's bound.
//! - Betting runs on the completed losses in prediction-time order, where the completion is
//!   z ≥ x (upper) or z ≤ x (lower): E[z_i − μ | past] has the sign the capital needs whatever the
//!   missingness, so the capital stays a supermartingale under the null. Prediction times are
//!   known to the second, and within a second which predictions are unlabelled depends on the
//!   outcomes, so the losses are grouped by second: bets are frozen within a group and the capital
//!   is read at group ends ([`super::betting::grouped`]), which no order inside a group changes.
//!
//! Pure: no I/O. Losses are in [0, B]; the result is in loss units.

use super::{bernstein, betting, binomial, hoeffding, kl, Bounds, Confidence, EstimateError, LossStats, Method};

/// A window's cohort: the exact statistics of its known losses, the number of its predictions
/// without a label, and, for betting, its predictions (all, or a uniform subsample of them) in
/// prediction-time order, grouped by prediction second.
#[derive(Clone, Debug, PartialEq)]
pub struct Cohort {
    loss_max: f64,
    /// The known losses' statistics.
    pub known: LossStats,
    /// Predictions of the cohort without a label.
    pub unknown: u64,
    /// What betting reads.
    pub sample: Grouped,
}

/// Predictions in prediction-time order, grouped by prediction second: the known losses in
/// [0, B], group by group, and per group (known losses in it, predictions in it without a label).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Grouped {
    pub known: Vec<f64>,
    pub groups: Vec<(u64, u64)>,
}

impl Grouped {
    /// Appends a group.
    pub fn push_group(&mut self, known: impl IntoIterator<Item = f64>, unknown: u64) {
        let before = self.known.len();
        self.known.extend(known);
        let k = (self.known.len() - before) as u64;
        if k + unknown > 0 {
            self.groups.push((k, unknown));
        }
    }

    /// Predictions in it.
    pub fn n(&self) -> u64 {
        self.known.len() as u64 + self.groups.iter().map(|g| g.1).sum::<u64>()
    }
}

impl Cohort {
    /// An empty cohort of losses in [0, `loss_max`] whose betting sample is all of it.
    pub fn new(loss_max: f64) -> Cohort {
        Cohort { loss_max, known: LossStats::default(), unknown: 0, sample: Grouped::default() }
    }

    /// A cohort from statistics kept elsewhere and a betting sample drawn from it.
    pub fn from_parts(loss_max: f64, known: LossStats, unknown: u64, sample: Grouped) -> Cohort {
        Cohort { loss_max, known, unknown, sample }
    }

    /// Predictions in the cohort.
    pub fn n(&self) -> u64 {
        self.known.n() + self.unknown
    }

    /// Predictions of the cohort without a label.
    pub fn unknown(&self) -> u64 {
        self.unknown
    }

    /// Appends a group to the statistics and to the betting sample.
    pub fn push_group(&mut self, known: impl IntoIterator<Item = f64>, unknown: u64) {
        let before = self.sample.known.len();
        self.sample.push_group(known, unknown);
        for &l in &self.sample.known[before..] {
            self.known.push(l, self.loss_max);
        }
        self.unknown += unknown;
    }

    /// How many predictions `method` reads: the betting sample's size for betting, else all.
    pub fn used_by(&self, method: Method) -> u64 {
        if method.needs_losses() {
            self.sample.n()
        } else {
            self.n()
        }
    }
}

/// The sample variance (unbiased) of n values with sum s and sum of squares q.
fn variance(n: f64, s: f64, q: f64) -> f64 {
    if n < 2.0 {
        return 0.25;
    }
    ((q - s * s / n) / (n - 1.0)).max(0.0)
}

/// The largest unbiased sample variance of the known losses (scaled: sum s, squares q) completed
/// by `u` values in [0, 1]. The variance is convex in each completed value, so its maximum is at
/// a vertex (each unknown 0 or 1); with j of them at 1 it is a concave quadratic in j, maximal
/// near j = N/2 − s.
pub fn max_completed_variance(n_known: u64, s: f64, q: f64, u: u64) -> f64 {
    let n = (n_known + u) as f64;
    let at = |j: u64| variance(n, s + j as f64, q + j as f64);
    let centre = (n / 2.0 - s).clamp(0.0, u as f64);
    let lo = centre.floor() as u64;
    [0, u, lo, (lo + 1).min(u)].into_iter().map(at).fold(0.0, f64::max)
}

/// `method`'s delay-robust lower and upper bounds on the true mean loss of the cohort's
/// predictions, each one-sided at `confidence`, in loss units.
pub fn bounds(method: Method, cohort: &Cohort, loss_max: f64, confidence: Confidence) -> Result<Bounds, EstimateError> {
    let n = cohort.n();
    if n == 0 {
        return Err(EstimateError::Empty);
    }
    let delta = confidence.delta();
    let u = cohort.unknown();
    let k = &cohort.known;
    let s = k.sum_scaled();
    let nf = n as f64;
    let (lo_mean, hi_mean) = ((s / nf).clamp(0.0, 1.0), ((s + u as f64) / nf).min(1.0));
    let raw = match method {
        Method::Hoeffding => Bounds {
            lower: hoeffding::bounds(n, lo_mean, delta).lower,
            upper: hoeffding::bounds(n, hi_mean, delta).upper,
        },
        Method::Kl => Bounds { lower: kl::bounds(n, lo_mean, delta).lower, upper: kl::bounds(n, hi_mean, delta).upper },
        Method::ClopperPearson => {
            if k.n_between() > 0 {
                return Err(EstimateError::NotBinary(k.n_between()));
            }
            Bounds {
                lower: binomial::clopper_pearson(k.n_at_max(), n, delta).lower,
                upper: binomial::clopper_pearson(k.n_at_max() + u, n, delta).upper,
            }
        }
        Method::EmpiricalBernstein => {
            let v = max_completed_variance(k.n(), s, k.squares_scaled(), u);
            Bounds {
                lower: bernstein::maurer_pontil(n, lo_mean, v, delta).lower,
                upper: bernstein::maurer_pontil(n, hi_mean, v, delta).upper,
            }
        }
        Method::Betting => {
            let g = &cohort.sample;
            if g.n() == 0 {
                return Err(EstimateError::Empty);
            }
            let xs: Vec<f64> = g.known.iter().map(|l| (l / loss_max).clamp(0.0, 1.0)).collect();
            let m = g.n() as usize;
            let (mut low, mut high) = (Vec::with_capacity(m), Vec::with_capacity(m));
            let mut ends = Vec::with_capacity(g.groups.len());
            let mut at = 0usize;
            for &(k, unknown) in &g.groups {
                let known = &xs[at..at + k as usize];
                at += k as usize;
                low.extend_from_slice(known);
                high.extend_from_slice(known);
                low.extend(std::iter::repeat_n(0.0, unknown as usize));
                high.extend(std::iter::repeat_n(1.0, unknown as usize));
                ends.push(low.len());
            }
            Bounds {
                lower: betting::grouped(&low, &ends, delta).lower,
                upper: betting::grouped(&high, &ends, delta).upper,
            }
        }
    };
    let raw = super::widen_for_rounding(raw, k.n_rounded());
    Ok(Bounds { lower: raw.lower * loss_max, upper: raw.upper * loss_max })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cohort(groups: &[(&[f64], u64)]) -> Cohort {
        let mut c = Cohort::new(1.0);
        for (k, u) in groups {
            c.push_group(k.iter().copied(), *u);
        }
        c
    }

    #[test]
    fn without_unknowns_the_sufficient_statistic_methods_are_the_plain_bounds() {
        let xs: Vec<f64> = (0..400).map(|i| if i % 9 == 0 { 1.0 } else { 0.0 }).collect();
        let c = cohort(&[(&xs, 0)]);
        let conf = Confidence::new(0.95).unwrap();
        let mut s = crate::estimate::LossSummary::keeping_losses(1.0);
        xs.iter().for_each(|&x| s.push(x));
        for m in [Method::Hoeffding, Method::Kl, Method::ClopperPearson, Method::EmpiricalBernstein] {
            let (a, b) = (bounds(m, &c, 1.0, conf).unwrap(), crate::estimate::bounds(m, &s, conf).unwrap());
            assert!((a.lower - b.lower).abs() < 1e-12 && (a.upper - b.upper).abs() < 1e-12, "{m}: {a:?} vs {b:?}");
        }
    }

    #[test]
    fn every_completion_lies_inside_the_worst_cases() {
        // The bound of any completion of the unknowns lies between the delay-robust ends.
        let known = [0.2, 0.9, 0.0, 0.4, 0.7, 0.1, 0.3, 0.0, 1.0, 0.5];
        let conf = Confidence::new(0.9).unwrap();
        for m in [Method::Hoeffding, Method::Kl, Method::EmpiricalBernstein, Method::Betting] {
            let dr = bounds(m, &cohort(&[(&known[..5], 2), (&known[5..], 3)]), 1.0, conf).unwrap();
            for fill in [0.0, 0.25, 0.5, 1.0] {
                let mut full = known[..5].to_vec();
                full.extend([fill; 2]);
                full.extend_from_slice(&known[5..]);
                full.extend([fill; 3]);
                let b = bounds(m, &cohort(&[(&full[..7], 0), (&full[7..], 0)]), 1.0, conf).unwrap();
                assert!(dr.lower <= b.lower + 1e-9 && b.upper <= dr.upper + 1e-9, "{m} fill {fill}: {dr:?} vs {b:?}");
            }
        }
    }

    #[test]
    fn the_variance_maximum_is_the_maximum_over_vertices() {
        for (known, u) in [(vec![0.1, 0.2, 0.15], 5u64), (vec![0.9; 6], 3), (vec![], 4), (vec![0.5, 0.5], 0)] {
            let (s, q) = (known.iter().sum::<f64>(), known.iter().map(|x| x * x).sum::<f64>());
            let n = (known.len() as u64 + u) as f64;
            let brute = (0..=u).map(|j| variance(n, s + j as f64, q + j as f64)).fold(0.0, f64::max);
            assert!((max_completed_variance(known.len() as u64, s, q, u) - brute).abs() < 1e-12);
        }
    }
}
