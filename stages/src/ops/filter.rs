//! The `filter` op: zero-phase Butterworth high-pass, low-pass or band-pass filtering of a
//! continuous recording.
//!
//! `low` is the lower band edge (a high-pass on its own), `high` the upper one (a low-pass on its
//! own); both give a band-pass. `order` is the Butterworth prototype's order, as in
//! scipy.signal.butter: a band-pass of order N has 2N poles. The design is second-order sections
//! (as `butter(..., output='sos', fs=fs)`), applied forward and backward like
//! scipy.signal.sosfiltfilt with its defaults, so the magnitude response is squared and the
//! phase is zero. Computation is in `f64` per channel; channels run in parallel.

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::dsp::design::{butterworth, Band};
use crate::dsp::recording::{map_channels, refuse_non_finite_anywhere, Continuous};
use crate::dsp::sos::ZeroPhase;
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};

/// The `filter` op.
pub struct Filter;

/// Parameters of `filter`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct FilterParams {
    /// Lower band edge in Hz (high-pass when alone).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub low: Option<f64>,
    /// Upper band edge in Hz (low-pass when alone).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub high: Option<f64>,
    /// Order of the Butterworth prototype.
    #[serde(default = "default_order")]
    pub order: usize,
}

/// Common practice: order 4, applied twice (forward–backward), is the usual EEG default.
fn default_order() -> usize {
    4
}

/// Orders above this ring for a long time and lose precision even as sections.
const MAX_ORDER: usize = 16;

impl Op for Filter {
    type Params = FilterParams;
    const NAME: &'static str = "filter";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        for (field, edge) in [("low", p.low), ("high", p.high)] {
            if let Some(f) = edge {
                if !(f.is_finite() && f > 0.0) {
                    return Err(StageError::param(
                        field,
                        format!("a band edge must be a positive number of Hz, found {f}"),
                    ));
                }
            }
        }
        if let (Some(lo), Some(hi)) = (p.low, p.high) {
            if lo >= hi {
                return Err(StageError::param(
                    "high",
                    format!("the upper edge ({hi} Hz) must be above the lower edge ({lo} Hz)"),
                ));
            }
        }
        if p.low.is_none() && p.high.is_none() {
            return Err(StageError::param(
                "low",
                "give `low` (high-pass), `high` (low-pass) or both (band-pass), in Hz",
            ));
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
        Ok(())
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        output_layout(p, single(inputs)?.layout).map(|(layout, _)| Some(layout))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        _notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let (layout, filter) = output_layout(p, &input.layout)?;
        refuse_non_finite_anywhere(
            input,
            "the filter runs forward and backward over the whole recording and would spread it \
             over the whole channel",
        )?;
        let values = map_channels(input.real_values()?, |rows, scratch| {
            filter.apply_rows(rows, scratch)
        })?;
        LabelledArray::real(layout, values)
    }
}

/// Check the params against the recording and design the filter; the output layout equals the
/// input's.
fn output_layout(p: &FilterParams, input: &Layout) -> Result<(Layout, ZeroPhase), StageError> {
    Filter::check(p)?;
    let rec = Continuous::of(input)?;
    for (field, edge) in [("low", p.low), ("high", p.high)] {
        match edge {
            Some(f) if f >= rec.nyquist() => {
                return Err(StageError::param(
                    field,
                    format!(
                        "{f} Hz is at or above the Nyquist frequency ({} Hz) of this recording \
                         (sampled at {} Hz)",
                        rec.nyquist(),
                        rec.fs
                    ),
                ))
            }
            _ => {}
        }
    }
    let band = band(p).ok_or_else(|| StageError::param("low", "no band edge given"))?;
    let filter = ZeroPhase::new(butterworth(p.order, band, rec.fs));
    if rec.n_times <= filter.pad() {
        return Err(StageError::data(format!(
            "this filter needs more than {} samples per channel (its edge padding), found {}",
            filter.pad(),
            rec.n_times
        )));
    }
    Ok((input.clone(), filter))
}

