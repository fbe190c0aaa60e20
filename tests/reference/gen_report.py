"""Reference fixture for the report's group time courses (mean ± SEM across subjects), in numpy.

The report draws, under each group time–frequency map, the mean over a frequency band by time
with a shaded band of ± 1 SEM. Its rule for cells without a value is the `aggregate` op's
(DESIGN §4, written here directly in numpy as gen_norm.py does for the op):
  per subject: the mean over the band's frequencies (inclusive) at each time, np.mean, so a NaN
               inside the band makes that subject's time point NaN (propagates);
  across subjects: np.nanmean, SEM = np.nanstd(ddof=1) / sqrt(n) with n the number of finite
               values (n < 2 gives NaN);
  the difference a - b: per subject first (paired), then across subjects as above.

Inputs are written here too (float32-exact values), so the Rust test draws the report from the
same per-subject arrays (tests/it/report.rs, `group_courses_show_the_sem_numpy_computes`).

Usage: python gen_report.py [--out DIR]   (writes DIR/report/*.npy + *.json; deterministic)
"""
import argparse
import json
import pathlib
import warnings

import numpy as np


def save(out: pathlib.Path, name: str, array: np.ndarray) -> None:
    np.save(out / f"{name}.npy", np.ascontiguousarray(array, dtype=np.float64))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "report"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(24)

    subjects, conditions, pairs = 5, 2, 3
    freqs = 3.0 * 10.0 ** (np.arange(12) / 11.0)  # 3 .. 30 Hz, log-spaced
    times = np.round(-0.3 + 0.05 * np.arange(25), 10)  # -0.3 .. 0.9 s
    band = [4.0, 8.0]
    shape = (subjects, conditions, 1, pairs, freqs.size, times.size)
    # Subject-specific offsets make the SEM differ from time to time and condition to condition.
    v = rng.normal(0.0, 0.05, size=shape)
    v += rng.normal(0.0, 0.08, size=(subjects, conditions, 1, pairs, 1, times.size))
    v[:, 0, 0, 1] += 0.15 * np.exp(-(((times - 0.4) / 0.15) ** 2))[None, None, :]
    v = v.astype(np.float32).astype(np.float64)
    # Cells without a value: inside the band for subject 2 at time index 9 (that subject drops
    # out of n there), and outside the band for subject 3 (no effect on the course).
    inside = (freqs >= band[0]) & (freqs <= band[1])
    fi_in = int(np.flatnonzero(inside)[0])
    fi_out = int(np.flatnonzero(~inside)[-1])
    v[2, :, 0, 1, fi_in, 9] = np.nan
    v[3, :, 0, 1, fi_out, 14] = np.nan

    pair = 1
    course = v[:, :, 0, pair][:, :, inside, :].mean(axis=2)  # [subject, condition, time]
    series = [course[:, 0], course[:, 1], course[:, 0] - course[:, 1]]
    mean, sem, n = [], [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for s in series:
            k = np.isfinite(s).sum(axis=0).astype(np.float64)
            mean.append(np.nanmean(s, axis=0))
            sd = np.nanstd(s, axis=0, ddof=1)
            sem.append(np.where(k >= 2, sd / np.sqrt(k), np.nan))
            n.append(k)

    save(out, "course_input", v)
    save(out, "course_freqs", freqs)
    save(out, "course_times", times)
    save(out, "course_mean", np.array(mean))
    save(out, "course_sem", np.array(sem))
    save(out, "course_n", np.array(n))
    meta = {
        "band": band,
        "conditions": ["A", "B"],
        "pair_index": pair,
        "series": ["A", "B", "A - B"],
        "shape": "input [subject, condition, measure, pair, freq, time]; outputs [series, time]",
        "numpy": np.__version__,
    }
    (out / "course.json").write_text(json.dumps(meta, sort_keys=True, indent=1) + "\n")


if __name__ == "__main__":
    main()
