//! EDF / EDF+ / BDF reading and EDF+ writing (placeholder: being implemented).

use std::path::Path;

use crate::array::Event;
use crate::error::StageError;

/// One signal to write.
#[derive(Clone, Debug)]
pub struct SignalSpec {
    /// The EDF label (e.g. `EEG Fz`, `EOG left`).
    pub label: String,
    /// Physical dimension as written in the header (`uV`, `V`).
    pub unit: String,
    /// Samples in that physical unit; their count must be a whole number of records.
    pub samples: Vec<f64>,
}

/// What [`write_edf_plus`] writes.
#[derive(Clone, Debug)]
pub struct EdfWriteSpec {
    /// Local patient identification field (EDF+ subfields, `X` for unknown).
    pub patient: String,
    /// Local recording identification field.
    pub recording: String,
    /// Start date `dd.mm.yy`.
    pub start_date: String,
    /// Start time `hh.mm.ss`.
    pub start_time: String,
    /// Duration of one data record in seconds.
    pub record_seconds: f64,
    /// Sampling rate in Hz shared by all signals.
    pub sampling_rate: f64,
    /// The signals.
    pub signals: Vec<SignalSpec>,
    /// Annotations, written to an `EDF Annotations` signal.
    pub annotations: Vec<Event>,
}

/// Write an EDF+C file with 16-bit samples; the same spec always gives the same bytes.
pub fn write_edf_plus(_path: &Path, _spec: &EdfWriteSpec) -> Result<(), StageError> {
    Err(StageError::input("not implemented yet"))
}
