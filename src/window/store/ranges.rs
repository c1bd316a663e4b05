//! Each window's exact statistics, kept in bounded memory: a window is a range of the samples'
//! keys (prediction time, then join sequence) and of prediction seconds, and holds the exact
//! [`LossStats`] of the samples inside and the count of predictions inside. When a file commits,
//! the samples and predictions it added are counted into every range that holds them, then each
//! range moves to where the window now lies: the rows it leaves are read back from SQLite and
//! subtracted, the rows it reaches are read and added. Integer statistics make the result
//! exactly the statistics of a computation from scratch over the same rows, whatever the order.
//! Memory is O(windows), and a round costs O(rows that moved), never O(window).
//!
//! A `last: N` window's range starts at the N-th newest key; when samples join above it, the
//! oldest ones are read from its start and removed until N remain. A `last: N` cohort starts at
//! the latest prediction second from which on at least N predictions were made.
//!
//! Ranges only move forward (the newest prediction time never decreases); a change of window
//! configuration rebuilds them from SQLite by one streaming scan, as does the first use after
//! start-up, so after a restart the statistics are those of the stored rows to the last bit.

use super::*;
use crate::estimate::delay_robust::Grouped;
use crate::estimate::LossStats;

/// Sampling levels: a prediction's level is the number of leading zero bits of a seeded hash of
/// its request id (capped), so P(level ≥ j) = 2^-j, independently of everything else about it.
pub const LEVELS: usize = 33;

/// The seed of the level hash: fixed, so the same ids give the same subsample in every run,
/// after a restart, a kill -9 or a replay.
pub const SAMPLE_SEED: u64 = 0x5eed_0f5a_3b1e;

/// A prediction's sampling level, from its request id alone (never from its outcome or its
/// arrival): FNV-1a of the id, mixed by SplitMix64's finaliser with the seed.
pub fn level_of(id: &str) -> u8 {
    id_hash(id, SAMPLE_SEED).leading_zeros().min(LEVELS as u32 - 1) as u8
}

