//! The fleet view's series (`riskbound fleet --listen`): the pooled bounds, SLA states and
//! alarms of the last good round, and the fleet view's own health. Names are in
//! registry.rs's `names`, with every other metric name.

use std::sync::{Arc, RwLock};

use prometheus_client::collector::Collector;
use prometheus_client::encoding::DescriptorEncoder;
use prometheus_client::registry::Registry;

use super::registry::{counters, encode_process, gauges, names, Labels};
use crate::estimate::sla::SlaState;
use crate::fleet::pool::LeftOut;
use crate::fleet::FleetState;

/// The fleet state the rounds update and scrapes read.
pub type SharedFleet = Arc<RwLock<FleetState>>;

#[derive(Debug)]
struct FleetCollector {
    state: SharedFleet,
}

fn mw(m: &str, w: &str) -> Labels {
    vec![("model", m.to_string()), ("window", w.to_string())]
}

impl Collector for FleetCollector {
    fn encode(&self, mut e: DescriptorEncoder) -> Result<(), std::fmt::Error> {
        let state = self.state.read().unwrap_or_else(|p| p.into_inner());
        let e = &mut e;
        gauges(
            e,
            names::FLEET_BUILD_INFO,
            "riskbound fleet view build",
            [(vec![("version", env!("CARGO_PKG_VERSION").to_string())], 1.0)],
        )?;
        gauges(
            e,
            names::FLEET_STALE,
            "1 while the last round could not read Prometheus: every other fleet series then holds the last good round's values, 0 once a round succeeds",
            [(Labels::new(), f64::from(u8::from(state.stale)))],
        )?;
        if let Some(t) = state.last_success {
            gauges(
                e,
                names::FLEET_LAST_SUCCESS,
                "Unix time of the last round that read Prometheus",
                [(Labels::new(), t)],
            )?;
        }
        counters(
            e,
            names::FLEET_FAILURES,
            "Rounds that could not read Prometheus, by reason (unreachable, tls, http_status, rejected, malformed)",
            state.failures.iter().map(|(k, v)| (vec![("reason", k.to_string())], *v)),
        )?;
        if let Some(r) = &state.report {
            encode_report(r, e)?;
        }
        encode_process(e)
    }
}

