#!/usr/bin/env python3
"""Benchmark harness: phasewise against its numpy/scipy peer (bench/peer.py) on one workload.

Run through bench/run.sh, which builds what this needs first:

    bench/run.sh quick            # ~2 minutes on a 2-core machine
    bench/run.sh medium           # 10 subjects x 64 channels x 200 trials

Steps, all printed and also written to bench/out/<size>/report.json and report.txt:
1. simulate the study with `phasewise simulate` (the same files feed both sides);
2. full chain, alternating phasewise (cold cache) and the peer, `reps` times each, each process
   under /usr/bin/time -v for its peak RSS; per-stage seconds from phasewise's manifest and from
   the peer's perf_counter timings; the agreement of the two (baseline-corrected measures of
   every subject, and the group means);
3. the wavelet op against the bare FFTs it performs (bench/fft, same sizes, one thread), and
   the naive FFT count for context;
4. reruns on the warm cache: after each of three baseline-window changes, and three times with
   nothing changed (medians);
5. scaling of phasewise's time with trials, channels (pairs) and frequencies (>= 4 sizes each,
   fitted log-log slope) and of its peak RSS with frequencies.
"""

import argparse
import json
import math
import os
import shutil
import statistics
import subprocess
import sys
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BENCH = os.path.join(ROOT, "bench")
# The binary bench/run.sh and bench/natural.sh build: under $CARGO_TARGET_DIR when it is set.
PHASEWISE = os.path.join(os.environ.get("CARGO_TARGET_DIR") or os.path.join(ROOT, "target"),
                         "release", "phasewise")
FFT_BIN = os.path.join(BENCH, "out", "fft-target", "release", "phasewise-bench-fft")
PYTHON = sys.executable
TIME = "/usr/bin/time"

# Workload sizes. `study` goes to `phasewise simulate`; `freqs` to the wavelet's count; scaling
# runs vary one axis of a one-subject study at a time around `base`.
SIZES = {
    "quick": {
        "study": {"subjects": 2, "channels": 19, "trials": 80, "rate": 250},
        "freqs": 12,
        "reps": 2,
        "scaling": {
            "base": {"subjects": 1, "channels": 19, "trials": 80, "rate": 250, "freqs": 12},
            "trials": [40, 80, 160, 320],
            "channels": [8, 16, 32, 48],
            "freqs": [6, 12, 24, 48],
        },
    },
    "medium": {
        "study": {"subjects": 10, "channels": 64, "trials": 200, "rate": 250},
        "freqs": 24,
        "reps": 2,
        "scaling": {
            "base": {"subjects": 1, "channels": 32, "trials": 100, "rate": 250, "freqs": 12},
            "trials": [50, 100, 200, 400],
            "channels": [16, 32, 48, 64],
            "freqs": [6, 12, 24, 48, 96],
        },
    },
}

# The wavelet's frequency range in bench/chain.yaml; only the count changes.
FREQ_RANGE = {"from": 4, "to": 30, "spacing": "log"}
# Baseline-window changes for the rerun measure, each applied after the one before (the
# pipeline's own window is [-0.5, -0.2]); the coefficients are kept every 16 ms, so each change
# moves the window's first kept sample and changes every baseline-corrected value.
BASELINE_CHANGES = ["norm.window=[-0.4, -0.2]", "norm.window=[-0.45, -0.2]",
                    "norm.window=[-0.35, -0.2]"]
AGREEMENT_TOL = 1e-4  # max |phasewise − peer| of baseline-corrected measures (see BENCHMARKS.md)


class Report:
    """Prints lines and keeps them (and structured results) for report.txt / report.json."""

    def __init__(self):
        self.lines, self.data = [], {}

    def say(self, text=""):
        print(text, flush=True)
        self.lines.append(text)

    def table(self, header, rows):
        widths = [max(len(str(r[i])) for r in [header] + rows) for i in range(len(header))]
        for row in [header] + rows:
            self.say("  ".join(str(c).rjust(w) for c, w in zip(row, widths)))


# ---------------------------------------------------------------------------------------------
# Processes


def timed(cmd, cwd=None, env=None):
    """Run cmd under GNU time; return wall seconds, peak RSS (MiB), CPU seconds (user + sys)."""
    start = time.perf_counter()
    proc = subprocess.run([TIME, "-v"] + cmd, cwd=cwd, capture_output=True, text=True,
                          env=dict(os.environ, **(env or {})))
    wall = time.perf_counter() - start
    rss, cpu = None, 0.0
    for line in proc.stderr.splitlines():
        if "Maximum resident set size" in line:
            rss = int(line.split(":")[-1]) / 1024.0
        elif "User time (seconds)" in line or "System time (seconds)" in line:
            cpu += float(line.split(":")[-1])
    if proc.returncode != 0:
        tail = "\n".join(proc.stderr.splitlines()[-25:])
        raise SystemExit(f"command failed ({proc.returncode}): {' '.join(cmd)}\n{tail}")
    return wall, rss, cpu


