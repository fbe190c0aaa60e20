#!/usr/bin/env python3
"""Benchmark harness for the natural workload: the pipeline a scientist writes, not a tuned one.

    bench/natural.sh                 # 5 subjects x 24 EEG + EOG at 512 Hz x 2 x 50 trials
    bench/natural.sh medium          # 10 subjects x 64 EEG + EOG x 200 trials

The study comes from bench/gen_natural.py (its own generator), the pipeline is
bench/natural.yaml: every stage cached, no stride, all six measures, all pairs, each subject's
`sync` and `norm` exported beside the group table. The numpy peer (bench/peer.py) runs the same
file and writes the same per-subject exports (`--export sync --export norm`, timed).

Sections, printed and written to bench/out/natural-<size>/report.txt and report.json:
1. full chain: phasewise (cold cache, results folder removed, all cores) and the peer in
   alternation, `reps` times each (and a second phasewise binary with `--also`, for before /
   after tables); wall, CPU, peak RSS (GNU time), per-stage seconds; agreement of `norm`;
2. the measures kernel against its floor (stages/benches/measures.rs, one subject's size);
3. reruns with the results folder in place: three baseline-window changes (beside the disk
   floor of what they must write: each subject's norm export written and fsynced by plain
   Python), adding one measure, three runs with nothing to do (medians).
"""

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import time

BENCH = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(BENCH)
sys.path.insert(0, BENCH)

from run import PHASEWISE, Report, agreement, median_stages, timed  # noqa: E402

PYTHON = sys.executable

SIZES = {
    "natural": {"subjects": 5, "channels": 24, "trials": 100, "rate": 512, "reps": 3},
    "medium": {"subjects": 10, "channels": 64, "trials": 200, "rate": 512, "reps": 1},
}
BASELINE_CHANGES = ["norm.window=[-0.4, -0.2]", "norm.window=[-0.45, -0.2]",
                    "norm.window=[-0.35, -0.2]"]
FIVE = "sync.measure=[plv, ppc, pli, wpli, dwpli]"
AGREEMENT_TOL = 1e-4  # as bench/run.py (see BENCHMARKS.md)


def prepare(folder, size, seed=1):
    """The study in folder/data (regenerated only when its size changed) and the pipeline."""
    os.makedirs(folder, exist_ok=True)
    shutil.copy(os.path.join(BENCH, "natural.yaml"), os.path.join(folder, "pipeline.yaml"))
    stamp = os.path.join(folder, "study.json")
    want = {k: size[k] for k in ("subjects", "channels", "trials", "rate")}
    want["seed"] = seed
    if os.path.exists(stamp) and json.load(open(stamp)) == want:
        return
    subprocess.run([PYTHON, os.path.join(BENCH, "gen_natural.py"), "--out",
                    os.path.join(folder, "data")] + [f"--{k}={v}" for k, v in want.items()],
                   check=True, cwd=BENCH)
    json.dump(want, open(stamp, "w"))


def run_pw(binary, folder, sets=(), cold=True, jobs=None):
    """One `phasewise run` of the pipeline; cold = cache and results removed first."""
    cache = os.path.join(folder, "cache")
    if cold:
        shutil.rmtree(cache, ignore_errors=True)
        shutil.rmtree(os.path.join(folder, "results"), ignore_errors=True)
    cmd = [binary, "run", os.path.join(folder, "pipeline.yaml"), "--cache", cache, "-q"]
    if jobs:
        cmd += ["--jobs", str(jobs)]
    for s in sets:
        cmd += ["--set", s]
    wall, rss, cpu = timed(cmd)
    manifest = json.load(open(os.path.join(folder, "results", "manifest.json")))
    stages = {}
    for unit in manifest["units"]:
        stages[unit["stage"]] = stages.get(unit["stage"], 0.0) + float(unit.get("seconds") or 0)
    return {"wall": wall, "rss": rss, "cpu": cpu, "stages": stages,
            "computed": sum(u.get("status") == "computed" for u in manifest["units"]),
            "units": len(manifest["units"]), "disk": disk(folder)}


def disk(folder):
    """Bytes under the cache and the results folder (hard links counted once)."""
    seen, total = set(), {}
    for part in ("cache", "results"):
        n = 0
        for base, _, files in os.walk(os.path.join(folder, part)):
            for f in files:
                st = os.lstat(os.path.join(base, f))
                if (st.st_dev, st.st_ino) in seen:
                    continue
                seen.add((st.st_dev, st.st_ino))
                n += st.st_size
        total[part] = n
    return total


def run_peer(folder):
    out = os.path.join(folder, "peer")
    shutil.rmtree(out, ignore_errors=True)
    timings = os.path.join(folder, "peer-timings.json")
    cmd = [PYTHON, os.path.join(BENCH, "peer.py"), os.path.join(folder, "pipeline.yaml"),
           "--out", out, "--export", "sync", "--export", "norm", "--timings", timings]
    wall, rss, cpu = timed(cmd)
    t = json.load(open(timings))
    return {"wall": wall, "rss": rss, "cpu": cpu, "stages": t["stages"]}


