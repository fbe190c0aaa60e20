//! The `laplacian` op: the surface Laplacian of the EEG channels by spherical splines (Perrin,
//! Pernier, Bertrand & Echallier 1989, Electroencephalogr Clin Neurophysiol 72:184–187; erratum
//! 1990, 76:565), on continuous or epoched data (DESIGN.md §4b; the formulas are in
//! [`crate::spatial::splines`]).
//!
//! Electrode positions come from the data's metadata ([`crate::array::Positions`]) and are
//! projected on a sphere of `radius` metres; the output at each EEG channel is
//! L_i = Σ_j c_j h_m(cos θ_ij) / radius², the spline's estimate of the surface Laplacian ∇²V in
//! V/m². (A current source density is −σ∇²V, with σ the scalp conductivity.) Non-EEG channels
//! pass through unchanged. A reference-free quantity: re-referencing before it changes nothing
//! but rounding.
//!
//! Params (common practice, the values most studies use): `m` 4, `lambda` 1e-5, `terms` 50,
//! `radius` 0.095 m.

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::dsp::spline_map::{check_spline, default_lambda, default_m, default_terms, SplineMap};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};
use crate::spatial::channel_input;
use crate::spatial::splines::laplacian_matrix;

/// The `laplacian` op.
pub struct Laplacian;

/// Parameters shared by the spline ops.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct LaplacianParams {
    /// Spline order m.
    #[serde(default = "default_m")]
    pub m: u32,
    /// Regularisation λ.
    #[serde(default = "default_lambda")]
    pub lambda: f64,
    /// Number of Legendre terms.
    #[serde(default = "default_terms")]
    pub terms: usize,
    /// Head radius in metres.
    #[serde(default = "default_radius")]
    pub radius: f64,
}

fn default_radius() -> f64 {
    0.095
}

/// Every EEG channel replaced by the spline's Laplacian at its position.
fn plan(p: &LaplacianParams, input: &Layout) -> Result<SplineMap, StageError> {
    let spline = Laplacian::check(p).and_then(|_| check_spline(p.m, p.lambda, p.terms))?;
    let (names, is_data) = channel_input(input, "laplacian")?;
    let rows: Vec<usize> = (0..names.len()).filter(|&i| is_data[i]).collect();
    let mut layout = input.clone();
    layout.units = match input.units.as_str() {
        "V" => "V/m²".into(),
        other => format!("{other}/m²"),
    };
    let rows = (rows.clone(), rows);
    SplineMap::fit(input, &names, rows, layout, "laplacian", |at, _| {
        laplacian_matrix(&spline, at, p.radius)
    })
}

impl Op for Laplacian {
    type Params = LaplacianParams;
    const NAME: &'static str = "laplacian";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        check_spline(p.m, p.lambda, p.terms)?;
        if !(p.radius.is_finite() && p.radius > 0.0) {
            return Err(StageError::param(
                "radius",
                format!("expected a positive number of metres, found {}", p.radius),
            ));
        }
        Ok(())
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
        plan(p, &input.layout)?.apply(input.real_values()?)
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::array::{Coord, Meta, Positions};
    use crate::ops::tf_testing::run_op;
    use crate::spatial::standard;
    use ndarray::Array2;
    use serde_json::json;

    /// The standard 10-10 labels of a dense cap (61 sites on the upper head), plus an EOG.
    pub fn cap_labels() -> Vec<String> {
        let mut v = Vec::new();
        for row in ["AF", "F", "FC", "C", "CP", "P", "PO"] {
            for k in 1..=8 {
                v.push(format!("{row}{k}"));
            }
            v.push(format!("{row}z"));
        }
        for l in ["Fp1", "Fp2", "Fpz", "O1", "O2", "Oz"] {
            v.push(l.into());
        }
        v.into_iter()
            .map(|l| match l.as_str() {
                "C7" => "T7".to_string(),
                "C8" => "T8".to_string(),
                "FC7" => "FT7".to_string(),
                "FC8" => "FT8".to_string(),
                "CP7" => "TP7".to_string(),
                "CP8" => "TP8".to_string(),
                _ => l,
            })
            .collect()
    }

