//! Filter design: the second-order IIR notch and Butterworth filters as second-order sections.
//!
//! Both follow the textbook constructions scipy.signal uses, so coefficients can be compared
//! with scipy's. The notch is the bilinear design pinned in DESIGN.md §4 (scipy.signal.iirnotch).
//! A Butterworth filter is built in zero-pole-gain form: analog prototype (poles evenly spaced on
//! the left unit half-circle) → low-/high-/band-pass transformation at pre-warped edges →
//! bilinear transform → pairing into sections, where the poles closest to the unit circle go
//! last and each pole pair takes the zeros nearest to it (the "nearest" pairing of
//! scipy.signal.zpk2sos, which keeps the sections well conditioned).

use num_complex::Complex64;
use std::f64::consts::PI;

use super::sos::Section;

/// The notch at `freq` Hz with quality factor `q` for sampling rate `fs` (DESIGN.md §4):
/// w0 = 2π f / fs, g = 1 / (1 + tan(w0 / (2q))), b = g·[1, −2 cos w0, 1],
/// a = [1, −2 g cos w0, 2g − 1].
pub fn notch(freq: f64, q: f64, fs: f64) -> Section {
    let w0 = 2.0 * PI * freq / fs;
    let g = 1.0 / (1.0 + (w0 / (2.0 * q)).tan());
    let c = w0.cos();
    [g, -2.0 * g * c, g, 1.0, -2.0 * g * c, 2.0 * g - 1.0]
}

/// Which band a Butterworth filter passes (edges in Hz).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Band {
    /// Passes below the cutoff.
    LowPass(f64),
    /// Passes above the cutoff.
    HighPass(f64),
    /// Passes between the two edges (low, high).
    BandPass(f64, f64),
}

/// Zeros, poles and gain of a filter.
struct Zpk {
    zeros: Vec<Complex64>,
    poles: Vec<Complex64>,
    gain: f64,
}

/// A Butterworth filter of `order` (the prototype's order; a band-pass has twice as many poles)
/// for sampling rate `fs`, as second-order sections. Edges must lie in (0, fs/2).
pub fn butterworth(order: usize, band: Band, fs: f64) -> Vec<Section> {
    // Work on the normalised scale where the sampling rate is 2 (Nyquist 1); pre-warp the edges
    // so that the bilinear transform puts them exactly at the requested frequencies.
    let warp = |f: f64| 4.0 * (PI * (2.0 * f / fs) / 2.0).tan();
    let proto = prototype(order);
    let analog = match band {
        Band::LowPass(f) => to_lowpass(proto, warp(f)),
        Band::HighPass(f) => to_highpass(proto, warp(f)),
        Band::BandPass(lo, hi) => {
            let (wl, wh) = (warp(lo), warp(hi));
            to_bandpass(proto, (wl * wh).sqrt(), wh - wl)
        }
    };
    pair_sections(bilinear(analog, 4.0))
}

/// Analog Butterworth prototype with cutoff 1 rad/s: poles −exp(iπm/(2N)), m = −N+1, −N+3, …,
/// N−1 (the middle one, for odd N, exactly −1), no zeros, gain 1.
fn prototype(order: usize) -> Zpk {
    let n = order as f64;
    let poles = (0..order)
        .map(|i| {
            let m = 2.0 * i as f64 - n + 1.0;
            -Complex64::from_polar(1.0, PI * m / (2.0 * n))
        })
        .collect();
    Zpk {
        zeros: Vec::new(),
        poles,
        gain: 1.0,
    }
}

/// Number of poles in excess of zeros (zeros at infinity).
fn excess(f: &Zpk) -> usize {
    f.poles.len().saturating_sub(f.zeros.len())
}

/// s → s / wo.
fn to_lowpass(f: Zpk, wo: f64) -> Zpk {
    let gain = f.gain * wo.powi(excess(&f) as i32);
    Zpk {
        zeros: f.zeros.iter().map(|z| z * wo).collect(),
        poles: f.poles.iter().map(|p| p * wo).collect(),
        gain,
    }
}

/// s → wo / s; the zeros at infinity move to the origin.
fn to_highpass(f: Zpk, wo: f64) -> Zpk {
    let degree = excess(&f);
    let prod_z: Complex64 = f.zeros.iter().map(|z| -z).product();
    let prod_p: Complex64 = f.poles.iter().map(|p| -p).product();
    let mut zeros: Vec<Complex64> = f.zeros.iter().map(|z| wo / z).collect();
    zeros.extend(std::iter::repeat_n(Complex64::new(0.0, 0.0), degree));
    Zpk {
        zeros,
        poles: f.poles.iter().map(|p| wo / p).collect(),
        gain: f.gain * (prod_z / prod_p).re,
    }
}

