//! The `hilbert` op: phase by band-pass filtering and the analytic signal, the other common
//! estimate besides wavelets (DESIGN.md §4b).
//!
//! For each band, every epoch is band-passed by a zero-phase Butterworth filter (the design and
//! the forward–backward application of the `filter` op: scipy.signal.butter(order, [lo, hi],
//! 'bandpass', output='sos', fs=fs) run as scipy.signal.sosfiltfilt with its default padding),
//! then turned into its analytic signal by the FFT as scipy.signal.hilbert defines it
//! ([`crate::dsp::analytic`]). The whole epoch is transformed; `crop` and `stride` then keep a
//! part of it, exactly as for the wavelet.
//!
//! Bands: `bands: [[lo, hi], ..]` in Hz, or `freqs` (a list or `{from, to, count, spacing}` as
//! for the wavelet) with `width`, each band then [f − width/2, f + width/2].
//!
//! Input: real epoched data `[channel, trial, time]`. Output: complex f32, dims
//! `[channel, trial, freq, time]` like the wavelet's, so `clustering` takes either; `freq` is each
//! band's centre (lo + hi)/2 and `meta.extra.bands` lists every band as `{freq, low, high}`.
//! A sinusoid of amplitude A well inside a band gives |value| ≈ A, as the wavelet does.

use ndarray::{ArrayD, IxDyn};
use num_complex::{Complex32, Complex64};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::array::{Coord, LabelledArray, Layout};
use crate::dsp::analytic::Analytic;
use crate::dsp::design::{butterworth, Band};
use crate::dsp::sos::{Scratch, ZeroPhase};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};

use super::morlet::Keep;
use super::wavelet::{
    check_crop_stride, check_finite, check_freqs, check_part, freq_field, keep_for, FreqSpec,
};

/// The `hilbert` op.
pub struct Hilbert;

/// Parameters of `hilbert`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct HilbertParams {
    /// Band edges `[lo, hi]` in Hz, one output frequency each.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bands: Option<Vec<[f64; 2]>>,
    /// Band centres in Hz (with `width`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub freqs: Option<FreqSpec>,
    /// Width in Hz of every band around `freqs`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub width: Option<f64>,
    /// Order of the Butterworth prototype (a band-pass has twice as many poles).
    #[serde(default = "default_order")]
    pub order: usize,
    /// `[t0, t1]` in s (inclusive): the part of the epoch kept after the transform.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub crop: Option<[f64; 2]>,
    /// Keep every k-th time point of the cropped output.
    #[serde(default = "one")]
    pub stride: usize,
}

/// Common practice: a 4th-order Butterworth, applied forward and backward, as the `filter` op.
fn default_order() -> usize {
    4
}

fn one() -> usize {
    1
}

/// Band-pass orders above this lose precision even as sections (as the `filter` op's limit).
const MAX_ORDER: usize = 16;

/// Everything a run needs, from params and the input layout alone.
struct Plan {
    /// Per band: its zero-phase band-pass.
    filters: Vec<ZeroPhase>,
    epoch_len: usize,
    keep: Keep,
    layout: Layout,
}

impl HilbertParams {
    /// The bands `[lo, hi]` in output order, each with the dotted path of the param that set
    /// its upper edge (for errors).
    fn band_list(&self) -> Vec<([f64; 2], String)> {
        match (&self.bands, &self.freqs, self.width) {
            (Some(bands), _, _) => bands
                .iter()
                .enumerate()
                .map(|(i, b)| (*b, format!("bands[{i}]")))
                .collect(),
            (None, Some(freqs), Some(w)) => freqs
                .values()
                .into_iter()
                .enumerate()
                .map(|(i, f)| ([f - w / 2.0, f + w / 2.0], freq_field(freqs, i)))
                .collect(),
            _ => Vec::new(),
        }
    }
}

