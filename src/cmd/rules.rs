//! `riskbound rules`: Prometheus alerting rules generated from a daemon config, so the SLA
//! thresholds, windows and budgets in the rules are the ones the daemon computes with.
//!
//! Severities, for routing: `page` only for the anytime alarms (their false-alarm probability
//! holds over the whole deployment), the daemon being down and the state volume refusing
//! writes; `ticket` for a window's per-look violation, stalled ingestion, a high reject ratio
//! and low label coverage; `info` for "compliance no longer certified". A per-look bound is
//! never a page: re-checked after every batch it would page falsely again and again (README,
//! "What repeated looks cost").

use std::fmt::Write;

use crate::config::{Config, DecideOn, ModelConfig, WindowKind};
use crate::fleet::pool::quoted;

/// The Prometheus job label riskbound's scrape uses, unless told otherwise.
pub const DEFAULT_JOB: &str = "riskbound";

struct Rule<'a> {
    alert: &'a str,
    /// Routing labels beside severity (model, window): they also keep rules of different
    /// models and windows apart for promtool's duplicate check.
    labels: Vec<(&'static str, String)>,
    expr: String,
    /// The `for:` duration (every rule states one, "0s" included).
    for_: Option<&'a str>,
    severity: &'a str,
    summary: String,
    description: String,
}

fn write_rule(out: &mut String, r: &Rule<'_>) {
    let _ = writeln!(out, "      - alert: {}", r.alert);
    let _ = writeln!(out, "        expr: {}", quoted(&r.expr));
    if let Some(f) = r.for_ {
        let _ = writeln!(out, "        for: {f}");
    }
    let _ = writeln!(out, "        labels:\n          severity: {}", r.severity);
    for (k, v) in &r.labels {
        let _ = writeln!(out, "          {k}: {v}");
    }
    let _ = writeln!(
        out,
        "        annotations:\n          summary: {}\n          description: {}",
        quoted(&r.summary),
        quoted(&r.description)
    );
}

/// A duration as Prometheus writes it (whole seconds, largest unit that divides).
fn prom_duration(secs: u64) -> String {
    for (unit, n) in [("d", 86_400), ("h", 3600), ("m", 60)] {
        if secs >= n && secs.is_multiple_of(n) {
            return format!("{}{unit}", secs / n);
        }
    }
    format!("{secs}s")
}

fn window_words(w: &crate::config::WindowConfig, decide_on: DecideOn) -> String {
    let d = |ms: i64| prom_duration((ms / 1000).max(1) as u64);
    match (w.kind, w.mature, decide_on) {
        (WindowKind::Last(n), false, DecideOn::LabelledOnly) => format!("the newest {n} labelled samples"),
        (WindowKind::SpanMs(ms), false, DecideOn::LabelledOnly) => {
            format!("the labelled samples predicted within {} of the newest", d(ms))
        }
        (WindowKind::Last(n), false, DecideOn::DelayRobust) => {
            format!("the newest {n} predictions, a missing label counted at its worst")
        }
        (WindowKind::SpanMs(ms), false, DecideOn::DelayRobust) => {
            format!("the predictions made within {} of the newest, a missing label counted at its worst", d(ms))
        }
        (WindowKind::Last(n), true, _) => format!("the newest {n} predictions whose label_wait is over"),
        (WindowKind::SpanMs(ms), true, _) => {
            format!("the predictions of {} ending label_wait before the newest", d(ms))
        }
    }
}

