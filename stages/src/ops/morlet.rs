//! Complex Morlet wavelets sampled exactly as DESIGN.md §4 defines them, and their linear,
//! "same"-aligned convolution with real signals through the FFT.
//!
//! This module owns the numbers of the `wavelet` op; the op itself (params, layout, crop,
//! parallel loop) lives in [`super::wavelet`]. A [`Bank`] holds the spectra of a set of wavelets
//! for one signal length, so that each signal needs one forward FFT, and each wavelet's spectrum
//! is computed once and reused for every channel and trial.

use std::f64::consts::PI;
use std::sync::Arc;

use num_complex::{Complex32, Complex64};
use rustfft::{Fft, FftPlanner};

/// σ of the Gaussian envelope in seconds: σ = n / (2π f) (Tallon-Baudry et al. 1997).
pub fn sigma(freq: f64, cycles: f64) -> f64 {
    cycles / (2.0 * PI * freq)
}

/// Number of samples on each side of the centre: the largest M with M / fs ≤ 5σ.
pub fn half_taps(freq: f64, cycles: f64, fs: f64) -> usize {
    // Float-to-int `as` saturates, so an absurd wavelet cannot wrap around.
    (5.0 * sigma(freq, cycles) * fs).floor() as usize
}

/// The taps w(t_k) for k = −M … M (index 0 is k = −M):
/// w(t) = (2 / Σ_k g(t_k)) · exp(2πi f t) · g(t), g(t) = exp(−t² / (2σ²)), t_k = k / fs.
/// The 2/Σg factor makes a real sinusoid of amplitude A give |coefficient| = A (its positive-
/// frequency half carries A/2).
pub fn taps(freq: f64, cycles: f64, fs: f64) -> Vec<Complex64> {
    let s = sigma(freq, cycles);
    let m = half_taps(freq, cycles, fs) as i64;
    let ts: Vec<f64> = (-m..=m).map(|k| k as f64 / fs).collect();
    let g: Vec<f64> = ts.iter().map(|t| (-t * t / (2.0 * s * s)).exp()).collect();
    // Summed in index order: deterministic.
    let scale = 2.0 / g.iter().sum::<f64>();
    ts.iter()
        .zip(&g)
        .map(|(t, g)| Complex64::from_polar(scale * g, 2.0 * PI * freq * t))
        .collect()
}

/// Smallest n ≥ `min` whose only prime factors are 2, 3 and 5 (fast sizes for rustfft).
pub fn fast_len(min: usize) -> usize {
    let mut n = min.max(1);
    loop {
        let mut r = n;
        for p in [2, 3, 5] {
            while r.is_multiple_of(p) {
                r /= p;
            }
        }
        if r == 1 {
            return n;
        }
        n += 1;
    }
}

/// Which samples of the "same" output to keep: `start`, `start + stride`, … (`count` of them).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Keep {
    /// First kept sample index within the epoch.
    pub start: usize,
    /// Step between kept samples.
    pub stride: usize,
    /// Number of kept samples.
    pub count: usize,
}

/// The spectra of a set of wavelets, zero-padded to one FFT length that fits signals of `len`
/// samples without wrap-around (n ≥ len + longest wavelet − 1).
pub struct Bank {
    len: usize,
    nfft: usize,
    halves: Vec<usize>,
    spectra: Vec<Vec<Complex64>>,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
}

/// Per-thread buffers for [`Bank::transform`].
pub struct Scratch {
    signal: Vec<Complex64>,
    product: Vec<Complex64>,
    fft: Vec<Complex64>,
}

impl Bank {
    /// Plans the FFTs once and computes each wavelet's spectrum once.
    pub fn new(wavelets: &[Vec<Complex64>], len: usize) -> Bank {
        let longest = wavelets.iter().map(Vec::len).max().unwrap_or(1);
        let nfft = fast_len(len + longest - 1);
        let mut planner = FftPlanner::<f64>::new();
        let forward = planner.plan_fft_forward(nfft);
        let inverse = planner.plan_fft_inverse(nfft);
        let mut scratch = vec![Complex64::default(); forward.get_inplace_scratch_len()];
        let spectra = wavelets
            .iter()
            .map(|w| {
                let mut spec = w.clone();
                spec.resize(nfft, Complex64::default());
                forward.process_with_scratch(&mut spec, &mut scratch);
                spec
            })
            .collect();
        Bank {
            len,
            nfft,
            halves: wavelets.iter().map(|w| w.len() / 2).collect(),
            spectra,
            forward,
            inverse,
        }
    }

    /// The FFT length in use.
    pub fn nfft(&self) -> usize {
        self.nfft
    }

    /// Fresh buffers for one thread.
    pub fn scratch(&self) -> Scratch {
        let fft_len = self
            .forward
            .get_inplace_scratch_len()
            .max(self.inverse.get_inplace_scratch_len());
        Scratch {
            signal: vec![Complex64::default(); self.nfft],
            product: vec![Complex64::default(); self.nfft],
            fft: vec![Complex64::default(); fft_len],
        }
    }

