//! The anytime tracker's durable state: stored as JSON per model, advanced with the predictions
//! whose wait is over, restarted by `riskbound reset`.

use super::*;

impl Store {
    /// The stored tracker row: (state JSON or NULL after a reset, reset_ms, resets).
    pub(super) fn tracker_row(tx: &Connection, model: &str) -> rusqlite::Result<Option<TrackerRow>> {
        tx.prepare_cached("SELECT state, reset_ms, resets FROM tracker WHERE model = ?1")?
            .query_row([model], |r| Ok((r.get(0)?, r.get(1)?, r.get::<_, i64>(2)? as u64)))
            .optional()
    }

    /// The stored state if it was made for the configured spec; `Ok(None)` when there is none,
    /// it was reset, or it was made for other settings (the bool says which of the last).
    pub(super) fn stored_tracker(
        tx: &Connection,
        model: &ModelConfig,
    ) -> Result<(Option<TrackerState>, bool), StoreError> {
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
    pub(super) fn advance_tracker(
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
        // The input-shift alarm restarts its evidence but keeps its place in the reference
        // pool: a reference point is never paired twice.
        tx.execute("UPDATE shift_alarm SET state = NULL WHERE model = ?1", [model])?;
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
}
