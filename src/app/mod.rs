//! The daemon's wiring, and the only place that knows it: a pipeline thread that owns the
//! state database (ingest → window → estimate, one file per transaction), an HTTP server on a
//! tokio runtime that renders the latest snapshot, and one shutdown path that stops both.
//!
//! The pipeline wakes on file events, on the periodic rescan, and on shutdown. After each round
//! that took a file it recomputes every window and publishes a new snapshot; scrapes never wait
//! for it. A stop request is honoured between files, so a file is always all-in or all-out.

use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, Sender};
use std::sync::{Arc, RwLock};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use anyhow::Context;
use std::io::BufReader;

use crate::config::{Config, WindowGuarantee};
use crate::export::registry::{self, Health, SharedSnapshot};
use crate::export::server::{self, Shared};
use crate::ingest::reader::{CappedLines, Hashing};
use crate::ingest::records::{decode_records, Columns, Reject, RejectReason};
use crate::ingest::watch::{self, Candidate};
use crate::ingest::{DecodeErrorKind, Format};
use crate::window::history::HistoryPoint;
use crate::window::{self, Batch, Kind, Snapshot, Store, StoreError};

mod history;
use history::evaluation;
pub use history::replay;

/// A running daemon.
pub struct Running {
    /// The address the HTTP server listens on (useful with port 0).
    pub addr: std::net::SocketAddr,
    /// The latest published snapshot.
    pub snapshot: SharedSnapshot,
    stop: Arc<AtomicBool>,
    wake: Sender<()>,
    server_stop: Arc<tokio::sync::Notify>,
    pipeline: Option<std::thread::JoinHandle<anyhow::Result<()>>>,
    runtime: tokio::runtime::Runtime,
    server: Option<tokio::task::JoinHandle<()>>,
    /// Rounds completed by the pipeline (a round lists every directory once).
    pub rounds: Arc<std::sync::atomic::AtomicU64>,
    grace: Duration,
}

fn now_ms() -> i64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64)
}

/// A settled file's size and mtime, and the last round whose listing held it.
struct Settled {
    len: u64,
    modified: Option<SystemTime>,
    round: u64,
}

impl Settled {
    fn of(c: &Candidate, round: u64) -> Settled {
        Settled { len: c.len, modified: c.modified, round }
    }
}

/// How many of the most recently taken files a restart reads back into `settled` (older ones,
/// should they still lie in a folder, are recognised by one query each).
const SETTLE_RECENT: i64 = 200_000;

struct Pipeline {
    config: Config,
    store: Store,
    snapshot: SharedSnapshot,
    health: Arc<Health>,
    /// Files already settled, by (model, kind, path), with the size and mtime they had:
    /// unchanged files are not read again on every rescan. Keyed by model and kind too, since
    /// two models may read the same folder. Filled from the store at start, so a restart
    /// beside a spool of thousands of taken files does not query the store once per file;
    /// files gone from the folders are dropped after each complete round, so it holds what the
    /// folders hold, not every file of a months-long run.
    settled: HashMap<(usize, Kind), HashMap<PathBuf, Settled>>,
    /// Rounds begun, for `Settled::round`.
    rounds_begun: u64,
    /// Resets (by `riskbound reset`, another process) already reflected in the snapshot.
    resets_seen: u64,
    /// The store is a read-only view (the volume refused writes when it was opened): it is
    /// opened again for writing before the next round, since SQLite never upgrades a
    /// connection it opened read-only.
    needs_reopen: bool,
    /// Each model's latest input-shift look (a look costs up to seconds, so it is kept and
    /// repeated only `every` of event time later; after a restart the first publish looks).
    looks: HashMap<String, window::shift::ShiftLook>,
    /// Each model's evaluation history (bounded by `history.keep`), shared with the snapshot.
    history: HashMap<String, Arc<Vec<HistoryPoint>>>,
}

impl Pipeline {
    fn new(
        config: Config,
        store: Store,
        snapshot: SharedSnapshot,
        health: Arc<Health>,
        needs_reopen: bool,
    ) -> Pipeline {
        Pipeline {
            config,
            store,
            snapshot,
            health,
            settled: HashMap::new(),
            rounds_begun: 0,
            resets_seen: 0,
            needs_reopen,
            looks: HashMap::new(),
            history: HashMap::new(),
        }
    }

