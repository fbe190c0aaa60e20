//! Reading recordings and their BIDS sidecars into labelled arrays, and writing EDF+.
//!
//! The runner uses exactly these entry points: [`read_recording`], [`read_recording_layout`]
//! and [`sidecar_paths`]. Formats, told by the extension ([`Format::of`]): EDF, EDF+ (Kemp et
//! al. 1992; Kemp & Olivan 2003) and BDF (24-bit); the BrainVision Core Data Format (`.vhdr`
//! header with its `.vmrk` markers and binary data file, see [`brainvision`]); sidecars per
//! BIDS (Gorgolewski et al. 2016; Pernet et al. 2019).
//!
//! What a scientist can rely on:
//! - Output dims `[channel, time]`, time `k / fs` in seconds, values in volts (physical
//!   dimensions V, mV, uV/µV, nV are converted; any other unit is kept as it is, with a
//!   warning). `meta.sampling_rate`, `meta.channel_types`, `meta.events` are always set.
//! - Channel names are the labels with an EDF+ type prefix split off (`EEG Fz` → `Fz`, type
//!   `EEG`). Types: the channels sidecar (matched by full label or name), else that prefix, else
//!   `EEG`. Annotation signals are not channels.
//! - One sampling rate: the one most EEG-type channels share; any other channel is dropped with a
//!   warning naming it.
//! - Events: `events: sidecar` requires `<base>_events.tsv`; rows whose trial_type is `n/a` are
//!   skipped with a warning; a bad onset is an error naming its line. `events: annotations` uses
//!   the events stored with the recording: the EDF+ annotations, each text of a TAL an event,
//!   onsets relative to the first sample; or the BrainVision markers (see
//!   [`brainvision::parse_markers`] for how a marker becomes an event).
//! - BrainVision channels: the header's names, types as for EDF (sidecar, else a type-word
//!   label, else `EEG`), values = stored value × resolution × the unit's factor to volts.
//! - A file whose size disagrees with its header's record count is an error (not read in
//!   part), and so is any header field that is not a number where one is required.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::Notes;

pub mod brainvision;
mod channels;
pub mod edf;
mod recording;
mod tsv;

use recording::Opened;

/// Where the events of a recording come from (`data.events` in the pipeline file).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EventSource {
    /// A BIDS-style `*_events.tsv` beside the recording.
    Sidecar,
    /// EDF+ annotations inside the file.
    Annotations,
}

/// A recording format, told by the file's extension.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// EDF, EDF+, BDF, BDF+ (every extension but the BrainVision ones: the header says which).
    Edf,
    /// BrainVision Core Data Format, read through its `.vhdr` header.
    BrainVision,
}

impl Format {
    /// The format of `path`, from its extension (case-insensitive): `.vhdr` is BrainVision;
    /// a BrainVision data or marker file (`.eeg`, `.vmrk`) is an error pointing at its header;
    /// anything else is read as EDF/BDF, whose header tells the variant.
    pub fn of(path: &Path) -> Result<Format, StageError> {
        let ext = path
            .extension()
            .map(|e| e.to_string_lossy().to_ascii_lowercase())
            .unwrap_or_default();
        match ext.as_str() {
            "vhdr" => Ok(Format::BrainVision),
            "eeg" | "vmrk" => Err(StageError::input(format!(
                "{}: this is the data or marker file of a BrainVision recording; point data.recordings at its header (.vhdr), which names both",
                path.display()
            ))),
            _ => Ok(Format::Edf),
        }
    }

    /// The format's name for messages.
    pub fn name(self) -> &'static str {
        match self {
            Format::Edf => "EDF/BDF",
            Format::BrainVision => "BrainVision",
        }
    }
}

/// A recording whose header and sidecars have been read, in either format.
enum AnyOpened {
    Edf(Opened),
    BrainVision(brainvision::Opened),
}

impl AnyOpened {
    /// Open `path` in its format; `events: None` reads no events at all.
    fn open(path: &Path, events: Option<EventSource>) -> Result<AnyOpened, StageError> {
        Ok(match Format::of(path)? {
            Format::Edf => AnyOpened::Edf(Opened::open(path, events)?),
            Format::BrainVision => AnyOpened::BrainVision(brainvision::Opened::open(path, events)?),
        })
    }

    fn into_layout(self) -> Layout {
        match self {
            AnyOpened::Edf(o) => o.layout,
            AnyOpened::BrainVision(o) => o.layout,
        }
    }

    fn warnings(&self) -> &[String] {
        match self {
            AnyOpened::Edf(o) => &o.warnings,
            AnyOpened::BrainVision(o) => &o.warnings,
        }
    }