def full_chain(rep, folder, reps, binary, also):
    sides = [("phasewise", binary), ("peer", None)] + ([("before", also)] if also else [])
    runs = {name: [] for name, _ in sides}
    for i in range(reps):
        order = sides if i % 2 == 0 else sides[::-1]
        for name, path in order:
            runs[name].append(run_peer(folder) if path is None else run_pw(path, folder))
        rep.say(f"  rep {i + 1}: " + ", ".join(f"{n} {runs[n][-1]['wall']:.2f} s" for n, _ in sides))
    # The agreement check reads the exports of the last phasewise run of the binary under test.
    if also:
        run_pw(binary, folder)
    med = {n: median_stages(r) for n, r in runs.items()}
    names = list(dict.fromkeys(k for m in med.values() for k in m))
    header = ["stage"] + [n for n, _ in sides]
    rows = [[s] + [f"{med[n][s]:.3f}" if s in med[n] else "-" for n, _ in sides] for s in names]
    summary = {}
    for key, label, fmt in (("wall", "WALL (process)", "{:.2f}"), ("cpu", "CPU user+sys", "{:.2f}"),
                            ("rss", "PEAK RSS MiB", "{:.0f}")):
        vals = {n: (max if key == "rss" else statistics.median)(r[key] for r in runs[n])
                for n, _ in sides}
        summary[key] = vals
        rows.append([label] + [fmt.format(vals[n]) for n, _ in sides])
    rep.say("\nPer-stage seconds, median of reps (phasewise: manifest unit seconds summed over "
            "subjects, which run two at a time; peer: perf_counter; `write` = its exports):")
    rep.table(header, rows)
    pw, peer = summary["wall"]["phasewise"], summary["wall"]["peer"]
    rep.say(f"\nphasewise / peer: wall {pw / peer:.3f} (per rep: "
            + ", ".join(f"{a['wall'] / b['wall']:.3f}" for a, b in zip(runs['phasewise'], runs['peer']))
            + f"; target <= 0.10), peak RSS {summary['rss']['phasewise'] / summary['rss']['peer']:.2f}"
            " (target <= 0.5)")
    if also:
        rep.say("after / before (same rep, alternating): wall "
                + ", ".join(f"{a['wall'] / b['wall']:.3f}" for a, b in zip(runs['phasewise'], runs['before']))
                + "; CPU " + ", ".join(f"{a['cpu'] / b['cpu']:.3f}" for a, b in zip(runs['phasewise'], runs['before'])))
    last = runs["phasewise"][-1]["disk"]
    rep.say(f"On disk after a phasewise run: cache {last['cache'] / 2**30:.2f} GiB, results "
            f"{last['results'] / 2**30:.2f} GiB (hard links counted once)")
    agree = agreement(folder)
    worst = max(list(agree["max_abs_diff"].values()) + list(agree["group_max_abs_diff"].values()))
    ok = worst <= AGREEMENT_TOL and agree["coord_diff"] < 1e-6
    rep.say(f"Agreement over {agree['subjects']} subjects (norm, max |pw − peer|): "
            + ", ".join(f"{m} {v:.2e}" for m, v in agree["max_abs_diff"].items())
            + f"; coords {agree['coord_diff']:.1e}; " + ("AGREE" if ok else "DISAGREE"))
    rep.data["full_chain"] = {"runs": runs, "summary": summary, "agreement": agree, "agree": ok}