fn sla_rules(out: &mut String, m: &ModelConfig) {
    let Some(sla) = &m.sla else { return };
    let name = &m.name;
    let delta = m.confidence.delta();
    // A page on a latched anytime alarm, held back while label coverage is too low to trust.
    let page = |out: &mut String, alert: &str, test: &str, summary: String, description: String| {
        let expr = format!(
            "riskbound_alarm_firing{{model=\"{name}\",test=\"{test}\"}} == 1 and on (model) \
             riskbound_label_coverage_ratio{{model=\"{name}\"}} >= {}",
            sla.min_label_coverage
        );
        let description = format!("{description} Latched until `riskbound reset {name}`.");
        write_rule(
            out,
            &Rule {
                alert,
                labels: vec![("model", name.clone())],
                expr,
                // The alarm latches and its guarantee is its own: waiting adds delay, not certainty.
                for_: Some("0s"),
                severity: "page",
                summary,
                description,
            },
        );
    };
    page(
        out,
        "RiskboundRiskExceededSinceReset",
        "exceeded",
        format!("{name}: true risk has exceeded {} since the last reset", sla.max_risk),
        format!(
            "The betting e-process for 'risk <= {0}' reached 1/delta. Anytime-valid: P(this fires while the risk never exceeded {0}) <= {delta:.3e} over the whole deployment. Assumes labels are not selected by outcome and the sample order does not depend on the losses.",
            sla.max_risk
        ),
    );
    page(
        out,
        "RiskboundRiskRose",
        "change",
        format!("{name}: true risk rose above {}", sla.max_risk),
        format!(
            "The change detector (Shiryaev-Roberts e-detector) crossed its threshold. P(a false alarm within the first {} labels after a reset) <= {delta:.3e}.",
            sla.change_horizon
        ),
    );
    if let Some(r) = &sla.reference {
        page(
            out,
            "RiskboundHarmfulShift",
            "shift",
            format!("{name}: deployed risk exceeds the reference risk bound plus tolerance ({:.6})", r.max_risk()),
            format!(
                "Reference {} (n {}) upper bound {:.6} + tolerance {}. P(false alarm) <= {:.3e} (reference plus deployment).",
                r.file.display(),
                r.n,
                r.upper,
                r.tolerance,
                r.confidence.delta() + delta
            ),
        );
    }
    let method = sla.method.name();
    let guarantee = match sla.decide_on {
        DecideOn::DelayRobust => crate::export::registry::delay_robust_guarantee(m.window_guarantee),
        DecideOn::LabelledOnly => m.window_guarantee.as_str(),
    };
    let level = m.confidence.level();
    for w in &m.windows {
        let wname = &w.name;
        let words = window_words(w, sla.decide_on);
        let sel = format!("model=\"{name}\",window=\"{wname}\",method=\"{method}\",guarantee=\"{guarantee}\"");
        write_rule(out, &Rule {
            alert: "RiskboundWindowSlaViolated",
            labels: vec![("model", name.clone()), ("window", wname.clone())],
            expr: format!(
                "riskbound_risk_lower_bound{{{sel}}} > {} and on (model, window) \
                 riskbound_sla_state{{model=\"{name}\",window=\"{wname}\",state=\"violated\"}} == 1",
                sla.max_risk
            ),
            // A violated window is already certified at its confidence when the state says so.
            for_: Some("0s"),
            severity: "ticket",
            summary: format!("{name}/{wname}: true risk certainly above {} (lower bound {{{{ $value }}}})", sla.max_risk),
            description: format!(
                "The {method} lower bound on the true risk of window {wname} ({words}) is above max_risk {} at confidence {level} ({guarantee} guarantee). A per-look bound: the daemon re-checks after every batch, so across looks its false alarms add up. A ticket; the anytime alarms page.",
                sla.max_risk
            ),
        });
        write_rule(out, &Rule {
            alert: "RiskboundWindowSlaNotCertified",
            labels: vec![("model", name.clone()), ("window", wname.clone())],
            expr: format!("riskbound_risk_upper_bound{{{sel}}} > {}", sla.max_risk),
            for_: Some("30m"),
            severity: "info",
            summary: format!("{name}/{wname}: compliance with {} no longer certified (upper bound {{{{ $value }}}})", sla.max_risk),
            description: format!(
                "The {method} upper bound on the true risk of window {wname} ({words}) is above max_risk {} at confidence {level}: the window can no longer be certified within the SLA. Not evidence of a violation.",
                sla.max_risk
            ),
        });
    }
    if let Some(sl) = &m.slices {
        write_rule(out, &Rule {
            alert: "RiskboundSliceViolated",
            labels: vec![("model", name.clone())],
            expr: format!("riskbound_slice_violations{{model=\"{name}\"}} > 0"),
            for_: Some("0s"),
            severity: "ticket",
            summary: format!("{name}/{{{{ $labels.window }}}}: {{{{ $value }}}} slice(s) certainly above {}", sla.max_risk),
            description: format!(
                "A slice of the window (searched over {} categorical and {} numeric features, depth {}, or registered) has a certified lower bound above max_risk {}; riskbound_slice_info names it. The certificates survive the search (split-confirm or uniform), but each look is one look: a ticket.",
                sl.categorical.len(),
                sl.numeric.len(),
                sl.depth,
                sla.max_risk
            ),
        });
    }
    write_rule(out, &Rule {
        alert: "RiskboundLabelCoverageLow",
        labels: vec![("model", name.clone())],
        expr: format!("riskbound_label_coverage_ratio{{model=\"{name}\"}} < {}", sla.min_label_coverage),
        for_: Some("30m"),
        severity: "ticket",
        summary: format!("{name}: fewer than {} of predictions get a label", sla.min_label_coverage),
        description: "Missing labels may be missing because of their outcome: windows are inconclusive and the paging alarms are held back until coverage recovers.".into(),
    });
    write_rule(out, &Rule {
        alert: "RiskboundLabelDelayDependsOnOutcome",
        labels: vec![("model", name.clone())],
        expr: format!("riskbound_label_delay_outcome_dependent{{model=\"{name}\"}} == 1"),
        for_: Some("1h"),
        severity: "ticket",
        summary: format!("{name}: label delays depend on the outcome"),
        description: "Labels of bad outcomes come back at a different speed from good ones (two-sample Kolmogorov-Smirnov test on the labelled samples' delays). Bounds on the labelled samples alone (guarantee per-window or spent) are then biased, usually towards looking healthy; the delay-robust bounds and the anytime alarms do not depend on it. A per-look test, held for an hour: a ticket.".into(),
    });
}

