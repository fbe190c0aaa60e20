//! The phase-synchronization measures of DESIGN.md §4 as functions of a few running sums over
//! cross-spectra S_n = X_n · conj(Y_n). The `clustering` op ([`super::clustering`]) feeds these
//! sums either over trials or over the samples of a sliding window; this file owns the formulas.
//!
//! Every measure needs only: N, Σ e^{iΔφ_n} (= Σ S_n/|S_n|), Σ sign(Im S_n), Σ Im S_n,
//! Σ |Im S_n|, Σ (Im S_n)², Σ |X_n|² and Σ |Y_n|² — note Im Σ S_n = Σ Im S_n, so imaginary
//! coherency needs no sum of its own. All sums are f64.

use num_complex::{Complex32, Complex64};
use serde::{Deserialize, Serialize};

/// A phase-clustering measure.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(rename_all = "lowercase")]
pub enum Measure {
    /// Phase-locking value, |Σ e^{iΔφ}| / N (Lachaux et al. 1999).
    Plv,
    /// Pairwise phase consistency, (|Σ e^{iΔφ}|² − N) / (N (N − 1)) (Vinck et al. 2010).
    Ppc,
    /// Phase-lag index, |Σ sign(Im S)| / N (Stam et al. 2007).
    Pli,
    /// Weighted PLI, |Σ Im S| / Σ |Im S| (Vinck et al. 2011).
    Wpli,
    /// Debiased squared weighted PLI (Vinck et al. 2011).
    Dwpli,
    /// Imaginary part of coherency, Im Σ S / sqrt(Σ|X|² Σ|Y|²) (Nolte et al. 2004).
    Icoh,
}

impl Measure {
    /// The name used in pipeline files and in the output's `measure` coordinates.
    pub fn name(self) -> &'static str {
        match self {
            Measure::Plv => "plv",
            Measure::Ppc => "ppc",
            Measure::Pli => "pli",
            Measure::Wpli => "wpli",
            Measure::Dwpli => "dwpli",
            Measure::Icoh => "icoh",
        }
    }

    /// The measure called `name` (as in [`Measure::name`]).
    pub fn named(name: &str) -> Option<Measure> {
        ALL.into_iter().find(|m| m.name() == name)
    }

    /// True for a measure that can be negative by its definition, so that a ratio of it (a
    /// baseline in dB) is meaningless and a map of it needs a scale centred on zero: imaginary
    /// coherency is signed; the bias-corrected ppc and dwpli go below zero when there is no
    /// coupling (their expectation is then 0).
    pub fn signed(self) -> bool {
        matches!(self, Measure::Ppc | Measure::Dwpli | Measure::Icoh)
    }
}

/// Every measure, in the order the docs list them.
pub const ALL: [Measure; 6] = [
    Measure::Plv,
    Measure::Ppc,
    Measure::Pli,
    Measure::Wpli,
    Measure::Dwpli,
    Measure::Icoh,
];

/// Running sums over a set of cross-spectra (trials, or the samples of a window).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Sums {
    /// Number of terms N.
    pub n: f64,
    /// Number of terms with a zero coefficient (no phase).
    pub zeros: f64,
    /// Σ e^{iΔφ}.
    pub phasor: Complex64,
    /// Σ sign(Im S), with sign(0) = 0.
    pub sign: f64,
    /// Σ Im S.
    pub im: f64,
    /// Σ |Im S|.
    pub abs_im: f64,
    /// Σ (Im S)².
    pub im2: f64,
    /// Σ |X|².
    pub px: f64,
    /// Σ |Y|².
    pub py: f64,
}

/// A coefficient as (unit phasor, amplitude), computed in f64 and stored as f32; a zero
/// coefficient gives a zero phasor. Channels are converted once, so the per-pair loops need no
/// square root or division.
#[inline(always)]
pub fn polar(z: Complex32) -> (Complex32, f32) {
    let z = Complex64::new(f64::from(z.re), f64::from(z.im));
    // |z| as sqrt(re² + im²): the squares of f32 values neither overflow nor underflow in f64,
    // so this is as exact as hypot (which guards against both) and several times cheaper.
    let a = (z.re * z.re + z.im * z.im).sqrt();
    let u = if a > 0.0 { z / a } else { Complex64::default() };
    (Complex32::new(u.re as f32, u.im as f32), a as f32)
}

fn widen(z: Complex32) -> Complex64 {
    Complex64::new(f64::from(z.re), f64::from(z.im))
}

/// 1.0 when `b` holds, else 0.0 (branch-free, so the loops stay straight-line).
fn indicator(b: bool) -> f64 {
    f64::from(u8::from(b))
}

impl Sums {
    /// Adds the term of one trial or sample with coefficients `x` (first channel), `y` (second).
    pub fn add(&mut self, x: Complex32, y: Complex32) {
        let ((ua, aa), (ub, ab)) = (polar(x), polar(y));
        self.add_polar(ua, aa, ub, ab);
    }