fn encode_report(r: &crate::fleet::FleetReport, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let mut bounds = (Vec::new(), Vec::new());
    for w in &r.models {
        let labelled = w.bounds.iter().map(|(m, p)| (m, p, "per-window"));
        let robust = w.delay_robust.iter().flat_map(|c| c.bounds.iter().map(|(m, p)| (m, p, "delay-robust")));
        for (method, p, guarantee) in labelled.chain(robust) {
            let mut l = mw(&w.model, &w.window);
            l.push(("method", method.to_string()));
            l.push(("guarantee", guarantee.to_string()));
            bounds.0.push((l.clone(), p.upper));
            bounds.1.push((l, p.lower));
        }
    }
    gauges(e, names::FLEET_UPPER, "Upper confidence bound on the true risk of the union of the replicas' windows, pooled from their sufficient statistics (per look, each one-sided at the confidence; guarantee=\"per-window\": the labelled samples, \"delay-robust\": the cohorts, a missing label at the loss maximum). Assumes every replica's samples are i.i.d. draws of the same risk", bounds.0)?;
    gauges(e, names::FLEET_LOWER, "Lower confidence bound on the true risk of the union of the replicas' windows (delay-robust: a missing label at 0)", bounds.1)?;
    let per = |f: &dyn Fn(&crate::fleet::pool::PooledWindow) -> Option<f64>| -> Vec<(Labels, f64)> {
        r.models.iter().filter_map(|w| f(w).map(|v| (mw(&w.model, &w.window), v))).collect()
    };
    gauges(
        e,
        names::FLEET_SAMPLES,
        "Labelled samples in the union of the replicas' windows",
        per(&|w| Some(w.n as f64)),
    )?;
    gauges(
        e,
        names::FLEET_TOTAL_LOSS,
        "Sum of the losses of the union of the replicas' windows",
        per(&|w| Some(w.total_loss)),
    )?;
    gauges(e, names::FLEET_WINDOW_REPLICAS, "Replicas pooled into the window", per(&|w| Some(w.replicas as f64)))?;
    gauges(
        e,
        names::FLEET_COHORT,
        "Predictions in the union of the replicas' cohorts of the window",
        per(&|w| w.delay_robust.as_ref().map(|c| c.predictions as f64)),
    )?;
    gauges(
        e,
        names::FLEET_COHORT_UNLABELLED,
        "Predictions of the union of the cohorts without a label",
        per(&|w| w.delay_robust.as_ref().map(|c| c.unlabelled as f64)),
    )?;
    let mut states = Vec::new();
    for w in &r.models {
        if let Some(st) = w.sla_state {
            for s in SlaState::ALL {
                let mut l = mw(&w.model, &w.window);
                l.push(("state", s.as_str().to_string()));
                states.push((l, f64::from(u8::from(s.as_str() == st))));
            }
        }
    }
    gauges(e, names::FLEET_SLA_STATE, "1 for the pooled window's SLA state (as a window's: ok, violated, inconclusive; min_samples and min_label_coverage on the pooled counts), 0 for the others", states)?;
    let mut confidences: Vec<(Labels, f64)> = Vec::new();
    for w in &r.models {
        if !confidences.iter().any(|(l, _)| l[0].1 == w.model) {
            confidences.push((vec![("model", w.model.clone())], w.confidence));
        }
    }
    gauges(e, names::FLEET_CONFIDENCE, "Confidence of each one-sided pooled bound", confidences)?;
    gauges(
        e,
        names::FLEET_COVERAGE,
        "Pooled label coverage: labelled / (labelled + expired) summed over the pooled replicas",
        r.label_coverage.iter().filter_map(|(m, c)| c.map(|c| (vec![("model", m.clone())], c))),
    )?;
    let al = |a: &crate::fleet::pool::PooledAlarm| vec![("model", a.model.clone()), ("test", a.test.to_string())];
    gauges(e, names::FLEET_ALARM_EVIDENCE, "ln of the mean of the pooled replicas' e-values of \"risk <= max_risk at all times\" (an e-value at every look; an anytime alarm if the replicas' streams are independent and the replica set fixed)", r.alarms.iter().map(|a| (al(a), a.log_evidence)))?;
    gauges(
        e,
        names::FLEET_ALARM_THRESHOLD,
        "ln(1/δ): the fleet alarm fires when the mean e-value reaches 1/δ",
        r.alarms.iter().map(|a| (al(a), a.log_threshold)),
    )?;
    gauges(
        e,
        names::FLEET_ALARM_FIRING,
        "1 once the fleet alarm's mean e-value reached its threshold since the fleet view started, else 0",
        r.alarms.iter().map(|a| (al(a), f64::from(u8::from(a.firing)))),
    )?;
    gauges(
        e,
        names::FLEET_ALARM_REPLICAS,
        "Replicas whose e-values the fleet alarm averages",
        r.alarms.iter().map(|a| (al(a), a.replicas as f64)),
    )?;
    gauges(
        e,
        names::FLEET_REPLICAS_SEEN,
        "Replicas seen in Prometheus (with riskbound series, or down)",
        [(Labels::new(), r.replicas_seen as f64)],
    )?;
    // Each replica counted once per (model, reason); down and stale replicas sit out of every
    // model and carry no model label.
    let mut left: std::collections::BTreeMap<(String, LeftOut), std::collections::BTreeSet<(&str, &str)>> =
        Default::default();
    for l in &r.left_out {
        left.entry((l.model.clone(), l.reason)).or_default().insert((&l.job, &l.instance));
    }
    gauges(
        e,
        names::FLEET_LEFT_OUT,
        "Replicas left out of the pool, by reason: down (up == 0), stale (last scrape older than --max-age), model_missing, loss_mismatch, confidence_mismatch, max_risk_mismatch (their config differs), series_missing",
        left.iter().map(|((m, why), who)| {
            let mut l = Labels::new();
            if !m.is_empty() {
                l.push(("model", m.clone()));
            }
            l.push(("reason", why.as_str().to_string()));
            (l, who.len() as f64)
        }),
    )?;
    Ok(())
}

/// A registry whose every scrape encodes the fleet state.
pub fn registry(state: SharedFleet) -> Registry {
    let mut r = Registry::default();
    r.register_collector(Box::new(FleetCollector { state }));
    r
}
