#!/usr/bin/env python3
"""The numpy/scipy peer of a phasewise pipeline, for the benchmark harness (bench/run.py).

It reads the same pipeline file (and the same `--set` overrides) that phasewise runs, and computes
the same chain the way a scientist would write it with numpy and scipy: pyEDFlib to read, the
average reference, scipy.signal.iirnotch + filtfilt, epochs by fancy indexing, complex Morlet
convolution through numpy.fft (one forward FFT per signal, reused for every frequency), the
phase-clustering measures vectorised over trials (Gram matrices through matmul for the bilinear
ones, pair chunks for the ones built on |Im S|), baseline and the group aggregate. No Python loop
runs over samples or trials; loops run over stages, subjects, conditions, frequencies, harmonics
and pair chunks only. Every formula follows DESIGN.md §4 so that its numbers can be compared with
phasewise's.

Storage between stages is float32 / complex64 (as in phasewise), arithmetic inside a stage is
float64 / complex128. Each stage's wall time is measured with time.perf_counter and written, per
stage and summed over subjects, to the `--timings` JSON file.

Only what the benchmark pipelines use is implemented; anything else is refused with a message
(re-reference: average or channels; epoch: conditions, window, reject.peak_to_peak; wavelet:
freqs, cycles, crop, stride; clustering: pairs all, across trials; baseline: all four modes;
aggregate: bands, windows, over subjects).
"""

import argparse
import glob
import json
import math
import os
import re
import sys
import time
from collections import OrderedDict

import numpy as np
import pyedflib
import scipy.signal
import yaml


# ---------------------------------------------------------------------------------------------
# Pipeline file


class _Yaml12Loader(yaml.SafeLoader):
    """PyYAML speaks YAML 1.1, in which `150e-6` is a string; phasewise reads YAML 1.2, in which
    it is a float. This loader adds the 1.2 float form so both read the same numbers."""


_Yaml12Loader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(
        r"""^(?:[-+]?(?:[0-9][0-9_]*)\.[0-9_]*(?:[eE][-+]?[0-9]+)?
        |[-+]?(?:[0-9][0-9_]*)(?:[eE][-+]?[0-9]+)
        |\.[0-9_]+(?:[eE][-+]?[0-9]+)?
        |[-+]?\.(?:inf|Inf|INF)
        |\.(?:nan|NaN|NAN))$""",
        re.X,
    ),
    list("-+0123456789."),
)


def yaml_value(text):
    """A value as YAML 1.2 reads it (used for files and for `--set` values alike)."""
    return yaml.load(text, Loader=_Yaml12Loader)


def apply_override(stages, text):
    """`STAGE.PARAM[.SUB]=VALUE`, as phasewise's `--set` takes it."""
    key, sep, value = text.partition("=")
    path = key.split(".")
    if not sep or len(path) < 2 or path[0] not in stages:
        raise SystemExit(f"peer: cannot apply --set {text!r}: expected STAGE.PARAM=VALUE")
    node = stages[path[0]].setdefault("params", {})
    for name in path[1:-1]:
        node = node.setdefault(name, {})
    node[path[-1]] = yaml_value(value)


def load_pipeline(path, overrides):
    """The pipeline's stages in dependency order, plus the recordings glob."""
    with open(path, encoding="utf-8") as fh:
        doc = yaml_value(fh.read())
    stages = doc["stages"]
    for text in overrides:
        apply_override(stages, text)
    order, done = [], {"recordings"}
    while len(order) < len(stages):
        ready = [n for n, s in stages.items() if n not in done and s["input"] in done]
        if not ready:
            raise SystemExit("peer: the pipeline's stages do not form a chain from `recordings`")
        for name in ready:
            order.append(name)
            done.add(name)
    base = os.path.dirname(os.path.abspath(path))
    pattern = os.path.join(base, doc["data"]["recordings"])
    if doc["data"].get("events", "sidecar") != "sidecar":
        raise SystemExit("peer: only `events: sidecar` is implemented")
    return order, stages, pattern


# ---------------------------------------------------------------------------------------------
# Reading (pyEDFlib) and the BIDS sidecars


