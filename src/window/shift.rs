//! The input-shift look: the model's input-shift window read from the store and tested against
//! the reference (permutation and spectral tests, per-column KS), plus the alarm's state. A
//! look is costly (a Gram matrix of up to (2·max_points)² entries), so the pipeline keeps the
//! latest one and looks again only after `every` of event time.

use crate::config::{InputShiftConfig, ModelConfig, SHIFT_NULL_DRAWS};
use crate::estimate::kernel::{self, TwoSample, TwoSampleSettings};
pub use crate::window::store::ShiftAlarmView;
use crate::window::store::{points_of, Store, StoreError};

/// One look's outcome.
#[derive(Clone, Debug, PartialEq)]
pub struct ShiftLook {
    /// The newest prediction time (ms) held at the look: the next is due `every` after it.
    pub at_ms: i64,
    /// Points in the window, and the subsample's sampling level.
    pub in_window: u64,
    pub level: u8,
    /// Current points tested (after the subsample).
    pub n_current: usize,
    /// The tests, or why the look is inconclusive.
    pub outcome: Result<TwoSample, String>,
    /// The window's oldest (t_pred, seq): older stored points may be pruned.
    pub from: Option<(i64, i64)>,
}

/// What /metrics shows of a model's input shift.
#[derive(Clone, Debug, PartialEq)]
pub struct ShiftSnapshot {
    pub window: String,
    /// The numeric columns, in the order of the look's KS results.
    pub columns: Vec<String>,
    pub confidence: f64,
    pub reference_rows: usize,
    pub reference_tested: usize,
    pub look: Option<ShiftLook>,
    pub alarm: Option<ShiftAlarmView>,
}

/// True when a look is due: none yet, or the newest prediction is `every` past the last look's.
pub fn look_due(store: &Store, model: &ModelConfig, last: Option<&ShiftLook>) -> Result<bool, StoreError> {
    let Some(sh) = &model.input_shift else { return Ok(false) };
    let Some(newest) = store.shift_newest(&model.name)? else { return Ok(false) };
    Ok(last.is_none_or(|l| newest >= l.at_ms.saturating_add(sh.every_ms)))
}

/// Reads the window and tests it against the reference.
pub fn look(store: &Store, model: &ModelConfig, sh: &InputShiftConfig) -> Result<Option<ShiftLook>, StoreError> {
    let rows = store.shift_rows(&model.name, sh)?;
    let Some(at_ms) = rows.newest_ms else { return Ok(None) };
    let current = points_of(sh, rows.cells.iter().map(Vec::as_slice));
    let n_current = current.len();
    let outcome = if n_current < sh.min_points {
        Err(format!("{n_current} points in the window's subsample, fewer than min_points {}", sh.min_points))
    } else {
        let settings = TwoSampleSettings {
            bandwidth: sh.bandwidth,
            permutations: sh.permutations,
            null_draws: SHIFT_NULL_DRAWS,
            seed: sh.seed,
        };
        kernel::two_sample(&sh.reference.tested, &current, &sh.reference.scale, settings, |_| {})
            .map_err(|e| e.to_string())
    };
    Ok(Some(ShiftLook { at_ms, in_window: rows.in_window, level: rows.level, n_current, outcome, from: rows.from }))
}

/// The snapshot part, from the latest look and the stored alarm.
pub fn snapshot(
    store: &Store,
    model: &ModelConfig,
    look: Option<&ShiftLook>,
) -> Result<Option<ShiftSnapshot>, StoreError> {
    let Some(sh) = &model.input_shift else { return Ok(None) };
    Ok(Some(ShiftSnapshot {
        window: sh.window.name.clone(),
        columns: sh.numeric.clone(),
        confidence: sh.confidence.level(),
        reference_rows: sh.reference.rows,
        reference_tested: sh.reference.tested.len(),
        look: look.cloned(),
        alarm: store.shift_alarm(model)?,
    }))
}