impl Op for Hilbert {
    type Params = HilbertParams;
    const NAME: &'static str = "hilbert";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        match (&p.bands, &p.freqs, p.width) {
            (Some(_), Some(_), _) => {
                return Err(StageError::param(
                    "freqs",
                    "give either `bands` or `freqs` with `width`, not both",
                ))
            }
            (Some(_), None, Some(_)) => {
                return Err(StageError::param(
                    "width",
                    "`width` goes with `freqs`; `bands` give their edges themselves",
                ))
            }
            (None, None, _) => {
                return Err(StageError::param(
                    "bands",
                    "give `bands: [[lo, hi], ..]` or `freqs` with `width` (Hz)",
                ))
            }
            (None, Some(_), None) => {
                return Err(StageError::param(
                    "width",
                    "`freqs` need a band `width` in Hz (each band is f ± width/2)",
                ))
            }
            (None, Some(freqs), Some(w)) => {
                check_freqs(freqs)?;
                if !(w.is_finite() && w > 0.0) {
                    return Err(StageError::param(
                        "width",
                        format!("expected a positive number of Hz, found {w}"),
                    ));
                }
                for (i, f) in freqs.values().into_iter().enumerate() {
                    if f - w / 2.0 <= 0.0 {
                        return Err(StageError::param(
                            "width",
                            format!(
                                "the band around {f} Hz ({}) would reach 0 Hz or below; \
                                 narrow the width or raise {}",
                                freq_field(freqs, i),
                                freq_field(freqs, i)
                            ),
                        ));
                    }
                }
            }
            (Some(bands), None, None) => check_bands(bands)?,
        }
        if p.order == 0 || p.order > MAX_ORDER {
            return Err(StageError::param(
                "order",
                format!(
                    "the order must be between 1 and {MAX_ORDER}, found {}",
                    p.order
                ),
            ));
        }
        check_crop_stride(p.crop, p.stride)
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(Some(plan(p, single(inputs)?.layout)?.layout))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        _notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        let all = 0..plan.filters.len();
        transform_part(plan, input, all)
    }

    /// Bands are transformed one by one, each on its own.
    fn part_axis(_p: &Self::Params) -> Option<&'static str> {
        Some("freq")
    }

    fn run_part(
        p: &Self::Params,
        inputs: &[Input<'_>],
        part: std::ops::Range<usize>,
        _notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        check_part(&part, plan.filters.len(), "bands")?;
        transform_part(plan, input, part)
    }
}

/// Every band `[lo, hi]` must have 0 < lo < hi; centres must differ (they name the output's
/// frequencies).
fn check_bands(bands: &[[f64; 2]]) -> Result<(), StageError> {
    if bands.is_empty() {
        return Err(StageError::param("bands", "expected at least one band"));
    }
    for (i, &[lo, hi]) in bands.iter().enumerate() {
        if !(lo.is_finite() && hi.is_finite() && lo > 0.0 && lo < hi) {
            return Err(StageError::param(
                format!("bands[{i}]"),
                format!("expected [lo, hi] in Hz with 0 < lo < hi, found [{lo}, {hi}]"),
            ));
        }
        let centre = (lo + hi) / 2.0;
        if bands[..i].iter().any(|[a, b]| (a + b) / 2.0 == centre) {
            return Err(StageError::param(
                format!("bands[{i}]"),
                format!("another band has the same centre ({centre} Hz), which names the output frequency"),
            ));
        }
    }
    Ok(())
}

fn check_input(layout: &Layout) -> Result<(), StageError> {
    if layout.dims != ["channel", "trial", "time"] || layout.complex {
        return Err(StageError::data(format!(
            "hilbert expects real epoched data with axes [channel, trial, time], found [{}]{}",
            layout.dims.join(", "),
            if layout.complex { " (complex)" } else { "" }
        )));
    }
    Ok(())
}

