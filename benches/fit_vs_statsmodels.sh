#!/usr/bin/env bash
# `slopewarden fit` (human output) against statsmodels on the same CSV files,
# timed side by side in one run.
#
# The peer is what an analyst would otherwise run:
#   pandas.read_csv + statsmodels OLS + OLSInfluence(...).summary_frame()
# statsmodels 0.13.5 computes the studentized residuals and DFBETAS in that
# frame with a leave-one-observation-out loop (n refits), so its time grows
# like n²; at large n it is stopped at PEER_CAP seconds and the ratio is
# reported as a lower bound.
#
# Needs Debian's python3-statsmodels and python3-pandas (/usr/bin/python3).
# Usage: benches/fit_vs_statsmodels.sh [SIZES...]   (default: 10000 1000000)
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PY:-/usr/bin/python3}
PEER_CAP=${PEER_CAP:-600}
SIZES=("${@:-10000 1000000}")
read -r -a SIZES <<<"${SIZES[*]}"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

cargo build --release --quiet
bin=target/release/slopewarden

now() { date +%s.%N; }

printf '%-9s %14s %14s %10s\n' n slopewarden_s statsmodels_s ratio
for n in "${SIZES[@]}"; do
  csv="$work/series-$n.csv"
  "$PY" - "$n" "$csv" <<'PYEOF'
import random, sys
n, path = int(sys.argv[1]), sys.argv[2]
rnd = random.Random(7)
with open(path, "w") as f:
    f.write("x,y\n")
    for i in range(n):
        t = 1990 + i / 52.0 + rnd.uniform(-0.01, 0.01)
        f.write(f"{t:.5f},{12 - 0.03 * (t - 1990) + rnd.gauss(0, 1):.4f}\n")
PYEOF
  t0=$(now); "$bin" fit "$csv" >/dev/null; t1=$(now)
  ours=$(echo "$t1 - $t0" | bc -l)
  t0=$(now)
  set +e
  timeout "$PEER_CAP" "$PY" - "$csv" <<'PYEOF'
import sys
import pandas as pd
import statsmodels.api as sm
from statsmodels.stats.outliers_influence import OLSInfluence
df = pd.read_csv(sys.argv[1])
res = sm.OLS(df["y"], sm.add_constant(df["x"])).fit()
frame = OLSInfluence(res).summary_frame()
print(res.summary(), file=open("/dev/null", "w"))
print(len(frame), file=open("/dev/null", "w"))
PYEOF
  rc=$?
  set -e
  t1=$(now)
  peer=$(echo "$t1 - $t0" | bc -l)
  if [ "$rc" -eq 124 ]; then
    printf '%-9s %14.3f %13s+ %9s+\n' "$n" "$ours" "$PEER_CAP" "$(echo "$PEER_CAP / $ours" | bc -l | xargs printf '%.0f')"
  else
    printf '%-9s %14.3f %14.3f %10.1f\n' "$n" "$ours" "$peer" "$(echo "$peer / $ours" | bc -l)"
  fi
done
