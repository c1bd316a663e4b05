//! Pooling replicas: from the series every replica exported, as Prometheus returned them at one
//! query instant, to one set of bounds, one SLA state and one alarm per model and window for
//! the whole fleet. Pure: no I/O, so every rule here is tested on hand-made series.
//!
//! What pools, and why it is valid:
//! - A replica's window is a set of labelled samples, summarised by its count, sum of losses and
//!   sum of squared losses. The union of the replicas' windows is summarised by the sums of those,
//!   and Clopper–Pearson, Hoeffding, kl and empirical Bernstein are functions of exactly these:
//!   the pooled bound is the bound on the union, as if one replica had seen every sample. It
//!   holds under the window's own assumption, now for the union: the samples of every replica
//!   are i.i.d. draws of the same model's loss (a load balancer that spreads requests without
//!   regard to their outcome gives that).
//! - The delay-robust bounds pool the same way from each cohort's prediction count, unlabelled
//!   count and the sums of its known losses.
//! - Betting reads the losses in order, not their sums: it does not pool, and is left out.
//! - A window `last: N` pools as the union of each replica's newest N: R·N samples at most,
//!   not the fleet's newest N. A `span` window pools as the union of each replica's span.
//! - The fleet alarm is the mean of the replicas' `exceeded` e-values. At any single look a
//!   mean of e-values is an e-value whatever their dependence (Vovk & Wang, "E-values:
//!   calibration, combination and applications", Ann. Statist. 49, 2021), so P(mean ≥ 1/δ) ≤ δ
//!   at that look. As an alarm watched at every look, the mean must be a test supermartingale:
//!   that holds when the replicas' label streams are independent and the set of replicas does
//!   not change; a replica that joins, leaves or restarts with empty state changes the mean.
//!   The mean is never above the largest replica's e-value, so the fleet alarm never fires
//!   before some replica's own alarm; what it adds is one false-alarm probability δ for the
//!   whole fleet, where R separate alarms would allow up to R·δ.

use std::collections::{BTreeMap, BTreeSet};

use serde::Serialize;

use super::prom::Sample;
use crate::config::{Config, DecideOn, ModelConfig};
use crate::estimate::delay_robust::{Cohort, Grouped};
use crate::estimate::sla::{self, SlaReason, SlaState};
use crate::estimate::{Bounds, LossStats, LossSummary, Method};
use crate::export::registry::names;

/// A replica: the (job, instance) of its scrape target.
pub type Replica = (String, String);

/// Everything read from Prometheus for one round, at one query instant.
#[derive(Clone, Debug, Default)]
pub struct Observed {
    /// The query instant (unix seconds).
    pub time: f64,
    /// `up` of the scrape jobs riskbound's series come from.
    pub up: Vec<Sample>,
    /// The riskbound series the pooling reads ([`series_selector`]).
    pub series: Vec<Sample>,
    /// `timestamp(riskbound_build_info)`: when each replica was last scraped successfully.
    pub scraped: Vec<Sample>,
}

