#!/usr/bin/env bash
# The generated alerting rules checked by Prometheus's own tools: `promtool check rules` (syntax,
# PromQL, lint) and `promtool test rules` on tests/rules/alerts_test.yaml (which alerts fire,
# when, with which labels and annotations, on replayed series). Run by .ci/run; needs promtool
# (Debian's prometheus package).
set -euo pipefail
bin=${1:-target/release/riskbound}
here=$(cd "$(dirname "$0")" && pwd)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
mkdir -p "$work/in"
# The reference set: 1 wrong in 4 (its upper bound feeds the shift alarm's threshold).
printf 'p,y\n1,1\n1,0\n1,1\n1,1\n' > "$work/validation.csv"
# The input-shift reference: 400 rows, one numeric and one categorical column.
awk 'BEGIN { srand(1); print "x1,region"; for (i = 0; i < 400; i++) printf "%.4f,%s\n", rand(), (i % 3 ? "a" : "b") }' \
    > "$work/inputs-reference.csv"
cp "$here/rules/riskbound.yaml" "$work/riskbound.yaml"
"$bin" rules --config "$work/riskbound.yaml" --job sidecar --fleet-job fleet > "$work/rules.yaml"
promtool check rules "$work/rules.yaml"
cp "$here/rules/alerts_test.yaml" "$work/"
(cd "$work" && promtool test rules alerts_test.yaml)
echo "rules check: ok"
