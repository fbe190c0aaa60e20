//! The BrainVision Core Data Format: a text header (`.vhdr`), a text marker file (`.vmrk`) and
//! a binary data file (`.eeg`), as described in the vendor's published format specification
//! (version 1.0; named by EEG-BIDS, Pernet et al. 2019).
//!
//! Supported: binary data (`DataFormat=BINARY`), little-endian, `DataOrientation` MULTIPLEXED or
//! VECTORIZED, `BinaryFormat` INT_16, INT_32 or IEEE_FLOAT_32; per channel a name, a reference
//! name, a resolution and a unit (a stored value times the resolution is the physical value in
//! that unit; V, mV, µV and nV are converted to volts). The header's `DataFile` and
//! `MarkerFile` are resolved against the header's folder. The number of data points follows
//! from the data file's size, which must be a whole number of points (channels × sample
//! width); a `DataPoints=` line, when present, must agree.
//!
//! Submodules: `header` (the text layer and the header), `markers` (the marker file).

mod header;
mod markers;

use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

use ndarray::Array2;

pub use header::{
    decode_text, referenced_files, BinaryFormat, ChannelInfo, LineError, Orientation, VhdrHeader,
};
pub use markers::{marker_events, parse_markers, Marker};

use super::channels::{check_unique, describe_label, keep_chosen, Selection};
use super::recording::{finish_single_rate, full_layout, resampled_length, sidecar_events};
use super::tsv::{candidate_sidecars, read_channels};
use super::{fail, Choice, EventSource};
use crate::array::{Event, LabelledArray, Layout};
use crate::error::StageError;

/// A BrainVision recording whose header, data file size and sidecars have been checked.
pub struct Opened {
    header: VhdrHeader,
    selection: Selection,
    points: usize,
    /// The output layout (values not read yet).
    pub layout: Layout,
    /// Warnings found while opening.
    pub warnings: Vec<String>,
}

impl Opened {
    /// Read and check the header `vhdr`, the size of its data file, the sidecars and (for
    /// `events: annotations`) the marker file.
    pub fn open(
        vhdr: &Path,
        events: Option<EventSource>,
        choice: &Choice,
    ) -> Result<Opened, StageError> {
        let bytes = std::fs::read(vhdr).map_err(|e| fail(vhdr, format!("cannot open: {e}")))?;
        let header = VhdrHeader::parse(vhdr, &decode_text(&bytes)).map_err(|e| fail(vhdr, e))?;
        let points = data_points(vhdr, &header)?;
        let [events_path, channels_path, electrodes_path, coordsystem_path] =
            candidate_sidecars(vhdr);
        let sidecar = match channels_path.is_file() {
            true => Some(read_channels(&channels_path)?),
            false => None,
        };
        let mut warnings = Vec::new();
        let channels: Vec<_> = header
            .channels
            .iter()
            .enumerate()
            .map(|(i, c)| {
                let mut channel = describe_label(
                    i,
                    &c.label,
                    &c.unit,
                    "EEG",
                    sidecar.as_deref(),
                    &mut warnings,
                );
                channel.to_volts *= c.resolution;
                channel
            })
            .collect();
        check_unique(&channels).map_err(|m| fail(vhdr, m))?;
        let channels = keep_chosen(channels, choice.channels.as_deref(), |c| {
            (c.name.clone(), header.channels[c.signal].label.clone())
        })
        .map_err(|m| fail(vhdr, m))?;
        let (rate, samples) = match choice.rate {
            None => (header.rate, points),
            Some(rate) => {
                let native: Vec<(&str, f64, usize)> = channels
                    .iter()
                    .map(|c| (c.name.as_str(), header.rate, points))
                    .collect();
                let samples = resampled_length(&native, rate).map_err(|m| fail(vhdr, m))?;
                (rate, samples)
            }
        };
        let resampled_from = choice.rate.map(|_| vec![points; channels.len()]);
        let selection = Selection {
            channels,
            rate,
            samples_per_record: points,
            resampled_from,
        };
        let length = samples as f64 / rate;
        let events = match events {
            None => Vec::new(),
            Some(EventSource::Annotations) => markers(vhdr, &header, points, &mut warnings)?,
            Some(EventSource::Sidecar) => sidecar_events(
                vhdr,
                EventSource::Sidecar,
                &events_path,
                length,
                &mut warnings,
            )?,
        };
        let layout = full_layout(
            &selection,
            samples,
            events,
            sidecar.as_deref(),
            [&electrodes_path, &coordsystem_path],
        )?;
        Ok(Opened {
            header,
            selection,
            points,
            layout,
            warnings,
        })
    }