/// The metric names the pooling reads, as Prometheus stores them (counters with `_total`).
pub fn series_names() -> Vec<String> {
    let mut v: Vec<String> = [
        names::BUILD_INFO,
        names::LOSS_MAX,
        names::CONFIDENCE,
        names::SLA_MAX,
        names::SAMPLES,
        names::TOTAL_LOSS,
        names::TOTAL_SQUARED_LOSS,
        names::COHORT,
        names::COHORT_UNLABELLED,
        names::COHORT_TOTAL_LOSS,
        names::COHORT_TOTAL_SQUARED_LOSS,
        names::ALARM_EVIDENCE,
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    v.push(format!("{}_total", names::LABELLED));
    v.push(format!("{}_total", names::EXPIRED));
    v
}

/// A double-quoted string with `"`, `\` and newlines escaped: a PromQL string literal, and
/// equally a YAML double-quoted scalar (the rules file uses it too).
pub fn quoted(s: &str) -> String {
    let mut out = String::from("\"");
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// The three queries of a round: the riskbound series, their replicas' last successful scrape,
/// and `up` (of the given job, or of every job: the pooling keeps the jobs riskbound's series
/// come from).
pub fn queries(job: Option<&str>) -> [String; 3] {
    let (inner, braces) = match job {
        Some(j) => (format!(",job={}", quoted(j)), format!("{{job={}}}", quoted(j))),
        None => (String::new(), String::new()),
    };
    let series = format!("{{__name__=~{}{inner}}}", quoted(&series_names().join("|")));
    let scraped = format!("timestamp({}{braces})", names::BUILD_INFO);
    [series, scraped, format!("up{braces}")]
}

/// Why a replica sits out of a model's pool.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum LeftOut {
    /// Its last scrape failed (`up` is 0).
    Down,
    /// Its newest sample is older than the allowed age.
    Stale,
    /// It exports riskbound series but none for this model.
    ModelMissing,
    /// Its loss (name or maximum) is not the config's.
    LossMismatch,
    /// Its confidence is not the config's.
    ConfidenceMismatch,
    /// Its SLA max_risk is not the config's (or it has an SLA where the config has none).
    MaxRiskMismatch,
    /// It lacks a series this window needs (an older version, or a different window list).
    SeriesMissing,
}

impl LeftOut {
    pub const ALL: [LeftOut; 7] = [
        LeftOut::Down,
        LeftOut::Stale,
        LeftOut::ModelMissing,
        LeftOut::LossMismatch,
        LeftOut::ConfidenceMismatch,
        LeftOut::MaxRiskMismatch,
        LeftOut::SeriesMissing,
    ];
    /// The `reason` label value.
    pub fn as_str(self) -> &'static str {
        match self {
            LeftOut::Down => "down",
            LeftOut::Stale => "stale",
            LeftOut::ModelMissing => "model_missing",
            LeftOut::LossMismatch => "loss_mismatch",
            LeftOut::ConfidenceMismatch => "confidence_mismatch",
            LeftOut::MaxRiskMismatch => "max_risk_mismatch",
            LeftOut::SeriesMissing => "series_missing",
        }
    }
}

/// One pooled pair of bounds.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Pair {
    pub lower: f64,
    pub upper: f64,
}

/// The pooled delay-robust view of a window: the union of the replicas' cohorts.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PooledCohort {
    pub predictions: u64,
    pub unlabelled: u64,
    pub bounds: BTreeMap<&'static str, Pair>,
}

/// One model's window pooled over the replicas that qualify.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PooledWindow {
    pub model: String,
    pub window: String,
    pub confidence: f64,
    pub replicas: u64,
    /// Labelled samples in the union of the replicas' windows.
    pub n: u64,
    pub total_loss: f64,
    /// Per-look bounds on the union's labelled samples, each one-sided at the confidence.
    pub bounds: BTreeMap<&'static str, Pair>,
    pub delay_robust: Option<PooledCohort>,
    /// `None` when the model has no SLA.
    pub sla_state: Option<&'static str>,
    pub sla_reason: Option<&'static str>,
    /// The method whose bounds decided the state.
    pub decided_by: Option<&'static str>,
}

/// One model's fleet alarm.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PooledAlarm {
    pub model: String,
    pub test: &'static str,
    pub replicas: u64,
    /// ln of the mean of the replicas' e-values.
    pub log_evidence: f64,
    pub log_threshold: f64,
    /// The mean reached 1/δ at this look (or, served, at any look since the fleet view started).
    pub firing: bool,
}

/// A replica that sat out, and why.
#[derive(Clone, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub struct LeftOutReplica {
    pub job: String,
    pub instance: String,
    /// The model it sat out of ("" when it sat out of every model: down or stale).
    pub model: String,
    pub window: String,
    pub reason: LeftOut,
}

/// The fleet's numbers at one query instant.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct FleetReport {
    /// The models' common confidence (None when they differ: each window carries its own).
    pub confidence: Option<f64>,
    /// The query instant (unix seconds).
    pub time: f64,
    /// Replicas seen with riskbound series or in `up`.
    pub replicas_seen: u64,
    pub models: Vec<PooledWindow>,
    pub alarms: Vec<PooledAlarm>,
    pub label_coverage: BTreeMap<String, Option<f64>>,
    pub left_out: Vec<LeftOutReplica>,
}

/// The series of one replica, by (name, model, window) — the labels the pooling reads.
#[derive(Default)]
struct ReplicaSeries {
    values: BTreeMap<(String, String, String), f64>,
    /// Extra labels of riskbound_loss_max (the loss name) and of the confidence (guarantee).
    loss: BTreeMap<String, (String, f64)>,
    anytime_confidence: BTreeMap<String, f64>,
    evidence: BTreeMap<String, f64>,
    models: BTreeSet<String>,
}

