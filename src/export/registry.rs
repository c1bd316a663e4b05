//! Every metric riskbound exports, named and described in this one file. The values come from
//! the latest [`Snapshot`], encoded per scrape by a collector, so a window or model that goes
//! away takes its series with it and a scrape never waits for the ingest pipeline.

use std::sync::{Arc, RwLock};

use prometheus_client::collector::Collector;
use prometheus_client::encoding::{DescriptorEncoder, EncodeMetric};
use prometheus_client::metrics::counter::ConstCounter;
use prometheus_client::metrics::gauge::ConstGauge;
use prometheus_client::metrics::MetricType;
use prometheus_client::registry::Registry;

use crate::config::SINCE_RESET;
use crate::estimate::sla::SlaState;
use crate::ingest::records::RejectReason;
use crate::window::store::DELAY_BUCKETS;
use crate::window::{Kind, Snapshot};

/// The shared snapshot the pipeline publishes and scrapes read.
pub type SharedSnapshot = Arc<RwLock<Arc<Snapshot>>>;

/// The daemon's own health, updated by the pipeline as it happens (not per snapshot).
#[derive(Debug, Default)]
pub struct Health {
    /// Commits refused by the state database (disk full, read-only, I/O errors).
    pub state_write_failures: std::sync::atomic::AtomicU64,
    /// History points that could not be written (skipped; the history is for people and never
    /// holds up ingest).
    pub history_write_failures: std::sync::atomic::AtomicU64,
    /// 1 while the last commit attempt failed, 0 once commits succeed again.
    pub state_unwritable: std::sync::atomic::AtomicBool,
    /// The HTTP listener's connection counts.
    pub listener: Arc<super::server::ListenerStats>,
    /// The container's memory limit, when known (config or cgroup).
    pub memory_limit_bytes: Option<u64>,
}