    /// Read the samples, in volts: every channel of the file is decoded (the multiplexed
    /// layout interleaves them), then the chosen ones kept and, with `data.rate`, resampled.
    pub fn read(self) -> Result<LabelledArray, StageError> {
        let data = &self.header.data_file;
        let mut factors = vec![1.0; self.header.channels.len()];
        for c in &self.selection.channels {
            factors[c.signal] = c.to_volts;
        }
        let mut values = Array2::<f32>::zeros((factors.len(), self.points));
        let out = values
            .as_slice_mut()
            .ok_or_else(|| fail(data, "internal: the output array is not contiguous"))?;
        let mut file = File::open(data).map_err(|e| fail(data, format!("cannot open: {e}")))?;
        read_samples(&mut file, &self.header, self.points, &factors, out)
            .map_err(|e| fail(data, format!("reading the samples failed: {e}")))?;
        let values = finish_single_rate(values, &self.selection, self.header.rate, &self.layout)
            .map_err(|m| fail(data, m))?;
        LabelledArray::real(self.layout, values.into_dyn())
    }
}

/// The number of data points in the data file, from its size; a missing file, or a size that
/// is not a whole number of points, is an error naming both files.
fn data_points(vhdr: &Path, header: &VhdrHeader) -> Result<usize, StageError> {
    let data = &header.data_file;
    let size = match std::fs::metadata(data) {
        Ok(meta) => meta.len(),
        Err(e) => {
            return Err(fail(
                vhdr,
                LineError::at_key(
                    header.data_file_line,
                    "DataFile",
                    format!(
                        "the data file {} cannot be read ({e}); it must sit where the header says, relative to the header's folder",
                        data.display()
                    ),
                ),
            ))
        }
    };
    let width = header.format.width();
    let count = header.channels.len();
    let per_point = (width * count) as u64;
    let points = size / per_point;
    if size == 0 || size % per_point != 0 {
        return Err(fail(
            data,
            format!(
                "the file is {size} bytes, not a whole, non-zero number of data points as {} declares them (NumberOfChannels={count}, BinaryFormat={}: {per_point} bytes per data point); it is truncated, or the header's channel count or format is wrong",
                vhdr.display(),
                header.format.name()
            ),
        ));
    }
    let points = usize::try_from(points).map_err(|_| fail(data, "the file is too large"))?;
    if let Some((declared, entry)) = &header.data_points {
        if *declared != points {
            return Err(fail(
                vhdr,
                LineError::at_key(
                    entry.line,
                    &entry.key,
                    format!(
                        "the header declares {declared} data points, but the data file {} holds {points}",
                        data.display()
                    ),
                ),
            ));
        }
    }
    Ok(points)
}

/// The events of the marker file.
fn markers(
    vhdr: &Path,
    header: &VhdrHeader,
    points: usize,
    warnings: &mut Vec<String>,
) -> Result<Vec<Event>, StageError> {
    let Some(path) = &header.marker_file else {
        return Err(fail(
            vhdr,
            "`events: annotations` reads the BrainVision markers, but the header names no MarkerFile (use `events: sidecar`)",
        ));
    };
    let bytes = std::fs::read(path).map_err(|e| {
        fail(
            vhdr,
            format!(
                "MarkerFile: the marker file {} cannot be read ({e})",
                path.display()
            ),
        )
    })?;
    let parsed = parse_markers(&decode_text(&bytes)).map_err(|e| fail(path, e))?;
    let mut own = Vec::new();
    let events =
        marker_events(&parsed, points, header.rate, &mut own).map_err(|e| fail(path, e))?;
    warnings.extend(own.into_iter().map(|w| format!("{}: {w}", path.display())));
    Ok(events)
}

/// Bytes of data file read at a time.
const CHUNK: usize = 1 << 22;

