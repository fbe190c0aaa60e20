//! Complex Morlet wavelets sampled exactly as DESIGN.md §4 defines them, and their linear,
//! "same"-aligned convolution with real signals through the FFT.
//!
//! This module owns the numbers of the `wavelet` op; the op itself (params, layout, crop,
//! parallel loop) lives in [`super::wavelet`]. A [`Bank`] holds the spectra of a set of wavelets
//! for one signal length and one set of kept samples (crop and stride), computed once and reused
//! for every channel and trial. Two real signals share one forward FFT, and only the kept
//! samples are computed: each wavelet's product spectrum is folded onto `nfft / stride` bins and
//! inverted at that length (the derivation is beside [`Bank`]).

use std::f64::consts::PI;
use std::mem::MaybeUninit;
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

/// The FFT length for signals whose linear convolution needs at least `min` samples, kept every
/// `stride`-th: the smallest multiple of `stride` of the form `stride · m` with m 2,3,5-smooth
/// and `stride · m ≥ min`. For a 2,3,5-smooth stride this is the smallest smooth multiple of
/// `stride` that is ≥ `min`; the folded inverse transforms then have the smooth length m.
pub fn plan_len(min: usize, stride: usize) -> usize {
    let stride = stride.max(1);
    stride * fast_len(min.div_ceil(stride))
}

// How the kept samples are computed (the derivation behind [`Bank`]).
//
// Let x be a signal of T samples (x = 0 outside 0 … T − 1) and w(k), k = −h … h, a wavelet's taps
// (w(k) at time k/fs). The op keeps y[t] = Σ_k w(k) x[t − k] ("same" alignment) at t = s + k'·m,
// with s the first kept sample, k' the stride and m = 0 … count − 1.
//
// The samples that matter. Let b = s + k'(count − 1) be the last kept sample. A kept y[t] reads
// x only at t − k ∈ [s − h, b + h], so only the samples in [lo, hi) = [max(0, s − h),
// min(T, b + h + 1)) reach a kept coefficient; the others are set to zero (x' below), which
// changes no kept coefficient.
//
// Circular form. Take N ≥ max(hi − s + h, b + h + 1 − lo) and the centred wavelet
// c[j] = Σ_{k ≡ j mod N} w(k) (the taps placed at their lags modulo N, added where a short N
// makes them meet). For a kept t, the circular sum Σ_j c[j] x'[(t − j) mod N] = Σ_k w(k)
// x'[(t − k) mod N] equals y[t], because every index t − k ∈ [s − h, b + h] outside [lo, hi)
// lands, modulo N, where x' is zero: if t − k < 0 then t − k + N ∈ [s − h + N, N) ⊆ [hi, N)
// (N ≥ hi − s + h); if 0 ≤ t − k < lo it is itself below lo; if t − k ≥ hi then either t − k < N
// (the zero padding [hi, N)) or t − k − N ∈ [0, lo) (t − k ≤ b + h < N + lo). This bound is at
// most the kept span plus the wavelet's length, b − s + 2h + 1, and never more than the full
// linear convolution's T + 2h; wrap-around of the full convolution's tails lands only on
// coefficients that are not kept. So with DFTs X[j] = Σ_n x'[n] e^{−2πi jn/N} and
// C[j] = Σ_n c[n] e^{−2πi jn/N},
//     y[t] = (1/N) Σ_{j=0}^{N−1} X[j] C[j] e^{2πi jt/N}   for every kept t.
//
// C is real. The taps are Hermitian, w(−k) = conj w(k) (an even Gaussian times e^{2πi f t} at
// t_{−k} = −t_k; checked by a test), and so is c (c[−j mod N] = conj c[j], wrapped or not), so
// C[j] = w(0) + Σ_{k≥1} 2 Re(w(k) e^{−2πi jk/N}). The FFT of c gives it up to rounding; its
// imaginary part (rounding only) is dropped. Each bin then costs two real multiplies per signal.
//
// The offset s. e^{2πi j(s + k'm)/N} = e^{2πi js/N} e^{2πi jk'm/N}, and X[j] e^{2πi js/N} is the DFT
// of x rotated by −s (sample n placed at index (n − s) mod N), so the rotation is free: the
// signal is written into the FFT buffer at that offset.
//
// The stride. Choose N = k'·P (see [`plan_len`]) and write j = q + rP, 0 ≤ q < P, 0 ≤ r < k'.
// Then e^{2πi jk'm/N} = e^{2πi (q + rP) m/P} = e^{2πi qm/P}, and
//     y[s + k'm] = Σ_{q=0}^{P−1} e^{2πi qm/P} F[q],   F[q] = (1/N) Σ_{r=0}^{k'−1} X̃[q + rP] C[q + rP],
// with X̃ the rotated signal's DFT: an (unnormalised) inverse DFT of length P of the product
// folded onto P bins (the k' aliases of each bin summed). m stays below P because
// k'(count − 1) = b − s < N (N ≥ b + h + 1 − lo and lo ≤ s). This is the same sum as the
// full-length inverse transform followed by every k'-th sample, rearranged, so the numbers agree
// up to f64 rounding.
//
// The pair. The input is real, so two signals x, y share one forward transform: with
// Z = DFT(x̃ + i ỹ) and Z*[j] = conj Z[(N − j) mod N], X̃ = (Z + Z*)/2 and Ỹ = (Z − Z*)/(2i) (the
// DFT of a real signal is conjugate-symmetric). The factors 1/2 and 1/N are built into C.
//
// Not done: skipping bins where the wavelet's spectrum is negligible. The taps are cut at 5σ,
// and the cut's side lobes keep every bin of the spectrum above ≈ 1e-11 of its peak (measured at
// 250 Hz, N = 960, 4–30 Hz, 3–8 cycles), so no bin is zero or below 1e-12 of the peak, and
// dropping any would change the coefficients by more than f64 rounding.