/// Metric names (without the `_total` the encoder adds to counters), for tests and docs.
pub mod names {
    pub const UPPER: &str = "riskbound_risk_upper_bound";
    pub const LOWER: &str = "riskbound_risk_lower_bound";
    pub const OBSERVED: &str = "riskbound_risk_observed";
    pub const SAMPLES: &str = "riskbound_window_samples";
    pub const SAMPLES_USED: &str = "riskbound_window_samples_used";
    pub const TOTAL_LOSS: &str = "riskbound_window_total_loss";
    pub const TOTAL_SQUARED_LOSS: &str = "riskbound_window_total_squared_loss";
    pub const COHORT_TOTAL_LOSS: &str = "riskbound_window_cohort_total_loss";
    pub const COHORT_TOTAL_SQUARED_LOSS: &str = "riskbound_window_cohort_total_squared_loss";
    pub const LOSS_MAX: &str = "riskbound_loss_max";
    pub const CONFIDENCE: &str = "riskbound_bound_confidence_ratio";
    pub const SLA_MAX: &str = "riskbound_sla_max_risk";
    pub const SLA_STATE: &str = "riskbound_sla_state";
    pub const ROWS: &str = "riskbound_rows_ingested";
    pub const REJECTED: &str = "riskbound_rows_rejected";
    pub const FILES: &str = "riskbound_files_ingested";
    pub const AWAITING: &str = "riskbound_predictions_awaiting_label";
    pub const EXPIRED: &str = "riskbound_predictions_expired";
    pub const ORPHANED: &str = "riskbound_labels_orphaned";
    pub const LABELLED: &str = "riskbound_samples_labelled";
    pub const COVERAGE: &str = "riskbound_label_coverage_ratio";
    pub const DELAY: &str = "riskbound_label_delay_seconds";
    pub const LAST_INGEST: &str = "riskbound_last_ingest_timestamp_seconds";
    pub const BUILD_INFO: &str = "riskbound_build_info";
    pub const WRITE_FAILURES: &str = "riskbound_state_write_failures";
    pub const HISTORY_FAILURES: &str = "riskbound_history_write_failures";
    pub const UNWRITABLE: &str = "riskbound_state_unwritable";
    pub const SHIFT_P: &str = "riskbound_input_shift_p_value";
    pub const SHIFT_SHIFTED: &str = "riskbound_input_shift_shifted";
    pub const SHIFT_MMD2: &str = "riskbound_input_shift_mmd2";
    pub const SHIFT_BANDWIDTH: &str = "riskbound_input_shift_bandwidth";
    pub const SHIFT_POINTS: &str = "riskbound_input_shift_points";
    pub const SHIFT_EIGENVALUES: &str = "riskbound_input_shift_eigenvalues";
    pub const SHIFT_KS_P: &str = "riskbound_input_shift_ks_p_value";
    pub const SHIFT_INCONCLUSIVE: &str = "riskbound_input_shift_inconclusive";
    pub const SHIFT_LOOK_TIME: &str = "riskbound_input_shift_look_timestamp_seconds";
    pub const SHIFT_CONFIDENCE: &str = "riskbound_input_shift_confidence_ratio";
    pub const SHIFT_ALARM_PAIRS: &str = "riskbound_input_shift_alarm_pairs";
    pub const SHIFT_ALARM_POOL_LEFT: &str = "riskbound_input_shift_alarm_pool_left";
    pub const SHIFT_ALARM_UNPAIRED: &str = "riskbound_input_shift_alarm_unpaired";
    pub const ALARM_EVIDENCE: &str = "riskbound_alarm_log_evidence";
    pub const ALARM_THRESHOLD: &str = "riskbound_alarm_log_threshold";
    pub const ALARM_FIRING: &str = "riskbound_alarm_firing";
    pub const ALARM_MAX_RISK: &str = "riskbound_alarm_max_risk";
    pub const RESET_TIME: &str = "riskbound_anytime_reset_timestamp_seconds";
    pub const RESETS: &str = "riskbound_anytime_resets";
    pub const SLICE_LOWER: &str = "riskbound_slice_risk_lower_bound";
    pub const SLICE_UPPER: &str = "riskbound_slice_risk_upper_bound";
    pub const SLICE_INFO: &str = "riskbound_slice_info";
    pub const SLICE_VIOLATIONS: &str = "riskbound_slice_violations";
    pub const SLICE_DEVIATION: &str = "riskbound_slice_uniform_deviation";
    pub const REGISTERED_LOWER: &str = "riskbound_registered_slice_risk_lower_bound";
    pub const REGISTERED_UPPER: &str = "riskbound_registered_slice_risk_upper_bound";
    pub const COHORT: &str = "riskbound_window_cohort_predictions";
    pub const COHORT_UNLABELLED: &str = "riskbound_window_cohort_unlabelled";
    pub const DELAY_MEDIAN_BY_OUTCOME: &str = "riskbound_label_delay_median_by_outcome_seconds";
    pub const DELAY_P90_BY_OUTCOME: &str = "riskbound_label_delay_p90_by_outcome_seconds";
    pub const DELAY_OUTCOME_SAMPLES: &str = "riskbound_label_delay_outcome_samples";
    pub const DELAY_OUTCOME_P: &str = "riskbound_label_delay_outcome_p_value";
    pub const DELAY_OUTCOME_DEPENDENT: &str = "riskbound_label_delay_outcome_dependent";
    pub const HTTP_OPEN: &str = "riskbound_http_connections_open";
    pub const HTTP_ACCEPTED: &str = "riskbound_http_connections_accepted";
    pub const HTTP_REJECTED: &str = "riskbound_http_connections_rejected";
    pub const HTTP_EVICTED: &str = "riskbound_http_connections_evicted";
    pub const HTTP_TIMED_OUT: &str = "riskbound_http_connections_timed_out";
    pub const HTTP_MAX: &str = "riskbound_http_connections_max";
    pub const MEMORY_LIMIT: &str = "riskbound_memory_limit_bytes";
    // The fleet view's series (export/fleet.rs): replicas pooled through Prometheus.
    pub const FLEET_UPPER: &str = "riskbound_fleet_risk_upper_bound";
    pub const FLEET_LOWER: &str = "riskbound_fleet_risk_lower_bound";
    pub const FLEET_SAMPLES: &str = "riskbound_fleet_window_samples";
    pub const FLEET_TOTAL_LOSS: &str = "riskbound_fleet_window_total_loss";
    pub const FLEET_WINDOW_REPLICAS: &str = "riskbound_fleet_window_replicas";
    pub const FLEET_COHORT: &str = "riskbound_fleet_window_cohort_predictions";
    pub const FLEET_COHORT_UNLABELLED: &str = "riskbound_fleet_window_cohort_unlabelled";
    pub const FLEET_SLA_STATE: &str = "riskbound_fleet_sla_state";
    pub const FLEET_COVERAGE: &str = "riskbound_fleet_label_coverage_ratio";
    pub const FLEET_CONFIDENCE: &str = "riskbound_fleet_bound_confidence_ratio";
    pub const FLEET_ALARM_EVIDENCE: &str = "riskbound_fleet_alarm_log_evidence";
    pub const FLEET_ALARM_THRESHOLD: &str = "riskbound_fleet_alarm_log_threshold";
    pub const FLEET_ALARM_FIRING: &str = "riskbound_fleet_alarm_firing";
    pub const FLEET_ALARM_REPLICAS: &str = "riskbound_fleet_alarm_replicas";
    pub const FLEET_REPLICAS_SEEN: &str = "riskbound_fleet_replicas_seen";
    pub const FLEET_LEFT_OUT: &str = "riskbound_fleet_replicas_left_out";
    pub const FLEET_STALE: &str = "riskbound_fleet_stale";
    pub const FLEET_LAST_SUCCESS: &str = "riskbound_fleet_last_success_timestamp_seconds";
    pub const FLEET_FAILURES: &str = "riskbound_fleet_query_failures";
    pub const FLEET_BUILD_INFO: &str = "riskbound_fleet_build_info";
    // The process metrics of the Prometheus client conventions, under their standard names.
    pub const PROCESS_CPU: &str = "process_cpu_seconds";
    pub const PROCESS_RSS: &str = "process_resident_memory_bytes";
    pub const PROCESS_VIRTUAL: &str = "process_virtual_memory_bytes";
    pub const PROCESS_OPEN_FDS: &str = "process_open_fds";
    pub const PROCESS_MAX_FDS: &str = "process_max_fds";
    pub const PROCESS_START: &str = "process_start_time_seconds";
}