    fn publish(&mut self) -> anyhow::Result<()> {
        let mut models = Vec::with_capacity(self.config.models.len());
        for m in &self.config.models {
            // Keep the last snapshot.
            let Some(k) = evaluation(&mut self.store, m)? else { return Ok(()) };
            let mut snap = window::model_snapshot(&self.store, m, k)?;
            snap.history = self.history.get(&m.name).cloned().unwrap_or_default();
            if m.input_shift.is_some() {
                Self::look_if_due(&mut self.store, &mut self.looks, m);
                snap.input_shift = window::shift::snapshot(&self.store, m, self.looks.get(&m.name))
                    .inspect_err(|e| tracing::warn!(model = %m.name, error = %e, "cannot read the input-shift alarm"))
                    .ok()
                    .flatten();
            }
            models.push(snap);
        }
        *self.snapshot.write().expect("snapshot lock poisoned") = Arc::new(Snapshot { models });
        self.resets_seen = self.store.resets_total()?;
        Ok(())
    }

    /// Runs the model's input-shift look when one is due, then prunes the stored points the
    /// window has left. Trouble here never stops ingest: it is logged, and the last look stays.
    fn look_if_due(
        store: &mut Store,
        looks: &mut HashMap<String, window::shift::ShiftLook>,
        m: &crate::config::ModelConfig,
    ) {
        let Some(sh) = &m.input_shift else { return };
        let started = Instant::now();
        let look = match window::shift::look_due(store, m, looks.get(&m.name)) {
            Ok(true) => window::shift::look(store, m, sh),
            Ok(false) => return,
            Err(e) => Err(e),
        };
        match look {
            Ok(Some(l)) => {
                match &l.outcome {
                    Ok(t) => tracing::info!(
                        model = %m.name,
                        points = l.n_current,
                        in_window = l.in_window,
                        permutation_p = t.permutation_p,
                        spectral_p = t.spectral.p_value,
                        ms = started.elapsed().as_millis() as u64,
                        "input-shift look"
                    ),
                    Err(why) => tracing::info!(model = %m.name, "input-shift look inconclusive: {why}"),
                }
                if let Some(from) = l.from {
                    if let Err(e) = store.prune_shift(&m.name, from) {
                        tracing::warn!(model = %m.name, error = %e, "cannot prune input-shift points; will retry at the next look");
                    }
                }
                looks.insert(m.name.clone(), l);
            }
            Ok(None) => {}
            Err(e) => tracing::warn!(model = %m.name, error = %e, "input-shift look failed; the last one is kept"),
        }
    }

    /// Fills `settled` with the files the store records as taken, at the size and mtime they
    /// had. A file found changed since is read again by [`Pipeline::take`], as it would be
    /// had the daemon been running when it changed.
    fn settle_taken(&mut self) -> Result<(), StoreError> {
        for (i, m) in self.config.models.iter().enumerate() {
            for kind in [Kind::Prediction, Kind::Label] {
                // Newest first: a name taken again after a rewrite keeps its latest size and mtime.
                for (name, size, mtime_ns) in self.store.taken_file_metas(&m.name, kind, SETTLE_RECENT)? {
                    let (Ok(len), Ok(ns)) = (u64::try_from(size), u64::try_from(mtime_ns)) else { continue };
                    let modified = Some(UNIX_EPOCH + Duration::from_nanos(ns));
                    let round = self.rounds_begun;
                    let files = self.settled.entry((i, kind)).or_default();
                    files.entry(PathBuf::from(name)).or_insert(Settled { len, modified, round });
                }
            }
        }
        Ok(())
    }

    /// Takes one candidate file if it is new. Returns true when it changed the state.
    fn take(&mut self, c: &Candidate) -> anyhow::Result<bool> {
        let round = self.rounds_begun;
        match self.settled.entry((c.model, c.kind)).or_default().get_mut(&c.path) {
            Some(s) if (s.len, s.modified) == (c.len, c.modified) => {
                s.round = round;
                return Ok(false);
            }
            Some(_) => {
                // Rewritten, truncated or replaced under the same name: its content is read
                // again; content taken before adds nothing, rows seen before are duplicates.
                tracing::warn!(file = %c.path.display(), "batch file changed after it was taken; reading it again");
            }
            None => {}
        }
        let read = self.read(c)?;
        if read.is_some() {
            self.settled.entry((c.model, c.kind)).or_default().insert(c.path.clone(), Settled::of(c, round));
        }
        Ok(read == Some(true))
    }

