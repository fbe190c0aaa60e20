//! Statistics shared by the statistics ops: Student's t distribution, Benjamini–Hochberg
//! adjusted p-values, and 4-connected labelling of signed maps.
//!
//! Checked against scipy (tests/reference/gen_stats.py): `scipy.stats.t.sf` / `t.isf`,
//! `scipy.stats.false_discovery_control` and `scipy.ndimage.label`.

/// ln Γ(x) for x > 0: the Lanczos approximation with g = 7 and nine coefficients (Lanczos 1964,
/// SIAM J Numer Anal B 1:86–96; these coefficients as commonly tabulated, recalled from memory
/// and checked through [`t_sf`] against scipy's Student t to 1e-12). Uses the reflection formula
/// below 0.5.
pub fn ln_gamma(x: f64) -> f64 {
    const G: f64 = 7.0;
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    if x < 0.5 {
        let pi = std::f64::consts::PI;
        return (pi / (pi * x).sin()).ln() - ln_gamma(1.0 - x);
    }
    let x = x - 1.0;
    let mut a = C[0];
    let t = x + G + 0.5;
    for (i, &c) in C.iter().enumerate().skip(1) {
        a += c / (x + i as f64);
    }
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + a.ln()
}

/// The continued fraction of the incomplete beta function, evaluated by the modified Lentz
/// method (Press et al., Numerical Recipes, 3rd ed. 2007, §6.4 `betacf`).
fn beta_fraction(a: f64, b: f64, x: f64) -> f64 {
    const TINY: f64 = 1e-300;
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 - qab * x / qap;
    if d.abs() < TINY {
        d = TINY;
    }
    d = 1.0 / d;
    let mut h = d;
    // One Lentz update of c and d by the coefficient aa; returns the factor for h.
    let mut step = |aa: f64| {
        d = 1.0 + aa * d;
        if d.abs() < TINY {
            d = TINY;
        }
        c = 1.0 + aa / c;
        if c.abs() < TINY {
            c = TINY;
        }
        d = 1.0 / d;
        d * c
    };
    for m in 1..10_000 {
        let m = m as f64;
        let m2 = 2.0 * m;
        h *= step(m * (b - m) * x / ((qam + m2) * (a + m2)));
        let del = step(-(a + m) * (qab + m) * x / ((a + m2) * (qap + m2)));
        h *= del;
        if (del - 1.0).abs() < 1e-16 {
            break;
        }
    }
    h
}

/// The regularized incomplete beta function I_x(a, b) (Numerical Recipes §6.4: the continued
/// fraction where it converges fast, the symmetry I_x(a, b) = 1 − I_{1−x}(b, a) elsewhere).
pub fn incomplete_beta(a: f64, b: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    let front =
        (ln_gamma(a + b) - ln_gamma(a) - ln_gamma(b) + a * x.ln() + b * (1.0 - x).ln()).exp();
    if x < (a + 1.0) / (a + b + 2.0) {
        front * beta_fraction(a, b, x) / a
    } else {
        1.0 - front * beta_fraction(b, a, 1.0 - x) / b
    }
}

/// P(T > t) for Student's t with `df` degrees of freedom: ½ I_{df/(df+t²)}(df/2, ½) for t ≥ 0
/// (Abramowitz & Stegun 26.7.1 with 26.5.27), and 1 minus that for t < 0.
pub fn t_sf(t: f64, df: f64) -> f64 {
    if t.is_nan() {
        return f64::NAN;
    }
    let tail = 0.5 * incomplete_beta(0.5 * df, 0.5, df / (df + t * t));
    if t >= 0.0 {
        tail
    } else {
        1.0 - tail
    }
}

/// The t with P(T > t) = p (0 < p < 1): the inverse of [`t_sf`], found by bisection on the
/// monotone tail (to the last bit the interval can shrink).
pub fn t_isf(p: f64, df: f64) -> f64 {
    if !(p > 0.0 && p < 1.0) {
        return f64::NAN;
    }
    if p > 0.5 {
        return -t_isf(1.0 - p, df);
    }
    let mut hi = 1.0;
    while t_sf(hi, df) > p {
        hi *= 2.0;
        if !hi.is_finite() {
            return f64::INFINITY;
        }
    }
    let mut lo = 0.0;
    for _ in 0..2000 {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        if t_sf(mid, df) > p {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

/// Benjamini–Hochberg adjusted p-values (Benjamini & Hochberg 1995, J R Stat Soc B 57:289–300):
/// with the m finite p-values sorted ascending, p_(i) · m / i, made monotone from the largest
/// down and capped at 1. NaN entries stay NaN and do not count in m.
pub fn bh_adjust(p: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..p.len()).filter(|&i| !p[i].is_nan()).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]).then(a.cmp(&b)));
    let m = order.len() as f64;
    let mut out = vec![f64::NAN; p.len()];
    let mut running = 1.0f64;
    for (rank, &i) in order.iter().enumerate().rev() {
        let adjusted = p[i] * m / (rank as f64 + 1.0);
        running = running.min(adjusted);
        out[i] = running;
    }
    out
}

