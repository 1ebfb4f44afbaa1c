#!/usr/bin/env bash
# Render one run report and one fade report of the demo to PNG in headless
# Chromium (Debian's package: apt-get install chromium), check that each
# page loads without console errors and that its SVG plots are present.
#
#   bash scripts/render_reports.sh [OUT_DIR]      (default /tmp/packbench-render)
#
# Prints the PNG paths; exits non-zero on a console error or a missing plot.
set -euo pipefail
cd "$(dirname "$0")/.."
out=${1:-/tmp/packbench-render}
mkdir -p "$out"
command -v chromium >/dev/null || { echo "chromium not found: apt-get install chromium" >&2; exit 2; }
cargo run --release -q -- demo --out "$out/demo" >/dev/null
run_report=$(ls -d "$out"/demo/results/FR-L04/*/ | tail -n 1)report.html
fade_report="$out/demo/results/FR-L04/fade.html"
fleet_report="$out/demo/results/fleet.html"
status=0
for page in "$run_report" "$fade_report" "$fleet_report"; do
  name=$(basename "$(dirname "$page")")-$(basename "$page" .html)
  profile=$(mktemp -d)
  log="$out/$name.console.log"
  chromium --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
    --disable-background-networking --disable-component-update --disable-sync \
    --user-data-dir="$profile" --enable-logging=stderr --v=0 \
    --hide-scrollbars --window-size=1100,3400 \
    --screenshot="$out/$name.png" "file://$page" 2>"$log" >/dev/null || true
  rm -rf "$profile"
  svgs=$(grep -o '<svg' "$page" | wc -l)
  errors=$(grep -c 'CONSOLE\|Uncaught' "$log" || true)
  echo "$out/$name.png  svg plots: $svgs  console errors: $errors"
  if [ "$svgs" -lt 1 ] || [ "$errors" -ne 0 ] || [ ! -s "$out/$name.png" ]; then status=1; fi
done
exit $status
