#!/usr/bin/env bash
# The generated alerting rules checked by Prometheus's own tools: `promtool check rules` (syntax,
# PromQL) and `promtool test rules` (which alerts fire, with which labels, on given series).
# Run by .ci/run; needs promtool (Debian's prometheus package).
set -euo pipefail
bin=${1:-target/release/riskbound}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
mkdir -p "$work/in"
printf 'p,y\n1,1\n1,0\n1,1\n1,1\n' > "$work/validation.csv"
cat > "$work/riskbound.yaml" <<'YAML'
models:
  - name: courier
    predictions: { dir: in, pattern: "pred-*.csv", columns: { id: id, time: t, prediction: p } }
    labels: { dir: in, pattern: "label-*.csv", columns: { id: id, time: t, label: y } }
    windows: [{ name: recent, last: 500 }]
    sla:
      max_risk: 0.1
      min_label_coverage: 0.6
      change_horizon: 50000
      reference: { file: validation.csv, columns: { prediction: p, label: y }, tolerance: 0.05 }
  - name: no-sla
    predictions: { dir: in, pattern: "p2-*.csv", columns: { id: id, time: t, prediction: p } }
    labels: { dir: in, pattern: "l2-*.csv", columns: { id: id, time: t, label: y } }
    windows: [{ name: recent, last: 500 }]
YAML
"$bin" rules --config "$work/riskbound.yaml" > "$work/rules.yaml"
promtool check rules "$work/rules.yaml"
grep -q 'P(a false alarm within the first 50000 labels after a reset)' "$work/rules.yaml"
cat > "$work/rules_test.yaml" <<YAML
rule_files: [rules.yaml]
evaluation_interval: 1m
tests:
  - interval: 1m
    input_series:
      - series: 'riskbound_alarm_firing{model="courier",test="exceeded"}'
        values: '0 0 1 1 1 1'
      - series: 'riskbound_alarm_firing{model="courier",test="change"}'
        values: '0 0 0 1 1 1'
      - series: 'riskbound_alarm_firing{model="courier",test="shift"}'
        values: '0 0 0 0 0 0'
      - series: 'riskbound_label_coverage_ratio{model="courier"}'
        values: '0.9 0.9 0.9 0.9 0.3 0.3'
      - series: 'riskbound_sla_state{model="courier",window="recent",state="violated"}'
        values: '1 1 1 1 1 1'
      - series: 'riskbound_state_unwritable'
        values: '0 1 1 1 1 1 1 1'
    alert_rule_test:
      # Nothing before the evidence crosses its threshold.
      - { eval_time: 1m, alertname: RiskboundRiskExceededSinceReset, exp_alerts: [] }
      - eval_time: 2m
        alertname: RiskboundRiskExceededSinceReset
        exp_alerts:
          - exp_labels: { severity: page, model: courier, test: exceeded }
            exp_annotations:
              summary: "courier: true risk has exceeded 0.1 since the last reset"
              description: "The betting e-process for 'risk <= 0.1' reached 1/delta. Anytime-valid: P(this fires while the risk never exceeded 0.1) <= 5.000e-2 over the whole deployment. Assumes labels are not selected by outcome and the sample order does not depend on the losses. Latched until \`riskbound reset courier\`."
      - eval_time: 3m
        alertname: RiskboundRiskRose
        exp_alerts:
          - exp_labels: { severity: page, model: courier, test: change }
            exp_annotations:
              summary: "courier: true risk rose above 0.1"
              description: "The change detector (Shiryaev-Roberts e-detector) crossed its threshold. P(a false alarm within the first 50000 labels after a reset) <= 5.000e-2. Latched until \`riskbound reset courier\`."
      # Coverage fell below min_label_coverage: the labels may be selected by outcome, so the
      # page is held back and the coverage ticket takes over (after its 30m).
      - { eval_time: 4m, alertname: RiskboundRiskExceededSinceReset, exp_alerts: [] }
      - { eval_time: 4m, alertname: RiskboundRiskRose, exp_alerts: [] }
      - { eval_time: 3m, alertname: RiskboundHarmfulShift, exp_alerts: [] }
      # A per-window violation is a ticket, never a page.
      - eval_time: 1m
        alertname: RiskboundWindowSlaViolated
        exp_alerts:
          - exp_labels: { severity: ticket, model: courier, window: recent, state: violated }
            exp_annotations:
              summary: "courier: window recent lower bound is above 0.1"
              description: "A per-window bound (per-window): valid at one look, not across the repeated looks the daemon makes. A ticket, not a page."
      - eval_time: 7m
        alertname: RiskboundStateUnwritable
        exp_alerts:
          - exp_labels: { severity: page }
            exp_annotations:
              summary: "riskbound cannot write its state database (disk full or read-only)"
              description: "Ingest has stopped and the daemon reports not ready; committed state is kept and ingest resumes by itself once the volume accepts writes."
YAML
(cd "$work" && promtool test rules rules_test.yaml)
echo "rules check: ok"