/// The input-shift rules: a ticket on a look that rejects, a page on the latched alarm (label
/// free, so never held back by label coverage), a ticket when the alarm's pool is used up.
fn input_shift_rules(out: &mut String, m: &ModelConfig) {
    let Some(sh) = &m.input_shift else { return };
    let name = &m.name;
    let wname = &sh.window.name;
    let delta = sh.confidence.delta();
    let test = if sh.permutations > 0 { "permutation" } else { "spectral" };
    write_rule(out, &Rule {
        alert: "RiskboundInputsShifted",
        labels: vec![("model", name.clone()), ("window", wname.clone())],
        expr: format!("riskbound_input_shift_shifted{{model=\"{name}\",window=\"{wname}\",test=\"{test}\"}} == 1"),
        for_: Some("0s"),
        severity: "ticket",
        summary: format!("{name}/{wname}: the inputs differ from the reference ({test} test)"),
        description: format!(
            "The latest look's {test} test of window {wname} against the reference {} has p <= {delta:.3e}. A per-look test: the daemon looks again every {}, so across looks its false alarms add up. A shift of the inputs is not a rise of the risk: it can be harmless, and a harmful change can leave the inputs alone. A ticket; the input-shift alarm pages.",
            sh.reference_file.file_name().map_or_else(|| sh.reference_file.display().to_string(), |f| f.to_string_lossy().into_owned()),
            prom_duration((sh.every_ms / 1000).max(1) as u64)
        ),
    });
    if sh.alarm.is_none() {
        return;
    }
    write_rule(out, &Rule {
        alert: "RiskboundInputShiftSinceReset",
        labels: vec![("model", name.clone())],
        expr: format!("riskbound_alarm_firing{{model=\"{name}\",test=\"input-shift\"}} == 1"),
        // The alarm latches and its guarantee is its own: waiting adds delay, not certainty.
        for_: Some("0s"),
        severity: "page",
        summary: format!("{name}: the inputs have moved away from the reference since the last reset"),
        description: format!(
            "The sequential kernel two-sample test by betting reached 1/delta. Anytime-valid: P(this fires while the inputs stay distributed as the reference) <= {delta:.3e} over the whole deployment, however often it is checked. Assumes the reference rows and the sampled predictions are each i.i.d. Label free: it says the inputs changed, not that the risk rose. Latched until `riskbound reset {name}`."
        ),
    });
    write_rule(out, &Rule {
        alert: "RiskboundInputShiftPoolUsedUp",
        labels: vec![("model", name.clone())],
        expr: format!("riskbound_input_shift_alarm_pool_left{{model=\"{name}\"}} == 0"),
        for_: Some("0s"),
        severity: "ticket",
        summary: format!("{name}: the input-shift alarm has paired every reference point"),
        description: "Each reference point is paired with one prediction at most, so the alarm gathers no more evidence: give a larger reference, or a lower input_shift.alarm.sample_rate, and restart.".into(),
    });
}

