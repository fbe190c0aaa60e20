//! What the preprocessing ops need to know about a continuous recording: its shape checks, which
//! channels carry voltage data, and a deterministic parallel map over its channels.
//!
//! Channel types: a channel is a *voltage data channel* when its type is, case-insensitively,
//! `EEG`, `SEEG`, `ECOG`, `DBS` (the BIDS iEEG types) or `LFP`. Only these join a reference,
//! a bipolar pair or the peak-to-peak rejection. Everything else (EOG, ECG, EMG, MISC, TRIG, …)
//! passes through unchanged — and so do MEG channels (`MEG…` types): they measure tesla, so a
//! voltage reference or a threshold in volts means nothing for them. A recording without
//! channel types is taken to be all EEG.

use ndarray::{Array2, ArrayD, ArrayView2, Axis, Ix2};
use rayon::prelude::*;

use crate::array::Layout;
use crate::dsp::sos::{Scratch, ROWS};
use crate::error::StageError;

/// Channel types that count as voltage data channels (compared case-insensitively).
const VOLTAGE_DATA_TYPES: [&str; 5] = ["EEG", "SEEG", "ECOG", "DBS", "LFP"];

/// True when a channel of this type joins references, bipolar pairs and rejection.
pub fn is_voltage_data_type(channel_type: &str) -> bool {
    VOLTAGE_DATA_TYPES
        .iter()
        .any(|t| t.eq_ignore_ascii_case(channel_type.trim()))
}

/// The checked facts of a continuous `[channel, time]` input.
#[derive(Clone, Debug)]
pub struct Continuous<'a> {
    /// Channel names.
    pub channels: &'a [String],
    /// Number of samples per channel.
    pub n_times: usize,
    /// Sampling rate in Hz.
    pub fs: f64,
    /// Per channel: true for voltage data channels (see the module documentation).
    pub is_data: Vec<bool>,
}

impl<'a> Continuous<'a> {
    /// Check that `layout` is continuous data (dims exactly `[channel, time]`, a positive
    /// sampling rate, channel types parallel to the channels when present).
    pub fn of(layout: &'a Layout) -> Result<Self, StageError> {
        if layout.dims != ["channel", "time"] {
            return Err(StageError::data(format!(
                "expected continuous data with axes [channel, time], found [{}]",
                layout.dims.join(", ")
            )));
        }
        if layout.complex {
            return Err(StageError::data(
                "expected real-valued continuous data, found complex values",
            ));
        }
        let fs = layout.sampling_rate()?;
        if !(fs.is_finite() && fs > 0.0) {
            return Err(StageError::data(format!(
                "the sampling rate must be a positive number of Hz, found {fs}"
            )));
        }
        let channels = layout.labels("channel")?;
        let n_times = layout.coord("time")?.len();
        let is_data = data_mask(layout, channels.len())?;
        Ok(Continuous {
            channels,
            n_times,
            fs,
            is_data,
        })
    }

    /// Half the sampling rate.
    pub fn nyquist(&self) -> f64 {
        self.fs / 2.0
    }

    /// Position of channel `name`, or a parameter error at `field` listing the channels.
    pub fn channel_index(&self, name: &str, field: &str) -> Result<usize, StageError> {
        self.channels.iter().position(|c| c == name).ok_or_else(|| {
            StageError::param(
                field,
                format!(
                    "no channel named `{name}`; the recording's channels are [{}]",
                    self.channels.join(", ")
                ),
            )
        })
    }
}

/// Per channel: is it a voltage data channel? All true when the layout carries no types.
fn data_mask(layout: &Layout, n_channels: usize) -> Result<Vec<bool>, StageError> {
    match &layout.meta.channel_types {
        None => Ok(vec![true; n_channels]),
        Some(types) if types.len() == n_channels => {
            Ok(types.iter().map(|t| is_voltage_data_type(t)).collect())
        }
        Some(types) => Err(StageError::data(format!(
            "the recording lists {} channel types for {n_channels} channels",
            types.len()
        ))),
    }
}