_VOLT_SCALE = {"V": 1.0, "mV": 1e-3, "uV": 1e-6, "µV": 1e-6, "μV": 1e-6, "nV": 1e-9}


def read_tsv(path):
    """Rows of a BIDS TSV file as dicts (header line = column names)."""
    with open(path, encoding="utf-8") as fh:
        lines = [line.rstrip("\n").split("\t") for line in fh if line.strip()]
    return [dict(zip(lines[0], row)) for row in lines[1:]]


def sidecar(edf_path, suffix):
    """`sub-01_task-cue_eeg.edf` → `sub-01_task-cue_<suffix>.tsv`."""
    stem = re.sub(r"_eeg\.(edf|bdf)$", "", edf_path, flags=re.I)
    return f"{stem}_{suffix}.tsv"


def subject_of(path):
    """The BIDS subject label (`sub-01`) of a recording path."""
    match = re.search(r"(sub-[A-Za-z0-9]+)", os.path.basename(path))
    return match.group(1) if match else os.path.splitext(os.path.basename(path))[0]


# Signal-type words that EDF+ labels may start with ("EEG Fz"); Kemp & Olivan 2003, list
# recalled from memory.
_EDF_TYPES = {"EEG", "ECG", "EOG", "ERG", "EMG", "MEG", "MCG", "EP", "TEMP", "RESP", "SAO2",
              "LIGHT", "SOUND", "EVENT"}


def split_label(label):
    """`"EEG Fz"` → (`Fz`, `EEG`); a label without a type word is its own name, type None."""
    label = label.strip()
    first, _, rest = label.partition(" ")
    if first.upper() not in _EDF_TYPES:
        return label, None
    return (rest.strip() or label), first.upper()


def read_recording(path):
    """Continuous data [channel, time] in volts (float32), with rate, channel types, events."""
    with pyedflib.EdfReader(path) as edf:
        labels = edf.getSignalLabels()
        rates = [edf.getSampleFrequency(i) for i in range(len(labels))]
        units = [edf.getPhysicalDimension(i).strip() for i in range(len(labels))]
        # One read per channel: pyEDFlib decodes the whole signal in C.
        data = np.stack([edf.readSignal(i) for i in range(len(labels))])
    if len(set(rates)) != 1:
        raise SystemExit(f"peer: {path}: channels have different rates {sorted(set(rates))}")
    scale = np.array([_VOLT_SCALE.get(u, 1.0) for u in units])[:, None]
    data = (data * scale).astype(np.float32)
    rows = {r["name"]: r["type"].upper() for r in read_tsv(sidecar(path, "channels"))}
    split = [split_label(label) for label in labels]
    names = [name for name, _ in split]
    # Type: the channels sidecar (by full label or by name), else the EDF+ prefix, else EEG.
    types = [rows.get(label.strip(), rows.get(name, prefix or "EEG"))
             for label, (name, prefix) in zip(labels, split)]
    events = read_tsv(sidecar(path, "events"))
    return {
        "data": data,
        "channels": names,
        "types": types,
        "fs": float(rates[0]),
        "events": [(float(e["onset"]), e["trial_type"]) for e in events],
    }


# ---------------------------------------------------------------------------------------------
# Ops


def rust_round(x):
    """Round half away from zero (f64::round), not numpy's half-to-even."""
    x = np.asarray(x, dtype=np.float64)
    return (np.sign(x) * np.floor(np.abs(x) + 0.5)).astype(np.int64)


def eeg_rows(rec):
    """Indices of the EEG-type channels: they alone join references and pairs (DESIGN §4)."""
    return np.array([i for i, t in enumerate(rec["types"]) if t == "EEG"], dtype=np.int64)


def op_reref(rec, p):
    """Subtract the mean of the EEG channels (or of the named ones) from every EEG channel."""
    eeg = eeg_rows(rec)
    excluded = set(p.get("exclude", []))
    if p.get("method") == "average":
        ref = [i for i in eeg if rec["channels"][i] not in excluded]
    elif "channels" in p:
        ref = [rec["channels"].index(n) for n in p["channels"]]
    else:
        raise SystemExit(f"peer: re-reference {p} is not implemented")
    x = rec["data"].astype(np.float64)
    x[eeg] -= x[ref].mean(axis=0)
    return dict(rec, data=x.astype(np.float32))