/// Labels of the 4-connected clusters of a signed `rows` × `cols` map (row-major): points with
/// the same non-zero sign that touch along a row or a column share a label; 0 marks points
/// outside every cluster. Labels count from `first` upwards in the raster order of each
/// cluster's first point (the numbering of `scipy.ndimage.label`). Returns the number of
/// clusters. `stack` is scratch space.
pub fn label_clusters(
    sign: &[i8],
    cols: usize,
    first: u32,
    labels: &mut [u32],
    stack: &mut Vec<usize>,
) -> u32 {
    labels.iter_mut().for_each(|l| *l = 0);
    let mut next = first;
    for start in 0..sign.len() {
        if sign[start] == 0 || labels[start] != 0 {
            continue;
        }
        fill(
            sign,
            cols,
            start,
            |i| {
                if labels[i] == 0 {
                    labels[i] = next;
                    true
                } else {
                    false
                }
            },
            stack,
        );
        next += 1;
    }
    next - first
}

/// Flood fill of the cluster of `start` (the points of its sign 4-connected to it): `claim(i)`
/// marks a point and says whether it was new.
pub fn fill(
    sign: &[i8],
    cols: usize,
    start: usize,
    mut claim: impl FnMut(usize) -> bool,
    stack: &mut Vec<usize>,
) {
    let s = sign[start];
    stack.clear();
    if claim(start) {
        stack.push(start);
    }
    while let Some(i) = stack.pop() {
        let (r, c) = (i / cols, i % cols);
        let mut visit = |j: usize, stack: &mut Vec<usize>| {
            if sign[j] == s && claim(j) {
                stack.push(j);
            }
        };
        if c > 0 {
            visit(i - 1, stack);
        }
        if c + 1 < cols {
            visit(i + 1, stack);
        }
        if r > 0 {
            visit(i - cols, stack);
        }
        if i + cols < sign.len() {
            visit(i + cols, stack);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testutil::{assert_close, read_f64, read_json, read_vec};

    #[test]
    fn t_tail_and_quantile_match_scipy() {
        // Reference: scipy.stats.t.sf / t.isf (gen_stats.py).
        let meta = read_json("stats", "t");
        let ts: Vec<f64> = serde_json::from_value(meta["t"].clone()).unwrap();
        let dfs: Vec<f64> = serde_json::from_value(meta["df"].clone()).unwrap();
        let ps: Vec<f64> = serde_json::from_value(meta["p"].clone()).unwrap();
        let sf = read_f64("stats", "t_sf");
        let isf = read_f64("stats", "t_isf");
        for (i, &df) in dfs.iter().enumerate() {
            let got: Vec<f64> = ts.iter().map(|&t| t_sf(t, df)).collect();
            let want: Vec<f64> = (0..ts.len()).map(|j| sf[[i, j]]).collect();
            assert_close(&got, &want, 1e-300, 1e-12, &format!("t.sf df {df}"));
            let got: Vec<f64> = ps.iter().map(|&p| t_isf(p, df)).collect();
            let want: Vec<f64> = (0..ps.len()).map(|j| isf[[i, j]]).collect();
            // Floor 1: scipy gives −8e-17 for the median (p = 0.5), which is 0 (absolute below 1).
            assert_close(&got, &want, 1.0, 1e-10, &format!("t.isf df {df}"));
        }
    }

    #[test]
    fn benjamini_hochberg_matches_scipy() {
        // Reference: scipy.stats.false_discovery_control(method='bh') (gen_stats.py).
        let p = read_vec("stats", "bh_p");
        let want = read_vec("stats", "bh_adjusted");
        assert_close(&bh_adjust(&p), &want, 1e-300, 1e-14, "bh");
        // NaN entries stay NaN and do not count (m = 2 here): [0.01·2/1, 0.04·2/2].
        let got = bh_adjust(&[0.04, f64::NAN, 0.01]);
        assert!(got[1].is_nan());
        assert_eq!((got[0], got[2]), (0.04, 0.02));
    }

    #[test]
    fn labels_match_scipy_ndimage_label() {
        // Reference: scipy.ndimage.label with its default 4-connected structure (gen_stats.py).
        for k in 0..4 {
            let meta = read_json("stats", &format!("label_{k}"));
            let cols = meta["cols"].as_u64().unwrap() as usize;
            let mask = read_vec("stats", &format!("label_{k}_mask"));
            let want = read_vec("stats", &format!("label_{k}_expected"));
            let sign: Vec<i8> = mask.iter().map(|&m| m as i8).collect();
            let mut labels = vec![0; sign.len()];
            let count = label_clusters(&sign, cols, 1, &mut labels, &mut Vec::new());
            let got: Vec<f64> = labels.iter().map(|&l| f64::from(l)).collect();
            assert_eq!(got, want, "map {k}");
            assert_eq!(f64::from(count), want.iter().cloned().fold(0.0, f64::max));
        }
    }

    #[test]
    fn opposite_signs_never_join() {
        // Worked by hand: + + - / + 0 - gives {+ at (0,0),(0,1),(1,0)} and {- at (0,2),(1,2)}.
        let sign = [1, 1, -1, 1, 0, -1];
        let mut labels = vec![0; 6];
        assert_eq!(label_clusters(&sign, 3, 1, &mut labels, &mut Vec::new()), 2);
        assert_eq!(labels, [1, 1, 2, 1, 0, 2]);
    }
}
