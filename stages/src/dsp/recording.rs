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
}