/// The spectra of a set of wavelets for one signal length and one choice of kept samples:
/// each signal pair costs one forward FFT of length `nfft` and, per wavelet and signal, one fold
/// of the spectrum onto `nfft / stride` bins and one inverse FFT of that length.
pub struct Bank {
    len: usize,
    /// The signal samples `[lo, hi)` that reach a kept coefficient (the derivation above).
    span: (usize, usize),
    nfft: usize,
    folded: usize,
    keep: Keep,
    /// Per wavelet: the real spectrum C of the centred taps, times 1/(2N), each bin's value
    /// twice in a row (`[C[0], C[0], C[1], C[1], …]`), so that it lines up with the interleaved
    /// real and imaginary parts of a signal's spectrum and a fold is a plain element-wise loop.
    spectra: Vec<Vec<f64>>,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
}

/// Per-thread buffers for [`Bank::transform`].
pub struct Scratch {
    pair: Vec<Complex64>,
    /// The first signal's spectrum X̃, interleaved: `[Re X̃[0], Im X̃[0], Re X̃[1], …]`.
    x: Vec<f64>,
    /// The second signal's spectrum Ỹ, laid out the same way.
    y: Vec<f64>,
    folded: Vec<Complex64>,
    fft: Vec<Complex64>,
}

impl Bank {
    /// Plans the FFTs once and computes each wavelet's (centred, scaled) spectrum once, for
    /// signals of `len` samples of which the samples of `keep` are wanted (`keep.start < len`).
    /// Each wavelet has an odd number of taps, centre in the middle (as [`taps`] makes them).
    pub fn new(wavelets: &[Vec<Complex64>], len: usize, keep: Keep) -> Bank {
        let stride = keep.stride.max(1);
        let h = wavelets.iter().map(Vec::len).max().unwrap_or(1) / 2;
        // The op never asks for a first sample past the end; clamped so a bad call cannot panic.
        let keep = Keep {
            stride,
            start: keep.start.min(len.saturating_sub(1)),
            ..keep
        };
        let (span, min) = reach(len, keep, h);
        let nfft = plan_len(min, stride);
        let folded = nfft / stride;
        let mut planner = FftPlanner::<f64>::new();
        let forward = planner.plan_fft_forward(nfft);
        let inverse = planner.plan_fft_inverse(folded);
        let mut scratch = vec![Complex64::default(); forward.get_inplace_scratch_len()];
        // 1/(2N): the 1/2 of the pair separation and the 1/N of the inverse DFT.
        let scale = 0.5 / nfft as f64;
        let spectra = wavelets
            .iter()
            .map(|w| {
                let h = w.len() / 2;
                let mut spec = vec![Complex64::default(); nfft];
                for (n, &tap) in w.iter().enumerate() {
                    // Tap n is at lag n − h: index (n − h) mod N (taps meeting there add up).
                    spec[(n + nfft - h % nfft) % nfft] += tap;
                }
                forward.process_with_scratch(&mut spec, &mut scratch);
                spec.iter().flat_map(|v| [v.re * scale; 2]).collect()
            })
            .collect();
        Bank {
            len,
            span,
            nfft,
            folded,
            keep,
            spectra,
            forward,
            inverse,
        }
    }