/// The `guarantee` label value of the delay-robust window bounds (with δ spending, the spent
/// variant): true whatever the label delays depend on.
pub fn delay_robust_guarantee(g: crate::config::WindowGuarantee) -> &'static str {
    match g {
        crate::config::WindowGuarantee::PerWindow => "delay-robust",
        crate::config::WindowGuarantee::Spent => "delay-robust-spent",
    }
}

/// The `guarantee` label value of the anytime sequences: valid at every label at once.
pub const ANYTIME: &str = "anytime";

pub(super) type Labels = Vec<(&'static str, String)>;

#[derive(Debug)]
struct SnapshotCollector {
    snapshot: SharedSnapshot,
    health: Arc<Health>,
    max_connections: usize,
}

pub(super) fn family<M: EncodeMetric>(
    enc: &mut DescriptorEncoder,
    name: &str,
    help: &str,
    kind: MetricType,
    series: impl IntoIterator<Item = (Labels, M)>,
) -> Result<(), std::fmt::Error> {
    let mut m = enc.encode_descriptor(name, help, None, kind)?;
    for (labels, value) in series {
        value.encode(m.encode_family(&labels)?)?;
    }
    Ok(())
}

pub(super) fn gauges(
    enc: &mut DescriptorEncoder,
    name: &str,
    help: &str,
    series: impl IntoIterator<Item = (Labels, f64)>,
) -> Result<(), std::fmt::Error> {
    family(enc, name, help, MetricType::Gauge, series.into_iter().map(|(l, v)| (l, ConstGauge::new(v))))
}

pub(super) fn counters(
    enc: &mut DescriptorEncoder,
    name: &str,
    help: &str,
    series: impl IntoIterator<Item = (Labels, u64)>,
) -> Result<(), std::fmt::Error> {
    family(enc, name, help, MetricType::Counter, series.into_iter().map(|(l, v)| (l, ConstCounter::new(v))))
}

/// The model label alone.
pub(super) fn model(m: &str) -> Labels {
    vec![("model", m.to_string())]
}

/// The (model, window) labels most series carry.
pub(super) fn mw(m: &str, w: &str) -> Labels {
    vec![("model", m.to_string()), ("window", w.to_string())]
}

/// The bounds per window, method and guarantee, and each window's sample and cohort counts.
fn encode_bounds(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let per_method = |upper: bool| {
        let mut v = Vec::new();
        let pick = |b: &crate::estimate::Bounds| if upper { b.upper } else { b.lower };
        for m in &snap.models {
            for w in &m.windows {
                for (method, b) in &w.bounds {
                    let mut l = mw(&m.name, &w.name);
                    l.push(("method", method.name().to_string()));
                    l.push(("guarantee", m.window_guarantee.as_str().to_string()));
                    v.push((l, pick(b)));
                }
                for (method, b) in w.cohort.iter().flat_map(|c| &c.bounds) {
                    let mut l = mw(&m.name, &w.name);
                    l.push(("method", method.name().to_string()));
                    l.push(("guarantee", delay_robust_guarantee(m.window_guarantee).to_string()));
                    v.push((l, pick(b)));
                }
            }
            for (seq, b) in &m.anytime.bounds {
                let mut l = mw(&m.name, SINCE_RESET);
                l.push(("method", seq.name().to_string()));
                l.push(("guarantee", ANYTIME.to_string()));
                v.push((l, pick(b)));
            }
        }
        v
    };
    gauges(e, names::UPPER, "Upper confidence bound on the true risk. guarantee=\"per-window\": on the window's labelled samples, each published value on its own holds with probability at least the bound confidence if which labels have come does not depend on the outcomes; \"spent\": all published values together do; \"delay-robust\" (\"delay-robust-spent\"): on the window's cohort of every prediction, a missing label counted at the loss maximum, true whatever the label delays depend on; \"anytime\" (window=\"since-reset\"): the bound holds at every prediction since the reset at once, predictions taken in prediction-time order once their label_wait is over, a missing label at the loss maximum, assuming a constant risk", per_method(true))?;
    gauges(e, names::LOWER, "Lower confidence bound on the true risk; guarantee as for the upper bound (delay-robust and anytime: a missing label counted as loss 0). An anytime lower bound stays below the highest risk seen since the reset even when the risk drifts", per_method(false))?;
    let per_window = |f: &dyn Fn(&crate::window::WindowSnapshot) -> f64,
                      anytime: &dyn Fn(&crate::window::AnytimeSnapshot) -> f64| {
        snap.models
            .iter()
            .flat_map(|m| {
                m.windows
                    .iter()
                    .map(move |w| (mw(&m.name, &w.name), f(w)))
                    .chain(std::iter::once((mw(&m.name, SINCE_RESET), anytime(&m.anytime))))
            })
            .collect::<Vec<_>>()
    };
    gauges(
        e,
        names::OBSERVED,
        "Mean loss of the window's labelled samples (a point estimate, not a bound)",
        per_window(&|w| w.mean, &|a| a.mean),
    )?;
    gauges(e, names::SAMPLES, "Labelled samples in the window", per_window(&|w| w.n as f64, &|a| a.labelled as f64))?;
    gauges(
        e,
        names::TOTAL_LOSS,
        "Sum of the window's losses (for 0-1 loss, its error count): checks against counts kept elsewhere",
        per_window(&|w| w.loss_sum, &|a| a.loss_sum),
    )?;
    let cohort_of = |f: &dyn Fn(&crate::window::CohortSnapshot) -> u64| {
        snap.models
            .iter()
            .flat_map(|m| {
                m.windows
                    .iter()
                    .filter_map(move |w| w.cohort.as_ref().map(|c| (mw(&m.name, &w.name), f(c) as f64)))
                    .chain(std::iter::once((mw(&m.name, SINCE_RESET), m.anytime.n as f64)))
            })
            .collect::<Vec<_>>()
    };
    gauges(
        e,
        names::TOTAL_SQUARED_LOSS,
        "Sum of the squares of the window's losses: with the sample count and total loss, what pools the empirical-bernstein bound across replicas",
        snap.models.iter().flat_map(|m| m.windows.iter().map(move |w| (mw(&m.name, &w.name), w.loss_squares))),
    )?;
    let cohorts = || {
        snap.models
            .iter()
            .flat_map(|m| m.windows.iter().filter_map(move |w| w.cohort.as_ref().map(|c| (mw(&m.name, &w.name), c))))
    };
    gauges(
        e,
        names::COHORT_TOTAL_LOSS,
        "Sum of the losses of the window's cohort predictions that have a label (the delay-robust bounds' known part)",
        cohorts().map(|(l, c)| (l, c.known_sum)),
    )?;
    gauges(
        e,
        names::COHORT_TOTAL_SQUARED_LOSS,
        "Sum of the squares of the losses of the window's cohort predictions that have a label",
        cohorts().map(|(l, c)| (l, c.known_squares)),
    )?;
    gauges(
        e,
        names::LOSS_MAX,
        "The model's loss maximum B (every loss lies in [0, B]), by loss name",
        snap.models.iter().map(|m| (vec![("model", m.name.clone()), ("loss", m.loss_name.to_string())], m.loss_max)),
    )?;
    gauges(
            e,
            names::COHORT,
            "Predictions in the window's cohort: every prediction of its prediction-time range, labelled or not (since-reset: predictions whose label_wait is over)",
            cohort_of(&|c| c.predictions),
        )?;
    gauges(
            e,
            names::COHORT_UNLABELLED,
            "Predictions of the window's cohort without a label (still waiting, or expired): the delay-robust bounds count each at 0 (lower) and at the loss maximum (upper)",
            snap.models.iter().flat_map(|m| {
                m.windows
                    .iter()
                    .filter_map(move |w| w.cohort.as_ref().map(|c| (mw(&m.name, &w.name), c.unlabelled as f64)))
                    .chain(std::iter::once((mw(&m.name, SINCE_RESET), (m.anytime.n - m.anytime.labelled) as f64)))
            }),
        )?;
    encode_samples_used(snap, e)
}

/// The samples each method read per window: all of them, or the subsample.
fn encode_samples_used(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let mut used = Vec::new();
    for m in &snap.models {
        for w in &m.windows {
            let guarantee = m.window_guarantee.as_str();
            let cohort = w.cohort.iter().flat_map(|c| c.used.iter().map(|(k, n)| (k.name(), *n)));
            let per = w.used.iter().map(|(k, n)| (k.name(), *n, guarantee));
            let per = per.chain(cohort.map(|(k, n)| (k, n, delay_robust_guarantee(m.window_guarantee))));
            let slices = w.slice_samples.map(|n| ("slice-search", n, guarantee));
            for (method, n, g) in per.chain(slices) {
                let mut l = mw(&m.name, &w.name);
                l.push(("method", method.to_string()));
                l.push(("guarantee", g.to_string()));
                used.push((l, n as f64));
            }
        }
    }
    gauges(
        e,
        names::SAMPLES_USED,
        "Samples each method read: every labelled sample (every prediction, delay-robust) for the methods that need only their sums; for betting and the slice search a seeded uniform subsample of at most max_samples, chosen by request id alone",
        used,
    )?;
    Ok(())
}

/// The label delays by outcome and the test of their dependence on it.
fn encode_delays(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let (mut median, mut samples, mut p_value, mut dependent, mut p90) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for m in &snap.models {
        let d = &m.delay_dependence;
        for g in &d.groups {
            let mo = vec![("model", m.name.clone()), ("outcome", g.outcome.to_string())];
            samples.push((mo.clone(), g.n as f64));
            if let Some(v) = g.median_s {
                median.push((mo.clone(), v));
            }
            if let Some(v) = g.p90_s {
                p90.push((mo.clone(), v));
            }
        }
        if let Some(p) = d.p_value {
            p_value.push((vec![("model", m.name.clone())], p));
        }
        dependent.push((vec![("model", m.name.clone())], f64::from(u8::from(d.dependent))));
    }
    gauges(e, names::DELAY_MEDIAN_BY_OUTCOME, "Median label delay of the newest labelled samples by outcome (0-1 loss: error, correct; other losses: above_median, at_or_below_median)", median)?;
    gauges(
        e,
        names::DELAY_P90_BY_OUTCOME,
        "90th percentile of the label delay of the newest labelled samples by outcome",
        p90,
    )?;
    gauges(e, names::DELAY_OUTCOME_SAMPLES, "Labelled samples behind each outcome's delay quantiles", samples)?;
    gauges(e, names::DELAY_OUTCOME_P, "p-value of the two-sample Kolmogorov-Smirnov test that label delays do not depend on the outcome (a per-look test; absent while an outcome has no labelled sample)", p_value)?;
    gauges(e, names::DELAY_OUTCOME_DEPENDENT, "1 when the delay test rejects at level 1 - confidence: label delays depend on outcomes, so the labelled-only bounds (guarantee per-window or spent) may be far too optimistic; the delay-robust bounds and anytime alarms still hold", dependent)?;
    Ok(())
}

/// Confidences, the anytime alarms and their reset point.
fn encode_alarms(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let mg = |m: &str, g: &str| -> Labels { vec![("model", m.to_string()), ("guarantee", g.to_string())] };
    gauges(
            e,
            names::CONFIDENCE,
            "Confidence of each one-sided bound of the model, by guarantee (with δ spending, the level of the latest evaluation)",
            snap.models.iter().flat_map(|m| {
                [(mg(&m.name, m.window_guarantee.as_str()), m.window_confidence), (mg(&m.name, ANYTIME), m.confidence)]
            }),
        )?;
    let (mut evidence, mut threshold, mut firing, mut max_risk) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for m in &snap.models {
        for a in &m.anytime.alarms {
            let l = vec![("model", m.name.clone()), ("test", a.test.as_str().to_string())];
            evidence.push((l.clone(), a.log_evidence));
            threshold.push((l.clone(), a.log_threshold));
            firing.push((l.clone(), f64::from(u8::from(a.fired_at.is_some()))));
            max_risk.push((l, a.max_risk));
        }
        if let Some(a) = m.input_shift.as_ref().and_then(|s| s.alarm.as_ref()) {
            let l = vec![("model", m.name.clone()), ("test", super::input_shift::TEST.to_string())];
            evidence.push((l.clone(), a.log_evidence));
            threshold.push((l.clone(), a.log_threshold));
            firing.push((l, f64::from(u8::from(a.fired_at.is_some()))));
        }
    }
    gauges(e, names::ALARM_EVIDENCE, "Natural log of the alarm's evidence since the reset: the e-value of \"risk <= max_risk at all times\" (test=exceeded, shift) or the change detector's statistic (test=change)", evidence)?;
    gauges(e, names::ALARM_THRESHOLD, "The log evidence at which the alarm fires: ln(1/δ) (exceeded, shift: P(ever a false alarm) <= δ) or ln A (change: P(a false alarm in the first change_horizon labels) <= δ)", threshold)?;
    gauges(e, names::ALARM_FIRING, "1 once the alarm's evidence reached its threshold since the reset (it stays 1 until riskbound reset), else 0. Trust it only while label coverage is at or above the SLA's min_label_coverage", firing)?;
    gauges(e, names::ALARM_MAX_RISK, "The risk level the alarm tests: the SLA max_risk (exceeded, change) or the reference's upper bound plus tolerance (shift)", max_risk)?;
    gauges(
        e,
        names::RESET_TIME,
        "Unix time of the anytime sequences' reset point (the first sample, or the last riskbound reset)",
        snap.models.iter().filter_map(|m| m.anytime.reset_ms.map(|t| (model(&m.name), t as f64 / 1000.0))),
    )?;
    Ok(())
}

/// The certified slices of each window, found and registered.
fn encode_slices(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let (mut s_lower, mut s_upper, mut s_info, mut s_viol, mut s_dev, mut r_lower, mut r_upper) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for m in &snap.models {
        for w in &m.windows {
            let Some(sn) = &w.slices else { continue };
            for (rank, line) in sn.top.iter().enumerate() {
                let mut l = mw(&m.name, &w.name);
                l.push(("rank", (rank + 1).to_string()));
                s_lower.push((l.clone(), line.lower));
                s_upper.push((l.clone(), line.upper));
                l.push(("slice", line.description.clone()));
                l.push(("kind", line.kind.to_string()));
                l.push(("certified_by", line.certified_by.to_string()));
                s_info.push((l, 1.0));
            }
            s_viol.push((mw(&m.name, &w.name), sn.violations as f64));
            s_dev.push((mw(&m.name, &w.name), sn.uniform_deviation));
            for line in &sn.registered {
                let mut l = mw(&m.name, &w.name);
                l.push(("slice", line.description.clone()));
                r_lower.push((l.clone(), line.lower));
                r_upper.push((l, line.upper));
            }
        }
    }
    gauges(e, names::SLICE_LOWER, "Certified lower bound on the true risk of the window's rank-th worst slice (riskbound_slice_info names it); valid for how the slice was found (split-confirm or uniform over the whole slice class)", s_lower)?;
    gauges(e, names::SLICE_UPPER, "Certified upper bound on the true risk of the window's rank-th worst slice (1 = uninformative, for the uniform certificate)", s_upper)?;
    gauges(e, names::SLICE_INFO, "1 for each exported slice: its description, kind and certificate", s_info)?;
    gauges(
        e,
        names::SLICE_VIOLATIONS,
        "Slices of the window (found or registered) whose certified lower bound is above the SLA's max_risk",
        s_viol,
    )?;
    gauges(e, names::SLICE_DEVIATION, "ε of the uniform (Rademacher) certificate over the window's slice class: every slice's excess P((l - max_risk) 1_S) is at least its window value minus this", s_dev)?;
    gauges(
        e,
        names::REGISTERED_LOWER,
        "Lower bound on the true risk of a slice registered in the config (fixed in advance: bound at δ/M each)",
        r_lower,
    )?;
    gauges(e, names::REGISTERED_UPPER, "Upper bound on the true risk of a registered slice (δ/M each)", r_upper)?;
    counters(
        e,
        names::RESETS,
        "Restarts of the anytime sequences and alarms (riskbound reset, or changed settings)",
        snap.models.iter().map(|m| (model(&m.name), m.anytime.resets)),
    )?;
    gauges(
        e,
        names::SLA_MAX,
        "The model's SLA: the largest acceptable true risk",
        snap.models.iter().filter_map(|m| m.sla.as_ref().map(|s| (model(&m.name), s.max_risk))),
    )?;
    Ok(())
}

/// SLA states and the ingest counters: rows, rejects, files, joins, expiry, coverage, delays.
fn encode_ingest(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let mut states = Vec::new();
    for m in &snap.models {
        for w in &m.windows {
            if let Some((state, _)) = w.state {
                for s in SlaState::ALL {
                    let mut l = mw(&m.name, &w.name);
                    l.push(("state", s.as_str().to_string()));
                    states.push((l, f64::from(u8::from(s == state))));
                }
            }
        }
    }
    gauges(e, names::SLA_STATE, "1 for the window's current SLA state (ok: upper bound at or below max risk; violated: lower bound above it; inconclusive: neither, too few samples, or too few labels), 0 for the others", states)?;
    let kinds = [Kind::Prediction, Kind::Label];
    let mk = |m: &str, k: Kind| -> Labels { vec![("model", m.to_string()), ("kind", k.as_str().to_string())] };
    counters(
        e,
        names::ROWS,
        "Rows taken from batch files",
        snap.models.iter().flat_map(|m| kinds.map(|k| (mk(&m.name, k), m.counters.rows.get(&k).copied().unwrap_or(0)))),
    )?;
    let mut rejected = Vec::new();
    for m in &snap.models {
        for k in kinds {
            for r in RejectReason::ALL.into_iter().filter(|r| r.possible_for(k == Kind::Label)) {
                let mut l = mk(&m.name, k);
                l.push(("reason", r.as_str().to_string()));
                rejected.push((l, m.counters.rejected.get(&(k, r)).copied().unwrap_or(0)));
            }
        }
    }
    counters(e, names::REJECTED, "Rows rejected, by reason; the rest of each file is kept", rejected)?;
    counters(
        e,
        names::FILES,
        "Batch files taken (each content once, whatever its name)",
        snap.models
            .iter()
            .flat_map(|m| kinds.map(|k| (mk(&m.name, k), m.counters.files.get(&k).copied().unwrap_or(0)))),
    )?;
    gauges(
        e,
        names::AWAITING,
        "Predictions waiting for their label",
        snap.models.iter().map(|m| (model(&m.name), m.awaiting as f64)),
    )?;
    counters(
        e,
        names::EXPIRED,
        "Predictions dropped because no label came within label_wait",
        snap.models.iter().map(|m| (model(&m.name), m.counters.expired)),
    )?;
    counters(
        e,
        names::ORPHANED,
        "Labels dropped because no prediction came within label_wait",
        snap.models.iter().map(|m| (model(&m.name), m.counters.orphaned)),
    )?;
    counters(
        e,
        names::LABELLED,
        "Predictions joined with their label",
        snap.models.iter().map(|m| (model(&m.name), m.counters.joined)),
    )?;
    gauges(
        e,
        names::COVERAGE,
        "Fraction of predictions whose wait is over that got a label (labelled / (labelled + expired))",
        snap.models.iter().filter_map(|m| m.label_coverage.map(|c| (model(&m.name), c))),
    )?;
    {
        let mut h = e.encode_descriptor(
            names::DELAY,
            "Time from prediction to label, by event time",
            None,
            MetricType::Histogram,
        )?;
        for m in &snap.models {
            let mut buckets: Vec<(f64, u64)> =
                DELAY_BUCKETS.iter().copied().zip(m.counters.delay_buckets.iter().copied()).collect();
            buckets.push((f64::INFINITY, m.counters.delay_buckets.last().copied().unwrap_or(0)));
            let labels = model(&m.name);
            h.encode_family(&labels)?.encode_histogram::<Labels>(
                m.counters.delay_sum_seconds,
                m.counters.delay_count,
                &buckets,
                None,
            )?;
        }
    }
    gauges(
        e,
        names::LAST_INGEST,
        "Unix time of the model's last committed batch file",
        snap.models.iter().filter_map(|m| m.last_commit_ms.map(|t| (model(&m.name), t as f64 / 1000.0))),
    )?;
    Ok(())
}

impl Collector for SnapshotCollector {
    fn encode(&self, mut enc: DescriptorEncoder) -> Result<(), std::fmt::Error> {
        let snap = self.snapshot.read().map(|s| Arc::clone(&s)).unwrap_or_default();
        let e = &mut enc;
        encode_bounds(&snap, e)?;
        encode_delays(&snap, e)?;
        encode_alarms(&snap, e)?;
        super::input_shift::encode(&snap, e)?;
        encode_slices(&snap, e)?;
        encode_ingest(&snap, e)?;
        gauges(
            e,
            names::BUILD_INFO,
            "riskbound build",
            [(vec![("version", env!("CARGO_PKG_VERSION").to_string())], 1.0)],
        )?;
        use std::sync::atomic::Ordering::SeqCst;
        counters(
            e,
            names::WRITE_FAILURES,
            "Batch-file commits the state database refused (disk full, read-only, I/O error); each is retried",
            [(Labels::new(), self.health.state_write_failures.load(SeqCst))],
        )?;
        counters(
            e,
            names::HISTORY_FAILURES,
            "Evaluation-history points that could not be written and were skipped (the status page and report miss them; ingest goes on)",
            [(Labels::new(), self.health.history_write_failures.load(SeqCst))],
        )?;
        gauges(
            e,
            names::UNWRITABLE,
            "1 while the state database refuses commits (ingest waits and the committed state is served; readiness is not affected), else 0",
            [(Labels::new(), f64::from(u8::from(self.health.state_unwritable.load(SeqCst))))],
        )?;
        self.encode_footprint(e)
    }
}

impl SnapshotCollector {
    /// The listener's connection counts, the process's resources and the memory limit.
    fn encode_footprint(&self, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
        use std::sync::atomic::Ordering::Relaxed;
        let l = &self.health.listener;
        let one = |v: f64| [(Labels::new(), v)];
        gauges(e, names::HTTP_OPEN, "HTTP connections open now", one(l.open.load(Relaxed) as f64))?;
        gauges(
            e,
            names::HTTP_MAX,
            "HTTP connections allowed at once (max_connections)",
            one(self.max_connections as f64),
        )?;
        for (name, help, v) in [
            (names::HTTP_ACCEPTED, "HTTP connections accepted", &l.accepted),
            (names::HTTP_REJECTED, "HTTP connections refused because every slot was serving a request", &l.rejected),
            (
                names::HTTP_EVICTED,
                "HTTP connections closed, while not serving a request, to admit a newer one",
                &l.evicted,
            ),
            (
                names::HTTP_TIMED_OUT,
                "HTTP connections closed at a deadline (handshake, headers, keep-alive idle, lifetime)",
                &l.timed_out,
            ),
        ] {
            counters(e, name, help, [(Labels::new(), v.load(Relaxed))])?;
        }
        if let Some(limit) = self.health.memory_limit_bytes {
            gauges(
                e,
                names::MEMORY_LIMIT,
                "Memory limit of riskbound's container (config memory_limit, else its cgroup)",
                one(limit as f64),
            )?;
        }
        encode_process(e)
    }
}

/// The process metrics, under the Prometheus client conventions' standard names.
pub(super) fn encode_process(e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let one = |v: f64| [(Labels::new(), v)];
    let Some(p) = super::process::read() else { return Ok(()) };
    let mut cpu = e.encode_descriptor(
        names::PROCESS_CPU,
        "Total user and system CPU time spent in seconds.",
        None,
        MetricType::Counter,
    )?;
    prometheus_client::metrics::counter::ConstCounter::new(p.cpu_seconds).encode(cpu.encode_family(&Labels::new())?)?;
    gauges(e, names::PROCESS_RSS, "Resident memory size in bytes.", one(p.resident_bytes))?;
    gauges(e, names::PROCESS_VIRTUAL, "Virtual memory size in bytes.", one(p.virtual_bytes))?;
    gauges(e, names::PROCESS_OPEN_FDS, "Number of open file descriptors.", one(p.open_fds))?;
    gauges(e, names::PROCESS_MAX_FDS, "Maximum number of open file descriptors.", one(p.max_fds))?;
    gauges(
        e,
        names::PROCESS_START,
        "Start time of the process since unix epoch in seconds.",
        one(p.start_time_seconds),
    )?;
    Ok(())
}

/// A registry whose every scrape encodes the current snapshot.
pub fn registry(snapshot: SharedSnapshot, health: Arc<Health>, max_connections: usize) -> Registry {
    let mut r = Registry::default();
    r.register_collector(Box::new(SnapshotCollector { snapshot, health, max_connections }));
    r
}

/// The Prometheus text exposition (version 0.0.4) of the registry.
pub fn render(registry: &Registry) -> String {
    let mut out = String::with_capacity(16 * 1024);
    prometheus_client::encoding::prometheus_text::encode(&mut out, registry).expect("writing to a String cannot fail");
    out
}

#[cfg(test)]
mod tests;
