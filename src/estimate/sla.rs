//! The SLA state of a window, decided from its bounds: `violated` when the lower bound is above
//! the maximum risk (the risk is certainly too high), `ok` when the upper bound is at or below it
//! (certainly within), `inconclusive` otherwise — and also whenever the evidence is too thin to
//! decide: fewer samples than required, or too few predictions got a label (labels that go
//! missing may go missing *because* of the outcome, which no bound can correct for).

use super::Bounds;

/// A window's SLA state. The names are the `state` label values.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SlaState {
    Ok,
    Violated,
    Inconclusive,
}

impl SlaState {
    /// All states, in export order.
    pub const ALL: [SlaState; 3] = [SlaState::Ok, SlaState::Violated, SlaState::Inconclusive];
    /// The label value.
    pub fn as_str(self) -> &'static str {
        match self {
            SlaState::Ok => "ok",
            SlaState::Violated => "violated",
            SlaState::Inconclusive => "inconclusive",
        }
    }
}

/// Why a window is in its state, for the status output.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SlaReason {
    UpperAtOrBelowMax,
    LowerAboveMax,
    BoundsStraddleMax,
    TooFewSamples,
    LowLabelCoverage,
    /// A slice's certified lower bound is above max_risk (with `slices.decide_state`).
    SliceAboveMax,
}

impl SlaReason {
    /// A short phrase for people.
    pub fn describe(self) -> &'static str {
        match self {
            SlaReason::UpperAtOrBelowMax => "upper bound at or below max_risk",
            SlaReason::LowerAboveMax => "lower bound above max_risk",
            SlaReason::BoundsStraddleMax => "bounds straddle max_risk",
            SlaReason::TooFewSamples => "fewer samples than min_samples",
            SlaReason::LowLabelCoverage => "label coverage below min_label_coverage",
            SlaReason::SliceAboveMax => "a slice's certified lower bound is above max_risk",
        }
    }
}

/// Decides the state from the deciding method's bounds.
pub fn decide(
    bounds: Bounds,
    n: u64,
    max_risk: f64,
    min_samples: u64,
    coverage: Option<f64>,
    min_coverage: f64,
) -> (SlaState, SlaReason) {
    if n < min_samples {
        return (SlaState::Inconclusive, SlaReason::TooFewSamples);
    }
    if coverage.is_some_and(|c| c < min_coverage) {
        return (SlaState::Inconclusive, SlaReason::LowLabelCoverage);
    }
    if bounds.lower > max_risk {
        (SlaState::Violated, SlaReason::LowerAboveMax)
    } else if bounds.upper <= max_risk {
        (SlaState::Ok, SlaReason::UpperAtOrBelowMax)
    } else {
        (SlaState::Inconclusive, SlaReason::BoundsStraddleMax)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn states_follow_the_bounds() {
        let b = |lower, upper| Bounds { lower, upper };
        assert_eq!(decide(b(0.02, 0.08), 100, 0.1, 30, None, 0.5).0, SlaState::Ok);
        assert_eq!(decide(b(0.02, 0.10), 100, 0.1, 30, None, 0.5).0, SlaState::Ok);
        assert_eq!(decide(b(0.11, 0.2), 100, 0.1, 30, None, 0.5).0, SlaState::Violated);
        assert_eq!(decide(b(0.05, 0.2), 100, 0.1, 30, None, 0.5).0, SlaState::Inconclusive);
        assert_eq!(decide(b(0.11, 0.2), 10, 0.1, 30, None, 0.5), (SlaState::Inconclusive, SlaReason::TooFewSamples));
        assert_eq!(
            decide(b(0.11, 0.2), 100, 0.1, 30, Some(0.3), 0.5),
            (SlaState::Inconclusive, SlaReason::LowLabelCoverage)
        );
    }
}
