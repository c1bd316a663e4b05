//! The input-shift tests' durable state: each prediction's feature cells (`shift_point`, kept
//! for the window the per-look test reads) and the sequential alarm (`shift_alarm`: its place
//! in the reference pool and its betting state), advanced inside each file's transaction.

use super::*;
use crate::config::InputShiftConfig;
use crate::estimate::kernel::Points;
use crate::estimate::kernel_betting::{Point, ShiftBetting};

/// The seed of the alarm's sampling hash: not the level hash's, so which predictions the alarm
/// pairs is independent of which ones a window's subsample keeps.
const ALARM_SAMPLE_SEED: u64 = 0xa1a2_5eed_0f5a;

/// One prediction's feature cells for the alarm, in prediction-time order once sorted.
pub(super) type FreshPoint = (i64, Vec<String>);

/// The alarm as stored and exported.
#[derive(Clone, Debug, PartialEq)]
pub struct ShiftAlarmView {
    pub log_evidence: f64,
    pub log_threshold: f64,
    /// Pairs since the reset at which it fired (latched until `riskbound reset`).
    pub fired_at: Option<u64>,
    /// Pairs since the reset.
    pub pairs: u64,
    /// Reference points not yet paired: once 0, no further evidence can come.
    pub pool_left: u64,
    /// Sampled predictions that came after the pool ran out.
    pub unpaired: u64,
}

/// A window of stored points for one look.
#[derive(Clone, Debug, Default)]
pub struct ShiftRows {
    /// Points in the window.
    pub in_window: u64,
    /// The subsample read: every point at sampling level `level` or above.
    pub cells: Vec<Vec<String>>,
    pub level: u8,
    /// The newest prediction time held, if any.
    pub newest_ms: Option<i64>,
    /// The window's oldest (t_pred, seq): rows below it are no longer needed.
    pub from: Option<(i64, i64)>,
}

/// The stored alarm row: (pool fingerprint, next pool index, state JSON or NULL after a reset,
/// unpaired).
type AlarmRow = (String, i64, Option<String>, i64);

/// Parses feature cells (numeric, then categorical, as the config orders them). Numeric cells
/// were checked on arrival; a row whose cells no longer fit (a damaged or hand-edited state)
/// is left out rather than let a NaN into every distance.
pub fn points_of<'a>(sh: &InputShiftConfig, rows: impl IntoIterator<Item = &'a [String]>) -> Points {
    let (dims, cats) = (sh.numeric.len(), sh.categorical.len());
    let mut out = Points { dims, cats, ..Points::default() };
    for cells in rows {
        let numeric: Option<Vec<f64>> = (cells.len() == dims + cats)
            .then(|| cells[..dims].iter().map(|c| loss::parse_number(c.as_bytes()).ok()).collect())
            .flatten();
        let Some(numeric) = numeric else { continue };
        out.numeric.extend(numeric);
        for (j, c) in cells[dims..].iter().enumerate() {
            out.categorical.push(sh.reference.coder.lookup(j, c.as_bytes()));
        }
    }
    out
}

/// A uniform number in [0, 1) from a request id.
fn unit_of(id: &str) -> f64 {
    (id_hash(id, ALARM_SAMPLE_SEED) >> 11) as f64 / (1u64 << 53) as f64
}

/// Numeric input-shift cells must parse when the prediction arrives (like slice features), so a
/// bad cell is rejected at its own line.
pub(super) fn check_shift_cells(model: &ModelConfig, rec: &Record) -> Result<(), (RejectReason, String)> {
    let Some(sh) = &model.input_shift else { return Ok(()) };
    for (name, &i) in sh.numeric.iter().zip(&sh.cells) {
        let Some(v) = rec.features.get(i) else { continue };
        if loss::parse_number(v.as_bytes()).is_err() {
            return Err((RejectReason::BadNumber, format!("column {name}: {v:?} is not a finite number")));
        }
    }
    Ok(())
}

