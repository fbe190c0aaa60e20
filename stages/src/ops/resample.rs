//! The `resample` op: a continuous recording to a new sampling `rate` (Hz) by rational-factor
//! polyphase resampling with an anti-alias FIR, exactly as scipy.signal.resample_poly does with
//! its defaults ([`crate::dsp::resample`]: Kaiser window β = 5, 20·max(up, down) + 1 taps, zeros
//! beyond the ends).
//!
//! The factor up/down is `rate` / input rate in lowest terms; either above
//! [`MAX_FACTOR`](crate::dsp::resample::MAX_FACTOR) is a param error. Every channel is resampled
//! (they share one time axis); the output has ⌈n·up/down⌉ samples at times k/rate. Events keep
//! their onsets in seconds; epoching then finds the sample nearest each onset at the new rate.
//! Computation in f64 per channel; channels run in parallel (each on its own, so the result
//! does not depend on the thread count).

use ndarray::{Array2, Axis};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::array::{Coord, LabelledArray, Layout};
use crate::dsp::recording::{as_matrix, refuse_non_finite_anywhere, Continuous};
use crate::dsp::resample::{factors, Resampler};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};

/// The `resample` op.
pub struct Resample;

/// Parameters of `resample`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct ResampleParams {
    /// The new sampling rate in Hz.
    pub rate: f64,
}

impl Op for Resample {
    type Params = ResampleParams;
    const NAME: &'static str = "resample";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        if !(p.rate.is_finite() && p.rate > 0.0) {
            return Err(StageError::param(
                "rate",
                format!("expected a positive number of Hz, found {}", p.rate),
            ));
        }
        Ok(())
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        plan(p, single(inputs)?.layout).map(|(layout, _)| Some(layout))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        _notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let (layout, resampler) = plan(p, &input.layout)?;
        refuse_non_finite_anywhere(
            input,
            "the anti-alias filter would spread it over the neighbouring output samples",
        )?;
        let x = as_matrix(input.real_values()?)?;
        let values = resample_rows(x, &resampler);
        LabelledArray::real(layout, values.into_dyn())
    }
}

/// Every row of `x` resampled, in f64, stored as f32.
pub fn resample_rows(x: ndarray::ArrayView2<'_, f32>, resampler: &Resampler) -> Array2<f32> {
    let n_out = resampler.output_len(x.ncols());
    let mut out = Array2::<f32>::zeros((x.nrows(), n_out));
    out.axis_iter_mut(Axis(0))
        .into_par_iter()
        .zip(x.axis_iter(Axis(0)).into_par_iter())
        .for_each(|(mut row_out, row_in)| {
            let row: Vec<f64> = row_in.iter().map(|&v| f64::from(v)).collect();
            let mut y = vec![0.0; n_out];
            resampler.apply(&row, &mut y);
            row_out.iter_mut().zip(&y).for_each(|(o, v)| *o = *v as f32);
        });
    out
}

/// The output layout and the resampler for this recording.
fn plan(p: &ResampleParams, input: &Layout) -> Result<(Layout, Resampler), StageError> {
    Resample::check(p)?;
    let rec = Continuous::of(input)?;
    let (up, down) =
        factors(rec.fs, p.rate).map_err(|m| StageError::param("rate", m.to_string()))?;
    let resampler = Resampler::new(up, down);
    let n_out = resampler.output_len(rec.n_times);
    let mut layout = input.clone();
    let k = layout.axis("time")?;
    layout.coords[k] = Coord::Numbers((0..n_out).map(|i| i as f64 / p.rate).collect());
    layout.meta.sampling_rate = Some(p.rate);
    Ok((layout, resampler))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::{Event, Meta};
    use crate::ops::tf_testing::run_op;
    use crate::testutil::{read_f64, read_json};
    use serde_json::json;

    fn continuous(rows: &[Vec<f64>], fs: f64) -> LabelledArray {
        let n = rows[0].len();
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels((0..rows.len()).map(|i| format!("E{i}")).collect()),
                Coord::Numbers((0..n).map(|k| k as f64 / fs).collect()),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(fs),
                channel_types: Some(vec!["EEG".into(); rows.len()]),
                events: Some(vec![Event {
                    onset: 1.234,
                    duration: 0.0,
                    label: "cue".into(),
                }]),
                ..Meta::default()
            },
        };
        let flat: Vec<f32> = rows.iter().flatten().map(|&v| v as f32).collect();
        let values = Array2::from_shape_vec((rows.len(), n), flat).unwrap();
        LabelledArray::real(layout, values.into_dyn()).unwrap()
    }

    #[test]
    fn equals_scipy_resample_poly_and_keeps_events() {
        // Reference: scipy.signal.resample_poly(x, up, down) with its defaults (scipy 1.13.1,
        // tests/reference/gen_resample.py), edges included. The input is f32-exact, the work
        // f64, the output f32: 1e-6 of the peak.
        let x: Vec<f64> = read_f64("resample", "signal").iter().copied().collect();
        let peak = x.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
        let cases = read_json("resample", "cases");
        for case in cases["cases"].as_array().unwrap() {
            let name = case["name"].as_str().unwrap();
            let (from, to) = (case["from"].as_f64().unwrap(), case["to"].as_f64().unwrap());
            let input = continuous(&[x.clone(), x.iter().map(|v| -v).collect()], from);
            let (out, _) = run_op::<Resample>(json!({ "rate": to }), &input).unwrap();
            let want: Vec<f64> = read_f64("resample", &format!("{name}_out"))
                .iter()
                .copied()
                .collect();
            let got = out.real_values().unwrap();
            assert_eq!(got.shape(), [2, want.len()], "{name}");
            for (k, w) in want.iter().enumerate() {
                let (a, b) = (f64::from(got[[0, k]]), f64::from(got[[1, k]]));
                assert!((a - w).abs() < 1e-6 * peak, "{name} sample {k}: {a} vs {w}");
                assert!((b + w).abs() < 1e-6 * peak, "{name} sample {k}");
            }
            let times = out.layout.numbers("time").unwrap();
            assert_eq!(times[3], 3.0 / to);
            assert_eq!(out.layout.meta.sampling_rate, Some(to));
            // Events keep their onsets in seconds (DESIGN.md §4b).
            assert_eq!(out.layout.meta.events, input.layout.meta.events);
        }
    }

    #[test]
    fn a_rate_beyond_the_factor_limit_is_a_param_error() {
        let input = continuous(&[vec![0.0; 100]], 1000.0);
        let err = run_op::<Resample>(json!({ "rate": 997.3 }), &input).unwrap_err();
        match err {
            StageError::Param { field, message } => {
                assert_eq!(field, "rate");
                assert!(message.contains("9973/10000"), "{message}");
            }
            other => panic!("{other}"),
        }
        let err = run_op::<Resample>(json!({ "rate": -5 }), &input).unwrap_err();
        assert_eq!(
            err.to_string(),
            "rate: expected a positive number of Hz, found -5"
        );
    }
}