# What `phasewise simulate` writes (its command line takes only --subjects and --seed).
SIM_CHANNELS, SIM_TRIALS, SIM_RATE = 19, 80, 250


def simulate(folder, study, seed=1):
    """`phasewise simulate` into folder/data, resized by bench/resize.py to the study's EEG
    channels and trials when they differ from the simulator's own (skipped when the same size
    is already there)."""
    data = os.path.join(folder, "data")
    stamp = os.path.join(folder, "study.json")
    want = dict(study, seed=seed)
    # The pipeline is copied every time, so an edit of bench/chain.yaml always takes effect.
    os.makedirs(folder, exist_ok=True)
    shutil.copy(os.path.join(BENCH, "chain.yaml"), os.path.join(folder, "pipeline.yaml"))
    if os.path.exists(stamp) and json.load(open(stamp)) == want:
        return data
    if study["rate"] != SIM_RATE:
        raise SystemExit(f"the simulator writes {SIM_RATE} Hz only; asked for {study['rate']}")
    shutil.rmtree(data, ignore_errors=True)
    raw = data if (study["channels"], study["trials"]) == (SIM_CHANNELS, SIM_TRIALS) else data + "-sim"
    shutil.rmtree(raw, ignore_errors=True)
    subprocess.run([PHASEWISE, "simulate", "--out", raw, "--subjects", str(study["subjects"]),
                    "--seed", str(seed)], check=True, capture_output=True)
    if raw != data:
        subprocess.run([PYTHON, os.path.join(BENCH, "resize.py"), "--src", raw, "--out", data,
                        "--channels", str(study["channels"]), "--trials", str(study["trials"]),
                        "--seed", str(seed)], check=True, capture_output=True)
        shutil.rmtree(raw)
    json.dump(want, open(stamp, "w"))
    return data


def freq_set(count):
    """The --set that gives the wavelet `count` frequencies over the bench range."""
    spec = dict(FREQ_RANGE, count=count)
    inner = ", ".join(f"{k}: {v}" for k, v in spec.items())
    return f"tf.freqs={{{inner}}}"


# The part size of the wavelet's streaming into the clustering op (PART_BYTES in src/parts.rs).
PART_BYTES = 48 << 20


def run_phasewise(folder, sets, cache, fresh=True, jobs=None, pipeline="pipeline.yaml", env=None):
    """One `phasewise run`; returns wall, RSS, CPU and the manifest's per-stage seconds."""
    if fresh:
        shutil.rmtree(cache, ignore_errors=True)
    cmd = [PHASEWISE, "run", os.path.join(folder, pipeline), "--cache", cache, "-q"]
    if jobs:
        cmd += ["--jobs", str(jobs)]
    for s in sets:
        cmd += ["--set", s]
    wall, rss, cpu = timed(cmd, env=env)
    manifest = json.load(open(os.path.join(folder, "results", "manifest.json")))
    stages, computed = {}, 0
    for unit in manifest["units"]:
        stages[unit["stage"]] = stages.get(unit["stage"], 0.0) + float(unit.get("seconds") or 0)
        computed += unit.get("status") == "computed"
    return {"wall": wall, "rss": rss, "cpu": cpu, "stages": stages, "computed": computed,
            "units": len(manifest["units"]), "manifest": manifest}


def run_peer(folder, sets):
    """One peer run; returns wall, RSS and its per-stage seconds."""
    out = os.path.join(folder, "peer")
    shutil.rmtree(out, ignore_errors=True)
    timings = os.path.join(folder, "peer-timings.json")
    cmd = [PYTHON, os.path.join(BENCH, "peer.py"), os.path.join(folder, "pipeline.yaml"),
           "--out", out, "--save", "norm", "--timings", timings]
    for s in sets:
        cmd += ["--set", s]
    wall, rss, cpu = timed(cmd)
    t = json.load(open(timings))
    return {"wall": wall, "rss": rss, "cpu": cpu, "stages": t["stages"], "total": t["total"]}


# ---------------------------------------------------------------------------------------------
# Agreement


