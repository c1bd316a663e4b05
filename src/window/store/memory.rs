//! The windows' samples in memory (mirroring the database after each commit), the cohorts of
//! prediction-time ranges, and pruning what no window reaches any more.

use super::*;

/// Where a window's cohort starts: `anchor` is the newest prediction second it may reach, and
/// `desc` lists (second, predictions) at or below the anchor, newest first (only `last` windows
/// read it). The cohort is chosen by prediction time alone, never by which labels came.
pub fn cohort_start(kind: WindowKind, anchor: i64, desc: impl Iterator<Item = (i64, u64)>) -> Option<i64> {
    match kind {
        WindowKind::SpanMs(ms) => Some(anchor - (ms.max(1) + 999) / 1000 + 1),
        WindowKind::Last(n) => {
            let (mut total, mut start) = (0u64, None);
            for (sec, k) in desc {
                total += k;
                start = Some(sec);
                if total >= n {
                    break;
                }
            }
            start
        }
    }
}

/// The newest prediction second a window reaches: the newest prediction's, or for a mature
/// window the one whose label_wait is over.
pub(super) fn cohort_anchor(w: &WindowConfig, newest_sec: i64, label_wait_ms: i64) -> i64 {
    if w.mature {
        newest_sec - (label_wait_ms + 999) / 1000
    } else {
        newest_sec
    }
}

/// A kept sample as the windows read it: its loss and its slice features, parsed once when
/// the sample is kept rather than at every publish.
#[derive(Clone, Debug)]
pub(super) struct Kept {
    pub(super) loss: f64,
    pub(super) features: Option<Vec<String>>,
    /// t_label − t_pred, ms.
    pub(super) delay_ms: i64,
}

/// Kept samples as window rows in arrival order, as betting needs: seq is the order samples
/// were stored in.
pub(super) fn arrival_rows(mut picked: Vec<(&(i64, i64), &Kept)>) -> Vec<WindowRow> {
    picked.sort_unstable_by_key(|(k, _)| k.1);
    picked.into_iter().map(|(_, v)| (v.loss, v.features.clone())).collect()
}

/// Slice features as stored (a JSON array of strings); `None` when absent or unreadable.
pub(super) fn parse_features(json: Option<&str>) -> Option<Vec<String>> {
    json.and_then(|f| serde_json::from_str::<Vec<String>>(f).ok())
}

/// One model's kept samples by (t_pred, seq): the order the windows cut them in.
pub(super) type KeptSamples = BTreeMap<(i64, i64), Kept>;

/// One model's state in memory: its kept samples, its predictions per prediction second, and
/// the first second whose count is complete (state upgraded from a layout without counts).
#[derive(Default)]
pub(super) struct Memory {
    pub(super) kept: KeptSamples,
    pub(super) counts: BTreeMap<i64, u64>,
    pub(super) counted_from: Option<i64>,
}