    /// Reads a candidate not settled at its size and mtime, and ingests it unless its content
    /// was taken before. `Some(changed state)` settles it; `None` leaves it to the next round.
    fn read(&mut self, c: &Candidate) -> anyhow::Result<Option<bool>> {
        let model = &self.config.models[c.model];
        let label = c.path.display().to_string();
        let mtime_ns = c.modified.and_then(|t| t.duration_since(UNIX_EPOCH).ok()).map(|d| d.as_nanos() as i64);
        if let Some(ns) = mtime_ns {
            if self.store.has_file_meta(&model.name, c.kind, &label, c.len as i64, ns)? {
                return Ok(Some(false));
            }
        }
        let file = match std::fs::File::open(&c.path) {
            Ok(f) => f,
            Err(e) => {
                // Gone between listing and reading (renamed again, deleted): the next listing
                // finds it under its new name, if any.
                tracing::warn!(file = %c.path.display(), error = %e, "cannot open batch file; will retry");
                return Ok(None);
            }
        };
        let src = if c.kind == Kind::Prediction { &model.predictions } else { &model.labels };
        let format = src.format.or_else(|| Format::from_path(&c.path)).unwrap_or(Format::Csv);
        // Slice and input-shift features travel with predictions (they describe the request,
        // not the outcome).
        let features = match c.kind {
            Kind::Prediction => model.feature_columns(),
            Kind::Label => Vec::new(),
        };
        let columns =
            Columns { id: &src.id_column, time: &src.time_column, value: &src.value_column, features: &features };
        let mut records = Vec::new();
        let mut rejects = Vec::new();
        let started = Instant::now();
        // One pass: the hash covers exactly the bytes decoded, and overlong lines are dropped
        // as they stream past instead of being buffered.
        let mut capped =
            CappedLines::new(BufReader::with_capacity(1 << 16, Hashing::new(file)), self.config.max_row_bytes);
        let decoded = decode_records(
            &mut capped,
            format,
            &label,
            &columns,
            self.config.max_row_bytes,
            |r| records.push(r),
            |r| rejects.push(r),
        );
        match decoded {
            Ok(_) => {}
            Err(e) if e.kind == DecodeErrorKind::MissingColumn => {
                // No row of the file is usable: each data line is one rejected row, and the
                // file is recorded as taken so that it is not retried forever.
                let rest = std::io::BufRead::split(std::io::BufReader::new(&mut capped), b'\n');
                for (line, l) in (2u64..).zip(rest) {
                    let Ok(l) = l else { break };
                    if !l.iter().all(u8::is_ascii_whitespace) {
                        rejects.push(Reject { line, reason: RejectReason::MissingColumn, message: e.to_string() });
                    }
                }
            }
            Err(e) if e.kind == DecodeErrorKind::Empty => {
                tracing::warn!(file = %c.path.display(), "empty batch file: no header row, no rows");
            }
            Err(e) => {
                // Retried when the file changes (size or mtime), not on every rescan.
                tracing::warn!(file = %c.path.display(), error = %e, "read error; will retry when the file changes");
                return Ok(Some(false));
            }
        }
        for line in std::mem::take(&mut capped.too_long) {
            let message = format!("{label}:{line}: row: longer than max_row_bytes ({})", self.config.max_row_bytes);
            rejects.push(Reject { line, reason: RejectReason::RowTooLong, message });
        }
        let hash = match capped.into_inner().into_inner().finish() {
            Ok(h) => h,
            Err(e) => {
                // Retried when the file changes (size or mtime), not on every rescan.
                tracing::warn!(file = %c.path.display(), error = %e, "read error; will retry when the file changes");
                return Ok(Some(false));
            }
        };
        if self.store.has_file(&model.name, c.kind, &hash)? {
            tracing::debug!(file = %c.path.display(), "content already taken");
            return Ok(Some(false));
        }
        self.close_bucket_before(c.model, records.iter().map(|r| r.time_ms).max());
        let model = &self.config.models[c.model];
        let batch = Batch {
            kind: c.kind,
            name: &label,
            hash: &hash,
            records: &records,
            rejects: &rejects,
            size: Some(c.len as i64),
            mtime_ns,
        };
        let out = self.store.ingest_file(model, &batch, now_ms())?;
        if out.already_taken {
            return Ok(Some(false));
        }
        if out.tracker_restarted {
            tracing::warn!(
                model = %model.name,
                "anytime sequences and alarms restarted: the stored ones were made for other settings \
                 (confidence, loss, SLA or reference); evidence does not carry over between tests"
            );
        }
        let bad: u64 = out.rejected.values().sum();
        tracing::info!(
            model = %model.name,
            kind = c.kind.as_str(),
            file = %c.path.display(),
            rows = out.rows_ok,
            rejected = bad,
            joined = out.joined,
            ms = started.elapsed().as_millis() as u64,
            "batch file taken"
        );
        if let Some(first) = &out.first_reject {
            // One line per file, not per row: a file of a million bad rows is one log line.
            tracing::warn!(reason = first.reason.as_str(), rejected = bad, "first rejected row: {}", first.message);
        }
        Ok(Some(true))
    }

