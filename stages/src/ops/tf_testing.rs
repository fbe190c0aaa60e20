//! Test helpers shared by the `wavelet` and `clustering` tests: building epoched inputs and
//! coefficient arrays, and driving an op the way the runner does (resolve → layout → run).

use ndarray::ArrayD;
use num_complex::Complex32;
use serde_json::Value;

use crate::array::{Coord, LabelledArray, Layout, Meta, TrialInfo};
use crate::error::StageError;
use crate::op::{DynOp, Input, InputLayout, Notes, Op, Registered};

/// Metadata of epoched data: EEG channels unless `types` says otherwise, one TrialInfo per trial.
fn meta(fs: f64, types: Vec<String>, conditions: &[&str]) -> Meta {
    Meta {
        sampling_rate: Some(fs),
        channel_types: Some(types),
        trials: Some(
            conditions
                .iter()
                .enumerate()
                .map(|(i, c)| TrialInfo {
                    condition: c.to_string(),
                    event: format!("cue-{c}"),
                    onset: 10.0 + i as f64,
                })
                .collect(),
        ),
        ..Meta::default()
    }
}

fn labels(v: &[&str]) -> Vec<String> {
    v.iter().map(|s| s.to_string()).collect()
}

/// Channel names `C0`, `C1`, …
pub fn names(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("C{i}")).collect()
}

/// Epoched data [channel, trial, time] with times k / fs for k = first … first + T − 1.
pub fn epoched(values: ArrayD<f32>, fs: f64, first: i64, conditions: &[&str]) -> LabelledArray {
    let shape = values.shape().to_vec();
    let layout = Layout {
        dims: ["channel", "trial", "time"].map(String::from).to_vec(),
        coords: vec![
            Coord::Labels(names(shape[0])),
            Coord::Labels(labels(conditions)),
            Coord::Numbers(
                (0..shape[2] as i64)
                    .map(|k| (first + k) as f64 / fs)
                    .collect(),
            ),
        ],
        units: "V".into(),
        complex: false,
        meta: meta(fs, vec!["EEG".into(); shape[0]], conditions),
    };
    LabelledArray::real(layout, values).expect("consistent test input")
}

/// Coefficients [channel, trial, freq, time] as the wavelet op would hand them on.
pub fn coefficients(
    values: ArrayD<Complex32>,
    fs: f64,
    freqs: &[f64],
    channels: Vec<String>,
    types: Vec<String>,
    conditions: &[&str],
) -> LabelledArray {
    let n_t = values.shape()[3];
    let layout = Layout {
        dims: ["channel", "trial", "freq", "time"]
            .map(String::from)
            .to_vec(),
        coords: vec![
            Coord::Labels(channels),
            Coord::Labels(labels(conditions)),
            Coord::Numbers(freqs.to_vec()),
            Coord::Numbers((0..n_t).map(|k| k as f64 / fs).collect()),
        ],
        units: "V".into(),
        complex: true,
        meta: meta(fs, types, conditions),
    };
    LabelledArray::complex(layout, values).expect("consistent test input")
}

/// Runs op `O` as the runner does: resolve the params, compute the layout, run, and check that
/// the run's layout equals the predicted one.
pub fn run_op<O: Op>(
    params: Value,
    input: &LabelledArray,
) -> Result<(LabelledArray, Notes), StageError> {
    let op = Registered::<O>::new().bind(&params)?;
    let layouts = [InputLayout {
        stage: "in",
        subject: Some("01"),
        layout: &input.layout,
    }];
    let predicted = op.layout(&layouts)?;
    let inputs = [Input {
        stage: "in",
        subject: Some("01"),
        array: input,
    }];
    let mut notes = Notes::default();
    let out = op.run(&inputs, &mut notes)?;
    assert_eq!(
        predicted.as_ref(),
        Some(&out.layout),
        "layout() and run() disagree"
    );
    Ok((out, notes))
}

/// The error of a run that must fail.
pub fn run_err<O: Op>(params: Value, input: &LabelledArray) -> StageError {
    match run_op::<O>(params.clone(), input) {
        Ok(_) => panic!("expected an error from {params}"),
        Err(e) => e,
    }
}

/// The parts protocol of `op.rs`: `run_part` over `parts` (producer) must equal the whole
/// run's output cut along the part axis, bit for bit; returns the whole output.
pub fn assert_parts_match<O: Op>(
    params: Value,
    input: &LabelledArray,
    parts: &[std::ops::Range<usize>],
) -> LabelledArray {
    let op = Registered::<O>::new().bind(&params).expect("params");
    let (whole, _) = run_op::<O>(params, input).expect("whole run");
    let axis = op.part_axis().expect("the op computes parts");
    let inputs = [Input {
        stage: "in",
        subject: Some("01"),
        array: input,
    }];
    for part in parts {
        let got = op
            .run_part(&inputs, part.clone(), &mut Notes::default())
            .expect("part");
        let want = whole.slice(axis, part.clone()).expect("slice");
        assert_eq!(got.layout, want.layout, "layout of part {part:?}");
        assert!(got.values == want.values, "values of part {part:?} differ");
    }
    whole
}
