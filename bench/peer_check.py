#!/usr/bin/env python3
"""Checks the peer's vectorised pieces against plain, slow statements of the same definitions.

Run: bench/out/venv/bin/python bench/peer_check.py (prints the largest differences, exits 1 on a
failure). The references are numpy.convolve for the "same"-aligned linear convolution, and
per-pair Python sums over trials written straight from the formulas of DESIGN.md §4 (plv:
Lachaux et al. 1999; ppc: Vinck et al. 2010; pli: Stam et al. 2007; wpli, dwpli: Vinck et al.
2011; icoh: Nolte et al. 2004). This is a check of the benchmark's peer, not part of the tests.
"""

import sys

import numpy as np

import peer


def check_wavelet(rng):
    """FFT path of op_wavelet vs numpy.convolve (full, then shifted by the half-length M)."""
    fs, n = 250.0, 300
    times = (np.arange(n) - 100) / fs
    x = rng.standard_normal((2, 3, n)).astype(np.float32)
    p = {"freqs": {"from": 3, "to": 40, "count": 4}, "cycles": {"from": 3, "to": 7}, "stride": 1}
    got = peer.op_wavelet({"data": x, "fs": fs, "times": times}, p)["data"]
    freqs, taps, *_ = peer.wavelet_plan(times, fs, p)
    worst = 0.0
    for fi, w in enumerate(taps):
        m = len(w) // 2
        for c in range(2):
            for t in range(3):
                want = np.convolve(x[c, t].astype(np.float64), w)[m: m + n]
                worst = max(worst, np.abs(got[c, t, fi] - want).max() / np.abs(want).max())
    return "wavelet vs numpy.convolve (relative)", worst, 1e-5


def slow_measures(a, i, j):
    """The six measures for one pair from their definitions, looping over trials."""
    n = a.shape[1]
    out = {k: [] for k in ("plv", "ppc", "pli", "wpli", "dwpli", "icoh")}
    for t in range(a.shape[2]):
        s = [a[i, k, t] * np.conj(a[j, k, t]) for k in range(n)]
        e = sum(np.exp(1j * np.angle(v)) for v in s)
        im = [v.imag for v in s]
        out["plv"].append(abs(e) / n)
        out["ppc"].append((abs(e) ** 2 - n) / (n * (n - 1)))
        out["pli"].append(abs(sum(np.sign(v) for v in im)) / n)
        out["wpli"].append(abs(sum(im)) / sum(abs(v) for v in im))
        sq = sum(v * v for v in im)
        out["dwpli"].append((sum(im) ** 2 - sq) / (sum(abs(v) for v in im) ** 2 - sq))
        px = sum(abs(a[i, k, t]) ** 2 for k in range(n))
        py = sum(abs(a[j, k, t]) ** 2 for k in range(n))
        out["icoh"].append(sum(s).imag / np.sqrt(px * py))
    return out


def check_measures(rng):
    """measures_one_freq (Gram matrices, pair chunks) vs the per-trial loop above."""
    a = rng.standard_normal((4, 9, 5)) + 1j * rng.standard_normal((4, 9, 5))
    ii, jj = np.triu_indices(4, k=1)
    names = {"plv", "ppc", "pli", "wpli", "dwpli", "icoh"}
    got = peer.measures_one_freq(a, ii, jj, names, chunk=2)
    worst = 0.0
    for p, (i, j) in enumerate(zip(ii, jj)):
        want = slow_measures(a, i, j)
        for k in names:
            worst = max(worst, np.abs(got[k][p] - np.array(want[k])).max())
    return "measures vs per-trial loop (absolute)", worst, 1e-12


def main():
    rng = np.random.default_rng(7)
    failed = False
    for name, worst, tol in (check_wavelet(rng), check_measures(rng)):
        ok = worst <= tol
        failed |= not ok
        print(f"{'ok  ' if ok else 'FAIL'} {name}: {worst:.3g} (tolerance {tol:g})")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
