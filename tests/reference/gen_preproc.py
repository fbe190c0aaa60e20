"""Reference fixtures for the preprocessing ops (notch, filter), written with pinned scipy.

Usage: python gen_preproc.py [--out DIR]   (default: tests/reference/fixtures)

Writes DIR/preproc/:
  notch_coefficients.npy/.json  scipy.signal.iirnotch(f, q, fs) for several (f, q, fs):
                                rows [b0, b1, b2, a0, a1, a2]
  signal.npy/.json              a seeded noise + sine test signal, already rounded to float32
                                (so Rust and scipy filter exactly the same input)
  notch_<case>.npy/.json        scipy.signal.filtfilt(b, a, signal) with default arguments,
                                applied once per notch frequency in the listed order
  butter_<case>_sos.npy         scipy.signal.butter(order, Wn, btype, output='sos', fs=fs)
  butter_<case>_out.npy         scipy.signal.sosfiltfilt(sos, signal) with default arguments
  butter_cases.json             the parameters of every butter case

Deterministic: fixed seed, no timestamps, sorted JSON keys.
"""
import argparse
import json
import pathlib

import numpy as np
from scipy import signal

FS = 500.0
N_SAMPLES = 2000

NOTCH_COEFF_CASES = [
    {"freq": 50.0, "q": 30.0, "fs": 500.0},
    {"freq": 60.0, "q": 30.0, "fs": 1000.0},
    {"freq": 100.0, "q": 10.0, "fs": 256.0},
    {"freq": 7.5, "q": 2.0, "fs": 200.0},
    {"freq": 249.0, "q": 35.0, "fs": 500.0},
]

NOTCH_FILTER_CASES = {
    "single": {"freqs": [50.0], "q": 30.0},
    "harmonics": {"freqs": [50.0, 100.0, 150.0, 200.0], "q": 30.0},
    "wide": {"freqs": [60.0], "q": 5.0},
}

BUTTER_CASES = {
    "low4": {"order": 4, "low": None, "high": 40.0},
    "low5": {"order": 5, "low": None, "high": 30.0},
    "high3": {"order": 3, "low": 1.0, "high": None},
    "high2": {"order": 2, "low": 0.5, "high": None},
    "band4": {"order": 4, "low": 8.0, "high": 12.0},
    "band3": {"order": 3, "low": 1.0, "high": 40.0},
    "band1": {"order": 1, "low": 20.0, "high": 200.0},
}


def save(out: pathlib.Path, name: str, array: np.ndarray, meta=None) -> None:
    np.save(out / f"{name}.npy", np.ascontiguousarray(array, dtype=np.float64))
    if meta is not None:
        (out / f"{name}.json").write_text(json.dumps(meta, sort_keys=True, indent=1) + "\n")


def test_signal() -> np.ndarray:
    """White noise (50 µV rms) plus 10 Hz, 50 Hz and 100 Hz sines, in volts, rounded to f32."""
    rng = np.random.default_rng(20261201)
    t = np.arange(N_SAMPLES) / FS
    x = 50e-6 * rng.standard_normal(N_SAMPLES)
    x += 40e-6 * np.sin(2 * np.pi * 10.0 * t + 0.3)
    x += 80e-6 * np.sin(2 * np.pi * 50.0 * t + 1.1)
    x += 20e-6 * np.sin(2 * np.pi * 100.0 * t - 0.7)
    x += 30e-6  # an offset, so the edge handling (odd extension, initial state) matters
    return x.astype(np.float32).astype(np.float64)


def butter_sos(case: dict) -> np.ndarray:
    if case["low"] is not None and case["high"] is not None:
        wn, btype = [case["low"], case["high"]], "bandpass"
    elif case["low"] is not None:
        wn, btype = case["low"], "highpass"
    else:
        wn, btype = case["high"], "lowpass"
    return signal.butter(case["order"], wn, btype=btype, output="sos", fs=FS)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "preproc"
    out.mkdir(parents=True, exist_ok=True)

    rows = []
    for case in NOTCH_COEFF_CASES:
        b, a = signal.iirnotch(case["freq"], case["q"], fs=case["fs"])
        rows.append(np.concatenate([b, a]))
    save(out, "notch_coefficients", np.array(rows), {"cases": NOTCH_COEFF_CASES})

    x = test_signal()
    save(out, "signal", x, {"fs": FS, "n_samples": N_SAMPLES, "units": "V"})

    for name, case in NOTCH_FILTER_CASES.items():
        y = x.copy()
        for f in case["freqs"]:
            b, a = signal.iirnotch(f, case["q"], fs=FS)
            y = signal.filtfilt(b, a, y)
        save(out, f"notch_{name}", y, dict(case, fs=FS))

    for name, case in BUTTER_CASES.items():
        sos = butter_sos(case)
        save(out, f"butter_{name}_sos", sos)
        save(out, f"butter_{name}_out", signal.sosfiltfilt(sos, x))
    (out / "butter_cases.json").write_text(
        json.dumps({"cases": BUTTER_CASES, "fs": FS}, sort_keys=True, indent=1) + "\n")


if __name__ == "__main__":
    main()