    /// The same bank with only the wavelets in `range` (FFT lengths unchanged, so each kept
    /// wavelet gives exactly the coefficients it gives in the whole bank).
    pub fn only(mut self, range: std::ops::Range<usize>) -> Bank {
        self.spectra = self.spectra.drain(range).collect();
        self
    }

    /// A bank with only the wavelets in `range` of this one (the same FFT plans and lengths,
    /// so each gives exactly the coefficients it gives here), leaving this one whole: how one
    /// bank planned once serves every part.
    pub fn part(&self, range: std::ops::Range<usize>) -> Bank {
        Bank {
            spectra: self.spectra[range].to_vec(),
            forward: Arc::clone(&self.forward),
            inverse: Arc::clone(&self.inverse),
            ..*self
        }
    }

    /// The forward FFT length in use.
    pub fn nfft(&self) -> usize {
        self.nfft
    }

    /// The length of the inverse FFTs (`nfft / stride`).
    pub fn folded_len(&self) -> usize {
        self.folded
    }

    /// Output values per signal: `count` kept samples for each wavelet.
    pub fn per_signal(&self) -> usize {
        self.spectra.len() * self.keep.count
    }

    /// Fresh buffers for one thread.
    pub fn scratch(&self) -> Scratch {
        let fft_len = self
            .forward
            .get_inplace_scratch_len()
            .max(self.inverse.get_inplace_scratch_len());
        Scratch {
            pair: vec![Complex64::default(); self.nfft],
            x: vec![0.0; 2 * self.nfft],
            y: vec![0.0; 2 * self.nfft],
            folded: vec![Complex64::default(); 2 * self.folded],
            fft: vec![Complex64::default(); fft_len],
        }
    }

    /// Convolves each signal of `signals` (consecutive signals of exactly `len` samples; zeros
    /// outside) with every wavelet and writes the kept samples to `out`, laid out [signal,
    /// wavelet, kept sample]. The coefficient at sample t is Σ_k w(t_k) · x[t − k]: the full
    /// linear convolution shifted by M ("same" alignment). Signals 0 and 1, 2 and 3, … share a
    /// forward transform (a last odd one is paired with zeros), so a signal's numbers depend on
    /// its position in `signals`: callers that split their data must split it at even counts.
    ///
    /// On x86-64 CPUs with AVX2 the loops around the FFTs (the pair separation, the folds, the
    /// conversion to f32) are compiled a second time for AVX2 and chosen at run time. They are
    /// the same IEEE operations in the same order (no fused multiply-add), so both versions give
    /// the same bits; the FFTs are rustfft's, which chooses its own instructions.
    ///
    /// Every element of `out` is written (when it holds `per_signal` values for each signal), so
    /// `out` may be memory not written before ([`Slot`]).
    pub fn transform<T: Slot>(&self, signals: &[f32], s: &mut Scratch, out: &mut [T]) {
        crate::wide::with_avx2(
            #[inline(always)]
            || self.transform_any(signals, s, out),
        );
    }

    #[inline(always)]
    fn transform_any<T: Slot>(&self, signals: &[f32], s: &mut Scratch, out: &mut [T]) {
        let per = self.per_signal();
        if self.len == 0 || per == 0 {
            // Nothing to transform; `out` is written all the same (it is empty unless the
            // caller's sizes disagree with the bank's).
            out.iter_mut().for_each(|o| o.set(Complex32::default()));
            return;
        }
        debug_assert_eq!(signals.len() % self.len, 0);
        debug_assert_eq!(out.len(), signals.len() / self.len * per);
        let pairs = signals.chunks(2 * self.len);
        let next = signals.chunks(2 * self.len).skip(1).map(Some).chain([None]);
        for ((src, next), dst) in pairs.zip(next).zip(out.chunks_mut(2 * per)) {
            let (x, y) = src.split_at(self.len.min(src.len()));
            let (out_x, out_y) = dst.split_at_mut(per.min(dst.len()));
            self.pair(x, y, s);
            // The next pair's samples are read from memory while this pair's transforms run,
            // instead of when its first loop waits for them.
            prefetch(next.unwrap_or_default());
            self.fold_and_invert(s, out_x, out_y);
            silence_zero_signal(x, y, out_x);
            silence_zero_signal(y, x, out_y);
        }
    }

