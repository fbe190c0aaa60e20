//! Second-order sections and their zero-phase (forward–backward) application.
//!
//! The application reproduces scipy.signal.sosfiltfilt with its default arguments: the signal is
//! extended at both ends by an odd reflection of `3 × ntaps` samples, each pass starts from the
//! steady-state delays of a unit step (scipy.signal.sosfilt_zi) scaled by the pass's first input
//! sample, and the padding is cut off afterwards. The output therefore matches scipy edges
//! included, not just in the middle. A single section run this way is exactly
//! scipy.signal.filtfilt(b, a) with its defaults: both pad by 9 samples and start from
//! scipy.signal.lfilter_zi.

use crate::error::StageError;

/// One second-order section `[b0, b1, b2, a0, a1, a2]`, normalised so that `a0 == 1`.
pub type Section = [f64; 6];

/// A cascade of sections prepared for zero-phase application.
#[derive(Clone, Debug)]
pub struct ZeroPhase {
    sections: Vec<Section>,
    /// Steady-state delays of each section for a unit step at the cascade's input.
    step_state: Vec<[f64; 2]>,
    pad: usize,
}

impl ZeroPhase {
    /// Prepare `sections` (each with `a0 == 1`).
    pub fn new(sections: Vec<Section>) -> Self {
        let step_state = step_state(&sections);
        let pad = pad_len(&sections);
        ZeroPhase {
            sections,
            step_state,
            pad,
        }
    }

    /// The sections.
    pub fn sections(&self) -> &[Section] {
        &self.sections
    }

    /// Samples of odd extension at each end; a signal must be longer than this.
    pub fn pad(&self) -> usize {
        self.pad
    }

    /// Filter `x` forward and backward in place. `scratch` is reused between calls so that a
    /// caller filtering many channels allocates once per channel, not per sample.
    pub fn apply(&self, x: &mut [f64], scratch: &mut Scratch) -> Result<(), StageError> {
        self.apply_rows(&mut [x], scratch)
    }

    /// Filter up to [`ROWS`] signals of one length forward and backward in place, side by
    /// side: each sample step runs the recursion of every row in one vector of lanes. The
    /// recursion is a chain of dependent operations, so one row at a time leaves the core
    /// waiting; the rows' lanes do the same IEEE operations in the same order as one row alone,
    /// so each row's result is the same bit for bit.
    pub fn apply_rows(
        &self,
        rows: &mut [&mut [f64]],
        scratch: &mut Scratch,
    ) -> Result<(), StageError> {
        assert!(rows.len() <= ROWS, "at most {ROWS} rows at a time");
        let Some(n) = rows.first().map(|r| r.len()) else {
            return Ok(());
        };
        assert!(rows.iter().all(|r| r.len() == n), "rows of one length");
        let pad = self.pad;
        if n <= pad {
            return Err(StageError::data(format!(
                "the filter needs a signal longer than {pad} samples (its edge padding), \
                 found {n} samples"
            )));
        }
        let Scratch { row, lanes } = scratch;
        lanes.clear();
        lanes.resize(n + 2 * pad, [0.0; ROWS]);
        for (r, x) in rows.iter().enumerate() {
            odd_extend(x, pad, row);
            for (lane, &v) in lanes.iter_mut().zip(row.iter()) {
                lane[r] = v;
            }
        }
        self.run(lanes);
        lanes.reverse();
        self.run(lanes);
        lanes.reverse();
        for (r, x) in rows.iter_mut().enumerate() {
            for (v, lane) in x.iter_mut().zip(&lanes[pad..pad + n]) {
                *v = lane[r];
            }
        }
        Ok(())
    }

    /// One causal pass (direct form II transposed, like scipy.signal.sosfilt) over `buf`, each
    /// lane a signal, starting from the step state scaled by the pass's first input sample.
    fn run(&self, buf: &mut [[f64; ROWS]]) {
        let x0 = buf.first().copied().unwrap_or([0.0; ROWS]);
        for (s, st) in self.sections.iter().zip(&self.step_state) {
            let (mut z0, mut z1) = (x0.map(|x| st[0] * x), x0.map(|x| st[1] * x));
            for v in buf.iter_mut() {
                let x = *v;
                for l in 0..ROWS {
                    let y = s[0] * x[l] + z0[l];
                    z0[l] = s[1] * x[l] - s[4] * y + z1[l];
                    z1[l] = s[2] * x[l] - s[5] * y;
                    v[l] = y;
                }
            }
        }
    }
}

/// Signals filtered side by side by [`ZeroPhase::apply_rows`] (four f64 lanes: one AVX2
/// vector).
pub const ROWS: usize = 4;

/// Working memory of [`ZeroPhase::apply_rows`], reused between calls.
#[derive(Clone, Debug, Default)]
pub struct Scratch {
    row: Vec<f64>,
    lanes: Vec<[f64; ROWS]>,
}