/// View real values as a `[channel, time]` matrix.
pub fn as_matrix(values: &ArrayD<f32>) -> Result<ArrayView2<'_, f32>, StageError> {
    values.view().into_dimensionality::<Ix2>().map_err(|_| {
        StageError::data(format!(
            "expected a 2-D array, found shape {:?}",
            values.shape()
        ))
    })
}

/// [`refuse_non_finite`] over every channel of `input`, with the usual advice
/// ([`REPLACE_NON_FINITE`]): for ops that filter each channel along time.
pub fn refuse_non_finite_anywhere(
    input: &crate::array::LabelledArray,
    spread: &str,
) -> Result<(), StageError> {
    let values = input.real_values()?;
    refuse_non_finite(
        values,
        &input.layout,
        0..values.shape()[0],
        spread,
        REPLACE_NON_FINITE,
    )
}

/// Refuses a NaN or infinite sample in the channels `rows` of `values` (axes `[channel, time]`
/// or `[channel, trial, time]`, as `layout` says) before an op that spreads a sample over other
/// samples or channels: after it, the value would be everywhere it spread (a zero-phase filter
/// fills the whole channel, an average reference every channel at that time) and the epoch op
/// would report it at the wrong channel and time. The error names the channel and the time of
/// the earliest one (the first channel of those at that time; `rows` in channel order), then `spread` (what the op would
/// do with it) and `instead` (what the user can do).
pub fn refuse_non_finite(
    values: &ArrayD<f32>,
    layout: &Layout,
    rows: impl IntoIterator<Item = usize>,
    spread: &str,
    instead: &str,
) -> Result<(), StageError> {
    // A pass without early exit first (it vectorises; the search below does not), so clean
    // data costs one quick read.
    let finite = |c: &[f32]| c.iter().fold(true, |ok, v| ok & v.is_finite());
    if values
        .as_slice()
        .is_some_and(|v| v.chunks(1 << 14).all(finite))
    {
        return Ok(());
    }
    let mut first: Option<(usize, usize, f32)> = None;
    for c in rows {
        let lane = values.index_axis(Axis(0), c);
        if let Some((k, &v)) = lane.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            if first.is_none_or(|(at, _, _)| k < at) {
                first = Some((k, c, v));
            }
        }
    }
    let Some((at, c, v)) = first else {
        return Ok(());
    };
    let times = layout.numbers("time")?;
    let n_times = times.len().max(1);
    let channel = layout
        .labels("channel")
        .ok()
        .and_then(|l| l.get(c).cloned())
        .unwrap_or_else(|| format!("#{c}"));
    let trial = match layout.axis("trial") {
        Ok(_) => format!(" of trial {}", at / n_times),
        Err(_) => String::new(),
    };
    Err(StageError::data(format!(
        "channel `{channel}` has a non-finite sample ({v}) at {:.4} s{trial}; {spread}, and a \
         later stage would report it there: {instead}",
        times.get(at % n_times).copied().unwrap_or(f64::NAN)
    )))
}

/// What to do about a non-finite sample before an op that spreads it (the end of the message
/// of [`refuse_non_finite`]).
pub const REPLACE_NON_FINITE: &str = "replace it first (mark the channel bad and run interpolate \
     before this stage, or clean the recording)";