def load_phasewise(path):
    """A phasewise output array and its layout sidecar."""
    layout = json.load(open(path[:-4] + ".json"))
    return np.load(path), layout


def coord_values(layout, dim):
    """The coordinate list of `dim` in a phasewise layout sidecar. Format 2 (DESIGN §6, xarray's
    `DataArray.to_dict(data=False)` shape): `coords` maps a name to {"dims", "data", "attrs"}, and
    the pair axis carries `channel_a` and `channel_b` along `pair`, returned here as [a, b] lists.
    Format 1 (a list of coordinates, in the order of `dims`) is still read, for older results."""
    coords = layout["coords"]
    if isinstance(coords, list):
        coord = coords[layout["dims"].index(dim)]
        return coord["values"] if isinstance(coord, dict) else coord
    if dim in coords:
        return coords[dim]["data"]
    along = [name for name, c in sorted(coords.items()) if c.get("dims") == [dim]]
    if dim == "pair" and {"channel_a", "channel_b"} <= set(along):
        return [[a, b] for a, b in zip(coords["channel_a"]["data"], coords["channel_b"]["data"])]
    raise SystemExit(f"sidecar has no coordinate for dim {dim!r} (coords: {sorted(coords)})")


def keyed(values):
    """Coordinates as hashable keys (pairs come as lists)."""
    return [tuple(v) if isinstance(v, list) else v for v in values]


def align(pw, layout, order):
    """phasewise's array with its axes in `order` [(dim, labels or None)], each label axis
    reordered to the given labels (so the peer's order); other dims must be picked out first."""
    arr = np.transpose(pw, [layout["dims"].index(d) for d, _ in order])
    for axis, (dim, labels) in enumerate(order):
        if labels is not None:
            have = keyed(coord_values(layout, dim))
            arr = np.take(arr, [have.index(v) for v in keyed(labels)], axis=axis)
    return arr


def group_mean(pw, layout):
    """The `mean` statistic of the `group` row of phasewise's group array, with its layout
    minus those two axes."""
    dims = layout["dims"]
    stat = coord_values(layout, "statistic").index("mean")
    subj = coord_values(layout, "subject").index("group")
    arr = np.take(np.take(pw, [stat], axis=dims.index("statistic")), [subj],
                  axis=dims.index("subject"))
    arr = arr.squeeze(axis=(dims.index("statistic"), dims.index("subject")))
    keep = [d for d in dims if d not in ("statistic", "subject")]
    return arr, {"dims": keep, "coords": {d: {"dims": [d], "data": coord_values(layout, d)}
                                          for d in keep}}


def group_agreement(folder):
    """Max |phasewise − peer| of the group means, per measure."""
    meta = json.load(open(os.path.join(folder, "peer", "group", "group.json")))
    peer = np.load(os.path.join(folder, "peer", "group", "group.npy"))
    pw, layout = group_mean(*load_phasewise(os.path.join(folder, "results", "group", "group.npy")))
    order = [("condition", meta["conditions"]), ("measure", meta["measures"]),
             ("pair", meta["pairs"]), ("band", meta["bands"]), ("window", meta["windows"])]
    pw = align(pw, layout, order).astype(np.float64)
    return {m: float(np.nanmax(np.abs(pw[:, i] - peer[:, i]))) for i, m in enumerate(meta["measures"])}


def agreement(folder):
    """Max |phasewise − peer| per measure over all subjects (baseline-corrected), and the
    largest coordinate differences, so a mismatch of axes is not mistaken for agreement."""
    peer_dir = os.path.join(folder, "peer")
    res_dir = os.path.join(folder, "results")
    worst, coords, subjects = {}, 0.0, 0
    for subject in sorted(os.listdir(peer_dir)):
        if subject == "group":
            continue
        candidates = [subject, subject.replace("sub-", "")]
        pw_path = next((os.path.join(res_dir, c, "norm.npy") for c in candidates
                        if os.path.exists(os.path.join(res_dir, c, "norm.npy"))), None)
        if pw_path is None:
            raise SystemExit(f"no phasewise output norm.npy for {subject} under {res_dir}")
        meta = json.load(open(os.path.join(peer_dir, subject, "norm.json")))
        peer = np.load(os.path.join(peer_dir, subject, "norm.npy")).astype(np.float64)
        pw, layout = load_phasewise(pw_path)
        pw = align(pw, layout, [("condition", meta["conditions"]), ("measure", meta["measures"]),
                                ("pair", meta["pairs"]), ("freq", None), ("time", None)])
        freqs = np.array(coord_values(layout, "freq"))
        times = np.array(coord_values(layout, "time"))
        if pw.shape != peer.shape:
            raise SystemExit(f"{subject}: shapes differ: phasewise {pw.shape}, peer {peer.shape}")
        coords = max(coords, np.abs(freqs - meta["freqs"]).max(), np.abs(times - meta["times"]).max())
        for mi, m in enumerate(meta["measures"]):
            d = np.abs(pw[:, mi].astype(np.float64) - peer[:, mi])
            both_nan = np.isnan(pw[:, mi]) & np.isnan(peer[:, mi])
            d = np.where(both_nan, 0.0, d)
            worst[m] = max(worst.get(m, 0.0), float(np.nan_to_num(d, nan=np.inf).max()))
        subjects += 1
    return {"max_abs_diff": worst, "coord_diff": float(coords), "subjects": subjects,
            "group_max_abs_diff": group_agreement(folder)}