fn model_rules(out: &mut String, m: &ModelConfig) {
    let name = &m.name;
    let _ = writeln!(out, "  - name: riskbound-{name}\n    rules:");
    if m.sla.is_none() {
        let _ = writeln!(out, "      # no sla configured: no risk alerts for this model");
    }
    sla_rules(out, m);
    input_shift_rules(out, m);
    let stall = m.alerts.stalled_after.as_secs();
    write_rule(out, &Rule {
        alert: "RiskboundIngestStalled",
        labels: vec![("model", name.clone())],
        expr: format!("time() - riskbound_last_ingest_timestamp_seconds{{model=\"{name}\"}} > {stall}"),
        for_: Some("5m"),
        severity: "ticket",
        summary: format!("{name}: no batch file committed for over {}", prom_duration(stall)),
        description: "The serving stack stopped dropping batch files, or riskbound stopped taking them: the bounds are going stale.".into(),
    });
    let ratio = m.alerts.max_reject_ratio;
    write_rule(out, &Rule {
        alert: "RiskboundRejectRatioHigh",
        labels: vec![("model", name.clone())],
        expr: format!(
            "sum by (model) (rate(riskbound_rows_rejected_total{{model=\"{name}\"}}[15m])) / \
             (sum by (model) (rate(riskbound_rows_ingested_total{{model=\"{name}\"}}[15m])) + \
             sum by (model) (rate(riskbound_rows_rejected_total{{model=\"{name}\"}}[15m]))) > {ratio}"
        ),
        for_: Some("15m"),
        severity: "ticket",
        summary: format!("{name}: more than {ratio} of rows rejected (ratio {{{{ $value }}}})"),
        description: "Rows are rejected (bad cells, duplicates, late labels); riskbound_rows_rejected_total{reason} says why and the daemon log names the first bad line of each file. Rejected rows are not in any bound.".into(),
    });
}

/// The rules file for `config`, as YAML text; `job` is the scrape's job label, `fleet_job` the
/// fleet view's (its rules are added when given).
pub fn render(config: &Config, job: &str, fleet_job: Option<&str>) -> String {
    let mut out = format!(
        "# Prometheus alerting rules generated by `riskbound rules --config {}`.\n\
         # Regenerate after changing the config: thresholds, windows and budgets are copied from it.\n\
         # severity: page (anytime alarms, daemon down, state unwritable), ticket, info.\n\
         groups:\n",
        config.file.display()
    );
    for m in &config.models {
        model_rules(&mut out, m);
    }
    out += "  - name: riskbound-daemon\n    rules:\n";
    write_rule(
        &mut out,
        &Rule {
            alert: "RiskboundDown",
            labels: Vec::new(),
            expr: format!("up{{job=\"{job}\"}} == 0 or absent(up{{job=\"{job}\"}})"),
            for_: Some("5m"),
            severity: "page",
            summary: "riskbound is not being scraped".into(),
            description: format!(
                "Prometheus cannot scrape job {job}: no bounds and no alarms are being computed or seen."
            ),
        },
    );
    write_rule(&mut out, &Rule {
        alert: "RiskboundStateUnwritable",
        labels: Vec::new(),
        expr: "riskbound_state_unwritable == 1".into(),
        for_: Some("5m"),
        severity: "page",
        summary: "riskbound cannot write its state database (disk full or read-only)".into(),
        description: "Ingest has stopped (the daemon stays ready, so the model's pod keeps serving); committed state is kept and served, and ingest resumes by itself once the volume accepts writes, or the state is below state_max_size again.".into(),
    });
    // Common practice: act at 90% of a memory limit, before the kernel's OOM killer does.
    write_rule(&mut out, &Rule {
        alert: "RiskboundMemoryNearLimit",
        labels: Vec::new(),
        expr: format!(
            "process_resident_memory_bytes{{job=\"{job}\"}} / on(job, instance) riskbound_memory_limit_bytes{{job=\"{job}\"}} > {MEMORY_TICKET_RATIO}"
        ),
        for_: Some("15m"),
        severity: "ticket",
        summary: format!("riskbound on {{{{ $labels.instance }}}} uses over {:.0}% of its memory limit", MEMORY_TICKET_RATIO * 100.0),
        description: "Resident memory is near the container's limit (config memory_limit, else the cgroup); past it the kernel kills riskbound, which restarts and resumes from its state. Raise the limit or shorten the windows.".into(),
    });
    if let Some(f) = fleet_job {
        fleet_rules(&mut out, config, f);
    }
    out
}

