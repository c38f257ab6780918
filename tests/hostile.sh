#!/usr/bin/env bash
# Hostile input against the real daemon.
#
# Builds the release binary, writes the corpus of tests/hostile/make_corpus.py
# (binary and non-UTF-8 files, a 100 MB file, a 10 MB line, 100,000 columns,
# formula cells, CR/LF and Bcc: in series names, shell metacharacters in file
# names, symlinks out of the inbox, a FIFO, 10,000 tiny files) into a
# temporary folder, and starts `slopewarden run` on it under GNU time. Then:
#   1. drops the whole corpus into the inbox at once and waits until only
#      what must be ignored is left;
#   2. writes one file slowly, in pieces cut mid-line, for about 4 s;
#   3. races the daemon: 3 MB files dropped, then deleted 0.3 to 1.2 s later
#      (each must end up stored whole or not at all);
#   4. replaces two files, while the daemon is busy with a larger one, by
#      symlinks to files outside the inbox (those must never be read);
# and checks every expectation of the manifest against the store, the
# archive, quarantine and the inbox (tests/hostile/check_outcomes.py), that no
# message in data/outbox carries an injected header line, that the daemon is
# still up, that `slopewarden verify` passes, that it exits 0 on SIGTERM, and
# that its peak RSS stays under 300 MB. Prints a summary table; exits 1 on
# any failure, saying what failed.
#
# Needs Debian's python3 and time (`apt-get install time`).
#   bash tests/hostile.sh
# Knobs: HOSTILE_TINY (tiny files, default 10000), HOSTILE_BIG_MB (default
# 100, 0 for none), HOSTILE_RSS_MB (default 300), HOSTILE_KEEP=1 keeps the
# temporary folder (about 1.5 GB). The daemon's log, GNU time's report and
# the outcome table are copied to target/hostile-last/ in any case.
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$(pwd)
PY=/usr/bin/python3
TIME=/usr/bin/time
TINY=${HOSTILE_TINY:-10000}
BIG_MB=${HOSTILE_BIG_MB:-100}
RSS_LIMIT_MB=${HOSTILE_RSS_MB:-300}
for tool in "$PY" "$TIME"; do
  if [ ! -x "$tool" ]; then
    echo "hostile.sh: $tool is missing (apt-get install python3 time)" >&2
    exit 2
  fi
done

started=$(date +%s)
phase_start=$started
phases=()
phase() { # phase NAME: closes the running phase under NAME
  local now
  now=$(date +%s)
  phases+=("$(printf '%-34s %4d s' "$1" $((now - phase_start)))")
  phase_start=$now
}
failures=()
fail() { failures+=("$1"); echo "hostile.sh: FAIL: $1" >&2; }

echo "hostile.sh: building the release binary" >&2
cargo build --release --locked --quiet
BIN=$ROOT/target/release/slopewarden
phase "build"

SITE=$(mktemp -d "${TMPDIR:-/tmp}/slopewarden-hostile.XXXXXX")
DAEMON_PID=""
TIME_PID=""
ARTIFACTS=$ROOT/target/hostile-last
cleanup() {
  if [ -n "$DAEMON_PID" ] && kill -0 "$DAEMON_PID" 2>/dev/null; then
    kill -TERM "$DAEMON_PID" 2>/dev/null || true
    wait "$TIME_PID" 2>/dev/null || true
  fi
  # The site holds about 1.5 GB; its logs and the outcome table are kept.
  rm -rf "$ARTIFACTS" && mkdir -p "$ARTIFACTS"
  for f in daemon.log time.txt verify.txt races.json outcomes.txt slopewarden.toml; do
    if [ -f "$SITE/$f" ]; then cp "$SITE/$f" "$ARTIFACTS/"; fi
  done
  if [ "${HOSTILE_KEEP:-0}" = 1 ]; then
    echo "hostile.sh: the run is kept in $SITE" >&2
  else
    rm -rf "$SITE"
  fi
  echo "hostile.sh: logs and the outcome table are in $ARTIFACTS" >&2
}
trap cleanup EXIT
trap 'fail "interrupted"; exit 1' INT TERM

echo "hostile.sh: writing the corpus into $SITE/corpus" >&2
mkdir -p "$SITE/inbox"
"$PY" tests/hostile/make_corpus.py "$SITE/corpus" --inbox "$SITE/inbox" \
  --tiny "$TINY" --big-mb "$BIG_MB"
