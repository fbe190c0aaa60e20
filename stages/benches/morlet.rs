//! The wavelet op's inner loop on its own: [`Bank::transform`] over one subject of the harness's
//! medium workload (65 channels × 200 trials = 13000 signals of 625
//! samples at 250 Hz; 24 log-spaced frequencies 4–30 Hz, 3–8 cycles; kept every 4th sample of
//! [−0.6, 1.1] s in a [−1, 1.5] s epoch), on one thread, into an output buffer that is written
//! once before timing, so the first touch of fresh memory (bench/fft times that separately) is
//! not in the figures. Two ways: all frequencies in one call, and in six calls of four (the
//! chain's parts, each repeating the forward FFTs). Best of 5 each.
//!
//! For comparing changes to the loops around the FFTs: `cargo bench -p phasewise-stages --bench
//! morlet`. The harness (bench/run.sh) measures the op itself against its bare FFTs.

use std::time::Instant;

use num_complex::Complex32;
use phasewise_stages::ops::morlet::{taps, Bank, Keep};
use phasewise_stages::ops::wavelet::{
    CycleRamp, CycleSpec, FreqRange, FreqSpec, Spacing, WaveletParams,
};

const SIGNALS: usize = 13000;
const LEN: usize = 625;
const FS: f64 = 250.0;
const FREQS: usize = 24;
const PART: usize = 4;

fn main() {
    // The op's own plan of frequencies and cycles (the harness's `tf` params; its crop and
    // stride are the `Keep` below: samples 100 … 524 of the epoch, every 4th).
    let params = WaveletParams {
        freqs: FreqSpec::Range(FreqRange {
            from: 4.0,
            to: 30.0,
            count: FREQS,
            spacing: Spacing::Log,
        }),
        cycles: CycleSpec::Ramp(CycleRamp { from: 3.0, to: 8.0 }),
        crop: Some([-0.6, 1.1]),
        stride: 4,
    };
    let freqs = params.frequencies();
    let cycles = params.cycle_counts(freqs.len());
    let wavelets: Vec<_> = freqs
        .iter()
        .zip(&cycles)
        .map(|(&f, &n)| taps(f, n, FS))
        .collect();
    let keep = Keep {
        start: 100,
        stride: 4,
        count: 107,
    };
    // A deterministic, non-constant input (a few sines per signal).
    let signals: Vec<f32> = (0..SIGNALS * LEN)
        .map(|i| {
            let (s, t) = ((i / LEN) as f64, (i % LEN) as f64 / FS);
            ((2.0 * std::f64::consts::PI * (5.0 + s % 17.0) * t).sin() + 0.3 * (t * 40.0).cos())
                as f32
        })
        .collect();
    let whole = Bank::new(&wavelets, LEN, keep);
    println!(
        "morlet bench: {SIGNALS} signals x {LEN} samples, {FREQS} frequencies, FFT {} -> {}, \
         {} kept samples, 1 thread, best of 5",
        whole.nfft(),
        whole.folded_len(),
        keep.count
    );
    let mut out = vec![Complex32::new(1.0, 0.0); SIGNALS * FREQS * keep.count];
    let mut scratch = whole.scratch();
    let best = |f: &mut dyn FnMut()| {
        (0..5)
            .map(|_| {
                let clock = Instant::now();
                f();
                clock.elapsed().as_secs_f64()
            })
            .fold(f64::INFINITY, f64::min)
    };
    let one = best(&mut || whole.transform(&signals, &mut scratch, &mut out));
    println!("  all frequencies in one call: {one:.3} s");
    let parts: Vec<Bank> = (0..FREQS)
        .step_by(PART)
        .map(|p| Bank::new(&wavelets, LEN, keep).only(p..(p + PART).min(FREQS)))
        .collect();
    let per_part = SIGNALS * PART * keep.count;
    let split = best(&mut || {
        for (bank, dst) in parts.iter().zip(out.chunks_mut(per_part)) {
            bank.transform(&signals, &mut scratch, dst);
        }
    });
    println!(
        "  in {} calls of {PART} frequencies: {split:.3} s",
        parts.len()
    );
    std::hint::black_box(&out);
}