    /// Spectra of `x` and `y` (empty: zeros), each rotated by −start, into `s.x` and `s.y`,
    /// each times 2 (the 1/2 is in the wavelets' spectra).
    #[inline(always)]
    fn pair(&self, x: &[f32], y: &[f32], s: &mut Scratch) {
        let (n, start) = (self.nfft, self.keep.start);
        let (lo, hi) = self.span;
        let sample = |i: usize| {
            let re = x.get(i).map_or(0.0, |&v| f64::from(v));
            let im = y.get(i).map_or(0.0, |&v| f64::from(v));
            Complex64::new(re, im)
        };
        // Sample i of [lo, hi) goes to (i − start) mod N: samples start … hi − 1 first, then
        // zeros, then samples lo … start − 1 at the end (hi − lo ≤ N, see `reach`).
        let (head, rest) = s.pair.split_at_mut(hi - start);
        let (zeros, tail) = rest.split_at_mut(n - (hi - lo));
        for (run, from) in [(head, start), (tail, lo)] {
            let to = from + run.len();
            match (x.get(from..to), y.get(from..to)) {
                // Both signals hold the run (every pair but a last odd signal): plain loops.
                (Some(xs), Some(ys)) => {
                    for ((z, &a), &b) in run.iter_mut().zip(xs).zip(ys) {
                        *z = Complex64::new(f64::from(a), f64::from(b));
                    }
                }
                (Some(xs), None) if y.is_empty() => {
                    for (z, &a) in run.iter_mut().zip(xs) {
                        *z = Complex64::new(f64::from(a), 0.0);
                    }
                }
                _ => {
                    for (i, z) in (from..to).zip(run) {
                        *z = sample(i);
                    }
                }
            }
        }
        zeros.fill(Complex64::default());
        self.forward.process_with_scratch(&mut s.pair, &mut s.fft);
        // X̃[j] = Z[j] + C[j] and Ỹ[j] = −i (Z[j] − C[j]) (each times 2), C[j] = conj Z[N − j]
        // (bin 0 pairs with itself). C goes into `s.y` first, so every step below is a plain
        // loop over the bins in order; the same operations as the textbook per-bin form.
        let c: &mut [Complex64] = bytemuck::cast_slice_mut(&mut s.y);
        if let (Some((c0, c)), Some((z0, z))) = (c.split_first_mut(), s.pair.split_first()) {
            *c0 = z0.conj();
            for (c, m) in c.iter_mut().zip(z.iter().rev()) {
                *c = m.conj();
            }
        }
        let z: &[f64] = bytemuck::cast_slice(&s.pair);
        for ((x, &z), &c) in s.x.iter_mut().zip(z).zip(&s.y) {
            *x = z + c;
        }
        // (Z − C) / i = −i (Z − C): (re, im) → (im, −re).
        for (y, z) in s.y.chunks_exact_mut(2).zip(z.chunks_exact(2)) {
            let (c_re, c_im) = (y[0], y[1]);
            y[0] = z[1] - c_im;
            y[1] = -(z[0] - c_re);
        }
    }

    /// For every wavelet: folds both products onto `folded` bins, one inverse call for the two,
    /// and the `count` kept samples to `out_x` and `out_y` (which may be empty).
    #[inline(always)]
    fn fold_and_invert<T: Slot>(&self, s: &mut Scratch, out_x: &mut [T], out_y: &mut [T]) {
        let p = self.folded;
        let count = self.keep.count;
        debug_assert!(count <= p);
        for (w, spec) in self.spectra.iter().enumerate() {
            let folded: &mut [f64] = bytemuck::cast_slice_mut(&mut s.folded);
            let (fx, fy) = folded.split_at_mut(2 * p);
            fold(fx, fy, &s.x, &s.y, spec);
            self.inverse.process_with_scratch(&mut s.folded, &mut s.fft);
            let rows = [(&mut *out_x, 0), (&mut *out_y, p)];
            for (out, at) in rows {
                if let Some(row) = out.get_mut(w * count..(w + 1) * count) {
                    T::set_all(row, &s.folded[at..at + count]);
                }
            }
        }
    }
}

/// Writes exact zeros over `out` when `signal` is all zeros but its partner in the shared
/// forward transform is not. The pair separation X̃ = (Z + Z*)/2 cancels the partner's spectrum
/// only up to rounding, so a zero signal would otherwise get coefficients of the order of 1e-16
/// of its partner's, which have a phase: a channel referenced to itself would then look like a
/// signal to the clustering measures instead of having no phase (DESIGN §4). Every other output
/// keeps its bits: a signal with a non-zero sample is not touched, nor a zero one whose partner
/// is zero or absent (its transform is exactly zero already).
#[inline(always)]
fn silence_zero_signal<T: Slot>(signal: &[f32], partner: &[f32], out: &mut [T]) {
    let zero = |v: &[f32]| v.iter().all(|&a| a == 0.0);
    if !signal.is_empty() && zero(signal) && !zero(partner) {
        out.iter_mut().for_each(|o| o.set(Complex32::default()));
    }
}

