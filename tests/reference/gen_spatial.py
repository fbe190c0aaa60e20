"""Reference fixtures for spherical splines (ops `laplacian`, `interpolate`): an independent numpy
implementation of Perrin, Pernier, Bertrand & Echallier 1989 (Electroencephalogr Clin
Neurophysiol 72:184-187; erratum 1990, 76:565), Legendre terms by scipy.special.eval_legendre.

  g_m(x) =  1/(4 pi) sum_{n=1..N} (2n+1)/(n(n+1))^m     P_n(x)
  h_m(x) = -1/(4 pi) sum_{n=1..N} (2n+1)/(n(n+1))^(m-1) P_n(x)
  [G + lambda I, 1; 1^T, 0] [c; c0] = [V; 0]
  laplacian_i = sum_j c_j h_m(cos theta_ij) / r^2 ;  V(p) = c0 + sum_j c_j g_m(cos theta_pj)

Usage: python gen_spatial.py [--out DIR]   (default: tests/reference/fixtures)

Writes DIR/spatial/:
  series.json          m, lambda, terms, radius
  series_x.npy         cosines in [-1, 1];   series_gh.npy  rows [g_m(x), h_m(x)]
  electrodes.npy       32 seeded points (metres, not exactly on a sphere: they are projected)
  potentials.npy       [electrode, sample] seeded potentials (volts)
  laplacian.npy        [electrode, sample] the Laplacian (V/m^2)
  targets.npy          3 further points;  interpolated.npy  [target, sample] potentials there

Deterministic: fixed seed, no timestamps, sorted JSON keys.
"""
import argparse
import json
import pathlib

import numpy as np
from scipy.special import eval_legendre

M, LAMBDA, TERMS, RADIUS = 4, 1e-5, 50, 0.095


def series(x: np.ndarray, power: int) -> np.ndarray:
    n = np.arange(1, TERMS + 1, dtype=np.float64)
    weights = (2 * n + 1) / (n * (n + 1)) ** power
    # P_n(x) for every n and x, summed over n in order.
    p = np.stack([eval_legendre(int(k), x) for k in n], axis=-1)
    return (p * weights).sum(axis=-1) / (4 * np.pi)


def g(x):
    return series(x, M)


def h(x):
    return -series(x, M - 1)


def unit(p: np.ndarray) -> np.ndarray:
    return p / np.linalg.norm(p, axis=1, keepdims=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "spatial"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261205)
    (out / "series.json").write_text(json.dumps(
        {"m": M, "lambda": LAMBDA, "terms": TERMS, "radius": RADIUS}, sort_keys=True, indent=1) + "\n")
    x = np.linspace(-1.0, 1.0, 41)
    np.save(out / "series_x.npy", x)
    np.save(out / "series_gh.npy", np.stack([g(x), h(x)], axis=1))

    def cap_points(k):
        # Points on the upper part of the head (polar angle up to 110 degrees), radius ~9 cm.
        theta = np.arccos(rng.uniform(np.cos(np.radians(110)), 1.0, k))
        phi = rng.uniform(0, 2 * np.pi, k)
        r = 0.09 * (1 + 0.02 * rng.standard_normal(k))
        return np.stack([r * np.sin(theta) * np.cos(phi), r * np.sin(theta) * np.sin(phi),
                         r * np.cos(theta)], axis=1)

    electrodes = cap_points(32)
    targets = cap_points(3)
    u = unit(electrodes)
    # Smooth potentials: low-degree polynomials of the direction plus a little noise, in volts.
    samples = 5
    coef = rng.standard_normal((samples, 4))
    v = np.stack([coef[s, 0] + coef[s, 1] * u[:, 0] + coef[s, 2] * u[:, 1] * u[:, 2]
                  + coef[s, 3] * (3 * u[:, 2] ** 2 - 1) for s in range(samples)], axis=1)
    v = 1e-5 * (v + 0.05 * rng.standard_normal(v.shape))
    n = len(u)
    a = np.zeros((n + 1, n + 1))
    a[:n, :n] = g(np.clip(u @ u.T, -1, 1)) + LAMBDA * np.eye(n)
    a[:n, n] = 1.0
    a[n, :n] = 1.0
    rhs = np.vstack([v, np.zeros((1, samples))])
    sol = np.linalg.solve(a, rhs)
    c, c0 = sol[:n], sol[n]
    lap = h(np.clip(u @ u.T, -1, 1)) @ c / RADIUS ** 2
    t = unit(targets)
    interp = g(np.clip(t @ u.T, -1, 1)) @ c + c0
    np.save(out / "electrodes.npy", electrodes)
    np.save(out / "potentials.npy", v)
    np.save(out / "laplacian.npy", lap)
    np.save(out / "targets.npy", targets)
    np.save(out / "interpolated.npy", interp)


if __name__ == "__main__":
    main()
