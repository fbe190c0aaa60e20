//! Bare-FFT timer for the benchmark harness: the transforms the `wavelet` op cannot avoid.
//!
//! For each of `signals` signals it runs one forward complex FFT of length `nfft` (the signal,
//! zero-padded) and then `freqs` inverse FFTs of the same length (one per wavelet), in f64 as
//! the op does. Each inverse works on a copy of the spectrum, since the op too writes a fresh
//! product buffer per frequency. Signals are split into `threads` contiguous blocks, one thread
//! each. Prints one JSON line: `{"seconds": <best of reps>, ...}`.
//!
//! Usage: `phasewise-bench-fft NFFT SIGNALS FREQS THREADS REPS`

use std::time::Instant;

use rustfft::num_complex::Complex64;
use rustfft::FftPlanner;

/// The sizes of one measurement.
struct Job {
    nfft: usize,
    signals: usize,
    freqs: usize,
    threads: usize,
    reps: usize,
}

fn parse() -> Result<Job, String> {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| {
            a.parse()
                .map_err(|_| format!("`{a}` is not a whole number"))
        })
        .collect::<Result<_, _>>()?;
    match args[..] {
        [nfft, signals, freqs, threads, reps] if nfft > 0 && threads > 0 && reps > 0 => Ok(Job {
            nfft,
            signals,
            freqs,
            threads,
            reps,
        }),
        _ => Err("usage: phasewise-bench-fft NFFT SIGNALS FREQS THREADS REPS (all > 0)".into()),
    }
}

/// One thread's share: `count` signals, each one forward and `freqs` inverse transforms.
fn block(job: &Job, count: usize) -> f64 {
    let mut planner = FftPlanner::<f64>::new();
    let forward = planner.plan_fft_forward(job.nfft);
    let inverse = planner.plan_fft_inverse(job.nfft);
    let scratch_len = forward
        .get_inplace_scratch_len()
        .max(inverse.get_inplace_scratch_len());
    let mut scratch = vec![Complex64::default(); scratch_len];
    let mut spectrum = vec![Complex64::default(); job.nfft];
    let mut work = vec![Complex64::default(); job.nfft];
    let mut checksum = 0.0;
    for s in 0..count {
        // A cheap, non-constant input so nothing can be folded away.
        for (k, v) in spectrum.iter_mut().enumerate() {
            *v = Complex64::new(((k * 7 + s) % 13) as f64, 0.0);
        }
        forward.process_with_scratch(&mut spectrum, &mut scratch);
        for _ in 0..job.freqs {
            work.copy_from_slice(&spectrum);
            inverse.process_with_scratch(&mut work, &mut scratch);
            checksum += work[s % job.nfft].re;
        }
    }
    checksum
}

/// Wall seconds of one pass over all signals, on `threads` threads.
fn once(job: &Job) -> (f64, f64) {
    let per = job.signals.div_ceil(job.threads);
    let start = Instant::now();
    let sums: Vec<f64> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..job.threads)
            .map(|t| {
                let count = per.min(job.signals.saturating_sub(t * per));
                scope.spawn(move || block(job, count))
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().unwrap_or(0.0))
            .collect()
    });
    (start.elapsed().as_secs_f64(), sums.iter().sum())
}

fn main() {
    let job = match parse() {
        Ok(job) => job,
        Err(msg) => {
            eprintln!("{msg}");
            std::process::exit(2);
        }
    };
    let mut best = f64::INFINITY;
    let mut checksum = 0.0;
    for _ in 0..job.reps {
        let (seconds, sum) = once(&job);
        best = best.min(seconds);
        checksum = sum;
    }
    println!(
        "{{\"seconds\": {best}, \"nfft\": {}, \"signals\": {}, \"freqs\": {}, \"threads\": {}, \"checksum\": {checksum}}}",
        job.nfft, job.signals, job.freqs, job.threads
    );
}