    fn read(self) -> Result<LabelledArray, StageError> {
        match self {
            AnyOpened::Edf(o) => o.read(),
            AnyOpened::BrainVision(o) => o.read(),
        }
    }
}

/// Read a recording (EDF, EDF+, BDF or BrainVision) with its events and channel types:
/// dims `[channel, time]`, values in volts, `meta.sampling_rate`, `meta.channel_types`,
/// `meta.events`. Warnings (a channel dropped for its rate, ...) go to `notes` without the
/// recording's name, which the caller adds as it shows paths (the runner: "reading <path>: …").
pub fn read_recording(
    path: &Path,
    events: EventSource,
    notes: &mut Notes,
) -> Result<LabelledArray, StageError> {
    let opened = AnyOpened::open(path, Some(events))?;
    for warning in opened.warnings() {
        notes.warn(warning.as_str());
    }
    opened.read()
}

/// The layout [`read_recording`] would return, reading only the headers and sidecars.
pub fn read_recording_layout(path: &Path, events: EventSource) -> Result<Layout, StageError> {
    Ok(AnyOpened::open(path, Some(events))?.into_layout())
}

/// The layout of a recording without its events (channels, rate, length): for looking at a
/// dataset before knowing where, or whether, its events are.
pub fn read_recording_layout_without_events(path: &Path) -> Result<Layout, StageError> {
    Ok(AnyOpened::open(path, None)?.into_layout())
}

/// Bumped whenever what the reader makes of the same files changes (version 2: electrode
/// positions and bad channels in the metadata); part of every source's key, so results cached
/// from an older reader go stale.
pub const READER_VERSION: u32 = 2;

/// The other files that belong to a recording and exist, in a fixed order: a BrainVision
/// header's data and marker files, then the BIDS sidecars (events, channels, electrodes,
/// coordinate system). Their bytes are part of the recording's content key.
pub fn sidecar_paths(path: &Path) -> Vec<PathBuf> {
    let mut files = match Format::of(path) {
        Ok(Format::BrainVision) => brainvision::companion_files(path),
        _ => Vec::new(),
    };
    files.extend(
        tsv::candidate_sidecars(path)
            .into_iter()
            .filter(|p| p.is_file()),
    );
    files
}

#[cfg(test)]
mod tests {
    //! Reference checks: files written by pyEDFlib 0.1.38 (tests/reference/gen_edf.py) read back
    //! by our reader must give pyEDFlib's `readSignal` physical values (scaling per Kemp et al.
    //! 1992), labels, rates and `readAnnotations` onsets/durations/texts (Kemp & Olivan 2003).
    use super::*;
    use crate::testutil::{fixture_path, max_rel_diff, read_f64, read_json};
    use ndarray::Axis;

    /// f32 storage rounds to nearest: relative error at most 2^-24 (IEEE 754 binary32); the
    /// rest (f64 scaling in a different operation order than edflib's) is ~1e-15.
    const F32_ROUNDING: f64 = 5.97e-8;

    fn volts_per(unit: &str) -> f64 {
        // SI prefixes: m = 1e-3, u (micro) = 1e-6.
        match unit {
            "uV" => 1e-6,
            "mV" => 1e-3,
            other => panic!("fixture unit {other}"),
        }
    }

    /// Read a fixture; plain EDF/BDF files get a copy with a minimal events sidecar.
    fn read_fixture(file: &str, events: EventSource) -> (LabelledArray, Notes) {
        let dir = tempfile::tempdir().unwrap();
        let mut path = fixture_path("edf", file);
        if events == EventSource::Sidecar {
            // BIDS names: sub-01_<x>_eeg.<ext> with sub-01_<x>_events.tsv beside it.
            let (base, ext) = file.split_once('.').unwrap();
            let copy = dir.path().join(format!("sub-01_{base}_eeg.{ext}"));
            std::fs::copy(&path, &copy).unwrap();
            let tsv = dir.path().join(format!("sub-01_{base}_events.tsv"));
            std::fs::write(tsv, "onset\tduration\ttrial_type\n1.5\tn/a\tcue-a\n").unwrap();
            path = copy;
        }
        let mut notes = Notes::default();
        let array = read_recording(&path, events, &mut notes).unwrap();
        assert_eq!(read_recording_layout(&path, events).unwrap(), array.layout);
        (array, notes)
    }

    fn strings(value: &serde_json::Value) -> Vec<String> {
        serde_json::from_value(value.clone()).unwrap()
    }