/// Decode every sample into `out` (`[channel, point]`, row-major), times each channel's factor.
fn read_samples(
    file: &mut File,
    header: &VhdrHeader,
    points: usize,
    factors: &[f64],
    out: &mut [f32],
) -> std::io::Result<()> {
    let width = header.format.width();
    let count = factors.len();
    let mut raw = Vec::new();
    match header.orientation {
        Orientation::Multiplexed => {
            let per_chunk = (CHUNK / (width * count)).max(1);
            let mut bytes = vec![0u8; per_chunk * width * count];
            let mut start = 0;
            while start < points {
                let n = per_chunk.min(points - start);
                let block = &mut bytes[..n * width * count];
                file.read_exact(block)?;
                decode(block, header.format, &mut raw);
                for (p, row) in raw.chunks_exact(count).enumerate() {
                    for (c, (&v, &f)) in row.iter().zip(factors).enumerate() {
                        out[c * points + start + p] = (v * f) as f32;
                    }
                }
                start += n;
            }
        }
        Orientation::Vectorized => {
            let per_chunk = (CHUNK / width).max(1);
            let mut bytes = vec![0u8; per_chunk.min(points) * width];
            for (c, &f) in factors.iter().enumerate() {
                let mut start = 0;
                while start < points {
                    let n = per_chunk.min(points - start);
                    let block = &mut bytes[..n * width];
                    file.read_exact(block)?;
                    decode(block, header.format, &mut raw);
                    let row = &mut out[c * points + start..c * points + start + n];
                    for (o, &v) in row.iter_mut().zip(&raw) {
                        *o = (v * f) as f32;
                    }
                    start += n;
                }
            }
        }
    }
    Ok(())
}

/// Little-endian samples to f64 (exact for all three formats).
fn decode(bytes: &[u8], format: BinaryFormat, out: &mut Vec<f64>) {
    out.clear();
    match format {
        BinaryFormat::Int16 => out.extend(
            bytes
                .chunks_exact(2)
                .map(|b| f64::from(i16::from_le_bytes([b[0], b[1]]))),
        ),
        BinaryFormat::Int32 => out.extend(
            bytes
                .chunks_exact(4)
                .map(|b| f64::from(i32::from_le_bytes([b[0], b[1], b[2], b[3]]))),
        ),
        BinaryFormat::Float32 => out.extend(
            bytes
                .chunks_exact(4)
                .map(|b| f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]]))),
        ),
    }
}

/// The data and marker files of a header that exist, in that order.
pub fn companion_files(vhdr: &Path) -> Vec<PathBuf> {
    referenced_files(vhdr)
        .into_iter()
        .filter(|p| p.is_file())
        .collect()
}

#[cfg(test)]
mod tests {
    //! Reference checks: files written by pybv 0.8.1 (tests/reference/gen_brainvision.py; the
    //! vectorised and INT_32 files are pybv's samples reordered or widened there by numpy, per
    //! the format's definitions) read back to the data pybv was given, its channel names,
    //! reference names, rate and markers.
    use super::*;
    use crate::io::{read_recording, read_recording_layout, sidecar_paths};
    use crate::op::Notes;
    use crate::testutil::read_error;
    use crate::testutil::{fixture_path, read_f64, read_json};
    use ndarray::Axis;

    const CASES: [&str; 5] = [
        "int16_mux",
        "int16_vec",
        "int32_mux",
        "float32_mux",
        "float32_vec",
    ];

    fn strings(value: &serde_json::Value) -> Vec<String> {
        serde_json::from_value(value.clone()).unwrap()
    }

    fn volts_per(unit: &str) -> f64 {
        // SI prefixes: m = 1e-3, µ = 1e-6.
        match unit {
            "\u{b5}V" => 1e-6,
            "mV" => 1e-3,
            "V" => 1.0,
            other => panic!("fixture unit {other}"),
        }
    }

