"""Reference fixtures for the statistics of the `contrast` op, computed with scipy and numpy.

- Student t tail and quantile: scipy.stats.t.sf / t.isf.
- point-wise t: scipy.stats.ttest_rel (paired) and scipy.stats.ttest_1samp (against 0).
- exact sign-flip p of one point: scipy.stats.permutation_test(permutation_type='samples') on one
  sample (which flips the signs of the observations), statistic |t|, alternative 'greater'.
- family-wise p over an exactly enumerated small study (all 2^n sign patterns): max |t|
  (Nichols & Holmes 2002) and cluster mass (Maris & Oostenveld 2007), clusters found with
  scipy.ndimage.label (4-connectivity, positive and negative points labelled separately), t from
  scipy.stats.ttest_1samp on every flipped data set.
- cluster labels: scipy.ndimage.label with its default (4-connected) structure in 2-D.
- Benjamini-Hochberg: scipy.stats.false_discovery_control(method='bh').
- Rayleigh test of phase differences (the `surrogate` op): astropy.stats.rayleightest, with the
  Zar (1999, eq. 27.4) closed form beside it for the cases where astropy's series leaves (0, 1].

Usage: python gen_stats.py [--out DIR]   (writes DIR/stats/*.npy + *.json; deterministic)
"""
import argparse
import itertools
import json
import pathlib

import numpy as np
from astropy.stats import rayleightest
from scipy import ndimage, stats


def save(out: pathlib.Path, name: str, array: np.ndarray) -> None:
    np.save(out / f"{name}.npy", np.ascontiguousarray(array, dtype=np.float64))


def save_json(out: pathlib.Path, name: str, value: dict) -> None:
    (out / f"{name}.json").write_text(json.dumps(value, sort_keys=True, indent=1) + "\n")


def f32(x: np.ndarray) -> np.ndarray:
    return x.astype(np.float32).astype(np.float64)


def t_distribution(out: pathlib.Path) -> None:
    ts = [0.0, 0.1, 0.5, 1.0, 1.96, 2.5, 4.0, 8.0, 30.0, -1.3, -6.0]
    dfs = [1, 2, 3, 5, 9, 19, 63, 200]
    sf = np.array([[stats.t.sf(t, df) for t in ts] for df in dfs])
    ps = [0.5, 0.25, 0.05, 0.025, 0.01, 1e-3, 1e-6, 0.9]
    isf = np.array([[stats.t.isf(p, df) for p in ps] for df in dfs])
    save(out, "t_sf", sf)
    save(out, "t_isf", isf)
    save_json(out, "t", {"t": ts, "df": dfs, "p": ps})


def one_sample_t(d: np.ndarray) -> np.ndarray:
    """t over axis 0 (subjects)."""
    return stats.ttest_1samp(d, 0.0, axis=0).statistic


def point_t(out: pathlib.Path, rng: np.random.Generator) -> None:
    # 7 subjects, two conditions, 2 measures x 3 pairs x 4 freqs x 5 times.
    shape = (7, 2, 2, 3, 4, 5)
    a = f32(rng.normal(0.3, 0.2, size=shape))
    b = f32(rng.normal(0.25, 0.2, size=shape))
    x = np.concatenate([a[:, :1], b[:, 1:]], axis=1)  # condition 0 from a, 1 from b
    save(out, "ttest_input", x)
    save(out, "ttest_rel", stats.ttest_rel(x[:, 0], x[:, 1], axis=0).statistic)
    save(out, "ttest_1samp", stats.ttest_1samp(x[:, 0], 0.0, axis=0).statistic)
    d = x[:, 0] - x[:, 1]
    save(out, "ttest_mean", d.mean(axis=0))
    save(out, "ttest_sem", stats.sem(d, axis=0, ddof=1))


def sign_flip_point(out: pathlib.Path, rng: np.random.Generator) -> None:
    d = f32(rng.normal(0.4, 1.0, size=(8, 6)))  # 8 subjects, 6 independent points
    p = []
    for k in range(d.shape[1]):
        res = stats.permutation_test(
            (d[:, k],),
            lambda x, axis: np.abs(stats.ttest_1samp(x, 0.0, axis=axis).statistic),
            permutation_type="samples",
            vectorized=True,
            n_resamples=np.inf,
            alternative="greater",
        )
        p.append(res.pvalue)
    save(out, "flip_input", d)
    save(out, "flip_p", np.array(p))


def patterns(n: int):
    """All 2^n sign patterns; pattern k negates subject i when bit i of k is set."""
    for k in range(2 ** n):
        yield np.array([-1.0 if (k >> i) & 1 else 1.0 for i in range(n)])


def signed_labels(t: np.ndarray, c: float) -> tuple:
    """Clusters of t > c and t < -c (4-connected), numbered in raster order of first point."""
    pos, npos = ndimage.label(t > c)
    neg, nneg = ndimage.label(t < -c)
    first = {}
    for idx in np.ndindex(t.shape):
        key = ("p", pos[idx]) if pos[idx] else (("n", neg[idx]) if neg[idx] else None)
        if key is not None and key not in first:
            first[key] = len(first) + 1
    labels = np.zeros(t.shape, dtype=np.int64)
    for idx in np.ndindex(t.shape):
        if pos[idx]:
            labels[idx] = first[("p", pos[idx])]
        elif neg[idx]:
            labels[idx] = first[("n", neg[idx])]
    masses = [0.0] * len(first)
    for idx in np.ndindex(t.shape):
        if labels[idx]:
            masses[labels[idx] - 1] += t[idx]
    return labels, masses


