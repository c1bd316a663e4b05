//! The middle of the data path: joins labels to predictions by id within `label_wait` (either
//! arrival order), keeps the joined samples in durable state, and cuts them into each model's
//! windows. Input: typed records of one file. Output: a [`Snapshot`] of every window's losses
//! summarised and bounded, which export/ renders. The only mutable record state lives here, in
//! [`store::Store`].

pub mod history;
pub mod shift;
pub mod store;

use crate::config::{DecideOn, ModelConfig, SlaConfig, WindowGuarantee};
use crate::estimate::anytime::Sequence;
use crate::estimate::delay_dependence::{self, DelayDependence};
use crate::estimate::delay_robust::{self, Cohort};
use crate::estimate::sla::{self, SlaReason, SlaState};
use crate::estimate::{self, Bounds, Confidence, LossSummary, Method};
pub use store::{Batch, CohortRange, Counters, FileOutcome, Kind, Store, StoreError, TakenFile, TrackerState};

/// The anytime alarms. The names are the `test` label values.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum AlarmTest {
    /// The risk exceeded the SLA since the reset (betting e-process).
    Exceeded,
    /// The risk exceeded the reference's upper bound + tolerance (harmful shift).
    Shift,
    /// The risk rose above the SLA at some point (Shiryaev–Roberts e-detector).
    Change,
}

impl AlarmTest {
    pub fn as_str(self) -> &'static str {
        match self {
            AlarmTest::Exceeded => "exceeded",
            AlarmTest::Shift => "shift",
            AlarmTest::Change => "change",
        }
    }
}

/// One alarm's evidence.
#[derive(Clone, Debug, PartialEq)]
pub struct AlarmSnapshot {
    pub test: AlarmTest,
    /// The θ it tests, in loss units.
    pub max_risk: f64,
    /// ln of the e-value (exceeded, shift) or of the detector statistic (change).
    pub log_evidence: f64,
    /// The level ln(1/δ) (exceeded, shift) or ln A (change) at which it fires.
    pub log_threshold: f64,
    /// The label count (since the reset) at which it fired; it stays fired until a reset.
    pub fired_at: Option<u64>,
}

/// The anytime-valid view of a model since its reset point.
#[derive(Clone, Debug, PartialEq)]
pub struct AnytimeSnapshot {
    /// Predictions whose label_wait is over, taken since the reset (labelled or not).
    pub n: u64,
    /// Of those, the ones with a label, and the mean and sum of their losses.
    pub labelled: u64,
    pub mean: f64,
    pub loss_sum: f64,
    pub bounds: Vec<(Sequence, Bounds)>,
    pub alarms: Vec<AlarmSnapshot>,
    pub reset_ms: Option<i64>,
    pub resets: u64,
}

impl AnytimeSnapshot {
    pub fn of(state: &TrackerState) -> AnytimeSnapshot {
        let t = &state.tracker;
        let mut alarms = Vec::new();
        for (test, e) in [(AlarmTest::Exceeded, t.exceeded()), (AlarmTest::Shift, t.shift())] {
            if let Some(e) = e {
                alarms.push(AlarmSnapshot {
                    test,
                    max_risk: e.theta() * t.spec().loss_max,
                    log_evidence: e.log_evidence(),
                    log_threshold: t.log_threshold(),
                    fired_at: e.alarm_at(),
                });
            }
        }
        if let Some(c) = t.change() {
            alarms.push(AlarmSnapshot {
                test: AlarmTest::Change,
                max_risk: c.theta() * t.spec().loss_max,
                log_evidence: c.log_evidence(),
                log_threshold: c.threshold().ln(),
                fired_at: c.alarm_at(),
            });
        }
        AnytimeSnapshot {
            n: t.n(),
            labelled: t.labelled(),
            mean: t.mean(),
            loss_sum: t.labelled_sum(),
            bounds: if t.n() == 0 { Vec::new() } else { Sequence::ALL.iter().map(|&s| (s, t.bounds(s))).collect() },
            alarms,
            reset_ms: state.reset_ms,
            resets: state.resets,
        }
    }
}

