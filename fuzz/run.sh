#!/usr/bin/env bash
# Runs every fuzz target for SECONDS (default 60) on its committed corpus, with the limits the
# project promises: no input over 1 s, no allocation over 512 MiB. Needs the nightly toolchain
# and cargo-fuzz. New corpus entries stay under fuzz/corpus/.
set -euo pipefail
cd "$(dirname "$0")/.."
secs=${1:-60}
for t in decode_csv decode_jsonl config join; do
  echo "== fuzz $t for ${secs}s"
  cargo +nightly fuzz run "$t" "fuzz/corpus/$t" -O -- \
    -max_total_time="$secs" -timeout=1 -rss_limit_mb=512 -malloc_limit_mb=512 -print_final_stats=1 2>&1 \
    | grep -E '^(stat::number_of_executed_units|stat::peak_rss_mb|==|SUMMARY|Done)' || true
  # libFuzzer exits non-zero on a crash, a timeout or an over-limit allocation; grep hides the
  # exit code, so check for the artifact it leaves instead.
  if ls fuzz/artifacts/"$t"/* > /dev/null 2>&1; then
    echo "fuzz $t: failure artifacts in fuzz/artifacts/$t" >&2
    exit 1
  fi
done
