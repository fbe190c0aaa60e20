//! Readers for recordings and their sidecars (placeholder: being implemented).
//!
//! The runner uses exactly these entry points: [`read_recording`], [`read_recording_layout`]
//! and [`sidecar_paths`].

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::Notes;

pub mod edf;

/// Where the events of a recording come from (`data.events` in the pipeline file).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EventSource {
    /// A BIDS-style `*_events.tsv` beside the recording.
    Sidecar,
    /// EDF+ annotations inside the file.
    Annotations,
}

/// Read a recording (EDF, EDF+ or BDF) with its events and channel types:
/// dims `[channel, time]`, values in volts, `meta.sampling_rate`, `meta.channel_types`,
/// `meta.events`. Warnings (a channel dropped for its rate, ...) go to `notes`.
pub fn read_recording(
    _path: &Path,
    _events: EventSource,
    _notes: &mut Notes,
) -> Result<LabelledArray, StageError> {
    Err(StageError::input("not implemented yet"))
}

/// The layout [`read_recording`] would return, reading only the header and sidecars.
pub fn read_recording_layout(_path: &Path, _events: EventSource) -> Result<Layout, StageError> {
    Err(StageError::input("not implemented yet"))
}

/// The sidecar files that belong to a recording and exist (events, channels), in a fixed order;
/// their bytes are part of the recording's content key.
pub fn sidecar_paths(_path: &Path) -> Vec<PathBuf> {
    Vec::new()
}
