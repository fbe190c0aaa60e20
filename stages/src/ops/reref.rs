//! The `re-reference` op: re-expresses the voltage data channels of a continuous recording
//! against a new reference.
//!
//! - `method: average` — subtract, at every sample, the mean of the voltage data channels.
//! - `method: channels` with `channels: [..]` — subtract the mean of the named channels
//!   (e.g. both mastoids).
//! - `method: bipolar` with `bipolar: [[a, b], ..]` — replace the data channels by the
//!   differences a − b, named `a-b`.
//!
//! `exclude: [..]` keeps channels out of an average or channel reference (bad channels); they
//! are still re-referenced themselves. Channels that are not voltage data (see
//! [`crate::dsp::recording`]: EOG, ECG, MEG, …) pass through unchanged and join no reference
//! and no pair; in bipolar output they follow the pairs, in their original order. References
//! are computed and subtracted in `f64`.

use ndarray::{Array1, Array2, ArrayView2, Axis, Zip};
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::array::{Coord, LabelledArray, Layout};
use crate::dsp::recording::{as_matrix, refuse_non_finite, Continuous};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};

/// The `re-reference` op.
pub struct ReReference;

/// How the new reference is formed.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// The mean of all voltage data channels.
    Average,
    /// The mean of the channels named in `channels`.
    Channels,
    /// The differences named in `bipolar`.
    Bipolar,
}

/// Parameters of `re-reference`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct ReReferenceParams {
    /// How the new reference is formed.
    pub method: Method,
    /// Reference channels (with `method: channels`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub channels: Vec<String>,
    /// Channel pairs `[a, b]`, each giving a − b (with `method: bipolar`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub bipolar: Vec<[String; 2]>,
    /// Channels kept out of the reference (bad channels).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub exclude: Vec<String>,
}

/// What to compute, resolved against one recording's channels.
#[derive(Clone, Debug)]
enum Plan {
    /// Subtract the mean of these channel rows from every data channel.
    Reference(Vec<usize>),
    /// Output rows `a − b`, then the pass-through rows.
    Bipolar(Vec<(usize, usize)>, Vec<usize>),
}

