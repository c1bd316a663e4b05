//! One batch file into the state, in one transaction: the row checks, the join of predictions
//! and labels, expiry by event time, and the counters the file changes.

use super::*;

/// A joined sample about to be stored.
pub(super) struct NewSample<'a> {
    pub(super) id: &'a str,
    pub(super) t_pred: i64,
    pub(super) t_label: i64,
    pub(super) loss: f64,
    /// The prediction's slice features (JSON), if any.
    pub(super) features: Option<&'a str>,
}

/// What one file did to the join state, gathered so that each counter is written once per
/// file rather than once per row.
#[derive(Default)]
pub(super) struct Joins {
    /// The label delays of the samples it completed, in the order they were joined.
    pub(super) delays: Vec<f64>,
    /// Change in the number of predictions waiting for a label.
    pub(super) awaiting: i64,
    /// Predictions that arrived already older than the expiry cutoff: expired on arrival.
    pub(super) expired: u64,
    /// The expiry cutoff before this file: every prediction older than it is decided.
    pub(super) expired_to: i64,
    /// The samples it stored and the predictions it counted (per second and sampling level),
    /// for the windows' ranges.
    pub(super) fresh: Fresh,
    /// Predictions whose label_wait it closed, in prediction-time order: the loss, or `None`
    /// when no label came. The anytime tracker takes them in this order.
    pub(super) matured: Vec<Option<f64>>,
    /// New predictions the input-shift alarm pairs (sampled), with their feature cells.
    pub(super) shift_fresh: Vec<FreshPoint>,
}

