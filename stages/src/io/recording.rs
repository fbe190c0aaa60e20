//! Opening a recording: header and sidecars → channel selection, events and the output layout;
//! then, on request, the sample values.
//!
//! [`Opened`] is computed the same way for the layout-only path and for the full read, so both
//! agree by construction. File-level rules (documented for users in [`crate::io`]): the file size
//! must equal what the header declares (a truncated or padded file is an error, because a
//! silently shorter recording would shift every later result); EDF+D files are read only when
//! their records are contiguous.

use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

use ndarray::Array2;

use super::channels::{select, Selection};
use super::edf::{
    parse_record_tals, read_annotation_bytes, read_samples, EdfHeaderError, Header, Scaling,
    TalError, BLOCK,
};
use super::tsv::{
    candidate_sidecars, read_channels, read_coordinate_units, read_electrodes, read_events,
    ChannelRow,
};
use super::{fail, Choice, EventSource};
use crate::array::{Coord, Event, LabelledArray, Layout, Meta, Positions};
use crate::dsp::resample::{factors, output_len, FactorError, Resampler};
use crate::error::StageError;
use crate::ops::resample::resample_rows;

/// Why an EDF/BDF file cannot be read, beyond its header's own fields: its size, its reading,
/// its annotations. [`Opened::open`] adds the file's path.
#[derive(Debug, thiserror::Error)]
pub enum EdfFileError {
    /// The file's size cannot be read.
    #[error("cannot read its size: {0}")]
    Size(#[source] std::io::Error),
    /// The file is shorter than the fixed header.
    #[error("the file is {size} bytes long, shorter than the {BLOCK}-byte EDF/BDF header")]
    ShorterThanFixedHeader {
        /// The file's size in bytes.
        size: u64,
    },
    /// The file is shorter than the header its signal count implies.
    #[error(
        "the file is {size} bytes long, shorter than the {header}-byte header its {signals} signals need"
    )]
    ShorterThanHeader {
        /// The file's size in bytes.
        size: u64,
        /// `256 · (signals + 1)`.
        header: usize,
        /// The declared number of signals.
        signals: usize,
    },
    /// Reading the header failed.
    #[error("cannot read the header: {0}")]
    ReadHeader(#[source] std::io::Error),
    /// A header field is wrong.
    #[error(transparent)]
    Header(#[from] EdfHeaderError),
    /// The header declares no data records.
    #[error("the header declares 0 data records: the file holds no samples")]
    NoRecords,
    /// The file's size is not what the header declares.
    #[error(
        "the header declares {records} data records of {record_bytes} bytes (a file of {} bytes), but the file is {size} bytes and holds {whole} whole records{}; it is truncated or its record count is wrong",
        expected.map_or("more than 2^64".to_string(), |e| e.to_string()),
        if *partial { " and part of another" } else { "" }
    )]
    SizeMismatch {
        /// The declared number of data records.
        records: usize,
        /// Bytes in one data record.
        record_bytes: u64,
        /// The size the header implies (`None`: beyond 2^64).
        expected: Option<u64>,
        /// The file's size.
        size: u64,
        /// Whole records the file holds.
        whole: u64,
        /// It holds part of one more record.
        partial: bool,
    },
    /// Reading the annotation signal's bytes failed.
    #[error("cannot read the annotations: {0}")]
    ReadAnnotations(#[source] std::io::Error),
    /// A data record's annotations do not parse.
    #[error("data record {record}: {source}")]
    Annotation {
        /// 1-based number of the data record.
        record: usize,
        /// What is wrong with its TALs.
        source: TalError,
    },
    /// An EDF+D file whose records are not contiguous.
    #[error(
        "this EDF+D (discontinuous) file has a gap: data record {record} starts at {starts} s, not at {expected} s; recordings with gaps are not supported"
    )]
    Gap {
        /// 1-based number of the data record.
        record: usize,
        /// Its time stamp in s.
        starts: f64,
        /// Where it would start without a gap, in s.
        expected: f64,
    },
}

/// A `data.rate` that no rational factor reaches from a channel's rate; the reader adds the
/// file's path.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("data.rate: {}{source}", channel.as_ref().map_or(String::new(), |c| format!("channel {c}: ")))]
pub struct DataRateError {
    /// The channel, when the rates differ by channel.
    pub channel: Option<String>,
    /// Why no factor reaches the rate.
    pub source: FactorError,
}

/// A recording whose header and sidecars have been read and checked.
pub struct Opened {
    path: PathBuf,
    header: Header,
    selection: Selection,
    /// The output layout (values not read yet).
    pub layout: Layout,
    /// Warnings found while opening.
    pub warnings: Vec<String>,
}

