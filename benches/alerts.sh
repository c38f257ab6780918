#!/usr/bin/env bash
# Alert quality on a labelled workload from ../shared/bench/make_workload.py
# (an invented scenario), scored by ../shared/bench/score_alerts.py:
# record-level findings (high_leverage, influential, outlier, quarantined,
# conflict) raised on arrival, against the injected entry errors.
# Usage: benches/alerts.sh [SEED] [extra make_workload.py options...]
set -euo pipefail
cd "$(dirname "$0")/.."
SHARED=${SHARED:-../shared}
SEED=${1:-7}
shift || true
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
/usr/bin/python3 "$SHARED/bench/make_workload.py" --out "$work/w" --seed "$SEED" --quiet "$@"
cargo build --release --quiet
cat > "$work/sw.toml" <<TOML
[paths]
inbox = "w/inbox"
database = "sw.sqlite3"
[watch]
keep_files = true
TOML
target/release/slopewarden ingest --config "$work/sw.toml" "$work/w/inbox" >/dev/null 2>&1
target/release/slopewarden findings --config "$work/sw.toml" --json >"$work/findings.json"
/usr/bin/python3 - "$work" <<'PY'
import json, sys, collections
work = sys.argv[1]
f = json.load(open(f"{work}/findings.json"))
record_kinds = {"high_leverage", "influential", "outlier", "quarantined", "conflict"}
ids = sorted({i for x in f if record_kinds & set(x["kinds"]) for i in x["record_ids"]})
open(f"{work}/alerts.txt", "w").write("\n".join(ids) + "\n")
c = collections.Counter(k for x in f for k in x["kinds"])
print("findings by kind:", dict(c))
PY
/usr/bin/python3 "$SHARED/bench/score_alerts.py" "$work/w/labels.csv" "$work/alerts.txt"
# The issue's figures: errors arriving when their series held >= 20 points.
/usr/bin/python3 - "$work" <<'PY'
import csv, sys
work = sys.argv[1]
alerted = set(open(f"{work}/alerts.txt").read().split())
gross = {"decimal_x10", "decimal_div10", "unit_x1000", "sign", "x_typo"}
g = a = gc = ac = 0
for d in csv.DictReader(open(f"{work}/w/details.csv")):
    kind = d["error_kind"]
    if kind in ("", "real_extreme") or int(d["arrival_n"]) < 20:
        continue
    hit = d["record_id"] in alerted
    a += 1; ac += hit
    if kind in gross:
        g += 1; gc += hit
print(f"late errors (series held >= 20 points): gross kinds {gc}/{g} = {100*gc/max(g,1):.1f}%, all kinds {ac}/{a} = {100*ac/max(a,1):.1f}%")
PY
