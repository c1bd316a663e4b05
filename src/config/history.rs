//! The evaluation history's retention (`history:`): one point per `every` of event time per
//! model, kept for `keep`.

use super::*;

/// The fewest and most points `keep / every` may ask for: at least one day's worth of hourly
/// points is not required, but a history of a single point is no history, and past 100 000
/// points per model the page and the report would read more than they can show.
const MAX_POINTS: i64 = 100_000;

impl Checker {
    pub(super) fn history(&mut self, raw: Option<&Spanned<RawHistory>>) -> HistoryConfig {
        let d = HistoryConfig::default();
        let Some(h) = raw else { return d };
        let every_ms = h.value.every.as_ref().and_then(|e| self.duration_ms(e, "history.every")).unwrap_or(d.every_ms);
        let keep_ms = h.value.keep.as_ref().and_then(|k| self.duration_ms(k, "history.keep")).unwrap_or(d.keep_ms);
        if every_ms < 1000 {
            let at = h.value.every.as_ref().expect("only a given every can be short");
            self.push(at, "history.every", "must be at least 1s");
            return d;
        }
        if keep_ms < every_ms || keep_ms / every_ms > MAX_POINTS {
            self.push(
                h,
                "history.keep",
                format!("keep / every must lie in [1, {MAX_POINTS}] points, got {}", keep_ms / every_ms),
            );
            return d;
        }
        HistoryConfig { every_ms, keep_ms }
    }
}
