//! Rational-factor polyphase resampling, as scipy.signal.resample_poly does it with its defaults
//! (window `('kaiser', 5.0)`, `padtype='constant'`, zeros outside the signal).
//!
//! For a factor up/down (reduced by their gcd), scipy designs a linear-phase low-pass FIR with
//! scipy.signal.firwin: 2·L + 1 taps with L = 10·max(up, down), cutoff 1/max(up, down) of the
//! Nyquist frequency, windowed sinc with a symmetric Kaiser window of β = 5, scaled to unit gain
//! at DC and then multiplied by `up`. The signal is upsampled by inserting up − 1 zeros after
//! every sample, filtered, and every down-th sample kept, aligned so that output sample i sits
//! at input time i·down/up (scipy pads the filter in front so that its centre falls on the
//! kept samples). Written out, with h the filter and x zero outside 0 … n − 1:
//!
//!   y[i] = Σ_j h[i·down + L − j·up] · x[j]   (terms with the index outside 0 … 2L vanish)
//!
//! for i = 0 … ⌈n·up/down⌉ − 1. Only the taps of one phase touch the input for each output
//! sample, so each costs (2L + 1)/up multiply-adds. Edges: zeros beyond the ends, as scipy's
//! default, so the first and last ~L/up input samples' worth of output are pulled towards 0
//! just as scipy's are.

use std::f64::consts::PI;

/// Largest up or down factor accepted: the filter has 20·max + 1 taps (40 001 at this limit),
/// and 999 Hz → 1000 Hz (up 1000, down 999) must fit.
pub const MAX_FACTOR: u64 = 2000;

/// The design parameter of scipy.signal.resample_poly's default window `('kaiser', 5.0)`.
const KAISER_BETA: f64 = 5.0;

/// A prepared resampler for one rational factor.
#[derive(Clone, Debug)]
pub struct Resampler {
    up: usize,
    down: usize,
    half: usize,
    taps: Vec<f64>,
}

fn gcd(a: u64, b: u64) -> u64 {
    if b == 0 {
        a
    } else {
        gcd(b, a % b)
    }
}

/// `rate` as a fraction p/q with q ≤ 10 000, when one holds it to 1e-12 relative (sampling
/// rates in files are whole numbers or simple fractions, e.g. 1000/3 Hz).
fn as_fraction(rate: f64) -> Option<(u64, u64)> {
    (1..=10_000u64).find_map(|q| {
        let p = (rate * q as f64).round();
        let close = (p / q as f64 - rate).abs() <= 1e-12 * rate;
        ((1.0..1e15).contains(&p) && close).then_some((p as u64, q))
    })
}

/// Why no rational factor within [`MAX_FACTOR`] takes one rate to another.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum FactorError {
    /// A rate is no fraction p/q with q ≤ 10 000.
    #[error("{to} Hz is not a simple rational multiple of the recording's {from} Hz")]
    NotRational {
        /// The recording's rate in Hz.
        from: f64,
        /// The rate asked for in Hz.
        to: f64,
    },
    /// The factor in lowest terms has an up or down beyond [`MAX_FACTOR`].
    #[error(
        "going from {from} Hz to {to} Hz needs the factor {up}/{down}, beyond the largest supported up or down factor ({MAX_FACTOR}); choose a rate closer to a simple fraction of {from} Hz"
    )]
    TooLarge {
        /// The recording's rate in Hz.
        from: f64,
        /// The rate asked for in Hz.
        to: f64,
        /// The up factor in lowest terms.
        up: u128,
        /// The down factor in lowest terms.
        down: u128,
    },
}