impl ReplicaSeries {
    fn get(&self, name: &str, model: &str, window: &str) -> Option<f64> {
        self.values.get(&(name.to_string(), model.to_string(), window.to_string())).copied()
    }
}

fn replica_of(s: &Sample) -> Replica {
    (s.label("job").to_string(), s.label("instance").to_string())
}

fn group(series: &[Sample]) -> BTreeMap<Replica, ReplicaSeries> {
    let mut out: BTreeMap<Replica, ReplicaSeries> = BTreeMap::new();
    for s in series {
        let r = out.entry(replica_of(s)).or_default();
        let (name, model, window) = (s.label("__name__"), s.label("model"), s.label("window"));
        if !model.is_empty() {
            r.models.insert(model.to_string());
        }
        if name == names::LOSS_MAX {
            r.loss.insert(model.to_string(), (s.label("loss").to_string(), s.value));
        } else if name == names::CONFIDENCE {
            if s.label("guarantee") == crate::export::registry::ANYTIME {
                r.anytime_confidence.insert(model.to_string(), s.value);
            }
        } else if name == names::ALARM_EVIDENCE {
            if s.label("test") == "exceeded" {
                r.evidence.insert(model.to_string(), s.value);
            }
        } else {
            r.values.insert((name.to_string(), model.to_string(), window.to_string()), s.value);
        }
    }
    out
}

/// Relative agreement of two settings read back through the text format (which prints them
/// exactly, so anything beyond rounding is a different setting).
fn same(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-12 * a.abs().max(b.abs()).max(1.0)
}

/// Why a replica that is up and fresh sits out of `model`'s pool, if it does.
fn model_mismatch(r: &ReplicaSeries, model: &ModelConfig) -> Option<LeftOut> {
    if !r.models.contains(&model.name) {
        return Some(LeftOut::ModelMissing);
    }
    match r.loss.get(&model.name) {
        Some((name, max)) if name == model.loss.name() && same(*max, model.loss.max()) => {}
        Some(_) => return Some(LeftOut::LossMismatch),
        None => return Some(LeftOut::SeriesMissing),
    }
    match r.anytime_confidence.get(&model.name) {
        Some(c) if same(*c, model.confidence.level()) => {}
        Some(_) => return Some(LeftOut::ConfidenceMismatch),
        None => return Some(LeftOut::SeriesMissing),
    }
    let theirs = r.get(names::SLA_MAX, &model.name, "");
    match (theirs, &model.sla) {
        (None, None) => {}
        (Some(t), Some(s)) if same(t, s.max_risk) => {}
        _ => return Some(LeftOut::MaxRiskMismatch),
    }
    None
}

/// Sums of one window over the replicas that qualify.
#[derive(Default)]
struct Sums {
    replicas: u64,
    n: f64,
    loss: f64,
    squares: f64,
    cohort_predictions: f64,
    cohort_unlabelled: f64,
    cohort_loss: f64,
    cohort_squares: f64,
}

/// The exported totals went through f64 (relative rounding 2^-53 each) and were summed over
/// `replicas`: allow (replicas + 1)·2^-52 of B on the mean, and the matching slack on the
/// variance, so a pooled bound never claims more than the totals prove (zero-one losses are
/// exact integers and need none).
fn slack(replicas: u64) -> f64 {
    (replicas as f64 + 1.0) * f64::EPSILON
}

fn widen(b: Bounds, by: f64, loss_max: f64) -> Pair {
    Pair { lower: (b.lower - by * loss_max).max(0.0), upper: (b.upper + by * loss_max).min(loss_max) }
}

fn stats(n: f64, sum: f64, squares: f64, model: &ModelConfig, replicas: u64) -> LossStats {
    let b = model.loss.max();
    let binary = model.loss.is_binary();
    // Rounding of the totals can move the variance by a few slack(R) (scaled): add it, so the
    // variance-adaptive bound never uses less variance than the data has.
    let squares = if binary || n < 2.0 { squares } else { squares + 6.0 * slack(replicas) * (n - 1.0) * b * b };
    LossStats::from_totals(n.round() as u64, sum, squares, b, binary)
}