    fn check_case(name: &str) {
        let meta = read_json("brainvision", name);
        let want = read_f64("brainvision", &format!("{name}_values"));
        let path = fixture_path("brainvision", &format!("{name}.vhdr"));
        let mut notes = Notes::default();
        let array = read_recording(&path, EventSource::Annotations, &mut notes).unwrap();
        assert!(notes.warnings.is_empty(), "{name}: {:?}", notes.warnings);
        let layout = &array.layout;
        assert_eq!(
            read_recording_layout(&path, EventSource::Annotations).unwrap(),
            *layout
        );
        assert_eq!(layout.labels("channel").unwrap(), strings(&meta["names"]));
        assert_eq!(layout.meta.sampling_rate, meta["rate"].as_f64(), "{name}");
        assert_eq!(layout.units, "V");
        let header = VhdrHeader::parse(&path, &std::fs::read_to_string(&path).unwrap()).unwrap();
        let refs: Vec<String> = header
            .channels
            .iter()
            .map(|c| c.reference.clone())
            .collect();
        assert_eq!(refs, strings(&meta["references"]), "{name}");
        assert_eq!(header.format.name(), meta["format"].as_str().unwrap());
        let integer = header.format != BinaryFormat::Float32;
        let values = array.real_values().unwrap();
        assert_eq!(values.shape(), want.shape(), "{name}");
        let units = strings(&meta["units"]);
        let resolutions: Vec<f64> = serde_json::from_value(meta["resolutions"].clone()).unwrap();
        for (c, row) in want.axis_iter(Axis(0)).enumerate() {
            let step = resolutions[c] * volts_per(&units[c]);
            for (k, &x) in row.iter().enumerate() {
                let got = f64::from(values[[c, k]]);
                // Integer files: pybv stores (value / resolution) cast with numpy's astype,
                // which truncates toward zero, so the stored value is within one resolution
                // step of the data; then our f32 result rounds once more (2^-24 relative,
                // IEEE 754 binary32). Float files: pybv's f32 rounding of value / resolution
                // and ours of the result, each at most 2^-24 relative.
                let bound = match integer {
                    true => step * (1.0 + 1e-9) + x.abs() * 6e-8,
                    false => x.abs() * 1.2e-7,
                };
                assert!(
                    (got - x).abs() <= bound,
                    "{name} channel {c} sample {k}: {got:e} vs {x:e}"
                );
            }
        }
        let events = layout.meta.events.as_ref().unwrap();
        let expected = meta["events"].as_array().unwrap();
        assert_eq!(events.len(), expected.len(), "{name}: {events:?}");
        for (got, want) in events.iter().zip(expected) {
            assert_eq!(got.label, want["label"].as_str().unwrap(), "{name}");
            assert!((got.onset - want["onset"].as_f64().unwrap()).abs() < 1e-12);
            assert!((got.duration - want["duration"].as_f64().unwrap()).abs() < 1e-12);
        }
    }

    #[test]
    fn pybv_files_read_back_to_what_pybv_was_given() {
        for name in CASES {
            check_case(name);
        }
    }

    #[test]
    fn integer_files_are_within_one_step_and_not_better_by_accident() {
        // The int16 tolerance above is one resolution step; the data are not multiples of the
        // step, so some samples must differ from it by more than a float rounding: the check
        // above compares quantised values, not a copy of the input.
        let want = read_f64("brainvision", "int16_mux_values");
        let path = fixture_path("brainvision", "int16_mux.vhdr");
        let array = read_recording(&path, EventSource::Annotations, &mut Notes::default());
        let array = array.unwrap();
        let values = array.real_values().unwrap();
        let largest = want
            .indexed_iter()
            .map(|(i, &x)| (f64::from(values[[i[0], i[1]]]) - x).abs())
            .fold(0.0, f64::max);
        assert!(largest > 1e-9, "{largest:e}");
    }