/// One window's numbers.
#[derive(Clone, Debug)]
pub struct WindowSnapshot {
    pub name: String,
    pub n: u64,
    pub mean: f64,
    /// Σ of the window's losses (for 0-1 loss, its error count), exact where `mean · n` rounds.
    pub loss_sum: f64,
    /// Σ of the squared losses (loss units squared): with `n` and `loss_sum`, what the fleet view
    /// needs to pool the variance-adaptive bound across replicas.
    pub loss_squares: f64,
    pub bounds: Vec<(Method, Bounds)>,
    /// The samples each method of `bounds` read: all of them, or (betting) the subsample.
    pub used: Vec<(Method, u64)>,
    /// `None` when the model has no SLA.
    pub state: Option<(SlaState, SlaReason)>,
    /// The slice search, when the model configures one.
    pub slices: Option<SliceSnapshot>,
    /// The samples the slice search read (the subsample's rows with features).
    pub slice_samples: Option<u64>,
    /// The window's cohort and its delay-robust bounds (`None` before the first prediction).
    pub cohort: Option<CohortSnapshot>,
}

/// A window's cohort: every prediction of its prediction-time range, labelled or not.
#[derive(Clone, Debug, PartialEq)]
pub struct CohortSnapshot {
    pub range: CohortRange,
    pub predictions: u64,
    pub unlabelled: u64,
    /// Σ of the labelled predictions' losses and of their squares (loss units), for pooling.
    pub known_sum: f64,
    pub known_squares: f64,
    /// Bounds with every unknown loss at 0 (lower) and at B (upper), at the window confidence.
    pub bounds: Vec<(Method, Bounds)>,
    /// The predictions each method of `bounds` read: all, or (betting) the subsample.
    pub used: Vec<(Method, u64)>,
}

/// The delay-robust bounds of a cohort by every method that applies (as [`summary_bounds`]).
pub fn cohort_bounds(cohort: &Cohort, model: &ModelConfig, confidence: Confidence) -> Vec<(Method, Bounds)> {
    let mut out = Vec::new();
    if cohort.n() == 0 {
        return out;
    }
    for m in Method::ALL {
        if m == Method::ClopperPearson && !model.loss.is_binary() {
            continue;
        }
        if let Ok(b) = delay_robust::bounds(m, cohort, model.loss.max(), confidence) {
            out.push((m, b));
        }
    }
    out
}

/// A cohort's snapshot: its counts and (unless the δ budget is spent out) its bounds.
fn cohort_snapshot(
    range: CohortRange,
    c: &Cohort,
    model: &ModelConfig,
    confidence: Confidence,
    spent_out: bool,
) -> CohortSnapshot {
    let bounds = if spent_out { Vec::new() } else { cohort_bounds(c, model, confidence) };
    CohortSnapshot {
        range,
        predictions: c.n(),
        unlabelled: c.unknown(),
        known_sum: c.known.sum_scaled() * model.loss.max(),
        known_squares: c.known.squares_scaled() * model.loss.max() * model.loss.max(),
        used: bounds.iter().map(|(m, _)| (*m, c.used_by(*m))).collect(),
        bounds,
    }
}

/// One exported slice, in loss units.
#[derive(Clone, Debug, PartialEq)]
pub struct SliceLine {
    pub description: String,
    pub kind: &'static str,
    pub n: u64,
    pub mean: f64,
    pub lower: f64,
    pub upper: f64,
    pub certified_by: &'static str,
    pub violates: bool,
}

/// A window's slice search: the worst slices found and certified, and the registered ones.
#[derive(Clone, Debug, PartialEq)]
pub struct SliceSnapshot {
    /// Worst first, at most `slices.top`.
    pub top: Vec<SliceLine>,
    pub registered: Vec<SliceLine>,
    /// ε of the uniform certificate (loss units).
    pub uniform_deviation: f64,
    /// Slices of `top` and `registered` certified above max_risk.
    pub violations: u64,
}

/// The seed of a window's split and sign draws: fixed, so a scrape can be reproduced from the
/// same rows with `riskbound slices --seed`.
pub const SLICE_SEED: u64 = 1;

