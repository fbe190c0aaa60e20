#!/usr/bin/env python3
"""The benchmark's own study generator for the natural workload (bench/natural.py).

Unlike `phasewise simulate` (fixed montage, 250 Hz), this writes any channel count, trial count
and rate, as a study of the issue "Speed by default" needs (24 EEG + EOG at 512 Hz by default).
Each participant's recording, in µV:

- background: eight independent sources of 1/f-like noise (white noise through a leaky
  integrator, coefficient 0.97) mixed into the EEG channels by a random positive matrix (sensors
  share sources at zero lag, as volume conduction makes them) plus white sensor noise;
- a planted coupling: after every `cue-left` a 6 Hz burst (1 s, Hann-shaped) in channel 3 and,
  30 ms later, in channel 14 (zero-based), so the pair has a fixed non-zero phase lag;
- 50 Hz mains (5 µV) on every EEG channel, blinks on the EOG channel;
- cues `cue-left` / `cue-right` alternating, one every 2.6–3.0 s (seeded jitter), 4 s lead-in
  and lead-out.

Files are EDF+ (pyEDFlib, 16-bit, µV) with BIDS-style `_events.tsv` and `_channels.tsv` beside
them. Deterministic for a given seed. Used by bench/natural.py only.
"""

import argparse
import os
import shutil

import numpy as np

from resize import write_edf, write_tsv

SITES = ["Fp1", "Fp2", "F7", "F3", "Fz", "F4", "F8", "T7", "C3", "Cz", "C4", "T8", "P7", "P3",
         "Pz", "P4", "P8", "O1", "O2", "FC1", "FC2", "CP1", "CP2", "Oz"]


def names(channels):
    """Standard site names for the first 24 channels, then E25, E26, …"""
    return [SITES[i] if i < len(SITES) else f"E{i + 1:02d}" for i in range(channels)]


def leaky(noise, a=0.97):
    """White noise through y[t] = a y[t-1] + x[t] (a 1/f-like spectrum), by scipy's lfilter."""
    import scipy.signal

    return scipy.signal.lfilter([1.0], [1.0, -a], noise, axis=-1)


def subject(rng, channels, trials, rate):
    """Data [channel (EEG…, VEOG), time] in µV and the events [(onset s, label)]."""
    gaps = rng.uniform(2.6, 3.0, size=trials)
    onsets = 4.0 + np.concatenate([[0.0], np.cumsum(gaps[:-1])])
    n = int(round((onsets[-1] + 4.0) * rate))
    t = np.arange(n) / rate
    sources = leaky(rng.standard_normal((8, n))) * 2.0
    mixing = rng.uniform(0.0, 1.0, size=(channels, 8))
    eeg = mixing @ sources + rng.standard_normal((channels, n)) * 3.0
    eeg += 5.0 * np.sin(2 * np.pi * 50.0 * t + rng.uniform(0, 2 * np.pi))
    labels = ["cue-left" if k % 2 == 0 else "cue-right" for k in range(trials)]
    burst_len = int(rate)
    window = np.hanning(burst_len)
    a, b = 3 % channels, 14 % channels
    for on, label in zip(onsets, labels):
        if label != "cue-left":
            continue
        s = int(round((on + 0.05) * rate))
        phase = rng.uniform(0, 2 * np.pi)
        tt = np.arange(burst_len) / rate
        eeg[a, s: s + burst_len] += 8.0 * window * np.sin(2 * np.pi * 6.0 * tt + phase)
        lag = int(round(0.03 * rate))
        eeg[b, s + lag: s + lag + burst_len] += 8.0 * window * np.sin(2 * np.pi * 6.0 * tt + phase)
    veog = rng.standard_normal(n) * 5.0
    for blink in rng.uniform(0, t[-1], size=int(t[-1] / 4)):
        s = int(blink * rate)
        width = int(0.3 * rate)
        veog[s: s + width] += 150.0 * np.hanning(width)[: len(veog[s: s + width])]
    return np.vstack([eeg, veog[None, :]]), list(zip(onsets, labels))


def generate(out, subjects, channels, trials, rate, seed):
    shutil.rmtree(out, ignore_errors=True)
    rng = np.random.default_rng(seed)
    site_names = names(channels)
    for k in range(1, subjects + 1):
        folder = os.path.join(out, f"sub-{k:02d}", "eeg")
        os.makedirs(folder, exist_ok=True)
        data, events = subject(rng, channels, trials, rate)
        base = os.path.join(folder, f"sub-{k:02d}_task-cue")
        labels = [f"EEG {s}" for s in site_names] + ["EOG VEOG"]
        write_edf(base + "_eeg.edf", data, labels, rate)
        write_tsv(base + "_events.tsv", ["onset", "duration", "trial_type"],
                  [[f"{on:.4f}", "0", lab] for on, lab in events])
        write_tsv(base + "_channels.tsv", ["name", "type", "units"],
                  [[s, "EEG", "µV"] for s in site_names] + [["VEOG", "EOG", "µV"]])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--subjects", type=int, default=5)
    ap.add_argument("--channels", type=int, default=24, help="EEG channels (plus one EOG)")
    ap.add_argument("--trials", type=int, default=100, help="cues per subject, both conditions")
    ap.add_argument("--rate", type=int, default=512)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    generate(args.out, args.subjects, args.channels, args.trials, args.rate, args.seed)


if __name__ == "__main__":
    main()
