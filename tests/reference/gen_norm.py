"""Reference fixtures for the `baseline` and `aggregate` ops, computed with numpy.

There is no single published source for baseline normalisation and aggregation (CHECKS.md:
common practice); the formulas are those of DESIGN.md §4, written here directly in numpy:
  baseline: b = mean, s = std(ddof=1) over the time points inside the inclusive window;
            subtract v - b, percent 100 (v - b) / b, db 10 log10(v / b), zscore (v - b) / s;
            a zero divisor gives NaN (our rule, applied explicitly below with np.where).
  aggregate: means over inclusive frequency bands, time windows and pair groups (np.mean, NaN
            propagates); over subjects np.nanmean, SEM = np.nanstd(ddof=1) / sqrt(n) with n the
            number of finite values (n < 2 gives NaN).

Usage: python gen_norm.py [--out DIR]   (writes DIR/norm/*.npy + *.json; deterministic)
"""
import argparse
import json
import pathlib
import warnings

import numpy as np


def save(out: pathlib.Path, name: str, array: np.ndarray) -> None:
    np.save(out / f"{name}.npy", np.ascontiguousarray(array, dtype=np.float64))


def save_json(out: pathlib.Path, name: str, value: dict) -> None:
    (out / f"{name}.json").write_text(json.dumps(value, sort_keys=True, indent=1) + "\n")


def f32(x: np.ndarray) -> np.ndarray:
    """Values the Rust side stores exactly (f32), kept as float64 for the computation."""
    return x.astype(np.float32).astype(np.float64)


def inside(coords: np.ndarray, lo: float, hi: float) -> np.ndarray:
    return (coords >= lo) & (coords <= hi)


def baseline_fixtures(out: pathlib.Path, rng: np.random.Generator) -> None:
    shape = (2, 3, 4, 5, 40)  # condition, measure, pair, freq, time
    times = np.arange(-20, 20) / 50.0
    window = [-0.3, -0.1]
    v = f32(rng.uniform(0.05, 1.0, size=shape))
    # One time course whose baseline is exactly zero (percent and db then divide by zero) and one
    # that is constant in its baseline (zscore divides by a zero standard deviation).
    mask = inside(times, *window)
    v[0, 0, 0, 0, mask] = 0.0
    v[1, 2, 3, 4, mask] = 0.5
    b = v[..., mask].mean(axis=-1, keepdims=True)
    s = v[..., mask].std(axis=-1, ddof=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        expected = {
            "subtract": v - b,
            "percent": np.where(b == 0, np.nan, 100.0 * (v - b) / b),
            "db": np.where(b == 0, np.nan, 10.0 * np.log10(v / b)),
            "zscore": np.where(s == 0, np.nan, (v - b) / s),
        }
    save(out, "baseline_input", v)
    for mode, e in expected.items():
        save(out, f"baseline_{mode}", e)
    save_json(out, "baseline", {
        "times": times.tolist(),
        "window": window,
        "points_in_window": int(mask.sum()),
        "measures": ["plv", "pli", "wpli"],
        "shape": list(shape),
    })


def aggregate_input(rng: np.random.Generator, shape: tuple) -> np.ndarray:
    return f32(rng.normal(0.2, 0.1, size=shape))


def per_subject_means(v, freqs, times, bands, windows, groups):
    """Mean over each band (axis 3), window (axis 4) and pair group (axis 2), NaN propagating."""
    v = np.stack([v[:, :, :, inside(freqs, *r), :].mean(axis=3) for r in bands], axis=3)
    v = np.stack([v[:, :, :, :, inside(times, *r)].mean(axis=4) for r in windows], axis=4)
    if groups is not None:
        v = np.stack([v[:, :, idx].mean(axis=2) for idx in groups], axis=2)
    return v


def aggregate_fixtures(out: pathlib.Path, rng: np.random.Generator) -> None:
    freqs = np.geomspace(3.0, 30.0, 8)
    times = np.arange(-10, 20) / 50.0
    pairs = [["F3", "P4"], ["F3", "Cz"], ["Cz", "P4"]]
    # Bands and windows in the order the op sorts them (by start); names chosen so that the
    # alphabetical order differs.
    bands = {"theta": [4.0, 8.0], "beta": [13.0, 30.0]}
    windows = {"late": [0.2, 0.3], "early": [0.0, 0.1]}
    band_order = ["theta", "beta"]
    window_order = ["early", "late"]
    groups = {"front_back": [["F3", "P4"], ["F3", "Cz"]]}
    group_idx = [[0, 1]]
    shape = (2, 2, 3, len(freqs), len(times))  # condition, measure, pair, freq, time
    subjects = ["sub-01", "sub-02", "sub-03", "sub-04", "sub-05"]
    inputs = np.stack([aggregate_input(rng, shape) for _ in subjects])
    # NaN handling: a NaN point inside theta × late for sub-02 (its mean there is NaN and it drops
    # out of the group n); the same cell NaN in all subjects but sub-05 (n = 1, SEM NaN); and a
    # beta × early cell NaN in every subject (n = 0).
    fi = int(np.flatnonzero(inside(freqs, *bands["theta"]))[0])
    ti = int(np.flatnonzero(inside(times, *windows["late"]))[0])
    inputs[1, 0, 0, 0, fi, ti] = np.nan
    inputs[:4, 1, 1, 2, fi, ti] = np.nan
    fb = int(np.flatnonzero(inside(freqs, *bands["beta"]))[-1])
    te = int(np.flatnonzero(inside(times, *windows["early"]))[0])
    inputs[:, 0, 1, 1, fb, te] = np.nan
    b = [bands[k] for k in band_order]
    w = [windows[k] for k in window_order]
    means = np.stack([per_subject_means(x, freqs, times, b, w, None) for x in inputs])
    grouped = np.stack([per_subject_means(x, freqs, times, b, w, group_idx) for x in inputs])
    save(out, "aggregate_input", inputs)
    save(out, "aggregate_subject_means", means)
    save(out, "aggregate_pair_group_means", grouped)
    finite = np.isfinite(means)
    n = finite.sum(axis=0).astype(np.float64)
    with warnings.catch_warnings():
        # numpy warns about the all-NaN cell (n = 0) and the n = 1 cell; both are intended.
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nanmean(means, axis=0)
        sd = np.nanstd(means, axis=0, ddof=1)
    sem = np.where(n >= 2, sd / np.sqrt(n), np.nan)
    save(out, "aggregate_group_mean", mean)
    save(out, "aggregate_group_sem", sem)
    save(out, "aggregate_group_n", n)
    save_json(out, "aggregate", {
        "freqs": freqs.tolist(),
        "times": times.tolist(),
        "pairs": pairs,
        "conditions": ["cue-left", "cue-right"],
        "measures": ["plv", "ppc"],
        "bands": bands,
        "windows": windows,
        "band_order": band_order,
        "window_order": window_order,
        "pair_groups": groups,
        "subjects": subjects,
    })


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    args = ap.parse_args()
    out = pathlib.Path(args.out) / "norm"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20260412)
    baseline_fixtures(out, rng)
    aggregate_fixtures(out, rng)


if __name__ == "__main__":
    main()
