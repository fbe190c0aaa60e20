//! Spherical splines (Perrin, Pernier, Bertrand & Echallier 1989, Electroencephalogr Clin
//! Neurophysiol 72:184–187; erratum 1990, 76:565), exactly as DESIGN.md §4b writes them:
//!
//!   g_m(x) =  1/(4π) Σ_{n=1..N} (2n+1)/(n(n+1))^m     P_n(x)
//!   h_m(x) = −1/(4π) Σ_{n=1..N} (2n+1)/(n(n+1))^(m−1) P_n(x)
//!
//! with x = cos θ_ij between electrodes projected on a sphere, P_n the Legendre polynomials (by
//! their three-term recurrence (n+1)P_{n+1} = (2n+1)x P_n − n P_{n−1}), and the system
//! [G + λI, 1; 1ᵀ, 0][c; c0] = [V; 0]. The interpolated potential at a point is
//! c0 + Σ_j c_j g_m(cos θ_j); the surface Laplacian at electrode i is Σ_j c_j h_m(cos θ_ij) / r².
//! Both are linear in V, so each is one matrix computed once per channel set and applied to
//! every sample.

use std::f64::consts::PI;

/// The spline parameters.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Spline {
    /// The order m.
    pub m: u32,
    /// The regularisation λ added to G's diagonal.
    pub lambda: f64,
    /// The number of Legendre terms N.
    pub terms: usize,
}

impl Spline {
    /// g_m(x) and h_m(x), summed in order n = 1 … N.
    pub fn g_h(&self, x: f64) -> (f64, f64) {
        let (mut p_prev, mut p) = (1.0, x); // P_0, P_1
        let (mut g, mut h) = (0.0, 0.0);
        for n in 1..=self.terms {
            let nf = n as f64;
            let base = nf * (nf + 1.0);
            let w = (2.0 * nf + 1.0) / base.powi(self.m as i32);
            g += w * p;
            h += w * base * p; // (2n+1)/(n(n+1))^(m−1) = w · n(n+1)
            let next = ((2.0 * nf + 1.0) * x * p - nf * p_prev) / (nf + 1.0);
            p_prev = p;
            p = next;
        }
        (g / (4.0 * PI), -h / (4.0 * PI))
    }
}

/// Unit vectors of positions (projection on the sphere about the origin).
pub fn on_sphere(points: &[[f64; 3]]) -> Vec<[f64; 3]> {
    points
        .iter()
        .map(|p| {
            let r = (p[0] * p[0] + p[1] * p[1] + p[2] * p[2]).sqrt();
            [p[0] / r, p[1] / r, p[2] / r]
        })
        .collect()
}

fn cos_between(a: [f64; 3], b: [f64; 3]) -> f64 {
    (a[0] * b[0] + a[1] * b[1] + a[2] * b[2]).clamp(-1.0, 1.0)
}

/// The inverse of the (n+1)×(n+1) system matrix [G + λI, 1; 1ᵀ, 0] for unit vectors `at`,
/// row-major, by Gauss–Jordan elimination with partial pivoting. `None` when it is singular.
fn system_inverse(spline: &Spline, at: &[[f64; 3]]) -> Option<Vec<f64>> {
    let n = at.len();
    let k = n + 1;
    let mut a = vec![0.0; k * k];
    for i in 0..n {
        for j in 0..n {
            a[i * k + j] = spline.g_h(cos_between(at[i], at[j])).0;
        }
        a[i * k + i] += spline.lambda;
        a[i * k + n] = 1.0;
        a[n * k + i] = 1.0;
    }
    invert(&mut a, k)
}

/// In-place inverse of a k×k row-major matrix (Gauss–Jordan, partial pivoting).
fn invert(a: &mut [f64], k: usize) -> Option<Vec<f64>> {
    let mut inv = vec![0.0; k * k];
    for i in 0..k {
        inv[i * k + i] = 1.0;
    }
    let norm = a.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
    for col in 0..k {
        let pivot =
            (col..k).max_by(|&r, &s| a[r * k + col].abs().total_cmp(&a[s * k + col].abs()))?;
        if a[pivot * k + col].abs() <= 1e-14 * norm {
            return None;
        }
        if pivot != col {
            for c in 0..k {
                a.swap(pivot * k + c, col * k + c);
                inv.swap(pivot * k + c, col * k + c);
            }
        }
        let d = a[col * k + col];
        for c in 0..k {
            a[col * k + c] /= d;
            inv[col * k + c] /= d;
        }
        for r in 0..k {
            if r == col {
                continue;
            }
            let f = a[r * k + col];
            if f == 0.0 {
                continue;
            }
            for c in 0..k {
                a[r * k + c] -= f * a[col * k + c];
                inv[r * k + c] -= f * inv[col * k + c];
            }
        }
    }
    Some(inv)
}

/// The n×n matrix (row-major) that maps the potentials at `at` (unit vectors) to their surface
/// Laplacian on a sphere of `radius`: L = (1/r²) H · C, where C is the first n rows and columns
/// of the system's inverse (c = C V, since the right-hand side's last entry is 0).
pub fn laplacian_matrix(spline: &Spline, at: &[[f64; 3]], radius: f64) -> Option<Vec<f64>> {
    let n = at.len();
    let k = n + 1;
    let inv = system_inverse(spline, at)?;
    let h: Vec<f64> = (0..n * n)
        .map(|ij| spline.g_h(cos_between(at[ij / n], at[ij % n])).1)
        .collect();
    let mut out = vec![0.0; n * n];
    let r2 = radius * radius;
    for i in 0..n {
        for j in 0..n {
            let mut acc = 0.0;
            for l in 0..n {
                acc += h[i * n + l] * inv[l * k + j];
            }
            out[i * n + j] = acc / r2;
        }
    }
    Some(out)
}

