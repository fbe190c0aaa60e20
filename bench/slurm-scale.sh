#!/usr/bin/env bash
# bench/slurm-scale.sh N [N ...]: a simulated study of N subjects (`phasewise simulate`, the demo
# pipeline) submitted to the running Slurm with `submit --wait`, for each N; prints the wall time
# from submission to the merged manifest and checks that every subject is done and that there is
# one manifest with every unit computed. Not part of CI (it measures, it does not test).
#
# Slurm: a one-node cluster (../shared/tools/slurm-single-node.sh start, as root). To let more
# tasks run at once than the machine has cores, restart it with SLURM_NODE_CPUS raised, e.g.
#   SLURM_NODE_CPUS=8 ../shared/tools/slurm-single-node.sh stop
#   SLURM_NODE_CPUS=8 ../shared/tools/slurm-single-node.sh start
# The binary: $PHASEWISE, else target/portable/phasewise, else target/release/phasewise.
# Work folder: $SCALE_DIR (default bench/out/slurm-scale; it must be visible to the nodes).
set -euo pipefail
repo=$(cd "$(dirname "$0")/.." && pwd)
bin=${PHASEWISE:-}
if [ -z "$bin" ]; then
  for b in "$repo/target/portable/phasewise" "$repo/target/release/phasewise"; do
    if [ -x "$b" ]; then bin=$b; break; fi
  done
fi
[ -n "$bin" ] || { echo "no phasewise binary: set PHASEWISE or build one" >&2; exit 2; }
[ $# -gt 0 ] || { echo "usage: $0 N [N ...]" >&2; exit 2; }
work=${SCALE_DIR:-$repo/bench/out/slurm-scale}
cpus=$(sinfo -h -o %c | head -n 1)
echo "phasewise: $bin; Slurm node CPUs: $cpus; machine cores: $(nproc)"
for n in "$@"; do
  d="$work/n$n"
  rm -rf "$d"; mkdir -p "$d"
  "$bin" simulate --out "$d/data" --subjects "$n" >/dev/null
  sed 's#\.\./demo-data/#data/#; s#\.\./results/demo#results#' "$repo/pipelines/demo.yaml" >"$d/pipeline.yaml"
  t0=$(date +%s.%N)
  "$bin" submit "$d/pipeline.yaml" --cache "$d/cache" --cpus 1 --wait >"$d/submit.log" 2>&1 \
    || { cat "$d/submit.log" >&2; echo "n=$n: submit --wait failed" >&2; exit 1; }
  t1=$(date +%s.%N)
  python3 - "$d/results/manifest.json" "$n" <<'PY'
import json, sys
m = json.load(open(sys.argv[1]))
n = int(sys.argv[2])
subjects = {u["subject"] for u in m["units"] if u["subject"] is not None}
assert len(subjects) == n, f"{len(subjects)} subjects in the manifest, expected {n}"
assert all(u["status"] == "computed" for u in m["units"]), "a unit was not computed"
PY
  printf 'n=%d subjects: every subject done, one manifest; wall %.1f s (submit to merged manifest)\n' \
    "$n" "$(echo "$t1 - $t0" | bc -l)"
done
