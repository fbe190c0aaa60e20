//! Bare-FFT timer for the benchmark harness: the transforms the `wavelet` op performs, and for
//! context the transforms of the naive plan.
//!
//! The op (stages/src/ops/morlet.rs) convolves each signal with `freqs` wavelets through FFTs of
//! a length N ≥ `min_len` that is a multiple of the stride k (`min_len` is the op's shortest
//! circular convolution that reaches every kept coefficient without wrap-around: the kept span
//! plus the longest wavelet's length, clipped at the epoch's ends; `reach` in morlet.rs):
//! N = k · m with m the smallest 2,3,5-smooth number ≥ ⌈min_len / k⌉. Two real signals share one
//! forward complex FFT of length N; per signal and wavelet, the spectrum folded onto N/k bins
//! goes through one inverse complex FFT of length N/k. So for `signals` signals this times
//! ⌈signals / 2⌉ forward FFTs of length N and `signals · freqs` inverse FFTs of length N/k, in
//! f64 as the op does, each inverse on a fresh copy of an N/k-long buffer (the op writes a fresh
//! folded buffer per wavelet).
//!
//! For context it also times the naive count: per signal one forward and `freqs` inverse FFTs
//! of the plain smooth length ≥ `naive_len` (default `min_len`; the harness passes epoch +
//! longest wavelet − 1, the full linear convolution a plain implementation transforms).
//!
//! With KEPT (the op's kept time points per signal and frequency), it also times what the op
//! must do besides transforms whatever its algorithm: write its output, `signals · freqs · kept`
//! complex f32 values, once, into memory fresh from the kernel (a new mapping per repetition,
//! written in order on one thread). On a machine where the first touch of memory is slow this
//! is a large part of the op's time; the op's FFTs never see it.
//!
//! Signals are split into `threads` contiguous blocks, one thread each; best of `reps`. Prints
//! one JSON line: `{"seconds": <op's transforms>, "naive_seconds": ..., ...}`.
//!
//! Usage: `phasewise-bench-fft MIN_LEN STRIDE SIGNALS FREQS THREADS REPS [KEPT [NAIVE_LEN]]`

use std::time::Instant;

use rustfft::num_complex::Complex64;
use rustfft::FftPlanner;

/// The sizes of one measurement.
struct Job {
    min_len: usize,
    stride: usize,
    signals: usize,
    freqs: usize,
    threads: usize,
    reps: usize,
    kept: Option<usize>,
    naive_len: usize,
}

/// One plan of transforms: per group of `per_forward` signals one forward FFT of `forward`
/// points; per signal `freqs` inverse FFTs of `inverse` points.
#[derive(Clone, Copy)]
struct Plan {
    forward: usize,
    inverse: usize,
    per_forward: usize,
}

fn parse() -> Result<Job, String> {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| {
            a.parse()
                .map_err(|_| format!("`{a}` is not a whole number"))
        })
        .collect::<Result<_, _>>()?;
    let (fixed, kept, naive) = match args.len() {
        7 => (&args[..6], Some(args[6]), None),
        8 => (&args[..6], Some(args[6]), Some(args[7])),
        _ => (&args[..], None, None),
    };
    match fixed[..] {
        [min_len, stride, signals, freqs, threads, reps]
            if min_len > 0 && stride > 0 && threads > 0 && reps > 0 =>
        {
            Ok(Job {
                min_len,
                stride,
                signals,
                freqs,
                threads,
                reps,
                kept,
                naive_len: naive.unwrap_or(min_len).max(1),
            })
        }
        _ => Err(
            "usage: phasewise-bench-fft MIN_LEN STRIDE SIGNALS FREQS THREADS REPS [KEPT [NAIVE_LEN]] (all but SIGNALS, FREQS > 0)"
                .into(),
        ),
    }
}