impl Opened {
    /// Read and check the header and sidecars of `path`; `events: None` reads no events (the
    /// layout's event list is empty), for a look at a dataset that may have none.
    pub fn open(
        path: &Path,
        events: Option<EventSource>,
        choice: &Choice,
    ) -> Result<Opened, StageError> {
        let fail = |m: &dyn std::fmt::Display| super::fail(path, m);
        let mut file = File::open(path).map_err(|e| fail(&format_args!("cannot open: {e}")))?;
        let header = read_header(&mut file).map_err(|e| fail(&e))?;
        let [events_path, channels_path, electrodes_path, coordsystem_path] =
            candidate_sidecars(path);
        let sidecar = match channels_path.is_file() {
            true => Some(read_channels(&channels_path)?),
            false => None,
        };
        let mut warnings = Vec::new();
        let selection =
            select(&header, sidecar.as_deref(), choice, &mut warnings).map_err(|e| fail(&e))?;
        let samples = match &selection.resampled_from {
            None => header.records * selection.samples_per_record,
            Some(per_record) => {
                let native: Vec<(&str, f64, usize)> = (selection.channels.iter().zip(per_record))
                    .map(|(c, &n)| {
                        (
                            c.name.as_str(),
                            n as f64 / header.record_seconds,
                            n * header.records,
                        )
                    })
                    .collect();
                resampled_length(&native, selection.rate).map_err(|e| fail(&e))?
            }
        };
        let length = samples as f64 / selection.rate;
        let annotations = annotations(&mut file, &header, selection.rate).map_err(|e| fail(&e))?;
        let events = match (annotations, events) {
            (_, None) => Vec::new(),
            (Some(found), Some(EventSource::Annotations)) => found,
            (_, Some(events)) => sidecar_events(path, events, &events_path, length, &mut warnings)?,
        };
        let layout = full_layout(
            &selection,
            samples,
            events,
            sidecar.as_deref(),
            [&electrodes_path, &coordsystem_path],
        )?;
        Ok(Opened {
            path: path.to_path_buf(),
            header,
            selection,
            layout,
            warnings,
        })
    }

    /// Read the samples of the kept channels, in volts (resampled to `data.rate` when given).
    pub fn read(self) -> Result<LabelledArray, StageError> {
        let fail = |m: &dyn std::fmt::Display| super::fail(&self.path, m);
        let chosen: Vec<(usize, Scaling)> = self
            .selection
            .channels
            .iter()
            .map(|c| {
                (
                    c.signal,
                    Scaling::of(&self.header.signals[c.signal], c.to_volts),
                )
            })
            .collect();
        let mut file =
            File::open(&self.path).map_err(|e| fail(&format_args!("cannot open: {e}")))?;
        let mut read_rows = |rows: &[(usize, Scaling)], spr: usize| {
            let mut values = Array2::<f32>::zeros((rows.len(), self.header.records * spr));
            let out = values
                .as_slice_mut()
                .ok_or_else(|| fail(&"internal: the output array is not contiguous"))?;
            read_samples(&mut file, &self.header, rows, out)
                .map_err(|e| fail(&format_args!("reading the data records failed: {e}")))?;
            Ok::<_, StageError>(values)
        };
        let Some(per_record) = &self.selection.resampled_from else {
            let values = read_rows(&chosen, self.selection.samples_per_record)?;
            return LabelledArray::real(self.layout, values.into_dyn());
        };
        // `data.rate`: the channels of each native rate are read together, then resampled.
        let samples = self.layout.coords[1].len();
        let mut values = Array2::<f32>::zeros((chosen.len(), samples));
        let mut rates: Vec<usize> = per_record.clone();
        rates.sort_unstable();
        rates.dedup();
        for spr in rates {
            let rows: Vec<usize> = (0..chosen.len())
                .filter(|&r| per_record[r] == spr)
                .collect();
            let group: Vec<(usize, Scaling)> = rows.iter().map(|&r| chosen[r]).collect();
            let native = read_rows(&group, spr)?;
            let from = spr as f64 / self.header.record_seconds;
            let resampled = resample_to(native.view(), from, self.selection.rate, samples)
                .map_err(|e| fail(&e))?;
            for (k, &r) in rows.iter().enumerate() {
                values.row_mut(r).assign(&resampled.row(k));
            }
        }
        LabelledArray::real(self.layout, values.into_dyn())
    }
}

/// The number of samples every channel has once resampled to `rate`: each channel's
/// ⌈n·up/down⌉ (they agree when the channels span the same time; the shortest wins otherwise).
/// `channels` holds each channel's name, rate and sample count. A rate that no factor within
/// [`MAX_FACTOR`](crate::dsp::resample::MAX_FACTOR) reaches is an error naming `data.rate`.
pub(super) fn resampled_length(
    channels: &[(&str, f64, usize)],
    rate: f64,
) -> Result<usize, DataRateError> {
    let mut shortest = usize::MAX;
    for &(name, from, n) in channels {
        let (up, down) = factors(from, rate).map_err(|source| DataRateError {
            channel: Some(name.to_string()),
            source,
        })?;
        shortest = shortest.min(output_len(n, up, down));
    }
    Ok(if channels.is_empty() { 0 } else { shortest })
}