/// The factor up/down (in lowest terms) that takes `from` Hz to `to` Hz, or why there is none
/// within [`MAX_FACTOR`].
pub fn factors(from: f64, to: f64) -> Result<(usize, usize), FactorError> {
    let (Some((pf, qf)), Some((pt, qt))) = (as_fraction(from), as_fraction(to)) else {
        return Err(FactorError::NotRational { from, to });
    };
    // to/from = (pt/qt)/(pf/qf) = (pt·qf)/(qt·pf).
    let (up, down) = (
        u128::from(pt) * u128::from(qf),
        u128::from(qt) * u128::from(pf),
    );
    let g = {
        let (mut a, mut b) = (up, down);
        while b != 0 {
            (a, b) = (b, a % b);
        }
        a
    };
    let (up, down) = (up / g, down / g);
    if up > u128::from(MAX_FACTOR) || down > u128::from(MAX_FACTOR) {
        return Err(FactorError::TooLarge { from, to, up, down });
    }
    Ok((up as usize, down as usize))
}

/// Number of output samples for `n` input samples: ⌈n·up/down⌉.
pub fn output_len(n: usize, up: usize, down: usize) -> usize {
    (n * up).div_ceil(down)
}

/// I0, the modified Bessel function of the first kind of order 0, by its power series
/// Σ ((x/2)^k / k!)² (Abramowitz & Stegun 9.6.12); for |x| ≤ 5 the terms fall below 1e-17 of the
/// sum after ~25 terms.
fn bessel_i0(x: f64) -> f64 {
    let q = x * x / 4.0;
    let (mut term, mut sum) = (1.0, 1.0);
    for k in 1..200 {
        term *= q / (k * k) as f64;
        sum += term;
        if term < 1e-17 * sum {
            break;
        }
    }
    sum
}

/// The low-pass filter of scipy.signal.firwin(2·half + 1, cutoff, window=('kaiser', β)):
/// h[n] = cutoff · sinc(cutoff · (n − half)) · w[n], w the symmetric Kaiser window
/// w[n] = I0(β·sqrt(1 − ((n − half)/half)²)) / I0(β), then scaled so that Σ h = 1.
fn lowpass(half: usize, cutoff: f64) -> Vec<f64> {
    let sinc = |x: f64| {
        if x == 0.0 {
            1.0
        } else {
            (PI * x).sin() / (PI * x)
        }
    };
    let i0_beta = bessel_i0(KAISER_BETA);
    let mut h: Vec<f64> = (0..=2 * half)
        .map(|n| {
            let m = n as f64 - half as f64;
            let r = m / half as f64;
            let w = bessel_i0(KAISER_BETA * (1.0 - r * r).max(0.0).sqrt()) / i0_beta;
            cutoff * sinc(cutoff * m) * w
        })
        .collect();
    let sum: f64 = h.iter().sum();
    h.iter_mut().for_each(|v| *v /= sum);
    h
}

impl Resampler {
    /// The resampler for `up`/`down` (any common factor is divided out first).
    pub fn new(up: usize, down: usize) -> Self {
        let g = gcd(up as u64, down as u64).max(1) as usize;
        let (up, down) = (up / g, down / g);
        let max = up.max(down);
        let half = 10 * max;
        let mut taps = lowpass(half, 1.0 / max as f64);
        taps.iter_mut().for_each(|v| *v *= up as f64);
        Resampler {
            up,
            down,
            half,
            taps,
        }
    }

    /// The filter, as scipy designs it (before its zero padding), times `up`.
    pub fn taps(&self) -> &[f64] {
        &self.taps
    }

    /// Number of output samples for `n` input samples.
    pub fn output_len(&self, n: usize) -> usize {
        output_len(n, self.up, self.down)
    }