/// The t×n matrix (row-major) that maps the potentials at `from` (unit vectors) to the
/// interpolated potentials at `to`: V(p) = c0 + Σ_j c_j g_m(cos θ_pj), with [c; c0] the system's
/// inverse times [V; 0].
pub fn interpolation_matrix(
    spline: &Spline,
    from: &[[f64; 3]],
    to: &[[f64; 3]],
) -> Option<Vec<f64>> {
    let n = from.len();
    let k = n + 1;
    let inv = system_inverse(spline, from)?;
    let mut out = vec![0.0; to.len() * n];
    for (t, &p) in to.iter().enumerate() {
        // Row [g(cos θ_p1) … g(cos θ_pn), 1] times the inverse's first n columns.
        let row: Vec<f64> = from
            .iter()
            .map(|&q| spline.g_h(cos_between(p, q)).0)
            .chain(std::iter::once(1.0))
            .collect();
        for j in 0..n {
            out[t * n + j] = (0..k).map(|l| row[l] * inv[l * k + j]).sum();
        }
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testutil::{max_rel_diff, read_f64, read_json};

    fn spline_of(meta: &serde_json::Value) -> Spline {
        Spline {
            m: meta["m"].as_u64().unwrap() as u32,
            lambda: meta["lambda"].as_f64().unwrap(),
            terms: meta["terms"].as_u64().unwrap() as usize,
        }
    }

    fn points(name: &str) -> Vec<[f64; 3]> {
        let a = read_f64("spatial", name);
        (0..a.shape()[0])
            .map(|i| [a[[i, 0]], a[[i, 1]], a[[i, 2]]])
            .collect()
    }

    #[test]
    fn g_and_h_equal_the_published_series_by_scipy_legendre() {
        // Reference: an independent numpy implementation of Perrin et al. 1989 (erratum 1990)
        // with scipy.special.eval_legendre (scipy 1.13.1), tests/reference/gen_spatial.py;
        // 1e-6 relative (measured ~1e-15).
        let meta = read_json("spatial", "series");
        let spline = spline_of(&meta);
        let x: Vec<f64> = read_f64("spatial", "series_x").iter().copied().collect();
        let gh = read_f64("spatial", "series_gh");
        let (mut g, mut h) = (Vec::new(), Vec::new());
        for &v in &x {
            let (a, b) = spline.g_h(v);
            g.push(a);
            h.push(b);
        }
        let want_g: Vec<f64> = (0..x.len()).map(|i| gh[[i, 0]]).collect();
        let want_h: Vec<f64> = (0..x.len()).map(|i| gh[[i, 1]]).collect();
        let (eg, eh) = (
            max_rel_diff(&g, &want_g, 1e-12),
            max_rel_diff(&h, &want_h, 1e-12),
        );
        eprintln!("g: {eg:.1e}, h: {eh:.1e} relative");
        assert!(eg < 1e-6 && eh < 1e-6);
    }

    #[test]
    fn laplacian_and_interpolation_equal_the_numpy_solution() {
        // Reference as above: numpy.linalg.solve of [G + λI, 1; 1ᵀ, 0][c; c0] = [V; 0], then
        // H c / r² and c0 + g c at held-out points; 1e-6 relative to the largest value.
        let meta = read_json("spatial", "series");
        let spline = spline_of(&meta);
        let radius = meta["radius"].as_f64().unwrap();
        let at = on_sphere(&points("electrodes"));
        let v = read_f64("spatial", "potentials"); // [electrode, sample]
        let (n, t) = (v.shape()[0], v.shape()[1]);
        let lap = laplacian_matrix(&spline, &at, radius).unwrap();
        let want = read_f64("spatial", "laplacian");
        let mut got = Vec::new();
        for i in 0..n {
            for s in 0..t {
                got.push((0..n).map(|j| lap[i * n + j] * v[[j, s]]).sum::<f64>());
            }
        }
        let want: Vec<f64> = want.iter().copied().collect();
        let peak = want.iter().fold(0.0_f64, |m, x| m.max(x.abs()));
        let e = max_rel_diff(&got, &want, peak);
        eprintln!("laplacian: {e:.1e} of the peak");
        assert!(e < 1e-6, "{e:e}");

        let targets = on_sphere(&points("targets"));
        let w = interpolation_matrix(&spline, &at, &targets).unwrap();
        let want: Vec<f64> = read_f64("spatial", "interpolated")
            .iter()
            .copied()
            .collect();
        let mut got = Vec::new();
        for p in 0..targets.len() {
            for s in 0..t {
                got.push((0..n).map(|j| w[p * n + j] * v[[j, s]]).sum::<f64>());
            }
        }
        let peak = want.iter().fold(0.0_f64, |m, x| m.max(x.abs()));
        let e = max_rel_diff(&got, &want, peak);
        eprintln!("interpolation: {e:.1e} of the peak");
        assert!(e < 1e-6, "{e:e}");
    }

    #[test]
    fn a_duplicated_position_makes_the_system_singular_without_lambda() {
        // Two equal rows of G: with λ = 0 the matrix is singular (linear algebra), and the
        // solver says so instead of returning numbers.
        let spline = Spline {
            m: 4,
            lambda: 0.0,
            terms: 50,
        };
        let p = on_sphere(&[
            [0.0, 0.0, 1.0],
            [0.0, 0.0, 1.0],
            [1.0, 0.0, 0.0],
            [0.0, 1.0, 0.0],
        ]);
        assert!(system_inverse(&spline, &p).is_none());
    }
}