/// s → (s² + wo²) / (s · bw): every root r becomes the two roots of s² − r·bw·s + wo²;
/// the zeros at infinity contribute as many zeros at the origin.
fn to_bandpass(f: Zpk, wo: f64, bw: f64) -> Zpk {
    let degree = excess(&f);
    let split = |roots: &[Complex64]| -> Vec<Complex64> {
        let half: Vec<Complex64> = roots.iter().map(|r| r * bw / 2.0).collect();
        let disc: Vec<Complex64> = half.iter().map(|h| (h * h - wo * wo).sqrt()).collect();
        let plus = half.iter().zip(&disc).map(|(h, d)| h + d);
        let minus = half.iter().zip(&disc).map(|(h, d)| h - d);
        plus.chain(minus).collect()
    };
    let mut zeros = split(&f.zeros);
    zeros.extend(std::iter::repeat_n(Complex64::new(0.0, 0.0), degree));
    Zpk {
        zeros,
        poles: split(&f.poles),
        gain: f.gain * bw.powi(degree as i32),
    }
}

/// Bilinear transform z = (fs2 + s) / (fs2 − s) with fs2 = 2·fs; zeros at infinity go to z = −1.
fn bilinear(f: Zpk, fs2: f64) -> Zpk {
    let degree = excess(&f);
    let map = |r: &Complex64| (fs2 + r) / (fs2 - r);
    let prod_z: Complex64 = f.zeros.iter().map(|z| fs2 - z).product();
    let prod_p: Complex64 = f.poles.iter().map(|p| fs2 - p).product();
    let mut zeros: Vec<Complex64> = f.zeros.iter().map(map).collect();
    zeros.extend(std::iter::repeat_n(Complex64::new(-1.0, 0.0), degree));
    Zpk {
        zeros,
        poles: f.poles.iter().map(map).collect(),
        gain: f.gain * (prod_z / prod_p).re,
    }
}

/// Group a digital filter's roots into second-order sections, the section with the poles closest
/// to the unit circle last; the overall gain goes into the first section's numerator.
/// Butterworth designs have real zeros only (at ±1), which is all this handles: complex zeros
/// are taken by their real part.
fn pair_sections(f: Zpk) -> Vec<Section> {
    let mut zeros: Vec<f64> = f.zeros.iter().map(|z| z.re).collect();
    let mut count = f.poles.len().max(zeros.len());
    zeros.resize(count, 0.0);
    if count % 2 == 1 {
        // An odd count gets one more pole and zero at the origin, so every section is a biquad.
        count += 1;
        zeros.push(0.0);
    }
    let mut poles = f.poles.clone();
    poles.resize(count, Complex64::new(0.0, 0.0));
    let mut poles = conjugate_representatives(&poles);
    let n_sections = count / 2;
    let mut sections = vec![[0.0; 6]; n_sections];
    for section in sections.iter_mut().rev() {
        *section = next_section(&mut poles, &mut zeros);
    }
    if let Some(first) = sections.first_mut() {
        first[..3].iter_mut().for_each(|b| *b *= f.gain);
    }
    sections
}

/// Take the remaining pole closest to the unit circle, its partner and its nearest zeros out of
/// `poles` and `zeros`, and return their section.
fn next_section(poles: &mut Vec<Complex64>, zeros: &mut Vec<f64>) -> Section {
    let p1 = take(poles, |p| (1.0 - p.norm()).abs());
    let real_left = poles.iter().filter(|p| p.im == 0.0).count();
    if p1.im == 0.0 && real_left == 0 {
        // The last real pole: a first-order section (a zero and a pole at the origin added).
        let z1 = take(zeros, |z| (z - p1).norm());
        return [1.0, -z1, 0.0, 1.0, -p1.re, 0.0];
    }
    let a = if p1.im == 0.0 {
        let p2 = take_real(poles).re;
        [1.0, -(p1.re + p2), p1.re * p2]
    } else {
        [1.0, -2.0 * p1.re, p1.norm_sqr()]
    };
    let b = match (zeros.is_empty(), zeros.len()) {
        (true, _) => [0.0, 0.0, 1.0],
        (false, 1) => [0.0, 1.0, -take(zeros, |z| (z - p1).norm())],
        _ => {
            let z1 = take(zeros, |z| (z - p1).norm());
            let z2 = take(zeros, |z| (z - p1).norm());
            [1.0, -(z1 + z2), z1 * z2]
        }
    };
    [b[0], b[1], b[2], a[0], a[1], a[2]]
}