/// The band the params ask for (`None` when neither edge is given).
fn band(p: &FilterParams) -> Option<Band> {
    match (p.low, p.high) {
        (Some(lo), Some(hi)) => Some(Band::BandPass(lo, hi)),
        (Some(lo), None) => Some(Band::HighPass(lo)),
        (None, Some(hi)) => Some(Band::LowPass(hi)),
        (None, None) => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::{Coord, Meta};
    use crate::testutil::{largest_error_of_peak, max_rel_diff, read_f64, read_json, read_vec};
    use ndarray::{Array2, ArrayD};
    use serde_json::json;
    use std::f64::consts::PI;

    fn params(v: serde_json::Value) -> FilterParams {
        crate::op::parse_params(&v).unwrap()
    }

    fn continuous(row: &[f64], fs: f64) -> LabelledArray {
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(vec!["Cz".into()]),
                Coord::Numbers((0..row.len()).map(|k| k as f64 / fs).collect()),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(fs),
                ..Meta::default()
            },
        };
        let flat: Vec<f32> = row.iter().map(|&v| v as f32).collect();
        let values = Array2::from_shape_vec((1, row.len()), flat)
            .unwrap()
            .into_dyn();
        LabelledArray::real(layout, values).unwrap()
    }

    fn run(p: &FilterParams, x: &LabelledArray) -> Result<ArrayD<f32>, StageError> {
        let input = Input {
            stage: "raw",
            subject: None,
            array: x,
        };
        Ok(Filter::run(p, &[input], &mut Notes::default())?
            .real_values()?
            .clone())
    }

    /// The fixture's cases as params.
    fn cases() -> Vec<(String, FilterParams)> {
        let meta = read_json("preproc", "butter_cases");
        let cases = meta["cases"].as_object().unwrap();
        cases
            .iter()
            .map(|(name, c)| (name.clone(), params(c.clone())))
            .collect()
    }

    #[test]
    fn sections_equal_scipy_butter_sos() {
        // Reference: scipy.signal.butter(order, Wn, btype, output='sos', fs=500) (scipy 1.13.1),
        // tests/reference/gen_preproc.py. Coefficients in f64 (measured <= 5e-16): 1e-12 of the
        // row's largest.
        for (name, p) in cases() {
            let want = read_f64("preproc", &format!("butter_{name}_sos"));
            let got = butterworth(p.order, band(&p).unwrap(), 500.0);
            assert_eq!(got.len(), want.shape()[0], "{name}: number of sections");
            for (i, s) in got.iter().enumerate() {
                let row: Vec<f64> = (0..6).map(|j| want[[i, j]]).collect();
                let scale = row.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
                let d = max_rel_diff(s, &row, scale);
                eprintln!(
                    "butter {name} section {i}: largest difference {d:.1e} of the row's largest"
                );
                assert!(d < 1e-12, "{name} section {i}: {s:?} vs {row:?}");
            }
        }
    }

    #[test]
    fn output_equals_scipy_sosfiltfilt_edges_included() {
        // Reference: scipy.signal.sosfiltfilt(sos, x) with default padding
        // (tests/reference/gen_preproc.py). Tolerance: f32 storage (measured ~3e-8), 1e-6 of the
        // output's peak.
        let x = read_vec("preproc", "signal");
        let input = continuous(&x, 500.0);
        for (name, p) in cases() {
            let want: Vec<f64> = read_vec("preproc", &format!("butter_{name}_out"));
            let got: Vec<f64> = run(&p, &input)
                .unwrap()
                .iter()
                .map(|&v| f64::from(v))
                .collect();
            let err = largest_error_of_peak(&got, &want);
            eprintln!("butter {name}: largest error {err:.2e} of the peak");
            assert!(err < 1e-6, "{name}: largest error {err:e} of the peak");
        }
    }

    #[test]
    fn a_passband_sine_keeps_its_phase() {
        // Analytic: forward–backward filtering has zero phase (Oppenheim & Schafer, Discrete-Time
        // Signal Processing, zero-phase filtering), so a 10 Hz sine through a 1–40 Hz band-pass
        // keeps its phase, and its amplitude since |H(10 Hz)|² ≈ 1 well inside the band.
        let fs = 500.0;
        let x: Vec<f64> = (0..5000)
            .map(|k| (2.0 * PI * 10.0 * k as f64 / fs + 0.4).sin())
            .collect();
        let out = run(
            &params(json!({ "low": 1, "high": 40 })),
            &continuous(&x, fs),
        )
        .unwrap();
        let (mut c, mut s) = (0.0, 0.0);
        for k in 1000..4000 {
            let w = 2.0 * PI * 10.0 * k as f64 / fs;
            c += f64::from(out[[0, k]]) * w.cos();
            s += f64::from(out[[0, k]]) * w.sin();
        }
        // sin(w + 0.4) = cos(w)·sin(0.4) + sin(w)·cos(0.4): phase of the sine = atan2(c, s).
        let (amp, phase) = ((2.0 * c / 3000.0).hypot(2.0 * s / 3000.0), c.atan2(s));
        assert!((amp - 1.0).abs() < 1e-3, "amplitude {amp}");
        assert!((phase - 0.4).abs() < 1e-4, "phase {phase}");
    }

    #[test]
    fn the_layout_passes_through_unchanged() {
        // DESIGN.md §2: filtering changes values only; events and channel types flow on.
        let mut x = continuous(&vec![0.0; 100], 200.0);
        x.layout.meta.events = Some(vec![crate::array::Event {
            onset: 0.1,
            duration: 0.0,
            label: "cue".into(),
        }]);
        let p = params(json!({ "high": 30 }));
        let lay = InputLayout {
            stage: "raw",
            subject: None,
            layout: &x.layout,
        };
        assert_eq!(
            Filter::layout(&p, &[lay]).unwrap().as_ref(),
            Some(&x.layout)
        );
        let input = Input {
            stage: "raw",
            subject: None,
            array: &x,
        };
        let out = Filter::run(&p, &[input], &mut Notes::default()).unwrap();
        assert_eq!(out.layout, x.layout);
    }

    #[test]
    fn bad_edges_are_param_errors() {
        let x = continuous(&vec![0.0; 1000], 200.0);
        let err = run(&params(json!({ "low": 1, "high": 100 })), &x).unwrap_err();
        assert_eq!(err.to_string(), "high: 100 Hz is at or above the Nyquist frequency (100 Hz) of this recording (sampled at 200 Hz)");
        let err = Filter::check(&params(json!({ "low": 12, "high": 8 }))).unwrap_err();
        assert_eq!(
            err.to_string(),
            "high: the upper edge (8 Hz) must be above the lower edge (12 Hz)"
        );
        let err = Filter::check(&params(json!({ "order": 2 }))).unwrap_err();
        assert!(err.to_string().starts_with("low: give `low`"), "{err}");
        let err = Filter::check(&params(json!({ "low": -1 }))).unwrap_err();
        assert_eq!(
            err.to_string(),
            "low: a band edge must be a positive number of Hz, found -1"
        );
        let err = Filter::check(&params(json!({ "low": 1, "order": 0 }))).unwrap_err();
        assert_eq!(
            err.to_string(),
            "order: the order must be between 1 and 16, found 0"
        );
        // A 4th-order high-pass is 2 sections: scipy.signal.sosfiltfilt pads 3·(2·2 + 1) = 15.
        let err = run(&params(json!({ "low": 1 })), &continuous(&[0.0; 15], 200.0)).unwrap_err();
        assert_eq!(
            err.to_string(),
            "this filter needs more than 15 samples per channel (its edge padding), found 15"
        );
    }
}