# ---------------------------------------------------------------------------------------------
# Sections


def median_stages(runs):
    """Per-stage median seconds over repeated runs."""
    names = []
    for r in runs:
        names += [n for n in r["stages"] if n not in names]
    return {n: statistics.median(r["stages"].get(n, 0.0) for r in runs) for n in names}


def full_chain(rep, folder, size, reps):
    """Alternating cold phasewise and peer runs; the table, ratios and the agreement check."""
    sets = [freq_set(size["freqs"])]
    cache = os.path.join(folder, "cache")
    lean = lean_pipeline(folder)
    pw_runs, peer_runs = [], []
    for i in range(reps):
        order = ("pw", "peer") if i % 2 == 0 else ("peer", "pw")
        for side in order:
            if side == "pw":
                pw_runs.append(run_phasewise(folder, sets, cache, pipeline=lean))
            else:
                peer_runs.append(run_peer(folder, sets))
        rep.say(f"  rep {i + 1}: phasewise {pw_runs[-1]['wall']:.2f} s, "
                f"peer {peer_runs[-1]['wall']:.2f} s")
    # Untimed: the same pipeline with `norm` exported, on the warm cache, for the agreement
    # check (the timed runs write only the group result, as a study would).
    run_phasewise(folder, sets, cache, fresh=False)
    pw, peer = median_stages(pw_runs), median_stages(peer_runs)
    rows = []
    for name in list(dict.fromkeys(list(peer) + list(pw))):
        a, b = pw.get(name), peer.get(name)
        ratio = f"{b / a:.1f}x" if a and b else "-"
        rows.append([name, f"{a:.3f}" if a is not None else "-",
                     f"{b:.3f}" if b is not None else "-", ratio])
    pw_wall = statistics.median(r["wall"] for r in pw_runs)
    peer_wall = statistics.median(r["wall"] for r in peer_runs)
    rows.append(["WALL (process)", f"{pw_wall:.3f}", f"{peer_wall:.3f}", f"{peer_wall / pw_wall:.1f}x"])
    pw_cpu = statistics.median(r["cpu"] for r in pw_runs)
    peer_cpu = statistics.median(r["cpu"] for r in peer_runs)
    rows.append(["CPU user+sys", f"{pw_cpu:.3f}", f"{peer_cpu:.3f}", f"{peer_cpu / pw_cpu:.1f}x"])
    pw_rss = max(r["rss"] for r in pw_runs)
    peer_rss = max(r["rss"] for r in peer_runs)
    rows.append(["PEAK RSS MiB", f"{pw_rss:.0f}", f"{peer_rss:.0f}", f"{pw_rss / peer_rss:.2f} (pw/peer)"])
    rep.say("\nPer-stage seconds, median of reps. phasewise: unit seconds from the manifest (load "
            "inputs + compute + store), summed over subjects; units of different subjects run "
            "concurrently, so the sum can exceed the wall time. peer: perf_counter per stage.")
    rep.table(["stage", "phasewise", "peer", "peer/phasewise"], rows)
    agree = agreement(folder)
    worst = max(list(agree["max_abs_diff"].values()) + list(agree["group_max_abs_diff"].values()))
    ok = worst <= AGREEMENT_TOL and agree["coord_diff"] < 1e-6
    rep.say(f"\nAgreement over {agree['subjects']} subjects (baseline-corrected, max |pw − peer|): "
            + ", ".join(f"{m} {v:.2e}" for m, v in agree["max_abs_diff"].items())
            + f"; coords {agree['coord_diff']:.1e}; tolerance {AGREEMENT_TOL:g}: "
            + ("AGREE" if ok else "DISAGREE"))
    rep.say("Group means (band x window), max |pw − peer|: "
            + ", ".join(f"{m} {v:.2e}" for m, v in agree["group_max_abs_diff"].items()))
    rep.data["full_chain"] = {"phasewise": pw, "peer": peer, "phasewise_wall": pw_wall,
                              "peer_wall": peer_wall, "phasewise_rss_mib": pw_rss,
                              "phasewise_cpu": pw_cpu, "peer_cpu": peer_cpu,
                              "peer_rss_mib": peer_rss, "agreement": agree, "agree": ok,
                              "walls": {"phasewise": [r["wall"] for r in pw_runs],
                                        "peer": [r["wall"] for r in peer_runs]}}


