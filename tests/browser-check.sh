#!/usr/bin/env bash
# Opens a phasewise HTML report in headless Chromium (Debian's `chromium` package), fails when
# the browser logs any console message or resource error, and writes a screenshot.
#
#   tests/browser-check.sh REPORT.html [SCREENSHOT.png]
#
# The report has no scripts and loads nothing from outside, so any console line is a defect.
# The screenshot defaults to REPORT's folder (report-screenshot.png); keep it out of git
# (results/ and tmp/ are ignored). To check the demo: `phasewise run pipelines/demo.yaml`
# with `report: true` (or `phasewise report pipelines/demo.yaml`), then pass the report path.
# Without a demo run, the synthetic report of tests/it/report.rs can be kept and checked:
#   PHASEWISE_REPORT_KEEP=tmp/report cargo test --test report report_has_every_section
#   tests/browser-check.sh tmp/report/report.html
set -euo pipefail

report=${1:?usage: tests/browser-check.sh REPORT.html [SCREENSHOT.png]}
[ -f "$report" ] || { echo "browser-check: no report at $report" >&2; exit 2; }
report=$(cd "$(dirname "$report")" && pwd)/$(basename "$report")
shot=${2:-$(dirname "$report")/report-screenshot.png}

browser=$(command -v chromium || command -v chromium-browser || true)
if [ -z "$browser" ] && [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
    echo "browser-check: installing Debian's chromium" >&2
    apt-get update -qq >/dev/null && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
    browser=$(command -v chromium || true)
fi
[ -n "$browser" ] || { echo "browser-check: chromium is not installed" >&2; exit 2; }

profile=$(mktemp -d)
log=$(mktemp)
trap 'rm -rf "$profile" "$log"' EXIT
rm -f "$shot"

timeout 180 "$browser" --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
    --disable-background-networking --disable-component-update --disable-sync \
    --user-data-dir="$profile" --window-size=1280,4000 --enable-logging=stderr --v=0 \
    --screenshot="$shot" "file://$report" >"$log" 2>&1 || {
    cat "$log" >&2
    echo "browser-check: chromium failed" >&2
    exit 1
}

# Console messages and failed loads of the page itself (not the browser's own start-up noise).
problems=$(grep -E 'CONSOLE|Uncaught|Failed to load resource|Not allowed to load local resource|ERR_FILE_NOT_FOUND' "$log" || true)
if [ -n "$problems" ]; then
    echo "browser-check: the page logged problems:" >&2
    echo "$problems" >&2
    exit 1
fi
# A PNG starts with the 8-byte signature 89 50 4E 47 0D 0A 1A 0A (PNG specification).
if [ ! -s "$shot" ] || [ "$(head -c 8 "$shot" | od -An -tx1 | tr -d ' \n')" != "89504e470d0a1a0a" ]; then
    cat "$log" >&2
    echo "browser-check: no screenshot was written" >&2
    exit 1
fi
echo "browser-check: ok, no console messages; screenshot $shot"
