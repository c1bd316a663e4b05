//! Reading the windows: each window's exact statistics from its ranges, a bounded subsample for
//! the methods that need the samples, pruning what no window reaches any more, and the
//! full-data path (every row of a window read from SQLite) that tests check the ranges against.

use super::*;
use crate::estimate::LossStats;

/// A window as the estimators read it.
#[derive(Clone, Debug)]
pub struct WindowView {
    /// The exact statistics of the window's labelled samples (for a mature window, those of
    /// its cohort).
    pub stats: LossStats,
    /// A uniform subsample of them, at most `max_samples` (all of them when fewer), in arrival
    /// order, with their slice features: what betting and the slice search read.
    pub sample: Vec<WindowRow>,
    /// The cohort, once there are predictions and its range is not empty.
    pub cohort: Option<(CohortRange, Cohort)>,
}

/// A window computed from every one of its rows (the full-data path).
#[derive(Clone, Debug, PartialEq)]
pub struct DirectWindow {
    pub stats: LossStats,
    /// The cohort's range, its predictions and the statistics of its labelled samples.
    pub cohort: Option<(CohortRange, u64, LossStats)>,
}

impl Store {
    /// Deletes the samples and prediction counts below `keep_from` (t_pred ms), which no
    /// window reaches any more (`i64::MIN`: nothing).
    pub(super) fn prune(tx: &Connection, m: &str, keep_from: i64) -> rusqlite::Result<()> {
        if keep_from == i64::MIN {
            return Ok(());
        }
        let deleted =
            tx.prepare_cached("DELETE FROM sample WHERE model = ?1 AND t_pred < ?2")?.execute(params![m, keep_from])?;
        bump(tx, m, "samples_kept", -(deleted as f64))?;
        tx.prepare_cached("DELETE FROM pred_count WHERE model = ?1 AND sec < ?2")?
            .execute(params![m, keep_from.div_euclid(1000)])?;
        Ok(())
    }

    /// Runs `f` on the model's ranges, building them from the database first when they are
    /// missing (first use after opening) or were built for another configuration.
    fn with_ranges<T>(&self, model: &ModelConfig, f: impl FnOnce(&ModelRanges) -> T) -> Result<T, StoreError> {
        let mut all = self.ranges.borrow_mut();
        let fits = all.get(&model.name).is_some_and(|r| r.fits(model));
        if !fits {
            all.insert(model.name.clone(), ModelRanges::build(&self.conn, model)?);
        }
        Ok(f(&all[&model.name]))
    }

    /// Window `index` of `model`: its exact statistics, a subsample of at most `max_samples`
    /// of its labelled samples, and its cohort (the betting sample of the cohort likewise at
    /// most `max_samples` predictions).
    pub fn window_view(&self, model: &ModelConfig, index: usize, max_samples: u64) -> Result<WindowView, StoreError> {
        let (rows, cohort) = self.with_ranges(model, |r| {
            let (rows, cohort) = r.window(index);
            (rows.clone(), cohort.clone())
        })?;
        let m = model.name.as_str();
        let sample = sampled_rows(&self.conn, m, &rows, sample_level(&rows.levels, max_samples))?;
        let cohort = if cohort.is_empty() {
            None
        } else {
            let from_sec = match model.windows[index].kind {
                WindowKind::SpanMs(_) => Some(cohort.from),
                // A `last` cohort begins at a counted second (one not yet full, at the first);
                // with no counted second in reach it has none.
                WindowKind::Last(_) => self
                    .conn
                    .prepare_cached("SELECT MIN(sec) FROM pred_count WHERE model = ?1 AND sec >= ?2 AND sec <= ?3")?
                    .query_row(params![m, cohort.from, cohort.to], |r| r.get::<_, Option<i64>>(0))?,
            };
            let Some(from_sec) = from_sec else { return Ok(WindowView { stats: rows.stats, sample, cohort: None }) };
            let grouped = sampled_cohort(&self.conn, m, &cohort, sample_level(&cohort.levels, max_samples))?;
            let known = cohort.labelled.stats;
            let unknown = cohort.predictions.saturating_sub(known.n());
            let range = CohortRange { from_sec, to_sec: cohort.to };
            Some((range, Cohort::from_parts(model.loss.max(), known, unknown, grouped)))
        };
        Ok(WindowView { stats: rows.stats, sample, cohort })
    }

