"""Reference fixtures for the `wavelet` and `clustering` ops, computed with numpy.

wavelet (area `tf`): the DESIGN.md §4 definition written directly in numpy —
  sigma = n / (2 pi f) (Tallon-Baudry et al. 1997), taps at t_k = k / fs for |t_k| <= 5 sigma,
  w = (2 / sum g) exp(2 pi i f t) g, g = exp(-t^2 / (2 sigma^2)); linear convolution through
  np.fft with zero-padding to len(x) + len(w) - 1, then the "same" slice full[M : M + len(x)];
  crop inclusive, then every stride-th sample. Cycle ramps and log spacing use np.geomspace,
  linear spacing np.linspace.

clustering (area `sync`): numpy one-liners of the DESIGN.md §4 formulas over the trials of each
  condition (Lachaux 1999 PLV, Vinck 2010 PPC, Stam 2007 PLI, Vinck 2011 wPLI and debiased wPLI,
  Nolte 2004 imaginary coherency), and the same over a centred sliding window of
  h = floor(window_cycles * fs / (2 f) + 0.5) samples each side (cut at the ends), averaged over
  trials. Our rule, applied explicitly with np.where: a term with a zero coefficient makes every
  measure NaN at that point.

Usage: python gen_tf.py [--out DIR]   (writes DIR/tf/* and DIR/sync/*; deterministic)
"""
import argparse
import json
import pathlib

import numpy as np

MEASURES = ["plv", "ppc", "pli", "wpli", "dwpli", "icoh"]


def save(out: pathlib.Path, name: str, array: np.ndarray) -> None:
    np.save(out / f"{name}.npy", np.ascontiguousarray(array, dtype=np.float64))


def save_json(out: pathlib.Path, name: str, value: dict) -> None:
    (out / f"{name}.json").write_text(json.dumps(value, sort_keys=True, indent=1) + "\n")


def f32(x: np.ndarray) -> np.ndarray:
    """Values the Rust side stores exactly (f32 / complex64), kept in double precision."""
    if np.iscomplexobj(x):
        return x.astype(np.complex64).astype(np.complex128)
    return x.astype(np.float32).astype(np.float64)


# ---------------------------------------------------------------- wavelet


def morlet(f: float, n: float, fs: float):
    sigma = n / (2 * np.pi * f)
    m = int(np.floor(5.0 * sigma * fs))
    t = np.arange(-m, m + 1) / fs
    g = np.exp(-t**2 / (2 * sigma**2))
    return (2.0 / g.sum()) * np.exp(2j * np.pi * f * t) * g, m


def conv_same(x: np.ndarray, w: np.ndarray, m: int) -> np.ndarray:
    n = len(x) + len(w) - 1
    full = np.fft.ifft(np.fft.fft(x, n) * np.fft.fft(w, n))
    return full[m : m + len(x)]


def frequencies(spec) -> np.ndarray:
    if isinstance(spec, list):
        return np.array(spec, dtype=np.float64)
    if spec.get("spacing", "log") == "log":
        return np.geomspace(spec["from"], spec["to"], spec["count"])
    return np.linspace(spec["from"], spec["to"], spec["count"])


def cycles(spec, count: int) -> np.ndarray:
    if isinstance(spec, dict):
        return np.geomspace(spec["from"], spec["to"], count)
    return np.full(count, float(spec))


def wavelet_case(out, rng, name, fs, first, length, n_ch, n_tr, params) -> None:
    times = (first + np.arange(length)) / fs
    x = f32(rng.standard_normal((n_ch, n_tr, length)) * 1e-5)
    freqs = frequencies(params["freqs"])
    ncyc = cycles(params["cycles"], len(freqs))
    keep = np.ones(length, dtype=bool)
    if "crop" in params:
        t0, t1 = params["crop"]
        keep = (times >= t0 - 1e-9) & (times <= t1 + 1e-9)
    idx = np.flatnonzero(keep)[:: params.get("stride", 1)]
    coef = np.zeros((n_ch, n_tr, len(freqs), len(idx)), dtype=np.complex128)
    for k, (f, n) in enumerate(zip(freqs, ncyc)):
        w, m = morlet(f, n, fs)
        for c in range(n_ch):
            for r in range(n_tr):
                coef[c, r, k] = conv_same(x[c, r], w, m)[idx]
    save(out, f"{name}_input", x)
    save(out, f"{name}_re", coef.real)
    save(out, f"{name}_im", coef.imag)
    save_json(out, name, {
        "fs": fs,
        "times": times.tolist(),
        "params": params,
        "freqs": freqs.tolist(),
        "cycles": ncyc.tolist(),
        "kept_times": times[idx].tolist(),
    })


def wavelet_fixtures(out: pathlib.Path, rng: np.random.Generator) -> None:
    wavelet_case(out, rng, "log_ramp_crop_stride", 200.0, -60, 160, 3, 4, {
        "freqs": {"from": 6.0, "to": 40.0, "count": 5, "spacing": "log"},
        "cycles": {"from": 3.0, "to": 7.0},
        "crop": [-0.2, 0.35],
        "stride": 2,
    })
    # The 4 Hz wavelet (255 taps) is longer than the 96-sample epoch.
    wavelet_case(out, rng, "list_fixed_full", 128.0, -32, 96, 2, 3, {
        "freqs": [4.0, 10.0, 25.0],
        "cycles": 5.0,
    })
    wavelet_case(out, rng, "linear_crop_stride3", 100.0, -50, 120, 2, 2, {
        "freqs": {"from": 8.0, "to": 20.0, "count": 4, "spacing": "linear"},
        "cycles": 4.0,
        "crop": [0.0, 0.2],
        "stride": 3,
    })