/// The loss of a labelled prediction, or why there is none.
pub(super) fn loss_of(spec: &LossSpec, prediction: &str, label: &str) -> Result<f64, RejectReason> {
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

/// Numeric slice features must parse when the prediction arrives, so a bad cell is rejected
/// at its own line rather than dropped from every later window.
pub(super) fn check_features(model: &ModelConfig, rec: &Record) -> Result<(), (RejectReason, String)> {
    let Some(sl) = &model.slices else { return Ok(()) };
    let nc = sl.categorical.len();
    for (name, v) in sl.numeric.iter().zip(rec.features.iter().skip(nc)) {
        if loss::parse_number(v.as_bytes()).is_err() {
            return Err((RejectReason::BadNumber, format!("column {name}: {v:?} is not a number")));
        }
    }
    Ok(())
}

/// The slice features of a record as stored: a JSON array of strings, or NULL without slices
/// (the input-shift cells after them are stored apart, in `shift_point`).
pub(super) fn features_json(model: &ModelConfig, rec: &Record) -> Option<String> {
    let slice = &rec.features[..model.slice_feature_count().min(rec.features.len())];
    (!slice.is_empty()).then(|| serde_json::to_string(slice).expect("strings serialise"))
}

/// Checks a value cell when it arrives, so a bad row is rejected at its own line.
pub(super) fn check_value(spec: &LossSpec, kind: Kind, value: &str) -> Result<(), RejectReason> {
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
        let mut span: Option<(i64, i64)> = None;
        for r in rejects {
            reject(&mut out, r.clone());
        }
        for rec in records {
            if let Err(r) = check_row(model, kind, name, rec, now_ms) {
                reject(&mut out, r);
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
                    span = Some(
                        span.map_or((rec.time_ms, rec.time_ms), |(a, b)| (a.min(rec.time_ms), b.max(rec.time_ms))),
                    );
                }
                Err(reason) => {
                    let message = format!("{name}:{}: id {:?}: {reason}", rec.line, rec.id);
                    reject(&mut out, Reject { line: rec.line, reason, message });
                }
            }
        }
        let expired_to = Self::expire(&tx, model, watermark, &mut joins)?;
        write_counters(&tx, m, kind, &out, &joins)?;
        let bad: u64 = out.rejected.values().sum();
        tx.execute(
            "INSERT INTO file (model, kind, hash, name, rows_ok, rows_bad, committed_ms, size, mtime_ns)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
            params![m, kind.as_str(), hash, name, out.rows_ok as i64, bad as i64, now_ms, batch.size, batch.mtime_ns],
        )?;
        insert_file_detail(&tx, m, kind, hash, span, &out.rejected)?;
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
        for (&(sec, level), n) in &joins.fresh.counted {
            tx.prepare_cached(
                "INSERT INTO pred_count (model, sec, level, n) VALUES (?1, ?2, ?3, ?4)
                 ON CONFLICT (model, sec, level) DO UPDATE SET n = n + excluded.n",
            )?
            .execute(params![m, sec, level, *n as i64])?;
        }
        // The windows move inside the transaction, before pruning deletes what they leave: the
        // rows a range leaves are read back to be subtracted. A failure drops the ranges (they
        // are rebuilt from the committed state on next use).
        let ranges = match self.ranges.get_mut().remove(m) {
            Some(mut r) if r.fits(model) => {
                r.advance(&tx, model, &joins.fresh)?;
                r
            }
            _ => ModelRanges::build(&tx, model)?,
        };
        Self::prune(&tx, m, ranges.keep_from())?;
        out.tracker_restarted = Self::advance_tracker(&tx, model, &joins.matured, now_ms)?;
        Self::advance_shift_alarm(&tx, model, &mut joins.shift_fresh)?;
        tx.commit()?;
        // Only once the commit stands: the ranges never run ahead of the database.
        self.ranges.get_mut().insert(m.to_string(), ranges);
        Ok(out)
    }

    /// Expiry by event time, for one file's newest event `watermark`: returns the new cutoff.
    pub(super) fn expire(
        tx: &Connection,
        model: &ModelConfig,
        watermark: i64,
        joins: &mut Joins,
    ) -> rusqlite::Result<i64> {
        // Expiry by event time: what waited longer than label_wait behind the newest event.
        // Everything below the previous cutoff is decided already (predictions arriving below
        // it are expired on arrival), so only the predictions between the two cutoffs are
        // visited: each prediction once in its life, not the whole table per file. The cutoff
        // never moves back, even when label_wait is raised.
        let mut expired_to = joins.expired_to;
        let m = model.name.as_str();
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
            bump(tx, m, "orphaned", orphaned as f64)?;
            // Decided predictions are kept a second label_wait to catch late duplicates.
            tx.prepare_cached("DELETE FROM pred WHERE model = ?1 AND t_pred < ?2 AND state IN (?3, ?4)")?
                .execute(params![m, cutoff.saturating_sub(model.label_wait_ms), LABELLED, EXPIRED])?;
            expired_to = cutoff;
        }
        Ok(expired_to)
    }

    pub(super) fn insert_sample(
        tx: &Connection,
        model: &str,
        s: NewSample<'_>,
        joins: &mut Joins,
    ) -> rusqlite::Result<()> {
        let NewSample { id, t_pred, t_label, loss, features } = s;
        let level = level_of(id);
        tx.prepare_cached(
            "INSERT INTO sample (model, id, t_pred, t_label, loss, features, level) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        )?
        .execute(params![model, id, t_pred, t_label, loss, features, level])?;
        joins.fresh.samples.push(((t_pred, tx.last_insert_rowid()), loss, level));
        joins.delays.push(((t_label - t_pred).max(0) as f64) / 1000.0);
        Ok(())
    }

    /// A prediction: rejected if its id was seen, joined at once if its label came first.
    pub(super) fn take_prediction(
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
        let features = features_json(model, rec);
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
        *joins.fresh.counted.entry((rec.time_ms.div_euclid(1000), level_of(&rec.id))).or_default() += 1;
        Self::insert_shift_point(tx, model, rec, &mut joins.shift_fresh)?;
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
    pub(super) fn take_label(
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
}

/// Every counter one file changes, in its transaction: expiry, waiting, label delays, rows,
/// files, joins and rejects by reason.
pub(super) fn write_counters(
    tx: &Connection,
    m: &str,
    kind: Kind,
    out: &FileOutcome,
    joins: &Joins,
) -> rusqlite::Result<()> {
    bump(tx, m, "expired", joins.expired as f64)?;
    bump(tx, m, "awaiting", joins.awaiting as f64)?;
    let delays = &joins.delays;
    let mut per_bucket = [0u64; DELAY_BUCKETS.len() + 1];
    for d in delays {
        per_bucket[DELAY_BUCKETS.iter().position(|b| d <= b).unwrap_or(DELAY_BUCKETS.len())] += 1;
    }
    for (i, n) in per_bucket.iter().enumerate() {
        bump(tx, m, &format!("delay_bucket_{i}"), *n as f64)?;
    }
    bump(tx, m, "samples_kept", delays.len() as f64)?;
    bump(tx, m, "delay_count", delays.len() as f64)?;
    bump(tx, m, "delay_sum_seconds", delays.iter().sum())?;
    bump(tx, m, &format!("rows_{}", kind.as_str()), out.rows_ok as f64)?;
    bump(tx, m, &format!("files_{}", kind.as_str()), 1.0)?;
    bump(tx, m, "joined", out.joined as f64)?;
    for (reason, n) in &out.rejected {
        bump(tx, m, &format!("rejected_{}_{}", kind.as_str(), reason.as_str()), *n as f64)?;
    }
    Ok(())
}

/// The checks a row passes before the join: not from the future, a valid value for its kind,
/// the slice features it needs.
pub(super) fn check_row(model: &ModelConfig, kind: Kind, name: &str, rec: &Record, now_ms: i64) -> Result<(), Reject> {
    if rec.time_ms > now_ms.saturating_add(model.future_tolerance_ms) {
        let message =
            format!("{name}:{}: time {} ms is ahead of the clock by more than future_tolerance", rec.line, rec.time_ms);
        return Err(Reject { line: rec.line, reason: RejectReason::FutureTimestamp, message });
    }
    if let Err(reason) = check_value(&model.loss, kind, &rec.value) {
        let message = format!("{name}:{}: value {:?}: {reason}", rec.line, rec.value);
        return Err(Reject { line: rec.line, reason, message });
    }
    if let Err((reason, what)) = check_features(model, rec).and_then(|()| check_shift_cells(model, rec)) {
        let message = format!("{name}:{}: {what}", rec.line);
        return Err(Reject { line: rec.line, reason, message });
    }
    Ok(())
}