    /// One pass over every input folder. A commit the database refuses (disk full, read-only)
    /// ends the round: the daemon counts it, raises `riskbound_state_unwritable`, logs it once,
    /// keeps serving its committed state, and retries the same file on the next round until the
    /// volume accepts writes. Readiness does not change: it is the model's pod that a readiness
    /// failure takes out of its Service, and the model is not at fault.
    fn round(&mut self, stop: &AtomicBool) -> anyhow::Result<bool> {
        let mut changed = false;
        // A long backlog (a restart after an outage) is published as it is worked through,
        // at most once a second, so /metrics does not wait for the end of the round.
        let mut published = Instant::now();
        self.rounds_begun += 1;
        let mut complete = true;
        for c in watch::scan(&self.config.models) {
            if stop.load(Ordering::SeqCst) {
                complete = false;
                break;
            }
            match self.take(&c) {
                Ok(took) => {
                    changed |= took;
                    if changed && published.elapsed() > Duration::from_secs(1) {
                        self.publish()?;
                        published = Instant::now();
                        changed = false;
                    }
                    if took && self.health.state_unwritable.swap(false, Ordering::SeqCst) {
                        tracing::info!("state database accepts writes again; resuming ingest");
                    }
                }
                Err(e) => {
                    let Some(store_error) = e.downcast_ref::<StoreError>() else { return Err(e) };
                    self.needs_reopen |= store_error.needs_reopen();
                    self.health.state_write_failures.fetch_add(1, Ordering::SeqCst);
                    if !self.health.state_unwritable.swap(true, Ordering::SeqCst) {
                        let what =
                            if store_error.is_disk() { "state volume refuses writes" } else { "state database error" };
                        tracing::error!(file = %c.path.display(), error = %store_error, "{what}: committed state kept and served, retrying");
                    }
                    complete = false;
                    break;
                }
            }
        }
        if complete {
            let round = self.rounds_begun;
            for files in self.settled.values_mut() {
                files.retain(|_, s| s.round == round);
            }
        }
        Ok(changed)
    }

    /// Opens the state for writing again after the volume refused it. Returns false while it
    /// still refuses (counted, not logged again: the first refusal was).
    fn reopen(&mut self) -> anyhow::Result<bool> {
        match Store::open(&self.config.state_dir).and_then(|s| limit(s, self.config.state_max_bytes)) {
            Ok(store) => {
                self.store = store;
                self.needs_reopen = false;
                self.settle_taken()?;
                self.resume_history()?;
                if self.health.state_unwritable.swap(false, Ordering::SeqCst) {
                    tracing::info!("state database accepts writes again; resuming ingest");
                }
                Ok(true)
            }
            Err(e) if e.is_disk() => {
                self.health.state_write_failures.fetch_add(1, Ordering::SeqCst);
                Ok(false)
            }
            Err(e) => Err(e.into()),
        }
    }