/// For a format whose channels share one rate (`from` Hz): the rows of `all` (every channel of
/// the file, in file order) that `selection` keeps, resampled to its rate when `data.rate` asks,
/// to the length of `layout`'s time axis.
pub(super) fn finish_single_rate(
    all: Array2<f32>,
    selection: &Selection,
    from: f64,
    layout: &Layout,
) -> Result<Array2<f32>, DataRateError> {
    let rows: Vec<usize> = selection.channels.iter().map(|c| c.signal).collect();
    let kept = match rows.iter().copied().eq(0..all.nrows()) {
        true => all,
        false => all.select(ndarray::Axis(0), &rows),
    };
    match selection.resampled_from {
        None => Ok(kept),
        Some(_) => {
            let samples = layout.coords[layout.dims.len() - 1].len();
            resample_to(kept.view(), from, selection.rate, samples)
        }
    }
}

/// Every row of `x` (sampled at `from` Hz) resampled to `to` Hz by the resampler of
/// `op: resample`, cut to `samples` columns.
pub(super) fn resample_to(
    x: ndarray::ArrayView2<'_, f32>,
    from: f64,
    to: f64,
    samples: usize,
) -> Result<Array2<f32>, DataRateError> {
    let (up, down) = factors(from, to).map_err(|source| DataRateError {
        channel: None,
        source,
    })?;
    let out = resample_rows(x, &Resampler::new(up, down));
    if out.ncols() == samples {
        return Ok(out);
    }
    Ok(out.slice(ndarray::s![.., ..samples]).to_owned())
}

/// The events of `events: sidecar`, or the error for `events: annotations` on a file without
/// annotations.
pub(super) fn sidecar_events(
    path: &Path,
    source: EventSource,
    events_path: &Path,
    length: f64,
    warnings: &mut Vec<String>,
) -> Result<Vec<Event>, StageError> {
    match source {
        EventSource::Annotations => Err(fail(
            path,
            "`events: annotations` needs an EDF+/BDF+ file with an annotations signal; this is plain EDF/BDF (use `events: sidecar`)",
        )),
        EventSource::Sidecar if !events_path.is_file() => Err(fail(
            path,
            format!(
                "`events: sidecar` needs the events file {}, which does not exist",
                events_path.display()
            ),
        )),
        EventSource::Sidecar => read_events(events_path, length, warnings),
    }
}

/// Read and check the header, and that the file size matches it.
fn read_header(file: &mut File) -> Result<Header, EdfFileError> {
    let size = file.metadata().map_err(EdfFileError::Size)?.len();
    if size < BLOCK as u64 {
        return Err(EdfFileError::ShorterThanFixedHeader { size });
    }
    let mut bytes = vec![0u8; BLOCK];
    file.read_exact(&mut bytes)
        .map_err(EdfFileError::ReadHeader)?;
    let ns = Header::signal_count(&bytes)?;
    let full = BLOCK * (ns + 1);
    if size < full as u64 {
        return Err(EdfFileError::ShorterThanHeader {
            size,
            header: full,
            signals: ns,
        });
    }
    bytes.resize(full, 0);
    file.read_exact(&mut bytes[BLOCK..])
        .map_err(EdfFileError::ReadHeader)?;
    let header = Header::parse(&bytes)?;
    check_size(&header, size)?;
    Ok(header)
}

/// The file must hold exactly the records the header declares.
fn check_size(header: &Header, size: u64) -> Result<(), EdfFileError> {
    if header.records == 0 {
        return Err(EdfFileError::NoRecords);
    }
    let record = header.record_bytes() as u64;
    let expected = header.expected_file_size();
    if expected == Some(size) {
        return Ok(());
    }
    let data = size.saturating_sub(header.header_bytes as u64);
    let whole = data / record.max(1);
    Err(EdfFileError::SizeMismatch {
        records: header.records,
        record_bytes: record,
        expected,
        size,
        whole,
        partial: !data.is_multiple_of(record.max(1)),
    })
}

