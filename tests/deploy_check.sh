#!/usr/bin/env bash
# The deployment files through the real tools: promtool check config on the Prometheus
# configuration (with rules generated from the Kubernetes config map's daemon config), amtool
# check-config on the Alertmanager routing, and systemd-analyze verify on the unit, failing on
# any warning; kubernetes-validate on the manifests. Run by .ci/run.
set -euo pipefail
bin=$(realpath "${1:-target/release/riskbound}")
here=$(cd "$(dirname "$0")/.." && pwd)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
# The daemon config from the config map, with its absolute paths moved under $work.
python3 - "$here/deploy/kubernetes/configmap.yaml" "$work" <<'PY'
import re, sys, os
text = open(sys.argv[1]).read()
body = text.split("riskbound.yaml: |\n", 1)[1]
lines = [l[4:] if l.startswith("    ") else l for l in body.splitlines()]
cfg = "\n".join(lines).replace("/spool", sys.argv[2] + "/spool").replace("/var/lib/riskbound", sys.argv[2] + "/state")
for d in re.findall(r"dir: (\S+)", cfg):
    os.makedirs(d, exist_ok=True)
open(os.path.join(sys.argv[2], "riskbound.yaml"), "w").write(cfg + "\n")
PY
"$bin" rules --config "$work/riskbound.yaml" --fleet-job riskbound-fleet > "$work/riskbound-rules.yaml"
cp "$here/deploy/prometheus/prometheus.yml" "$work/"
promtool check config "$work/prometheus.yml"
amtool check-config "$here/deploy/prometheus/alertmanager.yml"
# The routes match the severities the generated rules carry.
for sev in page ticket info; do
  grep -q "severity: $sev" "$work/riskbound-rules.yaml" || { echo "no rule has severity $sev"; exit 1; }
done
if command -v systemd-analyze > /dev/null; then
  sed "s#/usr/local/bin/riskbound#$bin#" "$here/deploy/systemd/riskbound.service" > "$work/riskbound.service"
  out=$(systemd-analyze verify "$work/riskbound.service" 2>&1) || { echo "$out"; exit 1; }
  if [ -n "$out" ]; then
    echo "systemd-analyze verify warned:"; echo "$out"; exit 1
  fi
  echo "systemd-analyze verify: clean"
else
  echo "systemd-analyze is not installed here: the unit was not verified" >&2
  exit 1
fi
# The manifests against the Kubernetes API schemas (kubernetes-validate, pinned in
# tests/reference/requirements.txt), strictly: an unknown or misplaced field fails.
kubernetes-validate --strict --quiet "$here"/deploy/kubernetes/*.yaml
echo "kubernetes-validate: clean"
echo "deploy check: ok"