def op_notch(rec, p):
    """scipy.signal.iirnotch at each frequency (and harmonic below Nyquist), filtfilt in time."""
    fs, q = rec["fs"], float(p.get("q", 30))
    freqs = []
    for f in p["freqs"]:
        k = 1
        while k * f < fs / 2 and (k == 1 or p.get("harmonics", False)):
            freqs.append(k * f)
            k += 1
    x = rec["data"].astype(np.float64)
    for f in freqs:
        b, a = scipy.signal.iirnotch(f, q, fs=fs)
        x = scipy.signal.filtfilt(b, a, x, axis=-1)
    return dict(rec, data=x.astype(np.float32))


def op_epoch(rec, p):
    """Samples s + k, k = round(t0 fs) … round(t1 fs), around each event mapped to a condition."""
    fs = rec["fs"]
    label_to_cond = {}
    for cond, labels in p["conditions"].items():
        for label in labels:
            label_to_cond[label] = cond
    t0, t1 = p["window"]
    ks = np.arange(rust_round(t0 * fs), rust_round(t1 * fs) + 1)
    chosen = [(o, label_to_cond[lab]) for o, lab in rec["events"] if lab in label_to_cond]
    onsets = np.array([o for o, _ in chosen])
    conds = np.array([c for _, c in chosen])
    s = rust_round(onsets * fs)
    n = rec["data"].shape[1]
    inside = (s + ks[0] >= 0) & (s + ks[-1] < n)
    s, conds = s[inside], conds[inside]
    x = rec["data"][:, s[:, None] + ks[None, :]]  # [channel, trial, time], one gather
    limit = (p.get("reject") or {}).get("peak_to_peak")
    if limit is not None:
        eeg = eeg_rows(rec)
        ptp = np.ptp(x[eeg].astype(np.float64), axis=2).max(axis=0)
        keep = ptp <= limit
        x, conds = x[:, keep], conds[keep]
    return dict(rec, data=x, trial_conditions=conds, times=ks / fs,
                condition_names=list(p["conditions"].keys()))


def spaced(spec, count_default=None):
    """`{from, to, count, spacing}` → the values (log spacing = geometric)."""
    lo, hi = float(spec["from"]), float(spec["to"])
    count = int(spec.get("count", count_default))
    if spec.get("spacing", "log") == "log":
        return np.geomspace(lo, hi, count)
    return np.linspace(lo, hi, count)


def morlet_taps(f, n, fs):
    """w(t_k) = (2 / Σ g) e^{2πi f t_k} g(t_k), g = exp(−t²/2σ²), σ = n / (2π f), |t_k| ≤ 5σ
    (DESIGN §4; σ convention of Tallon-Baudry et al. 1997)."""
    sigma = n / (2 * math.pi * f)
    m = int(math.floor(5 * sigma * fs))
    t = np.arange(-m, m + 1) / fs
    g = np.exp(-t * t / (2 * sigma * sigma))
    return (2.0 / g.sum()) * np.exp(2j * math.pi * f * t) * g


def fast_len(n):
    """Smallest length ≥ n with prime factors 2, 3, 5 only (the FFT sizes phasewise uses)."""
    while True:
        r = n
        for prime in (2, 3, 5):
            while r % prime == 0:
                r //= prime
        if r == 1:
            return n
        n += 1


def wavelet_plan(times, fs, p):
    """Frequencies, cycles, the crop's first sample, stride and count, and the FFT length."""
    freqs = spaced(p["freqs"])
    cyc = p.get("cycles", 7)
    if isinstance(cyc, dict):
        cycles = np.geomspace(float(cyc["from"]), float(cyc["to"]), len(freqs))
    else:
        cycles = np.full(len(freqs), float(cyc))
    keep = np.arange(len(times))
    if p.get("crop") is not None:
        c0, c1 = p["crop"]
        slack = lambda v: 1e-9 * max(abs(v), 1.0)  # noqa: E731 (inclusive range, as in phasewise)
        keep = np.nonzero((times >= c0 - slack(c0)) & (times <= c1 + slack(c1)))[0]
    stride = int(p.get("stride", 1))
    start, count = int(keep[0]), (len(keep) + stride - 1) // stride
    taps = [morlet_taps(f, n, fs) for f, n in zip(freqs, cycles)]
    nfft = fast_len(len(times) + max(len(w) for w in taps) - 1)
    return freqs, taps, start, stride, count, nfft