/// Apply `f` to every channel (converted to `f64`) and store the results as `f32`. `f` gets up
/// to [`ROWS`] consecutive channels at a time (to filter side by side, see
/// [`crate::dsp::sos::ZeroPhase::apply_rows`]), the groups in parallel. Channels are
/// independent, so the result does not depend on the thread count; of several failing groups
/// the first in channel order is reported. `f` gets a scratch buffer that lives for one group,
/// so it need not allocate per sample.
pub fn map_channels<F>(values: &ArrayD<f32>, f: F) -> Result<ArrayD<f32>, StageError>
where
    F: Fn(&mut [&mut [f64]], &mut Scratch) -> Result<(), StageError> + Sync,
{
    let input = as_matrix(values)?;
    let mut out = Array2::<f32>::zeros(input.raw_dim());
    let results: Vec<Result<(), StageError>> = out
        .axis_chunks_iter_mut(Axis(0), ROWS)
        .into_par_iter()
        .zip(input.axis_chunks_iter(Axis(0), ROWS).into_par_iter())
        .map(|(mut rows_out, rows_in)| {
            let mut rows: Vec<Vec<f64>> = rows_in
                .outer_iter()
                .map(|row| row.iter().map(|&v| f64::from(v)).collect())
                .collect();
            let mut views: Vec<&mut [f64]> = rows.iter_mut().map(|r| r.as_mut_slice()).collect();
            f(&mut views, &mut Scratch::default())?;
            for (mut row_out, row) in rows_out.outer_iter_mut().zip(&rows) {
                row_out
                    .iter_mut()
                    .zip(row)
                    .for_each(|(o, v)| *o = *v as f32);
            }
            Ok(())
        })
        .collect();
    results.into_iter().collect::<Result<Vec<()>, _>>()?;
    Ok(out.into_dyn())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::{Coord, Meta};

    fn layout(types: Option<Vec<&str>>, fs: f64) -> Layout {
        Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(vec!["Fz".into(), "HEOG".into()]),
                Coord::Numbers(vec![0.0, 0.5, 1.0]),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(fs),
                channel_types: types.map(|t| t.into_iter().map(String::from).collect()),
                ..Meta::default()
            },
        }
    }

    #[test]
    fn continuous_input_is_checked() {
        let l = layout(Some(vec!["EEG", "EOG"]), 2.0);
        let rec = Continuous::of(&l).unwrap();
        assert_eq!((rec.n_times, rec.is_data.clone()), (3, vec![true, false]));
        let err = rec.channel_index("Cz", "channels[0]").unwrap_err();
        assert_eq!(
            err.to_string(),
            "channels[0]: no channel named `Cz`; the recording's channels are [Fz, HEOG]"
        );
        // Without types every channel counts as EEG.
        assert_eq!(
            Continuous::of(&layout(None, 2.0)).unwrap().is_data,
            [true, true]
        );
        let err = Continuous::of(&layout(Some(vec!["EEG"]), 2.0)).unwrap_err();
        assert_eq!(
            err.to_string(),
            "the recording lists 1 channel types for 2 channels"
        );
        let err = Continuous::of(&layout(None, 0.0)).unwrap_err();
        assert_eq!(
            err.to_string(),
            "the sampling rate must be a positive number of Hz, found 0"
        );
    }

    #[test]
    fn voltage_types_are_recognised_case_insensitively() {
        // BIDS EEG/iEEG channels.tsv type names (Pernet et al. 2019; Holdgraf et al. 2019).
        for t in ["EEG", "eeg", "SEEG", "ECoG", "DBS", "lfp"] {
            assert!(is_voltage_data_type(t), "{t}");
        }
        for t in [
            "EOG",
            "ECG",
            "EMG",
            "MISC",
            "TRIG",
            "MEGMAG",
            "MEGGRADPLANAR",
            "",
        ] {
            assert!(!is_voltage_data_type(t), "{t}");
        }
    }

    /// One NaN in a recording (Cz at 10 s) and, later, one in F3 (12 s): every op that spreads a
    /// sample over others refuses it, naming Cz at 10 s — where it is, not where the op would
    /// have spread it. A NaN the op does not spread passes: in a channel left out of the average
    /// reference (it stays at its own sample), in an EOG channel, which joins no reference and
    /// no spline, or in a channel that interpolate replaces (it does not read it).
    #[test]
    fn ops_that_spread_a_sample_refuse_a_non_finite_one_where_it_is() {
        use crate::ops::laplacian::tests::{cap_labels, field_data};
        use crate::ops::tf_testing::{run_err, run_op};
        use crate::ops::{filter, interpolate, laplacian, notch, reref, resample};
        use serde_json::json;
        let labels = cap_labels();
        let clean = field_data(
            &labels,
            2000,
            |p, s| (p[0] + 0.3 * (s as f64 * 0.37).sin()) * 1e-5,
            1e-5,
        );
        let names = clean.layout.labels("channel").unwrap().to_vec();
        let at = |name: &str| names.iter().position(|n| n == name).unwrap();
        let with_nan = |points: &[(&str, usize)]| {
            let mut x = clean.clone();
            if let crate::array::Values::Real(v) = &mut x.values {
                for &(c, k) in points {
                    v[[at(c), k]] = f32::NAN;
                }
            }
            x
        };
        let bad = with_nan(&[("F3", 1200), ("Cz", 1000)]);
        let named = "channel `Cz` has a non-finite sample (NaN) at 10.0000 s; ";
        let cases: Vec<(String, StageError)> = vec![
            (
                "re-reference".into(),
                run_err::<reref::ReReference>(json!({"method": "average"}), &bad),
            ),
            (
                "notch".into(),
                run_err::<notch::Notch>(json!({"freqs": [20]}), &bad),
            ),
            (
                "filter".into(),
                run_err::<filter::Filter>(json!({"low": 1, "high": 30}), &bad),
            ),
            (
                "resample".into(),
                run_err::<resample::Resample>(json!({"rate": 50}), &bad),
            ),
            (
                "laplacian".into(),
                run_err::<laplacian::Laplacian>(json!({}), &bad),
            ),
            (
                "interpolate".into(),
                run_err::<interpolate::Interpolate>(json!({"channels": ["C3"]}), &bad),
            ),
        ];
        for (op, err) in cases {
            let StageError::Data(message) = err else {
                panic!("{op}: not a data error: {err:?}")
            };
            assert!(message.starts_with(named), "{op}: {message}");
            assert!(message.contains("replace"), "{op}: {message}");
        }
        // Not spread, not refused.
        let one = with_nan(&[("Cz", 1000)]);
        let (out, _) =
            run_op::<reref::ReReference>(json!({"method": "average", "exclude": ["Cz"]}), &one)
                .unwrap();
        let v = out.real_values().unwrap();
        let nan: Vec<[usize; 2]> = v
            .indexed_iter()
            .filter(|(_, x)| x.is_nan())
            .map(|(i, _)| [i[0], i[1]])
            .collect();
        assert_eq!(nan, [[at("Cz"), 1000]]);
        let eog = with_nan(&[("VEOG", 1000)]);
        run_op::<reref::ReReference>(json!({"method": "average"}), &eog).unwrap();
        run_op::<laplacian::Laplacian>(json!({}), &eog).unwrap();
        let (out, _) =
            run_op::<interpolate::Interpolate>(json!({"channels": ["Cz"]}), &one).unwrap();
        assert!(out.real_values().unwrap().iter().all(|x| x.is_finite()));
    }

    /// Epoched data: the time is the trial's own, and the trial is named.
    #[test]
    fn a_non_finite_sample_of_epoched_data_names_its_trial() {
        use crate::ops::tf_testing::epoched;
        let mut v = ndarray::Array3::<f32>::zeros((2, 3, 50));
        v[[1, 2, 10]] = f32::INFINITY;
        let x = epoched(v.into_dyn(), 100.0, -20, &["A", "B", "A"]);
        let err = refuse_non_finite(
            x.real_values().unwrap(),
            &x.layout,
            0..2,
            "it spreads",
            "fix it",
        )
        .unwrap_err();
        assert_eq!(
            err.to_string(),
            "channel `C1` has a non-finite sample (inf) at -0.1000 s of trial 2; it spreads, and \
             a later stage would report it there: fix it"
        );
        assert!(refuse_non_finite(x.real_values().unwrap(), &x.layout, 0..1, "", "").is_ok());
    }
}