    /// Resample `x` into `out` (whose length must be [`Resampler::output_len`]).
    pub fn apply(&self, x: &[f64], out: &mut [f64]) {
        let (up, down, half) = (self.up, self.down, self.half);
        if up == 1 && down == 1 {
            out.copy_from_slice(x);
            return;
        }
        let n = x.len() as i64;
        let last_tap = (2 * half) as i64;
        for (i, o) in out.iter_mut().enumerate() {
            // y[i] = Σ_j h[c − j·up] x[j], c = i·down + half, for 0 ≤ c − j·up ≤ 2·half.
            let c = (i * down + half) as i64;
            let j_lo = (c - last_tap + up as i64 - 1).div_euclid(up as i64).max(0);
            let j_hi = (c.div_euclid(up as i64)).min(n - 1);
            let mut acc = 0.0;
            let mut j = j_lo;
            while j <= j_hi {
                acc += self.taps[(c - j * up as i64) as usize] * x[j as usize];
                j += 1;
            }
            *o = acc;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testutil::{max_rel_diff, read_f64, read_json};

    #[test]
    fn filters_and_outputs_equal_scipy_resample_poly() {
        // Reference: scipy.signal.firwin(2L+1, 1/max, window=('kaiser', 5.0)) · up and
        // scipy.signal.resample_poly(x, up, down) with its defaults (scipy 1.13.1),
        // tests/reference/gen_resample.py. Both in f64: taps to 1e-12 of the largest tap, output
        // to 1e-12 of the signal's peak, edges included (the same zero padding).
        let x: Vec<f64> = read_f64("resample", "signal").iter().copied().collect();
        let peak = x.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
        let cases = read_json("resample", "cases");
        for case in cases["cases"].as_array().unwrap() {
            let name = case["name"].as_str().unwrap();
            let (from, to) = (case["from"].as_f64().unwrap(), case["to"].as_f64().unwrap());
            let (up, down) = factors(from, to).unwrap();
            assert_eq!(
                (up as u64, down as u64),
                (case["up"].as_u64().unwrap(), case["down"].as_u64().unwrap()),
                "{name}: factors (math.gcd in the script)"
            );
            let r = Resampler::new(up, down);
            let want_h: Vec<f64> = read_f64("resample", &format!("{name}_taps"))
                .iter()
                .copied()
                .collect();
            let hmax = want_h.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
            let dh = max_rel_diff(r.taps(), &want_h, hmax);
            assert!(dh < 1e-12, "{name}: taps differ by {dh:e}");
            let want: Vec<f64> = read_f64("resample", &format!("{name}_out"))
                .iter()
                .copied()
                .collect();
            let mut got = vec![0.0; r.output_len(x.len())];
            assert_eq!(got.len(), want.len(), "{name}: output length");
            r.apply(&x, &mut got);
            let err = max_rel_diff(&got, &want, peak);
            eprintln!("resample {name} ({up}/{down}): taps {dh:.1e}, output {err:.1e} of the peak");
            assert!(err < 1e-12, "{name}: output differs by {err:e} of the peak");
        }
    }

    #[test]
    fn bessel_i0_matches_tabulated_values() {
        // Abramowitz & Stegun, Table 9.8: I0(1) = 1.266065878, I0(5) = 27.23987182 (recalled
        // from the table; 9 significant digits).
        assert!((bessel_i0(1.0) - 1.266_065_878).abs() < 1e-9);
        assert!((bessel_i0(5.0) - 27.239_871_82).abs() < 1e-7);
        assert_eq!(bessel_i0(0.0), 1.0);
    }

    #[test]
    fn factors_are_reduced_and_limited() {
        assert_eq!(factors(500.0, 250.0), Ok((1, 2)));
        assert_eq!(factors(999.0, 1000.0), Ok((1000, 999)));
        assert_eq!(factors(1000.0 / 3.0, 250.0), Ok((3, 4)));
        let err = factors(1000.0, 997.3).unwrap_err();
        assert!(
            matches!(
                err,
                FactorError::TooLarge {
                    up: 9973,
                    down: 10000,
                    ..
                }
            ),
            "{err}"
        );
        assert!(err.to_string().contains("9973/10000"), "{err}");
        assert!(matches!(
            factors(1000.0, 250.123_456_789),
            Err(FactorError::NotRational { .. })
        ));
    }
}
