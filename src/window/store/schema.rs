//! The database layout: tables, the states a prediction moves through, the counter helper,
//! and the in-place migration from older layouts.

use super::*;

pub(super) const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS file (
    model TEXT NOT NULL, kind TEXT NOT NULL, hash TEXT NOT NULL, name TEXT NOT NULL,
    rows_ok INTEGER NOT NULL, rows_bad INTEGER NOT NULL, committed_ms INTEGER NOT NULL,
    size INTEGER, mtime_ns INTEGER,
    PRIMARY KEY (model, kind, hash));
CREATE INDEX IF NOT EXISTS file_name ON file (model, kind, name);
CREATE TABLE IF NOT EXISTS pred (
    model TEXT NOT NULL, id TEXT NOT NULL, t_pred INTEGER NOT NULL, value TEXT NOT NULL,
    state INTEGER NOT NULL, label TEXT,
    PRIMARY KEY (model, id)) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS pred_time ON pred (model, t_pred);
CREATE TABLE IF NOT EXISTS orphan (
    model TEXT NOT NULL, id TEXT NOT NULL, t_label INTEGER NOT NULL, value TEXT NOT NULL,
    PRIMARY KEY (model, id)) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS orphan_time ON orphan (model, t_label);
CREATE TABLE IF NOT EXISTS sample (
    seq INTEGER PRIMARY KEY, model TEXT NOT NULL, id TEXT NOT NULL,
    t_pred INTEGER NOT NULL, t_label INTEGER NOT NULL, loss REAL NOT NULL, level INTEGER NOT NULL DEFAULT 0);
CREATE INDEX IF NOT EXISTS sample_time ON sample (model, t_pred);
CREATE TABLE IF NOT EXISTS counter (
    model TEXT NOT NULL, name TEXT NOT NULL, value REAL NOT NULL,
    PRIMARY KEY (model, name));
CREATE TABLE IF NOT EXISTS model_meta (
    model TEXT PRIMARY KEY, watermark INTEGER, last_commit_ms INTEGER, expired_to INTEGER, counted_from INTEGER);