/// EDF+ annotations as events relative to the first sample, or `None` for plain EDF/BDF.
/// Also checks that an EDF+D file's records are contiguous.
fn annotations(
    file: &mut File,
    header: &Header,
    rate: f64,
) -> Result<Option<Vec<Event>>, EdfFileError> {
    let signals: Vec<usize> = (0..header.signals.len())
        .filter(|&i| header.signals[i].annotation)
        .collect();
    if header.plus_continuous.is_none() || signals.is_empty() {
        return Ok(None);
    }
    let mut stamps = Vec::new();
    let mut events = Vec::new();
    for (n, &signal) in signals.iter().enumerate() {
        let records =
            read_annotation_bytes(file, header, signal).map_err(EdfFileError::ReadAnnotations)?;
        for (r, bytes) in records.iter().enumerate() {
            let tals =
                parse_record_tals(bytes, n == 0).map_err(|source| EdfFileError::Annotation {
                    record: r + 1,
                    source,
                })?;
            stamps.extend(tals.stamp);
            events.extend(tals.annotations);
        }
    }
    let start = stamps.first().copied().unwrap_or(0.0);
    if header.plus_continuous == Some(false) {
        check_contiguous(&stamps, header.record_seconds, rate)?;
    }
    // TAL onsets count from the header's start time; the first sample lies at the first
    // record's time stamp, which EDF+ allows to be non-zero (a sub-second start).
    for e in &mut events {
        e.onset -= start;
    }
    events.sort_by(|a, b| a.onset.total_cmp(&b.onset));
    Ok(Some(events))
}

/// EDF+D records may have gaps between them; a [channel, time] array cannot show a gap.
fn check_contiguous(stamps: &[f64], record_seconds: f64, rate: f64) -> Result<(), EdfFileError> {
    let start = stamps.first().copied().unwrap_or(0.0);
    for (r, &s) in stamps.iter().enumerate() {
        let expected = start + r as f64 * record_seconds;
        if (s - expected).abs() > 0.5 / rate {
            return Err(EdfFileError::Gap {
                record: r + 1,
                starts: s,
                expected,
            });
        }
    }
    Ok(())
}

/// The kept channels that the channels sidecar marks `status: bad`, in channel order.
/// The electrode positions (from `electrodes` and its coordinate system, or derived for
/// standard labels) and the channels `channels.tsv` marks bad, into `layout`'s metadata: the
/// same for every format.
pub(crate) fn add_positions_and_bad_channels(
    layout: &mut Layout,
    selection: &Selection,
    sidecar: Option<&[ChannelRow]>,
    [electrodes, coordsystem]: [&Path; 2],
) -> Result<(), StageError> {
    layout.meta.positions = positions(selection, electrodes, coordsystem)?;
    let bad = bad_channels(selection, sidecar);
    if !bad.is_empty() {
        layout
            .meta
            .extra
            .insert("bad_channels".into(), serde_json::json!(bad));
    }
    Ok(())
}

fn bad_channels(selection: &Selection, sidecar: Option<&[ChannelRow]>) -> Vec<String> {
    let Some(rows) = sidecar else {
        return Vec::new();
    };
    selection
        .channels
        .iter()
        .filter(|c| rows.iter().any(|r| r.bad && r.name == c.name))
        .map(|c| c.name.clone())
        .collect()
}

/// Electrode positions: from the electrodes sidecar (with its coordinate system's unit) when it
/// exists, else derived for the EEG channels with standard 10-20/10-10 labels
/// ([`crate::spatial::standard`]); `None` when neither gives any.
fn positions(
    selection: &Selection,
    electrodes: &Path,
    coordsystem: &Path,
) -> Result<Option<Box<Positions>>, StageError> {
    let file_name = |p: &Path| {
        p.file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default()
    };
    if electrodes.is_file() {
        if !coordsystem.is_file() {
            return Err(StageError::input(format!(
                "{}: electrode positions need their coordinate system's unit, from {}, which                  does not exist",
                electrodes.display(),
                coordsystem.display()
            )));
        }
        let to_metres = read_coordinate_units(coordsystem)?;
        let rows = read_electrodes(electrodes, to_metres)?;
        let by_channel = selection
            .channels
            .iter()
            .filter_map(|c| {
                let row = rows.iter().find(|(name, _)| name == &c.name)?;
                row.1.map(|p| (c.name.clone(), p))
            })
            .collect();
        return Ok(Some(Box::new(Positions {
            source: file_name(electrodes),
            units: "m".into(),
            by_channel,
        })));
    }
    let eeg: Vec<&str> = selection
        .channels
        .iter()
        .filter(|c| c.kind == "EEG")
        .map(|c| c.name.as_str())
        .collect();
    let by_channel: std::collections::BTreeMap<String, [f64; 3]> = eeg
        .iter()
        .filter_map(|n| crate::spatial::standard::position(n).map(|p| (n.to_string(), p)))
        .collect();
    if by_channel.is_empty() {
        return Ok(None);
    }
    Ok(Some(Box::new(Positions {
        source: format!(
            "standard 10-20/10-10 labels, derived on a unit sphere ({} of {} EEG channels)",
            by_channel.len(),
            eeg.len()
        ),
        units: "1".into(),
        by_channel,
    })))
}

/// [`layout`] with the electrode positions and bad channels added
/// ([`add_positions_and_bad_channels`]): the layout every format's reader ends with.
pub(super) fn full_layout(
    selection: &Selection,
    samples: usize,
    events: Vec<Event>,
    sidecar: Option<&[ChannelRow]>,
    positions: [&Path; 2],
) -> Result<Layout, StageError> {
    let mut layout = layout(selection, samples, events);
    add_positions_and_bad_channels(&mut layout, selection, sidecar, positions)?;
    Ok(layout)
}

