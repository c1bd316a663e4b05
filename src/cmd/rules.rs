//! `riskbound rules`: Prometheus alerting rules generated from a daemon config, so the SLA
//! thresholds and budgets in the rules are the ones the daemon computes with.
//!
//! Pages go only to the anytime alarms, whose false-alarm probability holds over the whole
//! deployment, and only while enough labels come back for the labelled rows to be trusted as a
//! sample. A window's per-look `violated` state is a ticket: re-checked after every batch, it
//! would page falsely again and again (README, "What repeated looks cost").

use std::fmt::Write;

use crate::config::{Config, ModelConfig};

/// YAML double-quoted string (model names are [a-z0-9_-], but descriptions hold quotes).
fn quoted(s: &str) -> String {
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

struct Rule<'a> {
    alert: &'a str,
    expr: String,
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
    let _ = writeln!(
        out,
        "        annotations:\n          summary: {}\n          description: {}",
        quoted(&r.summary),
        quoted(&r.description)
    );
}

fn model_rules(out: &mut String, m: &ModelConfig) {
    let Some(sla) = &m.sla else {
        let _ = writeln!(out, "  # model {}: no sla configured, so nothing to page on", m.name);
        return;
    };
    let _ = writeln!(out, "  - name: riskbound-{}\n    rules:", m.name);
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
        write_rule(out, &Rule { alert, expr, for_: None, severity: "page", summary, description });
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
    write_rule(out, &Rule {
        alert: "RiskboundWindowSlaViolated",
        expr: format!("riskbound_sla_state{{model=\"{name}\",state=\"violated\"}} == 1"),
        for_: None,
        severity: "ticket",
        summary: format!("{name}: window {{{{ $labels.window }}}} lower bound is above {}", sla.max_risk),
        description: format!(
            "A per-window bound ({}): valid at one look, not across the repeated looks the daemon makes. A ticket, not a page.",
            m.window_guarantee.as_str()
        ),
    });
    write_rule(out, &Rule {
        alert: "RiskboundLabelCoverageLow",
        expr: format!("riskbound_label_coverage_ratio{{model=\"{name}\"}} < {}", sla.min_label_coverage),
        for_: Some("30m"),
        severity: "ticket",
        summary: format!("{name}: fewer than {} of predictions get a label", sla.min_label_coverage),
        description: "Missing labels may be missing because of their outcome: windows are inconclusive and the paging alarms are held back until coverage recovers.".into(),
    });
}

/// The rules file for `config`, as YAML text.
pub fn render(config: &Config) -> String {
    let mut out = format!(
        "# Prometheus alerting rules generated by `riskbound rules --config {}`.\n\
         # Regenerate after changing the config: thresholds and budgets are copied from it.\n\
         groups:\n",
        config.file.display()
    );
    for m in &config.models {
        model_rules(&mut out, m);
    }
    out += "  - name: riskbound-daemon\n    rules:\n";
    write_rule(&mut out, &Rule {
        alert: "RiskboundStateUnwritable",
        expr: "riskbound_state_unwritable == 1".into(),
        for_: Some("5m"),
        severity: "page",
        summary: "riskbound cannot write its state database (disk full or read-only)".into(),
        description: "Ingest has stopped and the daemon reports not ready; committed state is kept and ingest resumes by itself once the volume accepts writes.".into(),
    });
    out
}