    /// Convolves `signal` (exactly `len` samples; zeros outside) with every wavelet and writes
    /// the kept samples to `out`, laid out [wavelet, kept sample]. The coefficient at sample t is
    /// Σ_k w(t_k) · x[t − k]: the full linear convolution shifted by M ("same" alignment).
    pub fn transform(&self, signal: &[f32], keep: Keep, s: &mut Scratch, out: &mut [Complex32]) {
        debug_assert_eq!(signal.len(), self.len);
        for (dst, &x) in s.signal.iter_mut().zip(signal) {
            *dst = Complex64::new(f64::from(x), 0.0);
        }
        s.signal[signal.len()..].fill(Complex64::default());
        self.forward.process_with_scratch(&mut s.signal, &mut s.fft);
        let norm = 1.0 / self.nfft as f64;
        for ((spec, &half), row) in self
            .spectra
            .iter()
            .zip(&self.halves)
            .zip(out.chunks_mut(keep.count))
        {
            for ((p, x), w) in s.product.iter_mut().zip(&s.signal).zip(spec) {
                *p = x * w;
            }
            self.inverse
                .process_with_scratch(&mut s.product, &mut s.fft);
            let kept = s.product[half + keep.start..].iter().step_by(keep.stride);
            for (dst, v) in row.iter_mut().zip(kept) {
                let v = v * norm;
                *dst = Complex32::new(v.re as f32, v.im as f32);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Oracle: the "same" convolution written as the plain time-domain sum of its definition,
    /// y[t] = Σ_{k=−M}^{M} w(t_k) x[t − k], with x = 0 outside the epoch (DESIGN.md §4).
    fn direct(signal: &[f32], w: &[Complex64]) -> Vec<Complex64> {
        let m = (w.len() / 2) as i64;
        let n = signal.len() as i64;
        (0..n)
            .map(|t| {
                let mut acc = Complex64::default();
                for (j, wk) in w.iter().enumerate() {
                    let i = t - (j as i64 - m);
                    if (0..n).contains(&i) {
                        acc += wk * f64::from(signal[i as usize]);
                    }
                }
                acc
            })
            .collect()
    }

    #[test]
    fn morlet_fft_path_matches_direct_convolution() {
        // Oracle: the direct sum above. Several epoch lengths, frequencies (including a wavelet
        // longer than the epoch) and seeds; tolerance 1e-5 of the largest coefficient's size,
        // which f32 storage (≈6e-8 relative) easily meets.
        let fs = 250.0;
        for (seed, len) in [(1u64, 50usize), (2, 257), (3, 1000), (4, 16)] {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let x: Vec<f32> = (0..len).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let specs = [(2.0, 3.0), (7.5, 5.0), (40.0, 7.0), (100.0, 4.0)];
            let ws: Vec<_> = specs.iter().map(|&(f, n)| taps(f, n, fs)).collect();
            let bank = Bank::new(&ws, len);
            assert!(bank.nfft() >= len + ws[0].len() - 1);
            let keep = Keep {
                start: 0,
                stride: 1,
                count: len,
            };
            let mut out = vec![Complex32::default(); ws.len() * len];
            bank.transform(&x, keep, &mut bank.scratch(), &mut out);
            for (w, row) in ws.iter().zip(out.chunks(len)) {
                let want = direct(&x, w);
                let peak = want.iter().map(|c| c.norm()).fold(0.0, f64::max);
                for (got, want) in row.iter().zip(&want) {
                    let got = Complex64::new(f64::from(got.re), f64::from(got.im));
                    assert!((got - want).norm() <= 1e-5 * peak, "{got} vs {want}");
                }
            }
        }
    }

    #[test]
    fn morlet_taps_follow_the_definition() {
        // DESIGN.md §4: |t_k| ≤ 5σ, Σ|w| = 2 (the 2/Σg factor), and w(0) is real.
        let (f, n, fs) = (10.0, 7.0, 500.0);
        let w = taps(f, n, fs);
        let m = half_taps(f, n, fs);
        assert_eq!(w.len(), 2 * m + 1);
        assert!(m as f64 / fs <= 5.0 * sigma(f, n));
        assert!((m + 1) as f64 / fs > 5.0 * sigma(f, n));
        let total: f64 = w.iter().map(|c| c.norm()).sum();
        assert!((total - 2.0).abs() < 1e-12);
        assert!(w[m].im.abs() < 1e-15 && w[m].re > 0.0);
    }

    #[test]
    fn morlet_fast_len_has_small_factors() {
        assert_eq!(fast_len(1), 1);
        assert_eq!(fast_len(7), 8);
        assert_eq!(fast_len(1801), 1875);
        assert_eq!(fast_len(1025), 1080);
    }
}
