//! The evaluation history and what each taken file held: the tables the status page and the
//! report read. A history point is written right after the file that moved its model's event
//! clock into a new `every`, in a transaction of its own, and holds the snapshot of the
//! committed state after that file. Since it depends only on the files taken and their order,
//! a replay of the same files writes the same points; and a crash between the file's commit and
//! the point's leaves the state as it was after the file, so the first thing the next start
//! does is write that point (`history_due`), from the same state.

use super::*;

/// One taken file as the report lists it.
#[derive(Clone, Debug, PartialEq)]
pub struct TakenFile {
    /// Taken order (the file table's rowid): the order a replay feeds them in.
    pub seq: i64,
    pub model: String,
    pub kind: Kind,
    pub name: String,
    pub hash: String,
    pub rows_ok: u64,
    pub rows_bad: u64,
    pub committed_ms: i64,
    /// The oldest and newest event time among its accepted rows (None: no row accepted, or
    /// taken by a build that did not record it).
    pub span: Option<(i64, i64)>,
    /// Rejected rows by reason (`RejectReason::as_str`).
    pub rejects: Vec<(String, u64)>,
}

/// The detail of one file, written in its own transaction.
pub(super) fn insert_file_detail(
    tx: &Connection,
    model: &str,
    kind: Kind,
    hash: &str,
    span: Option<(i64, i64)>,
    rejected: &BTreeMap<RejectReason, u64>,
) -> rusqlite::Result<()> {
    let rejects: serde_json::Map<String, serde_json::Value> =
        rejected.iter().map(|(r, n)| (r.as_str().to_string(), (*n).into())).collect();
    tx.prepare_cached(
        "INSERT OR REPLACE INTO file_detail (model, kind, hash, t_first, t_last, rejects) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
    )?
    .execute(params![
        model,
        kind.as_str(),
        hash,
        span.map(|s| s.0),
        span.map(|s| s.1),
        serde_json::Value::Object(rejects).to_string()
    ])?;
    Ok(())
}

impl Store {
    /// The model's event clock: the newest event time (ms) of any row it has taken.
    pub fn watermark(&self, model: &str) -> Result<Option<i64>, StoreError> {
        Ok(self
            .conn
            .prepare_cached("SELECT watermark FROM model_meta WHERE model = ?1")?
            .query_row([model], |r| r.get::<_, Option<i64>>(0))
            .optional()?
            .flatten())
    }

    /// Writes one point and drops the model's points older than `keep_from_ms`, in one
    /// transaction.
    pub fn record_history(
        &mut self,
        model: &str,
        bucket: i64,
        t_ms: i64,
        point: &str,
        keep_from_ms: i64,
    ) -> Result<(), StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        tx.prepare_cached("INSERT OR REPLACE INTO history (model, bucket, t_ms, point) VALUES (?1, ?2, ?3, ?4)")?
            .execute(params![model, bucket, t_ms, point])?;
        tx.prepare_cached("DELETE FROM history WHERE model = ?1 AND t_ms < ?2")?
            .execute(params![model, keep_from_ms])?;
        tx.commit()?;
        Ok(())
    }

    /// The model's points with `from_ms <= t_ms <= to_ms`, oldest first, as stored (JSON).
    pub fn history(&self, model: &str, from_ms: i64, to_ms: i64) -> Result<Vec<(i64, String)>, StoreError> {
        if !self.has_table("history")? {
            return Ok(Vec::new());
        }
        let mut st = self.conn.prepare_cached(
            "SELECT t_ms, point FROM history WHERE model = ?1 AND t_ms >= ?2 AND t_ms <= ?3 ORDER BY bucket",
        )?;
        let rows = st.query_map(params![model, from_ms, to_ms], |r| Ok((r.get(0)?, r.get(1)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Every taken file of `model` (all models when None), in taken order, with its detail.
    pub fn taken_files(&self, model: Option<&str>) -> Result<Vec<TakenFile>, StoreError> {
        let detail = self.has_table("file_detail")?;
        let sql = if detail {
            "SELECT f.rowid, f.model, f.kind, f.name, f.hash, f.rows_ok, f.rows_bad, f.committed_ms,
                    d.t_first, d.t_last, d.rejects
             FROM file f LEFT JOIN file_detail d ON d.model = f.model AND d.kind = f.kind AND d.hash = f.hash
             WHERE ?1 IS NULL OR f.model = ?1 ORDER BY f.rowid"
        } else {
            "SELECT rowid, model, kind, name, hash, rows_ok, rows_bad, committed_ms, NULL, NULL, NULL
             FROM file WHERE ?1 IS NULL OR model = ?1 ORDER BY rowid"
        };
        let mut st = self.conn.prepare(sql)?;
        let rows = st.query_map([model], |r| {
            let kind: String = r.get(2)?;
            let (first, last): (Option<i64>, Option<i64>) = (r.get(8)?, r.get(9)?);
            let rejects: Option<String> = r.get(10)?;
            let rejects = rejects
                .and_then(|j| serde_json::from_str::<serde_json::Map<String, serde_json::Value>>(&j).ok())
                .map(|m| m.into_iter().map(|(k, v)| (k, v.as_u64().unwrap_or(0))).collect())
                .unwrap_or_default();
            Ok(TakenFile {
                seq: r.get(0)?,
                model: r.get(1)?,
                kind: if kind == Kind::Label.as_str() { Kind::Label } else { Kind::Prediction },
                name: r.get(3)?,
                hash: r.get(4)?,
                rows_ok: r.get::<_, i64>(5)? as u64,
                rows_bad: r.get::<_, i64>(6)? as u64,
                committed_ms: r.get(7)?,
                span: first.zip(last),
                rejects,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// A state written by an older build, opened read-only, may lack the newer tables.
    fn has_table(&self, name: &str) -> Result<bool, StoreError> {
        Ok(self
            .conn
            .prepare_cached("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?1")?
            .query_row([name], |_| Ok(()))
            .optional()?
            .is_some())
    }
}
