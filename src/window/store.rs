//! Durable state in one SQLite database (WAL, synchronous=FULL): which files were taken, the
//! predictions waiting for labels, labels waiting for predictions, the joined samples that feed
//! the windows, and every counter the daemon exports.
//!
//! One transaction per input file holds the file's fingerprint and every change it causes, so a
//! kill -9 at any instant leaves either all of a file or none of it: nothing lost, nothing twice.
//! Counters live in the same transactions, so they survive restarts without double counting.

use std::collections::BTreeMap;
use std::path::Path;

use rusqlite::{params, Connection, OptionalExtension, TransactionBehavior};

use crate::config::{ModelConfig, WindowConfig, WindowKind};
use crate::estimate::anytime::Tracker;
use crate::estimate::delay_robust::Cohort;
pub use crate::ingest::records::Kind;
use crate::ingest::records::{Record, Reject, RejectReason};
use crate::loss::{self, LossSpec};

/// Upper bounds (seconds) of the label-delay histogram buckets: a minute to two weeks.
pub const DELAY_BUCKETS: [f64; 12] =
    [60.0, 300.0, 900.0, 3600.0, 10800.0, 21600.0, 43200.0, 86400.0, 172800.0, 259200.0, 604800.0, 1209600.0];

/// A state-database failure.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("state database: {0}")]
    Sql(#[from] rusqlite::Error),
    #[error("state database: stored anytime state of model {model} does not parse: {reason}")]
    Tracker { model: String, reason: String },
    /// SQLite opens a file it cannot write read-only, without an error; such a connection
    /// would stay read-only after the volume accepts writes again, so it is refused.
    #[error("state database {0}: the volume or the file is read-only")]
    ReadOnly(String),
}

impl StoreError {
    /// True when the database can only be written through a new connection: SQLite keeps a
    /// connection it opened read-only that way, and after an I/O error the connection's open
    /// files may belong to a filesystem that failed (ext4 turns itself read-only on an error)
    /// and was since mounted again over the same path, which only a new open reaches.
    pub fn needs_reopen(&self) -> bool {
        match self {
            StoreError::ReadOnly(_) => true,
            StoreError::Sql(rusqlite::Error::SqliteFailure(e, _)) => {
                matches!(e.code, rusqlite::ErrorCode::ReadOnly | rusqlite::ErrorCode::SystemIoFailure)
            }
            _ => false,
        }
    }

    /// True when the failure is the disk (full, read-only, I/O), not a logic error.
    pub fn is_disk(&self) -> bool {
        if matches!(self, StoreError::ReadOnly(_)) {
            return true;
        }
        let StoreError::Sql(rusqlite::Error::SqliteFailure(e, _)) = self else { return false };
        matches!(
            e.code,
            rusqlite::ErrorCode::DiskFull
                | rusqlite::ErrorCode::ReadOnly
                | rusqlite::ErrorCode::SystemIoFailure
                | rusqlite::ErrorCode::CannotOpen
        )
    }
}

/// What one file did.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct FileOutcome {
    /// The same content was taken before (under any name): nothing changed.
    pub already_taken: bool,
    pub rows_ok: u64,
    pub rejected: BTreeMap<RejectReason, u64>,
    /// The first rejected row, for the log line.
    pub first_reject: Option<Reject>,
    /// Labelled samples this file completed.
    pub joined: u64,
    /// The stored anytime state was made for other settings (confidence, SLA, reference) and
    /// was restarted from this file on.
    pub tracker_restarted: bool,
}

/// A model's anytime state as stored: the tracker, when its reset point was, how many resets.
#[derive(Clone, Debug, PartialEq)]
pub struct TrackerState {
    pub tracker: Tracker,
    /// Wall-clock ms of the reset point: the first sample, or the last reset.
    pub reset_ms: Option<i64>,
    pub resets: u64,
}

/// A stored tracker row: (state JSON, or NULL after a reset; reset_ms; resets).
type TrackerRow = (Option<String>, Option<i64>, u64);

/// A window's sample as read back: its loss and, if recorded, its slice features.
pub type WindowRow = (f64, Option<Vec<String>>);

/// A labelled sample's loss and label delay (ms), for the test of whether delays depend on
/// outcomes.
pub type DelayRow = (f64, i64);

/// A window as the estimators read it: its labelled rows and, once there are predictions, its
/// cohort (see [`Store::window_view`]).
pub type WindowView = (Vec<WindowRow>, Option<(CohortRange, Cohort)>);

/// The whole seconds of prediction time a window's cohort covers, inclusive.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct CohortRange {
    pub from_sec: i64,
    pub to_sec: i64,
}

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
fn cohort_anchor(w: &WindowConfig, newest_sec: i64, label_wait_ms: i64) -> i64 {
    if w.mature {
        newest_sec - (label_wait_ms + 999) / 1000
    } else {
        newest_sec
    }
}

/// A joined sample about to be stored.
struct NewSample<'a> {
    id: &'a str,
    t_pred: i64,
    t_label: i64,
    loss: f64,
    /// The prediction's slice features (JSON), if any.
    features: Option<&'a str>,
}

