//! Electrode positions and spherical splines: the numbers behind the `laplacian` and
//! `interpolate` ops (DESIGN.md §4b).

pub mod splines;
pub mod standard;

use crate::array::Layout;
use crate::dsp::recording::is_voltage_data_type;
use crate::error::StageError;

/// The channel axis of a real input whose first axis is `channel` and whose other axes are
/// `trial` and/or `time` (continuous or epoched data): its names and per-channel EEG flags
/// (voltage data channels; see [`crate::dsp::recording`]).
pub fn channel_input(layout: &Layout, op: &str) -> Result<(Vec<String>, Vec<bool>), StageError> {
    let fits = layout.dims.first().map(String::as_str) == Some("channel")
        && layout.dims[1..].iter().all(|d| d == "trial" || d == "time")
        && !layout.complex;
    if !fits {
        return Err(StageError::data(format!(
            "{op} expects real continuous or epoched data with axes [channel, time] or \
             [channel, trial, time], found [{}]",
            layout.dims.join(", ")
        )));
    }
    let names = layout.labels("channel")?.to_vec();
    let is_data = match &layout.meta.channel_types {
        None => vec![true; names.len()],
        Some(t) if t.len() == names.len() => t.iter().map(|t| is_voltage_data_type(t)).collect(),
        Some(t) => {
            return Err(StageError::data(format!(
                "the input lists {} channel types for {} channels",
                t.len(),
                names.len()
            )))
        }
    };
    Ok((names, is_data))
}

/// The positions (projected on the unit sphere) of `rows` of `names`, checked for a spline:
/// every channel has one, at least 4, no two at the same place, not all on one plane. Errors
/// name the channel (and the op, as `what`).
pub fn spline_positions(
    layout: &Layout,
    names: &[String],
    rows: &[usize],
    what: &str,
) -> Result<Vec<[f64; 3]>, StageError> {
    let positions = layout.meta.positions.as_ref();
    let mut raw = Vec::with_capacity(rows.len());
    for &r in rows {
        let name = &names[r];
        let p = positions
            .and_then(|p| p.by_channel.get(name))
            .ok_or_else(|| {
                StageError::data(format!(
                "{what}: channel {name} has no electrode position (give an *_electrodes.tsv with \
                 *_coordsystem.json beside the recording, use standard 10-20/10-10 labels, or \
                 leave the channel out){}",
                match positions {
                    Some(p) => format!("; the positions came from {}", p.source),
                    None => String::new(),
                }
            ))
            })?;
        if !(p.iter().all(|v| v.is_finite()) && p.iter().any(|v| *v != 0.0)) {
            return Err(StageError::data(format!(
                "{what}: channel {name} has the position {p:?}, which is not a direction from the \
                 head's centre"
            )));
        }
        raw.push(*p);
    }
    if rows.len() < 4 {
        return Err(StageError::data(format!(
            "{what} needs at least 4 EEG channels with positions, found {} ({})",
            rows.len(),
            rows.iter()
                .map(|&r| names[r].as_str())
                .collect::<Vec<_>>()
                .join(", ")
        )));
    }
    let unit = splines::on_sphere(&raw);
    for i in 0..unit.len() {
        for j in 0..i {
            let d: f64 = (0..3).map(|k| (unit[i][k] - unit[j][k]).powi(2)).sum();
            if d.sqrt() < 1e-6 {
                return Err(StageError::data(format!(
                    "{what}: channels {} and {} have the same position on the sphere",
                    names[rows[j]], names[rows[i]]
                )));
            }
        }
    }
    if coplanar(&unit) {
        return Err(StageError::data(format!(
            "{what}: the positions of the EEG channels ({}) all lie on one plane; a spherical \
             spline needs them spread over the head",
            rows.iter()
                .map(|&r| names[r].as_str())
                .collect::<Vec<_>>()
                .join(", ")
        )));
    }
    Ok(unit)
}

/// True when the points lie on one plane: the 3×3 scatter matrix about their mean is singular
/// (its determinant below 1e-9 of the cube of its mean eigenvalue).
fn coplanar(points: &[[f64; 3]]) -> bool {
    let n = points.len() as f64;
    let mean: [f64; 3] = std::array::from_fn(|k| points.iter().map(|p| p[k]).sum::<f64>() / n);
    let mut s = [[0.0; 3]; 3];
    for p in points {
        for a in 0..3 {
            for b in 0..3 {
                s[a][b] += (p[a] - mean[a]) * (p[b] - mean[b]) / n;
            }
        }
    }
    let det = s[0][0] * (s[1][1] * s[2][2] - s[1][2] * s[2][1])
        - s[0][1] * (s[1][0] * s[2][2] - s[1][2] * s[2][0])
        + s[0][2] * (s[1][0] * s[2][1] - s[1][1] * s[2][0]);
    let trace = (s[0][0] + s[1][1] + s[2][2]) / 3.0;
    det.abs() <= 1e-9 * trace.powi(3)
}

/// Applies `matrix` (rows × cols, row-major; cols = `from.len()`) to the channels `from` of a
/// `[channel, …]` array and writes the result into the channels `to`, for every sample; every
/// other channel is copied. In f64, stored as f32; parallel over samples, each on its own.
pub fn apply_to_channels(
    values: &ndarray::ArrayD<f32>,
    matrix: &[f64],
    from: &[usize],
    to: &[usize],
) -> ndarray::ArrayD<f32> {
    use ndarray::{Array2, Axis};
    use rayon::prelude::*;
    let shape = values.shape().to_vec();
    let n_ch = shape[0];
    let rest: usize = shape[1..].iter().product();
    let x = values
        .as_standard_layout()
        .into_owned()
        .into_shape_with_order((n_ch, rest))
        .expect("a [channel, …] array reshapes to [channel, samples]");
    let mut out: Array2<f32> = x.clone();
    // Columns (samples) are independent: work on the transposed copy, one sample per row.
    let xt = x.t().as_standard_layout().into_owned();
    let mut yt = out.t().as_standard_layout().into_owned();
    yt.axis_iter_mut(Axis(0))
        .into_par_iter()
        .zip(xt.axis_iter(Axis(0)).into_par_iter())
        .for_each(|(mut y, x)| {
            for (r, &t) in to.iter().enumerate() {
                let row = &matrix[r * from.len()..(r + 1) * from.len()];
                let acc: f64 = row
                    .iter()
                    .zip(from)
                    .map(|(w, &j)| w * f64::from(x[j]))
                    .sum();
                y[t] = acc as f32;
            }
        });
    out.assign(&yt.t());
    out.into_shape_with_order(ndarray::IxDyn(&shape))
        .expect("the input's shape")
}
