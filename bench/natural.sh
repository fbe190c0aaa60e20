#!/usr/bin/env bash
# The natural workload of the benchmark: bench/natural.sh [natural|medium] [--reps N]
# [--also OTHER_PHASEWISE_BINARY] [--skip chain|kernel|reruns]. Builds phasewise (release) and the
# measures micro-benchmark, makes the peer's environment on first use (as bench/run.sh), then runs
# bench/natural.py. Needs GNU time at /usr/bin/time. Not part of the test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x /usr/bin/time ]; then
  echo "bench: /usr/bin/time missing: apt-get install time" >&2
  exit 2
fi
if [ ! -x bench/out/venv/bin/python ]; then
  python3 -m venv bench/out/venv
  bench/out/venv/bin/pip install -q -r bench/requirements.txt
fi
cargo build --release -q -p phasewise
cargo bench -q -p phasewise-stages --bench measures --no-run
exec bench/out/venv/bin/python bench/natural.py "$@"
