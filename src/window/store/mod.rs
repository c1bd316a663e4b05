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

mod history;
mod ingest;
mod ranges;
mod schema;
mod shift;
mod tracker;
mod views;

pub use history::TakenFile;
use history::*;
use ranges::*;
pub use ranges::{level_of, sample_level, LEVELS, SAMPLE_SEED};
use schema::*;
use shift::*;
pub use shift::{points_of, ShiftAlarmView, ShiftRows};
pub use views::{DirectWindow, WindowView};

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

/// The whole seconds of prediction time a window's cohort covers, inclusive.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct CohortRange {
    pub from_sec: i64,
    pub to_sec: i64,
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

/// The durable state.
pub struct Store {
    conn: Connection,
    /// Each model's window ranges with their exact statistics, built from the database the
    /// first time a window needs them and then moved with every commit, so a publish reads
    /// O(windows) numbers and a bounded subsample instead of every row of every window.
    ranges: std::cell::RefCell<std::collections::HashMap<String, ModelRanges>>,
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
        Ok(Store { conn, ranges: Default::default() })
    }

    /// Caps the database at `bytes` (`PRAGMA max_page_count`): a commit that would grow it
    /// further fails as on a full disk (`SQLITE_FULL`), which the daemon already handles by
    /// pausing its ingest and retrying. The write-ahead log is checkpointed back into the
    /// database at about 4 MiB, so the files on disk stay within `bytes` plus that.
    pub fn limit_size(&self, bytes: u64) -> Result<(), StoreError> {
        let page: i64 = self.conn.query_row("PRAGMA page_size", [], |r| r.get(0))?;
        let pages = (bytes / page.max(512) as u64).max(1) as i64;
        // max_page_count never goes below the current size; the smaller of the two stands.
        self.conn.query_row(&format!("PRAGMA max_page_count = {pages}"), [], |r| r.get::<_, i64>(0))?;
        Ok(())
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
        Some(Store { conn, ranges: Default::default() })
    }

    /// A database in memory, for tests and fuzzing: the same schema and logic, no durability.
    pub fn open_in_memory() -> Result<Store, StoreError> {
        let mut conn = Connection::open_in_memory()?;
        conn.execute_batch(SCHEMA)?;
        migrate(&mut conn)?;
        Ok(Store { conn, ranges: Default::default() })
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

    /// One counter's value (0 when it was never bumped).
    fn counter(tx: &Connection, model: &str, name: &str) -> rusqlite::Result<u64> {
        let v: Option<f64> = tx
            .prepare_cached("SELECT value FROM counter WHERE model = ?1 AND name = ?2")?
            .query_row([model, name], |r| r.get(0))
            .optional()?;
        Ok(v.unwrap_or(0.0).max(0.0) as u64)
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
