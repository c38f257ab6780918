#!/usr/bin/env bash
# The HTTP overview page in a real browser: starts the real daemon with
# [http] listen on a free loopback port, drops invented record files in its
# inbox (a line with a fixed wiggle, one record entered ten times too
# large, and a series named like a script tag), then has Debian's headless
# Chromium load http://127.0.0.1:PORT/ and
#   - take a screenshot -> target/test-artifacts/overview.png (checked: a
#     PNG of more than 10 kB),
#   - dump the DOM it built -> target/test-artifacts/overview-dom.html
#     (checked: the script-named series is a text node, no script element
#     exists, the charts are inline SVG, the slipped record is labelled,
#     the caution is shown).
# The response headers are checked too (CSP, nosniff, no-store), and the
# daemon must exit 0 within 10 s of SIGTERM.
# Exits non-zero on the first failure. Installs Chromium when missing.
set -euo pipefail
cd "$(dirname "$0")/../.."
ROOT=$PWD

fail() {
  echo "overview_screenshot: FAIL: $*" >&2
  if [ -n "${WORK:-}" ] && [ -f "$WORK/daemon.log" ]; then
    echo "--- daemon log (last lines) ---" >&2
    tail -n 20 "$WORK/daemon.log" >&2
  fi
  exit 1
}

# shellcheck source=tests/browser/common.sh
. "$ROOT/tests/browser/common.sh"

WORK=$(mktemp -d)
DAEMON=""
cleanup() {
  # Only the daemon this script started, by its process id.
  if [ -n "$DAEMON" ] && kill -0 "$DAEMON" 2>/dev/null; then
    kill -KILL "$DAEMON" 2>/dev/null || true
    wait "$DAEMON" 2>/dev/null || true
  fi
  rm -rf "$WORK"
}
trap cleanup EXIT

# A loopback port nothing answers on (a connection attempt is refused).
PORT=""
for _ in $(seq 1 20); do
  p=$((20000 + RANDOM % 40000))
  if ! (exec 3<>"/dev/tcp/127.0.0.1/$p") 2>/dev/null; then
    PORT=$p
    break
  fi
done
[ -n "$PORT" ] || fail "no free port found"

mkdir -p "$WORK/inbox"
cat >"$WORK/slopewarden.toml" <<EOF
[paths]
inbox = "inbox"
database = "data/slopewarden.sqlite3"

[watch]
settle_seconds = 0.3
rescan_seconds = 1

[mail]
to = ["analyst@monitoring.example.net"]

[http]
listen = "127.0.0.1:$PORT"
EOF

cd "$WORK"
"$BIN" run --config slopewarden.toml >"$WORK/daemon.log" 2>&1 &
DAEMON=$!

wait_for() { # SECONDS WHAT COMMAND...
  local until=$((SECONDS + $1)) what=$2
  shift 2
  until "$@"; do
    kill -0 "$DAEMON" 2>/dev/null || fail "the daemon exited while waiting for $what"
    [ "$SECONDS" -lt "$until" ] || fail "timed out waiting for $what"
    sleep 0.2
  done
}
wait_for 30 "the daemon to watch and serve" \
  grep -q "HTTP surface listening" "$WORK/daemon.log"
wait_for 30 "the daemon to watch" grep -q "watching" "$WORK/daemon.log"

SCRIPTED='<script>alert(1)</script>'
# 20 quarterly records on 3.0 + 0.15 mg/L a year from 2012 plus a wiggle
# cycling -0.05 .. 0.05; 8 half-yearly records of the script-named series.
awk -v scripted="$SCRIPTED" 'BEGIN {
  print "record_id,series,x,y,unit,sampled_at,note"
  for (i = 0; i < 20; i++) {
    x = 2012 + 0.25 * i
    w = 0.05 * ((i * 3 % 5) - 2) / 2
    printf "FH-%03d,Fernhollow Spring/MW-4/nitrate,%.2f,%.3f,mg/L,,\n", i + 1, x, 3 + 0.15 * (x - 2012) + w
  }
  for (i = 0; i < 8; i++) {
    x = 2014 + 0.5 * i
    w = 0.01 * ((i * 3 % 5) - 2) / 2
    printf "SC-%02d,%s,%.1f,%.3f,mg/L,,\n", i + 1, scripted, x, 1.2 + 0.05 * i + w
  }
}' >"$WORK/a.part"
mv "$WORK/a.part" "$WORK/inbox/a.csv"
wait_for 30 "a.csv to be taken" test ! -e "$WORK/inbox/a.csv"
# The next quarter, ten times too large (3.75 mg/L entered as 37.5).
printf 'record_id,series,x,y,unit,sampled_at,note\nFH-021,Fernhollow Spring/MW-4/nitrate,2017,37.5,mg/L,2017-01-03,\n' \
  >"$WORK/b.part"