impl Op for ReReference {
    type Params = ReReferenceParams;
    const NAME: &'static str = "re-reference";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        list_fits_method(p, "channels", !p.channels.is_empty())?;
        list_fits_method(p, "bipolar", !p.bipolar.is_empty())?;
        if let Some(i) = p.bipolar.iter().position(|[a, b]| a == b) {
            return Err(StageError::param(
                format!("bipolar[{i}]"),
                format!(
                    "a pair needs two different channels, found `{}` twice",
                    p.bipolar[i][0]
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
        let (layout, plan) = output_layout(p, &input.layout)?;
        let rec = Continuous::of(&input.layout)?;
        let x = as_matrix(input.real_values()?)?;
        if let Plan::Reference(rows) = &plan {
            // A channel outside the reference keeps its own samples; one inside it reaches
            // every data channel through the mean.
            refuse_non_finite(
                input.real_values()?,
                &input.layout,
                rows.iter().copied(),
                "the channel joins the reference, whose mean would carry it into every data \
                 channel at that time",
                "leave the channel out of the reference (`exclude`), or replace the sample \
                 first (mark the channel bad and run interpolate before this stage, or clean \
                 the recording)",
            )?;
        }
        let values = match &plan {
            Plan::Reference(rows) => subtract_reference(x, rows, &rec.is_data),
            Plan::Bipolar(pairs, rest) => bipolar(x, pairs, rest),
        };
        LabelledArray::real(layout, values.into_dyn())
    }
}

impl ReReferenceParams {
    fn method_name(&self) -> &'static str {
        match self.method {
            Method::Average => "average",
            Method::Channels => "channels",
            Method::Bipolar => "bipolar",
        }
    }
}

/// The list `field` must be given exactly when `method` is the method of the same name.
fn list_fits_method(p: &ReReferenceParams, field: &str, given: bool) -> Result<(), StageError> {
    let method = p.method_name();
    match (given, method == field) {
        (false, true) => Err(StageError::param(
            field,
            format!("`method: {method}` needs a non-empty `{field}` list"),
        )),
        (true, false) => Err(StageError::param(
            field,
            format!("`{field}` is only used with `method: {field}`, not `method: {method}`"),
        )),
        _ => Ok(()),
    }
}

/// Resolve the params against the recording: the output layout and what to compute.
fn output_layout(p: &ReReferenceParams, input: &Layout) -> Result<(Layout, Plan), StageError> {
    ReReference::check(p)?;
    let rec = Continuous::of(input)?;
    let excluded = indices(&rec, &p.exclude, "exclude")?;
    let plan = match p.method {
        Method::Average => {
            let rows: Vec<usize> = (0..rec.channels.len())
                .filter(|i| rec.is_data[*i] && !excluded.contains(i))
                .collect();
            if rows.is_empty() {
                return Err(StageError::data(format!(
                    "an average reference needs voltage data channels (EEG, SEEG, ECOG, DBS, LFP) \
                     outside `exclude`; the recording's channel types are [{}]",
                    channel_types(input).join(", ")
                )));
            }
            Plan::Reference(rows)
        }
        Method::Channels => Plan::Reference(reference_channels(p, &rec, input, &excluded)?),
        Method::Bipolar => bipolar_plan(p, &rec, input, &excluded)?,
    };
    let mut layout = input.clone();
    if let Plan::Bipolar(pairs, rest) = &plan {
        bipolar_layout(&mut layout, &rec, pairs, rest);
    }
    layout
        .meta
        .extra
        .insert("reference".into(), reference_record(p));
    Ok((layout, plan))
}

/// Row indices of `names`, or a param error at `field[i]` naming the unknown channel.
fn indices(rec: &Continuous<'_>, names: &[String], field: &str) -> Result<Vec<usize>, StageError> {
    names
        .iter()
        .enumerate()
        .map(|(i, name)| rec.channel_index(name, &format!("{field}[{i}]")))
        .collect()
}

/// The channel types for messages (`EEG` for all when the recording has none).
fn channel_types(input: &Layout) -> Vec<String> {
    match &input.meta.channel_types {
        Some(t) => t.clone(),
        None => vec!["EEG".into()],
    }
}

/// A param error at `field` when channel `row` is not a voltage data channel.
fn require_data(
    rec: &Continuous<'_>,
    input: &Layout,
    row: usize,
    field: String,
) -> Result<(), StageError> {
    if rec.is_data[row] {
        return Ok(());
    }
    let kind = channel_types(input).get(row).cloned().unwrap_or_default();
    Err(StageError::param(
        field,
        format!(
            "channel `{}` is of type {kind}; only voltage data channels (EEG, SEEG, ECOG, DBS, LFP) \
             can form a reference or a pair",
            rec.channels[row]
        ),
    ))
}

fn reference_channels(
    p: &ReReferenceParams,
    rec: &Continuous<'_>,
    input: &Layout,
    excluded: &[usize],
) -> Result<Vec<usize>, StageError> {
    let rows = indices(rec, &p.channels, "channels")?;
    for (i, &row) in rows.iter().enumerate() {
        require_data(rec, input, row, format!("channels[{i}]"))?;
        if excluded.contains(&row) {
            return Err(StageError::param(
                format!("channels[{i}]"),
                format!(
                    "channel `{}` is both a reference channel and excluded",
                    rec.channels[row]
                ),
            ));
        }
    }
    Ok(rows)
}

fn bipolar_plan(
    p: &ReReferenceParams,
    rec: &Continuous<'_>,
    input: &Layout,
    excluded: &[usize],
) -> Result<Plan, StageError> {
    let mut pairs = Vec::with_capacity(p.bipolar.len());
    for (i, [a, b]) in p.bipolar.iter().enumerate() {
        let mut pair = [0; 2];
        for (j, name) in [a, b].into_iter().enumerate() {
            let field = format!("bipolar[{i}][{j}]");
            let row = rec.channel_index(name, &field)?;
            require_data(rec, input, row, field.clone())?;
            if excluded.contains(&row) {
                return Err(StageError::param(
                    field,
                    format!("channel `{name}` is excluded"),
                ));
            }
            pair[j] = row;
        }
        pairs.push((pair[0], pair[1]));
    }
    let rest = (0..rec.channels.len())
        .filter(|i| !rec.is_data[*i])
        .collect();
    Ok(Plan::Bipolar(pairs, rest))
}

/// Channel names `a-b` (then the pass-through channels) and their types (the first channel's).
fn bipolar_layout(
    layout: &mut Layout,
    rec: &Continuous<'_>,
    pairs: &[(usize, usize)],
    rest: &[usize],
) {
    let names: Vec<String> = pairs
        .iter()
        .map(|&(a, b)| format!("{}-{}", rec.channels[a], rec.channels[b]))
        .chain(rest.iter().map(|&i| rec.channels[i].clone()))
        .collect();
    let rows: Vec<usize> = pairs
        .iter()
        .map(|&(a, _)| a)
        .chain(rest.iter().copied())
        .collect();
    if let Some(types) = &layout.meta.channel_types {
        let picked = rows
            .iter()
            .map(|&i| types.get(i).cloned().unwrap_or_default())
            .collect();
        layout.meta.channel_types = Some(picked);
    }
    if let Some(axis) = layout.dims.iter().position(|d| d == "channel") {
        layout.coords[axis] = Coord::Labels(names);
    }
}

/// What the output's `meta.extra.reference` says about the reference.
fn reference_record(p: &ReReferenceParams) -> serde_json::Value {
    match p.method {
        Method::Average => json!({ "method": "average", "exclude": p.exclude }),
        Method::Channels => json!({ "method": "channels", "channels": p.channels }),
        Method::Bipolar => json!({ "method": "bipolar" }),
    }
}

/// x with the mean of `rows` (in f64, summed in row order) subtracted from every data channel.
fn subtract_reference(x: ArrayView2<'_, f32>, rows: &[usize], is_data: &[bool]) -> Array2<f32> {
    let mut reference = Array1::<f64>::zeros(x.ncols());
    for &r in rows {
        Zip::from(&mut reference)
            .and(x.row(r))
            .for_each(|acc, &v| *acc += f64::from(v));
    }
    reference /= rows.len() as f64;
    let mut out = x.to_owned();
    for (mut row, _) in out.axis_iter_mut(Axis(0)).zip(is_data).filter(|(_, d)| **d) {
        Zip::from(&mut row)
            .and(&reference)
            .for_each(|v, &r| *v = (f64::from(*v) - r) as f32);
    }
    out
}

/// Rows a − b for each pair (in f64), then the pass-through rows unchanged.
fn bipolar(x: ArrayView2<'_, f32>, pairs: &[(usize, usize)], rest: &[usize]) -> Array2<f32> {
    let mut out = Array2::<f32>::zeros((pairs.len() + rest.len(), x.ncols()));
    for (mut row, &(a, b)) in out.axis_iter_mut(Axis(0)).zip(pairs) {
        Zip::from(&mut row)
            .and(x.row(a))
            .and(x.row(b))
            .for_each(|o, &va, &vb| *o = (f64::from(va) - f64::from(vb)) as f32);
    }
    for (mut row, &r) in out.axis_iter_mut(Axis(0)).skip(pairs.len()).zip(rest) {
        row.assign(&x.row(r));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::Meta;
    use ndarray::ArrayD;

    const NAMES: [&str; 5] = ["Fz", "Cz", "EOG1", "M1", "M2"];
    const TYPES: [&str; 5] = ["EEG", "eeg", "EOG", "EEG", "EEG"];

    fn recording() -> LabelledArray {
        let n = 40;
        let values: Vec<f32> = (0..NAMES.len() * n)
            .map(|i| ((i * 7919 % 101) as f32 - 50.0) * 1e-6)
            .collect();
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(NAMES.iter().map(|s| s.to_string()).collect()),
                Coord::Numbers((0..n).map(|k| k as f64 / 100.0).collect()),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(100.0),
                channel_types: Some(TYPES.iter().map(|s| s.to_string()).collect()),
                ..Meta::default()
            },
        };
        let v = Array2::from_shape_vec((NAMES.len(), n), values)
            .unwrap()
            .into_dyn();
        LabelledArray::real(layout, v).unwrap()
    }

    fn run(p: serde_json::Value, x: &LabelledArray) -> Result<LabelledArray, StageError> {
        let p: ReReferenceParams = crate::op::parse_params(&p)?;
        ReReference::run(
            &p,
            &[Input {
                stage: "raw",
                subject: None,
                array: x,
            }],
            &mut Notes::default(),
        )
    }

    fn at(a: &ArrayD<f32>, c: usize, t: usize) -> f64 {
        f64::from(a[[c, t]])
    }

    /// Equal up to the f32 rounding of the stored output (relative 2^-24 ≈ 6e-8).
    fn close(got: f64, want: f64) -> bool {
        (got - want).abs() <= 1e-7 * want.abs() + 1e-15
    }

    #[test]
    fn average_reference_makes_the_eeg_channels_sum_to_zero() {
        // Definition: subtracting the mean of N channels leaves N values whose sum is zero
        // (Σ (x_i − x̄) = 0); the EOG channel is untouched (DESIGN.md §4).
        let x = recording();
        let out = run(serde_json::json!({ "method": "average" }), &x).unwrap();
        let (v, orig) = (out.real_values().unwrap(), x.real_values().unwrap());
        for t in 0..40 {
            let sum: f64 = [0, 1, 3, 4].iter().map(|&c| at(v, c, t)).sum();
            assert!(sum.abs() < 1e-11, "t={t}: sum {sum}");
            assert_eq!(v[[2, t]], orig[[2, t]]);
        }
        assert_eq!(out.layout.coords, x.layout.coords);
    }

    #[test]
    fn channel_reference_subtracts_the_named_mean() {
        // Definition: linked-mastoid reference x − (M1 + M2)/2 for every EEG channel.
        let x = recording();
        let out = run(
            serde_json::json!({ "method": "channels", "channels": ["M1", "M2"] }),
            &x,
        )
        .unwrap();
        let (v, o) = (out.real_values().unwrap(), x.real_values().unwrap());
        for t in 0..40 {
            let r = (at(o, 3, t) + at(o, 4, t)) / 2.0;
            for c in [0, 1, 3, 4] {
                assert!(close(at(v, c, t), at(o, c, t) - r));
            }
            assert_eq!(v[[2, t]], o[[2, t]]);
        }
    }

    #[test]
    fn exclude_keeps_a_channel_out_of_the_average() {
        // Definition: mean over the remaining EEG channels Fz, Cz, M2 (M1 excluded).
        let x = recording();
        let out = run(
            serde_json::json!({ "method": "average", "exclude": ["M1"] }),
            &x,
        )
        .unwrap();
        let (v, o) = (out.real_values().unwrap(), x.real_values().unwrap());
        let r = (at(o, 0, 5) + at(o, 1, 5) + at(o, 4, 5)) / 3.0;
        assert!(close(at(v, 3, 5), at(o, 3, 5) - r));
    }

    #[test]
    fn bipolar_channels_are_differences() {
        // Definition: a bipolar derivation a-b is x_a − x_b; non-EEG channels follow unchanged.
        let x = recording();
        let out = run(
            serde_json::json!({ "method": "bipolar", "bipolar": [["Fz", "Cz"], ["M1", "M2"]] }),
            &x,
        )
        .unwrap();
        let (v, o) = (out.real_values().unwrap(), x.real_values().unwrap());
        assert_eq!(
            out.layout.labels("channel").unwrap(),
            ["Fz-Cz", "M1-M2", "EOG1"]
        );
        assert_eq!(
            out.layout.meta.channel_types.as_deref().unwrap(),
            ["EEG", "EEG", "EOG"]
        );
        for t in 0..40 {
            assert_eq!(at(v, 0, t), f64::from((at(o, 0, t) - at(o, 1, t)) as f32));
            assert_eq!(at(v, 1, t), f64::from((at(o, 3, t) - at(o, 4, t)) as f32));
            assert_eq!(v[[2, t]], o[[2, t]]);
        }
    }

    #[test]
    fn unknown_channels_are_param_errors_listing_the_channels() {
        let x = recording();
        let err = run(
            serde_json::json!({ "method": "channels", "channels": ["M1", "A2"] }),
            &x,
        )
        .unwrap_err();
        assert_eq!(err.to_string(), "channels[1]: no channel named `A2`; the recording's channels are [Fz, Cz, EOG1, M1, M2]");
        let err = run(
            serde_json::json!({ "method": "bipolar", "bipolar": [["Fz", "Pz"]] }),
            &x,
        )
        .unwrap_err();
        assert!(
            err.to_string()
                .starts_with("bipolar[0][1]: no channel named `Pz`"),
            "{err}"
        );
        let err = run(
            serde_json::json!({ "method": "average", "exclude": ["T7"] }),
            &x,
        )
        .unwrap_err();
        assert!(
            err.to_string()
                .starts_with("exclude[0]: no channel named `T7`"),
            "{err}"
        );
    }

    #[test]
    fn inconsistent_params_are_param_errors() {
        let x = recording();
        let cases = [
            (serde_json::json!({ "method": "channels" }), "channels: `method: channels` needs a non-empty `channels` list"),
            (serde_json::json!({ "method": "average", "channels": ["M1"] }), "channels: `channels` is only used with `method: channels`, not `method: average`"),
            (serde_json::json!({ "method": "bipolar", "bipolar": [["Fz", "Fz"]] }), "bipolar[0]: a pair needs two different channels, found `Fz` twice"),
            (serde_json::json!({ "method": "bipolar", "bipolar": [["Fz", "EOG1"]] }), "bipolar[0][1]: channel `EOG1` is of type EOG; only voltage data channels (EEG, SEEG, ECOG, DBS, LFP) can form a reference or a pair"),
            (serde_json::json!({ "method": "channels", "channels": ["M1"], "exclude": ["M1"] }), "channels[0]: channel `M1` is both a reference channel and excluded"),
            (serde_json::json!({ "method": "bipolar", "bipolar": [["Fz", "Cz"]], "exclude": ["Cz"] }), "bipolar[0][1]: channel `Cz` is excluded"),
        ];
        for (p, want) in cases {
            assert_eq!(run(p, &x).unwrap_err().to_string(), want);
        }
        let err = run(serde_json::json!({ "method": "median" }), &x).unwrap_err();
        assert!(
            err.to_string()
                .starts_with("method: unknown variant `median`"),
            "{err}"
        );
    }

    #[test]
    fn no_data_channels_is_a_data_error() {
        let mut x = recording();
        x.layout.meta.channel_types = Some(vec!["EOG".into(); 5]);
        let err = run(serde_json::json!({ "method": "average" }), &x).unwrap_err();
        assert!(matches!(err, StageError::Data(_)), "{err}");
        assert!(
            err.to_string()
                .contains("channel types are [EOG, EOG, EOG, EOG, EOG]"),
            "{err}"
        );
    }
}
