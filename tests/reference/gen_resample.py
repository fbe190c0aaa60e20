"""Reference fixtures for polyphase resampling (op `resample`), written with pinned scipy.

Usage: python gen_resample.py [--out DIR]   (default: tests/reference/fixtures)

Writes DIR/resample/:
  signal.npy                a seeded test signal (noise, sines and an offset), rounded to float32
  cases.json                per case: name, rates from/to, up/down reduced by math.gcd
  <name>_taps.npy           scipy.signal.firwin(2*L + 1, 1/max(up, down), window=('kaiser', 5.0))
                            * up with L = 10*max(up, down): the filter resample_poly designs
  <name>_out.npy            scipy.signal.resample_poly(signal, up, down) with its defaults

Deterministic: fixed seed, no timestamps, sorted JSON keys.
"""
import argparse
import json
import math
import pathlib
from fractions import Fraction

import numpy as np
from scipy import signal

CASES = [
    ("down2", 500.0, 250.0),
    ("up2", 250.0, 500.0),
    ("down5to3", 500.0, 300.0),
    ("up256to250", 256.0, 250.0),
    ("down1000to975", 1000.0, 975.0),
    ("up999to1000", 999.0, 1000.0),
]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "resample"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261204)
    n = 1200
    t = np.arange(n) / 500.0
    x = rng.standard_normal(n) + 3.0 * np.sin(2 * np.pi * 7.0 * t + 0.2) + 1.5
    x = x.astype(np.float32).astype(np.float64)
    np.save(out / "signal.npy", x)
    meta = []
    for name, f_from, f_to in CASES:
        ratio = Fraction(f_to) / Fraction(f_from)
        up, down = ratio.numerator, ratio.denominator
        assert math.gcd(up, down) == 1
        m = max(up, down)
        taps = signal.firwin(2 * 10 * m + 1, 1.0 / m, window=("kaiser", 5.0)) * up
        np.save(out / f"{name}_taps.npy", taps)
        np.save(out / f"{name}_out.npy", signal.resample_poly(x, up, down))
        meta.append({"name": name, "from": f_from, "to": f_to, "up": up, "down": down})
    (out / "cases.json").write_text(json.dumps({"cases": meta}, sort_keys=True, indent=1) + "\n")


if __name__ == "__main__":
    main()
