"""A BDF file whose channels run at several rates, written by pyEDFlib, and each channel
resampled to one rate by scipy.signal.resample_poly: the reference for `data.rate`.

Usage: python gen_multirate.py [--out DIR]   (default: tests/reference/fixtures)

Writes DIR/multirate/:
  rates.bdf        BDF+, 4 s in 1 s data records, one annotation (`cue` at 1 s), six EEG signals: A1 and A2 at 1000 Hz, B at
                   800 Hz, C at 500 Hz, D at 975 Hz, E at 999 Hz (a sinusoid plus seeded noise)
  rates.json       labels and rates as pyEDFlib reads them, the target rate, and each signal's
                   factor up/down (fractions.Fraction of target/rate)
  <label>_in.npy   float64: pyEDFlib's EdfReader.readSignal (physical values, uV)
  <label>_500.npy  float64: scipy.signal.resample_poly(<label>_in, up, down) with its defaults,
                   the signal at 500 Hz

Deterministic: fixed seed and start date, sorted JSON keys. The Rust test in stages/src/io reads
rates.bdf with `data.rate: 500` and compares with the *_500 arrays.
"""
import argparse
import datetime
import json
import pathlib
from fractions import Fraction

import numpy as np
import pyedflib
from scipy import signal

SEED = 20261203
SECONDS = 4
TARGET = 500
START = datetime.datetime(2022, 5, 9, 10, 0, 0)
SIGNALS = [("A1", 1000, 7.0), ("A2", 1000, 11.0), ("B", 800, 5.0), ("C", 500, 9.0),
           ("D", 975, 13.0), ("E", 999, 6.0)]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "multirate"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    headers, data = [], []
    for label, fs, freq in SIGNALS:
        t = np.arange(SECONDS * fs) / fs
        x = 40.0 * np.sin(2 * np.pi * freq * t) + 5.0 * rng.standard_normal(t.size) + 3.0
        headers.append({
            "label": label, "dimension": "uV", "sample_frequency": fs,
            "physical_max": 200.0, "physical_min": -200.0,
            "digital_max": 8388607, "digital_min": -8388608,
            "transducer": "", "prefilter": "",
        })
        data.append(x)
    path = out / "rates.bdf"
    writer = pyedflib.EdfWriter(str(path), len(headers), file_type=pyedflib.FILETYPE_BDFPLUS)
    writer.setStartdatetime(START)
    writer.setSignalHeaders(headers)
    writer.writeSamples(data)
    writer.writeAnnotation(1.0, -1, "cue")
    writer.close()

    reader = pyedflib.EdfReader(str(path))
    meta = {"labels": [], "rates": [], "target": TARGET, "up": [], "down": []}
    try:
        for i in range(reader.signals_in_file):
            label = reader.getLabel(i)
            fs = float(reader.getSampleFrequency(i))
            x = reader.readSignal(i).astype(np.float64)
            ratio = Fraction(TARGET) / Fraction(int(fs))
            up, down = ratio.numerator, ratio.denominator
            np.save(out / f"{label}_in.npy", x)
            np.save(out / f"{label}_{TARGET}.npy", signal.resample_poly(x, up, down))
            meta["labels"].append(label)
            meta["rates"].append(fs)
            meta["up"].append(up)
            meta["down"].append(down)
    finally:
        reader.close()
    (out / "rates.json").write_text(json.dumps(meta, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