/// dims [channel, time], time k/fs in s, values in volts.
pub(super) fn layout(selection: &Selection, samples: usize, events: Vec<Event>) -> Layout {
    let names = selection.channels.iter().map(|c| c.name.clone()).collect();
    let kinds = selection.channels.iter().map(|c| c.kind.clone()).collect();
    let time = (0..samples).map(|k| k as f64 / selection.rate).collect();
    Layout {
        dims: vec!["channel".into(), "time".into()],
        coords: vec![Coord::Labels(names), Coord::Numbers(time)],
        units: "V".into(),
        complex: false,
        meta: Meta {
            sampling_rate: Some(selection.rate),
            channel_types: Some(kinds),
            events: Some(events),
            ..Meta::default()
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::io::edf::{write_edf_plus, EdfWriteSpec, SignalSpec};
    use crate::io::{read_recording, read_recording_layout, sidecar_paths};
    use crate::op::Notes;
    use crate::testutil::read_error;

    const FS: f64 = 100.0;

    fn spec() -> EdfWriteSpec {
        let wave = |a: f64, f: f64| -> Vec<f64> {
            (0..300)
                .map(|k| a * (2.0 * std::f64::consts::PI * f * k as f64 / FS).cos())
                .collect()
        };
        EdfWriteSpec {
            patient: String::new(),
            recording: String::new(),
            start_date: "02.03.21".into(),
            start_time: "08.00.00".into(),
            record_seconds: 1.0,
            sampling_rate: FS,
            signals: vec![
                SignalSpec {
                    label: "EEG Fz".into(),
                    unit: "uV".into(),
                    samples: wave(40.0, 3.0),
                },
                SignalSpec {
                    label: "Cz".into(),
                    unit: "uV".into(),
                    samples: wave(-75.5, 7.0),
                },
                SignalSpec {
                    label: "EOG left".into(),
                    unit: "mV".into(),
                    samples: wave(0.3, 0.5),
                },
            ],
            annotations: vec![
                Event {
                    onset: 0.25,
                    duration: 0.0,
                    label: "cue-a".into(),
                },
                Event {
                    onset: 1.5,
                    duration: 0.2,
                    label: "cue-b".into(),
                },
            ],
        }
    }

    /// A recording `sub-01_task-x_eeg.edf` written by our writer into a fresh folder.
    fn recording() -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("sub-01_task-x_eeg.edf");
        write_edf_plus(&path, &spec()).unwrap();
        (dir, path)
    }

    fn patch(path: &Path, at: usize, width: usize, text: &str) {
        let mut bytes = std::fs::read(path).unwrap();
        let mut field = text.as_bytes().to_vec();
        field.resize(width, b' ');
        bytes[at..at + width].copy_from_slice(&field);
        std::fs::write(path, bytes).unwrap();
    }

    // Round trip: our writer, then our reader; values agree within half a quantisation step
    // (2·pmax / 65535, the 16-bit EDF resolution of Kemp et al. 1992), converted to volts.
    #[test]
    fn round_trip_through_our_writer() {
        let (_dir, path) = recording();
        let mut notes = Notes::default();
        let array = read_recording(&path, EventSource::Annotations, &mut notes).unwrap();
        assert!(notes.warnings.is_empty(), "{:?}", notes.warnings);
        let layout = &array.layout;
        assert_eq!(layout.labels("channel").unwrap(), ["Fz", "Cz", "left"]);
        let kinds = layout.meta.channel_types.clone().unwrap();
        assert_eq!(kinds, ["EEG", "EEG", "EOG"]);
        assert_eq!(layout.meta.sampling_rate, Some(FS));
        assert_eq!(layout.units, "V");
        assert_eq!(layout.meta.events.as_deref(), Some(&spec().annotations[..]));
        let values = array.real_values().unwrap();
        for (row, (signal, factor)) in spec().signals.iter().zip([1e-6, 1e-6, 1e-3]).enumerate() {
            let peak = signal.samples.iter().fold(0.0f64, |m, x| m.max(x.abs()));
            let half_step = peak / 65535.0 * 1.001;
            for (k, &x) in signal.samples.iter().enumerate() {
                let got = f64::from(values[[row, k]]) / factor;
                assert!(
                    (got - x).abs() <= half_step,
                    "{} sample {k}: {got} vs {x}",
                    signal.label
                );
            }
        }
        assert_eq!(
            read_recording_layout(&path, EventSource::Annotations).unwrap(),
            array.layout
        );
    }

    // BIDS electrodes.tsv (name, x, y, z; n/a allowed) with coordsystem.json's
    // EEGCoordinateUnits (Pernet et al. 2019); without them, standard labels get derived
    // positions. channels.tsv status `bad` is handed on.
    #[test]
    fn positions_from_the_electrodes_sidecar_or_derived() {
        let (dir, path) = recording();
        let layout = read_recording_layout(&path, EventSource::Annotations).unwrap();
        let derived = layout.meta.positions.unwrap();
        assert!(
            derived.source.starts_with("standard 10-20/10-10"),
            "{}",
            derived.source
        );
        assert!(derived.source.contains("(2 of 2 EEG channels)"));
        let cz = derived.by_channel["Cz"];
        assert!(cz[0].abs() < 1e-15 && cz[1].abs() < 1e-15 && (cz[2] - 1.0).abs() < 1e-15);
        assert_eq!(derived.by_channel.get("left"), None);

        let electrodes = dir.path().join("sub-01_task-x_electrodes.tsv");
        let coords = dir.path().join("sub-01_task-x_coordsystem.json");
        std::fs::write(
            &electrodes,
            "name\tx\ty\tz\nFz\t0\t7.1\t6.2\nCz\tn/a\tn/a\tn/a\n",
        )
        .unwrap();
        let err = read_error(&path, EventSource::Annotations);
        assert!(
            err.contains("coordsystem.json") && err.contains("does not exist"),
            "{err}"
        );
        std::fs::write(
            &coords,
            r#"{"EEGCoordinateSystem": "CapTrak", "EEGCoordinateUnits": "cm"}"#,
        )
        .unwrap();
        let channels = dir.path().join("sub-01_task-x_channels.tsv");
        std::fs::write(
            &channels,
            "name\ttype\tstatus\nFz\tEEG\tgood\nCz\tEEG\tbad\nleft\tEOG\tn/a\n",
        )
        .unwrap();
        assert_eq!(
            sidecar_paths(&path),
            [channels, electrodes.clone(), coords.clone()]
        );
        let layout = read_recording_layout(&path, EventSource::Annotations).unwrap();
        let from_file = layout.meta.positions.unwrap();
        assert_eq!(from_file.source, "sub-01_task-x_electrodes.tsv");
        assert_eq!(from_file.units, "m");
        assert_eq!(
            from_file.by_channel.len(),
            1,
            "Cz's n/a row gives no position"
        );
        let fz = from_file.by_channel["Fz"];
        assert!((fz[1] - 0.071).abs() < 1e-15 && (fz[2] - 0.062).abs() < 1e-15);
        assert_eq!(layout.meta.extra["bad_channels"], serde_json::json!(["Cz"]));

        std::fs::write(&coords, r#"{"EEGCoordinateUnits": "n/a"}"#).unwrap();
        let err = read_error(&path, EventSource::Annotations);
        assert!(err.contains("EEGCoordinateUnits is \"n/a\""), "{err}");
        std::fs::write(&coords, r#"{"EEGCoordinateUnits": "mm"}"#).unwrap();
        std::fs::write(&electrodes, "name\tx\ty\tz\nFz\t0\tnear\t6.2\n").unwrap();
        let err = read_error(&path, EventSource::Annotations);
        assert!(
            err.contains("electrodes.tsv: line 2: y is \"near\""),
            "{err}"
        );
    }

    // BIDS sidecars (Pernet et al. 2019): channels.tsv types override label prefixes.
    #[test]
    fn sidecars_give_events_and_types() {
        let (dir, path) = recording();
        assert!(sidecar_paths(&path).is_empty());
        let events = dir.path().join("sub-01_task-x_events.tsv");
        let channels = dir.path().join("sub-01_task-x_channels.tsv");
        std::fs::write(
            &events,
            "onset\tduration\ttrial_type\n2.0\tn/a\tcue-a\n0.5\t0.1\tcue-b\n",
        )
        .unwrap();
        std::fs::write(&channels, "name\ttype\tunits\nFz\tEEG\tuV\nCz\tmisc\tuV\n").unwrap();
        assert_eq!(sidecar_paths(&path), [events.clone(), channels]);
        let mut notes = Notes::default();
        let array = read_recording(&path, EventSource::Sidecar, &mut notes).unwrap();
        let kinds = array.layout.meta.channel_types.clone().unwrap();
        assert_eq!(kinds, ["EEG", "MISC", "EOG"]);
        let onsets: Vec<f64> = array
            .layout
            .meta
            .events
            .unwrap()
            .iter()
            .map(|e| e.onset)
            .collect();
        assert_eq!(onsets, [0.5, 2.0]);
        // "left" is not in the channels sidecar: its type came from its label, with a warning.
        assert_eq!(notes.warnings.len(), 1);
        assert!(notes.warnings[0].contains("left"), "{:?}", notes.warnings);
        std::fs::remove_file(&events).unwrap();
        let err = read_error(&path, EventSource::Sidecar);
        assert!(
            err.contains("sub-01_task-x_events.tsv") && err.contains("does not exist"),
            "{err}"
        );
    }

    #[test]
    fn bad_events_rows_name_file_and_line() {
        let (dir, path) = recording();
        let events = dir.path().join("sub-01_task-x_events.tsv");
        std::fs::write(&events, "onset\tduration\ttrial_type\n1\t0\ta\n3.5\t0\tb\n").unwrap();
        let err = read_error(&path, EventSource::Sidecar);
        assert!(
            err.contains("line 3") && err.contains("past the end") && err.contains("3 s"),
            "{err}"
        );
        std::fs::write(&events, "onset\tduration\tvalue\n1\t0\ta\n").unwrap();
        let err = read_error(&path, EventSource::Sidecar);
        assert!(
            err.contains("_events.tsv") && err.contains("trial_type"),
            "{err}"
        );
    }

    // Offsets below are those of the EDF header fields (Kemp et al. 1992); with ns = 4 signals
    // the per-signal fields start at 256 + width_sum_before · 4.
    #[test]
    fn broken_headers_are_clear_errors() {
        let ns = 4;
        let cases: Vec<(usize, usize, &str, &str)> = vec![
            (236, 8, "many", "number of data records is \"many\""),
            (236, 8, "-1", "-1 data records"),
            (244, 8, "0", "must be positive"),
            (244, 8, "1s", "duration of a data record is \"1s\""),
            (252, 4, "0", "at least one"),
            (252, 4, "x", "number of signals"),
            (184, 8, "512", "must be 1280"),
            (0, 8, "1.0", "version field"),
            (256 + 120 * ns, 8, "32767", "digital range 32767..32767"),
            (256 + 128 * ns + 8, 8, "abc", "digital maximum of signal 2"),
            (
                256 + 104 * ns + 16,
                8,
                "0.3",
                "physical minimum 0.3 and maximum",
            ),
            (256 + 216 * ns, 8, "0", "sampling rate is not positive"),
            (256 + 216 * ns + 8, 8, "-5", "must not be negative"),
            (236, 8, "4", "truncated"),
            (256 + 16, 16, "Fz", "two channels are named \"Fz\""),
        ];
        for (at, width, text, needle) in cases {
            let (_dir, path) = recording();
            patch(&path, at, width, text);
            let err = read_error(&path, EventSource::Annotations);
            assert!(
                err.contains(needle) && err.contains("sub-01_task-x_eeg.edf"),
                "{text}: {err}"
            );
            assert_eq!(err.matches("sub-01_task-x_eeg.edf").count(), 1, "{err}");
        }
    }

    #[test]
    fn wrong_sizes_are_clear_errors() {
        let (_dir, path) = recording();
        let bytes = std::fs::read(&path).unwrap();
        std::fs::write(&path, &bytes[..100]).unwrap();
        assert!(read_error(&path, EventSource::Annotations).contains("shorter than the 256-byte"));
        std::fs::write(&path, &bytes[..600]).unwrap();
        assert!(read_error(&path, EventSource::Annotations)
            .contains("shorter than the 1280-byte header"));
        // A truncated last record: the file holds 2 whole records and part of a third.
        std::fs::write(&path, &bytes[..bytes.len() - 10]).unwrap();
        let err = read_error(&path, EventSource::Annotations);
        assert!(
            err.contains("holds 2 whole records and part of another"),
            "{err}"
        );
        let mut longer = bytes.clone();
        longer.extend_from_slice(&[0; 7]);
        std::fs::write(&path, &longer).unwrap();
        assert!(read_error(&path, EventSource::Annotations).contains("record count is wrong"));
        std::fs::write(&path, &bytes[..1280]).unwrap();
        patch(&path, 236, 8, "0");
        assert!(read_error(&path, EventSource::Annotations).contains("0 data records"));
        let missing = path.with_file_name("nothing.edf");
        assert!(read_error(&missing, EventSource::Annotations).contains("cannot open"));
    }

    #[test]
    fn broken_annotations_are_clear_errors() {
        let (_dir, path) = recording();
        let bytes = std::fs::read(&path).unwrap();
        // The annotation signal is the last one; its first record starts with "+0\x14\x14\0".
        let at = 1280 + 3 * 100 * 2;
        assert_eq!(&bytes[at..at + 5], b"+0\x14\x14\x00");
        patch(&path, at, 2, "x0");
        let err = read_error(&path, EventSource::Annotations);
        assert!(
            err.contains("data record 1") && err.contains("\"x0\""),
            "{err}"
        );
    }

    // The same problems as values: the reader's own variants, the header's and the TALs'
    // wrapped in them.
    #[test]
    fn file_errors_are_variants() {
        let (_dir, path) = recording();
        let bytes = std::fs::read(&path).unwrap();
        let header = |path: &Path| read_header(&mut File::open(path).unwrap());
        std::fs::write(&path, &bytes[..bytes.len() - 10]).unwrap();
        assert!(matches!(
            header(&path),
            Err(EdfFileError::SizeMismatch {
                records: 3,
                whole: 2,
                partial: true,
                ..
            })
        ));
        std::fs::write(&path, &bytes[..600]).unwrap();
        assert!(matches!(
            header(&path),
            Err(EdfFileError::ShorterThanHeader {
                size: 600,
                header: 1280,
                signals: 4
            })
        ));
        std::fs::write(&path, &bytes).unwrap();
        patch(&path, 236, 8, "many");
        assert!(matches!(
            header(&path),
            Err(EdfFileError::Header(EdfHeaderError::NotANumber {
                offset: 236,
                ..
            }))
        ));
        std::fs::write(&path, &bytes).unwrap();
        // The first record's time-stamp TAL, in the annotation signal (the last one).
        patch(&path, 1280 + 3 * 100 * 2, 2, "x0");
        let parsed = header(&path).unwrap();
        let found = annotations(&mut File::open(&path).unwrap(), &parsed, FS);
        assert!(
            matches!(
                &found,
                Err(EdfFileError::Annotation {
                    record: 1,
                    source: TalError::Onset { found }
                }) if found == "x0"
            ),
            "{found:?}"
        );
        assert_eq!(
            check_contiguous(&[0.0, 1.0, 5.0], 1.0, FS).unwrap_err().to_string(),
            "this EDF+D (discontinuous) file has a gap: data record 3 starts at 5 s, not at 2 s; recordings with gaps are not supported"
        );
    }

    #[test]
    fn a_rate_no_factor_reaches_names_the_channel() {
        let err = resampled_length(&[("Fz", 1000.0, 100), ("Cz", 800.0, 80)], 997.3).unwrap_err();
        assert_eq!(err.channel.as_deref(), Some("Fz"));
        assert!(matches!(err.source, FactorError::TooLarge { .. }));
        assert!(
            err.to_string()
                .starts_with("data.rate: channel Fz: going from 1000 Hz"),
            "{err}"
        );
        let x = Array2::<f32>::zeros((1, 10));
        let err = resample_to(x.view(), 1000.0, 250.123_456_789, 3).unwrap_err();
        assert_eq!(err.channel, None);
        assert!(
            err.to_string()
                .starts_with("data.rate: 250.123456789 Hz is not"),
            "{err}"
        );
    }

    // EDF+D (Kemp & Olivan 2003): records carry their own start times; contiguous ones read
    // like EDF+C, a gap is refused.
    #[test]
    fn discontinuous_files_read_only_without_gaps() {
        let (_dir, path) = recording();
        patch(&path, 192, 44, "EDF+D");
        let array = read_recording(&path, EventSource::Annotations, &mut Notes::default());
        assert_eq!(array.unwrap().layout.meta.events.unwrap().len(), 2);
        let bytes = std::fs::read(&path).unwrap();
        let header = Header::parse(&bytes[..1280]).unwrap();
        let at = 1280 + 2 * header.record_bytes() + header.signal_offset(3);
        assert_eq!(&bytes[at..at + 5], b"+2\x14\x14\x00");
        patch(&path, at, 2, "+5");
        let err = read_error(&path, EventSource::Annotations);
        assert!(
            err.contains("gap") && err.contains("data record 3 starts at 5 s"),
            "{err}"
        );
    }

    // A header unit that is not a voltage: the channels sidecar's units (BIDS) decide, else the
    // values stay unconverted with a warning.
    #[test]
    fn units_from_the_sidecar_or_a_warning() {
        let (dir, path) = recording();
        let mut notes = Notes::default();
        let before = read_recording(&path, EventSource::Annotations, &mut notes).unwrap();
        // Unit field of signal 2 (Cz): 256 + (16 + 80) · 4 + 8.
        patch(&path, 256 + 96 * 4 + 8, 8, "");
        let after = read_recording(&path, EventSource::Annotations, &mut notes).unwrap();
        let (b, a) = (before.real_values().unwrap(), after.real_values().unwrap());
        // Both are f32 roundings of the same value in different units: equal to ~2^-23.
        let (raw, volts) = (f64::from(a[[1, 0]]), f64::from(b[[1, 0]]));
        assert!(
            (raw - volts * 1e6).abs() <= 1.2e-7 * raw.abs(),
            "{raw} vs {volts}"
        );
        assert!(notes
            .warnings
            .iter()
            .any(|w| w.contains("Cz") && w.contains("not a voltage")));
        let channels = dir.path().join("sub-01_task-x_channels.tsv");
        std::fs::write(
            channels,
            "name\ttype\tunits\nFz\tEEG\tuV\nCz\tEEG\tuV\nleft\tEOG\tmV\n",
        )
        .unwrap();
        let mut notes = Notes::default();
        let fixed = read_recording(&path, EventSource::Annotations, &mut notes).unwrap();
        assert_eq!(fixed.values, before.values);
        assert!(notes.warnings.is_empty(), "{:?}", notes.warnings);
    }
}
