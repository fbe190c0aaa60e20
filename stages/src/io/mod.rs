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
#[cfg(feature = "nwb")]
pub mod nwb;
mod recording;
mod tsv;

use recording::Opened;

/// A reader's error about the file `path`: its path, once, then what is wrong. Every reader
/// attaches the path here, at the boundary between its typed errors and [`StageError`].
pub(crate) fn fail(path: &Path, message: impl std::fmt::Display) -> StageError {
    StageError::input(format!("{}: {message}", path.display()))
}

/// Where the events of a recording come from (`data.events` in the pipeline file).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EventSource {
    /// A BIDS-style `*_events.tsv` beside the recording.
    Sidecar,
    /// EDF+ annotations inside the file.
    Annotations,
}

/// What to read of each recording besides its events: `data.channels` and `data.rate` in the
/// pipeline. The default reads every channel at the recording's own rate.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Choice {
    /// Read only these channels (names, or full labels as in the file), in file order.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub channels: Option<Vec<String>>,
    /// Resample every channel read to this rate (Hz) as it is read, by the polyphase
    /// resampler of `op: resample` ([`crate::dsp::resample`]); each channel from its own rate,
    /// so that a file whose channels run at several rates can be read whole.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rate: Option<f64>,
    /// NWB: the `ElectricalSeries` to read (its path in the file, or its name), needed when
    /// the file holds several.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub series: Option<String>,
    /// The format, for files whose extension does not say it (e.g. NWB saved as `.h5`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub format: Option<Format>,
}

impl Choice {
    /// True when it reads everything as the file has it (nothing to record in a key).
    pub fn is_default(&self) -> bool {
        *self == Choice::default()
    }

    /// The checks that need no file: a positive, finite rate; a non-empty list of channels.
    /// Errors name the field (`data.rate`, `data.channels`).
    pub fn check(&self) -> Result<(), StageError> {
        if let Some(rate) = self.rate {
            if !(rate.is_finite() && rate > 0.0) {
                return Err(StageError::param(
                    "data.rate",
                    format!("expected a positive number of Hz, found {rate}"),
                ));
            }
        }
        if self.channels.as_ref().is_some_and(Vec::is_empty) {
            return Err(StageError::param(
                "data.channels",
                "expected at least one channel name",
            ));
        }
        Ok(())
    }
}

/// A recording format, told by the file's extension (or `data.format`: `edf`, `brainvision`,
/// `nwb`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Format {
    /// EDF, EDF+, BDF, BDF+ (every extension but the BrainVision ones: the header says which).
    Edf,
    /// BrainVision Core Data Format, read through its `.vhdr` header.
    BrainVision,
    /// Neurodata Without Borders (`.nwb`, HDF5): an `ElectricalSeries` ([`nwb`], cargo
    /// feature `nwb`).
    Nwb,
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
            "nwb" => Ok(Format::Nwb),
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
            Format::Nwb => "NWB",
        }
    }

    /// The format of `path` as `data.format` gives it, where the extension does not say it:
    /// `.edf`, `.bdf`, `.vhdr` and `.nwb` say it themselves, and a `data.format` that
    /// disagrees with them is an error naming the field.
    pub fn chosen(path: &Path, choice: &Choice) -> Result<Format, StageError> {
        let told = Format::of(path)?;
        let ext = path
            .extension()
            .map(|e| e.to_string_lossy().to_ascii_lowercase())
            .unwrap_or_default();
        let says = matches!(ext.as_str(), "edf" | "bdf" | "vhdr" | "nwb");
        match choice.format {
            Some(f) if says && f != told => Err(StageError::input(format!(
                "{}: data.format: the pipeline says {}, but the extension .{ext} says {}",
                path.display(),
                f.name(),
                told.name()
            ))),
            Some(f) => Ok(f),
            None => Ok(told),
        }
    }
}

/// A recording whose header and sidecars have been read, in any format.
enum AnyOpened {
    Edf(Opened),
    BrainVision(brainvision::Opened),
    #[cfg(feature = "nwb")]
    Nwb(nwb::Opened),
}

