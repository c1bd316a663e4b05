//! A model's slice search.

use super::*;

impl Checker {
    /// The slice search of model `k` (needs an sla).
    pub(super) fn slices(&mut self, at: &Spanned<RawSlices>, has_sla: bool, k: &str) -> SlicesConfig {
        let sl = &at.value;
        let key = format!("{k}.slices");
        if !has_sla {
            self.push(at, &key, "slices need an sla: they are searched for risk above max_risk");
        }
        let mut seen = Vec::new();
        let categorical = self.column_list(&sl.categorical, &format!("{key}.categorical"), &mut seen);
        let numeric = self.column_list(&sl.numeric, &format!("{key}.numeric"), &mut seen);
        if categorical.is_empty() && numeric.is_empty() {
            self.push(at, &key, "name at least one categorical or numeric feature column");
        }
        let depth = self.ranged(&sl.depth, &key, "depth", 1, 3, 1);
        let top = self.ranged(&sl.top, &key, "top", 1, 50, 5);
        let sign_draws = self.ranged(&sl.sign_draws, &key, "sign_draws", 1, 1000, 20);
        let mut registered = Vec::new();
        for r in sl.registered.iter().flatten() {
            match crate::estimate::slices::parse_slice(&r.value, &categorical, &numeric) {
                Ok(s) => registered.push(s),
                Err(e) => self.push(r, &format!("{key}.registered"), e),
            }
        }
        let decide_state = sl.decide_state.as_ref().is_some_and(|d| d.value);
        SlicesConfig { categorical, numeric, depth, registered, top, sign_draws, decide_state }
    }
}
