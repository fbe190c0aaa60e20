"""Reference fixtures for the `hilbert` op (band-pass + analytic signal), written with pinned scipy.

Usage: python gen_hilbert.py [--out DIR]   (default: tests/reference/fixtures)

Writes DIR/hilbert/:
  analytic_cases.json               the names of the analytic-signal cases
  analytic_<name>_in.npy            a seeded test signal (float64)
  analytic_<name>_out.npy           scipy.signal.hilbert(x) as rows [re, im]
  epochs.npy / epochs.json          epoched test data [channel, trial, time], rounded to float32
                                    (so Rust and scipy start from the same numbers), its rate,
                                    the bands and the Butterworth order
  band<i>_sos.npy                   scipy.signal.butter(order, [lo, hi], 'bandpass', output='sos',
                                    fs=fs) for band i
  out_re.npy, out_im.npy            [channel, trial, band, time]: scipy.signal.hilbert(
                                    scipy.signal.sosfiltfilt(sos_i, epoch)) for every epoch and band

Deterministic: fixed seed, no timestamps, sorted JSON keys.
"""
import argparse
import json
import pathlib

import numpy as np
from scipy import signal

FS = 250.0
BANDS = [[4.0, 8.0], [8.0, 12.0], [13.0, 30.0]]
ORDER = 4


def save(out: pathlib.Path, name: str, array: np.ndarray) -> None:
    np.save(out / f"{name}.npy", np.ascontiguousarray(array, dtype=np.float64))


def write_json(out: pathlib.Path, name: str, meta) -> None:
    (out / f"{name}.json").write_text(json.dumps(meta, sort_keys=True, indent=1) + "\n")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "hilbert"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261203)

    # The analytic signal on its own, for an even and an odd length (scipy's two cases).
    names = []
    for name, n in [("even", 256), ("odd", 301)]:
        t = np.arange(n) / FS
        x = rng.standard_normal(n) + 2.0 * np.cos(2 * np.pi * 11.3 * t + 0.4) + 0.5
        z = signal.hilbert(x)
        save(out, f"analytic_{name}_in", x)
        save(out, f"analytic_{name}_out", np.stack([z.real, z.imag], axis=1))
        names.append(name)
    write_json(out, "analytic_cases", {"names": names})

    # Epochs: 2 channels x 3 trials x 375 samples (1.5 s), volts, rounded to float32.
    n_ch, n_tr, n_t = 2, 3, 375
    t = np.arange(n_t) / FS
    x = 10e-6 * rng.standard_normal((n_ch, n_tr, n_t))
    x += 20e-6 * np.cos(2 * np.pi * 6.0 * t + rng.uniform(0, 2 * np.pi, (n_ch, n_tr, 1)))
    x += 5e-6 * np.cos(2 * np.pi * 20.0 * t + 1.0)
    x = x.astype(np.float32).astype(np.float64)
    save(out, "epochs", x)
    write_json(out, "epochs", {"fs": FS, "bands": BANDS, "order": ORDER, "first_sample": -125})
    re = np.zeros((n_ch, n_tr, len(BANDS), n_t))
    im = np.zeros_like(re)
    for i, (lo, hi) in enumerate(BANDS):
        sos = signal.butter(ORDER, [lo, hi], btype="bandpass", output="sos", fs=FS)
        save(out, f"band{i}_sos", sos)
        z = signal.hilbert(signal.sosfiltfilt(sos, x, axis=-1), axis=-1)
        re[:, :, i, :] = z.real
        im[:, :, i, :] = z.imag
    save(out, "out_re", re)
    save(out, "out_im", im)


if __name__ == "__main__":
    main()