    fn run(
        mut self,
        stop: Arc<AtomicBool>,
        wake: Receiver<()>,
        rounds: Arc<std::sync::atomic::AtomicU64>,
    ) -> anyhow::Result<()> {
        let rescan = self.config.rescan_interval;
        loop {
            if stop.load(Ordering::SeqCst) {
                return Ok(());
            }
            let writable = !self.needs_reopen || self.reopen()?;
            // A reset from another process changes what /metrics must show, with no new file.
            let reset_elsewhere = self.store.resets_total().is_ok_and(|r| r != self.resets_seen);
            if writable && (self.round(&stop)? || reset_elsewhere) {
                self.publish()?;
            }
            rounds.fetch_add(1, Ordering::SeqCst);
            // While the state refuses writes, retry every second rather than every rescan.
            let wait = if self.health.state_unwritable.load(Ordering::SeqCst) {
                rescan.min(Duration::from_secs(1))
            } else {
                rescan
            };
            match wake.recv_timeout(wait) {
                Ok(()) => {
                    // Let a burst of events (a writer dropping many files) settle into one round.
                    std::thread::sleep(Duration::from_millis(20));
                    while wake.try_recv().is_ok() {}
                }
                Err(RecvTimeoutError::Timeout) => {}
                Err(RecvTimeoutError::Disconnected) => return Ok(()),
            }
        }
    }
}

/// The listen address could not be bound (taken, or not this host's): the user's to fix.
#[derive(Debug, thiserror::Error)]
#[error("binding {addr}: {source}")]
pub struct BindError {
    pub addr: std::net::SocketAddr,
    #[source]
    pub source: std::io::Error,
}

/// Starts the daemon: opens the state, binds the listener, resumes, then serves and ingests.
pub fn start(config: Config) -> anyhow::Result<Running> {
    std::fs::create_dir_all(&config.state_dir)
        .with_context(|| format!("creating state_dir {}", config.state_dir.display()))?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    let listener = runtime
        .block_on(tokio::net::TcpListener::bind(config.listen))
        .map_err(|source| BindError { addr: config.listen, source })?;
    let addr = listener.local_addr()?;

    let snapshot: SharedSnapshot = Arc::new(RwLock::new(Arc::new(Snapshot::default())));
    let listener_stats = Arc::new(server::ListenerStats::default());
    let health = Arc::new(Health {
        listener: listener_stats.clone(),
        memory_limit_bytes: config.memory_limit_bytes.or_else(crate::export::process::cgroup_memory_limit),
        ..Health::default()
    });
    let shared = Arc::new(Shared {
        registry: registry::registry(snapshot.clone(), health.clone(), config.http.max_connections),
        snapshot: Some(snapshot.clone()),
        ready: AtomicBool::new(false),
    });
    let server_stop = Arc::new(tokio::sync::Notify::new());
    let scheme = if config.web.tls.is_some() { "https" } else { "http" };
    let server = server::spawn(
        &runtime,
        listener,
        shared.clone(),
        &config.web,
        config.http,
        listener_stats.clone(),
        server_stop.clone(),
    );
    tracing::info!(%addr, scheme, basic_auth = !config.web.users.is_empty(), "serving / (status page), /metrics, /healthz, /readyz");

    // A volume that refuses writes (read-only, full, failing) does not stop the daemon: it
    // serves the committed state read-only and opens the state for writing as soon as the
    // volume lets it. Any other failure (a damaged database) is fatal.
    let (store, writable) = match Store::open(&config.state_dir).and_then(|s| limit(s, config.state_max_bytes)) {
        Ok(store) => (store, true),
        Err(e) if e.is_disk() => {
            health.state_write_failures.fetch_add(1, Ordering::SeqCst);
            health.state_unwritable.store(true, Ordering::SeqCst);
            tracing::error!(
                state = %config.state_dir.display(),
                error = %e,
                "state volume refuses writes: committed state served read-only, retrying"
            );
            let view = Store::open_read_only(&config.state_dir);
            (view.map_or_else(Store::open_in_memory, Ok)?, false)
        }
        Err(e) => return Err(e.into()),
    };
    let mut pipeline = Pipeline::new(config.clone(), store, snapshot.clone(), health, !writable);
    // Resume: the snapshot of the committed state is published before anything new is read,
    // and only then is the daemon ready. Ready is a latch: it never turns back, whatever the
    // state volume does later (its trouble shows in riskbound_state_unwritable and the page
    // alert), because a sidecar that is not ready takes its model's pod out of the Service.
    pipeline.settle_taken()?;
    pipeline.resume_history()?;
    pipeline.publish()?;
    shared.ready.store(true, Ordering::SeqCst);
    tracing::info!(state = %config.state_dir.display(), writable, "state resumed; ready");

    let (wake_tx, wake_rx) = mpsc::channel();
    let stop = Arc::new(AtomicBool::new(false));
    let rounds = Arc::new(std::sync::atomic::AtomicU64::new(0));
    let watcher = watch::watch(&config.models, wake_tx.clone());
    if let Err(e) = &watcher {
        tracing::warn!(error = %e, "file events unavailable; relying on the periodic rescan");
    }
    let (stop2, rounds2) = (stop.clone(), rounds.clone());
    let handle = std::thread::Builder::new().name("pipeline".into()).spawn(move || {
        let _watcher = watcher; // dropped, and so stopped, when the pipeline ends
        let r = pipeline.run(stop2, wake_rx, rounds2);
        if let Err(e) = &r {
            tracing::error!(error = %format!("{e:#}"), "pipeline stopped");
        }
        r
    })?;
    Ok(Running {
        addr,
        snapshot,
        stop,
        wake: wake_tx,
        server_stop,
        pipeline: Some(handle),
        runtime,
        server: Some(server),
        rounds,
        grace: config.shutdown_grace_period,
    })
}