mv "$WORK/b.part" "$WORK/inbox/b.csv"
wait_for 30 "b.csv to be taken" test ! -e "$WORK/inbox/b.csv"
slip_found() { "$BIN" findings --config slopewarden.toml --json 2>/dev/null | grep -q '"FH-021"'; }
wait_for 30 "the slipped record's finding" slip_found

# The response head, over a plain TCP connection.
exec 3<>"/dev/tcp/127.0.0.1/$PORT"
printf 'HEAD / HTTP/1.1\r\nHost: 127.0.0.1:%s\r\n\r\n' "$PORT" >&3
head_text=$(tr -d '\r' <&3)
exec 3<&-
grep -q '^HTTP/1.1 200 OK$' <<<"$head_text" || fail "HEAD / did not answer 200: $head_text"
grep -q "^Content-Security-Policy: default-src 'none';" <<<"$head_text" \
  || fail "no Content-Security-Policy forbidding scripts"
grep -q '^X-Content-Type-Options: nosniff$' <<<"$head_text" || fail "no nosniff header"
grep -q '^Cache-Control: no-store$' <<<"$head_text" || fail "no no-store header"
grep -q '^Content-Type: text/html; charset=utf-8$' <<<"$head_text" || fail "wrong Content-Type"

browser() {
  # A fresh profile each time; as root Chromium needs --no-sandbox.
  timeout 120 chromium --headless --no-sandbox --disable-gpu --hide-scrollbars \
    --user-data-dir="$WORK/profile-$1" "${@:2}" 2>"$WORK/chromium-$1.log"
}
URL="http://127.0.0.1:$PORT/"

rm -f "$ART/overview.png" "$ART/overview-dom.html"
browser shot --screenshot="$ART/overview.png" --window-size=1200,2000 "$URL" \
  >/dev/null || fail "chromium --screenshot (log: $(tail -n 3 "$WORK/chromium-shot.log"))"
[ -f "$ART/overview.png" ] || fail "no screenshot written"
size=$(stat -c %s "$ART/overview.png")
[ "$size" -gt 10240 ] || fail "the screenshot is only $size bytes"
[ "$(head -c 8 "$ART/overview.png" | od -An -tx1 | tr -d ' \n')" = 89504e470d0a1a0a ] \
  || fail "the screenshot is not a PNG"

browser dom --dump-dom "$URL" >"$WORK/dom.html" || fail "chromium --dump-dom"
cp "$WORK/dom.html" "$ART/overview-dom.html"
grep -q '</html>' "$WORK/dom.html" || fail "no DOM dumped"
grep -q 'Monitoring overview' "$WORK/dom.html" || fail "not the overview page"
grep -qF '&lt;script&gt;alert(1)&lt;/script&gt;' "$WORK/dom.html" \
  || fail "the script-named series is not shown as text"
if grep -qi '<script' "$WORK/dom.html"; then
  fail "the rendered DOM has a script element"
fi
grep -q '<svg' "$WORK/dom.html" || fail "no inline SVG in the rendered DOM"
grep -q 'class="flag-label"[^>]*>FH-021</text>' "$WORK/dom.html" \
  || fail "the slipped record FH-021 is not labelled on its chart"
grep -q 'not a compliance determination' "$WORK/dom.html" || fail "the caution is missing"

# SIGTERM: the daemon, and with it the server, stops with exit code 0.
kill -TERM "$DAEMON"
for _ in $(seq 1 100); do
  kill -0 "$DAEMON" 2>/dev/null || break
  sleep 0.1
done
kill -0 "$DAEMON" 2>/dev/null && fail "the daemon did not exit within 10 s of SIGTERM"
code=0
wait "$DAEMON" || code=$?
DAEMON=""
[ "$code" = 0 ] || fail "the daemon exited with code $code"
if (exec 3<>"/dev/tcp/127.0.0.1/$PORT") 2>/dev/null; then
  fail "the port still answers after the daemon exited"
fi

echo "overview_screenshot: ok: $ART/overview.png ($size bytes); headers and DOM checked; daemon stopped cleanly"