/// Runs the slice search on a window's rows (loss, features in config order).
pub fn slice_snapshot(
    rows: &[(f64, Vec<String>)],
    model: &ModelConfig,
    confidence: Confidence,
) -> Option<SliceSnapshot> {
    use crate::estimate::slices::{self, Table};
    let (sl, sla) = (model.slices.as_ref()?, model.sla.as_ref()?);
    if rows.len() < 2 {
        return None;
    }
    let b = model.loss.max();
    let nc = sl.categorical.len();
    let table = Table {
        losses: rows.iter().map(|(l, _)| (l / b).clamp(0.0, 1.0)).collect(),
        categorical: sl
            .categorical
            .iter()
            .enumerate()
            .map(|(i, c)| (c.clone(), rows.iter().map(|r| r.1[i].clone()).collect()))
            .collect(),
        numeric: sl
            .numeric
            .iter()
            .enumerate()
            .map(|(i, c)| {
                // Checked at ingest; a row stored by an older config that fails is scored as 0.
                (
                    c.clone(),
                    rows.iter().map(|r| crate::loss::parse_number(r.1[nc + i].as_bytes()).unwrap_or(0.0)).collect(),
                )
            })
            .collect(),
    };
    let theta = sla.max_risk / b;
    let report = slices::analyze(
        &table,
        &slices::Plan {
            theta,
            delta: confidence.delta(),
            top: sl.top,
            seed: SLICE_SEED,
            sign_draws: sl.sign_draws,
            depth: sl.depth,
        },
    );
    let line = |s: &slices::SliceReport| SliceLine {
        description: s.slice.describe(),
        kind: s.slice.kind(),
        n: s.n,
        mean: s.mean * b,
        lower: s.lower * b,
        upper: s.upper * b,
        certified_by: s.certified_by,
        violates: s.violates_sla,
    };
    let top: Vec<SliceLine> = report.slices.iter().map(line).collect();
    let registered: Vec<SliceLine> = sl
        .registered
        .iter()
        .zip(slices::registered(&table, &sl.registered, confidence.delta()))
        .map(|(s, r)| SliceLine {
            description: s.describe(),
            kind: s.kind(),
            n: r.n,
            mean: r.mean * b,
            lower: r.bounds.lower * b,
            upper: r.bounds.upper * b,
            certified_by: r.method,
            violates: r.bounds.lower > theta,
        })
        .collect();
    let violations = top.iter().chain(&registered).filter(|s| s.violates).count() as u64;
    Some(SliceSnapshot { top, registered, uniform_deviation: report.deviation * b, violations })
}

/// One model's numbers.
#[derive(Clone, Debug)]
pub struct ModelSnapshot {
    pub name: String,
    pub confidence: f64,
    pub loss_max: f64,
    /// The loss's name as the config writes it (`zero-one`, `absolute`, ...).
    pub loss_name: &'static str,
    pub sla: Option<SlaConfig>,
    pub windows: Vec<WindowSnapshot>,
    pub window_guarantee: WindowGuarantee,
    /// The confidence of each per-window bound at this evaluation (below `confidence` when δ
    /// is spent over evaluations).
    pub window_confidence: f64,
    pub anytime: AnytimeSnapshot,
    pub counters: Counters,
    pub awaiting: u64,
    /// joined / (joined + expired): the fraction of decided predictions that got a label.
    pub label_coverage: Option<f64>,
    pub last_commit_ms: Option<i64>,
    /// Whether label delays differ by outcome, on the newest kept labelled samples.
    pub delay_dependence: DelayDependence,
    /// The label-free input-shift tests, if configured (filled by the pipeline from its latest
    /// look: a look is too costly for every publish).
    pub input_shift: Option<shift::ShiftSnapshot>,
    /// The evaluation history kept for the status page (filled by the pipeline, which holds it
    /// in memory: the page never reads the database).
    pub history: std::sync::Arc<Vec<history::HistoryPoint>>,
    /// The model's event clock: the newest event time (ms) it has taken.
    pub event_clock_ms: Option<i64>,
}

/// The newest labelled samples (by prediction time) the delay-dependence test reads: enough for
/// power, few enough that sorting them every publish stays cheap.
pub const DELAY_TEST_SAMPLES: usize = 50_000;

/// Everything /metrics shows, computed once per ingest round and read by every scrape.
#[derive(Clone, Debug, Default)]
pub struct Snapshot {
    pub models: Vec<ModelSnapshot>,
}

/// The bounds of a summary by every method that applies, each at `confidence`.
pub fn summary_bounds(s: &LossSummary, model: &ModelConfig, confidence: Confidence) -> Vec<(Method, Bounds)> {
    let mut out = Vec::new();
    if s.n() > 0 {
        for m in Method::ALL {
            // zero-one losses are binary by construction; other losses get clopper-pearson
            // only when the config says they are binary (never), so series do not come and go.
            let applies = if m == Method::ClopperPearson { model.loss.is_binary() } else { true };
            if applies {
                if let Ok(b) = estimate::bounds(m, s, confidence) {
                    out.push((m, b));
                }
            }
        }
    }
    out
}

