//! A small BrainVision writer for tests only: it turns a recording phasewise can read into a
//! BrainVision Core Data Format recording (`.vhdr` header, `.vmrk` markers, `.eeg` data) as the
//! vendor's format description lays it out: IEEE_FLOAT_32, MULTIPLEXED, little-endian, every
//! channel in µV with resolution 1, the events as `Comment` markers after a `New Segment` at
//! the first point. phasewise itself only reads the format.

use std::fmt::Write as _;
use std::fs;
use std::path::Path;

use phasewise_stages::array::Event;
use phasewise_stages::io::{read_recording, EventSource};
use phasewise_stages::Notes;

/// Write `names`' samples (`volts[channel][point]`) at `rate` Hz with `events` as
/// `<stem>.vhdr`, `<stem>.vmrk`, `<stem>.eeg` beside `vhdr`.
pub fn write_brainvision(
    vhdr: &Path,
    names: &[String],
    rate: f64,
    volts: &[Vec<f32>],
    events: &[Event],
) {
    let stem = vhdr
        .file_stem()
        .expect("a header file name")
        .to_string_lossy()
        .into_owned();
    let mut header = String::from("Brain Vision Data Exchange Header File Version 1.0\n");
    header.push_str("; written by phasewise's tests\n\n[Common Infos]\nCodepage=UTF-8\n");
    let _ = writeln!(header, "DataFile={stem}.eeg\nMarkerFile={stem}.vmrk");
    header.push_str("DataFormat=BINARY\nDataOrientation=MULTIPLEXED\n");
    let _ = writeln!(header, "NumberOfChannels={}", names.len());
    let _ = writeln!(header, "SamplingInterval={}", 1e6 / rate);
    header.push_str("\n[Binary Infos]\nBinaryFormat=IEEE_FLOAT_32\n\n[Channel Infos]\n");
    for (i, name) in names.iter().enumerate() {
        let _ = writeln!(
            header,
            "Ch{}={},,1,\u{b5}V",
            i + 1,
            name.replace(',', "\\1")
        );
    }
    fs::write(vhdr, header).expect("write .vhdr");

    let mut markers = String::from("Brain Vision Data Exchange Marker File, Version 1.0\n\n");
    let _ = writeln!(
        markers,
        "[Common Infos]\nCodepage=UTF-8\nDataFile={stem}.eeg\n\n[Marker Infos]"
    );
    markers.push_str("Mk1=New Segment,,1,1,0\n");
    for (i, e) in events.iter().enumerate() {
        let position = (e.onset * rate).round() as usize + 1;
        let points = ((e.duration * rate).round() as usize).max(1);
        let label = e.label.replace(',', "\\1");
        let _ = writeln!(markers, "Mk{}=Comment,{label},{position},{points},0", i + 2);
    }
    fs::write(vhdr.with_extension("vmrk"), markers).expect("write .vmrk");

    let points = volts.first().map_or(0, Vec::len);
    let mut data = Vec::with_capacity(points * names.len() * 4);
    for p in 0..points {
        for channel in volts {
            // Volts to µV, rounded once to f32.
            let micro = (f64::from(channel[p]) * 1e6) as f32;
            data.extend_from_slice(&micro.to_le_bytes());
        }
    }
    fs::write(vhdr.with_extension("eeg"), data).expect("write .eeg");
}

/// Read `recording` (events from its `events.tsv`) and write it as BrainVision beside `vhdr`.
pub fn convert(recording: &Path, vhdr: &Path) {
    let array = read_recording(recording, EventSource::Sidecar, &mut Notes::default())
        .unwrap_or_else(|e| panic!("reading {}: {e}", recording.display()));
    let layout = &array.layout;
    let names = layout.labels("channel").expect("channels").to_vec();
    let rate = layout.meta.sampling_rate.expect("a rate");
    let events = layout.meta.events.clone().unwrap_or_default();
    let values = array.real_values().expect("real values");
    let volts: Vec<Vec<f32>> = values
        .outer_iter()
        .map(|row| row.iter().copied().collect())
        .collect();
    write_brainvision(vhdr, &names, rate, &volts, &events);
}