impl Store {
    /// Deletes samples that no window can reach any more: older than the largest span behind
    /// the newest sample and not among the newest `last` samples of the largest count window.
    /// Returns the cutoff: samples with t_pred below it were deleted (`i64::MIN`: none).
    pub(super) fn prune_samples(tx: &Connection, model: &ModelConfig) -> rusqlite::Result<i64> {
        let m = model.name.as_str();
        let newest: Option<i64> = tx.query_row("SELECT MAX(t_pred) FROM sample WHERE model = ?1", [m], |r| r.get(0))?;
        let count = Self::sample_count(tx, m)?;
        let mut keep_from = i64::MAX;
        for w in model.windows.iter().filter(|w| !w.mature) {
            let Some(newest) = newest else { break };
            let from = match w.kind {
                WindowKind::SpanMs(ms) => newest.saturating_sub(ms),
                // Fewer samples than the window holds: nothing to cut, and no O(n) OFFSET scan.
                WindowKind::Last(n) if count <= n => i64::MIN,
                WindowKind::Last(n) => tx
                    .query_row(
                        "SELECT t_pred FROM sample WHERE model = ?1 ORDER BY t_pred DESC, seq DESC LIMIT 1 OFFSET ?2",
                        params![m, (n - 1) as i64],
                        |r| r.get(0),
                    )
                    .optional()?
                    .unwrap_or(i64::MIN),
            };
            keep_from = keep_from.min(from);
        }
        // Each window's cohort too: every prediction second from its start on, and its samples.
        let newest_sec: Option<i64> =
            tx.query_row("SELECT MAX(sec) FROM pred_count WHERE model = ?1", [m], |r| r.get(0))?;
        if let Some(newest_sec) = newest_sec {
            for w in &model.windows {
                let anchor = cohort_anchor(w, newest_sec, model.label_wait_ms);
                let start = match w.kind {
                    WindowKind::SpanMs(_) => cohort_start(w.kind, anchor, std::iter::empty()),
                    WindowKind::Last(_) => {
                        let mut st = tx.prepare_cached(
                            "SELECT sec, n FROM pred_count WHERE model = ?1 AND sec <= ?2 ORDER BY sec DESC",
                        )?;
                        let rows =
                            st.query_map(params![m, anchor], |r| Ok((r.get::<_, i64>(0)?, r.get::<_, i64>(1)?)))?;
                        let (mut desc, mut total) = (Vec::new(), 0u64);
                        for row in rows {
                            let (sec, n) = row?;
                            desc.push((sec, n.max(0) as u64));
                            total += n.max(0) as u64;
                            if matches!(w.kind, WindowKind::Last(want) if total >= want) {
                                break;
                            }
                        }
                        cohort_start(w.kind, anchor, desc.into_iter())
                    }
                };
                if let Some(start) = start {
                    keep_from = keep_from.min(start.saturating_mul(1000));
                }
            }
        }
        if keep_from == i64::MAX {
            return Ok(i64::MIN);
        }
        let deleted =
            tx.prepare_cached("DELETE FROM sample WHERE model = ?1 AND t_pred < ?2")?.execute(params![m, keep_from])?;
        bump(tx, m, "samples_kept", -(deleted as f64))?;
        if keep_from > i64::MIN {
            tx.prepare_cached("DELETE FROM pred_count WHERE model = ?1 AND sec < ?2")?
                .execute(params![m, keep_from.div_euclid(1000)])?;
        }
        Ok(keep_from)
    }

    /// The losses of one window, in arrival order (the order betting needs).
    pub fn window_losses(&self, model: &str, kind: WindowKind) -> Result<Vec<f64>, StoreError> {
        Ok(self.window_rows(model, kind)?.into_iter().map(|(l, _)| l).collect())
    }

