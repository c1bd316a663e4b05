//! A model's windows.

use super::*;

impl Checker {
    /// The windows of model `k`: names unique and not reserved, exactly one of last and span.
    pub(super) fn windows(&mut self, raw: &RawModel, k: &str) -> Vec<WindowConfig> {
        let mut windows = Vec::new();
        let mut names = HashSet::new();
        if raw.windows.value.is_empty() {
            self.push(&raw.windows, &format!("{k}.windows"), "at least one window is needed");
        }
        for (j, w) in raw.windows.value.iter().enumerate() {
            let wk = format!("{k}.windows[{j}]");
            if !valid_name(&w.name.value) {
                self.push(&w.name, &format!("{wk}.name"), format!("{:?} must match [a-z0-9_-]+", w.name.value));
            } else if w.name.value == SINCE_RESET {
                self.push(
                    &w.name,
                    &format!("{wk}.name"),
                    format!("{SINCE_RESET:?} is reserved for the anytime sequences"),
                );
            } else if !names.insert(w.name.value.clone()) {
                self.push(&w.name, &format!("{wk}.name"), format!("duplicate window name {:?}", w.name.value));
            }
            let kind = self.window_kind(w, &wk);
            if let Some(kind) = kind {
                windows.push(WindowConfig {
                    name: w.name.value.clone(),
                    kind,
                    mature: w.mature.as_ref().is_some_and(|m| m.value),
                });
            }
        }
        windows
    }
}

impl Checker {
    /// Exactly one of `last: N` (N ≥ 1) and `span: DURATION` (≥ 1 s) of the window at `wk`.
    pub(super) fn window_kind(&mut self, w: &RawWindow, wk: &str) -> Option<WindowKind> {
        match (&w.last, &w.span) {
            (Some(n), None) if n.value >= 1 => Some(WindowKind::Last(n.value as u64)),
            (Some(n), None) => {
                self.push(n, &format!("{wk}.last"), format!("must be at least 1, got {}", n.value));
                None
            }
            (None, Some(s)) => match self.duration_ms(s, &format!("{wk}.span")) {
                Some(ms) if ms >= 1000 => Some(WindowKind::SpanMs(ms)),
                Some(_) => {
                    self.push(s, &format!("{wk}.span"), "must be at least 1s (cohorts count predictions per second)");
                    None
                }
                None => None,
            },
            (Some(n), Some(_)) => {
                self.push(n, wk, "give last or span, not both");
                None
            }
            (None, None) => {
                self.push(&w.name, wk, "give last: N (newest N samples) or span: DURATION");
                None
            }
        }
    }
}
