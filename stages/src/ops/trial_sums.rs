//! The across-trials kernel of the `clustering` op: the running sums of [`super::measures`] for
//! one channel pair at many (time) points at once, summed over the trials of a condition.
//!
//! Data layout ("slab"): one condition's trials at one frequency, per channel a plane of f32 laid
//! out `[time block][trial][lane]` with [`LANES`] consecutive time points per block (the last
//! block padded with zeros). (Planes widened to f64 once per channel were tried: the pair loop
//! then moves twice the bytes from L2 and ran at half the speed; the f32 → f64 conversions in
//! the loop cost less than those loads.) The sum over trials of one block then reads contiguous memory, and
//! the [`LANES`] time points of a block are independent f64 accumulators that stay in registers
//! and vectorise; no horizontal reduction is needed.
//!
//! Only the sums the requested measures need are computed ([`Needs`]): the phasor sum for
//! plv/ppc, Σ Im S for wpli/dwpli/icoh, Σ |Im S| for wpli/dwpli, Σ (Im S)² for dwpli, Σ sign(Im S)
//! for pli. Per-channel sums (Σ |X|² for icoh, and whether a zero coefficient occurs) are taken
//! while the slab is built. Every sum runs over the trials in trial order, in f64: the result
//! depends on the data alone, never on the thread count.

use num_complex::Complex32;

use super::measures::{polar, Measure, Sums};

/// Time points per block: one block of each of the four planes of both channels of a pair fits
/// the 16 vector registers of baseline x86-64 together with its accumulators.
pub const LANES: usize = 4;

/// Which sums the requested measures need.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Needs {
    /// Σ e^{iΔφ} (plv, ppc): the unit-phasor planes.
    pub phasor: bool,
    /// Σ Im S (wpli, dwpli, icoh): the raw-coefficient planes.
    pub im: bool,
    /// Σ |Im S| (wpli, dwpli).
    pub abs_im: bool,
    /// Σ (Im S)² (dwpli).
    pub im2: bool,
    /// Σ sign(Im S) (pli).
    pub sign: bool,
    /// Σ |X|² per channel (icoh).
    pub power: bool,
}

impl Needs {
    /// The sums behind `measures`.
    pub fn of(measures: &[Measure]) -> Needs {
        let mut n = Needs::default();
        for m in measures {
            match m {
                Measure::Plv | Measure::Ppc => n.phasor = true,
                Measure::Pli => n.sign = true,
                Measure::Wpli => (n.im, n.abs_im) = (true, true),
                Measure::Dwpli => (n.im, n.abs_im, n.im2) = (true, true, true),
                Measure::Icoh => (n.im, n.power) = (true, true),
            }
        }
        n
    }

    /// True when the raw coefficients are needed (anything built on Im S).
    pub fn raw(&self) -> bool {
        self.im || self.abs_im || self.im2 || self.sign
    }
}

/// Number of time blocks for `times` points.
pub fn blocks(times: usize) -> usize {
    times.div_ceil(LANES)
}

/// One channel's planes in a slab, each `[block][trial][lane]`; a plane not needed is empty.
#[derive(Clone, Debug, Default)]
pub struct Planes {
    /// Number of trials.
    pub trials: usize,
    /// Re of the unit phasor X/|X| (0 where X = 0).
    pub unit_re: Vec<f32>,
    /// Im of the unit phasor.
    pub unit_im: Vec<f32>,
    /// Re X.
    pub raw_re: Vec<f32>,
    /// Im X.
    pub raw_im: Vec<f32>,
    /// Σ |X|² over the trials, per time point (when `power` is needed).
    pub power: Vec<f64>,
    /// Per time point: a trial has X = 0 there (no phase).
    pub zero: Vec<bool>,
}

impl Planes {
    /// Planes for `trials` trials of `times` points, with the planes `needs` asks for (zeroed).
    pub fn new(needs: Needs, trials: usize, times: usize) -> Planes {
        let mut p = Planes::default();
        p.reshape(needs, trials, times);
        p
    }