    /// The model's state in memory, read from the database the first time it is needed.
    pub(super) fn memory(&self, model: &str) -> Result<std::cell::RefMut<'_, Memory>, StoreError> {
        let mut all = self.kept.borrow_mut();
        if !all.contains_key(model) {
            let mut mem = Memory::default();
            let mut st =
                self.conn.prepare_cached("SELECT t_pred, seq, loss, features, t_label FROM sample WHERE model = ?1")?;
            let rows = st.query_map([model], |r| {
                let features: Option<String> = r.get(3)?;
                let t_pred: i64 = r.get(0)?;
                let kept = Kept {
                    loss: r.get(2)?,
                    features: parse_features(features.as_deref()),
                    delay_ms: r.get::<_, i64>(4)? - t_pred,
                };
                Ok(((t_pred, r.get::<_, i64>(1)?), kept))
            })?;
            for row in rows {
                let (k, v) = row?;
                mem.kept.insert(k, v);
            }
            let mut st = self.conn.prepare_cached("SELECT sec, n FROM pred_count WHERE model = ?1")?;
            for row in st.query_map([model], |r| Ok((r.get::<_, i64>(0)?, r.get::<_, i64>(1)?)))? {
                let (sec, n) = row?;
                mem.counts.insert(sec, n.max(0) as u64);
            }
            mem.counted_from = self
                .conn
                .query_row("SELECT counted_from FROM model_meta WHERE model = ?1", [model], |r| {
                    r.get::<_, Option<i64>>(0)
                })
                .optional()?
                .flatten();
            all.insert(model.to_string(), mem);
        }
        Ok(std::cell::RefMut::map(all, |a| a.get_mut(model).expect("inserted above")))
    }

    /// The losses of one window with their slice features (the stored JSON parsed; `None` for
    /// rows stored without features, before slices were configured), in arrival order.
    pub fn window_rows(&self, model: &str, kind: WindowKind) -> Result<Vec<WindowRow>, StoreError> {
        let mem = self.memory(model)?;
        let kept = &mem.kept;
        // The newest `n` by (t_pred, seq), or every sample within the span of the newest t_pred.
        let picked: Vec<(&(i64, i64), &Kept)> = match kind {
            WindowKind::Last(n) => kept.iter().rev().take(n.min(usize::MAX as u64) as usize).collect(),
            WindowKind::SpanMs(ms) => match kept.last_key_value() {
                Some((&(newest, _), _)) => kept.range((newest.saturating_sub(ms), i64::MIN)..).collect(),
                None => Vec::new(),
            },
        };
        Ok(arrival_rows(picked))
    }

    /// One window as the estimators read it: its labelled samples (as [`Store::window_rows`];
    /// for a mature window, the labelled samples of its cohort) and its cohort, every prediction
    /// of the window's prediction-time range with its loss or none (`None` before the first
    /// prediction, or when the range lies wholly before the counts begin).
    pub fn window_view(&self, model: &str, w: &WindowConfig, label_wait_ms: i64) -> Result<WindowView, StoreError> {
        let cohort = self.cohort(model, w, label_wait_ms)?;
        let rows = if w.mature {
            let mem = self.memory(model)?;
            match &cohort {
                Some((r, _)) => {
                    let picked: Vec<(&(i64, i64), &Kept)> = mem
                        .kept
                        .range(
                            (r.from_sec.saturating_mul(1000), i64::MIN)
                                ..(r.to_sec.saturating_add(1).saturating_mul(1000), i64::MIN),
                        )
                        .collect();
                    arrival_rows(picked)
                }
                None => Vec::new(),
            }
        } else {
            self.window_rows(model, w.kind)?
        };
        Ok((rows, cohort))
    }

    /// A window's cohort: its prediction-time range (whole seconds, chosen from prediction
    /// times alone) and every prediction in it, by second, with the known losses.
    pub(super) fn cohort(
        &self,
        model: &str,
        w: &WindowConfig,
        label_wait_ms: i64,
    ) -> Result<Option<(CohortRange, Cohort)>, StoreError> {
        let mem = self.memory(model)?;
        let Some((&newest, _)) = mem.counts.last_key_value() else { return Ok(None) };
        let anchor = cohort_anchor(w, newest, label_wait_ms);
        let desc = mem.counts.range(..=anchor).rev().map(|(&s, &n)| (s, n));
        let Some(mut from) = cohort_start(w.kind, anchor, desc) else { return Ok(None) };
        if let Some(c) = mem.counted_from {
            from = from.max(c);
        }
        if from > anchor {
            return Ok(None);
        }
        let range = CohortRange { from_sec: from, to_sec: anchor };
        let mut cohort = Cohort::default();
        let mut samples = mem.kept.range((from.saturating_mul(1000), i64::MIN)..).peekable();
        for (&sec, &n) in mem.counts.range(from..=anchor) {
            let end = (sec + 1).saturating_mul(1000);
            let mut known = Vec::new();
            while let Some((&(t, _), k)) = samples.peek() {
                if t >= end {
                    break;
                }
                known.push(k.loss);
                samples.next();
            }
            // More labelled samples than counted predictions can only come from state written
            // before the counts existed; the count then is at least what is known.
            let unknown = n.saturating_sub(known.len() as u64);
            cohort.push_group(known, unknown);
        }
        Ok(Some((range, cohort)))
    }

    /// The loss and label delay of the newest `limit` labelled samples by prediction time (a
    /// choice by prediction time alone, so it cannot favour either outcome).
    pub fn delay_rows(&self, model: &str, limit: usize) -> Result<Vec<DelayRow>, StoreError> {
        let mem = self.memory(model)?;
        Ok(mem.kept.values().rev().take(limit).map(|k| (k.loss, k.delay_ms)).collect())
    }
}
