//! Sufficient statistics of a stream of losses, updated one loss at a time.

/// What the bounds need to know about a set of losses in [0, B]: the count, the sum (Neumaier's
/// compensated summation, so k errors in n give exactly k/n), the sum of squared deviations
/// (Welford's update, stable for 10^9 samples), how many losses sit
/// exactly at 0 and at B (binary losses make the exact binomial bound available), and, only
/// when asked for, the losses themselves (scaled to [0, 1], in arrival order) for betting.
#[derive(Clone, Debug)]
pub struct LossSummary {
    loss_max: f64,
    n: u64,
    sum: f64,
    compensation: f64,
    mean: f64,
    m2: f64,
    n_at_zero: u64,
    n_at_max: u64,
    losses: Option<Vec<f64>>,
}

impl LossSummary {
    /// An empty summary for losses in [0, `loss_max`], keeping only statistics (O(1) memory).
    pub fn new(loss_max: f64) -> Self {
        assert!(loss_max > 0.0 && loss_max.is_finite(), "loss maximum must be positive and finite");
        LossSummary {
            loss_max,
            n: 0,
            sum: 0.0,
            compensation: 0.0,
            mean: 0.0,
            m2: 0.0,
            n_at_zero: 0,
            n_at_max: 0,
            losses: None,
        }
    }

    /// Like [`LossSummary::new`], but also keeps every loss (O(n) memory), as betting needs.
    pub fn keeping_losses(loss_max: f64) -> Self {
        LossSummary { losses: Some(Vec::new()), ..LossSummary::new(loss_max) }
    }

    /// Adds one loss. The caller has checked 0 ≤ loss ≤ B (ingest rejects other rows).
    pub fn push(&mut self, loss: f64) {
        debug_assert!((0.0..=self.loss_max).contains(&loss), "loss {loss} outside [0, {}]", self.loss_max);
        let x = loss / self.loss_max;
        self.n += 1;
        let t = self.sum + x;
        self.compensation += if self.sum.abs() >= x.abs() { (self.sum - t) + x } else { (x - t) + self.sum };
        self.sum = t;
        let d = x - self.mean;
        self.mean += d / self.n as f64;
        self.m2 += d * (x - self.mean);
        if loss == 0.0 {
            self.n_at_zero += 1;
        } else if loss == self.loss_max {
            self.n_at_max += 1;
        }
        if let Some(v) = self.losses.as_mut() {
            v.push(x);
        }
    }

    /// The declared loss maximum B.
    pub fn loss_max(&self) -> f64 {
        self.loss_max
    }
    /// Number of losses.
    pub fn n(&self) -> u64 {
        self.n
    }
    /// Mean loss in the losses' own units.
    pub fn mean(&self) -> f64 {
        self.mean_scaled() * self.loss_max
    }
    /// Sum of the losses in their own units (compensated: k errors of 0-1 loss give exactly k).
    pub fn sum(&self) -> f64 {
        (self.sum + self.compensation) * self.loss_max
    }
    /// Mean of the losses scaled to [0, 1].
    pub fn mean_scaled(&self) -> f64 {
        if self.n == 0 {
            0.0
        } else {
            ((self.sum + self.compensation) / self.n as f64).clamp(0.0, 1.0)
        }
    }
    /// Unbiased sample variance of the scaled losses (0 for n < 2).
    pub fn variance_unbiased_scaled(&self) -> f64 {
        if self.n < 2 {
            0.0
        } else {
            (self.m2 / (self.n - 1) as f64).max(0.0)
        }
    }
    /// Number of losses exactly equal to B (the error count for 0-1 loss).
    pub fn n_at_max(&self) -> u64 {
        self.n_at_max
    }
    /// Number of losses strictly between 0 and B.
    pub fn n_between(&self) -> u64 {
        self.n - self.n_at_zero - self.n_at_max
    }
    /// True when every loss is exactly 0 or B.
    pub fn is_binary(&self) -> bool {
        self.n_between() == 0
    }
    /// The scaled losses in arrival order, if they were kept.
    pub fn losses(&self) -> Option<&[f64]> {
        self.losses.as_deref()
    }
}