impl Running {
    /// Waits for SIGTERM or SIGINT, then shuts down.
    pub fn run_until_signal(self) -> anyhow::Result<()> {
        let which = self.runtime.block_on(async {
            let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())?;
            tokio::select! {
                _ = term.recv() => Ok::<_, std::io::Error>("SIGTERM"),
                r = tokio::signal::ctrl_c() => r.map(|_| "SIGINT"),
            }
        })?;
        tracing::info!(signal = which, "stopping: finishing the current file, then closing");
        self.shutdown()
    }

    /// The one shutdown path: stop ingest between files, stop serving, close the database.
    pub fn shutdown(mut self) -> anyhow::Result<()> {
        self.stop.store(true, Ordering::SeqCst);
        let _ = self.wake.send(());
        let handle = self.pipeline.take().expect("shutdown runs once");
        // The pipeline stops between files; a file still being read gets the grace period.
        let deadline = Instant::now() + self.grace;
        while !handle.is_finished() && Instant::now() < deadline {
            std::thread::sleep(Duration::from_millis(10));
        }
        if !handle.is_finished() {
            // Exiting drops the open transaction: SQLite rolls it back, so the file is read
            // again from the start by the next process, and nothing is counted twice.
            tracing::warn!(
                grace = ?self.grace,
                "stopped forcibly: the file being read did not finish within shutdown_grace_period; its transaction is rolled back and the file is read again at the next start"
            );
            self.server_stop.notify_waiters();
            self.server_stop.notify_one();
            return Ok(());
        }
        let pipeline = handle.join();
        self.server_stop.notify_waiters();
        self.server_stop.notify_one();
        if let Some(s) = self.server.take() {
            let _ = self.runtime.block_on(async { tokio::time::timeout(Duration::from_secs(5), s).await });
        }
        match pipeline {
            Ok(r) => r?,
            Err(_) => anyhow::bail!("the pipeline thread panicked"),
        }
        tracing::info!("stopped gracefully");
        Ok(())
    }

    /// Blocks until the pipeline has completed `n` more rounds (tests and the demo use this
    /// to know that files they dropped have been looked at).
    pub fn wait_rounds(&self, n: u64, timeout: Duration) -> bool {
        let target = self.rounds.load(Ordering::SeqCst) + n;
        let deadline = Instant::now() + timeout;
        let _ = self.wake.send(());
        while self.rounds.load(Ordering::SeqCst) < target {
            if Instant::now() > deadline {
                return false;
            }
            std::thread::sleep(Duration::from_millis(5));
            let _ = self.wake.send(());
        }
        true
    }
}

/// Applies `state_max_size` to a store just opened for writing.
fn limit(store: Store, bytes: Option<u64>) -> Result<Store, StoreError> {
    if let Some(b) = bytes {
        store.limit_size(b)?;
    }
    Ok(store)
}
