#!/usr/bin/env bash
# Ingest speed side by side in one run, on a workload from
# ../shared/bench/make_workload.py (an invented scenario):
#   1. a bare SQLite insert of the same rows (benches/bare_insert.rs), and
#      the same rows in the shape of slopewarden's records table (its
#      `records` mode: what the row shape alone costs), in a narrower
#      hypothetical shape (its `lean` mode), as the fewest rows the
#      store's requirements allow (its `floor` mode), and that content
#      packed in a row per file and series (its `packed` mode),
#   2. `slopewarden ingest` over the same inbox (parse, validate, refit,
#      diagnostics, audit, commit per file), with its peak RSS.
# Usage: benches/ingest.sh [SERIES] [POINTS_PER_SERIES] [BATCH]
#        (default 1000 1000 1000: 1,000,000 records in 1,000 files)
# ERRORS=0 benches/ingest.sh generates the stream without injected entry
# errors or planted extremes (the workload's defaults are 3 % and 0.5 %).
# RUNS=N (default 3) runs the bare insert and slopewarden N times each,
# alternating, on the same inbox, and reports the median of each and of
# their ratio pair by pair: on a shared VM one run of either swings by tens
# of percent.
set -euo pipefail
cd "$(dirname "$0")/.."
SERIES=${1:-1000}
POINTS=${2:-1000}
BATCH=${3:-1000}
RUNS=${RUNS:-3}
SHARED=${SHARED:-../shared}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

# CPU time the hypervisor gave to others while a phase ran (steal, from
# /proc/stat): on a shared VM it swings wall-clock figures by tens of
# percent, so each figure is printed with it.
cpu_line() { head -1 /proc/stat; }
steal_since() {
  python3 - "$1" "$(cpu_line)" <<'STEAL'
import sys
a = [int(v) for v in sys.argv[1].split()[1:]]
b = [int(v) for v in sys.argv[2].split()[1:]]
d = [y - x for x, y in zip(a, b)]
total = sum(d[:8]) or 1
print(f"{100 * d[7] / total:.0f} %")
STEAL
}

python3 "$SHARED/bench/make_workload.py" --out "$work/w" --series "$SERIES" \
  --points-per-series "$POINTS" --batch "$BATCH" --seed 3 \
  ${ERRORS:+--error-rate "$ERRORS" --extreme-rate "$ERRORS"} >/dev/null
files=$(ls "$work/w/inbox" | wc -l)
echo "workload: $SERIES series x $POINTS points, $files files"

cargo build --release --quiet
cargo bench --bench bare_insert --no-run --quiet 2>/dev/null || true
bare_bin=$(ls -t target/release/deps/bare_insert-* | grep -v '\.d$' | head -1)

# One bare insert and one slopewarden ingest, each into a fresh database,
# each after a sync: the kernel's writeback of what ran before (the
# workload, the shapes above, the other side's database) would otherwise
# compete with the run's own fsyncs.
bare_run() {
  rm -f "$work"/bare.sqlite3*
  sync
  local t0 out
  t0=$(cpu_line)
  out=$("$bare_bin" "$work/w/inbox" "$work/bare.sqlite3")
  echo "$out (steal $(steal_since "$t0"))" >&2
  echo "$out" | sed -E 's/.*seconds=([0-9.]+).*/\1/'
}
# The same rows in the shape of slopewarden's records table, nothing
# computed: what the row shape alone costs against the bare insert.
shape_out=$("$bare_bin" "$work/w/inbox" "$work/shape.sqlite3" records)
echo "$shape_out"
shape_s=$(echo "$shape_out" | sed -E 's/.*seconds=([0-9.]+).*/\1/')
rm -f "$work"/shape.sqlite3*
# A hypothetical narrow record row (no diagnostics, no raw line, the same
# unique index): the floor any narrower schema could reach.
lean_out=$("$bare_bin" "$work/w/inbox" "$work/lean.sqlite3" lean)
echo "$lean_out"
lean_s=$(echo "$lean_out" | sed -E 's/.*seconds=([0-9.]+).*/\1/')
rm -f "$work"/lean.sqlite3*
# The fewest rows the store's requirements allow (a source file row, an
# audit entry, each record with its provenance and diagnostics, a fit row
# per touched series), nothing computed: the floor of a schema with a row per record.
floor_out=$("$bare_bin" "$work/w/inbox" "$work/floor.sqlite3" floor)
echo "$floor_out"
floor_s=$(echo "$floor_out" | sed -E 's/.*seconds=([0-9.]+).*/\1/')
rm -f "$work"/floor.sqlite3*
# The same content packed: a file's records of one series in one row, and
# a narrow row per record id: what storing records in batches would save.
packed_out=$("$bare_bin" "$work/w/inbox" "$work/packed.sqlite3" packed)
echo "$packed_out"
packed_s=$(echo "$packed_out" | sed -E 's/.*seconds=([0-9.]+).*/\1/')
rm -f "$work"/packed.sqlite3*

