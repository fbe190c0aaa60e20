//! The `interpolate` op: replaces bad EEG channels by spherical-spline interpolation from the
//! good EEG channels (Perrin, Pernier, Bertrand & Echallier 1989; erratum 1990): V at a bad
//! channel's position = c0 + Σ_j c_j g_m(cos θ_j), with [c; c0] fitted to the good channels
//! ([`crate::spatial::splines`]). On continuous or epoched data.
//!
//! Bad channels: `channels: [..]`, or else those marked `status: bad` in the recording's
//! channels sidecar (the reader hands them on as `meta.extra.bad_channels`). The output's
//! `meta.extra.interpolated` and the manifest record (`interpolated`) name the replaced channels.
//! Params `m` (4), `lambda` (1e-5), `terms` (50) as for `laplacian`; positions are projected on
//! the unit sphere (the radius does not enter an interpolation).

use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::array::{LabelledArray, Layout};
use crate::dsp::spline_map::{check_spline, default_lambda, default_m, default_terms, SplineMap};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};
use crate::spatial::channel_input;
use crate::spatial::splines::interpolation_matrix;

/// The `interpolate` op.
pub struct Interpolate;

/// Parameters of `interpolate`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct InterpolateParams {
    /// The channels to replace (default: those the channels sidecar marks bad).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub channels: Vec<String>,
    /// Spline order m.
    #[serde(default = "default_m")]
    pub m: u32,
    /// Regularisation λ.
    #[serde(default = "default_lambda")]
    pub lambda: f64,
    /// Number of Legendre terms.
    #[serde(default = "default_terms")]
    pub terms: usize,
}

/// The bad EEG channels replaced by the spline through the good ones.
fn plan(p: &InterpolateParams, input: &Layout) -> Result<SplineMap, StageError> {
    let spline = check_spline(p.m, p.lambda, p.terms)?;
    let (names, is_data) = channel_input(input, "interpolate")?;
    let (listed, field): (Vec<String>, &str) = if p.channels.is_empty() {
        let marked = input
            .meta
            .extra
            .get("bad_channels")
            .and_then(|v| serde_json::from_value::<Vec<String>>(v.clone()).ok())
            .unwrap_or_default();
        (marked, "channels")
    } else {
        (p.channels.clone(), "channels")
    };
    let mut bad = Vec::new();
    for (i, name) in listed.iter().enumerate() {
        let at = format!("{field}[{i}]");
        let row = names.iter().position(|c| c == name).ok_or_else(|| {
            StageError::param(
                at.clone(),
                format!(
                    "no channel named `{name}`; the channels are [{}]",
                    names.join(", ")
                ),
            )
        })?;
        if !is_data[row] {
            return Err(StageError::param(
                at,
                format!(
                    "channel `{name}` is not an EEG channel; only EEG channels are interpolated"
                ),
            ));
        }
        if !bad.contains(&row) {
            bad.push(row);
        }
    }
    let mut layout = input.clone();
    let replaced: Vec<&str> = bad.iter().map(|&r| names[r].as_str()).collect();
    layout
        .meta
        .extra
        .insert("interpolated".into(), json!(replaced));
    if bad.is_empty() {
        return Ok(SplineMap::pass_through(layout));
    }
    let good: Vec<usize> = (0..names.len())
        .filter(|i| is_data[*i] && !bad.contains(i))
        .collect();
    // Bad channels need positions too; the same checks name them.
    SplineMap::fit(
        input,
        &names,
        (good, bad),
        layout,
        "interpolate",
        |from, to| interpolation_matrix(&spline, from, to),
    )
}

impl Op for Interpolate {
    type Params = InterpolateParams;
    const NAME: &'static str = "interpolate";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        check_spline(p.m, p.lambda, p.terms).map(|_| ())
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(Some(plan(p, single(inputs)?.layout)?.layout))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        notes.record(
            "interpolated",
            plan.layout.meta.extra["interpolated"].clone(),
        );
        if plan.to().is_empty() {
            notes.warn("interpolate: no channel is marked bad (by `channels` or the channels sidecar); the data pass through unchanged");
            return LabelledArray::real(plan.layout, input.real_values()?.clone());
        }
        plan.apply(input.real_values()?)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ops::laplacian::tests::{cap_labels, field_data};
    use crate::ops::tf_testing::run_op;
    use serde_json::json;

    #[test]
    fn a_smooth_field_is_recovered_at_the_bad_channels() {
        // A degree-2 field (a spherical harmonic plus a constant) sampled at 61 sites: the
        // spline interpolant through the others recovers it at C3 and Pz (well inside the cap)
        // to within 1 % of the field's range — spherical splines reproduce smooth fields closely
        // at interior points (Perrin et al. 1989 report errors of a few percent for sparser
        // caps; measured here, see the printout). The good channels are untouched, bit for bit.
        let field = |p: [f64; 3], s: usize| 1e-5 * (0.5 + p[0] * p[1] + 0.3 * s as f64 * p[2]);
        let labels = cap_labels();
        let x = field_data(&labels, 2, field, 1e-4);
        let mut broken = x.clone();
        let n = labels.len();
        let (c3, pz) = (
            labels.iter().position(|l| l == "C3").unwrap(),
            labels.iter().position(|l| l == "Pz").unwrap(),
        );
        if let crate::array::Values::Real(v) = &mut broken.values {
            for s in 0..2 {
                v[[c3, s]] = 1.0;
                v[[pz, s]] = -1.0;
            }
        }
        let (out, notes) =
            run_op::<Interpolate>(json!({ "channels": ["C3", "Pz"] }), &broken).unwrap();
        let (got, want) = (out.real_values().unwrap(), x.real_values().unwrap());
        for &c in &[c3, pz] {
            for s in 0..2 {
                let err = (f64::from(got[[c, s]]) - f64::from(want[[c, s]])).abs() / 1e-5;
                eprintln!(
                    "{} sample {s}: error {err:.2e} of the field's scale",
                    labels[c]
                );
                assert!(err < 1e-2, "{}: {err}", labels[c]);
            }
        }
        for c in (0..=n).filter(|c| *c != c3 && *c != pz) {
            assert_eq!(got[[c, 0]], want[[c, 0]]);
        }
        assert_eq!(notes.records["interpolated"], json!(["C3", "Pz"]));
        assert_eq!(out.layout.meta.extra["interpolated"], json!(["C3", "Pz"]));
    }

    #[test]
    fn bad_channels_come_from_the_sidecar_and_bad_names_are_param_errors() {
        let labels = cap_labels();
        let mut x = field_data(&labels, 1, |p, _| p[2], 0.0);
        x.layout
            .meta
            .extra
            .insert("bad_channels".into(), json!(["Cz"]));
        let (out, _) = run_op::<Interpolate>(json!({}), &x).unwrap();
        assert_eq!(out.layout.meta.extra["interpolated"], json!(["Cz"]));
        let err = run_op::<Interpolate>(json!({ "channels": ["Cz", "X9"] }), &x).unwrap_err();
        assert!(
            err.to_string()
                .starts_with("channels[1]: no channel named `X9`"),
            "{err}"
        );
        let err = run_op::<Interpolate>(json!({ "channels": ["VEOG"] }), &x).unwrap_err();
        assert!(
            err.to_string()
                .starts_with("channels[0]: channel `VEOG` is not an EEG"),
            "{err}"
        );
    }
}