    /// Re-shapes these planes for `trials` trials of `times` points and the planes `needs` asks
    /// for, keeping their memory (planes reused from one tile or call to the next touch no
    /// fresh pages). Values are left as they were: [`Planes::fill`] writes every element, the
    /// padding lanes included.
    pub fn reshape(&mut self, needs: Needs, trials: usize, times: usize) {
        let len = blocks(times) * trials * LANES;
        let fit = |v: &mut Vec<f32>, wanted: bool| v.resize(if wanted { len } else { 0 }, 0.0);
        fit(&mut self.unit_re, needs.phasor);
        fit(&mut self.unit_im, needs.phasor);
        fit(&mut self.raw_re, needs.raw());
        fit(&mut self.raw_im, needs.raw());
        self.power.resize(if needs.power { times } else { 0 }, 0.0);
        self.zero.resize(times, false);
        self.trials = trials;
    }
}

impl Planes {
    /// Fills the planes with one channel's trials, `series(k)` being the coefficients of trial
    /// k at every time point; the trial count and time points are those of [`Planes::new`] (or
    /// of the last [`Planes::reshape`]). Every element is written, the padding lanes of the last
    /// block with zeros.
    ///
    /// Compiled a second time for AVX2 and chosen at run time (as [`PairSums::compute_blocks`]):
    /// the unit phasors' square roots and divisions are exactly rounded IEEE operations, so
    /// the wider build gives the same bits.
    pub fn fill<'a>(&mut self, needs: Needs, series: impl Fn(usize) -> &'a [Complex32]) {
        crate::wide::with_avx2(
            #[inline(always)]
            || self.fill_any(needs, series),
        );
    }

    #[inline(always)]
    fn fill_any<'a>(&mut self, needs: Needs, series: impl Fn(usize) -> &'a [Complex32]) {
        let times = self.zero.len();
        let n = self.trials;
        self.zero.fill(false);
        self.power.fill(0.0);
        if !times.is_multiple_of(LANES) {
            let last = (blocks(times) - 1) * n * LANES;
            for plane in [
                &mut self.unit_re,
                &mut self.unit_im,
                &mut self.raw_re,
                &mut self.raw_im,
            ] {
                if !plane.is_empty() {
                    plane[last..].fill(0.0);
                }
            }
        }
        let mut unit = vec![Complex32::default(); times];
        for k in 0..n {
            if k + PREFETCH < n {
                prefetch(&series(k + PREFETCH)[..times]);
            }
            let series = &series(k)[..times];
            if needs.phasor {
                // Converted in a loop of its own (it vectorises), then scattered into the lanes.
                for (u, &z) in unit.iter_mut().zip(series) {
                    *u = polar(z).0;
                }
                scatter(&unit, k, n, &mut self.unit_re, &mut self.unit_im);
            }
            if needs.raw() {
                scatter(series, k, n, &mut self.raw_re, &mut self.raw_im);
            }
            for (zero, z) in self.zero.iter_mut().zip(series) {
                *zero |= z.re == 0.0 && z.im == 0.0;
            }
            for (power, z) in self.power.iter_mut().zip(series) {
                *power += f64::from(z.re).powi(2) + f64::from(z.im).powi(2);
            }
        }
    }
}

/// Trials read ahead by [`Planes::fill`]: a tile's piece of a trial is a few cache lines,
/// too short for the hardware to notice a stream, so the lines of the trial this many ahead
/// are asked for while the current one is converted.
const PREFETCH: usize = 4;