def family_study(out: pathlib.Path, rng: np.random.Generator) -> None:
    """An exactly enumerated study: 6 subjects, 3 pairs (one family), 6 freqs x 8 times."""
    n, pairs, rows, cols = 6, 3, 6, 8
    threshold = 0.05
    c = stats.t.isf(threshold / 2, n - 1)
    # Smooth noise plus an effect in pair 1; redrawn until no |t| of any pattern lies within 1e-3
    # of the threshold (the engine forms clusters from f32 sums, which agree with the t to ~1e-6).
    while True:
        noise = rng.normal(0.0, 1.0, size=(n, pairs, rows, cols))
        noise = ndimage.uniform_filter(noise, size=(1, 1, 3, 3), mode="nearest")
        d = noise.copy()
        d[:, 1, 1:4, 2:6] += 0.5
        d = f32(d)
        ts = [one_sample_t(d * s[:, None, None, None]) for s in patterns(n)]
        if all(np.min(np.abs(np.abs(t) - c)) > 1e-3 for t in ts):
            break
    t_obs = ts[0]
    # max |t| over all points and pairs, per pattern
    max_null = np.array([np.max(np.abs(t)) for t in ts])
    p_max = np.array([[[np.mean(max_null >= abs(x) - 1e-9 * abs(x)) for x in row]
                       for row in pair] for pair in t_obs])
    # cluster mass
    mass_null = []
    for t in ts:
        biggest = 0.0
        for k in range(pairs):
            _, masses = signed_labels(t[k], c)
            biggest = max([biggest] + [abs(m) for m in masses])
        mass_null.append(biggest)
    mass_null = np.array(mass_null)
    labels = np.zeros(t_obs.shape)
    p_cluster = np.full(t_obs.shape, np.nan)
    next_id = 0
    cluster_masses = []
    for k in range(pairs):
        lab, masses = signed_labels(t_obs[k], c)
        for j, m in enumerate(masses):
            sel = lab == j + 1
            labels[k][sel] = next_id + j + 1
            p_cluster[k][sel] = np.mean(mass_null >= abs(m) * (1 - 1e-9))
        cluster_masses.extend(masses)
        next_id += len(masses)
    # per-point permutation p and its Benjamini-Hochberg adjustment over the family
    p_point = np.mean([np.abs(t) >= np.abs(t_obs) * (1 - 1e-9) for t in ts], axis=0)
    p_fdr = stats.false_discovery_control(p_point.ravel(), method="bh").reshape(p_point.shape)
    save(out, "family_input", d)
    save(out, "family_t", t_obs)
    save(out, "family_p_max", p_max)
    save(out, "family_labels", labels)
    save(out, "family_p_cluster", p_cluster)
    save(out, "family_masses", np.array(cluster_masses))
    save(out, "family_p_none", p_point)
    save(out, "family_p_fdr", p_fdr)
    save_json(out, "family", {"subjects": n, "pairs": pairs, "rows": rows, "cols": cols,
                              "threshold": threshold, "threshold_t": float(c)})


def labels(out: pathlib.Path, rng: np.random.Generator) -> None:
    maps = []
    expected = []
    for shape, density in [((7, 9), 0.45), ((1, 12), 0.5), ((10, 3), 0.6), ((12, 15), 0.5)]:
        mask = rng.uniform(size=shape) < density
        lab, _ = ndimage.label(mask)
        maps.append(mask.astype(np.float64).ravel())
        expected.append(lab.astype(np.float64).ravel())
        save_json(out, f"label_{len(maps) - 1}", {"rows": shape[0], "cols": shape[1]})
    for k, (m, e) in enumerate(zip(maps, expected)):
        save(out, f"label_{k}_mask", m)
        save(out, f"label_{k}_expected", e)


def fdr(out: pathlib.Path, rng: np.random.Generator) -> None:
    p = np.concatenate([rng.uniform(0, 0.01, 10), rng.uniform(0, 1, 40), [0.02, 0.02, 0.5, 1.0]])
    save(out, "bh_p", p)
    save(out, "bh_adjusted", stats.false_discovery_control(p, method="bh"))


def rayleigh(out: pathlib.Path, rng: np.random.Generator) -> None:
    # Phase differences drawn from von Mises laws from uniform (kappa 0) to a strong lock, over
    # trial counts below and above astropy's 50-trial switch; rows padded with NaN.
    cases = [(n, k) for n in (3, 5, 8, 12, 20, 49, 50, 80) for k in (0.0, 0.5, 1.0, 3.0)]
    cases += [(5, 20.0), (10, 12.0), (4, 50.0)]  # locks strong enough to turn the series negative
    width = max(n for n, _ in cases)
    phases = np.full((len(cases), width), np.nan)
    p_astropy, p_zar = [], []
    for row, (n, kappa) in enumerate(cases):
        x = rng.vonmises(0.7, kappa, size=n) if kappa > 0 else rng.uniform(-np.pi, np.pi, size=n)
        phases[row, :n] = x
        p_astropy.append(float(rayleightest(x)))
        r = np.hypot(np.sum(np.cos(x)), np.sum(np.sin(x)))  # R = n * Rbar
        p_zar.append(float(np.exp(np.sqrt(1 + 4 * n + 4 * (n * n - r * r)) - (1 + 2 * n))))
    save(out, "rayleigh_phases", phases)
    save(out, "rayleigh_n", np.array([n for n, _ in cases], dtype=np.float64))
    save(out, "rayleigh_p_astropy", np.array(p_astropy))
    save(out, "rayleigh_p_zar", np.array(p_zar))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    args = ap.parse_args()
    out = pathlib.Path(args.out) / "stats"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261203)
    t_distribution(out)
    point_t(out, rng)
    sign_flip_point(out, rng)
    family_study(out, rng)
    labels(out, rng)
    fdr(out, rng)
    rayleigh(out, np.random.default_rng(20261204))


if __name__ == "__main__":
    main()