    /// Adds one term from the unit phasors and amplitudes of X and Y:
    /// e^{iΔφ} = u_x · conj(u_y) and Im S = |X| |Y| Im(e^{iΔφ}).
    #[inline(always)]
    pub fn add_polar(&mut self, ua: Complex32, aa: f32, ub: Complex32, ab: f32) {
        let p = widen(ua) * widen(ub).conj();
        let (aa, ab) = (f64::from(aa), f64::from(ab));
        let im = aa * ab * p.im;
        self.n += 1.0;
        self.zeros += indicator(aa == 0.0 || ab == 0.0);
        self.phasor += p;
        // sign with sign(0) = 0 (f64::signum gives ±1 at zero, which would count a zero
        // imaginary part as a lead or a lag).
        self.sign += indicator(im > 0.0) - indicator(im < 0.0);
        self.im += im;
        self.abs_im += im.abs();
        self.im2 += im * im;
        self.px += aa * aa;
        self.py += ab * ab;
    }

    /// The sums of the terms of `self` and `other` together.
    pub fn plus(&self, other: &Sums) -> Sums {
        Sums {
            n: self.n + other.n,
            zeros: self.zeros + other.zeros,
            phasor: self.phasor + other.phasor,
            sign: self.sign + other.sign,
            im: self.im + other.im,
            abs_im: self.abs_im + other.abs_im,
            im2: self.im2 + other.im2,
            px: self.px + other.px,
            py: self.py + other.py,
        }
    }

    /// The sums of the terms in `self` but not in `earlier` (a window from two prefix sums).
    pub fn minus(&self, earlier: &Sums) -> Sums {
        Sums {
            n: self.n - earlier.n,
            zeros: self.zeros - earlier.zeros,
            phasor: self.phasor - earlier.phasor,
            sign: self.sign - earlier.sign,
            im: self.im - earlier.im,
            abs_im: self.abs_im - earlier.abs_im,
            im2: self.im2 - earlier.im2,
            px: self.px - earlier.px,
            py: self.py - earlier.py,
        }
    }

    /// The measure's value; NaN where a term had a zero coefficient (its phase is undefined),
    /// for PPC with N < 2, and where a ratio is 0/0 (e.g. wPLI when every Im S is 0).
    #[inline]
    pub fn value(&self, m: Measure) -> f64 {
        if self.zeros > 0.0 {
            return f64::NAN;
        }
        let n = self.n;
        match m {
            // sqrt of the squared norm, not hypot: |Σ e^{iΔφ}| ≤ N cannot overflow.
            Measure::Plv => self.phasor.norm_sqr().sqrt() / n,
            Measure::Ppc if n < 2.0 => f64::NAN,
            Measure::Ppc => (self.phasor.norm_sqr() - n) / (n * (n - 1.0)),
            Measure::Pli => self.sign.abs() / n,
            Measure::Wpli => self.im.abs() / self.abs_im,
            Measure::Dwpli => {
                (self.im * self.im - self.im2) / (self.abs_im * self.abs_im - self.im2)
            }
            Measure::Icoh => self.im / (self.px * self.py).sqrt(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn measures_of_three_hand_computed_trials() {
        // Worked by hand from the DESIGN.md §4 formulas: X = (1, i, i), Y = (1, 1, 1), so
        // S = (1, i, i), Δφ = (0, π/2, π/2), Σe^{iΔφ} = 1 + 2i, Im S = (0, 1, 1).
        let mut s = Sums::default();
        let (one, i) = (Complex32::new(1.0, 0.0), Complex32::new(0.0, 1.0));
        for x in [one, i, i] {
            s.add(x, one);
        }
        let close = |a: f64, b: f64| (a - b).abs() < 1e-15;
        assert!(close(s.value(Measure::Plv), 5f64.sqrt() / 3.0)); // √5 / 3, Lachaux 1999
        assert!(close(s.value(Measure::Ppc), 1.0 / 3.0)); // (5 − 3) / 6, Vinck 2010
        assert!(close(s.value(Measure::Pli), 2.0 / 3.0)); // |0 + 1 + 1| / 3, Stam 2007
        assert!(close(s.value(Measure::Wpli), 1.0)); // 2 / 2, Vinck 2011
        assert!(close(s.value(Measure::Dwpli), 1.0)); // (4 − 2) / (4 − 2), Vinck 2011
        assert!(close(s.value(Measure::Icoh), 2.0 / 3.0)); // 2 / sqrt(3 · 3), Nolte 2004
    }

    #[test]
    fn measures_zero_coefficient_gives_nan() {
        let mut s = Sums::default();
        s.add(Complex32::new(1.0, 0.0), Complex32::new(0.5, 0.5));
        s.add(Complex32::new(0.0, 0.0), Complex32::new(1.0, 0.0));
        for m in [Measure::Plv, Measure::Ppc, Measure::Icoh] {
            assert!(s.value(m).is_nan());
        }
    }
}
