//! The analytic signal of a real signal by the FFT, as scipy.signal.hilbert defines it
//! (Marple 1999, "Computing the discrete-time analytic signal via FFT", IEEE Trans Signal
//! Process 47:2600–2603): X = FFT(x) of length N; multiply bin 0 by 1, bins 1 … ⌈N/2⌉−1 by 2,
//! bin N/2 by 1 when N is even, the negative-frequency bins by 0; invert. The real part of the
//! result is x itself and the imaginary part its discrete Hilbert transform, so a sinusoid
//! A·cos(ωt + φ) well inside the band gives A·exp(i(ωt + φ)).
//!
//! The length is the signal's own (no padding), as scipy's default `N = x.shape[-1]`.

use std::sync::Arc;

use num_complex::Complex64;
use rustfft::{Fft, FftPlanner};

/// Forward and inverse FFTs of one length, planned once and reused for every signal.
#[derive(Clone)]
pub struct Analytic {
    n: usize,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
}

impl std::fmt::Debug for Analytic {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Analytic").field("n", &self.n).finish()
    }
}

impl Analytic {
    /// Plans for signals of `n` samples.
    pub fn new(n: usize) -> Self {
        let mut planner = FftPlanner::new();
        Analytic {
            n,
            forward: planner.plan_fft_forward(n),
            inverse: planner.plan_fft_inverse(n),
        }
    }

    /// The analytic signal of `x` (length `n`) into `out` (resized to `n`).
    pub fn apply(&self, x: &[f64], out: &mut Vec<Complex64>) {
        let n = self.n;
        assert_eq!(
            x.len(),
            n,
            "the analytic signal was planned for {n} samples"
        );
        out.clear();
        out.extend(x.iter().map(|&v| Complex64::new(v, 0.0)));
        if n == 0 {
            return;
        }
        self.forward.process(out);
        // Weights of scipy.signal.hilbert: h[0] = 1; h[1 .. (n+1)/2] = 2; h[n/2] = 1 for even n;
        // 0 elsewhere. The inverse FFT is unnormalised, so 1/n is folded into the weights.
        let scale = 1.0 / n as f64;
        let positive_end = n.div_ceil(2); // exclusive end of the doubled bins
        for (k, v) in out.iter_mut().enumerate() {
            let h = if k == 0 || (n.is_multiple_of(2) && k == n / 2) {
                1.0
            } else if k < positive_end {
                2.0
            } else {
                0.0
            };
            *v *= h * scale;
        }
        self.inverse.process(out);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testutil::{read_f64, read_json};
    use std::f64::consts::PI;

    #[test]
    fn equals_scipy_hilbert_for_even_and_odd_lengths() {
        // Reference: scipy.signal.hilbert(x) (scipy 1.13.1), tests/reference/gen_hilbert.py.
        // Both sides compute in f64 with FFTs of the same length; the difference is rounding
        // (measured ~1e-15): 1e-12 of the signal's peak.
        let cases = read_json("hilbert", "analytic_cases");
        for name in cases["names"].as_array().unwrap() {
            let name = name.as_str().unwrap();
            let x = read_f64("hilbert", &format!("analytic_{name}_in"));
            let want = read_f64("hilbert", &format!("analytic_{name}_out"));
            let x: Vec<f64> = x.iter().copied().collect();
            let mut got = Vec::new();
            Analytic::new(x.len()).apply(&x, &mut got);
            let peak = x.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
            let mut err = 0.0_f64;
            for (k, g) in got.iter().enumerate() {
                err = err.max((g.re - want[[k, 0]]).abs().max((g.im - want[[k, 1]]).abs()));
            }
            eprintln!(
                "analytic {name} (n = {}): error {:.1e} of the peak",
                x.len(),
                err / peak
            );
            assert!(err / peak < 1e-12, "{name}: {:e}", err / peak);
        }
    }

    #[test]
    fn a_whole_number_of_cycles_gives_the_exact_complex_exponential() {
        // Analytic: for a cosine with a whole number of periods in the window, the FFT holds only
        // bins ±k, so dropping the negative one and doubling the positive one gives exactly
        // A·exp(i(ωt + φ)) (definition of the analytic signal; Marple 1999).
        for n in [64, 75] {
            let (a, k, phi) = (1.7, 5.0, 0.3);
            let x: Vec<f64> = (0..n)
                .map(|t| a * (2.0 * PI * k * t as f64 / n as f64 + phi).cos())
                .collect();
            let mut z = Vec::new();
            Analytic::new(n).apply(&x, &mut z);
            for (t, v) in z.iter().enumerate() {
                let w = Complex64::from_polar(a, 2.0 * PI * k * t as f64 / n as f64 + phi);
                assert!((v - w).norm() < 1e-12, "n {n} t {t}: {v} vs {w}");
            }
        }
    }
}
