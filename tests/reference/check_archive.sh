#!/usr/bin/env bash
# The archive bundle (`phasewise archive`, DESIGN §6) checked by outside validators, pinned in
# tests/reference/requirements-archive.txt: the BIDS validator (bids-validator-deno) must report
# no error, the RO-Crate validator (roc-validator, profile ro-crate-1.1, REQUIRED level) must
# pass, and ro-crate-py must load the crate with every file listed and its sha256 matching.
#
# Usage: tests/reference/check_archive.sh [MANIFEST]   (default results/demo/manifest.json,
# the demo run's). PHASEWISE names the binary (default: the release build in
# $CARGO_TARGET_DIR or target/); VENV an existing virtual environment with the pinned
# validators (default: a fresh one). Nothing here reaches the web: the RO-Crate 1.1 JSON-LD
# context the validator asks for is answered from the copy ro-crate-py ships (check_crate.py).
set -euo pipefail
cd "$(dirname "$0")/../.."
manifest=${1:-results/demo/manifest.json}
phasewise=${PHASEWISE:-${CARGO_TARGET_DIR:-target}/release/phasewise}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

venv=${VENV:-}
if [ -z "$venv" ]; then
  venv=$work/venv
  python3 -m venv "$venv"
  "$venv/bin/pip" install --quiet -r tests/reference/requirements-archive.txt
fi

bundle=$work/bundle
"$phasewise" archive "$manifest" --out "$bundle" --license CC-BY-4.0 \
  --author "Ada Example" --author "Ben Example"

echo "-- bids-validator-deno $("$venv/bin/bids-validator-deno" --version 2>&1 | tr -d '\n')"
NO_COLOR=1 "$venv/bin/bids-validator-deno" "$bundle" || true
NO_COLOR=1 "$venv/bin/bids-validator-deno" "$bundle" --format json > "$work/bids.json" || true
"$venv/bin/python" - "$work/bids.json" <<'PY'
import json, sys
issues = json.load(open(sys.argv[1]))["issues"]["issues"]
errors = [i for i in issues if i["severity"] == "error"]
for i in errors:
    print(f"BIDS error {i['code']}: {i.get('location')}")
print(f"BIDS validator: {len(errors)} errors, {len(issues) - len(errors)} warnings")
sys.exit(1 if errors else 0)
PY

echo "-- roc-validator $("$venv/bin/rocrate-validator" --version 2>&1 | tr -d '\n')"
"$venv/bin/python" tests/reference/check_crate.py seed "$work/http-cache"
"$venv/bin/rocrate-validator" -y --disable-color validate --no-paging \
  --profile-identifier ro-crate-1.1 --offline --cache-path "$work/http-cache" "$bundle"

echo "-- ro-crate-py"
"$venv/bin/python" tests/reference/check_crate.py load "$bundle"
echo "archive bundle: BIDS and RO-Crate checks passed"