    /// `int16_mux` copied into a fresh folder, its header named the BIDS way.
    fn bids_copy() -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        for ext in ["eeg", "vmrk"] {
            let name = format!("int16_mux.{ext}");
            std::fs::copy(fixture_path("brainvision", &name), dir.path().join(name)).unwrap();
        }
        let vhdr = dir.path().join("sub-01_task-x_eeg.vhdr");
        std::fs::copy(fixture_path("brainvision", "int16_mux.vhdr"), &vhdr).unwrap();
        (dir, vhdr)
    }

    // BIDS sidecars (Pernet et al. 2019) take precedence as for EDF: channels.tsv types, and
    // events.tsv with `events: sidecar`; the data and marker files join the source's key.
    #[test]
    fn sidecars_take_precedence_and_companions_are_keyed() {
        let (dir, vhdr) = bids_copy();
        let d = dir.path();
        assert_eq!(
            sidecar_paths(&vhdr),
            [d.join("int16_mux.eeg"), d.join("int16_mux.vmrk")]
        );
        let events = d.join("sub-01_task-x_events.tsv");
        let channels = d.join("sub-01_task-x_channels.tsv");
        std::fs::write(&events, "onset\tduration\ttrial_type\n1.0\t0\tcue-a\n").unwrap();
        std::fs::write(
            &channels,
            "name\ttype\tunits\nFz\tEEG\tµV\nCz\tEEG\tµV\nVEOG\tEOG\tµV\n",
        )
        .unwrap();
        assert_eq!(
            sidecar_paths(&vhdr),
            [
                d.join("int16_mux.eeg"),
                d.join("int16_mux.vmrk"),
                events.clone(),
                channels
            ]
        );
        let mut notes = Notes::default();
        let array = read_recording(&vhdr, EventSource::Sidecar, &mut notes).unwrap();
        assert!(notes.warnings.is_empty(), "{:?}", notes.warnings);
        let kinds = array.layout.meta.channel_types.clone().unwrap();
        assert_eq!(kinds, ["EEG", "EEG", "EOG"]);
        let got = array.layout.meta.events.clone().unwrap();
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].label, "cue-a");
        std::fs::remove_file(&events).unwrap();
        let err = read_error(&vhdr, EventSource::Sidecar);
        assert!(
            err.contains("_events.tsv") && err.contains("does not exist"),
            "{err}"
        );
        // The markers are still there for `events: annotations`.
        let array = read_recording(&vhdr, EventSource::Annotations, &mut notes).unwrap();
        assert_eq!(array.layout.meta.events.unwrap().len(), 4);
    }

    #[test]
    fn broken_recordings_are_clear_errors() {
        let (dir, vhdr) = bids_copy();
        let data = dir.path().join("int16_mux.eeg");
        let bytes = std::fs::read(&data).unwrap();
        // 3 channels of INT_16: 6 bytes per data point.
        std::fs::write(&data, &bytes[..bytes.len() - 4]).unwrap();
        let err = read_error(&vhdr, EventSource::Annotations);
        assert!(
            err.contains("int16_mux.eeg")
                && err.contains("sub-01_task-x_eeg.vhdr")
                && err.contains("6 bytes per data point"),
            "{err}"
        );
        std::fs::remove_file(&data).unwrap();
        let err = read_error(&vhdr, EventSource::Annotations);
        assert!(
            err.contains("line 6, DataFile") && err.contains("int16_mux.eeg"),
            "{err}"
        );
        std::fs::write(&data, &bytes).unwrap();
        let header = std::fs::read_to_string(&vhdr).unwrap();
        std::fs::write(&vhdr, header.replace("INT_16", "INT_24")).unwrap();
        let err = read_error(&vhdr, EventSource::Annotations);
        assert!(
            err.contains("BinaryFormat") && err.contains("INT_24"),
            "{err}"
        );
        std::fs::write(&vhdr, header.replace("=MULTIPLEXED", "=SIDEWAYS")).unwrap();
        let err = read_error(&vhdr, EventSource::Annotations);
        assert!(
            err.contains("DataOrientation") && err.contains("SIDEWAYS"),
            "{err}"
        );
        std::fs::write(&vhdr, &header).unwrap();
        // 4 s at 256 Hz: 1024 data points.
        let marks = dir.path().join("int16_mux.vmrk");
        let text = std::fs::read_to_string(&marks).unwrap();
        std::fs::write(
            &marks,
            text.replace("Mk4=Comment,cue-left,401", "Mk4=Comment,cue-left,1025"),
        )
        .unwrap();
        let err = read_error(&vhdr, EventSource::Annotations);
        assert!(
            err.contains("int16_mux.vmrk")
                && err.contains("Mk4")
                && err.contains("1024 data points"),
            "{err}"
        );
        // The data file is not a recording of its own.
        let err = read_error(&dir.path().join("int16_mux.eeg"), EventSource::Sidecar);
        assert!(err.contains("point data.recordings at its header"), "{err}");
    }
}
