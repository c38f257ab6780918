#!/usr/bin/env bash
# The HTML report in a real browser: builds a small store with the real
# binary (invented data: a line with a fixed wiggle, one record entered ten
# times too large, and a series named like a script tag), writes the
# report, then has Debian's headless Chromium
#   - take a screenshot  -> target/test-artifacts/report.png (checked: a PNG
#     of more than 10 kB),
#   - print it to PDF    -> target/test-artifacts/report.pdf (checked: a
#     summary page plus one page or more per series),
#   - dump the DOM it built (checked: the script-named series is a text
#     node, no script element exists, the charts are inline SVG, the
#     flagged record is labelled),
#   - lay it out 1,200 pixels wide inside a test page of its own (the
#     report itself carries no script) and measure it (checked: nothing
#     is wider than the page; a figures table once was).
# Exits non-zero on the first failure. Installs Chromium when missing.
set -euo pipefail
cd "$(dirname "$0")/../.."
ROOT=$PWD

fail() {
  echo "report_screenshot: FAIL: $*" >&2
  exit 1
}

# shellcheck source=tests/browser/common.sh
. "$ROOT/tests/browser/common.sh"

WORK=$(mktemp -d)
trap 'rm -rf "$WORK"' EXIT
mkdir -p "$WORK/inbox"
cat >"$WORK/slopewarden.toml" <<'EOF'
[paths]
inbox = "inbox"
database = "data/slopewarden.sqlite3"

[watch]
keep_files = true
EOF

SCRIPTED='<script>alert(1)</script>'
# 20 quarterly records on 5.0 + 0.2 mg/L a year from 2010 plus a wiggle
# cycling -0.3 .. 0.3; 8 half-yearly records of the script-named series.
awk -v scripted="$SCRIPTED" 'BEGIN {
  print "record_id,series,x,y,unit,sampled_at,note"
  for (i = 0; i < 20; i++) {
    x = 2010 + 0.25 * i
    w = 0.3 * ((i * 7 % 5) - 2) / 2
    printf "QL-%03d,Quarry Lane/MW-3/nitrate,%.2f,%.3f,mg/L,,\n", i + 1, x, 5 + 0.2 * (x - 2010) + w
  }
  for (i = 0; i < 8; i++) {
    x = 2012 + 0.5 * i
    w = 0.03 * ((i * 7 % 5) - 2) / 2
    printf "SC-%02d,%s,%.1f,%.3f,mg/L,,\n", i + 1, scripted, x, 2 + 0.1 * i + w
  }
}' >"$WORK/inbox/a.csv"
# The next quarter, ten times too large.
printf 'record_id,series,x,y,unit,sampled_at,note\nQL-021,Quarry Lane/MW-3/nitrate,2015,60,mg/L,2015-01-02,\n' \
  >"$WORK/inbox/b.csv"

cd "$WORK"
"$BIN" ingest --config slopewarden.toml inbox/a.csv >/dev/null 2>&1 || fail "ingest a.csv"
"$BIN" ingest --config slopewarden.toml inbox/b.csv >/dev/null 2>&1 || fail "ingest b.csv"
"$BIN" findings --config slopewarden.toml --json >"$WORK/findings.json" || fail "findings"
grep -q '"QL-021"' "$WORK/findings.json" || fail "the slipped record raised no finding"
"$BIN" report --config slopewarden.toml --out "$WORK/report.html" >/dev/null \
  || fail "report"
cp "$WORK/report.html" "$ART/report.html"

browser() {
  # A fresh profile each time; as root Chromium needs --no-sandbox.
  timeout 120 chromium --headless --no-sandbox --disable-gpu --hide-scrollbars \
    --user-data-dir="$WORK/profile-$1" "${@:2}" 2>"$WORK/chromium-$1.log"
}

rm -f "$ART/report.png" "$ART/report.pdf"
browser shot --screenshot="$ART/report.png" --window-size=1200,2000 "file://$WORK/report.html" \
  >/dev/null || fail "chromium --screenshot (log: $(tail -n 3 "$WORK/chromium-shot.log"))"
[ -f "$ART/report.png" ] || fail "no screenshot written"
size=$(stat -c %s "$ART/report.png")
[ "$size" -gt 10240 ] || fail "the screenshot is only $size bytes"
[ "$(head -c 8 "$ART/report.png" | od -An -tx1 | tr -d ' \n')" = 89504e470d0a1a0a ] \
  || fail "the screenshot is not a PNG"

browser pdf --print-to-pdf="$ART/report.pdf" --no-pdf-header-footer "file://$WORK/report.html" \
  >/dev/null || fail "chromium --print-to-pdf"
pages=$(grep -a -c '/Type /Page$\|/Type /Page[^s]' "$ART/report.pdf" || true)
# The summary page, then each of the 2 series from a new page.
[ "$pages" -ge 3 ] || fail "the printed report has $pages page(s), expected at least 3"

browser dom --dump-dom "file://$WORK/report.html" >"$WORK/dom.html" \
  || fail "chromium --dump-dom"
grep -q '</html>' "$WORK/dom.html" || fail "no DOM dumped"
grep -qF '&lt;script&gt;alert(1)&lt;/script&gt;' "$WORK/dom.html" \
  || fail "the script-named series is not shown as text"
if grep -qi '<script' "$WORK/dom.html"; then
  fail "the rendered DOM has a script element"
fi
grep -q '<svg' "$WORK/dom.html" || fail "no inline SVG in the rendered DOM"
grep -q 'class="flag-label"[^>]*>QL-021</text>' "$WORK/dom.html" \
  || fail "the flagged record QL-021 is not labelled"

# Laid out at a common laptop width, nothing may stick out sideways: the
# test page frames the report and writes its widths into its own DOM.
cat >"$WORK/measure.html" <<'EOF'
<!doctype html><html><body><p id="out">not measured</p>
<iframe id="f" src="report.html" style="width:1200px;height:900px"></iframe>
<script>
document.getElementById('f').addEventListener('load', function () {
  var d = this.contentDocument.documentElement;
  document.getElementById('out').textContent =
    'widths ' + d.scrollWidth + ' ' + d.clientWidth;
});
</script></body></html>
EOF
browser measure --allow-file-access-from-files --virtual-time-budget=5000 \
  --dump-dom "file://$WORK/measure.html" >"$WORK/measure-dom.html" \
  || fail "chromium --dump-dom of the measuring page"
read -r scroll client < <(grep -o 'widths [0-9]* [0-9]*' "$WORK/measure-dom.html" | cut -d' ' -f2,3) \
  || fail "the report was not measured: $(grep -o 'id="out">[^<]*' "$WORK/measure-dom.html")"
[ "$scroll" -le "$client" ] \
  || fail "the report is $scroll pixels wide in a $client-pixel page: something sticks out sideways"

echo "report_screenshot: ok: $ART/report.png ($size bytes), $pages PDF pages; DOM checked; ${scroll}px wide in ${client}px"