impl AnyOpened {
    /// Open `path` in its format; `events: None` reads no events at all.
    fn open(
        path: &Path,
        events: Option<EventSource>,
        choice: &Choice,
    ) -> Result<AnyOpened, StageError> {
        choice.check()?;
        Ok(match Format::chosen(path, choice)? {
            Format::Edf => AnyOpened::Edf(Opened::open(path, events, choice)?),
            Format::BrainVision => {
                AnyOpened::BrainVision(brainvision::Opened::open(path, events, choice)?)
            }
            #[cfg(feature = "nwb")]
            Format::Nwb => AnyOpened::Nwb(nwb::Opened::open(path, events, choice)?),
            #[cfg(not(feature = "nwb"))]
            Format::Nwb => {
                return Err(nwb_series(path).err().unwrap_or_else(|| {
                    StageError::input(format!("{}: no NWB support", path.display()))
                }))
            }
        })
    }

    fn into_layout(self) -> Layout {
        match self {
            AnyOpened::Edf(o) => o.layout,
            AnyOpened::BrainVision(o) => o.layout,
            #[cfg(feature = "nwb")]
            AnyOpened::Nwb(o) => o.layout,
        }
    }

    fn warnings(&self) -> &[String] {
        match self {
            AnyOpened::Edf(o) => &o.warnings,
            AnyOpened::BrainVision(o) => &o.warnings,
            #[cfg(feature = "nwb")]
            AnyOpened::Nwb(o) => &o.warnings,
        }
    }

