#!/usr/bin/env bash
# Every answer Keelson gives on the reference data, for a bit-for-bit
# comparison across a refactor:
#   tools/answers_snapshot.sh BIN OUT_DIR      # then: diff -r BEFORE AFTER
# Fits (JSON) of every reference CSV under several configurations, and the
# open-dataset backtests' summary.json and returns.csv (the provenance's run
# time and the binary's version removed: the only fields that may differ).
set -euo pipefail
bin=$1 out=$2
data=tests/reference/data
mkdir -p "$out"
configs=(
  ""
  "--set method=components --set scaling=sharpe"
  "--set method=components --set scaling=covariance --set components=5 --set kappa=1"
  "--set method=kns-ridge"
  "--set max_weight=0.2 --set max_turnover=0.5 --set cost_bps=10 --set max_gross=3"
  "--set aggregate=bagged --set bootstrap_draws=20 --set seed=7"
  "--set l1_penalty=0.1 --set method=components"
)
for csv in a_main b_wide c_missing d_constant e_spanned; do
  market=()
  head -1 "$data/$csv.csv" | tr ',' '\n' | grep -qx MKT && market=(--market MKT)
  for i in "${!configs[@]}"; do
    # shellcheck disable=SC2086
    "$bin" fit --returns "$data/$csv.csv" "${market[@]}" ${configs[$i]} --format json >"$out/fit-$csv-$i.json" 2>"$out/fit-$csv-$i.err" || echo "exit $?" >>"$out/fit-$csv-$i.err"
  done
done
for i in 0 4; do
  dir="$out/backtest-french-$i"
  # shellcheck disable=SC2086
  "$bin" backtest --returns "$data/french.csv" --market MKT --step 12 --threads 2 ${configs[$i]} --out "$dir" >/dev/null 2>&1
  python3 - "$dir/summary.json" <<'PY'
import json, sys
p = sys.argv[1]
s = json.load(open(p))
def scrub(v):
    if isinstance(v, dict):
        return {k: scrub(x) for k, x in v.items() if k not in ("runTime", "runAt", "startedAt", "finishedAt", "version", "keelsonVersion", "elapsedSeconds", "invocation")}
    if isinstance(v, list):
        return [scrub(x) for x in v]
    return v
json.dump(scrub(s), open(p, "w"), indent=1, sort_keys=True)
PY
  rm -rf "$dir/charts" "$dir/report.html"
done
echo "answers in $out"