/// scipy's default edge length for sosfiltfilt: 3 × (2·sections + 1), less one tap per section
/// pair whose b2 and a2 are both zero (first-order sections).
fn pad_len(sections: &[Section]) -> usize {
    let zero_b2 = sections.iter().filter(|s| s[2] == 0.0).count();
    let zero_a2 = sections.iter().filter(|s| s[5] == 0.0).count();
    3 * (2 * sections.len() + 1 - zero_b2.min(zero_a2))
}

/// Delays of each section once the cascade has settled on a unit step: section i sees a step of
/// height equal to the DC gain of the sections before it (as scipy.signal.sosfilt_zi).
fn step_state(sections: &[Section]) -> Vec<[f64; 2]> {
    let mut scale = 1.0;
    sections
        .iter()
        .map(|s| {
            let dc = (s[0] + s[1] + s[2]) / (s[3] + s[4] + s[5]);
            // Steady state of the DF-II-transposed recursion with input 1 and output dc.
            let z1 = s[2] - s[5] * dc;
            let z0 = s[1] - s[4] * dc + z1;
            let state = [scale * z0, scale * z1];
            scale *= dc;
            state
        })
        .collect()
}

/// `out` = x with `pad` samples of odd reflection about each end sample prepended and appended
/// (2·x[0] − x[pad..1] before, 2·x[n−1] − x[n−2..n−1−pad] after). Requires `x.len() > pad`.
fn odd_extend(x: &[f64], pad: usize, out: &mut Vec<f64>) {
    out.clear();
    out.reserve(x.len() + 2 * pad);
    let (first, last) = (x[0], x[x.len() - 1]);
    out.extend(x[1..=pad].iter().rev().map(|v| 2.0 * first - v));
    out.extend_from_slice(x);
    let n = x.len();
    out.extend(x[n - 1 - pad..n - 1].iter().rev().map(|v| 2.0 * last - v));
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn odd_extension_reflects_about_the_end_samples() {
        // Definition of odd extension (scipy.signal._arraytools.odd_ext docstring example:
        // odd_ext([1, 2, 3, 4, 5], 2) == [-1, 0, 1, 2, 3, 4, 5, 6, 7]).
        let mut out = Vec::new();
        odd_extend(&[1.0, 2.0, 3.0, 4.0, 5.0], 2, &mut out);
        assert_eq!(out, vec![-1.0, 0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]);
    }

    #[test]
    fn rows_filtered_side_by_side_equal_rows_filtered_alone() {
        // The lanes of `apply_rows` must not mix: each of three different signals filtered in
        // one call equals, bit for bit, the same signal filtered on its own.
        let zp = ZeroPhase::new(vec![
            [0.2, 0.3, 0.1, 1.0, -0.5, 0.1],
            [0.9, -1.2, 0.8, 1.0, -1.1, 0.7],
        ]);
        let signal = |k: f64| -> Vec<f64> {
            (0..40)
                .map(|i| (0.37 * k * i as f64).sin() + 0.1 * k)
                .collect()
        };
        let mut rows: Vec<Vec<f64>> = (1..=3).map(|k| signal(k as f64)).collect();
        let mut views: Vec<&mut [f64]> = rows.iter_mut().map(|r| r.as_mut_slice()).collect();
        zp.apply_rows(&mut views, &mut Scratch::default()).unwrap();
        for (k, row) in (1..=3).zip(&rows) {
            let mut alone = signal(k as f64);
            zp.apply(&mut alone, &mut Scratch::default()).unwrap();
            let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(row), bits(&alone), "row {k}");
        }
    }

    #[test]
    fn a_constant_passes_a_unity_dc_gain_cascade_unchanged() {
        // Steady-state initial conditions (the purpose of scipy.signal.lfilter_zi): a constant
        // input to a filter with DC gain 1 gives the same constant, with no start-up transient.
        let s: Section = [0.2, 0.3, 0.1, 1.0, -0.5, 0.1];
        let g = (s[0] + s[1] + s[2]) / (s[3] + s[4] + s[5]);
        let unity = [s[0] / g, s[1] / g, s[2] / g, s[3], s[4], s[5]];
        let zp = ZeroPhase::new(vec![unity, unity]);
        let mut x = vec![3.5; 50];
        zp.apply(&mut x, &mut Scratch::default()).unwrap();
        assert!(x.iter().all(|v| (v - 3.5).abs() < 1e-12), "{x:?}");
    }

    #[test]
    fn too_short_a_signal_is_a_data_error() {
        let zp = ZeroPhase::new(vec![[1.0, 0.1, 0.2, 1.0, 0.1, 0.1]]);
        assert_eq!(zp.pad(), 9); // scipy.signal.filtfilt: padlen = 3 * max(len(a), len(b))
        let err = zp
            .apply(&mut [0.0; 9], &mut Scratch::default())
            .unwrap_err();
        assert!(err.to_string().contains("longer than 9 samples"), "{err}");
    }
}