fn plan(p: &HilbertParams, input: &Layout) -> Result<Plan, StageError> {
    Hilbert::check(p)?;
    check_input(input)?;
    let fs = input.sampling_rate()?;
    let times = input.numbers("time")?;
    let bands = p.band_list();
    let mut filters = Vec::with_capacity(bands.len());
    for ([lo, hi], field) in &bands {
        if *hi >= fs / 2.0 {
            return Err(StageError::param(
                field.clone(),
                format!(
                    "the band [{lo}, {hi}] Hz reaches the Nyquist frequency ({} Hz at {fs} Hz \
                     sampling); its upper edge must lie below it",
                    fs / 2.0
                ),
            ));
        }
        let filter = ZeroPhase::new(butterworth(p.order, Band::BandPass(*lo, *hi), fs));
        if times.len() <= filter.pad() {
            return Err(StageError::data(format!(
                "the band-pass for [{lo}, {hi}] Hz needs epochs longer than {} samples (its edge \
                 padding), found {}",
                filter.pad(),
                times.len()
            )));
        }
        filters.push(filter);
    }
    let keep = keep_for(p.crop, p.stride, times)?;
    let kept_times = times[keep.start..]
        .iter()
        .step_by(keep.stride)
        .take(keep.count)
        .copied()
        .collect();
    let mut layout = input.clone();
    layout.dims = ["channel", "trial", "freq", "time"]
        .map(String::from)
        .to_vec();
    layout.coords = vec![
        input.coord("channel")?.clone(),
        input.coord("trial")?.clone(),
        Coord::Numbers(bands.iter().map(|([lo, hi], _)| (lo + hi) / 2.0).collect()),
        Coord::Numbers(kept_times),
    ];
    layout.complex = true;
    layout.meta.sampling_rate = Some(fs / p.stride as f64);
    // Keyed by centre rather than parallel to the axis, so that it stays true for any slice
    // of the `freq` axis downstream.
    let edges: Vec<serde_json::Value> = bands
        .iter()
        .map(|([lo, hi], _)| serde_json::json!({ "freq": (lo + hi) / 2.0, "low": lo, "high": hi }))
        .collect();
    layout
        .meta
        .extra
        .insert("bands".into(), serde_json::Value::Array(edges));
    Ok(Plan {
        filters,
        epoch_len: times.len(),
        keep,
        layout,
    })
}

