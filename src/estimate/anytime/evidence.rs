//! The paging signals: sequential tests whose false-alarm probability holds over the whole
//! deployment, not at one look.

use serde::{Deserialize, Serialize};

use super::TRUNCATION;

/// Weight of the newest loss in the bets' recent mean and variance: an exponentially weighted
/// average whose effective memory is about 2/[`RECENT_WEIGHT`] − 1 ≈ 199 losses.
pub const RECENT_WEIGHT: f64 = 0.01;

/// No bet before this many losses: a recent mean of a handful of losses is mostly noise.
pub const BET_AFTER: u64 = 20;

/// "The risk exceeded θ since the reset": the betting e-process for H0 "every conditional risk
/// is ≤ θ" (docs/methods.md §2.6). K_t = Π (1 + λ_i (x_i − θ)); under H0 each factor has conditional
/// mean ≤ 1 for any predictable λ_i ∈ [0, c/θ], so K is a nonnegative supermartingale and, by
/// Ville's inequality, P(K ever reaches 1/α) ≤ α, with no stationarity assumption.
///
/// The bet is chosen for power against a rise: the plug-in Kelly bet
/// λ_t = clip((m − θ)/(v + (m − θ)²), 0, c/θ), with m and v an exponentially weighted mean and
/// variance of the past losses (memory ≈ 200), and no bet before [`BET_AFTER`] losses. When the
/// recent past says the risk is below θ the bet is 0, so a healthy period costs no evidence and
/// a later rise is caught from where the capital stood. (Borrowing the confidence sequence's
/// bet instead, which is positive whatever the sign of m − θ, drains the capital through every
/// healthy stretch.) The alarm latches. O(1) per loss.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SlaTest {
    theta: f64,
    log_capital: f64,
    /// The loss count at which the alarm was raised, if it was.
    alarm_at: Option<u64>,
    /// Losses seen, and their exponentially weighted mean and second moment.
    seen: u64,
    recent_mean: f64,
    recent_sq: f64,
}

impl SlaTest {
    /// A test of "risk ≤ θ", θ scaled to [0, 1].
    pub fn new(theta: f64) -> SlaTest {
        SlaTest { theta, log_capital: 0.0, alarm_at: None, seen: 0, recent_mean: 0.0, recent_sq: 0.0 }
    }

    pub fn theta(&self) -> f64 {
        self.theta
    }

    /// The bet for the next loss, known before it is seen.
    pub fn bet(&self) -> f64 {
        if self.seen < BET_AFTER {
            return 0.0;
        }
        let d = self.recent_mean - self.theta;
        if d <= 0.0 {
            return 0.0;
        }
        let v = (self.recent_sq - self.recent_mean * self.recent_mean).max(0.0);
        let cap = if self.theta > 0.0 { TRUNCATION / self.theta } else { f64::MAX };
        (d / (v + d * d)).min(cap)
    }

    /// Bets on loss number `t` (1-based).
    pub fn push(&mut self, t: u64, x: f64, ln_inv_alpha: f64) {
        let lambda = self.bet();
        self.log_capital += (lambda * (x - self.theta)).ln_1p();
        if self.alarm_at.is_none() && self.log_capital >= ln_inv_alpha {
            self.alarm_at = Some(t);
        }
        // Until the average has its memory, weigh every loss alike (a plain mean).
        self.seen += 1;
        let w = (1.0 / self.seen as f64).max(RECENT_WEIGHT);
        self.recent_mean += w * (x - self.recent_mean);
        self.recent_sq += w * (x * x - self.recent_sq);
    }

    /// ln K_t, the log e-value (1/K_t is an anytime-valid p-value).
    pub fn log_evidence(&self) -> f64 {
        self.log_capital
    }

    pub fn alarm_at(&self) -> Option<u64> {
        self.alarm_at
    }
}

/// The fixed bets of the change detector, as fractions of 1/θ: a factor 1 + λ(x − θ) stays
/// ≥ 1 − fraction ≥ 1/2. Five bets a factor of two apart cover rises from about θ/8 to 2θ
/// (the Kelly bet for a rise from θ to θ + d is about d/(θ(1 − θ))).
pub const CHANGE_BET_FRACTIONS: [f64; 5] = [0.5, 0.25, 0.125, 0.0625, 0.03125];

/// Below this θ the bets are set as if θ were this: they stay valid (λ ≤ 1/θ) and finite.
const MIN_THETA_FOR_BETS: f64 = 0.01;

/// "The risk rose above θ at some point": a Shiryaev–Roberts e-detector averaged over fixed
/// bets (docs/methods.md §2.8; Shin, Ramdas & Rinaldo, "E-detectors"). For each bet λ_j,
/// R_t = e_t (R_{t−1} + 1) with e_t = 1 + λ_j (x_t − θ), a sum over every possible change point
/// of the capital since it; the statistic is the average over bets. Under H0 (every conditional
/// risk ≤ θ) the average minus t is a supermartingale, so with threshold A: the mean run length
/// to a false alarm is ≥ A, and P(a false alarm within the first m labels) ≤ m/A (Ville's
/// inequality for the nonnegative supermartingale statistic − t + m, which starts at m).
/// Unlike [`SlaTest`], evidence from before a change does not have to be paid back first.
/// O(bets) per loss. The alarm latches.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ChangeDetector {
    theta: f64,
    threshold: f64,
    stats: Vec<f64>,
    alarm_at: Option<u64>,
}

impl ChangeDetector {
    /// A detector of rises above θ (scaled to [0, 1]) that alarms when the statistic reaches
    /// `threshold` A (> 1).
    pub fn new(theta: f64, threshold: f64) -> ChangeDetector {
        ChangeDetector { theta, threshold, stats: vec![0.0; CHANGE_BET_FRACTIONS.len()], alarm_at: None }
    }

    /// A = horizon/δ: P(a false alarm within the first `horizon` labels) ≤ δ.
    pub fn threshold_for(horizon: u64, delta: f64) -> f64 {
        horizon as f64 / delta
    }

    pub fn push(&mut self, t: u64, x: f64) {
        let base = 1.0 / self.theta.max(MIN_THETA_FOR_BETS);
        for (r, f) in self.stats.iter_mut().zip(CHANGE_BET_FRACTIONS) {
            // Capped far above any threshold: after an alarm the value no longer matters, and
            // the cap keeps it finite in the durable state.
            *r = ((1.0 + f * base * (x - self.theta)) * (*r + 1.0)).min(1e300);
        }
        if self.alarm_at.is_none() && self.statistic() >= self.threshold {
            self.alarm_at = Some(t);
        }
    }

    /// The average of the Shiryaev–Roberts statistics over the bets.
    pub fn statistic(&self) -> f64 {
        self.stats.iter().sum::<f64>() / self.stats.len() as f64
    }

    /// ln of the statistic, floored at 0 (the statistic starts at 0 before any loss).
    pub fn log_evidence(&self) -> f64 {
        self.statistic().max(1.0).ln()
    }

    pub fn threshold(&self) -> f64 {
        self.threshold
    }

    pub fn theta(&self) -> f64 {
        self.theta
    }

    pub fn alarm_at(&self) -> Option<u64> {
        self.alarm_at
    }
}
