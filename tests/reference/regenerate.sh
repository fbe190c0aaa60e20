#!/usr/bin/env bash
# Regenerate every reference fixture into DIR (default: tests/reference/fixtures).
# Each gen_*.py script takes --out DIR and writes DIR/<area>/*.npy + *.json.
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
out=${1:-$here/fixtures}
py=${PYTHON:-python3}
for script in "$here"/gen_*.py; do
  echo "reference: $(basename "$script")"
  "$py" "$script" --out "$out"
done