cat >"$SITE/slopewarden.toml" <<'EOF'
[paths]
inbox = "inbox"
database = "data/slopewarden.sqlite3"
archive = "data/archive"
quarantine = "data/quarantine"

[watch]
settle_seconds = 0.5
rescan_seconds = 2

[mail]
from = "slopewarden@example.net"
to = ["analyst@example.net"]
instance = "hostile-run.example.net"
outbox_dir = "data/outbox"
max_per_hour = 10000
EOF
phase "corpus"

# The daemon runs in the site folder, so a file name run as a command
# would leave SW_PWNED_N there (check_outcomes.py looks).
(cd "$SITE" && exec "$TIME" -v -o "$SITE/time.txt" "$BIN" run --config "$SITE/slopewarden.toml") \
  >"$SITE/daemon.log" 2>&1 &
TIME_PID=$!
for _ in $(seq 1 200); do
  DAEMON_PID=$(cat "/proc/$TIME_PID/task/$TIME_PID/children" 2>/dev/null | awk '{print $1}')
  if [ -n "$DAEMON_PID" ] && grep -q "watching" "$SITE/daemon.log"; then break; fi
  sleep 0.1
done
if [ -z "$DAEMON_PID" ] || ! grep -q "watching" "$SITE/daemon.log"; then
  fail "the daemon did not start watching"; cat "$SITE/daemon.log" >&2; exit 1
fi
echo "hostile.sh: daemon $DAEMON_PID is watching $SITE/inbox" >&2

# Entries of the inbox that are not there to be ignored: prints their count.
pending() {
  "$PY" - "$SITE" <<'EOF'
import json, os, sys
site = sys.argv[1]
manifest = json.load(open(os.path.join(site, "corpus", "manifest.json")))
ignored = {bytes.fromhex(c["name_hex"]) for c in manifest["cases"] if c["expect"] == "ignored"}
print(sum(1 for n in os.listdir(os.path.join(os.fsencode(site), b"inbox")) if n not in ignored))
EOF
}
# wait_empty WHAT TIMEOUT: until only ignored entries are left.
wait_empty() {
  local what=$1 limit=$2 t0 left last=0
  t0=$(date +%s)
  while true; do
    if ! kill -0 "$DAEMON_PID" 2>/dev/null; then
      fail "the daemon exited while taking $what"; tail -20 "$SITE/daemon.log" >&2; exit 1
    fi
    left=$(pending)
    [ "$left" -eq 0 ] && return 0
    if [ $(($(date +%s) - t0)) -ge "$limit" ]; then
      fail "$left inbox entries still waiting after ${limit} s ($what)"; return 1
    fi
    if [ $(($(date +%s) - last)) -ge 15 ]; then
      echo "hostile.sh: $what: $left entries left in the inbox" >&2
      last=$(date +%s)
    fi
    sleep 1
  done
}

# 1. Everything at once: the cases and the tiny files, renamed in.
"$PY" - "$SITE" <<'EOF'
import os, sys
site = os.fsencode(sys.argv[1])
for group in (b"drop", b"tiny"):
    src = os.path.join(site, b"corpus", group)
    for name in sorted(os.listdir(src)):
        os.rename(os.path.join(src, name), os.path.join(site, b"inbox", name))
EOF
phase "drop (rename into the inbox)"
wait_empty "the corpus" 600 || true
phase "corpus taken by the daemon"