/// What one file did to the join state, gathered so that each counter is written once per
/// file rather than once per row.
#[derive(Default)]
struct Joins {
    /// The label delays of the samples it completed, in the order they were joined.
    delays: Vec<f64>,
    /// Change in the number of predictions waiting for a label.
    awaiting: i64,
    /// Predictions that arrived already older than the expiry cutoff: expired on arrival.
    expired: u64,
    /// The expiry cutoff before this file: every prediction older than it is decided.
    expired_to: i64,
    /// The samples it stored, in join order, keyed as in [`KeptSamples`].
    kept: Vec<((i64, i64), Kept)>,
    /// Predictions it added, per prediction second (the cohorts' denominators).
    counted: BTreeMap<i64, u64>,
    /// Predictions whose label_wait it closed, in prediction-time order: the loss, or `None`
    /// when no label came. The anytime tracker takes them in this order.
    matured: Vec<Option<f64>>,
}

/// The counters of one model, as exported.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Counters {
    pub rows: BTreeMap<Kind, u64>,
    pub files: BTreeMap<Kind, u64>,
    pub rejected: BTreeMap<(Kind, RejectReason), u64>,
    pub joined: u64,
    pub expired: u64,
    pub orphaned: u64,
    /// Cumulative counts per bucket of [`DELAY_BUCKETS`] (non-cumulative storage, summed on read).
    pub delay_buckets: Vec<u64>,
    pub delay_count: u64,
    pub delay_sum_seconds: f64,
}

/// One decoded batch file, ready to apply.
pub struct Batch<'a> {
    pub kind: Kind,
    /// The file's name, for messages.
    pub name: &'a str,
    /// Hex SHA-256 of the file's bytes: its identity, whatever its name.
    pub hash: &'a str,
    pub records: &'a [Record],
    pub rejects: &'a [Reject],
    /// Size and mtime the file had when it was read, so a restart can skip it unread.
    pub size: Option<i64>,
    pub mtime_ns: Option<i64>,
}

/// A kept sample as the windows read it: its loss and its slice features, parsed once when
/// the sample is kept rather than at every publish.
#[derive(Clone, Debug)]
struct Kept {
    loss: f64,
    features: Option<Vec<String>>,
    /// t_label − t_pred, ms.
    delay_ms: i64,
}

/// Kept samples as window rows in arrival order, as betting needs: seq is the order samples
/// were stored in.
fn arrival_rows(mut picked: Vec<(&(i64, i64), &Kept)>) -> Vec<WindowRow> {
    picked.sort_unstable_by_key(|(k, _)| k.1);
    picked.into_iter().map(|(_, v)| (v.loss, v.features.clone())).collect()
}

/// Slice features as stored (a JSON array of strings); `None` when absent or unreadable.
fn parse_features(json: Option<&str>) -> Option<Vec<String>> {
    json.and_then(|f| serde_json::from_str::<Vec<String>>(f).ok())
}

/// One model's kept samples by (t_pred, seq): the order the windows cut them in.
type KeptSamples = BTreeMap<(i64, i64), Kept>;

/// One model's state in memory: its kept samples, its predictions per prediction second, and
/// the first second whose count is complete (state upgraded from a layout without counts).
#[derive(Default)]
struct Memory {
    kept: KeptSamples,
    counts: BTreeMap<i64, u64>,
    counted_from: Option<i64>,
}

/// The durable state.
pub struct Store {
    conn: Connection,
    /// Each model's kept samples, read from the database the first time a window needs them and
    /// then kept in step with it after every commit (the same inserts, the same pruning), so a
    /// publish cuts its windows from memory instead of reading them back from SQLite: with a
    /// window of millions of samples that read took seconds, once a second.
    kept: std::cell::RefCell<std::collections::HashMap<String, Memory>>,
}

const SCHEMA: &str = "
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
    t_pred INTEGER NOT NULL, t_label INTEGER NOT NULL, loss REAL NOT NULL);
CREATE INDEX IF NOT EXISTS sample_time ON sample (model, t_pred);
CREATE TABLE IF NOT EXISTS counter (
    model TEXT NOT NULL, name TEXT NOT NULL, value REAL NOT NULL,
    PRIMARY KEY (model, name));
CREATE TABLE IF NOT EXISTS model_meta (
    model TEXT PRIMARY KEY, watermark INTEGER, last_commit_ms INTEGER, expired_to INTEGER, counted_from INTEGER);
CREATE TABLE IF NOT EXISTS pred_count (
    model TEXT NOT NULL, sec INTEGER NOT NULL, n INTEGER NOT NULL,
    PRIMARY KEY (model, sec)) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS tracker (
    model TEXT PRIMARY KEY, state TEXT, reset_ms INTEGER, resets INTEGER NOT NULL DEFAULT 0);
";

const AWAITING: i64 = 0;
const LABELLED: i64 = 1;
const EXPIRED: i64 = 2;