/// Computes one model's snapshot from the store; `evaluation` is the 1-based number of this
/// evaluation of the window bounds (it matters only when δ is spent).
pub fn model_snapshot(store: &Store, model: &ModelConfig, evaluation: u64) -> Result<ModelSnapshot, StoreError> {
    let delta_k = model.window_guarantee.delta(model.confidence.delta(), evaluation);
    // 1 − δ_k rounds; never let the rounded δ come out larger than δ_k (that would spend more
    // than planned). Below 1e-15 (after some 10^7 evaluations) the budget is spent out: no
    // per-window bound is published, rather than one at a level the budget cannot pay for.
    let spent_out = delta_k < 1e-15;
    let mut c = 1.0 - delta_k.max(1e-15);
    if 1.0 - c > delta_k.max(1e-15) {
        c += f64::EPSILON / 2.0;
    }
    let window_confidence = Confidence::new(c).unwrap_or(model.confidence);
    let counters = store.counters(&model.name)?;
    let decided = counters.joined + counters.expired;
    let label_coverage = (decided > 0).then(|| counters.joined as f64 / decided as f64);
    let mut windows = Vec::with_capacity(model.windows.len());
    for (i, w) in model.windows.iter().enumerate() {
        // One read of the window serves the bounds and, when configured, the slice search: the
        // exact statistics of every sample, and a bounded subsample for what needs samples.
        let view = store.window_view(model, i, model.max_samples)?;
        let sampled: Vec<f64> = view.sample.iter().map(|(l, _)| *l).collect();
        let summary = LossSummary::with_sample(model.loss.max(), view.stats, Some(&sampled));
        let mut bounds = summary_bounds(&summary, model, window_confidence);
        let mut used: Vec<(Method, u64)> = bounds.iter().map(|(m, _)| (*m, summary.used_by(*m))).collect();
        let rows = view.sample;
        let cohort = view.cohort.map(|(range, c)| cohort_snapshot(range, &c, model, window_confidence, spent_out));
        if spent_out {
            bounds.clear();
            used.clear();
        }
        let mut state = model.sla.as_ref().map(|sla| {
            let deciding = match sla.decide_on {
                DecideOn::LabelledOnly => &bounds,
                DecideOn::DelayRobust => match &cohort {
                    Some(c) => &c.bounds,
                    None => return (SlaState::Inconclusive, SlaReason::TooFewSamples),
                },
            };
            match deciding.iter().find(|(m, _)| *m == sla.method) {
                Some((_, b)) => {
                    sla::decide(*b, summary.n(), sla.max_risk, sla.min_samples, label_coverage, sla.min_label_coverage)
                }
                None => (SlaState::Inconclusive, SlaReason::TooFewSamples),
            }
        });
        let mut slice_samples = None;
        let slices = match &model.slices {
            Some(_) => {
                // Rows stored before slices were configured carry no features and sit out.
                let featured: Vec<(f64, Vec<String>)> =
                    rows.into_iter().filter_map(|(l, f)| f.map(|f| (l, f))).collect();
                let sn = slice_snapshot(&featured, model, window_confidence);
                if sn.is_some() {
                    slice_samples = Some(featured.len() as u64);
                }
                sn
            }
            None => None,
        };
        // A certified bad slice decides the window only when asked, and never overrides thin
        // evidence (too few samples, too few labels).
        if let (Some(sl), Some(sn), Some((st, why))) = (&model.slices, &slices, &mut state) {
            let thin = matches!(why, SlaReason::TooFewSamples | SlaReason::LowLabelCoverage);
            if sl.decide_state && sn.violations > 0 && *st != SlaState::Violated && !thin {
                *st = SlaState::Violated;
                *why = SlaReason::SliceAboveMax;
            }
        }
        windows.push(WindowSnapshot {
            name: w.name.clone(),
            n: summary.n(),
            mean: summary.mean(),
            loss_sum: summary.sum(),
            loss_squares: summary.stats().squares_scaled() * model.loss.max() * model.loss.max(),
            bounds,
            used,
            state,
            slices,
            slice_samples,
            cohort,
        });
    }
    let delay_dependence = delay_dependence::test(
        &store.delay_rows(&model.name, DELAY_TEST_SAMPLES)?,
        model.loss.max(),
        model.loss.is_binary(),
        model.confidence.delta(),
    );
    Ok(ModelSnapshot {
        name: model.name.clone(),
        confidence: model.confidence.level(),
        loss_max: model.loss.max(),
        loss_name: model.loss.name(),
        sla: model.sla.clone(),
        windows,
        window_guarantee: model.window_guarantee,
        window_confidence: window_confidence.level(),
        anytime: AnytimeSnapshot::of(&store.tracker(model)?),
        awaiting: store.awaiting(&model.name)?,
        label_coverage,
        last_commit_ms: store.last_commit_ms(&model.name)?,
        counters,
        delay_dependence,
        input_shift: None,
        history: Default::default(),
        event_clock_ms: store.watermark(&model.name)?,
    })
}
