#!/usr/bin/env bash
# Regenerates docs/demo-alert-chart.png, the chart shown in the README: it
# runs `slopewarden demo` and takes the PNG chart out of the message about
# the planted decimal slip (record AB-MW2-NIT-2024Q1). Needs python3.
set -euo pipefail
cd "$(dirname "$0")/.."
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
cargo run --release --quiet -- demo --dir "$work/demo" >/dev/null
eml=$(grep -l "AB-MW2-NIT-2024Q1" "$work"/demo/data/outbox/*.eml | head -1)
python3 - "$eml" docs/demo-alert-chart.png <<'PY'
import email, sys
msg = email.message_from_binary_file(open(sys.argv[1], "rb"))
for part in msg.walk():
    if part.get_content_type() == "image/png":
        open(sys.argv[2], "wb").write(part.get_payload(decode=True))
        print("wrote", sys.argv[2])
        break
else:
    sys.exit("no chart in " + sys.argv[1])
PY
