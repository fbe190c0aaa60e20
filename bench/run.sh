#!/usr/bin/env bash
# The one command of the benchmark: bench/run.sh [quick|medium] [--reps N] [--skip SECTION]
# Builds phasewise (release), the wavelet micro-benchmark and the bare-FFT timer, makes the
# peer's Python environment in bench/out/venv on first use (bench/requirements.txt), then runs
# bench/run.py. Needs GNU time at /usr/bin/time (Debian package `time`) for peak RSS. Not part
# of the test suite.
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
cargo bench -q -p phasewise-stages --bench morlet --no-run
CARGO_TARGET_DIR=bench/out/fft-target cargo build --release -q --manifest-path bench/fft/Cargo.toml
exec bench/out/venv/bin/python bench/run.py "$@"
