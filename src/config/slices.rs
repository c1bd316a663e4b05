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
        let names = |list: &Option<Vec<Spanned<String>>>, what: &str, this: &mut Checker| -> Vec<String> {
            let mut out = Vec::new();
            for n in list.iter().flatten() {
                if n.value.trim().is_empty() {
                    this.push(n, &format!("{key}.{what}"), "column names must not be empty");
                } else if out.contains(&n.value) {
                    this.push(n, &format!("{key}.{what}"), format!("duplicate column {:?}", n.value));
                } else {
                    out.push(n.value.clone());
                }
            }
            out
        };
        let categorical = names(&sl.categorical, "categorical", self);
        let numeric = names(&sl.numeric, "numeric", self);
        if categorical.is_empty() && numeric.is_empty() {
            self.push(at, &key, "name at least one categorical or numeric feature column");
        }
        let ranged =
            |v: &Option<Spanned<i64>>, what: &str, lo: i64, hi: i64, default: i64, this: &mut Checker| -> usize {
                match v {
                    None => default as usize,
                    Some(x) if (lo..=hi).contains(&x.value) => x.value as usize,
                    Some(x) => {
                        this.push(x, &format!("{key}.{what}"), format!("must lie in [{lo}, {hi}], got {}", x.value));
                        default as usize
                    }
                }
            };
        let depth = ranged(&sl.depth, "depth", 1, 3, 1, self);
        let top = ranged(&sl.top, "top", 1, 50, 5, self);
        let sign_draws = ranged(&sl.sign_draws, "sign_draws", 1, 1000, 20, self);
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