/// Smallest n ≥ `min` whose only prime factors are 2, 3 and 5 (as the op chooses).
fn fast_len(min: usize) -> usize {
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

/// One thread's share: `count` signals under `plan`.
fn block(plan: Plan, freqs: usize, count: usize) -> f64 {
    let mut planner = FftPlanner::<f64>::new();
    let forward = planner.plan_fft_forward(plan.forward);
    let inverse = planner.plan_fft_inverse(plan.inverse);
    let scratch_len = forward
        .get_inplace_scratch_len()
        .max(inverse.get_inplace_scratch_len());
    let mut scratch = vec![Complex64::default(); scratch_len];
    let mut spectrum = vec![Complex64::default(); plan.forward];
    let mut work = vec![Complex64::default(); plan.inverse];
    let mut checksum = 0.0;
    for s in 0..count {
        if s % plan.per_forward == 0 {
            // A cheap, non-constant input so nothing can be folded away.
            for (k, v) in spectrum.iter_mut().enumerate() {
                *v = Complex64::new(((k * 7 + s) % 13) as f64, ((k * 3 + s) % 11) as f64);
            }
            forward.process_with_scratch(&mut spectrum, &mut scratch);
        }
        for _ in 0..freqs {
            work.copy_from_slice(&spectrum[..plan.inverse]);
            inverse.process_with_scratch(&mut work, &mut scratch);
            checksum += work[s % plan.inverse].re;
        }
    }
    checksum
}

/// Wall seconds of one pass over all signals under `plan`, on `threads` threads.
fn once(job: &Job, plan: Plan) -> (f64, f64) {
    // Blocks of whole pairs, so a pair's forward transform is never split between threads.
    let per = job
        .signals
        .div_ceil(job.threads)
        .next_multiple_of(plan.per_forward);
    let start = Instant::now();
    let sums: Vec<f64> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..job.threads)
            .map(|t| {
                let count = per.min(job.signals.saturating_sub(t * per));
                scope.spawn(move || block(plan, job.freqs, count))
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().unwrap_or(0.0))
            .collect()
    });
    (start.elapsed().as_secs_f64(), sums.iter().sum())
}

/// Best of `reps` passes.
fn best(job: &Job, plan: Plan) -> (f64, f64) {
    let mut best = f64::INFINITY;
    let mut checksum = 0.0;
    for _ in 0..job.reps {
        let (seconds, sum) = once(job, plan);
        best = best.min(seconds);
        checksum = sum;
    }
    (best, checksum)
}

/// Best of `reps`: seconds to write `values` complex f32 values once into a new buffer.
fn output_write(values: usize, reps: usize) -> f64 {
    let mut best = f64::INFINITY;
    for rep in 0..reps {
        let start = Instant::now();
        let mut out: Vec<[f32; 2]> = Vec::with_capacity(values);
        out.extend((0..values).map(|k| [(k % 7) as f32, rep as f32]));
        best = best.min(start.elapsed().as_secs_f64());
        std::hint::black_box(&out);
    }
    best
}

fn main() {
    let job = match parse() {
        Ok(job) => job,
        Err(msg) => {
            eprintln!("{msg}");
            std::process::exit(2);
        }
    };
    let nfft = job.stride * fast_len(job.min_len.div_ceil(job.stride));
    let op = Plan {
        forward: nfft,
        inverse: nfft / job.stride,
        per_forward: 2,
    };
    let naive_len = fast_len(job.naive_len);
    let naive = Plan {
        forward: naive_len,
        inverse: naive_len,
        per_forward: 1,
    };
    let (seconds, checksum) = best(&job, op);
    let (naive_seconds, naive_checksum) = best(&job, naive);
    let output = job.kept.map_or("null".to_string(), |kept| {
        output_write(job.signals * job.freqs * kept, job.reps).to_string()
    });
    println!(
        "{{\"seconds\": {seconds}, \"output_seconds\": {output}, \"nfft\": {nfft}, \"folded\": {}, \"forwards\": {}, \"inverses\": {}, \
         \"naive_seconds\": {naive_seconds}, \"naive_nfft\": {naive_len}, \"naive_forwards\": {}, \"naive_inverses\": {}, \
         \"signals\": {}, \"freqs\": {}, \"stride\": {}, \"threads\": {}, \"reps\": {}, \"checksum\": {}}}",
        op.inverse,
        job.signals.div_ceil(2),
        job.signals * job.freqs,
        job.signals,
        job.signals * job.freqs,
        job.signals,
        job.freqs,
        job.stride,
        job.threads,
        job.reps,
        checksum + naive_checksum
    );
}