/// Asks the CPU to bring `values` into its caches (a hint: no result, no fault, no change to any
/// number; nothing on other architectures).
#[inline(always)]
fn prefetch(values: &[f32]) {
    #[cfg(target_arch = "x86_64")]
    for line in values.chunks(16) {
        // SAFETY: a prefetch only hints at an address (here one inside `values`); it reads
        // nothing the program can see and never faults.
        unsafe {
            std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(
                line.as_ptr().cast(),
            )
        };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = values;
}

/// An element of the output of [`Bank::transform`]: an initialised value, or memory not written
/// yet (`MaybeUninit`), for callers that would otherwise clear the memory only for the transform
/// to overwrite every value.
pub trait Slot: Sized {
    /// Store `v`.
    fn set(&mut self, v: Complex32);

    /// Store `from` rounded to f32, element for element (`to` and `from` of one length).
    fn set_all(to: &mut [Self], from: &[Complex64]);
}

impl Slot for Complex32 {
    #[inline(always)]
    fn set(&mut self, v: Complex32) {
        *self = v;
    }

    #[inline(always)]
    fn set_all(to: &mut [Self], from: &[Complex64]) {
        // As plain f64 → f32 conversions of the interleaved (re, im) numbers: the same roundings
        // as per complex value, in a loop that converts four at a time with no shuffles.
        let to: &mut [f32] = bytemuck::cast_slice_mut(to);
        let from: &[f64] = bytemuck::cast_slice(from);
        for (t, &f) in to.iter_mut().zip(from) {
            *t = f as f32;
        }
    }
}

impl Slot for MaybeUninit<Complex32> {
    #[inline(always)]
    fn set(&mut self, v: Complex32) {
        self.write(v);
    }

    #[inline(always)]
    fn set_all(to: &mut [Self], from: &[Complex64]) {
        let n = 2 * to.len();
        // SAFETY: `Complex32` is `repr(C)` with two `f32` fields (re, im) and no padding, so
        // `to`'s memory is `2 · len` slots of `MaybeUninit<f32>` in that order; the slice
        // borrows `to` exclusively for its lifetime and only `MaybeUninit` values are written.
        let to = unsafe {
            std::slice::from_raw_parts_mut(to.as_mut_ptr().cast::<MaybeUninit<f32>>(), n)
        };
        let from: &[f64] = bytemuck::cast_slice(from);
        for (t, &f) in to.iter_mut().zip(from) {
            t.write(f as f32);
        }
    }
}

/// For signals of `len` samples, the kept samples `keep` (`keep.start < len`) and wavelets of
/// half-length `h`: the samples `[lo, hi)` that reach a kept coefficient, and the shortest
/// circular convolution that gives every kept coefficient without wrap-around,
/// max(hi − start + h, last + h + 1 − lo) (the derivation above [`Bank`]). It is at least
/// hi − lo, so those samples fit in one FFT buffer.
fn reach(len: usize, keep: Keep, h: usize) -> ((usize, usize), usize) {
    let start = keep.start;
    let last = start + keep.stride * keep.count.saturating_sub(1);
    let (lo, hi) = (start.saturating_sub(h), len.min(last + h + 1));
    ((lo, hi), (hi - start + h).max(last + h + 1 - lo))
}

/// F[q] = Σ_r X̃[q + rP] C[q + rP] for both signals of a pair, on interleaved values:
/// `fx[i] = Σ_r x[i + r·n] · spec[i + r·n]` with n = `fx.len()`, and the same for `fy` from `y`,
/// summed in order r = 0, 1, … (each element's sum its own, so the order, and the bits, do not
/// depend on how the loops are vectorised). Each pass reads a run of the wavelet's spectrum once
/// for both signals. The first pass sums up to four aliases, later ones add three at a time, so
/// the common stride 4 is one pass; each pass is a plain element-wise loop that the compiler
/// vectorises.
#[inline(always)]
fn fold(fx: &mut [f64], fy: &mut [f64], x: &[f64], y: &[f64], spec: &[f64]) {
    let n = fx.len();
    debug_assert!(n > 0 && fy.len() == n);
    debug_assert!(x.len() == spec.len() && y.len() == spec.len() && spec.len().is_multiple_of(n));
    let mut rows = x
        .chunks_exact(n)
        .zip(y.chunks_exact(n))
        .zip(spec.chunks_exact(n));
    // The first pass writes the sum of up to four aliases; later passes add three at a time.
    let dst = fx.iter_mut().zip(fy.iter_mut());
    match (rows.next(), rows.next(), rows.next(), rows.next()) {
        (
            Some(((x0, y0), c0)),
            Some(((x1, y1), c1)),
            Some(((x2, y2), c2)),
            Some(((x3, y3), c3)),
        ) => {
            let terms = (x0.iter().zip(y0).zip(c0))
                .zip(x1.iter().zip(y1).zip(c1))
                .zip(x2.iter().zip(y2).zip(c2))
                .zip(x3.iter().zip(y3).zip(c3));
            for ((a, b), (((((x0, y0), c0), ((x1, y1), c1)), ((x2, y2), c2)), ((x3, y3), c3))) in
                dst.zip(terms)
            {
                *a = ((x0 * c0 + x1 * c1) + x2 * c2) + x3 * c3;
                *b = ((y0 * c0 + y1 * c1) + y2 * c2) + y3 * c3;
            }
        }
        (Some(((x0, y0), c0)), Some(((x1, y1), c1)), Some(((x2, y2), c2)), None) => {
            let terms = (x0.iter().zip(y0).zip(c0))
                .zip(x1.iter().zip(y1).zip(c1))
                .zip(x2.iter().zip(y2).zip(c2));
            for ((a, b), ((((x0, y0), c0), ((x1, y1), c1)), ((x2, y2), c2))) in dst.zip(terms) {
                *a = (x0 * c0 + x1 * c1) + x2 * c2;
                *b = (y0 * c0 + y1 * c1) + y2 * c2;
            }
            return;
        }
        (Some(((x0, y0), c0)), Some(((x1, y1), c1)), None, None) => {
            let terms = (x0.iter().zip(y0).zip(c0)).zip(x1.iter().zip(y1).zip(c1));
            for ((a, b), (((x0, y0), c0), ((x1, y1), c1))) in dst.zip(terms) {
                *a = x0 * c0 + x1 * c1;
                *b = y0 * c0 + y1 * c1;
            }
            return;
        }
        (Some(((x0, y0), c0)), None, None, None) => {
            for ((a, b), ((x0, y0), c0)) in dst.zip(x0.iter().zip(y0).zip(c0)) {
                *a = x0 * c0;
                *b = y0 * c0;
            }
            return;
        }
        _ => return,
    }
    loop {
        let dst = fx.iter_mut().zip(fy.iter_mut());
        match (rows.next(), rows.next(), rows.next()) {
            (Some(((xa, ya), ca)), Some(((xb, yb), cb)), Some(((xc, yc), cc))) => {
                let terms = (xa.iter().zip(ya).zip(ca))
                    .zip(xb.iter().zip(yb).zip(cb))
                    .zip(xc.iter().zip(yc).zip(cc));
                for ((a, b), ((((xa, ya), ca), ((xb, yb), cb)), ((xc, yc), cc))) in dst.zip(terms) {
                    *a = ((*a + xa * ca) + xb * cb) + xc * cc;
                    *b = ((*b + ya * ca) + yb * cb) + yc * cc;
                }
            }
            (Some(((xa, ya), ca)), Some(((xb, yb), cb)), None) => {
                let terms = (xa.iter().zip(ya).zip(ca)).zip(xb.iter().zip(yb).zip(cb));
                for ((a, b), (((xa, ya), ca), ((xb, yb), cb))) in dst.zip(terms) {
                    *a = (*a + xa * ca) + xb * cb;
                    *b = (*b + ya * ca) + yb * cb;
                }
                return;
            }
            (Some(((xa, ya), ca)), None, None) => {
                for ((a, b), ((xa, ya), ca)) in dst.zip(xa.iter().zip(ya).zip(ca)) {
                    *a += xa * ca;
                    *b += ya * ca;
                }
                return;
            }
            _ => return,
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

    /// Random signals, `count` of `len` samples each, laid end to end.
    fn signals(seed: u64, count: usize, len: usize) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..count * len).map(|_| rng.gen_range(-1.0..1.0)).collect()
    }

    #[test]
    fn morlet_fft_path_matches_direct_convolution() {
        // Oracle: the direct sum above. Several epoch lengths, frequencies (including a wavelet
        // longer than the epoch) and seeds, one, two and three signals per call (pairs share a
        // forward FFT; an odd last one is paired with zeros); tolerance 1e-5 of the largest
        // coefficient's size, which f32 storage (≈6e-8 relative) easily meets.
        let fs = 250.0;
        for (seed, len, count) in [
            (1u64, 50usize, 1usize),
            (2, 257, 2),
            (3, 1000, 3),
            (4, 16, 2),
        ] {
            let x = signals(seed, count, len);
            let specs = [(2.0, 3.0), (7.5, 5.0), (40.0, 7.0), (100.0, 4.0)];
            let ws: Vec<_> = specs.iter().map(|&(f, n)| taps(f, n, fs)).collect();
            let keep = Keep {
                start: 0,
                stride: 1,
                count: len,
            };
            let bank = Bank::new(&ws, len, keep);
            // The "same" output needs N ≥ T + h, not the full convolution's T + 2h (derivation
            // beside `Bank`); with a 2 Hz wavelet on 16 or 50 samples N is even shorter than
            // the wavelet, so its taps wrap around and add up.
            assert!(bank.nfft() >= len + ws[0].len() / 2);
            let mut out = vec![Complex32::default(); count * ws.len() * len];
            bank.transform(&x, &mut bank.scratch(), &mut out);
            for (signal, rows) in x.chunks(len).zip(out.chunks(ws.len() * len)) {
                for (w, row) in ws.iter().zip(rows.chunks(len)) {
                    let want = direct(signal, w);
                    let peak = want.iter().map(|c| c.norm()).fold(0.0, f64::max);
                    for (got, want) in row.iter().zip(&want) {
                        let got = Complex64::new(f64::from(got.re), f64::from(got.im));
                        assert!((got - want).norm() <= 1e-5 * peak, "{got} vs {want}");
                    }
                }
            }
        }
    }

    #[test]
    fn morlet_avx2_and_portable_paths_give_the_same_bits() {
        // Reference: the portable path (itself checked against the direct sum above). The AVX2
        // build of the same loops must not change a single bit, so results never depend on the
        // CPU that computed them.
        let fs = 250.0;
        let (len, count) = (625, 5);
        let x = signals(9, count, len);
        let ws: Vec<_> = [(4.0, 3.0), (11.0, 5.0), (30.0, 8.0)]
            .iter()
            .map(|&(f, n)| taps(f, n, fs))
            .collect();
        let keep = Keep {
            start: 100,
            stride: 4,
            count: 108,
        };
        let bank = Bank::new(&ws, len, keep);
        let mut portable = vec![Complex32::default(); count * bank.per_signal()];
        bank.transform_any(&x, &mut bank.scratch(), &mut portable);
        let mut dispatched = vec![Complex32::default(); portable.len()];
        bank.transform(&x, &mut bank.scratch(), &mut dispatched);
        let bits = |v: &[Complex32]| -> Vec<(u32, u32)> {
            v.iter().map(|z| (z.re.to_bits(), z.im.to_bits())).collect()
        };
        assert_eq!(bits(&portable), bits(&dispatched));
        assert!(portable.iter().any(|z| z.norm() > 0.0));
    }

    #[test]
    fn morlet_strided_cropped_output_matches_direct_convolution() {
        // Oracle: the direct sum above (DESIGN.md §4's definition), sampled at start + k·m.
        // The op computes only these samples, by folding the spectrum onto nfft/k bins with the
        // first kept sample's offset built into the wavelets' spectra; this checks that against
        // the definition for strides 1, 2, 3, 4 and 7 (7 cannot divide a 2,3,5-smooth length,
        // so the length is chosen as a multiple of it), first kept samples that are and are not
        // multiples of the stride, and lengths whose plain smooth FFT length the stride does not
        // divide; crops deep inside a long epoch (only the samples within a wavelet's reach of
        // the kept ones go into the FFT) and a crop so short that the FFT is shorter than the
        // longest wavelet (its taps wrap around). Tolerance 1e-6 of the row's largest coefficient: f32 storage rounds each value
        // by ≤ 6e-8 of its size, f64 FFT error is ~1e-15.
        let fs = 250.0;
        let specs = [(4.0, 3.0), (9.0, 5.0), (30.0, 8.0)];
        let ws: Vec<_> = specs.iter().map(|&(f, n)| taps(f, n, fs)).collect();
        let longest = ws.iter().map(Vec::len).max().unwrap();
        let mut not_dividing = 0;
        for (seed, len, stride, start, end) in [
            (10u64, 626usize, 1usize, 100usize, 525usize),
            (11, 626, 2, 100, 525),
            (12, 626, 3, 101, 525),
            (13, 626, 4, 100, 525),
            (14, 626, 4, 101, 526),
            (15, 626, 4, 0, 625),
            (16, 500, 3, 7, 480),
            (17, 500, 7, 13, 499),
            (18, 300, 2, 299, 299),
            (19, 80, 5, 3, 70),
            (20, 2000, 4, 700, 1300),
            (21, 2000, 3, 701, 1301),
            (22, 40, 1, 10, 20),
        ] {
            let keep = Keep {
                start,
                stride,
                count: (end - start) / stride + 1,
            };
            let bank = Bank::new(&ws, len, keep);
            let (_, min) = reach(len, keep, longest / 2);
            assert!(bank.nfft() >= min && bank.nfft().is_multiple_of(stride));
            // Never longer than the full linear convolution's length.
            assert!(bank.nfft() <= plan_len(len + longest - 1, stride));
            assert_eq!(bank.folded_len() * stride, bank.nfft());
            not_dividing += usize::from(!fast_len(min).is_multiple_of(stride));
            let x = signals(seed, 3, len);
            let per = ws.len() * keep.count;
            let mut out = vec![Complex32::default(); 3 * per];
            bank.transform(&x, &mut bank.scratch(), &mut out);
            for (signal, rows) in x.chunks(len).zip(out.chunks(per)) {
                for (w, row) in ws.iter().zip(rows.chunks(keep.count)) {
                    let full = direct(signal, w);
                    let peak = full.iter().map(|c| c.norm()).fold(0.0, f64::max);
                    for (m, got) in row.iter().enumerate() {
                        let want = full[start + stride * m];
                        let got = Complex64::new(f64::from(got.re), f64::from(got.im));
                        assert!(
                            (got - want).norm() <= 1e-6 * peak,
                            "len {len} stride {stride} start {start} m {m}: {got} vs {want}"
                        );
                    }
                }
            }
        }
        assert!(not_dividing >= 3, "{not_dividing}");
    }

    #[test]
    fn morlet_transform_writes_every_output_value() {
        // The op hands `transform` memory not written before and relies on every value being
        // written. Outputs prefilled with NaN must come back finite everywhere: odd and even
        // signal counts (a last odd signal is paired with zeros), strides, crops, one wavelet
        // and several, and the empty bank.
        let fs = 250.0;
        let ws: Vec<_> = [(4.0, 3.0), (12.0, 5.0), (30.0, 8.0)]
            .iter()
            .map(|&(f, n)| taps(f, n, fs))
            .collect();
        for (len, count, start, stride, kept, wavelets) in [
            (300usize, 5usize, 20usize, 3usize, 90usize, 3usize),
            (300, 4, 0, 1, 300, 3),
            (64, 1, 10, 4, 12, 1),
            (64, 3, 0, 2, 32, 2),
            (64, 2, 0, 1, 64, 0),
        ] {
            let keep = Keep {
                start,
                stride,
                count: kept,
            };
            let bank = Bank::new(&ws, len, keep).only(0..wavelets);
            let x = signals(30 + len as u64, count, len);
            let mut out = vec![Complex32::new(f32::NAN, f32::NAN); count * bank.per_signal()];
            bank.transform(&x, &mut bank.scratch(), &mut out);
            assert!(
                out.iter().all(|z| z.re.is_finite() && z.im.is_finite()),
                "len {len}, {count} signals, stride {stride}, {wavelets} wavelets"
            );
        }
    }

    #[test]
    fn morlet_plan_len_is_a_smooth_multiple_of_the_stride() {
        for (min, stride, want) in [
            (924, 1, 960),
            (924, 4, 960),
            (924, 7, 7 * 135),
            (1000, 3, 1080),
        ] {
            assert_eq!(plan_len(min, stride), want, "{min} {stride}");
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
    fn morlet_taps_are_hermitian() {
        // The fast path uses only the real part of the centred taps' DFT; that DFT is real
        // exactly when w(−k) = conj w(k) (DFT symmetry, any signal-processing text). Checked
        // here on the taps themselves, to rounding.
        for (f, n, fs) in [(4.0, 3.0, 250.0), (30.0, 8.0, 250.0), (10.0, 7.0, 500.0)] {
            let w = taps(f, n, fs);
            let m = w.len() / 2;
            for k in 1..=m {
                assert!(
                    (w[m + k] - w[m - k].conj()).norm() <= 1e-15,
                    "{f} Hz lag {k}"
                );
            }
        }
    }

    #[test]
    fn morlet_fast_len_has_small_factors() {
        assert_eq!(fast_len(1), 1);
        assert_eq!(fast_len(7), 8);
        assert_eq!(fast_len(1801), 1875);
        assert_eq!(fast_len(1025), 1080);
    }
}