def op_wavelet(rec, p):
    """Linear "same" convolution with each Morlet through one forward FFT per signal."""
    fs, times = rec["fs"], rec["times"]
    freqs, taps, start, stride, count, nfft = wavelet_plan(times, fs, p)
    x = rec["data"]
    spectrum = np.fft.fft(x.astype(np.float64), n=nfft, axis=-1)  # [channel, trial, nfft]
    out = np.empty(x.shape[:2] + (len(freqs), count), dtype=np.complex64)
    for fi, w in enumerate(taps):
        half = len(w) // 2
        y = np.fft.ifft(spectrum * np.fft.fft(w, nfft), axis=-1)
        out[:, :, fi, :] = y[..., half + start: half + start + stride * count: stride]
    return dict(rec, data=out, freqs=freqs, times=times[start: start + stride * count: stride])


_BILINEAR = {"plv", "ppc", "icoh"}
_IMAG = {"pli", "wpli", "dwpli"}


def gram(a):
    """Σ_n a_i,n conj(a_j,n) for every channel pair, per time point: [time, ch, ch] via matmul."""
    at = np.ascontiguousarray(a.transpose(2, 0, 1))  # [time, channel, trial]
    return at @ at.conj().transpose(0, 2, 1)


def imag_sums(a, ii, jj, chunk):
    """Σ Im S, Σ |Im S|, Σ (Im S)², Σ sign(Im S) over trials for pairs (ii, jj), in pair chunks."""
    shape = (len(ii), a.shape[2])
    s1, sa, s2, sg = (np.empty(shape) for _ in range(4))
    re, im = a.real, a.imag
    for lo in range(0, len(ii), chunk):
        i, j = ii[lo: lo + chunk], jj[lo: lo + chunk]
        ims = im[i] * re[j] - re[i] * im[j]  # Im(X conj Y): [pairs, trial, time]
        s1[lo: lo + chunk] = ims.sum(axis=1)
        sa[lo: lo + chunk] = np.abs(ims).sum(axis=1)
        s2[lo: lo + chunk] = (ims * ims).sum(axis=1)
        sg[lo: lo + chunk] = np.sign(ims).sum(axis=1)
    return s1, sa, s2, sg


def measures_one_freq(a, ii, jj, measures, chunk):
    """All requested measures [measure, pair, time] for coefficients a [channel, trial, time]."""
    n = a.shape[1]
    res = {}
    if measures & {"plv", "ppc"}:
        g = gram(a / np.abs(a))[:, ii, jj].T  # Σ e^{iΔφ}: [pair, time]
        mag2 = (g * g.conj()).real
        res["plv"] = np.sqrt(mag2) / n  # Lachaux et al. 1999
        res["ppc"] = (mag2 - n) / (n * (n - 1))  # Vinck et al. 2010
    if "icoh" in measures:
        g = gram(a)[:, ii, jj].T
        power = (a * a.conj()).real.sum(axis=1)  # [channel, time]
        res["icoh"] = g.imag / np.sqrt(power[ii] * power[jj])  # Nolte et al. 2004
    if measures & _IMAG:
        s1, sa, s2, sg = imag_sums(a, ii, jj, chunk)
        res["pli"] = np.abs(sg) / n  # Stam et al. 2007
        res["wpli"] = np.abs(s1) / sa  # Vinck et al. 2011
        res["dwpli"] = (s1 * s1 - s2) / (sa * sa - s2)  # Vinck et al. 2011
    return res


