//! The BrainVision marker file (`.vmrk`): `Mk<n>=<type>,<description>,<position>,<points>,
//! <channel>[,<date>]` lines in `[Marker Infos]`, positions 1-based in data points.
//!
//! Turned into events: onset (position − 1) / rate seconds from the first sample, duration
//! points / rate (a marker covering n points spans n sample intervals), label the description
//! (the type when the description is empty). `New Segment` markers mark where recording
//! started or resumed and are not events; one past the first point means the recording was
//! interrupted there, which a warning says. A marker that the writer repeated for several
//! channels (same label, position and length) is one event.

use std::collections::HashSet;

use super::header::{fields, numbered, IniText, LineError};
use crate::array::Event;

/// One marker line.
#[derive(Clone, Debug, PartialEq)]
pub struct Marker {
    /// 1-based line number in the marker file.
    pub line: usize,
    /// The key, `Mk<n>`.
    pub key: String,
    /// Marker type (`Stimulus`, `Response`, `Comment`, `New Segment`, ...).
    pub kind: String,
    /// Description (`S  1`, free text for comments), `\1` decoded to a comma.
    pub description: String,
    /// Position of the first point, 1-based.
    pub position: usize,
    /// Number of points it covers.
    pub points: usize,
    /// Channel number it belongs to (0: all channels).
    pub channel: usize,
}

const MARKER_ID: &str = "Data Exchange Marker File";
const MARKERS: &str = "Marker Infos";

/// Parse the text of a marker file.
pub fn parse_markers(text: &str) -> Result<Vec<Marker>, LineError> {
    let ini = IniText::parse(text, MARKER_ID, &["Common Infos", MARKERS])?;
    let mut markers = Vec::new();
    for e in ini.section(MARKERS) {
        if numbered(&e.key, "Mk").is_none() {
            continue;
        }
        let parts = fields(&e.value);
        let field = |i: usize| parts.get(i).map(String::as_str).unwrap_or("");
        let whole = |i: usize, name: &str, default: Option<usize>| {
            match (field(i), default) {
            ("", Some(d)) => Ok(d),
            (text, _) => text.parse::<usize>().map_err(|_| {
                LineError::at(
                    e,
                    format!("the {name} {text:?} is not a whole number (fields: type, description, position, points, channel)"),
                )
            }),
        }
        };
        let position = whole(2, "position", None)?;
        if position == 0 {
            return Err(LineError::at(
                e,
                "position 0: marker positions count data points from 1",
            ));
        }
        markers.push(Marker {
            line: e.line,
            key: e.key.clone(),
            kind: field(0).to_string(),
            description: field(1).to_string(),
            position,
            points: whole(3, "number of points", Some(1))?,
            channel: whole(4, "channel number", Some(0))?,
        });
    }
    Ok(markers)
}

/// Events of `markers` in a recording of `total` points at `rate` Hz, sorted by onset.
/// A marker past the last point is an error; warnings go to `warnings`.
pub fn marker_events(
    markers: &[Marker],
    total: usize,
    rate: f64,
    warnings: &mut Vec<String>,
) -> Result<Vec<Event>, LineError> {
    let mut seen = HashSet::new();
    let mut events = Vec::with_capacity(markers.len());
    let mut unlabelled = Vec::new();
    for m in markers {
        if m.position > total {
            return Err(LineError::at_key(
                m.line,
                &m.key,
                format!(
                    "the marker's position {} is beyond the end of the data ({total} data points, {} s)",
                    m.position,
                    total as f64 / rate
                ),
            ));
        }
        if m.kind.eq_ignore_ascii_case("New Segment") {
            if m.position > 1 {
                warnings.push(format!(
                    "{} (line {}): a new segment starts at data point {} ({} s): the recording was interrupted there, and times after it are counted as if it had not been",
                    m.key,
                    m.line,
                    m.position,
                    (m.position - 1) as f64 / rate
                ));
            }
            continue;
        }
        let label = match m.description.is_empty() {
            true => m.kind.clone(),
            false => m.description.clone(),
        };
        if label.is_empty() {
            unlabelled.push(m.key.clone());
            continue;
        }
        if !seen.insert((label.clone(), m.position, m.points)) {
            continue;
        }
        events.push(Event {
            onset: (m.position - 1) as f64 / rate,
            duration: m.points as f64 / rate,
            label,
        });
    }
    if !unlabelled.is_empty() {
        warnings.push(format!(
            "markers without type or description were skipped: {}",
            unlabelled.join(", ")
        ));
    }
    events.sort_by(|a, b| a.onset.total_cmp(&b.onset));
    Ok(events)
}

#[cfg(test)]
mod tests {
    use super::*;

    const VMRK: &str = "Brain Vision Data Exchange Marker File, Version 1.0
[Common Infos]
Codepage=UTF-8
DataFile=x.eeg

[Marker Infos]
; Mk<n>=type,description,position,points,channel
Mk1=New Segment,,1,1,0,20240101120000000000
Mk2=Stimulus,S  1,101,1,0
Mk3=Comment,cue\\1left,51,25,1
Mk4=Comment,cue\\1left,51,25,2
Mk5=Response,,200,,
";

    #[test]
    fn markers_become_events() {
        let markers = parse_markers(VMRK).unwrap();
        assert_eq!(markers.len(), 5);
        assert_eq!(markers[2].description, "cue,left");
        assert_eq!(markers[4].points, 1);
        let mut warnings = Vec::new();
        let events = marker_events(&markers, 200, 100.0, &mut warnings).unwrap();
        let got: Vec<(f64, f64, &str)> = events
            .iter()
            .map(|e| (e.onset, e.duration, e.label.as_str()))
            .collect();
        // Onsets (position − 1) / 100 Hz; the marker repeated for channels 1 and 2 is one.
        assert_eq!(
            got,
            [
                (0.5, 0.25, "cue,left"),
                (1.0, 0.01, "S  1"),
                (1.99, 0.01, "Response")
            ]
        );
        assert!(warnings.is_empty(), "{warnings:?}");
    }

    #[test]
    fn bad_markers_name_line_and_key() {
        let markers = parse_markers(VMRK).unwrap();
        let err = marker_events(&markers, 199, 100.0, &mut Vec::new()).unwrap_err();
        assert_eq!(
            err.to_string(),
            "line 12, Mk5: the marker's position 200 is beyond the end of the data (199 data points, 1.99 s)"
        );
        let err = parse_markers(&VMRK.replace("S  1,101", "S  1,x1")).unwrap_err();
        assert!(
            err.to_string()
                .starts_with("line 9, Mk2: the position \"x1\""),
            "{err}"
        );
        let err = parse_markers(&VMRK.replace("S  1,101", "S  1,0")).unwrap_err();
        assert!(err.to_string().contains("position 0"), "{err}");
        let gap = VMRK.replace("Mk5=Response,,200,,", "Mk5=New Segment,,150,1,0");
        let mut warnings = Vec::new();
        let events = marker_events(&parse_markers(&gap).unwrap(), 200, 100.0, &mut warnings);
        assert_eq!(events.unwrap().len(), 2);
        assert!(warnings[0].contains("data point 150"), "{warnings:?}");
    }
}