CREATE TABLE IF NOT EXISTS pred_count (
    model TEXT NOT NULL, sec INTEGER NOT NULL, level INTEGER NOT NULL DEFAULT 0, n INTEGER NOT NULL,
    PRIMARY KEY (model, sec, level)) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS shift_point (
    seq INTEGER PRIMARY KEY, model TEXT NOT NULL, t_pred INTEGER NOT NULL, level INTEGER NOT NULL,
    cells TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS shift_point_time ON shift_point (model, t_pred);
CREATE INDEX IF NOT EXISTS shift_point_level ON shift_point (model, level, t_pred);
CREATE TABLE IF NOT EXISTS shift_alarm (
    model TEXT PRIMARY KEY, fingerprint TEXT NOT NULL, next INTEGER NOT NULL, state TEXT,
    unpaired INTEGER NOT NULL DEFAULT 0);
CREATE TABLE IF NOT EXISTS file_detail (
    model TEXT NOT NULL, kind TEXT NOT NULL, hash TEXT NOT NULL, t_first INTEGER, t_last INTEGER,
    rejects TEXT NOT NULL,
    PRIMARY KEY (model, kind, hash)) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS history (
    model TEXT NOT NULL, bucket INTEGER NOT NULL, t_ms INTEGER NOT NULL, point TEXT NOT NULL,
    PRIMARY KEY (model, bucket)) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS tracker (
    model TEXT PRIMARY KEY, state TEXT, reset_ms INTEGER, resets INTEGER NOT NULL DEFAULT 0);
";

pub(super) const AWAITING: i64 = 0;
pub(super) const LABELLED: i64 = 1;
pub(super) const EXPIRED: i64 = 2;

/// Adds to a counter inside the current transaction.
pub(super) fn bump(tx: &Connection, model: &str, name: &str, by: f64) -> rusqlite::Result<()> {
    // Counters are REAL so that one table holds counts and sums alike; every count stays far
    // below 2^53, where doubles are exact.
    if by == 0.0 {
        return Ok(());
    }
    tx.prepare_cached(
        "INSERT INTO counter (model, name, value) VALUES (?1, ?2, ?3)
         ON CONFLICT (model, name) DO UPDATE SET value = value + excluded.value",
    )?
    .execute(params![model, name, by])?;
    Ok(())
}

/// The layout version this build writes (`PRAGMA user_version`).
pub(super) const LAYOUT: i64 = 4;

/// Brings state written by an older build up to this layout, once, in one transaction.
/// Columns added later are NULL for old rows (no slice features recorded, no expiry cutoff
/// yet: the first file's expiry then scans from the start). Layout 2 indexes predictions by
/// time alone, so a label's state change rewrites only its own row, not an index entry too,
/// and keeps the number of waiting predictions as a counter instead of counting the index.
pub(super) fn migrate(conn: &mut Connection) -> rusqlite::Result<()> {
    let version: i64 = conn.query_row("PRAGMA user_version", [], |r| r.get(0))?;
    if version >= LAYOUT {
        return Ok(());
    }
    let tx = conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
    for (table, column) in [
        ("pred", "features TEXT"),
        ("sample", "features TEXT"),
        ("model_meta", "expired_to INTEGER"),
        ("model_meta", "counted_from INTEGER"),
    ] {
        let name = column.split(' ').next().expect("a column has a name");
        let has: bool =
            tx.prepare(&format!("SELECT 1 FROM pragma_table_info('{table}') WHERE name = '{name}'"))?.exists([])?;
        if !has {
            tx.execute_batch(&format!("ALTER TABLE {table} ADD COLUMN {column}"))?;
        }
    }
    tx.execute_batch("DROP INDEX IF EXISTS pred_waiting")?;
    tx.execute(
        "INSERT INTO counter (model, name, value) SELECT model, 'awaiting', COUNT(*) FROM pred WHERE state = ?1
         GROUP BY model ON CONFLICT (model, name) DO UPDATE SET value = excluded.value",
        [AWAITING],
    )?;
    if version < 3 {
        // Layout 3 counts predictions per second, for the delay-robust cohorts. The predictions
        // still held are every one from the oldest held second on (decided ones are deleted
        // only from the oldest end), so counts are complete from the second after it; cohorts
        // never reach below that (`counted_from`).
        tx.execute_batch(
            "DELETE FROM pred_count;
             INSERT INTO pred_count (model, sec, n)
                 SELECT model, t_pred / 1000 - (t_pred % 1000 < 0), COUNT(*) FROM pred GROUP BY 1, 2;
             INSERT INTO model_meta (model) SELECT DISTINCT model FROM pred WHERE true
                 ON CONFLICT (model) DO NOTHING;
             INSERT INTO model_meta (model) SELECT DISTINCT model FROM sample WHERE true
                 ON CONFLICT (model) DO NOTHING;
             UPDATE model_meta SET counted_from = COALESCE(
                 (SELECT MIN(sec) + 1 FROM pred_count WHERE pred_count.model = model_meta.model),
                 (SELECT MAX(t_pred) / 1000 + 1 FROM sample WHERE sample.model = model_meta.model));",
        )?;
    }
    // Layout 4 gives samples and prediction counts a sampling level (see `ranges::level_of`),
    // indexed so a window's subsample is read without visiting the rest. Rows written before
    // have level 0: they join only the level-0 subsample, which is every row (a choice by age,
    // never by outcome, so the subsample stays a valid one under the i.i.d. assumption).
    let has_level: bool = tx.prepare("SELECT 1 FROM pragma_table_info('sample') WHERE name = 'level'")?.exists([])?;
    if !has_level {
        tx.execute_batch("ALTER TABLE sample ADD COLUMN level INTEGER NOT NULL DEFAULT 0")?;
    }
    let counts_have_level: bool =
        tx.prepare("SELECT 1 FROM pragma_table_info('pred_count') WHERE name = 'level'")?.exists([])?;
    if !counts_have_level {
        tx.execute_batch(
            "CREATE TABLE pred_count_4 (
                 model TEXT NOT NULL, sec INTEGER NOT NULL, level INTEGER NOT NULL DEFAULT 0, n INTEGER NOT NULL,
                 PRIMARY KEY (model, sec, level)) WITHOUT ROWID;
             INSERT INTO pred_count_4 (model, sec, level, n) SELECT model, sec, 0, n FROM pred_count;
             DROP TABLE pred_count;
             ALTER TABLE pred_count_4 RENAME TO pred_count;",
        )?;
    }
    tx.execute_batch(
        "CREATE INDEX IF NOT EXISTS sample_level ON sample (model, level, t_pred);
         CREATE INDEX IF NOT EXISTS pred_count_level ON pred_count (model, level, sec);",
    )?;
    tx.execute_batch(&format!("PRAGMA user_version = {LAYOUT}"))?;
    tx.commit()
}