def chain_tf():
    """The wavelet's params in bench/chain.yaml (the bench changes only its frequency count)."""
    import yaml

    with open(os.path.join(BENCH, "chain.yaml")) as fh:
        return yaml.safe_load(fh)["stages"]["tf"]["params"]


def op_fft_min_len(epoch_len, start, stride, count, half):
    """The shortest circular convolution the wavelet op uses (`reach` in stages/src/ops/morlet.rs,
    derived there): only samples [lo, hi) within a wavelet's half-length `half` of the kept ones
    enter the FFT, and N >= max(hi - start + half, last + half + 1 - lo) leaves every kept
    coefficient free of wrap-around. Mirrored here so bench/fft times the op's own lengths."""
    last = start + stride * (count - 1)
    lo, hi = max(0, start - half), min(epoch_len, last + half + 1)
    return max(hi - start + half, last + half + 1 - lo)


def wavelet_vs_fft(rep, folder, size, tries=5):
    """The wavelet op's manifest seconds against the bare FFTs the op performs, both on one
    thread (`--jobs 1`), on a one-subject study of the workload's size; best of `tries` cold
    runs, since unit seconds are wall times and other processes on the machine inflate them, and
    so does the first touch of the op's fresh output memory, which on a virtual machine varies
    from run to run far more than the op's own work (all tries are printed).
    bench/fft times the op's transforms (one forward FFT of length N per pair of real signals,
    one inverse of length N/stride per signal and frequency, N the smallest multiple of the
    stride of the form stride x 2,3,5-smooth that is >= the op's shortest circular convolution
    reaching every kept coefficient, see op_fft_min_len) and, for context, the naive count (per
    signal 1 forward + F inverse of the smooth length >= epoch + longest wavelet - 1, the full
    linear convolution a plain implementation such as the peer transforms)."""
    sub = os.path.join(folder, "fft-one-subject")
    simulate(sub, dict(size["study"], subjects=1))
    cache = os.path.join(sub, "cache")
    sets = [freq_set(size["freqs"])]
    # The op on its own: the whole frequency set in one part (a part size larger than its
    # output), so its seconds are one run of the op over all frequencies. Alternating with it,
    # the chain's default, in parts of <= 48 MiB, where each part repeats the forward FFTs.
    whole_env = {"PHASEWISE_PART_BYTES": str(1 << 40)}
    whole_runs, runs = [], []
    for _ in range(tries):
        whole_runs.append(run_phasewise(sub, sets, cache, jobs=1, env=whole_env))
        runs.append(run_phasewise(sub, sets, cache, jobs=1))

    def tf_seconds(r):
        return sum(float(u.get("seconds") or 0) for u in r["manifest"]["units"]
                   if u["stage"] == "tf")

    op_all = sorted(tf_seconds(r) for r in whole_runs)
    parts_all = sorted(tf_seconds(r) for r in runs)
    op, op_parts = op_all[0], parts_all[0]
    units = runs[0]["manifest"]["units"]
    signals, epoch_len, kept = 0, None, None
    for u in units:
        if u["stage"] == "trials":
            shape = u["outputs"][0]["shape"]  # [channel, trial, time]
            signals += shape[0] * shape[1]
            epoch_len = shape[2]
        if u["stage"] == "tf":
            kept = u["outputs"][0]["shape"][3]  # [channel, trial, freq, time]
    sys.path.insert(0, BENCH)
    import peer  # the same plan (frequencies, cycles, FFT length) as the peer and DESIGN §4

    rate = float(size["study"]["rate"])
    times = np.arange(epoch_len) / rate - 1.0
    p = {"freqs": dict(FREQ_RANGE, count=size["freqs"]), "cycles": {"from": 3, "to": 8}}
    tf = chain_tf()
    p["crop"], p["stride"] = tf.get("crop"), int(tf.get("stride", 1))
    freqs, taps, start, stride, count, _ = peer.wavelet_plan(times, rate, p)
    assert count == kept, (count, kept)
    naive_len = epoch_len + max(len(w) for w in taps) - 1  # the full linear convolution
    min_len = op_fft_min_len(epoch_len, start, stride, count, max(len(w) for w in taps) // 2)
    out = subprocess.run([FFT_BIN, str(min_len), str(stride), str(signals), str(len(freqs)), "1", "3",
                          str(kept), str(naive_len)], check=True, capture_output=True, text=True).stdout
    fft = json.loads(out)
    bare, naive, write = fft["seconds"], fft["naive_seconds"], fft["output_seconds"]
    ratio = op / bare
    rep.say(f"\nWavelet op {op:.3f} s (--jobs 1, all frequencies in one part, manifest, best of {tries}: "
            f"{', '.join(f'{t:.3f}' for t in op_all)} s) vs the bare FFTs the op "
            f"performs {bare:.3f} s (1 thread, best of 3: {fft['forwards']} forward complex f64 FFTs "
            f"of length {fft['nfft']}, one per pair of real signals, and {fft['inverses']} inverse "
            f"of length {fft['folded']} = {fft['nfft']}/stride {stride}, one per signal and "
            f"frequency): {ratio:.2f}x. For context, the naive count ({signals} x (1 forward + "
            f"{len(freqs)} inverse) of length {fft['naive_nfft']}) takes {naive:.3f} s: "
            f"op / naive FFTs {op / naive:.2f}x. In the chain's parts of <= 48 MiB (each part "
            f"repeats the forward FFTs) the op takes {op_parts:.3f} s (best of {tries}: "
            f"{', '.join(f'{t:.3f}' for t in parts_all)} s): {op_parts / bare:.2f}x "
            f"the bare FFTs. Context: writing the op's output ({signals} x {len(freqs)} x {kept} "
            f"complex f32, {signals * len(freqs) * kept * 8 / 2**20:.0f} MiB) once into fresh "
            f"memory takes {write:.3f} s (bench/fft, best of 3), which no FFT timing includes; "
            f"op / (bare FFTs + that write) {op / (bare + write):.2f}x")
    loop = warm_loop(fft, signals, len(freqs), kept)
    if loop:
        rep.say(f"The op's loop alone on warm memory (cargo bench --bench morlet: Bank::transform "
                f"on one thread over the same sizes into memory written before, best of 5): "
                f"{loop['one']:.3f} s with all frequencies in one call, {loop['one'] / bare:.2f}x "
                f"the bare FFTs; {loop['split']:.3f} s in {loop['calls']} calls "
                f"({loop['split'] / bare:.2f}x)")
    rep.data["wavelet_loop"] = loop
    rep.data["wavelet_vs_fft"] = {"op": op, "bare_fft": bare, "ratio": ratio, "nfft": fft["nfft"],
                                  "op_in_parts": op_parts, "ratio_in_parts": op_parts / bare,
                                  "op_tries": op_all, "op_in_parts_tries": parts_all,
                                  "folded": fft["folded"], "stride": stride,
                                  "forwards": fft["forwards"], "inverses": fft["inverses"],
                                  "naive_fft": naive, "naive_nfft": fft["naive_nfft"],
                                  "naive_ratio": op / naive, "output_write": write,
                                  "ratio_with_write": op / (bare + write),
                                  "signals": signals, "freqs": len(freqs), "threads": 1}
    # The same one-subject study gives each side's memory for one subject at a time.
    one = run_peer(sub, [freq_set(size["freqs"])])
    pw_rss = min(r["rss"] for r in runs)
    rep.say(f"One subject at a time: peak RSS phasewise --jobs 1 {pw_rss:.0f} MiB, peer "
            f"{one['rss']:.0f} MiB ({pw_rss / one['rss']:.2f}); wall phasewise "
            f"{min(r['wall'] for r in runs):.2f} s, peer {one['wall']:.2f} s")
    rep.data["one_subject"] = {"phasewise_rss_mib": pw_rss, "peer_rss_mib": one["rss"],
                               "phasewise_wall": min(r["wall"] for r in runs),
                               "peer_wall": one["wall"]}


def warm_loop(fft, signals, freqs, kept):
    """The wavelet micro-benchmark (stages/benches/morlet.rs), when its fixed sizes (one medium
    subject) are those the harness timed the bare FFTs at; else None."""
    out = subprocess.run(["cargo", "bench", "-q", "-p", "phasewise-stages", "--bench", "morlet"],
                         cwd=ROOT, check=True, capture_output=True, text=True).stdout
    want = (f"{signals} signals x", f"{freqs} frequencies, FFT {fft['nfft']} -> {fft['folded']}, "
            f"{kept} kept samples")
    if not all(w in out for w in want):
        return None
    found = {}
    for line in out.splitlines():
        if "all frequencies in one call:" in line:
            found["one"] = float(line.split(":")[1].split()[0])
        elif " calls of " in line:
            found["split"] = float(line.split(":")[1].split()[0])
            found["calls"] = int(line.split(" calls of ")[0].split()[-1])
    return found if len(found) == 3 else None


def lean_pipeline(folder):
    """The bench pipeline as a study would run it: only the group result exported, and the
    baseline-corrected array (as large as the clustering output) not kept, `cache: false` —
    its one consumer, the group aggregate, recomputes it from the cached clustering output."""
    marker = "bench: exported for the agreement check"
    with open(os.path.join(folder, "pipeline.yaml"), encoding="utf-8") as fh:
        lines = [line.replace("export: true", "cache: false") if marker in line else line
                 for line in fh]
    with open(os.path.join(folder, "pipeline-lean.yaml"), "w", encoding="utf-8") as fh:
        fh.writelines(lines)
    return "pipeline-lean.yaml"


def reruns(rep, folder, size):
    """Warm-cache reruns: after each of BASELINE_CHANGES in turn, then three times with nothing
    changed; the medians are the figures (a single rerun of well under a second moves by tens
    of percent with what else the machine is doing)."""
    sets = [freq_set(size["freqs"])]
    cache = os.path.join(folder, "cache-lean")
    lean = lean_pipeline(folder)
    full = run_phasewise(folder, sets, cache, pipeline=lean)
    changed = [run_phasewise(folder, sets + [change], cache, fresh=False, pipeline=lean)
               for change in BASELINE_CHANGES]
    last = sets + [BASELINE_CHANGES[-1]]
    noops = [run_phasewise(folder, last, cache, fresh=False, pipeline=lean) for _ in range(3)]
    change_walls = [r["wall"] for r in changed]
    noop_walls = [r["wall"] for r in noops]
    change, noop = statistics.median(change_walls), statistics.median(noop_walls)
    share = change / full["wall"]
    windows = ", ".join(c.split("=", 1)[1] for c in BASELINE_CHANGES)
    rep.say(f"\nReruns (whole-process wall; pipeline exporting only the group result, norm "
            f"`cache: false`): full cold {full['wall']:.3f} s; after a change of norm.window "
            f"(to {windows} in turn): median {change:.3f} s ({100 * share:.1f} % of full; "
            f"{', '.join(f'{w:.3f}' for w in change_walls)} s; "
            f"{'/'.join(str(r['computed']) for r in changed)} of {changed[0]['units']} units "
            f"computed); no-op: median {noop:.3f} s ({', '.join(f'{w:.3f}' for w in noop_walls)} "
            f"s; {'/'.join(str(r['computed']) for r in noops)} of {noops[0]['units']} units "
            f"computed)")
    rep.data["reruns"] = {"full": full["wall"], "baseline_change": change,
                          "baseline_changes": change_walls, "share": share, "noop": noop,
                          "noops": noop_walls,
                          "cpu": [full["cpu"]] + [r["cpu"] for r in changed + noops],
                          "computed": [full["computed"]] + [r["computed"] for r in changed + noops]}


def slope(xs, ys):
    """Least-squares slope of log y against log x."""
    return float(np.polyfit(np.log(xs), np.log(ys), 1)[0])


def scaling(rep, folder, size):
    """phasewise cold runs over >= 4 sizes of trials, channels and frequencies."""
    sc = size["scaling"]
    base = sc["base"]
    rep.say("\nScaling (one subject, phasewise cold runs with --jobs 1, best of 2 by CPU time; "
            "CPU s = process user + sys; wavelet and clustering: unit seconds, best of 2):")
    results = {}
    for axis in ("trials", "channels", "freqs"):
        rows, points = [], []
        for value in sc[axis]:
            cfg = dict(base, **{axis: value})
            study = {k: cfg[k] for k in ("subjects", "channels", "trials", "rate")}
            sub = os.path.join(folder, f"scale-{axis}-{value}")
            simulate(sub, study)
            # Best of two cold runs: unit seconds are wall times, inflated by anything else
            # running on the machine.
            tries = [run_phasewise(sub, [freq_set(cfg["freqs"])], os.path.join(sub, "cache"),
                                   jobs=1) for _ in range(2)]
            r = min(tries, key=lambda t: t["cpu"])
            s = r["stages"]
            pairs = cfg["channels"] * (cfg["channels"] - 1) // 2
            points.append({"value": value, "pairs": pairs, "cpu": r["cpu"], "wall": r["wall"],
                           "rss": r["rss"], "tf": min(t["stages"].get("tf", 0.0) for t in tries),
                           "sync": min(t["stages"].get("sync", 0.0) for t in tries)})
            p = points[-1]
            rows.append([value, pairs if axis == "channels" else "", f"{p['cpu']:.3f}",
                         f"{p['wall']:.3f}", f"{p['tf']:.3f}", f"{p['sync']:.3f}", f"{p['rss']:.0f}"])
        rep.say(f"\n  by {axis}:")
        rep.table([axis, "pairs", "CPU s", "wall s", "wavelet s", "clustering s", "peak RSS MiB"],
                  rows)
        xs = [p["pairs"] if axis == "channels" else p["value"] for p in points]
        fit = {k: slope(xs, [max(p[k], 1e-6) for p in points]) for k in ("cpu", "tf", "sync")}
        label = "pairs" if axis == "channels" else axis
        rep.say(f"  log-log slope vs {label}: chain CPU {fit['cpu']:.2f}, wavelet {fit['tf']:.2f}, "
                f"clustering {fit['sync']:.2f}")
        if axis == "freqs":
            fit["rss"] = slope(xs, [p["rss"] for p in points])
            rep.say(f"  peak RSS vs freqs: {points[0]['rss']:.0f} → {points[-1]['rss']:.0f} MiB "
                    f"(log-log slope {fit['rss']:.2f})")
            # The wavelet streams into the clustering op in parts of at most PART_BYTES of
            # coefficients (src/parts.rs): below one part's worth of frequencies the whole
            # output is one part and grows with the count; above it, memory should not.
            tf = next(u for u in r["manifest"]["units"] if u["stage"] == "tf")
            shape = tf["outputs"][0]["shape"]  # [channel, trial, freq, time], complex f32
            per_freq = shape[0] * shape[1] * shape[3] * 8
            per_part = max(1, PART_BYTES // per_freq)
            above = [p for p in points if p["value"] >= per_part]
            note = ""
            if len(above) >= 2:
                fit["rss_above_part"] = slope([p["value"] for p in above], [p["rss"] for p in above])
                note = (f"; over the {len(above)} sizes of at least that many: "
                        + " → ".join(f"{p['rss']:.0f}" for p in above)
                        + f" MiB (log-log slope {fit['rss_above_part']:.2f})")
            rep.say(f"  one wavelet part (<= {PART_BYTES >> 20} MiB of coefficients, "
                    f"{per_freq / 2**20:.1f} MiB per frequency here) holds {per_part} "
                    f"frequencies{note}")
        results[axis] = {"points": points, "slopes": fit}
    rep.data["scaling"] = results


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("size", choices=sorted(SIZES), nargs="?", default="quick")
    ap.add_argument("--reps", type=int, help="full-chain repetitions of each side")
    ap.add_argument("--skip", action="append", default=[],
                    choices=["chain", "fft", "reruns", "scaling"], help="leave a section out")
    args = ap.parse_args()
    size = SIZES[args.size]
    folder = os.path.join(BENCH, "out", args.size)
    rep = Report()
    started = time.perf_counter()
    st = size["study"]
    rep.say(f"phasewise benchmark, size {args.size}: {st['subjects']} subjects x {st['channels']} "
            f"channels x {st['trials']} trials at {st['rate']} Hz, {size['freqs']} frequencies; "
            f"{os.cpu_count()} CPUs")
    simulate(folder, st)
    rep.data["size"] = dict(size, name=args.size)
    if "chain" not in args.skip:
        full_chain(rep, folder, size, args.reps or size["reps"])
    if "fft" not in args.skip:
        wavelet_vs_fft(rep, folder, size)
    if "reruns" not in args.skip:
        reruns(rep, folder, size)
    if "scaling" not in args.skip:
        scaling(rep, folder, size)
    rep.data["seconds"] = time.perf_counter() - started
    rep.say(f"\nHarness finished in {rep.data['seconds']:.0f} s")
    with open(os.path.join(folder, "report.json"), "w") as fh:
        json.dump(rep.data, fh, indent=1, sort_keys=True, default=str)
    with open(os.path.join(folder, "report.txt"), "w") as fh:
        fh.write("\n".join(rep.lines) + "\n")


if __name__ == "__main__":
    main()