/// The analytic signals of the bands in `part` (all of them for a whole run).
fn transform_part(
    mut plan: Plan,
    input: &LabelledArray,
    part: std::ops::Range<usize>,
) -> Result<LabelledArray, StageError> {
    let values = input.real_values()?.as_standard_layout();
    let values = values.as_slice().unwrap_or(&[]);
    check_finite(values, &input.layout, plan.epoch_len)?;
    let filters = &plan.filters[part.clone()];
    let (n, keep) = (plan.epoch_len, plan.keep);
    let per_signal = filters.len() * keep.count;
    let signals = values.len() / n.max(1);
    let mut out = vec![Complex32::default(); per_signal * signals];
    if per_signal > 0 && n > 0 {
        let analytic = Analytic::new(n);
        // Every signal is computed on its own: the result does not depend on the thread count.
        let results: Vec<Result<(), StageError>> = out
            .par_chunks_mut(per_signal)
            .zip(values.par_chunks(n))
            .map_init(
                || (Vec::new(), Scratch::default(), Vec::<Complex64>::new()),
                |(row, scratch, z), (dst, src)| {
                    for (b, filter) in filters.iter().enumerate() {
                        row.clear();
                        row.extend(src.iter().map(|&v| f64::from(v)));
                        filter.apply(row, scratch)?;
                        analytic.apply(row, z);
                        let kept = z[keep.start..].iter().step_by(keep.stride);
                        let slot = &mut dst[b * keep.count..(b + 1) * keep.count];
                        for (o, v) in slot.iter_mut().zip(kept) {
                            *o = Complex32::new(v.re as f32, v.im as f32);
                        }
                    }
                    Ok(())
                },
            )
            .collect();
        results.into_iter().collect::<Result<Vec<()>, _>>()?;
    }
    let k = plan.layout.axis("freq")?;
    plan.layout.coords[k] = plan.layout.coords[k].slice(part)?;
    let shape = plan.layout.shape();
    let array = ArrayD::from_shape_vec(IxDyn(&shape), out)
        .map_err(|e| StageError::data(format!("internal shape error: {e}")))?;
    LabelledArray::complex(plan.layout, array)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ops::tf_testing::{assert_parts_match, epoched, run_err, run_op};
    use crate::testutil::{max_rel_diff, read_f64, read_json};
    use ndarray::Array3;
    use serde_json::json;
    use std::f64::consts::PI;

    fn fixture_epochs() -> (LabelledArray, serde_json::Value) {
        let meta = read_json("hilbert", "epochs");
        let x = read_f64("hilbert", "epochs").mapv(|v| v as f32);
        let fs = meta["fs"].as_f64().unwrap();
        let first = meta["first_sample"].as_i64().unwrap();
        (epoched(x, fs, first, &["a", "b", "a"]), meta)
    }

    #[test]
    fn band_passes_equal_the_scipy_butter_design() {
        // Reference: scipy.signal.butter(4, [lo, hi], 'bandpass', output='sos', fs=250)
        // (scipy 1.13.1, tests/reference/gen_hilbert.py). Coefficients in f64: 1e-12 of the
        // row's largest.
        let meta = read_json("hilbert", "epochs");
        let bands: Vec<[f64; 2]> = serde_json::from_value(meta["bands"].clone()).unwrap();
        let order = meta["order"].as_u64().unwrap() as usize;
        for (i, &[lo, hi]) in bands.iter().enumerate() {
            let want = read_f64("hilbert", &format!("band{i}_sos"));
            let got = butterworth(order, Band::BandPass(lo, hi), 250.0);
            assert_eq!(got.len(), want.shape()[0]);
            for (j, s) in got.iter().enumerate() {
                let row: Vec<f64> = (0..6).map(|c| want[[j, c]]).collect();
                let scale = row.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
                assert!(max_rel_diff(s, &row, scale) < 1e-12, "band {i} section {j}");
            }
        }
    }

    #[test]
    fn output_equals_scipy_hilbert_of_sosfiltfilt() {
        // Reference: scipy.signal.hilbert(scipy.signal.sosfiltfilt(sos, epoch)) per epoch and
        // band (tests/reference/gen_hilbert.py). Tolerance: the values are stored as f32
        // (relative rounding 6e-8) after f64 work in a different order: 1e-6 of the band's peak.
        let (x, meta) = fixture_epochs();
        let bands = meta["bands"].clone();
        let (out, _) = run_op::<Hilbert>(json!({ "bands": bands }), &x).unwrap();
        let got = out.complex_values().unwrap();
        let (re, im) = (read_f64("hilbert", "out_re"), read_f64("hilbert", "out_im"));
        assert_eq!(got.shape(), re.shape());
        for b in 0..re.shape()[2] {
            let slab = |a: &ndarray::ArrayD<f64>| {
                a.index_axis(ndarray::Axis(2), b)
                    .iter()
                    .copied()
                    .collect::<Vec<f64>>()
            };
            let (want_re, want_im) = (slab(&re), slab(&im));
            let peak = want_re
                .iter()
                .zip(&want_im)
                .fold(0.0_f64, |m, (r, i)| m.max(r.hypot(*i)));
            let g = got.index_axis(ndarray::Axis(2), b);
            let err = g
                .iter()
                .zip(want_re.iter().zip(&want_im))
                .map(|(g, (r, i))| (f64::from(g.re) - r).hypot(f64::from(g.im) - i))
                .fold(0.0, f64::max);
            eprintln!(
                "hilbert band {b}: largest error {:.1e} of the peak",
                err / peak
            );
            assert!(err / peak < 1e-6, "band {b}: {:e}", err / peak);
        }
        // Centres on the freq axis, edges in the metadata.
        assert_eq!(out.layout.numbers("freq").unwrap(), [6.0, 10.0, 21.5]);
        assert_eq!(
            out.layout.meta.extra["bands"][2],
            json!({ "freq": 21.5, "low": 13.0, "high": 30.0 })
        );
    }

    #[test]
    fn crop_stride_and_parts_cut_the_whole_output() {
        // The same crop/stride rule as the wavelet (DESIGN.md §4): crop keeps [t0, t1] inclusive,
        // stride every k-th sample; parts along freq equal the whole run's slices, bit for bit.
        let (x, _) = fixture_epochs();
        let p = json!({ "freqs": [6, 10, 20], "width": 4 });
        let (whole, _) = run_op::<Hilbert>(p.clone(), &x).unwrap();
        let mut cropped = p.clone();
        cropped["crop"] = json!([-0.2, 0.6]);
        cropped["stride"] = json!(2);
        let (cut, _) = run_op::<Hilbert>(cropped.clone(), &x).unwrap();
        let times = cut.layout.numbers("time").unwrap();
        assert!((times[0] + 0.2).abs() < 1e-12 && (times[times.len() - 1] - 0.6).abs() < 1e-12);
        assert_eq!(cut.layout.meta.sampling_rate, Some(125.0));
        let (w, c) = (
            whole.complex_values().unwrap(),
            cut.complex_values().unwrap(),
        );
        let start = 125 - 50; // epoch starts at −125 samples; −0.2 s is sample −50
        for (k, t) in (0..times.len()).zip((start..).step_by(2)) {
            assert_eq!(c[[1, 2, 0, k]], w[[1, 2, 0, t]]);
        }
        assert_parts_match::<Hilbert>(cropped, &x, &[0..1, 1..3]);
    }

    #[test]
    fn a_sinusoid_gives_its_amplitude_and_phase() {
        // Analytic: a cosine A·cos(2πft + φ) well inside a band passes the zero-phase band-pass
        // with gain |H|² ≈ 1 and no phase shift (Oppenheim & Schafer, zero-phase filtering), and
        // its analytic signal is A·exp(i(2πft + φ)) (Marple 1999). The FFT treats the epoch as
        // periodic: the jump where its ends meet leaks through the discrete Hilbert kernel,
        // whose odd taps are 2/(πk) (Oppenheim & Schafer), so d samples from either end the
        // error is of order 2A/(πd): 1.3e-3·A at d = 500. Checked there, to 2.5e-3·A.
        let (fs, f, a, phi) = (250.0, 10.0, 3e-6, 0.7);
        let n = 1500;
        let x = Array3::from_shape_fn((1, 1, n), |(_, _, k)| {
            (a * (2.0 * PI * f * k as f64 / fs + phi).cos()) as f32
        })
        .into_dyn();
        let (out, _) =
            run_op::<Hilbert>(json!({ "bands": [[8, 12]] }), &epoched(x, fs, 0, &["a"])).unwrap();
        let z = out.complex_values().unwrap();
        for k in 500..1000 {
            let want = Complex64::from_polar(a, 2.0 * PI * f * k as f64 / fs + phi);
            let got = Complex64::new(z[[0, 0, 0, k]].re.into(), z[[0, 0, 0, k]].im.into());
            assert!(
                (got - want).norm() < 2.5e-3 * a,
                "sample {k}: {got} vs {want}"
            );
        }
    }

    #[test]
    fn bad_bands_are_param_errors_naming_the_field() {
        let (x, _) = fixture_epochs();
        let err = run_err::<Hilbert>(json!({ "bands": [[4, 8], [100, 125]] }), &x);
        assert_eq!(
            err.to_string(),
            "bands[1]: the band [100, 125] Hz reaches the Nyquist frequency (125 Hz at 250 Hz \
             sampling); its upper edge must lie below it"
        );
        let err = run_err::<Hilbert>(json!({ "freqs": [6, 123], "width": 4 }), &x);
        assert!(
            err.to_string()
                .starts_with("freqs[1]: the band [121, 125] Hz"),
            "{err}"
        );
        let err = run_err::<Hilbert>(
            json!({ "freqs": { "from": 4, "to": 124, "count": 5 }, "width": 2 }),
            &x,
        );
        assert!(err.to_string().starts_with("freqs.to: "), "{err}");
        for (p, field) in [
            (json!({ "freqs": [6] }), "width"),
            (json!({ "bands": [[4, 8]], "width": 2 }), "width"),
            (
                json!({ "bands": [[4, 8]], "freqs": [6], "width": 2 }),
                "freqs",
            ),
            (json!({}), "bands"),
            (json!({ "bands": [[8, 4]] }), "bands[0]"),
            (json!({ "bands": [[4, 8], [5, 7]] }), "bands[1]"),
            (json!({ "freqs": [2], "width": 4 }), "width"),
            (json!({ "bands": [[4, 8]], "order": 0 }), "order"),
            (json!({ "bands": [[4, 8]], "crop": [1, 0] }), "crop"),
            (json!({ "bands": [[4, 8]], "crop": [-2, 0] }), "crop"),
        ] {
            match run_err::<Hilbert>(p.clone(), &x) {
                StageError::Param { field: f, .. } => assert_eq!(f, field, "{p}"),
                other => panic!("{p}: {other}"),
            }
        }
    }
}