/// The pooled bounds by every method that pools, at the model's confidence.
fn pooled_bounds(s: &Sums, model: &ModelConfig) -> BTreeMap<&'static str, Pair> {
    let by = if model.loss.is_binary() { 0.0 } else { slack(s.replicas) };
    let summary = LossSummary::with_sample(model.loss.max(), stats(s.n, s.loss, s.squares, model, s.replicas), None);
    crate::window::summary_bounds(&summary, model, model.confidence)
        .into_iter()
        .map(|(m, b)| (m.name(), widen(b, by, model.loss.max())))
        .collect()
}

fn pooled_cohort(s: &Sums, model: &ModelConfig) -> Option<PooledCohort> {
    if s.cohort_predictions < 1.0 {
        return None;
    }
    let known = s.cohort_predictions - s.cohort_unlabelled;
    let stats = stats(known, s.cohort_loss, s.cohort_squares, model, s.replicas);
    let unlabelled = s.cohort_unlabelled.round() as u64;
    let cohort = Cohort::from_parts(model.loss.max(), stats, unlabelled, Grouped::default());
    let by = if model.loss.is_binary() { 0.0 } else { slack(s.replicas) };
    let bounds = crate::window::cohort_bounds(&cohort, model, model.confidence)
        .into_iter()
        .map(|(m, b)| (m.name(), widen(b, by, model.loss.max())))
        .collect();
    Some(PooledCohort { predictions: cohort.n(), unlabelled, bounds })
}

/// The method that decides the fleet's SLA state: the SLA's own, except betting (which does not
/// pool), for which empirical Bernstein, the variance-adaptive method that does, stands in.
pub fn deciding_method(method: Method) -> Method {
    if method == Method::Betting {
        Method::EmpiricalBernstein
    } else {
        method
    }
}

/// ln of the mean of exp(x) over xs (none: None).
fn log_mean_exp(xs: &[f64]) -> Option<f64> {
    let top = xs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if xs.is_empty() || top.is_nan() {
        return None;
    }
    if top == f64::NEG_INFINITY {
        return Some(top);
    }
    let s: f64 = xs.iter().map(|x| (x - top).exp()).sum();
    Some(top + s.ln() - (xs.len() as f64).ln())
}