/// A hint to bring `values` into the cache (no effect on results; nothing off x86-64).
#[inline(always)]
fn prefetch(values: &[Complex32]) {
    #[cfg(target_arch = "x86_64")]
    for line in values.chunks(8) {
        // SAFETY: a prefetch of an address inside a live slice; it reads nothing and cannot
        // fault.
        unsafe {
            std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(
                line.as_ptr().cast(),
            )
        };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = values;
}

/// Trial `k` of `n` (`values` at every time point) into the planes `re`, `im` laid out
/// `[block][trial][lane]`: block `blk` of trial k starts at (blk · n + k) · LANES, one short
/// contiguous run per block, copied lane by lane (no index arithmetic per element).
fn scatter(values: &[Complex32], k: usize, n: usize, re: &mut [f32], im: &mut [f32]) {
    for (blk, src) in values.chunks(LANES).enumerate() {
        let at = (blk * n + k) * LANES;
        let span = at..at + src.len();
        let pairs = re[span.clone()].iter_mut().zip(im[span].iter_mut());
        for ((re, im), z) in pairs.zip(src) {
            (*re, *im) = (z.re, z.im);
        }
    }
}

/// `out[i] = f(p[i], q[i]) as f32`, inlined so that `f` vectorises.
#[inline(always)]
fn zip2(p: &[f64], q: &[f64], f: impl Fn(f64, f64) -> f64, out: &mut [f32]) {
    for ((o, &p), &q) in out.iter_mut().zip(p).zip(q) {
        *o = f(p, q) as f32;
    }
}

/// The sums of one pair at the time points of a range of blocks of a slab (a tile, or all).
#[derive(Clone, Debug, Default)]
pub struct PairSums {
    blocks: usize,
    /// The first block of the range last computed.
    first: usize,
    phasor_re: Vec<f64>,
    phasor_im: Vec<f64>,
    im: Vec<f64>,
    abs_im: Vec<f64>,
    im2: Vec<f64>,
    sign: Vec<f64>,
}

impl PairSums {
    /// Room for `blocks` blocks of every sum in `needs`.
    pub fn new(needs: Needs, blocks: usize) -> PairSums {
        let len = blocks * LANES;
        let take = |b: bool| if b { vec![0.0; len] } else { Vec::new() };
        PairSums {
            blocks,
            first: 0,
            phasor_re: take(needs.phasor),
            phasor_im: take(needs.phasor),
            im: take(needs.im),
            abs_im: take(needs.abs_im),
            im2: take(needs.im2),
            sign: take(needs.sign),
        }
    }

    /// Fill with the sums of channels `a`, `b` over `trials` trials, every block.
    pub fn compute(&mut self, needs: Needs, a: &Planes, b: &Planes, trials: usize) {
        self.compute_blocks(needs, a, b, trials, 0..self.blocks);
    }

    /// Fill with the sums of channels `a`, `b` over `trials` trials for the blocks `range`
    /// (at most the capacity of [`PairSums::new`]).
    ///
    /// On x86-64 CPUs with AVX2 the same code is compiled a second time for AVX2 and chosen at
    /// run time: four f64 lanes per instruction instead of two. The arithmetic is the same IEEE
    /// operations in the same order (no fused multiply-add: that is a separate feature, not
    /// enabled), so both versions give the same bits.
    pub fn compute_blocks(
        &mut self,
        needs: Needs,
        a: &Planes,
        b: &Planes,
        trials: usize,
        range: std::ops::Range<usize>,
    ) {
        crate::wide::with_avx2(
            #[inline(always)]
            || self.compute_any(needs, a, b, trials, range),
        );
    }

    #[inline(always)]
    fn compute_any(
        &mut self,
        needs: Needs,
        a: &Planes,
        b: &Planes,
        trials: usize,
        range: std::ops::Range<usize>,
    ) {
        assert!(range.len() <= self.blocks, "more blocks than room");
        self.first = range.start;
        match (
            needs.phasor,
            needs.raw(),
            needs.abs_im,
            needs.im2,
            needs.sign,
        ) {
            (true, false, ..) => {
                self.fused::<true, false, false, false, false>(a, b, trials, range)
            }
            (true, true, false, false, false) => {
                self.fused::<true, true, false, false, false>(a, b, trials, range)
            }
            (true, true, true, false, false) => {
                self.fused::<true, true, true, false, false>(a, b, trials, range)
            }
            (false, true, true, false, false) => {
                self.fused::<false, true, true, false, false>(a, b, trials, range)
            }
            (false, true, true, true, false) => {
                self.fused::<false, true, true, true, false>(a, b, trials, range)
            }
            (false, true, false, false, true) => {
                self.fused::<false, true, false, false, true>(a, b, trials, range)
            }
            (false, true, false, false, false) => {
                self.fused::<false, true, false, false, false>(a, b, trials, range)
            }
            (false, false, ..) => {}
            (true, true, ..) => self.fused::<true, true, true, true, true>(a, b, trials, range),
            (false, true, ..) => self.fused::<false, true, true, true, true>(a, b, trials, range),
        }
    }

    /// One pass over the trials of each block of `range`, summing every asked-for quantity
    /// side by side: Σ u_x conj u_y from the unit-phasor planes, and Σ Im S, Σ |Im S|,
    /// Σ (Im S)², Σ sign Im S from the raw planes. Each lane's sums run over the trials in
    /// trial order, in f64.
    #[inline(always)]
    fn fused<const PH: bool, const IM: bool, const ABS: bool, const SQ: bool, const SIGN: bool>(
        &mut self,
        a: &Planes,
        b: &Planes,
        trials: usize,
        range: std::ops::Range<usize>,
    ) {
        let span = trials * LANES;
        for (i, blk) in range.enumerate() {
            let r = blk * span..(blk + 1) * span;
            let (mut sr, mut si) = ([0.0f64; LANES], [0.0f64; LANES]);
            let (mut s, mut abs, mut sq) = ([0.0f64; LANES], [0.0; LANES], [0.0; LANES]);
            // Σ sign(Im S) counted in integers: every partial sum of ±1 and 0 is an integer
            // below 2^53, so the f64 it is turned into is exactly the f64 sum in trial order.
            let mut sg = [0i64; LANES];
            let (ar, ai, br, bi) = if PH {
                (
                    &a.unit_re[r.clone()],
                    &a.unit_im[r.clone()],
                    &b.unit_re[r.clone()],
                    &b.unit_im[r.clone()],
                )
            } else {
                (&[][..], &[][..], &[][..], &[][..])
            };
            let (xr, xi, yr, yi) = if IM {
                (
                    &a.raw_re[r.clone()],
                    &a.raw_im[r.clone()],
                    &b.raw_re[r.clone()],
                    &b.raw_im[r],
                )
            } else {
                (&[][..], &[][..], &[][..], &[][..])
            };
            for k in 0..trials {
                let at = k * LANES;
                if PH {
                    let (ar, ai) = (&ar[at..at + LANES], &ai[at..at + LANES]);
                    let (br, bi) = (&br[at..at + LANES], &bi[at..at + LANES]);
                    for j in 0..LANES {
                        let (xr, xi) = (f64::from(ar[j]), f64::from(ai[j]));
                        let (yr, yi) = (f64::from(br[j]), f64::from(bi[j]));
                        sr[j] += xr * yr + xi * yi;
                        si[j] += xi * yr - xr * yi;
                    }
                }
                if IM {
                    let (xr, xi) = (&xr[at..at + LANES], &xi[at..at + LANES]);
                    let (yr, yi) = (&yr[at..at + LANES], &yi[at..at + LANES]);
                    for j in 0..LANES {
                        // Im(X conj Y) = Im X Re Y − Re X Im Y.
                        let v = f64::from(xi[j]) * f64::from(yr[j])
                            - f64::from(xr[j]) * f64::from(yi[j]);
                        s[j] += v;
                        if ABS {
                            abs[j] += v.abs();
                        }
                        if SQ {
                            sq[j] += v * v;
                        }
                        if SIGN {
                            // sign(0) = 0: a zero Im S is neither a lead nor a lag.
                            sg[j] += i64::from(v > 0.0) - i64::from(v < 0.0);
                        }
                    }
                }
            }
            let at = i * LANES..(i + 1) * LANES;
            let put = |dst: &mut Vec<f64>, src: &[f64; LANES]| {
                if !dst.is_empty() {
                    dst[at.clone()].copy_from_slice(src);
                }
            };
            put(&mut self.phasor_re, &sr);
            put(&mut self.phasor_im, &si);
            put(&mut self.im, &s);
            put(&mut self.abs_im, &abs);
            put(&mut self.im2, &sq);
            put(&mut self.sign, &sg.map(|c| c as f64));
        }
    }

    /// The running sums at time point `t` of the range last computed (n = trials; the power
    /// sums from the channels).
    #[inline]
    pub fn at(&self, t: usize, trials: usize, a: &Planes, b: &Planes) -> Sums {
        let i = t - self.first * LANES;
        let get = |v: &Vec<f64>| v.get(i).copied().unwrap_or(0.0);
        let zero = a.zero[t] || b.zero[t];
        Sums {
            n: trials as f64,
            zeros: f64::from(u8::from(zero)),
            phasor: num_complex::Complex64::new(get(&self.phasor_re), get(&self.phasor_im)),
            sign: get(&self.sign),
            im: get(&self.im),
            abs_im: get(&self.abs_im),
            im2: get(&self.im2),
            px: a.power.get(t).copied().unwrap_or(0.0),
            py: b.power.get(t).copied().unwrap_or(0.0),
        }
    }

    /// The values of `measure` at the time points `times` (inside the range last computed) as
    /// f32 into `out`: the same operations as [`Sums::value`] on [`PairSums::at`], bit for bit,
    /// written as one straight loop per measure so that it vectorises.
    ///
    /// Compiled a second time for AVX2 and chosen at run time (as [`PairSums::compute_blocks`]):
    /// its divisions and square roots are exactly rounded IEEE operations, so four lanes at a
    /// time give the same bits as one.
    pub fn values(
        &self,
        measure: Measure,
        times: std::ops::Range<usize>,
        trials: usize,
        planes: (&Planes, &Planes),
        out: &mut [f32],
    ) {
        crate::wide::with_avx2(
            #[inline(always)]
            || self.values_any(measure, times, trials, planes, out),
        );
    }

    #[inline(always)]
    fn values_any(
        &self,
        measure: Measure,
        times: std::ops::Range<usize>,
        trials: usize,
        (a, b): (&Planes, &Planes),
        out: &mut [f32],
    ) {
        let n = trials as f64;
        let off = self.first * LANES;
        let local = times.start - off..times.end - off;
        let out = &mut out[..times.len()];
        match measure {
            Measure::Plv => zip2(
                &self.phasor_re[local.clone()],
                &self.phasor_im[local.clone()],
                |re, im| (re * re + im * im).sqrt() / n,
                out,
            ),
            Measure::Ppc if n < 2.0 => out.fill(f32::NAN),
            Measure::Ppc => zip2(
                &self.phasor_re[local.clone()],
                &self.phasor_im[local.clone()],
                |re, im| ((re * re + im * im) - n) / (n * (n - 1.0)),
                out,
            ),
            Measure::Pli => {
                for (o, &s) in out.iter_mut().zip(&self.sign[local.clone()]) {
                    *o = (s.abs() / n) as f32;
                }
            }
            Measure::Wpli => zip2(
                &self.im[local.clone()],
                &self.abs_im[local.clone()],
                |im, abs| im.abs() / abs,
                out,
            ),
            Measure::Dwpli => {
                let (im, abs, im2) = (
                    &self.im[local.clone()],
                    &self.abs_im[local.clone()],
                    &self.im2[local.clone()],
                );
                for (i, o) in out.iter_mut().enumerate() {
                    *o = ((im[i] * im[i] - im2[i]) / (abs[i] * abs[i] - im2[i])) as f32;
                }
            }
            Measure::Icoh => {
                let (px, py) = (&a.power[times.clone()], &b.power[times.clone()]);
                for (i, (o, &im)) in out.iter_mut().zip(&self.im[local.clone()]).enumerate() {
                    *o = (im / (px[i] * py[i]).sqrt()) as f32;
                }
            }
        }
        // A zero coefficient has no phase: NaN there, whatever the measure (the f32 of
        // `f64::NAN`, as `Sums::value` gives).
        let (za, zb) = (&a.zero[times.clone()], &b.zero[times]);
        for ((o, &x), &y) in out.iter_mut().zip(za).zip(zb) {
            if x || y {
                *o = f32::NAN;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_complex::Complex64;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Random coefficients [trial][time] with a few exact zeros.
    fn coefs(rng: &mut ChaCha8Rng, trials: usize, times: usize) -> Vec<Vec<Complex32>> {
        (0..trials)
            .map(|_| {
                (0..times)
                    .map(|_| {
                        if rng.gen_bool(0.02) {
                            Complex32::new(0.0, 0.0)
                        } else {
                            Complex32::new(rng.gen_range(-2.0..2.0), rng.gen_range(-2.0..2.0))
                        }
                    })
                    .collect()
            })
            .collect()
    }

    fn planes(needs: Needs, x: &[Vec<Complex32>], times: usize) -> Planes {
        let mut p = Planes::new(needs, x.len(), times);
        p.fill(needs, |k| &x[k]);
        p
    }

    const ALL: [Measure; 6] = [
        Measure::Plv,
        Measure::Ppc,
        Measure::Pli,
        Measure::Wpli,
        Measure::Dwpli,
        Measure::Icoh,
    ];

    #[test]
    fn trial_sums_equal_the_plain_definitions() {
        // Reference: the sums of DESIGN.md §4 written out term by term (S = X conj Y, Σ e^{iΔφ}
        // from the unit phasors, Σ Im S, Σ |Im S|, Σ (Im S)², Σ sign(Im S), Σ |X|²) in f64, for
        // every measure subset the kernel has a version for and time counts that do and do not
        // fill the last block. Tolerance 1e-12 relative: only the order of the additions may
        // differ between the two.
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let subsets: [&[Measure]; 7] = [
            &ALL,
            &[Measure::Plv],
            &[Measure::Pli],
            &[Measure::Wpli],
            &[Measure::Dwpli],
            &[Measure::Icoh],
            &[Measure::Ppc, Measure::Wpli],
        ];
        for (trials, times) in [(1, 1), (3, 4), (17, 9), (40, 13)] {
            let (x, y) = (
                coefs(&mut rng, trials, times),
                coefs(&mut rng, trials, times),
            );
            for measures in subsets {
                let needs = Needs::of(measures);
                let (a, b) = (planes(needs, &x, times), planes(needs, &y, times));
                let mut sums = PairSums::new(needs, blocks(times));
                sums.compute(needs, &a, &b, trials);
                for t in 0..times {
                    let got = sums.at(t, trials, &a, &b);
                    let mut want = Sums::default();
                    for k in 0..trials {
                        want.add(x[k][t], y[k][t]);
                    }
                    let wide = |z: Complex32| Complex64::new(z.re.into(), z.im.into());
                    let s: Vec<Complex64> = (0..trials)
                        .map(|k| wide(x[k][t]) * wide(y[k][t]).conj())
                        .collect();
                    let im: Vec<f64> = s.iter().map(|s| s.im).collect();
                    let close = |g: f64, w: f64| (g - w).abs() <= 1e-12 * w.abs().max(1.0);
                    assert_eq!(got.n, trials as f64);
                    assert_eq!(got.zeros > 0.0, want.zeros > 0.0, "zeros at {t}");
                    if needs.phasor {
                        assert!(close(got.phasor.re, want.phasor.re));
                        assert!(close(got.phasor.im, want.phasor.im));
                    }
                    if needs.im {
                        assert!(close(got.im, im.iter().sum()));
                    }
                    if needs.abs_im {
                        assert!(close(got.abs_im, im.iter().map(|v| v.abs()).sum()));
                    }
                    if needs.im2 {
                        assert!(close(got.im2, im.iter().map(|v| v * v).sum()));
                    }
                    if needs.sign {
                        let sign: f64 = im
                            .iter()
                            .map(|&v| if v == 0.0 { 0.0 } else { v.signum() })
                            .sum();
                        assert_eq!(got.sign, sign);
                    }
                    if needs.power {
                        let px: f64 = (0..trials).map(|k| wide(x[k][t]).norm_sqr()).sum();
                        assert!(close(got.px, px));
                    }
                }
            }
        }
    }

    #[test]
    fn reused_planes_equal_fresh_ones() {
        // Planes re-shaped from a larger fill (the slab kept from one tile to the next) must
        // hold exactly what fresh zeroed planes filled with the same trials hold, padding lanes
        // included: the pair sums read the padding, so a stale value there would change them.
        let mut rng = ChaCha8Rng::seed_from_u64(10);
        let needs = Needs::of(&ALL);
        let big = coefs(&mut rng, 9, 16);
        let small = coefs(&mut rng, 7, 6);
        let mut reused = planes(needs, &big, 16);
        reused.reshape(needs, 7, 6);
        reused.fill(needs, |k| &small[k]);
        let fresh = planes(needs, &small, 6);
        for (got, want) in [
            (&reused.unit_re, &fresh.unit_re),
            (&reused.unit_im, &fresh.unit_im),
            (&reused.raw_re, &fresh.raw_re),
            (&reused.raw_im, &fresh.raw_im),
        ] {
            assert_eq!(got.len(), want.len());
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(got), bits(want));
        }
        assert_eq!(reused.zero, fresh.zero);
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&reused.power), bits(&fresh.power));
        // The padding really is zero (the last block's lanes past the 6th point).
        let last = blocks(6) - 1;
        for k in 0..7 {
            let at = (last * 7 + k) * LANES;
            assert_eq!(&fresh.raw_re[at + 2..at + LANES], &[0.0, 0.0]);
        }
    }

    #[test]
    fn trial_sums_same_bits_with_and_without_avx2() {
        // The run-time choice of the AVX2 build must not change a bit: compare the dispatching
        // entry point with the portable build of the same code.
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let (trials, times) = (23, 30);
        let (x, y) = (
            coefs(&mut rng, trials, times),
            coefs(&mut rng, trials, times),
        );
        let needs = Needs::of(&ALL);
        let (a, b) = (planes(needs, &x, times), planes(needs, &y, times));
        let mut fast = PairSums::new(needs, blocks(times));
        fast.compute(needs, &a, &b, trials);
        let mut portable = PairSums::new(needs, blocks(times));
        portable.compute_any(needs, &a, &b, trials, 0..blocks(times));
        for t in 0..times {
            let (f, p) = (fast.at(t, trials, &a, &b), portable.at(t, trials, &a, &b));
            for m in ALL {
                assert_eq!(f.value(m).to_bits(), p.value(m).to_bits(), "{m:?} at {t}");
            }
        }
    }

    #[test]
    fn trial_sums_tiles_and_vector_values_give_the_same_bits() {
        // The tiled sums and the vectorised `values` against the whole-slab sums finished one
        // time point at a time by `Sums::value` (the formulas of DESIGN.md §4): equal bit for
        // bit, NaNs included (zero coefficients, one trial for ppc, 0/0 when every Im S is 0).
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        for (trials, times, tile) in [(1, 9, 1), (2, 30, 3), (23, 37, 2), (40, 64, 8)] {
            let (x, mut y) = (
                coefs(&mut rng, trials, times),
                coefs(&mut rng, trials, times),
            );
            // A time point where every Im S is 0: y a real multiple of x.
            for k in 0..trials {
                y[k][times / 2] = x[k][times / 2] * 2.0;
            }
            for measures in [&ALL[..], &[Measure::Icoh], &[Measure::Pli, Measure::Plv]] {
                let needs = Needs::of(measures);
                let (a, b) = (planes(needs, &x, times), planes(needs, &y, times));
                let mut whole = PairSums::new(needs, blocks(times));
                whole.compute(needs, &a, &b, trials);
                let mut tiled = PairSums::new(needs, tile);
                for first in (0..blocks(times)).step_by(tile) {
                    let range = first..(first + tile).min(blocks(times));
                    let span = first * LANES..(range.end * LANES).min(times);
                    tiled.compute_blocks(needs, &a, &b, trials, range);
                    for &m in measures {
                        let mut got = vec![0.0f32; span.len()];
                        tiled.values(m, span.clone(), trials, (&a, &b), &mut got);
                        for (t, g) in span.clone().zip(&got) {
                            let want = whole.at(t, trials, &a, &b).value(m) as f32;
                            assert_eq!(
                                g.to_bits(),
                                want.to_bits(),
                                "{m:?} at {t}, {trials} trials"
                            );
                        }
                    }
                }
            }
        }
    }
}