/// A seeded 64-bit hash of a request id: FNV-1a of its bytes, mixed by SplitMix64's finaliser.
pub(super) fn id_hash(id: &str, seed: u64) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in id.as_bytes() {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    let mut z = h ^ seed;
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// The lowest level whose subsample (every item at that level or above) holds at most `max`
/// items, given the count per level: the subsample is then a Bernoulli(2^-j) sample of the
/// range, between max/2 and max items when the range holds more than max.
pub fn sample_level(levels: &[u64; LEVELS], max: u64) -> u8 {
    let mut above = 0u64;
    let mut j = LEVELS;
    while j > 0 && above + levels[j - 1] <= max {
        above += levels[j - 1];
        j -= 1;
    }
    j.min(LEVELS - 1) as u8
}

/// A sample's key: (t_pred ms, seq).
pub(super) type Key = (i64, i64);
const BOTTOM: Key = (i64::MIN, i64::MIN);
const TOP: Key = (i64::MAX, i64::MAX);

fn sec_key(sec: i64) -> Key {
    (sec.saturating_mul(1000), i64::MIN)
}

/// The labelled samples whose keys lie in [lo, hi).
#[derive(Clone, Debug, PartialEq)]
pub(super) struct Labelled {
    pub(super) lo: Key,
    pub(super) hi: Key,
    pub(super) stats: LossStats,
    pub(super) levels: [u64; LEVELS],
}

impl Labelled {
    fn empty() -> Labelled {
        Labelled { lo: TOP, hi: TOP, stats: LossStats::default(), levels: [0; LEVELS] }
    }
    fn holds(&self, k: Key) -> bool {
        self.lo <= k && k < self.hi
    }
    fn add(&mut self, loss: f64, level: u8, b: f64) {
        self.stats.push(loss, b);
        self.levels[level as usize] += 1;
    }
    fn remove(&mut self, loss: f64, level: u8, b: f64) {
        self.stats.remove(loss, b);
        self.levels[level as usize] -= 1;
    }

    /// Moves to [lo, hi), reading from `tx` only the rows that enter or leave.
    fn move_to(&mut self, tx: &Connection, m: &str, b: f64, lo: Key, hi: Key) -> rusqlite::Result<()> {
        if lo >= hi {
            *self = Labelled { lo, hi, ..Labelled::empty() };
            return Ok(());
        }
        if lo < self.lo || hi < self.hi || lo >= self.hi || self.lo >= self.hi {
            *self = Labelled { lo, hi, ..Labelled::empty() };
            return for_rows(tx, m, lo, hi, |_, l, lv| self.add(l, lv, b));
        }
        let (old_lo, old_hi) = (self.lo, self.hi);
        for_rows(tx, m, old_lo, lo, |_, l, lv| self.remove(l, lv, b))?;
        for_rows(tx, m, old_hi, hi, |_, l, lv| self.add(l, lv, b))?;
        self.lo = lo;
        self.hi = hi;
        Ok(())
    }

    /// Removes the oldest samples until at most `n` remain, moving `lo` to the oldest left.
    fn keep_newest(&mut self, tx: &Connection, m: &str, b: f64, n: u64) -> rusqlite::Result<()> {
        if self.stats.n() <= n {
            return Ok(());
        }
        let mut excess = self.stats.n() - n;
        let mut st = tx.prepare_cached(
            "SELECT t_pred, seq, loss, level FROM sample WHERE model = ?1 AND t_pred >= ?2 ORDER BY t_pred, seq",
        )?;
        let mut rows = st.query(params![m, self.lo.0])?;
        while let Some(r) = rows.next()? {
            let key: Key = (r.get(0)?, r.get(1)?);
            if key < self.lo {
                continue;
            }
            if excess == 0 {
                self.lo = key;
                return Ok(());
            }
            self.remove(r.get(2)?, r.get::<_, u8>(3)?, b);
            excess -= 1;
        }
        self.lo = self.hi;
        Ok(())
    }
}

/// Calls `f` on every sample of model `m` with key in [lo, hi), in key order.
fn for_rows(tx: &Connection, m: &str, lo: Key, hi: Key, mut f: impl FnMut(Key, f64, u8)) -> rusqlite::Result<()> {
    if lo >= hi {
        return Ok(());
    }
    let mut st = tx.prepare_cached(
        "SELECT t_pred, seq, loss, level FROM sample WHERE model = ?1 AND t_pred >= ?2 AND t_pred <= ?3
         ORDER BY t_pred, seq",
    )?;
    let mut rows = st.query(params![m, lo.0, hi.0])?;
    while let Some(r) = rows.next()? {
        let key: Key = (r.get(0)?, r.get(1)?);
        if lo <= key && key < hi {
            f(key, r.get(2)?, r.get(3)?);
        }
    }
    Ok(())
}

/// Calls `f` on every (sec, level, n) of model `m`'s prediction counts with sec in [lo, hi].
fn for_counts(tx: &Connection, m: &str, lo: i64, hi: i64, mut f: impl FnMut(i64, u8, u64)) -> rusqlite::Result<()> {
    if lo > hi {
        return Ok(());
    }
    let mut st =
        tx.prepare_cached("SELECT sec, level, n FROM pred_count WHERE model = ?1 AND sec >= ?2 AND sec <= ?3")?;
    let mut rows = st.query(params![m, lo, hi])?;
    while let Some(r) = rows.next()? {
        f(r.get(0)?, r.get(1)?, r.get::<_, i64>(2)?.max(0) as u64);
    }
    Ok(())
}

/// A window's cohort: every prediction second in [from, to], the predictions made in them
/// (per level) and the labelled samples among them.
#[derive(Clone, Debug, PartialEq)]
pub(super) struct Counted {
    /// The range's lower end: a `last` cohort not yet full reaches down to the first counted
    /// second (`counted_from`, or the beginning).
    pub(super) from: i64,
    pub(super) to: i64,
    pub(super) predictions: u64,
    pub(super) levels: [u64; LEVELS],
    pub(super) labelled: Labelled,
}

impl Counted {
    fn empty() -> Counted {
        Counted { from: i64::MAX, to: i64::MIN, predictions: 0, levels: [0; LEVELS], labelled: Labelled::empty() }
    }
    pub(super) fn is_empty(&self) -> bool {
        self.from > self.to
    }
    fn count(&mut self, level: u8, n: u64, sign: i64) {
        if sign > 0 {
            self.predictions += n;
            self.levels[level as usize] += n;
        } else {
            self.predictions -= n;
            self.levels[level as usize] -= n;
        }
    }

    /// Moves to seconds [from, to], reading only what enters or leaves.
    fn move_to(&mut self, tx: &Connection, m: &str, b: f64, from: i64, to: i64) -> rusqlite::Result<()> {
        if from > to {
            *self = Counted { from, to, ..Counted::empty() };
            return Ok(());
        }
        if self.is_empty() || from < self.from || to < self.to || from > self.to {
            *self = Counted { from, to, ..Counted::empty() };
            for_counts(tx, m, from, to, |_, lv, n| self.count(lv, n, 1))?;
        } else {
            let (old_from, old_to) = (self.from, self.to);
            if from > old_from {
                for_counts(tx, m, old_from, from - 1, |_, lv, n| self.count(lv, n, -1))?;
            }
            if to > old_to {
                for_counts(tx, m, old_to + 1, to, |_, lv, n| self.count(lv, n, 1))?;
            }
            self.from = from;
            self.to = to;
        }
        self.labelled.move_to(tx, m, b, sec_key(from), sec_key(to.saturating_add(1)))
    }

    /// Raises `from` while the predictions from the next counted second on are still at least
    /// `n`: the shortest suffix of seconds holding n predictions. One pass over the seconds
    /// that leave, then one move.
    fn keep_newest(&mut self, tx: &Connection, m: &str, b: f64, n: u64) -> rusqlite::Result<()> {
        if self.predictions <= n || self.is_empty() {
            return Ok(());
        }
        let mut st = tx.prepare_cached(
            "SELECT sec, SUM(n) FROM pred_count WHERE model = ?1 AND sec >= ?2 AND sec <= ?3 GROUP BY sec ORDER BY sec",
        )?;
        let mut rows = st.query(params![m, self.from, self.to])?;
        let mut left = self.predictions;
        let mut from = self.from;
        while let Some(r) = rows.next()? {
            let (sec, k): (i64, i64) = (r.get(0)?, r.get(1)?);
            let k = k.max(0) as u64;
            from = sec;
            if left - k.min(left) < n {
                break;
            }
            left -= k.min(left);
            from = sec + 1;
        }
        drop(rows);
        drop(st);
        let to = self.to;
        self.move_to(tx, m, b, from, to)
    }
}

/// One window's ranges: its labelled samples and its cohort.
#[derive(Clone, Debug, PartialEq)]
pub(super) struct WindowRanges {
    /// The labelled window: for a mature window, the labelled samples of its cohort.
    pub(super) rows: Labelled,
    pub(super) cohort: Counted,
}

/// A model's windows, kept in step with its committed state.
#[derive(Clone, Debug, PartialEq)]
pub(super) struct ModelRanges {
    /// What the ranges were built for: a change rebuilds them.
    windows: Vec<WindowConfig>,
    label_wait_ms: i64,
    loss_max: f64,
    newest_sample: Option<i64>,
    newest_sec: Option<i64>,
    counted_from: Option<i64>,
    pub(super) ranges: Vec<WindowRanges>,
}

/// What one file added: samples (key, loss, level) and predictions (sec, level) → count.
#[derive(Default)]
pub(super) struct Fresh {
    pub(super) samples: Vec<(Key, f64, u8)>,
    pub(super) counted: BTreeMap<(i64, u8), u64>,
}

/// Where a window's cohort starts for a span window: `anchor` is the newest prediction second
/// it may reach.
pub fn span_cohort_start(ms: i64, anchor: i64) -> i64 {
    anchor - (ms.max(1) + 999) / 1000 + 1
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

impl ModelRanges {
    /// Ranges built from the stored rows of `model` (one streaming pass per window).
    pub(super) fn build(tx: &Connection, model: &ModelConfig) -> rusqlite::Result<ModelRanges> {
        let m = model.name.as_str();
        let newest_sample = tx.query_row("SELECT MAX(t_pred) FROM sample WHERE model = ?1", [m], |r| r.get(0))?;
        let newest_sec = tx.query_row("SELECT MAX(sec) FROM pred_count WHERE model = ?1", [m], |r| r.get(0))?;
        let counted_from = tx
            .query_row("SELECT counted_from FROM model_meta WHERE model = ?1", [m], |r| r.get::<_, Option<i64>>(0))
            .optional()?
            .flatten();
        let empty = WindowRanges { rows: Labelled::empty(), cohort: Counted::empty() };
        let mut out = ModelRanges {
            windows: model.windows.clone(),
            label_wait_ms: model.label_wait_ms,
            loss_max: model.loss.max(),
            newest_sample,
            newest_sec,
            counted_from,
            ranges: vec![empty; model.windows.len()],
        };
        // A `last` window starts at its N-th newest row, found by the index, not by adding
        // every row and removing all but N.
        for (i, w) in model.windows.iter().enumerate() {
            if let (WindowKind::Last(n), false) = (w.kind, w.mature) {
                let lo: Option<Key> = tx
                    .query_row(
                        "SELECT t_pred, seq FROM sample WHERE model = ?1 ORDER BY t_pred DESC, seq DESC LIMIT 1 OFFSET ?2",
                        params![m, (n.min(i64::MAX as u64) - 1) as i64],
                        |r| Ok((r.get(0)?, r.get(1)?)),
                    )
                    .optional()?;
                let b = out.loss_max;
                out.ranges[i].rows.move_to(tx, m, b, lo.unwrap_or(BOTTOM), TOP)?;
            }
            if let (WindowKind::Last(n), Some(newest)) = (w.kind, newest_sec) {
                let anchor = cohort_anchor(w, newest, model.label_wait_ms);
                let mut st = tx.prepare_cached(
                    "SELECT sec, SUM(n) FROM pred_count WHERE model = ?1 AND sec <= ?2 GROUP BY sec ORDER BY sec DESC",
                )?;
                let mut rows = st.query(params![m, anchor])?;
                let (mut total, mut start) = (0u64, None);
                while let Some(r) = rows.next()? {
                    total += r.get::<_, i64>(1)?.max(0) as u64;
                    start = Some(r.get::<_, i64>(0)?);
                    if total >= n {
                        break;
                    }
                }
                let full = total >= n;
                let from = match (start, full) {
                    (Some(s), true) => s,
                    _ => counted_from.unwrap_or(i64::MIN),
                };
                let from = from.max(counted_from.unwrap_or(i64::MIN));
                let b = out.loss_max;
                out.ranges[i].cohort.move_to(tx, m, b, from, anchor)?;
            }
        }
        out.settle(tx, model)?;
        Ok(out)
    }

    /// True when these ranges were built for `model`'s windows.
    pub(super) fn fits(&self, model: &ModelConfig) -> bool {
        self.windows == model.windows && self.label_wait_ms == model.label_wait_ms && self.loss_max == model.loss.max()
    }

    /// Counts one file's additions into the ranges that hold them, then moves every range to
    /// where its window now lies. `tx` must already hold the file's rows.
    pub(super) fn advance(&mut self, tx: &Connection, model: &ModelConfig, fresh: &Fresh) -> rusqlite::Result<()> {
        let b = self.loss_max;
        for (i, w) in self.windows.iter().enumerate() {
            let r = &mut self.ranges[i];
            for &(key, loss, level) in &fresh.samples {
                if !w.mature && r.rows.holds(key) {
                    r.rows.add(loss, level, b);
                }
                if r.cohort.labelled.holds(key) {
                    r.cohort.labelled.add(loss, level, b);
                }
            }
            for (&(sec, level), &n) in &fresh.counted {
                if !r.cohort.is_empty() && r.cohort.from <= sec && sec <= r.cohort.to {
                    r.cohort.count(level, n, 1);
                }
            }
        }
        for &(key, _, _) in &fresh.samples {
            self.newest_sample = Some(self.newest_sample.map_or(key.0, |t| t.max(key.0)));
        }
        for &(sec, _) in fresh.counted.keys() {
            self.newest_sec = Some(self.newest_sec.map_or(sec, |t| t.max(sec)));
        }
        self.settle(tx, model)
    }

    /// Moves every range to where its window lies for the newest times now known.
    fn settle(&mut self, tx: &Connection, model: &ModelConfig) -> rusqlite::Result<()> {
        let (m, b) = (model.name.as_str(), self.loss_max);
        let floor = self.counted_from.unwrap_or(i64::MIN);
        for (i, w) in self.windows.iter().enumerate() {
            let r = &mut self.ranges[i];
            if let Some(newest) = self.newest_sec {
                let anchor = cohort_anchor(w, newest, self.label_wait_ms);
                match w.kind {
                    WindowKind::SpanMs(ms) => {
                        r.cohort.move_to(tx, m, b, span_cohort_start(ms, anchor).max(floor), anchor)?;
                    }
                    WindowKind::Last(n) => {
                        let from = if r.cohort.is_empty() { floor } else { r.cohort.from };
                        r.cohort.move_to(tx, m, b, from, anchor)?;
                        r.cohort.keep_newest(tx, m, b, n)?;
                    }
                }
            }
            if w.mature {
                continue;
            }
            match (w.kind, self.newest_sample) {
                (WindowKind::SpanMs(ms), Some(newest)) => {
                    r.rows.move_to(tx, m, b, (newest.saturating_sub(ms), i64::MIN), TOP)?
                }
                (WindowKind::Last(n), Some(_)) => {
                    if r.rows.lo >= r.rows.hi {
                        r.rows.move_to(tx, m, b, BOTTOM, TOP)?;
                    }
                    r.rows.keep_newest(tx, m, b, n)?;
                }
                (_, None) => {}
            }
        }
        Ok(())
    }

    /// The newest t_pred below which no window reaches (`i64::MIN` when some window reaches
    /// everything): rows below it may be deleted.
    pub(super) fn keep_from(&self) -> i64 {
        let mut keep = i64::MAX;
        for (w, r) in self.windows.iter().zip(&self.ranges) {
            if !w.mature {
                keep = keep.min(if r.rows.lo >= r.rows.hi { i64::MAX } else { r.rows.lo.0 });
            }
            // An empty cohort's lower end (clamped to the first counted second) is where it will
            // begin: the rows from there on stay.
            if r.cohort.from != i64::MAX {
                keep = keep.min(r.cohort.from.saturating_mul(1000));
            }
        }
        // No window holds anything yet (no rows at all): nothing to delete.
        if keep == i64::MAX {
            i64::MIN
        } else {
            keep
        }
    }

    /// The labelled range and the cohort of window `i`.
    pub(super) fn window(&self, i: usize) -> (&Labelled, &Counted) {
        let r = &self.ranges[i];
        let rows = if self.windows[i].mature { &r.cohort.labelled } else { &r.rows };
        (rows, &r.cohort)
    }
}

/// The `IN (…)` list of levels j and above, for the subsample queries, which then probe the
/// level index once per level instead of scanning every level ≥ j. They name the index
/// (`INDEXED BY`): the planner would otherwise pick the time index and visit the whole range.
fn levels_from(j: u8) -> String {
    (j as usize..LEVELS).map(|l| l.to_string()).collect::<Vec<_>>().join(",")
}

/// A window's labelled subsample: every sample at level ≥ j in [lo, hi), in arrival order,
/// with its loss and slice features.
pub(super) fn sampled_rows(conn: &Connection, m: &str, range: &Labelled, j: u8) -> rusqlite::Result<Vec<WindowRow>> {
    if range.lo >= range.hi {
        return Ok(Vec::new());
    }
    let sql = format!(
        "SELECT t_pred, seq, loss, features FROM sample INDEXED BY sample_level
         WHERE model = ?1 AND level IN ({}) AND t_pred >= ?2 AND t_pred <= ?3",
        levels_from(j)
    );
    let mut st = conn.prepare_cached(&sql)?;
    let mut rows = st.query(params![m, range.lo.0, range.hi.0])?;
    let mut out: Vec<(i64, WindowRow)> = Vec::new();
    while let Some(r) = rows.next()? {
        let key: Key = (r.get(0)?, r.get(1)?);
        if range.holds(key) {
            let features: Option<String> = r.get(3)?;
            out.push((key.1, (r.get(2)?, parse_features(features.as_deref()))));
        }
    }
    out.sort_unstable_by_key(|(seq, _)| *seq);
    Ok(out.into_iter().map(|(_, row)| row).collect())
}

/// A cohort's betting sample: its predictions at level ≥ j, grouped by second, in
/// prediction-time order, the known losses of each second and the count without a label.
pub(super) fn sampled_cohort(conn: &Connection, m: &str, c: &Counted, j: u8) -> rusqlite::Result<Grouped> {
    let mut per_sec: BTreeMap<i64, (Vec<f64>, u64)> = BTreeMap::new();
    let sql = format!(
        "SELECT sec, n FROM pred_count INDEXED BY pred_count_level
         WHERE model = ?1 AND level IN ({}) AND sec >= ?2 AND sec <= ?3",
        levels_from(j)
    );
    let mut st = conn.prepare_cached(&sql)?;
    let mut rows = st.query(params![m, c.from, c.to])?;
    while let Some(r) = rows.next()? {
        per_sec.entry(r.get(0)?).or_default().1 += r.get::<_, i64>(1)?.max(0) as u64;
    }
    let sql = format!(
        "SELECT t_pred, seq, loss FROM sample INDEXED BY sample_level
         WHERE model = ?1 AND level IN ({}) AND t_pred >= ?2 AND t_pred < ?3",
        levels_from(j)
    );
    let mut st = conn.prepare_cached(&sql)?;
    let (lo, hi) = (sec_key(c.from), sec_key(c.to.saturating_add(1)));
    let mut rows = st.query(params![m, lo.0, hi.0])?;
    let mut known: Vec<(Key, f64)> = Vec::new();
    while let Some(r) = rows.next()? {
        known.push(((r.get(0)?, r.get(1)?), r.get(2)?));
    }
    known.sort_unstable_by_key(|(k, _)| *k);
    for (k, l) in known {
        per_sec.entry(k.0.div_euclid(1000)).or_default().0.push(l);
    }
    let mut g = Grouped::default();
    for (_, (losses, n)) in per_sec {
        // More labelled samples than counted predictions can only come from state written
        // before the counts existed; the count then is at least what is known.
        let unknown = n.saturating_sub(losses.len() as u64);
        g.push_group(losses, unknown);
    }
    Ok(g)
}

/// Slice features as stored (a JSON array of strings); `None` when absent or unreadable.
pub(super) fn parse_features(json: Option<&str>) -> Option<Vec<String>> {
    json.and_then(|f| serde_json::from_str::<Vec<String>>(f).ok())
}