cat > "$work/sw.toml" <<TOML
[paths]
inbox = "w/inbox"
database = "sw.sqlite3"
[watch]
keep_files = true
TOML
sw_run() {
  rm -f "$work"/sw.sqlite3*
  sync
  local t0
  t0=$(cpu_line)
  /usr/bin/time -v target/release/slopewarden ingest --config "$work/sw.toml" "$work/w/inbox" \
    >"$work/sw.out" 2>"$work/sw.err" &
  wait $! || { tail -20 "$work/sw.err" >&2; exit 1; }
  echo "slopewarden ingest: steal $(steal_since "$t0")" >&2
  grep 'Elapsed (wall clock)' "$work/sw.err" | awk '{print $NF}' | awk -F: '{ if (NF==3) print $1*3600+$2*60+$3; else print $1*60+$2 }'
}
bare_all=""
sw_all=""
rss_max=0
for run in $(seq 1 "$RUNS"); do
  bare_all="$bare_all $(bare_run)"
  sw_all="$sw_all $(sw_run)"
  rss_kb=$(grep 'Maximum resident set size' "$work/sw.err" | awk '{print $NF}')
  [ "$rss_kb" -gt "$rss_max" ] && rss_max=$rss_kb
done
records=$(python3 -c "import sqlite3;print(sqlite3.connect('$work/sw.sqlite3').execute('select count(*) from records').fetchone()[0])")
cat "$work/sw.out"
python3 - "$records" "$sw_all" "$bare_all" "$rss_max" "$shape_s" "$lean_s" "$floor_s" "$packed_s" <<'PY'
import statistics, sys
records, rss = int(sys.argv[1]), int(sys.argv[4])
sws = [float(v) for v in sys.argv[2].split()]
bares = [float(v) for v in sys.argv[3].split()]
shape, lean, floor, packed = (float(v) for v in sys.argv[5:9])
for i, (s, b) in enumerate(zip(sws, bares), 1):
    print(f"pair {i}: bare {b:.2f} s, slopewarden {s:.2f} s, ratio {s/b:.2f}")
sw, bare = statistics.median(sws), statistics.median(bares)
ratio = statistics.median(s / b for s, b in zip(sws, bares))
print(f"slopewarden ingest: {records} records in {sw:.2f} s (median of {len(sws)}) = {records/sw:,.0f} records/s; peak RSS {rss/1024:.0f} MB")
print(f"bare SQLite insert: {bare:.2f} s (median); ratio slopewarden / bare = {ratio:.2f} (median of the pairs; {min(s/b for s,b in zip(sws,bares)):.2f}-{max(s/b for s,b in zip(sws,bares)):.2f})")
print(f"records-shaped insert (nothing computed): {shape:.2f} s = {shape/bare:.2f} x bare")
print(f"narrow record rows (no diagnostics, no raw line; nothing computed): {lean:.2f} s = {lean/bare:.2f} x bare")
print(f"fewest rows the requirements allow (records with provenance and diagnostics, fit rows, audit; nothing computed): {floor:.2f} s = {floor/bare:.2f} x bare")
print(f"the same content packed (a row per file and series, a narrow row per record id; nothing computed): {packed:.2f} s = {packed/bare:.2f} x bare")
PY