/// Pools what Prometheus returned. `max_age` is the oldest a replica's last scrape may be
/// (seconds); `latched` holds the models whose fleet alarm fired at an earlier look.
pub fn pool(config: &Config, seen: &Observed, max_age: f64, latched: &BTreeSet<String>) -> FleetReport {
    let by_replica = group(&seen.series);
    let jobs: BTreeSet<&str> = by_replica.keys().map(|(j, _)| j.as_str()).collect();
    let mut everyone: BTreeSet<Replica> = by_replica.keys().cloned().collect();
    let mut out_of_all: BTreeMap<Replica, LeftOut> = BTreeMap::new();
    for u in &seen.up {
        let r = replica_of(u);
        if !jobs.contains(r.0.as_str()) && !by_replica.contains_key(&r) {
            continue; // another job's target: not a replica of riskbound
        }
        everyone.insert(r.clone());
        if u.value == 0.0 {
            out_of_all.insert(r, LeftOut::Down);
        }
    }
    for s in &seen.scraped {
        let r = replica_of(s);
        if seen.time - s.value > max_age {
            out_of_all.entry(r).or_insert(LeftOut::Stale);
        }
    }
    let mut left_out = Vec::new();
    for (r, why) in &out_of_all {
        left_out.push(LeftOutReplica {
            job: r.0.clone(),
            instance: r.1.clone(),
            model: String::new(),
            window: String::new(),
            reason: *why,
        });
    }
    let mut models = Vec::new();
    let mut alarms = Vec::new();
    let mut coverage = BTreeMap::new();
    for model in &config.models {
        let mut members: Vec<(&Replica, &ReplicaSeries)> = Vec::new();
        for (r, series) in &by_replica {
            if out_of_all.contains_key(r) {
                continue;
            }
            if let Some(why) = model_mismatch(series, model) {
                left_out.push(LeftOutReplica {
                    job: r.0.clone(),
                    instance: r.1.clone(),
                    model: model.name.clone(),
                    window: String::new(),
                    reason: why,
                });
                continue;
            }
            members.push((r, series));
        }
        // Label coverage pooled: labelled / (labelled + expired) over the members.
        let (joined, expired): (f64, f64) = members.iter().fold((0.0, 0.0), |(j, e), (_, s)| {
            let get = |n: &str| s.get(&format!("{n}_total"), &model.name, "").unwrap_or(0.0);
            (j + get(names::LABELLED), e + get(names::EXPIRED))
        });
        let label_coverage = (joined + expired > 0.0).then(|| joined / (joined + expired));
        coverage.insert(model.name.clone(), label_coverage);
        for w in &model.windows {
            let mut sums = Sums::default();
            for (r, s) in &members {
                let get = |n: &str| s.get(n, &model.name, &w.name);
                let (Some(n), Some(loss), Some(squares)) =
                    (get(names::SAMPLES), get(names::TOTAL_LOSS), get(names::TOTAL_SQUARED_LOSS))
                else {
                    left_out.push(LeftOutReplica {
                        job: r.0.clone(),
                        instance: r.1.clone(),
                        model: model.name.clone(),
                        window: w.name.clone(),
                        reason: LeftOut::SeriesMissing,
                    });
                    continue;
                };
                sums.replicas += 1;
                sums.n += n;
                sums.loss += loss;
                sums.squares += squares;
                // A replica with no prediction in the window yet has no cohort series.
                let cohort = (
                    get(names::COHORT),
                    get(names::COHORT_UNLABELLED),
                    get(names::COHORT_TOTAL_LOSS),
                    get(names::COHORT_TOTAL_SQUARED_LOSS),
                );
                if let (Some(p), Some(u), Some(l), Some(q)) = cohort {
                    sums.cohort_predictions += p;
                    sums.cohort_unlabelled += u;
                    sums.cohort_loss += l;
                    sums.cohort_squares += q;
                }
            }
            let bounds = if sums.n >= 1.0 { pooled_bounds(&sums, model) } else { BTreeMap::new() };
            let delay_robust = pooled_cohort(&sums, model);
            let (mut state, mut reason, mut decided_by) = (None, None, None);
            if let Some(s) = &model.sla {
                let method = deciding_method(s.method);
                let deciding = match s.decide_on {
                    DecideOn::LabelledOnly => Some(&bounds),
                    DecideOn::DelayRobust => delay_robust.as_ref().map(|c| &c.bounds),
                };
                let (st, why) = match deciding.and_then(|b| b.get(method.name())) {
                    Some(p) => sla::decide(
                        Bounds { lower: p.lower, upper: p.upper },
                        sums.n.round() as u64,
                        s.max_risk,
                        s.min_samples,
                        label_coverage,
                        s.min_label_coverage,
                    ),
                    None => (SlaState::Inconclusive, SlaReason::TooFewSamples),
                };
                state = Some(st.as_str());
                reason = Some(why.describe());
                decided_by = Some(method.name());
            }
            models.push(PooledWindow {
                model: model.name.clone(),
                window: w.name.clone(),
                confidence: model.confidence.level(),
                replicas: sums.replicas,
                n: sums.n.round() as u64,
                total_loss: sums.loss,
                bounds,
                delay_robust,
                sla_state: state,
                sla_reason: reason,
                decided_by,
            });
        }
        if model.sla.is_some() {
            let evidence: Vec<f64> = members.iter().filter_map(|(_, s)| s.evidence.get(&model.name).copied()).collect();
            let log_threshold = (1.0 / model.confidence.delta()).ln();
            if let Some(log_evidence) = log_mean_exp(&evidence) {
                alarms.push(PooledAlarm {
                    model: model.name.clone(),
                    test: "exceeded",
                    replicas: evidence.len() as u64,
                    log_evidence,
                    log_threshold,
                    firing: log_evidence >= log_threshold || latched.contains(&model.name),
                });
            }
        }
    }
    left_out.sort();
    let levels: BTreeSet<u64> = config.models.iter().map(|m| m.confidence.level().to_bits()).collect();
    FleetReport {
        confidence: (levels.len() == 1).then(|| config.models[0].confidence.level()),
        time: seen.time,
        replicas_seen: everyone.len() as u64,
        models,
        alarms,
        label_coverage: coverage,
        left_out,
    }
}

#[cfg(test)]
mod tests;