    /// Continuous data whose EEG channels hold `field(unit position)` per sample, with derived
    /// positions, plus one EOG channel holding `eog`.
    pub fn field_data(
        labels: &[String],
        samples: usize,
        field: impl Fn([f64; 3], usize) -> f64,
        eog: f64,
    ) -> LabelledArray {
        let mut names = labels.to_vec();
        names.push("VEOG".into());
        let by_channel = labels
            .iter()
            .map(|l| (l.clone(), standard::position(l).unwrap()))
            .collect();
        let mut types = vec!["EEG".to_string(); labels.len()];
        types.push("EOG".into());
        let values = Array2::from_shape_fn((names.len(), samples), |(c, s)| {
            if c == labels.len() {
                eog as f32
            } else {
                field(standard::position(&labels[c]).unwrap(), s) as f32
            }
        });
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(names),
                Coord::Numbers((0..samples).map(|k| k as f64 / 100.0).collect()),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(100.0),
                channel_types: Some(types),
                positions: Some(Box::new(Positions {
                    source: "test".into(),
                    units: "1".into(),
                    by_channel,
                })),
                ..Meta::default()
            },
        };
        LabelledArray::real(layout, values.into_dyn()).unwrap()
    }

    #[test]
    fn a_constant_potential_has_no_laplacian_and_eog_passes_through() {
        // The spline's constant term c0 absorbs a constant potential (Perrin et al. 1989), so
        // c = 0 up to λ and rounding and L = 0: checked to 1e-6 of V/r² (f32 storage of V is
        // exact here; the solve's rounding is ~1e-12 of it).
        let x = field_data(&cap_labels(), 3, |_, _| 20e-6, 5e-5);
        let (out, _) = run_op::<Laplacian>(json!({}), &x).unwrap();
        let v = out.real_values().unwrap();
        let scale = 20e-6 / 0.095f64.powi(2);
        let n = cap_labels().len();
        for c in 0..n {
            assert!(
                f64::from(v[[c, 1]]).abs() < 1e-6 * scale,
                "{c}: {}",
                v[[c, 1]]
            );
        }
        assert_eq!(v[[n, 0]], 5e-5_f32);
        assert_eq!(out.layout.units, "V/m²");
    }

    #[test]
    fn a_spherical_harmonic_gives_minus_n_n_plus_1_over_r_squared_times_it() {
        // On a sphere of radius r, the surface Laplacian of a degree-n spherical harmonic Y is
        // −n(n+1)/r² · Y (the harmonics are the Laplace–Beltrami eigenfunctions). The spline is
        // a smoothed fit from 61 electrodes on the upper head, so it is checked at the central
        // electrodes (polar angle ≤ 60°, away from the cap's edge where the fit extrapolates)
        // to 8 % of the largest exact value for n = 1 and 2 (measured 0.7 % for n = 1, 3.2 % and
        // 5.7 % for the two degree-2 fields). The error grows with n (a degree-n field varies on
        // the electrode spacing's scale sooner), with λ (which trades fit for smoothness), and
        // towards the cap's edge, where no electrode constrains the spline below; m = 4 keeps
        // the interpolant smooth enough that its second derivative is usable at all.
        let labels = cap_labels();
        let r = 0.095;
        type Harmonic = (u32, fn([f64; 3]) -> f64);
        let harmonics: [Harmonic; 3] = [
            (1, |p| p[2]),
            (2, |p| p[0] * p[1]),
            (2, |p| 3.0 * p[2] * p[2] - 1.0),
        ];
        for (n, y) in harmonics {
            let x = field_data(&labels, 1, |p, _| 1e-5 * y(p), 0.0);
            let (out, _) = run_op::<Laplacian>(json!({}), &x).unwrap();
            let v = out.real_values().unwrap();
            let factor = -f64::from(n * (n + 1)) / (r * r);
            let (mut worst, mut peak) = (0.0_f64, 0.0_f64);
            for (c, l) in labels.iter().enumerate() {
                let p = standard::position(l).unwrap();
                let exact = factor * 1e-5 * y(p);
                peak = peak.max(exact.abs());
                if p[2] >= 0.5 {
                    worst = worst.max((f64::from(v[[c, 0]]) - exact).abs());
                }
            }
            eprintln!(
                "degree {n}: largest error {:.3} of the largest exact value",
                worst / peak
            );
            assert!(worst / peak < 0.08, "degree {n}: {}", worst / peak);
        }
    }

    #[test]
    fn bad_positions_are_errors_naming_the_channel() {
        let labels: Vec<String> = ["Fz", "Cz", "Pz", "C3", "C4"].map(String::from).to_vec();
        let mut x = field_data(&labels, 2, |_, _| 0.0, 0.0);
        let pos = x.layout.meta.positions.as_mut().unwrap();
        pos.by_channel.remove("Pz");
        let err = run_op::<Laplacian>(json!({}), &x).unwrap_err().to_string();
        assert!(
            err.starts_with("laplacian: channel Pz has no electrode position"),
            "{err}"
        );
        let pos = x.layout.meta.positions.as_mut().unwrap();
        pos.by_channel.insert("Pz".into(), [0.0, 0.0, 2.0]); // same direction as Cz
        let err = run_op::<Laplacian>(json!({}), &x).unwrap_err().to_string();
        assert!(
            err.contains("channels Cz and Pz have the same position"),
            "{err}"
        );
        // Fz, Cz, Pz, Oz lie on the midline plane x = 0.
        let mid: Vec<String> = ["Fz", "Cz", "Pz", "Oz"].map(String::from).to_vec();
        let err = run_op::<Laplacian>(json!({}), &field_data(&mid, 2, |_, _| 0.0, 0.0));
        assert!(err
            .unwrap_err()
            .to_string()
            .contains("all lie on one plane"));
        let few: Vec<String> = ["Fz", "Cz", "C3"].map(String::from).to_vec();
        let err = run_op::<Laplacian>(json!({}), &field_data(&few, 2, |_, _| 0.0, 0.0));
        assert!(err
            .unwrap_err()
            .to_string()
            .contains("at least 4 EEG channels with positions, found 3"));
        for (p, field) in [
            (json!({ "m": 1 }), "m"),
            (json!({ "lambda": -1 }), "lambda"),
            (json!({ "terms": 0 }), "terms"),
            (json!({ "radius": 0 }), "radius"),
        ] {
            match run_op::<Laplacian>(p.clone(), &x).unwrap_err() {
                StageError::Param { field: f, .. } => assert_eq!(f, field, "{p}"),
                other => panic!("{p}: {other}"),
            }
        }
    }
}