    /// The full-data path: window `index` of `model` computed from every one of its rows as
    /// stored, O(window) — what the ranges must equal exactly. For tests and checks.
    pub fn direct_window(&self, model: &ModelConfig, index: usize) -> Result<DirectWindow, StoreError> {
        let (m, b, w) = (model.name.as_str(), model.loss.max(), &model.windows[index]);
        let mut counts: Vec<(i64, u64)> = Vec::new();
        let mut st =
            self.conn.prepare("SELECT sec, SUM(n) FROM pred_count WHERE model = ?1 GROUP BY sec ORDER BY sec")?;
        for row in st.query_map([m], |r| Ok((r.get::<_, i64>(0)?, r.get::<_, i64>(1)?)))? {
            let (sec, n) = row?;
            counts.push((sec, n.max(0) as u64));
        }
        let counted_from: Option<i64> = self
            .conn
            .query_row("SELECT counted_from FROM model_meta WHERE model = ?1", [m], |r| r.get::<_, Option<i64>>(0))
            .optional()?
            .flatten();
        let all = self.all_samples(m)?;
        let stats_of = |rows: &mut dyn Iterator<Item = &((i64, i64), f64)>| {
            let mut s = LossStats::default();
            rows.for_each(|(_, l)| s.push(*l, b));
            s
        };
        let cohort = counts.last().and_then(|&(newest, _)| {
            let anchor = ranges::cohort_anchor(w, newest, model.label_wait_ms);
            let mut from = match w.kind {
                WindowKind::SpanMs(ms) => ranges::span_cohort_start(ms, anchor),
                WindowKind::Last(n) => {
                    let floor = counted_from.unwrap_or(i64::MIN);
                    let (mut total, mut start) = (0u64, None);
                    for &(sec, k) in counts.iter().rev().filter(|(s, _)| floor <= *s && *s <= anchor) {
                        total += k;
                        start = Some(sec);
                        if total >= n {
                            break;
                        }
                    }
                    start?
                }
            };
            if let Some(c) = counted_from {
                from = from.max(c);
            }
            if from > anchor {
                return None;
            }
            let predictions = counts.iter().filter(|(s, _)| from <= *s && *s <= anchor).map(|(_, k)| k).sum();
            let (lo, hi) = (from.saturating_mul(1000), anchor.saturating_add(1).saturating_mul(1000));
            let labelled = stats_of(&mut all.iter().filter(|((t, _), _)| lo <= *t && *t < hi));
            Some((CohortRange { from_sec: from, to_sec: anchor }, predictions, labelled))
        });
        let stats = if w.mature {
            cohort.as_ref().map(|c| c.2).unwrap_or_default()
        } else {
            match (w.kind, all.last()) {
                (_, None) => LossStats::default(),
                (WindowKind::SpanMs(ms), Some(&((newest, _), _))) => {
                    stats_of(&mut all.iter().filter(|((t, _), _)| *t >= newest.saturating_sub(ms)))
                }
                (WindowKind::Last(n), Some(_)) => {
                    stats_of(&mut all.iter().rev().take(n.min(usize::MAX as u64) as usize))
                }
            }
        };
        Ok(DirectWindow { stats, cohort })
    }

    /// The losses of a non-mature window computed from every stored row, in arrival order
    /// (the full-data path, O(window); for tests and checks).
    pub fn window_losses(&self, model: &str, kind: WindowKind) -> Result<Vec<f64>, StoreError> {
        let all = self.all_samples(model)?;
        let mut picked: Vec<((i64, i64), f64)> = match (kind, all.last()) {
            (_, None) => Vec::new(),
            (WindowKind::Last(n), Some(_)) => {
                all.iter().rev().take(n.min(usize::MAX as u64) as usize).copied().collect()
            }
            (WindowKind::SpanMs(ms), Some(&((newest, _), _))) => {
                all.iter().filter(|((t, _), _)| *t >= newest.saturating_sub(ms)).copied().collect()
            }
        };
        picked.sort_unstable_by_key(|((_, seq), _)| *seq);
        Ok(picked.into_iter().map(|(_, l)| l).collect())
    }

    /// Every stored sample of a model as (key, loss), in key order (the full-data path).
    fn all_samples(&self, m: &str) -> Result<Vec<(Key, f64)>, StoreError> {
        let mut st = self.conn.prepare("SELECT t_pred, seq, loss FROM sample WHERE model = ?1 ORDER BY t_pred, seq")?;
        let rows = st.query_map([m], |r| Ok(((r.get(0)?, r.get(1)?), r.get(2)?)))?;
        Ok(rows.collect::<rusqlite::Result<_>>()?)
    }

    /// The loss and label delay of the newest `limit` labelled samples by prediction time (a
    /// choice by prediction time alone, so it cannot favour either outcome).
    pub fn delay_rows(&self, model: &str, limit: usize) -> Result<Vec<DelayRow>, StoreError> {
        let mut st = self.conn.prepare_cached(
            "SELECT loss, t_label - t_pred FROM sample WHERE model = ?1 ORDER BY t_pred DESC, seq DESC LIMIT ?2",
        )?;
        let rows = st.query_map(params![model, limit as i64], |r| Ok((r.get(0)?, r.get(1)?)))?;
        Ok(rows.collect::<rusqlite::Result<_>>()?)
    }
}