# ---------------------------------------------------------------- clustering


def measures(x: np.ndarray, y: np.ndarray, axis: int) -> dict:
    """The DESIGN.md §4 formulas, summing over `axis` (trials or window samples)."""
    s = x * np.conj(y)
    n = x.shape[axis]
    im = s.imag
    with np.errstate(divide="ignore", invalid="ignore"):
        ph = np.sum(s / np.abs(s), axis=axis)
        values = {
            "plv": np.abs(ph) / n,                                                # Lachaux 1999
            "ppc": (np.abs(ph) ** 2 - n) / (n * (n - 1)) if n > 1 else np.full(ph.shape, np.nan),
            "pli": np.abs(np.sum(np.sign(im), axis=axis)) / n,                    # Stam 2007
            "wpli": np.abs(np.sum(im, axis=axis)) / np.sum(np.abs(im), axis=axis),  # Vinck 2011
            "dwpli": (np.sum(im, axis=axis) ** 2 - np.sum(im**2, axis=axis))
            / (np.sum(np.abs(im), axis=axis) ** 2 - np.sum(im**2, axis=axis)),
            "icoh": np.sum(s, axis=axis).imag
            / np.sqrt(np.sum(np.abs(x) ** 2, axis=axis) * np.sum(np.abs(y) ** 2, axis=axis)),  # Nolte 2004
        }
    zero = np.any((x == 0) | (y == 0), axis=axis)
    return {k: np.where(zero, np.nan, v) for k, v in values.items()}


def across_time(x: np.ndarray, y: np.ndarray, halves, fs: float) -> dict:
    """x, y: [trial, freq, time]; per trial and freq, a centred window of 2h + 1 samples."""
    n_tr, n_f, n_t = x.shape
    acc = {m: np.zeros((n_tr, n_f, n_t)) for m in MEASURES}
    for r in range(n_tr):
        for f, h in enumerate(halves):
            for t in range(n_t):
                lo, hi = max(t - h, 0), min(t + h + 1, n_t)
                v = measures(x[r, f, lo:hi], y[r, f, lo:hi], axis=0)
                for m in MEASURES:
                    acc[m][r, f, t] = v[m]
    return {m: acc[m].mean(axis=0) for m in MEASURES}


def clustering_fixtures(out: pathlib.Path, rng: np.random.Generator) -> None:
    channels = ["Fz", "Cz", "EOG1", "Pz"]
    types = ["EEG", "EEG", "EOG", "EEG"]
    trials = ["B", "A", "A", "B", "A", "B", "A", "C", "A", "B"]
    fs, freqs, n_t = 50.0, [6.0, 11.0, 19.0], 24
    shape = (len(trials), len(freqs), n_t)
    common = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    lags = [0.0, 0.6, 0.0, -0.9]  # radians; the EOG channel is excluded anyway
    x = np.stack([
        common * np.exp(1j * lag) + 0.8 * (rng.standard_normal(shape) + 1j * rng.standard_normal(shape))
        for lag in lags
    ])
    x[1, 2, 1, 3] = 0.0  # Cz, trial 2 (condition A), 11 Hz, sample 3: no phase there
    x = f32(x)
    pairs = [(0, 1), (0, 3), (1, 3)]  # `pairs: all` over the EEG channels, in channel order
    conds = sorted(set(trials))
    halves = [int(np.floor(2.0 * fs / (2 * f) + 0.5)) for f in freqs]
    for across in ["trials", "time"]:
        expected = np.zeros((len(conds), len(MEASURES), len(pairs), len(freqs), n_t))
        for ci, c in enumerate(conds):
            sel = [i for i, t in enumerate(trials) if t == c]
            for pi, (a, b) in enumerate(pairs):
                xa, xb = x[a][sel], x[b][sel]
                v = measures(xa, xb, axis=0) if across == "trials" else across_time(xa, xb, halves, fs)
                for mi, m in enumerate(MEASURES):
                    expected[ci, mi, pi] = v[m]
        save(out, f"expected_{across}", expected)
    save(out, "coef_re", x.real)
    save(out, "coef_im", x.imag)
    save_json(out, "case", {
        "channels": channels,
        "channel_types": types,
        "trials": trials,
        "fs": fs,
        "freqs": freqs,
        "times": (np.arange(n_t) / fs).tolist(),
        "conditions": conds,
        "measures": MEASURES,
        "pairs": [[channels[a], channels[b]] for a, b in pairs],
        "window_cycles": 2.0,
        "halves": halves,
    })


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    args = ap.parse_args()
    root = pathlib.Path(args.out)
    for area, build, seed in [("tf", wavelet_fixtures, 20240517), ("sync", clustering_fixtures, 7)]:
        out = root / area
        out.mkdir(parents=True, exist_ok=True)
        build(out, np.random.default_rng(seed))


if __name__ == "__main__":
    main()