/// The fleet view's rules (`--fleet-job`): its pooled alarm pages, a pooled violation and the
/// fleet view's own trouble are tickets.
fn fleet_rules(out: &mut String, config: &Config, fleet_job: &str) {
    out.push_str("  - name: riskbound-fleet\n    rules:\n");
    for m in &config.models {
        let Some(sla) = &m.sla else { continue };
        let name = &m.name;
        let delta = m.confidence.delta();
        write_rule(out, &Rule {
            alert: "RiskboundFleetRiskExceeded",
            labels: vec![("model", name.clone())],
            expr: format!(
                "riskbound_fleet_alarm_firing{{job=\"{fleet_job}\",model=\"{name}\",test=\"exceeded\"}} == 1 and on (model) \
                 riskbound_fleet_label_coverage_ratio{{job=\"{fleet_job}\",model=\"{name}\"}} >= {}",
                sla.min_label_coverage
            ),
            for_: Some("0s"),
            severity: "page",
            summary: format!("{name}: true risk has exceeded {} across the fleet", sla.max_risk),
            description: format!(
                "The mean of the replicas' betting e-values for 'risk <= {0}' reached 1/delta. At every look P(this holds while the risk never exceeded {0}) <= {delta:.3e} for the whole fleet; as an alarm over time it assumes the replicas' label streams are independent and the set of replicas fixed. Latched until the fleet view restarts.",
                sla.max_risk
            ),
        });
        write_rule(out, &Rule {
            alert: "RiskboundFleetWindowSlaViolated",
            labels: vec![("model", name.clone())],
            expr: format!("riskbound_fleet_sla_state{{job=\"{fleet_job}\",model=\"{name}\",state=\"violated\"}} == 1"),
            for_: Some("0s"),
            severity: "ticket",
            summary: format!("{name}/{{{{ $labels.window }}}}: true risk certainly above {} across the fleet", sla.max_risk),
            description: format!(
                "The pooled lower bound on the union of the replicas' windows is above max_risk {} at confidence {}. A per-look bound: a ticket; the fleet alarm pages.",
                sla.max_risk,
                m.confidence.level()
            ),
        });
    }
    write_rule(out, &Rule {
        alert: "RiskboundFleetStale",
        labels: Vec::new(),
        expr: format!("riskbound_fleet_stale{{job=\"{fleet_job}\"}} == 1"),
        for_: Some("10m"),
        severity: "ticket",
        summary: "the fleet view cannot read Prometheus".into(),
        description: "Its pooled series hold the last good round's values; riskbound_fleet_query_failures_total{reason} and its log say why (unreachable, tls, http_status, rejected, malformed).".into(),
    });
    write_rule(
        out,
        &Rule {
            alert: "RiskboundFleetDown",
            labels: Vec::new(),
            expr: format!("up{{job=\"{fleet_job}\"}} == 0 or absent(up{{job=\"{fleet_job}\"}})"),
            for_: Some("10m"),
            severity: "ticket",
            summary: "the fleet view is not being scraped".into(),
            description:
                "No pooled bounds or fleet alarm are published; each replica's own bounds and alarms still are.".into(),
        },
    );
    write_rule(out, &Rule {
        alert: "RiskboundFleetReplicasDisagree",
        labels: Vec::new(),
        expr: format!(
            "riskbound_fleet_replicas_left_out{{job=\"{fleet_job}\",reason=~\"loss_mismatch|confidence_mismatch|max_risk_mismatch\"}} > 0"
        ),
        for_: Some("15m"),
        severity: "ticket",
        summary: "{{ $value }} replicas of {{ $labels.model }} run another config ({{ $labels.reason }}) and are left out of the pool".into(),
        description: "Their loss, confidence or max_risk differ from the fleet view's config: a rollout half done, or a config out of date.".into(),
    });
}

/// The fraction of the memory limit past which the memory ticket fires.
pub const MEMORY_TICKET_RATIO: f64 = 0.9;

/// `riskbound rules`: the rules file for a config, on standard output.
pub fn main(a: &super::cli::RulesArgs) -> anyhow::Result<()> {
    let config = crate::config::load(&a.config)?;
    print!("{}", render(&config, &a.job, a.fleet_job.as_deref()));
    Ok(())
}
