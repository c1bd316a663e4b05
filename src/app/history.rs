//! The evaluation history's side of the pipeline: which evaluation count a snapshot spends,
//! the point written before a file moves a model's event clock into a new bucket, reading the
//! kept points back at start, and `riskbound replay`, which feeds listed files through the same
//! path.

use super::*;

/// The evaluation count `k` of a model's next evaluation (1 unless δ is spent over
/// evaluations). `None` when the count cannot be recorded: without a durable k, a restart could
/// reuse δ_k, so no evaluation is made.
pub(super) fn evaluation(store: &mut Store, m: &crate::config::ModelConfig) -> Result<Option<u64>, StoreError> {
    if m.window_guarantee != WindowGuarantee::Spent {
        return Ok(Some(1));
    }
    match store.next_evaluation(&m.name) {
        Ok(k) => Ok(Some(k)),
        Err(e) if e.is_disk() => {
            tracing::warn!(model = %m.name, error = %e, "cannot record the evaluation count; no evaluation made");
            Ok(None)
        }
        Err(e) => Err(e),
    }
}

impl Pipeline {
    /// Reads each model's kept history into memory.
    pub(super) fn resume_history(&mut self) -> Result<(), StoreError> {
        for m in &self.config.models {
            let points = self.store.history(&m.name, i64::MIN, i64::MAX)?;
            let points: Vec<HistoryPoint> = points.iter().filter_map(|(_, j)| HistoryPoint::parse(j)).collect();
            self.history.insert(m.name.clone(), Arc::new(points));
        }
        Ok(())
    }

    /// Before a file is applied: when its newest event time would move model `i`'s event clock
    /// into a later `history.every`, the state as it stands closes the current one, and is
    /// written as that bucket's point (replacing any earlier point of the bucket). The point
    /// depends only on the files taken before, so a replay writes it again; a crash before the
    /// file commits leaves the state as it was, and the file, read again, writes the same point.
    /// A point that cannot be written is logged and skipped: the history is for people, and
    /// never holds up ingest.
    pub(super) fn close_bucket_before(&mut self, i: usize, newest_ms: Option<i64>) {
        let m = &self.config.models[i];
        let h = self.config.history;
        let result = (|| -> Result<(), StoreError> {
            let (Some(t), Some(newest)) = (self.store.watermark(&m.name)?, newest_ms) else { return Ok(()) };
            let bucket = t.div_euclid(h.every_ms);
            if newest.div_euclid(h.every_ms) <= bucket {
                return Ok(());
            }
            let Some(k) = evaluation(&mut self.store, m)? else { return Ok(()) };
            let mut snap = window::model_snapshot(&self.store, m, k)?;
            // The alarm, not the look: a look's timing follows the publishes, which a replay
            // does not repeat; the alarm moves only with the files.
            snap.input_shift = window::shift::snapshot(&self.store, m, None)?;
            let point = HistoryPoint::of(&snap, t);
            let keep_from = t.saturating_sub(h.keep_ms);
            self.store.record_history(&m.name, bucket, t, &point.to_json(), keep_from)?;
            let kept = Arc::make_mut(self.history.entry(m.name.clone()).or_default());
            kept.retain(|p| p.t_ms >= keep_from && p.t_ms.div_euclid(h.every_ms) != bucket);
            kept.push(point);
            Ok(())
        })();
        if let Err(e) = result {
            self.health.history_write_failures.fetch_add(1, Ordering::SeqCst);
            tracing::warn!(model = %m.name, error = %e, "cannot write the history point; it is skipped");
        }
    }
}

/// Feeds `files` (model index, kind, path), in this order, into the state of `config` as the
/// daemon takes them, history points and all: `riskbound replay`. Returns how many changed the
/// state (a file whose content was taken before adds nothing, as in the daemon).
pub fn replay(config: Config, files: &[(usize, Kind, PathBuf)]) -> anyhow::Result<u64> {
    std::fs::create_dir_all(&config.state_dir)
        .with_context(|| format!("creating state_dir {}", config.state_dir.display()))?;
    let store = Store::open(&config.state_dir)?;
    let snapshot: SharedSnapshot = Arc::new(RwLock::new(Arc::new(Snapshot::default())));
    let mut p = Pipeline::new(config, store, snapshot, Arc::new(Health::default()), false);
    p.resume_history()?;
    let mut taken = 0;
    for (model, kind, path) in files {
        let meta = std::fs::metadata(path).with_context(|| format!("reading {}", path.display()))?;
        let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let c = Candidate {
            model: *model,
            kind: *kind,
            path: path.clone(),
            name,
            len: meta.len(),
            modified: meta.modified().ok(),
        };
        taken += u64::from(p.take(&c)?);
    }
    Ok(taken)
}