    fn read(self) -> Result<LabelledArray, StageError> {
        match self {
            AnyOpened::Edf(o) => o.read(),
            AnyOpened::BrainVision(o) => o.read(),
            #[cfg(feature = "nwb")]
            AnyOpened::Nwb(o) => o.read(),
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
    read_chosen(path, events, &Choice::default(), notes)
}

/// [`read_recording`] of the channels `choice` names, resampled to its rate when it gives one.
/// A problem with the choice (a channel the file lacks, a rate no rational factor within
/// [`MAX_FACTOR`](crate::dsp::resample::MAX_FACTOR) reaches) is an error naming the file and
/// the field.
pub fn read_chosen(
    path: &Path,
    events: EventSource,
    choice: &Choice,
    notes: &mut Notes,
) -> Result<LabelledArray, StageError> {
    let opened = AnyOpened::open(path, Some(events), choice)?;
    for warning in opened.warnings() {
        notes.warn(warning.as_str());
    }
    opened.read()
}

/// The layout [`read_recording`] would return, reading only the headers and sidecars.
pub fn read_recording_layout(path: &Path, events: EventSource) -> Result<Layout, StageError> {
    read_chosen_layout(path, events, &Choice::default())
}

/// The layout [`read_chosen`] would return, reading only the headers and sidecars.
pub fn read_chosen_layout(
    path: &Path,
    events: EventSource,
    choice: &Choice,
) -> Result<Layout, StageError> {
    Ok(AnyOpened::open(path, Some(events), choice)?.into_layout())
}

/// The layout of a recording without its events (channels, rate, length): for looking at a
/// dataset before knowing where, or whether, its events are.
pub fn read_recording_layout_without_events(
    path: &Path,
    choice: &Choice,
) -> Result<Layout, StageError> {
    Ok(AnyOpened::open(path, None, choice)?.into_layout())
}

/// The paths of the NWB `ElectricalSeries` in `path` (for `phasewise new`); an error naming
/// the file when it cannot be read, or when phasewise was built without the `nwb` feature.
pub fn nwb_series(path: &Path) -> Result<Vec<String>, StageError> {
    #[cfg(feature = "nwb")]
    return nwb::electrical_series(path);
    #[cfg(not(feature = "nwb"))]
    Err(StageError::input(format!(
        "{}: this is an NWB file, and this phasewise was built without NWB support; build it \
         with `cargo build --release --features nwb` (needs the system's HDF5 library, e.g. \
         Debian's libhdf5-dev)",
        path.display()
    )))
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

    // `data.rate` against scipy: tests/reference/gen_multirate.py writes a BDF whose channels run
    // at 1000, 1000, 800, 500, 975 and 999 Hz with pyEDFlib 0.1.38, and resamples each channel
    // that pyEDFlib reads back to 500 Hz with scipy.signal.resample_poly (scipy 1.13.1, its
    // defaults). Our reader stores the values as f32 before resampling in f64 and stores f32
    // again: 1e-6 of the channel's peak, checked away from the edges (the first and last 0.1 s;
    // the same zero padding makes the edges agree too, which is checked to 1e-5).
    #[test]
    fn channels_at_several_rates_resampled_as_read_equal_scipy() {
        let path = fixture_path("multirate", "rates.bdf");
        let meta = read_json("multirate", "rates");
        let labels = strings(&meta["labels"]);
        // Without `data.rate`, the two 1000 Hz channels are the majority and the rest are
        // dropped, each with a warning that points at `data.rate`.
        let mut notes = Notes::default();
        let plain = read_recording(&path, EventSource::Annotations, &mut notes).unwrap();
        assert_eq!(plain.layout.labels("channel").unwrap(), ["A1", "A2"]);
        assert_eq!(notes.warnings.len(), 4, "{:?}", notes.warnings);
        assert!(notes.warnings.iter().all(|w| w.contains("`data.rate`")));
        let choice = Choice {
            rate: Some(500.0),
            ..Choice::default()
        };
        let layout = read_chosen_layout(&path, EventSource::Annotations, &choice).unwrap();
        let mut notes = Notes::default();
        let array = read_chosen(&path, EventSource::Annotations, &choice, &mut notes).unwrap();
        assert_eq!(array.layout, layout);
        assert_eq!(layout.labels("channel").unwrap(), labels);
        assert_eq!(layout.meta.sampling_rate, Some(500.0));
        let time = layout.numbers("time").unwrap();
        assert_eq!(time.len(), 2000);
        assert_eq!(time[7], 7.0 / 500.0);
        let values = array.real_values().unwrap();
        for (row, label) in labels.iter().enumerate() {
            let want: Vec<f64> = read_f64("multirate", &format!("{label}_500"))
                .iter()
                .map(|v| v * 1e-6)
                .collect();
            assert_eq!(want.len(), 2000, "{label}");
            let peak = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            let got: Vec<f64> = values
                .index_axis(Axis(0), row)
                .iter()
                .map(|&v| f64::from(v))
                .collect();
            // |b| ≤ peak, so a floor of `peak` makes these differences relative to the peak.
            let inner = max_rel_diff(&got[50..1950], &want[50..1950], peak);
            let all = max_rel_diff(&got, &want, peak);
            eprintln!("data.rate {label}: {inner:.1e} of the peak inside, {all:.1e} overall");
            assert!(inner < 1e-6, "{label}: {inner:e}");
            assert!(all < 1e-5, "{label}: {all:e}");
        }
    }

    // `data.channels` picks channels by name; of one rate, they need no `data.rate`.
    #[test]
    fn chosen_channels_and_bad_choices_name_the_field() {
        let path = fixture_path("multirate", "rates.bdf");
        let pick = |channels: &[&str], rate: Option<f64>| Choice {
            channels: Some(channels.iter().map(|c| c.to_string()).collect()),
            rate,
            ..Choice::default()
        };
        let layout =
            read_chosen_layout(&path, EventSource::Annotations, &pick(&["A2", "A1"], None))
                .unwrap();
        assert_eq!(layout.labels("channel").unwrap(), ["A1", "A2"]);
        assert_eq!(layout.meta.sampling_rate, Some(1000.0));
        let array = read_chosen(
            &path,
            EventSource::Annotations,
            &pick(&["A2"], None),
            &mut Notes::default(),
        )
        .unwrap();
        // Not resampled: pyEDFlib's values (uV) to f32 rounding.
        let want: Vec<f64> = read_f64("multirate", "A2_in")
            .iter()
            .map(|v| v * 1e-6)
            .collect();
        let got: Vec<f64> = array
            .real_values()
            .unwrap()
            .iter()
            .map(|&v| f64::from(v))
            .collect();
        assert!(max_rel_diff(&got, &want, 1e-12) <= F32_ROUNDING);
        let cases: Vec<(Choice, &str)> = vec![
            (
                pick(&["A1", "Q"], None),
                "data.channels: the recording has no channel named \"Q\"",
            ),
            (
                pick(&["A1", "A1"], None),
                "data.channels: \"A1\" is listed twice",
            ),
            (pick(&["A1", "B"], None), "`data.rate`"),
            (
                pick(&["B"], Some(997.3)),
                "data.rate: channel B: going from 800 Hz to 997.3 Hz",
            ),
            (
                pick(&["B"], Some(0.0)),
                "data.rate: expected a positive number of Hz",
            ),
        ];
        for (choice, needle) in cases {
            let err = read_chosen_layout(&path, EventSource::Annotations, &choice).unwrap_err();
            let err = err.to_string();
            assert!(err.contains(needle), "{choice:?}: {err}");
            if !needle.contains("positive") {
                assert!(err.contains("rates.bdf"), "{err}");
            }
        }
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