impl Store {
    /// Stores a new prediction's feature cells, and queues them for the alarm when the request
    /// is sampled.
    pub(super) fn insert_shift_point(
        tx: &Connection,
        model: &ModelConfig,
        rec: &Record,
        fresh: &mut Vec<FreshPoint>,
    ) -> rusqlite::Result<()> {
        let Some(sh) = &model.input_shift else { return Ok(()) };
        let cells: Vec<String> = sh.cells.iter().map(|&i| rec.features[i].clone()).collect();
        let json = serde_json::to_string(&cells).expect("strings serialise");
        tx.prepare_cached("INSERT INTO shift_point (model, t_pred, level, cells) VALUES (?1, ?2, ?3, ?4)")?
            .execute(params![model.name, rec.time_ms, level_of(&rec.id), json])?;
        if let Some(a) = &sh.alarm {
            if a.sample_rate >= 1.0 || unit_of(&rec.id) < a.sample_rate {
                fresh.push((rec.time_ms, cells));
            }
        }
        Ok(())
    }

    fn alarm_row(tx: &Connection, model: &str) -> rusqlite::Result<Option<AlarmRow>> {
        tx.prepare_cached("SELECT fingerprint, next, state, unpaired FROM shift_alarm WHERE model = ?1")?
            .query_row([model], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
            .optional()
    }

    /// The stored alarm for the configured reference and settings: its betting state (fresh
    /// after a reset or a change of settings), the next pool index (0 for another pool: a
    /// point of this pool is never paired twice), and the unpaired count.
    fn stored_alarm(tx: &Connection, model: &ModelConfig) -> Result<Option<(ShiftBetting, usize, u64)>, StoreError> {
        let Some(sh) = &model.input_shift else { return Ok(None) };
        let (Some(a), Some(r)) = (&sh.alarm, &sh.reference.alarm) else { return Ok(None) };
        let fresh = ShiftBetting::new(r.sigma, a.memory, sh.confidence.delta());
        let Some((fingerprint, next, state, unpaired)) = Self::alarm_row(tx, &model.name)? else {
            return Ok(Some((fresh, 0, 0)));
        };
        if fingerprint != r.fingerprint {
            return Ok(Some((fresh, 0, 0)));
        }
        let bad = |e: serde_json::Error| StoreError::Tracker { model: model.name.clone(), reason: e.to_string() };
        let betting = match state {
            None => fresh,
            Some(text) => {
                let stored: ShiftBetting = serde_json::from_str(&text).map_err(bad)?;
                if stored.same_test(&fresh) {
                    stored
                } else {
                    fresh
                }
            }
        };
        Ok(Some((betting, next.max(0) as usize, unpaired.max(0) as u64)))
    }

    /// Pairs the file's sampled predictions, in prediction-time order, with reference points
    /// not used before, inside the file's transaction.
    pub(super) fn advance_shift_alarm(
        tx: &Connection,
        model: &ModelConfig,
        fresh: &mut [FreshPoint],
    ) -> Result<(), StoreError> {
        if fresh.is_empty() {
            return Ok(());
        }
        let Some((mut betting, mut next, mut unpaired)) = Self::stored_alarm(tx, model)? else { return Ok(()) };
        let sh = model.input_shift.as_ref().expect("stored_alarm returned a state");
        let r = sh.reference.alarm.as_ref().expect("stored_alarm returned a state");
        fresh.sort_by_key(|p| p.0);
        let current = points_of(sh, fresh.iter().map(|p| p.1.as_slice()));
        for i in 0..current.len() {
            match r.pool.get(next) {
                Some(x) => {
                    let y: Point = current.standardised(i, &r.scale);
                    betting.push(x.clone(), y);
                    next += 1;
                }
                None => unpaired += 1,
            }
        }
        let text = serde_json::to_string(&betting)
            .map_err(|e| StoreError::Tracker { model: model.name.clone(), reason: e.to_string() })?;
        tx.prepare_cached(
            "INSERT INTO shift_alarm (model, fingerprint, next, state, unpaired) VALUES (?1, ?2, ?3, ?4, ?5)
             ON CONFLICT (model) DO UPDATE SET fingerprint = excluded.fingerprint, next = excluded.next,
             state = excluded.state, unpaired = excluded.unpaired",
        )?
        .execute(params![model.name, r.fingerprint, next as i64, text, unpaired as i64])?;
        Ok(())
    }

    /// The alarm as the next sampled prediction would find it; `None` without one.
    pub fn shift_alarm(&self, model: &ModelConfig) -> Result<Option<ShiftAlarmView>, StoreError> {
        let Some((b, next, unpaired)) = Self::stored_alarm(&self.conn, model)? else { return Ok(None) };
        let pool = model.input_shift.as_ref().and_then(|s| s.reference.alarm.as_ref()).map_or(0, |r| r.pool.len());
        Ok(Some(ShiftAlarmView {
            log_evidence: b.log_evidence(),
            log_threshold: b.log_threshold(),
            fired_at: b.fired_at(),
            pairs: b.pairs(),
            pool_left: pool.saturating_sub(next) as u64,
            unpaired,
        }))
    }

    /// The newest prediction time with stored input-shift cells.
    pub fn shift_newest(&self, model: &str) -> Result<Option<i64>, StoreError> {
        Ok(self.conn.query_row("SELECT MAX(t_pred) FROM shift_point WHERE model = ?1", [model], |r| r.get(0))?)
    }

    /// The model's input-shift window: its size, and its subsample at the lowest sampling
    /// level that leaves at most `max_points` (by the request-id hash, so uniform and never
    /// chosen by content).
    pub fn shift_rows(&self, model: &str, sh: &InputShiftConfig) -> Result<ShiftRows, StoreError> {
        let Some(newest) = self.shift_newest(model)? else { return Ok(ShiftRows::default()) };
        let from: (i64, i64) = match sh.window.kind {
            WindowKind::Last(n) => self
                .conn
                .query_row(
                    "SELECT t_pred, seq FROM shift_point INDEXED BY shift_point_time WHERE model = ?1
                     ORDER BY t_pred DESC, seq DESC LIMIT 1 OFFSET ?2",
                    params![model, n.saturating_sub(1).min(i64::MAX as u64) as i64],
                    |r| Ok((r.get(0)?, r.get(1)?)),
                )
                .optional()?
                .unwrap_or((i64::MIN, i64::MIN)),
            WindowKind::SpanMs(ms) => (newest.saturating_sub(ms).saturating_add(1), i64::MIN),
        };
        let mut levels = [0u64; LEVELS];
        let mut stmt = self.conn.prepare_cached(
            "SELECT level, COUNT(*) FROM shift_point INDEXED BY shift_point_time
             WHERE model = ?1 AND (t_pred > ?2 OR (t_pred = ?2 AND seq >= ?3)) GROUP BY level",
        )?;
        let mut rows = stmt.query(params![model, from.0, from.1])?;
        while let Some(r) = rows.next()? {
            let (l, c): (i64, i64) = (r.get(0)?, r.get(1)?);
            levels[(l.clamp(0, LEVELS as i64 - 1)) as usize] += c as u64;
        }
        let in_window = levels.iter().sum();
        let level = sample_level(&levels, sh.max_points as u64);
        let mut stmt = self.conn.prepare_cached(
            "SELECT t_pred, seq, cells FROM shift_point INDEXED BY shift_point_level
             WHERE model = ?1 AND level = ?2 AND (t_pred > ?3 OR (t_pred = ?3 AND seq >= ?4))",
        )?;
        let mut keyed: Vec<((i64, i64), String)> = Vec::new();
        for j in level..LEVELS as u8 {
            let mut rows = stmt.query(params![model, j, from.0, from.1])?;
            while let Some(r) = rows.next()? {
                keyed.push(((r.get(0)?, r.get(1)?), r.get(2)?));
            }
        }
        // In prediction-time order, as the points were made (the tests' seeded draws then do
        // not depend on how the levels split the rows).
        keyed.sort_unstable_by_key(|k| k.0);
        let cells = keyed
            .into_iter()
            .map(|(_, text)| {
                serde_json::from_str::<Vec<String>>(&text)
                    .map_err(|e| StoreError::Tracker { model: model.to_string(), reason: e.to_string() })
            })
            .collect::<Result<Vec<_>, _>>()?;
        Ok(ShiftRows { in_window, cells, level, newest_ms: Some(newest), from: Some(from) })
    }

    /// Deletes the model's stored points older than `from` (the window's oldest): the look
    /// never needs them again.
    pub fn prune_shift(&mut self, model: &str, from: (i64, i64)) -> Result<u64, StoreError> {
        let n = self.conn.execute(
            "DELETE FROM shift_point WHERE model = ?1 AND (t_pred < ?2 OR (t_pred = ?2 AND seq < ?3))",
            params![model, from.0, from.1],
        )?;
        Ok(n as u64)
    }
}
