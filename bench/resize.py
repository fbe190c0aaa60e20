#!/usr/bin/env python3
"""Resize a study written by `phasewise simulate` to the benchmark's channel and trial counts.

`phasewise simulate` writes a fixed montage (19 EEG sites and one EOG channel) and 40 cues of
each type per participant at 250 Hz, and its command line takes only --subjects and --seed.
The benchmark needs other sizes, so this script derives them from the simulated files, keeping
their character (1/f background, zero-lag mixing, mains, the planted coupling):

- fewer EEG channels: the first N sites are kept (the EOG channel always stays, and joins no
  pair);
- more EEG channels: each extra channel `X01`, `X02`, … is the mean of two simulated sites
  (chosen by a seeded generator) plus independent white noise of the sites' own RMS / 4, as a
  sensor between two sources would record them (zero lag);
- fewer trials: the recording is cut after the N-th cue (plus the epoch's post-cue time and a
  quiet tail), so later cues are gone;
- more trials: the recording is repeated end to end, each copy with fresh white noise (RMS / 4)
  so no two trials are identical, and its events shifted by the copy's start.

Files are written with pyEDFlib as EDF+ in µV, BIDS-style names beside their events and
channels sidecars. Deterministic for a given seed. Used by bench/run.py only.
"""

import argparse
import glob
import os
import shutil

import numpy as np
import pyedflib

from peer import split_label

TAIL_S = 3.0  # quiet time kept after the last cue (the simulator's own lead-out, in s)
POST_S = 1.5  # the bench epoch's end after the cue (bench/chain.yaml window)


def read_tsv(path):
    """Header and rows of a TSV file."""
    with open(path, encoding="utf-8") as fh:
        lines = [line.rstrip("\n").split("\t") for line in fh if line.strip()]
    return lines[0], lines[1:]


def write_tsv(path, header, rows):
    with open(path, "w", encoding="utf-8") as fh:
        for row in [header] + rows:
            fh.write("\t".join(str(v) for v in row) + "\n")


def read_edf(path):
    """Signals in µV [channel, time], labels, rate."""
    with pyedflib.EdfReader(path) as edf:
        labels = [label.strip() for label in edf.getSignalLabels()]
        rate = edf.getSampleFrequency(0)
        scale = {"V": 1e6, "mV": 1e3, "uV": 1.0, "µV": 1.0, "nV": 1e-3}
        data = np.stack([edf.readSignal(i) * scale.get(edf.getPhysicalDimension(i).strip(), 1.0)
                         for i in range(len(labels))])
    return data, labels, rate


def write_edf(path, data, labels, rate):
    """EDF+ with 16-bit samples in µV; each channel's physical range fits its data."""
    headers = []
    for label, row in zip(labels, data):
        # A whole number of µV: the EDF header holds 8 characters per field.
        peak = float(np.ceil(np.abs(row).max() * 1.05)) + 1.0
        headers.append({"label": label, "dimension": "uV", "sample_frequency": rate,
                        "physical_min": -peak, "physical_max": peak,
                        "digital_min": -32768, "digital_max": 32767})
    writer = pyedflib.EdfWriter(path, len(labels), file_type=pyedflib.FILETYPE_EDFPLUS)
    try:
        writer.setSignalHeaders(headers)
        writer.writeSamples([np.ascontiguousarray(r) for r in data])
    finally:
        writer.close()


def more_trials(data, events, rate, copies, rng, noise):
    """The recording repeated `copies` times with fresh noise, events shifted per copy."""
    n = data.shape[1]
    tiles = [data + rng.standard_normal(data.shape) * noise[:, None] if k else data
             for k in range(copies)]
    shifted = [(float(on) + k * n / rate, dur, label)
               for k in range(copies) for on, dur, label in events]
    return np.concatenate(tiles, axis=1), shifted


def kind_of(label, types):
    """A channel's type: the sidecar's, else its EDF+ type word, else EEG."""
    name, prefix = split_label(label)
    return types.get(name, prefix or "EEG")


def resize_subject(edf_path, out_dir, channels, trials, rng):
    data, labels, rate = read_edf(edf_path)
    stem = edf_path[: -len("_eeg.edf")]
    ch_header, ch_rows = read_tsv(stem + "_channels.tsv")
    ev_header, ev_rows = read_tsv(stem + "_events.tsv")
    types = {row[0]: row[ch_header.index("type")] for row in ch_rows}
    # The sidecar names channels without the EDF+ type word of their labels (`EEG Fz` → Fz).
    kinds = [kind_of(label, types) for label in labels]
    eeg = [i for i, kind in enumerate(kinds) if kind == "EEG"]
    other = [i for i in range(len(labels)) if i not in eeg]
    noise = data.std(axis=1) / 4
    onset, dur, ttype = (ev_header.index(c) for c in ("onset", "duration", "trial_type"))
    events = [(row[onset], row[dur], row[ttype]) for row in ev_rows]
    copies = -(-trials // len(events))
    data, events = more_trials(data, events, rate, copies, rng, noise)
    events = events[:trials]
    end = int(round((float(events[-1][0]) + POST_S + TAIL_S) * rate))
    data = data[:, : min(end, data.shape[1])]
    # Channels: the first sites, then mixtures of two sites plus their own noise.
    keep = eeg[:channels]
    rows = [data[i] for i in keep]
    names = [labels[i] for i in keep]
    for k in range(channels - len(keep)):
        a, b = rng.choice(eeg, size=2, replace=False)
        mix = (data[a] + data[b]) / 2
        rows.append(mix + rng.standard_normal(mix.shape) * (noise[a] + noise[b]) / 2)
        names.append(f"EEG X{k + 1:02d}")
    rows += [data[i] for i in other]
    names += [labels[i] for i in other]
    base = os.path.join(out_dir, os.path.basename(stem))
    write_edf(base + "_eeg.edf", np.stack(rows), names, rate)
    write_tsv(base + "_events.tsv", ["onset", "duration", "trial_type"],
              [[f"{float(on):.4f}", d, lab] for on, d, lab in events])
    write_tsv(base + "_channels.tsv", ["name", "type", "units"],
              [[split_label(n)[0], kind_of(n, types), "µV"] for n in names])


def resize(src, out, channels, trials, seed):
    """Resize every subject of the study at src into out (a BIDS-style tree)."""
    shutil.rmtree(out, ignore_errors=True)
    rng = np.random.default_rng(seed)
    for edf_path in sorted(glob.glob(os.path.join(src, "sub-*", "eeg", "*_eeg.edf"))):
        rel = os.path.relpath(os.path.dirname(edf_path), src)
        folder = os.path.join(out, rel)
        os.makedirs(folder, exist_ok=True)
        resize_subject(edf_path, folder, channels, trials, rng)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--src", required=True)
    ap.add_argument("--out", required=True)
    ap.add_argument("--channels", type=int, required=True, help="EEG channels")
    ap.add_argument("--trials", type=int, required=True, help="trials (cues) per subject")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    resize(args.src, args.out, args.channels, args.trials, args.seed)


if __name__ == "__main__":
    main()