# 2. A file still being written: 40 pieces cut mid-line, 0.1 s apart.
"$PY" - "$SITE" <<'EOF'
import os, sys, time
site = sys.argv[1]
data = open(os.path.join(site, "corpus", "late", "slow-writer.csv"), "rb").read()
cuts = [len(data) * k // 40 for k in range(41)]
with open(os.path.join(site, "inbox", "slow-writer.csv"), "wb") as f:
    for a, b in zip(cuts, cuts[1:]):
        f.write(data[a:b])
        f.flush()
        time.sleep(0.1)
EOF
wait_empty "the slowly written file" 60 || true
phase "slowly written file"

# 3. Large files deleted shortly after they appear, the daemon otherwise
# idle, so that the deletion lands before, during or after the read.
"$PY" - "$SITE" >"$SITE/races.json" <<'EOF'
import json, os, sys, time
site = sys.argv[1]
race = os.path.join(site, "corpus", "race")
rounds = []
# The daemon takes a file 0.5 to 0.75 s after it appears (settle time and
# its 0.25 s tick), then reads, parses, stores and moves it.
for name, delay in zip(sorted(os.listdir(race)), [0.3, 0.45, 0.5, 0.55, 0.6, 0.7, 0.85, 1.2]):
    dest = os.path.join(site, "inbox", name)
    os.rename(os.path.join(race, name), dest)
    time.sleep(delay)
    try:
        os.unlink(dest)
        deleted = True
    except FileNotFoundError:
        # The daemon took it first: then it must be stored whole.
        deleted = False
    rounds.append({"name": name, "delay": delay, "deleted": deleted})
    time.sleep(3.0)
json.dump(rounds, sys.stdout)
EOF
phase "deletion races"

# 4. Files replaced by symlinks to files outside the inbox while the daemon
# works: s1 is large, so s3 is read before the swap and moved after it, and
# s4 is read only after it. The outside files must never be read.
"$PY" - "$SITE" <<'EOF'
import os, sys, time
site = sys.argv[1]
swap = os.path.join(site, "corpus", "swap")
names = sorted(os.listdir(swap))
for name in names:
    os.rename(os.path.join(swap, name), os.path.join(site, "inbox", name))
time.sleep(1.5)
for name, target in [("s3-swapped-before-move.csv", "swap-target-move.csv"),
                     ("s4-swapped-before-read.csv", "swap-target-read.csv")]:
    if name not in names:
        continue
    tmp = os.path.join(site, "inbox", ".swap-in-progress")
    os.symlink(os.path.join(site, "corpus", "outside", target), tmp)
    os.rename(tmp, os.path.join(site, "inbox", name))
until = time.time() + 120
while time.time() < until and any(
        os.path.exists(os.path.join(site, "inbox", n)) for n in ("s1-large.csv", "s2-small.csv")):
    time.sleep(0.5)
time.sleep(3)
EOF
phase "symlink swaps"

# Let the sender write the last messages (it passes every 2 s).
"$PY" - "$SITE" <<'EOF'
import os, sqlite3, sys, time
db = os.path.join(sys.argv[1], "data", "slopewarden.sqlite3")
until = time.time() + 120
while time.time() < until:
    c = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    n = c.execute("SELECT COUNT(*) FROM outbox WHERE status = 'pending'").fetchone()[0]
    c.close()
    if n == 0:
        break
    time.sleep(1)
time.sleep(2.5)
EOF
phase "outbox drained"

echo >&2
if ! "$PY" tests/hostile/check_outcomes.py "$SITE" "$SITE/corpus" --races "$SITE/races.json" \
  >"$SITE/outcomes.txt" 2>&1; then
  fail "outcomes differ from the manifest (table above)"
fi
cat "$SITE/outcomes.txt"

if ! kill -0 "$DAEMON_PID" 2>/dev/null; then
  fail "the daemon is no longer running"
fi
if grep -q "panicked" "$SITE/daemon.log"; then
  fail "the daemon log shows a panic: $(grep -m1 panicked "$SITE/daemon.log" | cut -c1-300)"
fi
if ! "$BIN" verify --config "$SITE/slopewarden.toml" >"$SITE/verify.txt" 2>&1; then
  fail "slopewarden verify failed: $(head -5 "$SITE/verify.txt")"
fi
phase "checks and verify"

kill -TERM "$DAEMON_PID"
code=0
wait "$TIME_PID" || code=$?
DAEMON_PID=""
if [ "$code" -ne 0 ]; then
  fail "the daemon exited $code on SIGTERM, expected 0"
fi
rss_kb=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$SITE/time.txt")
rss_mb=$((${rss_kb:-0} / 1024))
if [ -z "$rss_kb" ]; then
  fail "no peak RSS in $SITE/time.txt"
elif [ "$rss_mb" -ge "$RSS_LIMIT_MB" ]; then
  fail "peak RSS ${rss_mb} MB, limit ${RSS_LIMIT_MB} MB"
fi
phase "SIGTERM"

echo
echo "phase                              time"
printf '%s\n' "${phases[@]}"
echo "total                              $(($(date +%s) - started)) s"
echo "peak RSS (GNU time)                ${rss_mb} MB (limit ${RSS_LIMIT_MB} MB)"
echo "daemon exit on SIGTERM             $code"
echo "verify                             $(head -1 "$SITE/verify.txt")"
if [ "${#failures[@]}" -ne 0 ]; then
  echo
  echo "hostile.sh: ${#failures[@]} failure(s):"
  printf '  - %s\n' "${failures[@]}"
  exit 1
fi
echo
echo "hostile.sh: all checks passed"