/// Adds to a counter inside the current transaction.
fn bump(tx: &Connection, model: &str, name: &str, by: f64) -> rusqlite::Result<()> {
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

/// The loss of a labelled prediction, or why there is none.
fn loss_of(spec: &LossSpec, prediction: &str, label: &str) -> Result<f64, RejectReason> {
    match *spec {
        LossSpec::ZeroOne => Ok(loss::zero_one(prediction.trim().as_bytes(), label.trim().as_bytes())),
        LossSpec::Absolute { .. } | LossSpec::Squared { .. } => {
            let p = loss::parse_number(prediction.as_bytes()).map_err(|_| RejectReason::BadNumber)?;
            let y = loss::parse_number(label.as_bytes()).map_err(|_| RejectReason::BadNumber)?;
            Ok(loss::regression(spec, p, y).value)
        }
        LossSpec::Column { max } => {
            let v = loss::parse_number(label.as_bytes()).map_err(|_| RejectReason::BadNumber)?;
            loss::check_loss(v, max).map_err(|_| RejectReason::OutOfRange)
        }
    }
}

/// The layout version this build writes (`PRAGMA user_version`).
const LAYOUT: i64 = 3;

/// Brings state written by an older build up to this layout, once, in one transaction.
/// Columns added later are NULL for old rows (no slice features recorded, no expiry cutoff
/// yet: the first file's expiry then scans from the start). Layout 2 indexes predictions by
/// time alone, so a label's state change rewrites only its own row, not an index entry too,
/// and keeps the number of waiting predictions as a counter instead of counting the index.
fn migrate(conn: &mut Connection) -> rusqlite::Result<()> {
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
    tx.execute_batch(&format!("PRAGMA user_version = {LAYOUT}"))?;
    tx.commit()
}

/// Numeric slice features must parse when the prediction arrives, so a bad cell is rejected
/// at its own line rather than dropped from every later window.
fn check_features(model: &ModelConfig, rec: &Record) -> Result<(), (RejectReason, String)> {
    let Some(sl) = &model.slices else { return Ok(()) };
    let nc = sl.categorical.len();
    for (name, v) in sl.numeric.iter().zip(rec.features.iter().skip(nc)) {
        if loss::parse_number(v.as_bytes()).is_err() {
            return Err((RejectReason::BadNumber, format!("column {name}: {v:?} is not a number")));
        }
    }
    Ok(())
}

/// The features of a record as stored: a JSON array of strings, or NULL without slices.
fn features_json(rec: &Record) -> Option<String> {
    (!rec.features.is_empty()).then(|| serde_json::to_string(&rec.features).expect("strings serialise"))
}

/// Checks a value cell when it arrives, so a bad row is rejected at its own line.
fn check_value(spec: &LossSpec, kind: Kind, value: &str) -> Result<(), RejectReason> {
    match (spec, kind) {
        (LossSpec::ZeroOne, _) | (LossSpec::Column { .. }, Kind::Prediction) => Ok(()),
        (LossSpec::Column { max }, Kind::Label) => {
            let v = loss::parse_number(value.as_bytes()).map_err(|_| RejectReason::BadNumber)?;
            loss::check_loss(v, *max).map(|_| ()).map_err(|_| RejectReason::OutOfRange)
        }
        (_, _) => loss::parse_number(value.as_bytes()).map(|_| ()).map_err(|_| RejectReason::BadNumber),
    }
}

impl Store {
    /// Opens (creating if needed) the database in `dir`.
    pub fn open(dir: &Path) -> Result<Store, StoreError> {
        let path = dir.join("riskbound.sqlite");
        let mut conn = Connection::open(&path)?;
        if conn.is_readonly(rusqlite::MAIN_DB)? {
            return Err(StoreError::ReadOnly(path.display().to_string()));
        }
        // WAL lets /metrics readers and the writer proceed together; FULL makes each commit
        // durable before the file counts as taken.
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(None, "synchronous", "FULL")?;
        conn.busy_timeout(std::time::Duration::from_secs(5))?;
        // A larger page cache keeps the pred index in memory during a big file.
        conn.pragma_update(None, "cache_size", -65_536)?;
        conn.pragma_update(None, "temp_store", "MEMORY")?;
        conn.execute_batch(SCHEMA)?;
        migrate(&mut conn)?;
        Ok(Store { conn, kept: Default::default() })
    }

    /// The committed state of `dir`, for reading only: what /metrics shows while the volume
    /// refuses writes. A database left by a clean stop has no WAL file, and one cannot be
    /// created on a read-only volume, so that case is opened immutable (no other process can
    /// write to a read-only volume either). `None` when there is no database there.
    pub fn open_read_only(dir: &Path) -> Option<Store> {
        use rusqlite::OpenFlags;
        let path = dir.join("riskbound.sqlite");
        if !path.is_file() {
            return None;
        }
        let flags = OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_URI | OpenFlags::SQLITE_OPEN_NO_MUTEX;
        let readable = |c: &Connection| c.query_row("SELECT COUNT(*) FROM sqlite_master", [], |r| r.get::<_, i64>(0));
        let plain = Connection::open_with_flags(&path, flags).ok().filter(|c| readable(c).is_ok());
        let conn = plain.or_else(|| {
            // A URI path needs %, ? and # escaped.
            let escaped = path.display().to_string().replace('%', "%25").replace('?', "%3f").replace('#', "%23");
            let uri = format!("file:{escaped}?immutable=1");
            Connection::open_with_flags(uri, flags).ok().filter(|c| readable(c).is_ok())
        })?;
        Some(Store { conn, kept: Default::default() })
    }

    /// A database in memory, for tests and fuzzing: the same schema and logic, no durability.
    pub fn open_in_memory() -> Result<Store, StoreError> {
        let mut conn = Connection::open_in_memory()?;
        conn.execute_batch(SCHEMA)?;
        migrate(&mut conn)?;
        Ok(Store { conn, kept: Default::default() })
    }

    /// True when a file of this name, size and mtime was taken: after a restart the spool is not
    /// read and hashed again file by file. (A rewrite that keeps size and nanosecond mtime would
    /// be missed; writers that rename new files into place never do that.)
    pub fn has_file_meta(
        &self,
        model: &str,
        kind: Kind,
        name: &str,
        size: i64,
        mtime_ns: i64,
    ) -> Result<bool, StoreError> {
        Ok(self
            .conn
            .prepare_cached(
                "SELECT 1 FROM file WHERE model = ?1 AND kind = ?2 AND name = ?3 AND size = ?4 AND mtime_ns = ?5 LIMIT 1",
            )?
            .query_row(params![model, kind.as_str(), name, size, mtime_ns], |_| Ok(()))
            .optional()?
            .is_some())
    }

    /// The `limit` most recently taken files of (model, kind) with the size and mtime each had,
    /// newest first (a name taken again after a rewrite appears once per take): what a restart
    /// needs to recognise the unchanged files of its spool without one query per file.
    pub fn taken_file_metas(&self, model: &str, kind: Kind, limit: i64) -> Result<Vec<(String, i64, i64)>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT name, size, mtime_ns FROM file
             WHERE model = ?1 AND kind = ?2 AND size IS NOT NULL AND mtime_ns IS NOT NULL
             ORDER BY rowid DESC LIMIT ?3",
        )?;
        let rows = stmt.query_map(params![model, kind.as_str(), limit], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?;
        Ok(rows.collect::<rusqlite::Result<_>>()?)
    }

    /// True when this content was already taken for (model, kind).
    pub fn has_file(&self, model: &str, kind: Kind, hash: &str) -> Result<bool, StoreError> {
        Ok(self
            .conn
            .prepare_cached("SELECT 1 FROM file WHERE model = ?1 AND kind = ?2 AND hash = ?3")?
            .query_row(params![model, kind.as_str(), hash], |_| Ok(()))
            .optional()?
            .is_some())
    }

    /// Applies one decoded file in one transaction: its rows, its rejects, the joins they
    /// complete, the expiry they cause, and its fingerprint.
    pub fn ingest_file(
        &mut self,
        model: &ModelConfig,
        batch: &Batch<'_>,
        now_ms: i64,
    ) -> Result<FileOutcome, StoreError> {
        let Batch { kind, name, hash, records, rejects, .. } = *batch;
        let m = model.name.as_str();
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let mut out = FileOutcome::default();
        let seen: bool = tx
            .prepare_cached("SELECT 1 FROM file WHERE model = ?1 AND kind = ?2 AND hash = ?3")?
            .query_row(params![m, kind.as_str(), hash], |_| Ok(()))
            .optional()?
            .is_some();
        if seen {
            out.already_taken = true;
            return Ok(out);
        }
        let (watermark, expired_to): (Option<i64>, Option<i64>) = tx
            .query_row("SELECT watermark, expired_to FROM model_meta WHERE model = ?1", [m], |r| {
                Ok((r.get(0)?, r.get(1)?))
            })
            .optional()?
            .unwrap_or((None, None));
        let mut watermark = watermark.unwrap_or(i64::MIN);
        let mut joins = Joins { expired_to: expired_to.unwrap_or(i64::MIN), ..Joins::default() };
        // Most predictions have no early label; skip the per-row lookup when none is held.
        let mut orphans_held: bool =
            tx.query_row("SELECT EXISTS (SELECT 1 FROM orphan WHERE model = ?1)", [m], |r| r.get(0))?;
        let reject = |out: &mut FileOutcome, r: Reject| {
            *out.rejected.entry(r.reason).or_default() += 1;
            if out.first_reject.is_none() {
                out.first_reject = Some(r);
            }
        };
        for r in rejects {
            reject(&mut out, r.clone());
        }
        for rec in records {
            if rec.time_ms > now_ms.saturating_add(model.future_tolerance_ms) {
                let message = format!(
                    "{name}:{}: time {} ms is ahead of the clock by more than future_tolerance",
                    rec.line, rec.time_ms
                );
                reject(&mut out, Reject { line: rec.line, reason: RejectReason::FutureTimestamp, message });
                continue;
            }
            if let Err(reason) = check_value(&model.loss, kind, &rec.value) {
                let message = format!("{name}:{}: value {:?}: {reason}", rec.line, rec.value);
                reject(&mut out, Reject { line: rec.line, reason, message });
                continue;
            }
            if let Err((reason, what)) = check_features(model, rec) {
                let message = format!("{name}:{}: {what}", rec.line);
                reject(&mut out, Reject { line: rec.line, reason, message });
                continue;
            }
            let result = match kind {
                Kind::Prediction => Self::take_prediction(&tx, model, rec, orphans_held, &mut joins)?,
                Kind::Label => Self::take_label(&tx, model, rec, &mut orphans_held, &mut joins)?,
            };
            match result {
                Ok(joined) => {
                    out.rows_ok += 1;
                    out.joined += u64::from(joined);
                    watermark = watermark.max(rec.time_ms);
                }
                Err(reason) => {
                    let message = format!("{name}:{}: id {:?}: {reason}", rec.line, rec.id);
                    reject(&mut out, Reject { line: rec.line, reason, message });
                }
            }
        }
        // Expiry by event time: what waited longer than label_wait behind the newest event.
        // Everything below the previous cutoff is decided already (predictions arriving below
        // it are expired on arrival), so only the predictions between the two cutoffs are
        // visited: each prediction once in its life, not the whole table per file. The cutoff
        // never moves back, even when label_wait is raised.
        let mut expired_to = joins.expired_to;
        if watermark > i64::MIN {
            let cutoff = watermark.saturating_sub(model.label_wait_ms).max(expired_to);
            // Their wait is over: each is labelled for good or never will be. In prediction-time
            // order (then id), which the outcomes cannot change, they go to the anytime tracker.
            {
                let mut st = tx.prepare_cached(
                    "SELECT state, value, label FROM pred WHERE model = ?1 AND t_pred >= ?2 AND t_pred < ?3
                     ORDER BY t_pred, id",
                )?;
                let rows = st.query_map(params![m, expired_to, cutoff], |r| {
                    Ok((r.get::<_, i64>(0)?, r.get::<_, String>(1)?, r.get::<_, Option<String>>(2)?))
                })?;
                for row in rows {
                    let (state, value, label) = row?;
                    joins.matured.push(match (state, label) {
                        (LABELLED, Some(label)) => {
                            Some(loss_of(&model.loss, &value, &label).unwrap_or(model.loss.max()))
                        }
                        _ => None,
                    });
                }
            }
            let expired = tx
                .prepare_cached(
                    "UPDATE pred SET state = ?1 WHERE model = ?2 AND t_pred >= ?3 AND t_pred < ?4 AND state = ?5",
                )?
                .execute(params![EXPIRED, m, expired_to, cutoff, AWAITING])?;
            let orphaned = tx
                .prepare_cached("DELETE FROM orphan WHERE model = ?1 AND t_label < ?2")?
                .execute(params![m, cutoff])?;
            joins.expired += expired as u64;
            joins.awaiting -= expired as i64;
            bump(&tx, m, "orphaned", orphaned as f64)?;
            // Decided predictions are kept a second label_wait to catch late duplicates.
            tx.prepare_cached("DELETE FROM pred WHERE model = ?1 AND t_pred < ?2 AND state IN (?3, ?4)")?
                .execute(params![m, cutoff.saturating_sub(model.label_wait_ms), LABELLED, EXPIRED])?;
            expired_to = cutoff;
        }
        bump(&tx, m, "expired", joins.expired as f64)?;
        bump(&tx, m, "awaiting", joins.awaiting as f64)?;
        let delays = &joins.delays;
        let mut per_bucket = [0u64; DELAY_BUCKETS.len() + 1];
        for d in delays {
            per_bucket[DELAY_BUCKETS.iter().position(|b| d <= b).unwrap_or(DELAY_BUCKETS.len())] += 1;
        }
        for (i, n) in per_bucket.iter().enumerate() {
            bump(&tx, m, &format!("delay_bucket_{i}"), *n as f64)?;
        }
        bump(&tx, m, "samples_kept", delays.len() as f64)?;
        bump(&tx, m, "delay_count", delays.len() as f64)?;
        bump(&tx, m, "delay_sum_seconds", delays.iter().sum())?;
        bump(&tx, m, &format!("rows_{}", kind.as_str()), out.rows_ok as f64)?;
        bump(&tx, m, &format!("files_{}", kind.as_str()), 1.0)?;
        bump(&tx, m, "joined", out.joined as f64)?;
        for (reason, n) in &out.rejected {
            bump(&tx, m, &format!("rejected_{}_{}", kind.as_str(), reason.as_str()), *n as f64)?;
        }
        let bad: u64 = out.rejected.values().sum();
        tx.execute(
            "INSERT INTO file (model, kind, hash, name, rows_ok, rows_bad, committed_ms, size, mtime_ns)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
            params![m, kind.as_str(), hash, name, out.rows_ok as i64, bad as i64, now_ms, batch.size, batch.mtime_ns],
        )?;
        tx.execute(
            "INSERT INTO model_meta (model, watermark, last_commit_ms, expired_to) VALUES (?1, ?2, ?3, ?4)
             ON CONFLICT (model) DO UPDATE SET watermark = excluded.watermark, last_commit_ms = excluded.last_commit_ms,
             expired_to = excluded.expired_to",
            params![
                m,
                if watermark == i64::MIN { None } else { Some(watermark) },
                now_ms,
                if expired_to == i64::MIN { None } else { Some(expired_to) }
            ],
        )?;
        for (sec, n) in &joins.counted {
            tx.prepare_cached(
                "INSERT INTO pred_count (model, sec, n) VALUES (?1, ?2, ?3)
                 ON CONFLICT (model, sec) DO UPDATE SET n = n + excluded.n",
            )?
            .execute(params![m, sec, *n as i64])?;
        }
        let keep_from = Self::prune_samples(&tx, model)?;
        out.tracker_restarted = Self::advance_tracker(&tx, model, &joins.matured, now_ms)?;
        tx.commit()?;
        // Only once the commit stands: the samples in memory never run ahead of the database.
        if let Some(mem) = self.kept.get_mut().get_mut(m) {
            mem.kept.extend(joins.kept);
            for (sec, n) in joins.counted {
                *mem.counts.entry(sec).or_default() += n;
            }
            if keep_from > i64::MIN {
                mem.kept = mem.kept.split_off(&(keep_from, i64::MIN));
                mem.counts = mem.counts.split_off(&keep_from.div_euclid(1000));
            }
        }
        Ok(out)
    }

    fn insert_sample(tx: &Connection, model: &str, s: NewSample<'_>, joins: &mut Joins) -> rusqlite::Result<()> {
        let NewSample { id, t_pred, t_label, loss, features } = s;
        tx.prepare_cached(
            "INSERT INTO sample (model, id, t_pred, t_label, loss, features) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        )?
        .execute(params![model, id, t_pred, t_label, loss, features])?;
        let kept = Kept { loss, features: parse_features(features), delay_ms: t_label - t_pred };
        joins.kept.push(((t_pred, tx.last_insert_rowid()), kept));
        joins.delays.push(((t_label - t_pred).max(0) as f64) / 1000.0);
        Ok(())
    }

    /// The stored tracker row: (state JSON or NULL after a reset, reset_ms, resets).
    fn tracker_row(tx: &Connection, model: &str) -> rusqlite::Result<Option<TrackerRow>> {
        tx.prepare_cached("SELECT state, reset_ms, resets FROM tracker WHERE model = ?1")?
            .query_row([model], |r| Ok((r.get(0)?, r.get(1)?, r.get::<_, i64>(2)? as u64)))
            .optional()
    }

    /// The stored state if it was made for the configured spec; `Ok(None)` when there is none,
    /// it was reset, or it was made for other settings (the bool says which of the last).
    fn stored_tracker(tx: &Connection, model: &ModelConfig) -> Result<(Option<TrackerState>, bool), StoreError> {
        let Some((state, reset_ms, resets)) = Self::tracker_row(tx, &model.name)? else { return Ok((None, false)) };
        let fresh = TrackerState { tracker: Tracker::new(model.tracker_spec()), reset_ms, resets };
        let Some(text) = state else { return Ok((Some(fresh), false)) };
        let bad = |e: serde_json::Error| StoreError::Tracker { model: model.name.clone(), reason: e.to_string() };
        let value: serde_json::Value = serde_json::from_str(&text).map_err(bad)?;
        if !Tracker::is_current_layout(&value) {
            return Ok((None, true));
        }
        let tracker: Tracker = serde_json::from_value(value).map_err(bad)?;
        if *tracker.spec() != model.tracker_spec() {
            return Ok((None, true));
        }
        Ok((Some(TrackerState { tracker, reset_ms, resets }), false))
    }

    /// Feeds the predictions whose label_wait this file closed, in prediction-time order, to the
    /// model's anytime tracker, inside the file's transaction: a kill at any point leaves the
    /// tracker exactly in step with the state. Join order would not do: when label delays depend
    /// on outcomes (a late parcel is known late only after its promised time), the order of joins
    /// depends on the losses, and the tracker's guarantees assume it does not.
    /// Returns true when stored state for other settings was restarted.
    fn advance_tracker(
        tx: &Connection,
        model: &ModelConfig,
        matured: &[Option<f64>],
        now_ms: i64,
    ) -> Result<bool, StoreError> {
        if matured.is_empty() {
            return Ok(false);
        }
        let (stored, mismatched) = Self::stored_tracker(tx, model)?;
        let (mut state, restarted) = match stored {
            Some(s) => (s, false),
            None => {
                let resets = Self::tracker_row(tx, &model.name)?.map_or(0, |r| r.2);
                let state = TrackerState {
                    tracker: Tracker::new(model.tracker_spec()),
                    reset_ms: None,
                    resets: resets + u64::from(mismatched),
                };
                (state, mismatched)
            }
        };
        for &l in matured {
            match l {
                Some(l) => state.tracker.push(l),
                None => state.tracker.push_unknown(),
            }
        }
        let text = serde_json::to_string(&state.tracker)
            .map_err(|e| StoreError::Tracker { model: model.name.clone(), reason: e.to_string() })?;
        tx.prepare_cached(
            "INSERT INTO tracker (model, state, reset_ms, resets) VALUES (?1, ?2, ?3, ?4)
             ON CONFLICT (model) DO UPDATE SET state = excluded.state, reset_ms = excluded.reset_ms, resets = excluded.resets",
        )?
        .execute(params![model.name, text, state.reset_ms.unwrap_or(now_ms), state.resets as i64])?;
        Ok(restarted)
    }

    /// The model's anytime state as the next sample would find it (fresh if there is none,
    /// after a reset, or when the stored one was made for other settings).
    pub fn tracker(&self, model: &ModelConfig) -> Result<TrackerState, StoreError> {
        let (stored, _) = Self::stored_tracker(&self.conn, model)?;
        Ok(stored.unwrap_or_else(|| TrackerState {
            tracker: Tracker::new(model.tracker_spec()),
            reset_ms: None,
            resets: Self::tracker_row(&self.conn, &model.name).ok().flatten().map_or(0, |r| r.2),
        }))
    }

    /// Starts the model's anytime sequences and alarms afresh from the next sample (a model was
    /// redeployed, or an alarm was handled). Safe while the daemon runs: the daemon reads the
    /// stored state inside each file's transaction.
    pub fn reset(&mut self, model: &str, now_ms: i64) -> Result<(), StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        tx.execute(
            "INSERT INTO tracker (model, state, reset_ms, resets) VALUES (?1, NULL, ?2, 1)
             ON CONFLICT (model) DO UPDATE SET state = NULL, reset_ms = ?2, resets = resets + 1",
            params![model, now_ms],
        )?;
        tx.commit()?;
        Ok(())
    }

    /// The sum of every model's reset count: the pipeline republishes when it moves.
    pub fn resets_total(&self) -> Result<u64, StoreError> {
        Ok(self.conn.query_row("SELECT COALESCE(SUM(resets), 0) FROM tracker", [], |r| r.get::<_, i64>(0))? as u64)
    }

    /// Counts one more evaluation of the model's window bounds and returns its number k
    /// (1-based), for δ spending. Durable, so k never restarts and Σ δ_k stays ≤ δ.
    pub fn next_evaluation(&mut self, model: &str) -> Result<u64, StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        bump(&tx, model, "evaluations", 1.0)?;
        let k: f64 =
            tx.query_row("SELECT value FROM counter WHERE model = ?1 AND name = 'evaluations'", [model], |r| r.get(0))?;
        tx.commit()?;
        Ok(k as u64)
    }

    /// A prediction: rejected if its id was seen, joined at once if its label came first.
    fn take_prediction(
        tx: &Connection,
        model: &ModelConfig,
        rec: &Record,
        orphans_held: bool,
        joins: &mut Joins,
    ) -> rusqlite::Result<Result<bool, RejectReason>> {
        let m = model.name.as_str();
        let orphan: Option<(i64, String)> = if orphans_held {
            tx.prepare_cached("DELETE FROM orphan WHERE model = ?1 AND id = ?2 RETURNING t_label, value")?
                .query_row(params![m, rec.id], |r| Ok((r.get(0)?, r.get(1)?)))
                .optional()?
        } else {
            None
        };
        let joined = match &orphan {
            Some((t_label, label)) if (t_label - rec.time_ms) <= model.label_wait_ms => {
                loss_of(&model.loss, &rec.value, label).ok().map(|l| (*t_label, label.as_str(), l))
            }
            _ => None,
        };
        // Older than the expiry cutoff already: it could only wait to be expired by the next
        // file's expiry, which no longer looks below the cutoff, so it is expired now.
        let late = rec.time_ms < joins.expired_to;
        let (state, label) = match joined {
            Some((_, label, _)) => (LABELLED, Some(label)),
            None if late => (EXPIRED, None),
            None => (AWAITING, None),
        };
        let features = features_json(rec);
        let inserted = tx
            .prepare_cached(
                "INSERT INTO pred (model, id, t_pred, value, state, label, features) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)
                 ON CONFLICT (model, id) DO NOTHING",
            )?
            .execute(params![m, rec.id, rec.time_ms, rec.value, state, label, features])?;
        if inserted == 0 {
            // The id was seen before; a label taken from the held ones goes back.
            if let Some((t_label, label)) = &orphan {
                tx.prepare_cached("INSERT INTO orphan (model, id, t_label, value) VALUES (?1, ?2, ?3, ?4)")?
                    .execute(params![m, rec.id, t_label, label])?;
            }
            return Ok(Err(RejectReason::DuplicatePrediction));
        }
        *joins.counted.entry(rec.time_ms.div_euclid(1000)).or_default() += 1;
        if state == EXPIRED {
            joins.expired += 1;
            joins.matured.push(None);
        } else if state == AWAITING {
            joins.awaiting += 1;
        } else if late {
            // Labelled on arrival but already past the cutoff: its wait is over now.
            joins.matured.push(joined.map(|j| j.2));
        }
        match (joined, &orphan) {
            (Some((t_label, _, l)), _) => {
                let s = NewSample { id: &rec.id, t_pred: rec.time_ms, t_label, loss: l, features: features.as_deref() };
                Self::insert_sample(tx, m, s, joins)?;
                Ok(Ok(true))
            }
            (None, Some(_)) => {
                // The held label was too late for this prediction (or unusable with it): it is
                // counted as orphaned, and the prediction waits for a label of its own.
                bump(tx, m, "orphaned", 1.0)?;
                Ok(Ok(false))
            }
            (None, None) => Ok(Ok(false)),
        }
    }

    /// A label: joined if its prediction waits, held if the prediction has not come yet.
    fn take_label(
        tx: &Connection,
        model: &ModelConfig,
        rec: &Record,
        orphans_held: &mut bool,
        joins: &mut Joins,
    ) -> rusqlite::Result<Result<bool, RejectReason>> {
        let m = model.name.as_str();
        // The common case in one statement: a waiting prediction within label_wait.
        let waiting: Option<(i64, String, Option<String>)> = tx
            .prepare_cached(
                "UPDATE pred SET state = ?1, label = ?2
                 WHERE model = ?3 AND id = ?4 AND state = ?5 AND ?6 - t_pred <= ?7
                 RETURNING t_pred, value, features",
            )?
            .query_row(params![LABELLED, rec.value, m, rec.id, AWAITING, rec.time_ms, model.label_wait_ms], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            })
            .optional()?;
        if let Some((t_pred, value, features)) = waiting {
            joins.awaiting -= 1;
            // Both cells were validated when their rows arrived, so the loss exists.
            let l = loss_of(&model.loss, &value, &rec.value).unwrap_or(model.loss.max());
            let s = NewSample { id: &rec.id, t_pred, t_label: rec.time_ms, loss: l, features: features.as_deref() };
            Self::insert_sample(tx, m, s, joins)?;
            return Ok(Ok(true));
        }
        let same = |old: &str| {
            if old.trim() == rec.value.trim() {
                RejectReason::DuplicateLabel
            } else {
                RejectReason::ConflictingLabel
            }
        };
        let pred: Option<(i64, Option<String>)> = tx
            .prepare_cached("SELECT state, label FROM pred WHERE model = ?1 AND id = ?2")?
            .query_row(params![m, rec.id], |r| Ok((r.get(0)?, r.get(1)?)))
            .optional()?;
        match pred {
            Some((LABELLED, Some(old))) => Ok(Err(same(&old))),
            // Expired, or still waiting but this label came later than label_wait.
            Some(_) => Ok(Err(RejectReason::LateLabel)),
            None => {
                let held: Option<String> = tx
                    .prepare_cached("SELECT value FROM orphan WHERE model = ?1 AND id = ?2")?
                    .query_row(params![m, rec.id], |r| r.get(0))
                    .optional()?;
                if let Some(old) = held {
                    return Ok(Err(same(&old)));
                }
                tx.prepare_cached("INSERT INTO orphan (model, id, t_label, value) VALUES (?1, ?2, ?3, ?4)")?
                    .execute(params![m, rec.id, rec.time_ms, rec.value])?;
                *orphans_held = true;
                Ok(Ok(false))
            }
        }
    }

    /// Deletes samples that no window can reach any more: older than the largest span behind
    /// the newest sample and not among the newest `last` samples of the largest count window.
    /// Returns the cutoff: samples with t_pred below it were deleted (`i64::MIN`: none).
    fn prune_samples(tx: &Connection, model: &ModelConfig) -> rusqlite::Result<i64> {
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

    /// Samples currently kept for a model (a counter, because COUNT(*) scans the table).
    fn sample_count(tx: &Connection, model: &str) -> rusqlite::Result<u64> {
        Self::counter(tx, model, "samples_kept")
    }

    /// One counter's value (0 when it was never bumped).
    fn counter(tx: &Connection, model: &str, name: &str) -> rusqlite::Result<u64> {
        let v: Option<f64> = tx
            .prepare_cached("SELECT value FROM counter WHERE model = ?1 AND name = ?2")?
            .query_row([model, name], |r| r.get(0))
            .optional()?;
        Ok(v.unwrap_or(0.0).max(0.0) as u64)
    }

    /// The losses of one window, in arrival order (the order betting needs).
    pub fn window_losses(&self, model: &str, kind: WindowKind) -> Result<Vec<f64>, StoreError> {
        Ok(self.window_rows(model, kind)?.into_iter().map(|(l, _)| l).collect())
    }

    /// The model's state in memory, read from the database the first time it is needed.
    fn memory(&self, model: &str) -> Result<std::cell::RefMut<'_, Memory>, StoreError> {
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
    fn cohort(
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

    /// Predictions still waiting for a label.
    pub fn awaiting(&self, model: &str) -> Result<u64, StoreError> {
        // A counter kept in each file's transaction: counting the table is O(waiting) per
        // publish, and at 10^6 predictions a minute with labels an hour late that is 10^7 rows.
        Ok(Self::counter(&self.conn, model, "awaiting")?)
    }

    /// Wall-clock time (ms) of the model's last committed file.
    pub fn last_commit_ms(&self, model: &str) -> Result<Option<i64>, StoreError> {
        Ok(self
            .conn
            .query_row("SELECT last_commit_ms FROM model_meta WHERE model = ?1", [model], |r| {
                r.get::<_, Option<i64>>(0)
            })
            .optional()?
            .flatten())
    }

    /// Every counter of a model.
    pub fn counters(&self, model: &str) -> Result<Counters, StoreError> {
        let mut c = Counters { delay_buckets: vec![0; DELAY_BUCKETS.len() + 1], ..Counters::default() };
        let mut st = self.conn.prepare_cached("SELECT name, value FROM counter WHERE model = ?1")?;
        let rows = st.query_map([model], |r| Ok((r.get::<_, String>(0)?, r.get::<_, f64>(1)?)))?;
        for row in rows {
            let (name, v) = row?;
            let n = v as u64;
            let kind = |s: &str| {
                if s == "prediction" {
                    Some(Kind::Prediction)
                } else if s == "label" {
                    Some(Kind::Label)
                } else {
                    None
                }
            };
            if let Some(k) = name.strip_prefix("rows_").and_then(kind) {
                c.rows.insert(k, n);
            } else if let Some(k) = name.strip_prefix("files_").and_then(kind) {
                c.files.insert(k, n);
            } else if let Some(rest) = name.strip_prefix("rejected_") {
                if let Some((k, reason)) = rest.split_once('_') {
                    if let (Some(k), Some(reason)) = (kind(k), RejectReason::parse(reason)) {
                        c.rejected.insert((k, reason), n);
                    }
                }
            } else if let Some(i) = name.strip_prefix("delay_bucket_").and_then(|i| i.parse::<usize>().ok()) {
                if i < c.delay_buckets.len() {
                    c.delay_buckets[i] = n;
                }
            } else {
                match name.as_str() {
                    "joined" => c.joined = n,
                    "expired" => c.expired = n,
                    "orphaned" => c.orphaned = n,
                    "delay_count" => c.delay_count = n,
                    "delay_sum_seconds" => c.delay_sum_seconds = v,
                    _ => {}
                }
            }
        }
        Ok(c)
    }
}