def op_clustering(rec, p, chunk=64):
    """Measures across trials, per condition: [condition, measure, pair, freq, time]."""
    if p.get("across", "trials") != "trials" or p.get("pairs", "all") != "all":
        raise SystemExit("peer: clustering is implemented for `pairs: all, across: trials`")
    measures = p["measure"] if isinstance(p["measure"], list) else [p["measure"]]
    eeg = eeg_rows(rec)
    ii, jj = np.triu_indices(len(eeg), k=1)
    x = rec["data"]  # [channel, trial, freq, time]
    conds = rec["condition_names"]
    out = np.empty((len(conds), len(measures), len(ii)) + x.shape[2:], dtype=np.float32)
    for ci, cond in enumerate(conds):
        trials = np.nonzero(rec["trial_conditions"] == cond)[0]
        for fi in range(x.shape[2]):
            # One gather of this condition's trials at one frequency: [channel, trial, time].
            a = x[eeg[:, None], trials[None, :], fi, :].astype(np.complex128)
            a[a == 0] = np.nan  # a zero coefficient has no phase (DESIGN §4)
            res = measures_one_freq(a, ii, jj, set(measures), chunk)
            for mi, m in enumerate(measures):
                out[ci, mi, :, fi, :] = res[m]
    names = [rec["channels"][i] for i in eeg]
    pairs = [[names[i], names[j]] for i, j in zip(ii, jj)]
    return dict(rec, data=out, measures=measures, pairs=pairs, conditions=conds)


def inclusive(coords, lo, hi):
    """Indices of coords inside [lo, hi], both ends included (DESIGN §4)."""
    eps = lambda v: 1e-9 * max(abs(v), 1.0)  # noqa: E731
    return np.nonzero((coords >= lo - eps(lo)) & (coords <= hi + eps(hi)))[0]


def op_baseline(rec, p):
    """v − b̄, 100 (v − b̄)/b̄, 10 log10(v/b̄) or (v − b̄)/s over the window's time points."""
    v = rec["data"].astype(np.float64)
    base = v[..., inclusive(rec["times"], *p["window"])]
    mean = base.mean(axis=-1, keepdims=True)
    mode = p["mode"]
    if mode == "subtract":
        out = v - mean
    elif mode == "percent":
        out = 100 * (v - mean) / mean
    elif mode == "db":
        out = 10 * np.log10(v / mean)
    else:
        out = (v - mean) / base.std(axis=-1, ddof=1, keepdims=True)
    return dict(rec, data=out.astype(np.float32))


def aggregate_subject(rec, p):
    """The per-subject half of `aggregate`: means over each band (freq) × window (time) block."""
    if p.get("pairs") or p.get("over", "subjects") != "subjects":
        raise SystemExit("peer: aggregate is implemented for bands, windows, over: subjects")
    v = rec["data"].astype(np.float64)  # [condition, measure, pair, freq, time]
    bands, windows = p.get("bands", {}), p.get("windows", {})
    out = np.empty(v.shape[:3] + (len(bands), len(windows)))
    for bi, (lo, hi) in enumerate(bands.values()):
        fsel = v[..., inclusive(rec["freqs"], lo, hi), :]
        for wi, (t0, t1) in enumerate(windows.values()):
            out[..., bi, wi] = fsel[..., inclusive(rec["times"], t0, t1)].mean(axis=(-2, -1))
    return out


def aggregate_group(per_subject):
    """Mean, SEM (sd ddof 1 / √n) and n over subjects."""
    stack = np.stack(per_subject)
    n = stack.shape[0]
    sem = stack.std(axis=0, ddof=1) / math.sqrt(n) if n > 1 else np.full(stack.shape[1:], np.nan)
    return {"mean": stack.mean(axis=0), "sem": sem, "n": n}


OPS = {
    "re-reference": op_reref,
    "notch": op_notch,
    "epoch": op_epoch,
    "wavelet": op_wavelet,
    "clustering": op_clustering,
    "baseline": op_baseline,
}


# ---------------------------------------------------------------------------------------------
# Driver


class Clock:
    """Seconds per stage, summed over subjects."""

    def __init__(self):
        self.seconds = OrderedDict()

    def add(self, name, seconds):
        self.seconds[name] = self.seconds.get(name, 0.0) + seconds


