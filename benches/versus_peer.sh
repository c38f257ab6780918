#!/usr/bin/env bash
# Speed side by side in one run, as ratios, on the same inboxes:
#   slopewarden ingest  (parse, validate, refit, diagnostics, findings, audit,
#                        one durable transaction per file)
#   peer_refit.py       (../shared/bench: statsmodels OLS + OLSInfluence refit
#                        from scratch per arrival, as an analyst would script it)
#   bare insert         (benches/bare_insert.rs: the same rows into SQLite,
#                        one transaction per file, nothing else)
# Part 1: the workload generator's defaults (200 series x 200 points, 50
#         records per file): the time per arrival (file) and per record.
# Part 2: how the ratios grow with series length: 2 series, 100 arrivals,
#         n = 100, 1,000, 10,000, 100,000 points per series.
# At n = 100,000 the statsmodels peer would run for hours (its influence
# measures grow faster than n: 4 s per arrival at n = 10,000 here), so that
# row uses the peer's closed-form numpy engine (`--engine numpy`, the
# fastest Python peer) unless PEER_ALL=1.
# Needs Debian's python3-numpy, -scipy, -statsmodels, -pandas.
# Usage: benches/versus_peer.sh [MAX_N]   (MAX_N default 100000)
set -euo pipefail
cd "$(dirname "$0")/.."
SHARED=${SHARED:-../shared}
MAX_N=${1:-100000}
PY=/usr/bin/python3
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

cargo build --release --quiet
cargo bench --bench bare_insert --no-run --quiet 2>/dev/null || true
bare_bin=$(ls -t target/release/deps/bare_insert-* | grep -v '\.d$' | head -1)

now() { date +%s.%N; }

# run_one NAME SERIES POINTS BATCH ENGINE -> prints one result line
run_one() {
  local name=$1 series=$2 points=$3 batch=$4 engine=${5:-statsmodels}
  local w="$work/$name"
  $PY "$SHARED/bench/make_workload.py" --out "$w" --series "$series" \
    --points-per-series "$points" --batch "$batch" --seed 5 --quiet >/dev/null
  local files records
  files=$(ls "$w/inbox" | wc -l)
  records=$(cat "$w"/inbox/*.csv | grep -vc '^record_id')
  printf '[paths]\ninbox = "inbox"\ndatabase = "sw.sqlite3"\n[watch]\nkeep_files = true\n' >"$w/sw.toml"
  local t0 t1 sw
  t0=$(now)
  target/release/slopewarden ingest --config "$w/sw.toml" "$w/inbox" >/dev/null 2>"$w/sw.err"
  t1=$(now)
  sw=$($PY -c "print($t1 - $t0)")
  local bare
  bare=$("$bare_bin" "$w/inbox" "$w/bare.sqlite3" | sed -E 's/.*seconds=([0-9.]+).*/\1/')
  $PY "$SHARED/bench/peer_refit.py" --inbox "$w/inbox" --out "$w/peer" --engine "$engine" \
    --quiet >/dev/null 2>&1
  local peer
  peer=$($PY -c "import json;print(json.load(open('$w/peer/timing.json'))['total_seconds'])")
  $PY - "$name ($engine peer)" "$series" "$points" "$files" "$records" "$sw" "$peer" "$bare" <<'PY'
import sys
name, series, points, files, records = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]), int(sys.argv[5])
sw, peer, bare = float(sys.argv[6]), float(sys.argv[7]), float(sys.argv[8])
ratio = peer / sw
ratio_text = f"{ratio:,.0f}" if ratio >= 10 else f"{ratio:.2g}"
print(f"| {name} | {series} x {points} | {files} | {records} | "
      f"{1000*sw/files:.2f} | {1000*peer/files:.1f} | {1000*bare/files:.2f} | "
      f"{ratio_text} x | {sw/bare:.1f} x |")
PY
}

echo "| workload | series x points | arrivals (files) | records | slopewarden ms/arrival | peer ms/arrival | bare insert ms/arrival | peer / slopewarden | slopewarden / bare |"
echo "|---|---|---|---|---|---|---|---|---|"
run_one defaults 200 200 50
for n in 100 1000 10000 100000; do
  [ "$n" -le "$MAX_N" ] || continue
  engine=statsmodels
  if [ "$n" -ge 100000 ] && [ "${PEER_ALL:-0}" != 1 ]; then engine=numpy; fi
  run_one "n=$n" 2 "$n" $((2 * n / 100)) "$engine"
done
# The numpy peer at n = 10,000 too, to link the two engines.
if [ 10000 -le "$MAX_N" ]; then
  run_one "n=10000" 2 10000 200 numpy
fi