    fn check_values(file: &str, array: &LabelledArray) {
        let stem = file.replace('.', "_");
        let meta = read_json("edf", &stem);
        let reference = read_f64("edf", &format!("{stem}_values"));
        let kept: Vec<usize> = serde_json::from_value(meta["kept"].clone()).unwrap();
        let rates: Vec<f64> = serde_json::from_value(meta["rates"].clone()).unwrap();
        let (labels, units) = (strings(&meta["labels"]), strings(&meta["units"]));
        let layout = &array.layout;
        let names = layout.labels("channel").unwrap();
        assert_eq!(names.len(), kept.len(), "{file}: channels");
        assert_eq!(
            layout.meta.sampling_rate,
            Some(rates[kept[0]]),
            "{file}: rate"
        );
        let values = array.real_values().unwrap();
        assert_eq!(
            values.shape(),
            &[kept.len(), reference.shape()[1]],
            "{file}: shape"
        );
        for (row, &signal) in kept.iter().enumerate() {
            // EDF+ labels are "<type> <name>" or just the name (Kemp & Olivan 2003).
            let label = &labels[signal];
            let prefixed = label.ends_with(&format!(" {}", names[row]));
            assert!(
                label == &names[row] || prefixed,
                "{label} vs {}",
                names[row]
            );
            let factor = volts_per(&units[signal]);
            let expect: Vec<f64> = reference
                .index_axis(Axis(0), row)
                .iter()
                .map(|v| v * factor)
                .collect();
            let got: Vec<f64> = values
                .index_axis(Axis(0), row)
                .iter()
                .map(|&v| f64::from(v))
                .collect();
            let err = max_rel_diff(&got, &expect, 1e-15);
            assert!(
                err <= F32_ROUNDING,
                "{file} {label}: relative error {err:e}"
            );
        }
        let time = layout.numbers("time").unwrap();
        assert_eq!(time.len(), reference.shape()[1]);
        assert_eq!(time[5], 5.0 / rates[kept[0]]);
        let length = meta["file_duration"].as_f64().unwrap();
        assert_eq!(time.len() as f64 / rates[kept[0]], length);
    }

    fn check_annotations(file: &str, array: &LabelledArray) {
        let meta = read_json("edf", &file.replace('.', "_"));
        let events = array.layout.meta.events.as_ref().unwrap();
        let reference = meta["annotations"].as_array().unwrap();
        assert_eq!(events.len(), reference.len(), "{file}");
        for (got, want) in events.iter().zip(reference) {
            assert_eq!(got.label, want["text"].as_str().unwrap());
            assert!(
                (got.onset - want["onset"].as_f64().unwrap()).abs() < 1e-9,
                "{got:?}"
            );
            // pyEDFlib reports a TAL without duration as -1; we store 0 (no duration).
            let duration = want["duration"].as_f64().unwrap().max(0.0);
            assert!((got.duration - duration).abs() < 1e-9, "{got:?}");
        }
    }

    fn types(array: &LabelledArray) -> Vec<&str> {
        let kinds = array.layout.meta.channel_types.as_ref().unwrap();
        kinds.iter().map(String::as_str).collect()
    }

    #[test]
    fn plain_edf_matches_pyedflib() {
        let (array, notes) = read_fixture("plain.edf", EventSource::Sidecar);
        check_values("plain.edf", &array);
        assert_eq!(
            array.layout.labels("channel").unwrap(),
            ["Fz", "Cz", "left"]
        );
        assert_eq!(types(&array), ["EEG", "EEG", "EOG"]);
        let events = array.layout.meta.events.as_ref().unwrap();
        assert_eq!(events.len(), 1);
        assert!(notes.warnings.is_empty(), "{:?}", notes.warnings);
    }

    #[test]
    fn edf_plus_matches_pyedflib_and_drops_the_other_rate() {
        let (array, notes) = read_fixture("plus.edf", EventSource::Annotations);
        check_values("plus.edf", &array);
        check_annotations("plus.edf", &array);
        assert_eq!(types(&array), ["EEG", "EEG", "ECG"]);
        // The 32 Hz temperature channel is dropped, with a warning naming it.
        assert_eq!(notes.warnings.len(), 1, "{:?}", notes.warnings);
        assert!(notes.warnings[0].contains("rectal") && notes.warnings[0].contains("32 Hz"));
    }

    #[test]
    fn bdf_matches_pyedflib() {
        let (array, _) = read_fixture("bio.bdf", EventSource::Sidecar);
        check_values("bio.bdf", &array);
        let (array, _) = read_fixture("bioplus.bdf", EventSource::Annotations);
        check_values("bioplus.bdf", &array);
        check_annotations("bioplus.bdf", &array);
        assert_eq!(types(&array), ["EEG", "EOG"]);
    }

    #[test]
    fn annotations_need_edf_plus() {
        let err =
            read_recording_layout(&fixture_path("edf", "plain.edf"), EventSource::Annotations);
        let err = err.unwrap_err().to_string();
        assert!(
            err.contains("plain.edf") && err.contains("events: sidecar"),
            "{err}"
        );
    }
}
