//! The middle of the data path: joins labels to predictions by id within `label_wait` (either
//! arrival order), keeps the joined samples in durable state, and cuts them into each model's
//! windows. Input: typed records of one file. Output: a [`Snapshot`] of every window's losses
//! summarised and bounded, which export/ renders. The only mutable record state lives here, in
//! [`store::Store`].

pub mod store;

use crate::config::{ModelConfig, SlaConfig};
use crate::estimate::sla::{self, SlaReason, SlaState};
use crate::estimate::{self, Bounds, LossSummary, Method};
pub use store::{Batch, Counters, FileOutcome, Kind, Store, StoreError};

/// One window's numbers.
#[derive(Clone, Debug)]
pub struct WindowSnapshot {
    pub name: String,
    pub n: u64,
    pub mean: f64,
    pub bounds: Vec<(Method, Bounds)>,
    /// `None` when the model has no SLA.
    pub state: Option<(SlaState, SlaReason)>,
}

/// One model's numbers.
#[derive(Clone, Debug)]
pub struct ModelSnapshot {
    pub name: String,
    pub confidence: f64,
    pub loss_max: f64,
    pub sla: Option<SlaConfig>,
    pub windows: Vec<WindowSnapshot>,
    pub counters: Counters,
    pub awaiting: u64,
    /// joined / (joined + expired): the fraction of decided predictions that got a label.
    pub label_coverage: Option<f64>,
    pub last_commit_ms: Option<i64>,
}

/// Everything /metrics shows, computed once per ingest round and read by every scrape.
#[derive(Clone, Debug, Default)]
pub struct Snapshot {
    pub models: Vec<ModelSnapshot>,
}

/// The bounds of a set of losses by every method that applies.
pub fn window_bounds(losses: &[f64], model: &ModelConfig) -> (LossSummary, Vec<(Method, Bounds)>) {
    let mut s = LossSummary::keeping_losses(model.loss.max());
    for &l in losses {
        s.push(l);
    }
    let mut out = Vec::new();
    if s.n() > 0 {
        for m in Method::ALL {
            // zero-one losses are binary by construction; other losses get clopper-pearson
            // only when the config says they are binary (never), so series do not come and go.
            let applies = if m == Method::ClopperPearson { model.loss.is_binary() } else { true };
            if applies {
                if let Ok(b) = estimate::bounds(m, &s, model.confidence) {
                    out.push((m, b));
                }
            }
        }
    }
    (s, out)
}

/// Computes one model's snapshot from the store.
pub fn model_snapshot(store: &Store, model: &ModelConfig) -> Result<ModelSnapshot, StoreError> {
    let counters = store.counters(&model.name)?;
    let decided = counters.joined + counters.expired;
    let label_coverage = (decided > 0).then(|| counters.joined as f64 / decided as f64);
    let mut windows = Vec::with_capacity(model.windows.len());
    for w in &model.windows {
        let losses = store.window_losses(&model.name, w.kind)?;
        let (summary, bounds) = window_bounds(&losses, model);
        let state = model.sla.as_ref().map(|sla| match bounds.iter().find(|(m, _)| *m == sla.method) {
            Some((_, b)) => {
                sla::decide(*b, summary.n(), sla.max_risk, sla.min_samples, label_coverage, sla.min_label_coverage)
            }
            None => (SlaState::Inconclusive, SlaReason::TooFewSamples),
        });
        windows.push(WindowSnapshot { name: w.name.clone(), n: summary.n(), mean: summary.mean(), bounds, state });
    }
    Ok(ModelSnapshot {
        name: model.name.clone(),
        confidence: model.confidence.level(),
        loss_max: model.loss.max(),
        sla: model.sla.clone(),
        windows,
        awaiting: store.awaiting(&model.name)?,
        label_coverage,
        last_commit_ms: store.last_commit_ms(&model.name)?,
        counters,
    })
}