/// Remove and return the element with the smallest `key` (the first of equals).
fn take<T: Copy>(items: &mut Vec<T>, key: impl Fn(&T) -> f64) -> T {
    let mut best = 0;
    for (i, item) in items.iter().enumerate() {
        if key(item) < key(&items[best]) {
            best = i;
        }
    }
    items.remove(best)
}

/// Remove and return the real pole closest to the unit circle (the caller knows one is left).
fn take_real(poles: &mut Vec<Complex64>) -> Complex64 {
    let far = |p: &Complex64| {
        if p.im == 0.0 {
            (1.0 - p.norm()).abs()
        } else {
            f64::INFINITY
        }
    };
    take(poles, far)
}

/// One representative (positive imaginary part) of each complex-conjugate pair, averaged with
/// its partner, followed by the real roots; both groups sorted by real part, then |imag|.
/// A root counts as real when |imag| ≤ 100 ε |root|.
fn conjugate_representatives(roots: &[Complex64]) -> Vec<Complex64> {
    let tol = 100.0 * f64::EPSILON;
    let mut sorted = roots.to_vec();
    sorted.sort_by(|a, b| {
        let by_re = a.re.partial_cmp(&b.re).unwrap_or(std::cmp::Ordering::Equal);
        by_re.then(
            a.im.abs()
                .partial_cmp(&b.im.abs())
                .unwrap_or(std::cmp::Ordering::Equal),
        )
    });
    let is_real = |r: &Complex64| r.im.abs() <= tol * r.norm();
    let reals = sorted
        .iter()
        .filter(|r| is_real(r))
        .map(|r| Complex64::new(r.re, 0.0));
    let mut lower: Vec<Complex64> = sorted
        .iter()
        .filter(|r| !is_real(r) && r.im < 0.0)
        .copied()
        .collect();
    let mut out = Vec::with_capacity(roots.len());
    for upper in sorted.iter().filter(|r| !is_real(r) && r.im > 0.0) {
        let partner = if lower.is_empty() {
            upper.conj()
        } else {
            take(&mut lower, |l| (upper - l.conj()).norm()).conj()
        };
        out.push((upper + partner) / 2.0);
    }
    out.extend(reals);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn notch_gain_at_its_centre_is_zero() {
        // Analytic: b(e^{iw0}) = g·e^{iw0}·(e^{iw0} + e^{-iw0} − 2 cos w0) = 0, and the DC and
        // Nyquist gains are 1 (b(1) = a(1) = 2g(1 − cos w0); b(−1) = a(−1) = 2g(1 + cos w0)).
        let (f, q, fs) = (50.0, 30.0, 500.0);
        let s = notch(f, q, fs);
        let gain_at = |w: f64| {
            let z = Complex64::from_polar(1.0, -w);
            let num = s[0] + s[1] * z + s[2] * z * z;
            let den = s[3] + s[4] * z + s[5] * z * z;
            (num / den).norm()
        };
        assert!(gain_at(2.0 * PI * f / fs) < 1e-12);
        assert!((gain_at(0.0) - 1.0).abs() < 1e-12);
        assert!((gain_at(PI) - 1.0).abs() < 1e-12);
    }

    #[test]
    fn butterworth_gain_is_half_power_at_the_edge() {
        // Butterworth's defining property (Butterworth 1930; any DSP text): |H|² = 1/2 at the
        // cutoff, which the pre-warping places exactly at the requested frequency.
        let fs = 500.0;
        for (band, edge) in [
            (Band::LowPass(40.0), 40.0),
            (Band::HighPass(1.0), 1.0),
            (Band::BandPass(8.0, 12.0), 12.0),
        ] {
            let sections = butterworth(4, band, fs);
            let z = Complex64::from_polar(1.0, -2.0 * PI * edge / fs);
            let h: Complex64 = sections
                .iter()
                .map(|s| (s[0] + s[1] * z + s[2] * z * z) / (s[3] + s[4] * z + s[5] * z * z))
                .product();
            assert!(
                (h.norm_sqr() - 0.5).abs() < 1e-9,
                "{band:?}: {}",
                h.norm_sqr()
            );
        }
    }
}
