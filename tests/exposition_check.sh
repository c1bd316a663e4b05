#!/usr/bin/env bash
# A live /metrics scrape checked by two parsers from outside the project: Prometheus's own
# `promtool check metrics` (Debian's prometheus package) and the Prometheus Python client's
# text parser. Run by .ci/run after the release build; needs promtool and prometheus_client.
set -euo pipefail
bin=${1:-target/release/riskbound}
work=$(mktemp -d)
trap 'kill "${pid:-0}" 2>/dev/null || true; wait "${pid:-0}" 2>/dev/null || true; rm -rf "$work"' EXIT
port=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
# Seven simulated days of the demo scenario (label_wait is 5 days, so the anytime sequences have
# matured predictions) leave batches, a config and committed state.
"$bin" demo --dir "$work" --days 7 --ms-per-hour 0 --listen "127.0.0.1:$port" --exit-when-done > "$work/demo.out" 2> "$work/demo.err"
"$bin" run --config "$work/riskbound.yaml" 2> "$work/run.err" &
pid=$!
for _ in $(seq 200); do
  curl -sf "http://127.0.0.1:$port/readyz" > /dev/null && break
  sleep 0.05
done
curl -sf "http://127.0.0.1:$port/metrics" > "$work/metrics.txt"
echo "scraped $(grep -vc '^#' "$work/metrics.txt") series"
# promtool exits 0 with no output when the exposition is valid and lint-clean.
promtool check metrics < "$work/metrics.txt"
python3 - "$work/metrics.txt" <<'PY'
import sys
from prometheus_client.parser import text_string_to_metric_families
fams = list(text_string_to_metric_families(open(sys.argv[1]).read()))
names = {f.name for f in fams}
need = {"riskbound_risk_upper_bound", "riskbound_risk_lower_bound", "riskbound_risk_observed",
        "riskbound_window_samples", "riskbound_window_total_loss", "riskbound_sla_max_risk", "riskbound_sla_state",
        "riskbound_rows_ingested", "riskbound_rows_rejected", "riskbound_files_ingested",
        "riskbound_predictions_awaiting_label", "riskbound_label_delay_seconds",
        "riskbound_last_ingest_timestamp_seconds", "riskbound_build_info",
        "riskbound_alarm_log_evidence", "riskbound_alarm_log_threshold", "riskbound_alarm_firing",
        "riskbound_alarm_max_risk", "riskbound_anytime_reset_timestamp_seconds", "riskbound_anytime_resets",
        "riskbound_window_cohort_predictions", "riskbound_window_cohort_unlabelled",
        "riskbound_window_total_squared_loss", "riskbound_window_cohort_total_loss",
        "riskbound_window_cohort_total_squared_loss", "riskbound_loss_max",
        "riskbound_label_delay_median_by_outcome_seconds", "riskbound_label_delay_p90_by_outcome_seconds",
        "riskbound_label_delay_outcome_samples", "riskbound_label_delay_outcome_p_value",
        "riskbound_label_delay_outcome_dependent",
        "riskbound_http_connections_open", "riskbound_http_connections_max", "riskbound_http_connections_accepted",
        "riskbound_http_connections_rejected", "riskbound_http_connections_evicted",
        "riskbound_http_connections_timed_out",
        # The demo's input-shift section (its looks and its alarm).
        "riskbound_input_shift_p_value", "riskbound_input_shift_shifted", "riskbound_input_shift_mmd2",
        "riskbound_input_shift_bandwidth", "riskbound_input_shift_points", "riskbound_input_shift_ks_p_value",
        "riskbound_input_shift_inconclusive", "riskbound_input_shift_alarm_pool_left",
        "riskbound_input_shift_alarm_unpaired",
        # The process metrics of the Prometheus client conventions, read from /proc.
        "process_cpu_seconds", "process_resident_memory_bytes", "process_virtual_memory_bytes",
        "process_open_fds", "process_max_fds", "process_start_time_seconds"}
guarantees = {s.labels.get("guarantee") for f in fams if f.name == "riskbound_risk_upper_bound" for s in f.samples}
assert guarantees == {"per-window", "delay-robust", "anytime"}, guarantees
missing = need - names
assert not missing, f"missing families: {missing}"
print(f"prometheus_client parsed {len(fams)} families, {sum(len(f.samples) for f in fams)} samples")
PY
# Label values with quotes, backslashes and newlines, as rendered by the registry's unit test.
if [ -f target/awkward-labels.prom ]; then
  promtool check metrics < target/awkward-labels.prom
  python3 -c 'import sys; from prometheus_client.parser import text_string_to_metric_families as p; list(p(open(sys.argv[1]).read())); print("awkward label values: parsed")' target/awkward-labels.prom
fi
kill -TERM "$pid"
wait "$pid"
echo "exposition check: ok"
