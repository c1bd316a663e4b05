//! A model's operational alert thresholds.

use super::*;

impl Checker {
    /// The thresholds of model `k`'s operational alerts.
    pub(super) fn alerts(&mut self, raw: Option<&Spanned<RawAlerts>>, k: &str) -> AlertsConfig {
        let mut alerts = AlertsConfig::default();
        if let Some(a) = raw {
            if let Some(d) = &a.value.stalled_after {
                if let Some(ms) = self.duration_ms(d, &format!("{k}.alerts.stalled_after")) {
                    if ms < 60_000 {
                        self.push(d, &format!("{k}.alerts.stalled_after"), "must be at least 1m");
                    }
                    alerts.stalled_after = Duration::from_millis(ms.max(0) as u64);
                }
            }
            if let Some(r) = &a.value.max_reject_ratio {
                if r.value > 0.0 && r.value <= 1.0 {
                    alerts.max_reject_ratio = r.value;
                } else {
                    self.push(
                        r,
                        &format!("{k}.alerts.max_reject_ratio"),
                        format!("must lie in (0, 1], got {}", r.value),
                    );
                }
            }
        }
        alerts
    }
}