def kernel(rep, size):
    """The measures kernel against its floor (stages/benches/measures.rs)."""
    env = dict(os.environ, MEASURES_CHANNELS=str(size["channels"]),
               MEASURES_TRIALS=str(size["trials"] // 2))
    out = subprocess.run(["cargo", "bench", "-q", "-p", "phasewise-stages", "--bench", "measures"],
                         cwd=ROOT, check=True, capture_output=True, text=True, env=env).stdout
    rep.say("\nMeasures kernel (cargo bench -p phasewise-stages --bench measures):")
    for line in out.strip().splitlines():
        rep.say("  " + line)
    rep.data["kernel"] = out


def reruns(rep, folder, binary):
    full = run_pw(binary, folder)
    changed = [run_pw(binary, folder, [c], cold=False) for c in BASELINE_CHANGES]
    noops = [run_pw(binary, folder, [BASELINE_CHANGES[-1]], cold=False) for _ in range(3)]
    five = run_pw(binary, folder, [FIVE])
    six = run_pw(binary, folder, cold=False)
    med = statistics.median(r["wall"] for r in changed)
    noop = statistics.median(r["wall"] for r in noops)
    rep.say(f"\nReruns (results folder in place): full cold {full['wall']:.2f} s; after a "
            f"baseline-window change: median {med:.3f} s = {100 * med / full['wall']:.1f} % of "
            f"full (target <= 5 %; " + ", ".join(f"{r['wall']:.3f}" for r in changed)
            + f" s; {'/'.join(str(r['computed']) for r in changed)} of {full['units']} units "
            f"computed); no-op: median {noop:.3f} s (target < 0.3 s; "
            + ", ".join(f"{r['wall']:.3f}" for r in noops) + " s)")
    floor = write_floor(folder, "norm")
    if not floor["bytes"]:
        raise SystemExit("bench: no results/<subject>/norm.npy to time the rerun's disk floor "
                         "against; the pipeline must export `norm`")
    rep.say(f"Disk floor of that rerun: writing and fsyncing the bytes it must make durable (each "
            f"subject's norm export, {floor['bytes'] / 2**30:.2f} GiB, rewritten by Python with "
            f"os.fsync) takes {floor['seconds']:.3f} s = {100 * floor['seconds'] / full['wall']:.1f} % "
            f"of full; the rerun is {med / floor['seconds']:.2f}x that floor")
    rep.data["rerun_floor"] = floor
    rep.say(f"Adding one measure (icoh) to a cached five-measure run: {six['wall']:.2f} s = "
            f"{100 * six['wall'] / full['wall']:.1f} % of full ({six['computed']} of "
            f"{six['units']} units computed; the five-measure cold run took {five['wall']:.2f} s)")
    rep.data["reruns"] = {"full": full, "changes": changed, "noops": noops, "five": five,
                          "add_measure": six}


def write_floor(folder, stage):
    """Seconds that writing and fsyncing every subject's `stage` export takes with plain Python:
    each file is read into memory first (not timed), then written to a new file beside the cache
    and fsynced (timed), then removed; the fastest of three passes over all of them (the first
    pass on a virtual machine may write into memory its host took back, see BENCHMARKS.md). About
    what a rerun that must make those bytes durable costs on this disk: one file after another
    here, where the runner overlaps them with its work, so a rerun can come in a little under."""
    passes = [write_pass(folder, stage) for _ in range(3)]
    return min(passes, key=lambda p: p["seconds"])


def write_pass(folder, stage):
    scratch = os.path.join(folder, "floor")
    shutil.rmtree(scratch, ignore_errors=True)
    os.makedirs(scratch)
    seconds, total = 0.0, 0
    results = os.path.join(folder, "results")
    for subject in sorted(os.listdir(results)):
        path = os.path.join(results, subject, f"{stage}.npy")
        if not os.path.isfile(path):
            continue
        with open(path, "rb") as fh:
            data = fh.read()
        target = os.path.join(scratch, f"{subject}.npy")
        start = time.perf_counter()
        with open(target, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        seconds += time.perf_counter() - start
        total += len(data)
        os.remove(target)
    shutil.rmtree(scratch, ignore_errors=True)
    return {"seconds": seconds, "bytes": total}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("size", choices=sorted(SIZES), nargs="?", default="natural")
    ap.add_argument("--reps", type=int)
    ap.add_argument("--phasewise", default=PHASEWISE)
    ap.add_argument("--also", help="a second phasewise binary run in the same alternation")
    ap.add_argument("--skip", action="append", default=[], choices=["chain", "kernel", "reruns"])
    ap.add_argument("--subjects", type=int,
                    help="fewer subjects than the size's (the medium study's exports alone take "
                         "about 34 GB for 10 subjects: 1.7 GB of sync and of norm per subject; "
                         "the reruns add 1.7 GB of norm per subject for each of their "
                         f"{len(BASELINE_CHANGES)} baseline windows)")
    args = ap.parse_args()
    size = dict(SIZES[args.size])
    if args.subjects:
        size["subjects"] = args.subjects
    folder = os.path.join(BENCH, "out", f"natural-{args.size}")
    rep = Report()
    started = time.perf_counter()
    rep.say(f"phasewise natural benchmark, {args.size}: {size['subjects']} subjects x "
            f"{size['channels']} EEG + 1 EOG x {size['trials']} trials (2 conditions) at "
            f"{size['rate']} Hz, bench/natural.yaml; {os.cpu_count()} CPUs; "
            f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    prepare(folder, size)
    if "chain" not in args.skip:
        full_chain(rep, folder, args.reps or size["reps"], args.phasewise, args.also)
    if "kernel" not in args.skip:
        kernel(rep, size)
    if "reruns" not in args.skip:
        reruns(rep, folder, args.phasewise)
    rep.say(f"\nHarness finished in {time.perf_counter() - started:.0f} s")
    with open(os.path.join(folder, "report.json"), "w") as fh:
        json.dump(rep.data, fh, indent=1, sort_keys=True, default=str)
    with open(os.path.join(folder, "report.txt"), "w") as fh:
        fh.write("\n".join(rep.lines) + "\n")


if __name__ == "__main__":
    main()