def run_subject(path, order, stages, clock, exports=(), out=None):
    """One subject's chain; returns {stage: output} for the stages the caller wants kept. The
    stages named in `exports` are written to `out` as they are computed (timed as `write`), as
    a study that exports per-subject results does."""
    t = time.perf_counter()
    rec = read_recording(path)
    clock.add("read", time.perf_counter() - t)
    kept = {}
    for name in order:
        stage = stages[name]
        params = stage.get("params", {}) or {}
        t = time.perf_counter()
        if stage["op"] == "aggregate":
            kept[name] = aggregate_subject(rec, params)
        elif stage["op"] in OPS:
            rec = OPS[stage["op"]](rec, params)
            kept["_last"] = rec
        else:
            raise SystemExit(f"peer: op {stage['op']!r} is not implemented")
        clock.add(name, time.perf_counter() - t)
        if name in exports:
            t = time.perf_counter()
            save(out, subject_of(path), name, rec)
            clock.add("write", time.perf_counter() - t)
    return rec, kept


def save(out_dir, subject, name, rec):
    """Write one stage's output as NPY with the coordinates needed to align it with phasewise's."""
    folder = os.path.join(out_dir, subject)
    os.makedirs(folder, exist_ok=True)
    np.save(os.path.join(folder, f"{name}.npy"), rec["data"])
    meta = {k: rec[k] for k in ("conditions", "measures", "pairs") if k in rec}
    meta["freqs"] = [float(f) for f in rec.get("freqs", [])]
    meta["times"] = [float(t) for t in rec.get("times", [])]
    with open(os.path.join(folder, f"{name}.json"), "w", encoding="utf-8") as fh:
        json.dump(meta, fh, sort_keys=True)


def save_group(out_dir, name, group, params, pair_meta):
    """Write the group mean [condition, measure, pair, band, window] with its names."""
    folder = os.path.join(out_dir, "group")
    os.makedirs(folder, exist_ok=True)
    np.save(os.path.join(folder, f"{name}.npy"), group["mean"])
    meta = dict(pair_meta, bands=list(params.get("bands", {})),
                windows=list(params.get("windows", {})), n=group["n"])
    with open(os.path.join(folder, f"{name}.json"), "w", encoding="utf-8") as fh:
        json.dump(meta, fh, sort_keys=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("pipeline")
    ap.add_argument("--set", dest="sets", action="append", default=[], metavar="STAGE.PARAM=V")
    ap.add_argument("--out", required=True, help="folder for the peer's results")
    ap.add_argument("--save", action="append", default=[],
                    help="per-subject stage whose output to write (the last per-subject "
                         "stage before aggregate, for the agreement check)")
    ap.add_argument("--export", action="append", default=[],
                    help="per-subject stage whose output to write as it is computed (timed)")
    ap.add_argument("--timings", required=True, help="JSON file for the per-stage seconds")
    args = ap.parse_args()

    start = time.perf_counter()
    order, stages, pattern = load_pipeline(args.pipeline, args.sets)
    recordings = sorted(glob.glob(pattern))
    if not recordings:
        raise SystemExit(f"peer: no recordings match {pattern}")
    clock = Clock()
    per_subject = {}
    for path in recordings:
        subject = subject_of(path)
        last, kept = run_subject(path, order, stages, clock, args.export, args.out)
        pair_meta = {k: last[k] for k in ("conditions", "measures", "pairs") if k in last}
        for name in args.save:
            save(args.out, subject, name, last)
        for name, value in kept.items():
            if name != "_last":
                per_subject.setdefault(name, []).append(value)
        del last, kept
    for name, values in per_subject.items():
        t = time.perf_counter()
        group = aggregate_group(values)
        clock.add(name, time.perf_counter() - t)
        save_group(args.out, name, group, stages[name].get("params", {}), pair_meta)
    total = time.perf_counter() - start
    with open(args.timings, "w", encoding="utf-8") as fh:
        json.dump({"stages": clock.seconds, "total": total, "subjects": len(recordings)},
                  fh, indent=1)


if __name__ == "__main__":
    sys.exit(main())
