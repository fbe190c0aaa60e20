//! BIDS sidecars beside a recording (Gorgolewski et al. 2016; Pernet et al. 2019, EEG-BIDS):
//! where they are, and parsing `*_events.tsv` (onset, duration, trial_type) and
//! `*_channels.tsv` (name, type, units).
//!
//! Both are tab-separated with a header row; `n/a` marks a missing value. Events rules:
//! `onset` must be a number ≥ 0 and not past the end of the recording; `duration` `n/a` (or a
//! missing column) means 0; a row whose `trial_type` is `n/a` or empty cannot belong to any
//! condition, so it is skipped and the skipped lines are named in one warning. Events are
//! returned sorted by onset (ties keep file order).

use std::path::{Path, PathBuf};

use super::fail;
use crate::array::Event;
use crate::error::StageError;

/// BIDS data-type suffixes that the sidecar names replace.
const DATA_SUFFIXES: [&str; 3] = ["eeg", "ieeg", "meg"];

/// The events, channels, electrodes and coordinate-system sidecars a recording would have,
/// existing or not, in that order: `sub-01_task-cue_eeg.edf` → `sub-01_task-cue_events.tsv`,
/// `sub-01_task-cue_channels.tsv`, `sub-01_task-cue_electrodes.tsv`,
/// `sub-01_task-cue_coordsystem.json`.
pub fn candidate_sidecars(recording: &Path) -> [PathBuf; 4] {
    let stem = recording
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let base = match stem.rsplit_once('_') {
        Some((base, suffix)) if DATA_SUFFIXES.contains(&suffix) => base.to_string(),
        _ => stem,
    };
    [
        "events.tsv",
        "channels.tsv",
        "electrodes.tsv",
        "coordsystem.json",
    ]
    .map(|kind| recording.with_file_name(format!("{base}_{kind}")))
}

/// One row of a channels sidecar.
#[derive(Clone, Debug, PartialEq)]
pub struct ChannelRow {
    /// Channel name as in the recording.
    pub name: String,
    /// Upper-case type, `None` for `n/a`.
    pub kind: Option<String>,
    /// Units, `None` when absent or `n/a`.
    pub units: Option<String>,
    /// True when the `status` column says `bad`.
    pub bad: bool,
}

/// A parsed TSV file: the header's column names and the data rows with their line numbers.
struct Table {
    columns: Vec<String>,
    rows: Vec<(usize, Vec<String>)>,
}

impl Table {
    fn read(path: &Path) -> Result<Table, StageError> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| StageError::input(format!("{}: cannot read: {e}", path.display())))?;
        let text = text.strip_prefix('\u{feff}').unwrap_or(&text);
        let mut lines = text
            .lines()
            .enumerate()
            .map(|(i, l)| (i + 1, l.trim_end_matches('\r')))
            .filter(|(_, l)| !l.trim().is_empty());
        let Some((_, header)) = lines.next() else {
            return Err(fail(path, "the file is empty; a header row is required"));
        };
        let columns: Vec<String> = header.split('\t').map(|c| c.trim().to_string()).collect();
        let mut rows = Vec::new();
        for (line, row) in lines {
            let cells: Vec<String> = row.split('\t').map(|c| c.trim().to_string()).collect();
            if cells.len() != columns.len() {
                return Err(fail(
                    path,
                    format!(
                        "line {line} has {} tab-separated values but the header has {} columns",
                        cells.len(),
                        columns.len()
                    ),
                ));
            }
            rows.push((line, cells));
        }
        Ok(Table { columns, rows })
    }

    fn column(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c == name)
    }

    fn required(&self, path: &Path, name: &str) -> Result<usize, StageError> {
        self.column(name).ok_or_else(|| {
            fail(
                path,
                format!(
                    "the header has no `{name}` column (it has: {})",
                    self.columns.join(", ")
                ),
            )
        })
    }
}

/// `n/a` or empty.
fn missing(cell: &str) -> bool {
    cell.is_empty() || cell == "n/a"
}

/// Read an events sidecar of a recording lasting `length` seconds. Rows without a trial_type
/// are skipped with a warning in `warnings`.
pub fn read_events(
    path: &Path,
    length: f64,
    warnings: &mut Vec<String>,
) -> Result<Vec<Event>, StageError> {
    let table = Table::read(path)?;
    let onset_col = table.required(path, "onset")?;
    let type_col = table.required(path, "trial_type")?;
    let duration_col = table.column("duration");
    let mut events = Vec::with_capacity(table.rows.len());
    let mut skipped = Vec::new();
    for (line, cells) in &table.rows {
        let label = &cells[type_col];
        if missing(label) {
            skipped.push(line.to_string());
            continue;
        }
        let onset = parse_onset(path, *line, &cells[onset_col], length)?;
        let duration = match duration_col.map(|c| cells[c].as_str()) {
            None => 0.0,
            Some(cell) if missing(cell) => 0.0,
            Some(cell) => parse_duration(path, *line, cell)?,
        };
        events.push(Event {
            onset,
            duration,
            label: label.clone(),
        });
    }
    if !skipped.is_empty() {
        warnings.push(format!(
            "{}: {} rows have no trial_type (n/a) and were skipped (lines {})",
            path.display(),
            skipped.len(),
            skipped.join(", ")
        ));
    }
    events.sort_by(|a, b| a.onset.total_cmp(&b.onset));
    Ok(events)
}

fn parse_onset(path: &Path, line: usize, cell: &str, length: f64) -> Result<f64, StageError> {
    let onset = cell.parse::<f64>().ok().filter(|v| v.is_finite());
    match onset {
        Some(v) if v < 0.0 => Err(fail(
            path,
            format!("line {line}: the onset is {cell}, expected seconds >= 0"),
        )),
        Some(v) if v > length => Err(fail(
            path,
            format!(
                "line {line}: the onset {cell} s is past the end of the recording ({length} s); is this the events file of another recording?"
            ),
        )),
        Some(v) => Ok(v),
        None => Err(fail(
            path,
            format!("line {line}: the onset is {cell:?}, expected a number of seconds"),
        )),
    }
}

fn parse_duration(path: &Path, line: usize, cell: &str) -> Result<f64, StageError> {
    match cell.parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => Ok(v),
        _ => Err(fail(
            path,
            format!("line {line}: the duration is {cell:?}, expected seconds >= 0 or n/a"),
        )),
    }
}

/// Read a channels sidecar.
pub fn read_channels(path: &Path) -> Result<Vec<ChannelRow>, StageError> {
    let table = Table::read(path)?;
    let name_col = table.required(path, "name")?;
    let type_col = table.required(path, "type")?;
    let units_col = table.column("units");
    let status_col = table.column("status");
    let present = |cell: &str| (!missing(cell)).then(|| cell.to_string());
    Ok(table
        .rows
        .iter()
        .map(|(_, cells)| ChannelRow {
            name: cells[name_col].clone(),
            kind: present(&cells[type_col]).map(|t| t.to_ascii_uppercase()),
            units: units_col.and_then(|c| present(&cells[c])),
            bad: status_col.is_some_and(|c| cells[c].eq_ignore_ascii_case("bad")),
        })
        .collect())
}

/// One electrode of an electrodes sidecar: its name and position (metres), if known.
pub type Electrode = (String, Option<[f64; 3]>);

/// Read an electrodes sidecar (BIDS: columns name, x, y, z; `n/a` for an unknown position):
/// each named electrode with its position, `None` when any coordinate is `n/a`. Coordinates
/// are multiplied by `to_metres`.
pub fn read_electrodes(path: &Path, to_metres: f64) -> Result<Vec<Electrode>, StageError> {
    let table = Table::read(path)?;
    let name_col = table.required(path, "name")?;
    let cols = [
        table.required(path, "x")?,
        table.required(path, "y")?,
        table.required(path, "z")?,
    ];
    let mut out = Vec::with_capacity(table.rows.len());
    for (line, cells) in &table.rows {
        if cols.iter().any(|&c| missing(&cells[c])) {
            out.push((cells[name_col].clone(), None));
            continue;
        }
        let mut p = [0.0; 3];
        for (k, &c) in cols.iter().enumerate() {
            p[k] = match cells[c].parse::<f64>() {
                Ok(v) if v.is_finite() => v * to_metres,
                _ => {
                    return Err(fail(
                        path,
                        format!(
                            "line {line}: {} is {:?}, expected a number or n/a",
                            ["x", "y", "z"][k],
                            cells[c]
                        ),
                    ))
                }
            };
        }
        out.push((cells[name_col].clone(), Some(p)));
    }
    Ok(out)
}

/// The factor to metres of the electrode coordinates that a BIDS `*_coordsystem.json` declares
/// (`EEGCoordinateUnits`, or `iEEGCoordinateUnits`: `m`, `cm` or `mm`).
pub fn read_coordinate_units(path: &Path) -> Result<f64, StageError> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| StageError::input(format!("{}: cannot read: {e}", path.display())))?;
    let json: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| fail(path, format!("not valid JSON: {e}")))?;
    let unit = ["EEGCoordinateUnits", "iEEGCoordinateUnits"]
        .iter()
        .find_map(|k| json.get(*k).and_then(|v| v.as_str()));
    match unit {
        Some("m") => Ok(1.0),
        Some("cm") => Ok(0.01),
        Some("mm") => Ok(0.001),
        Some(other) => Err(fail(
            path,
            format!("EEGCoordinateUnits is {other:?}; expected \"m\", \"cm\" or \"mm\""),
        )),
        None => Err(fail(
            path,
            "no EEGCoordinateUnits (or iEEGCoordinateUnits) field: the electrode positions' unit is unknown",
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
        let path = dir.join(name);
        std::fs::write(&path, text).unwrap();
        path
    }

    // File names as in the BIDS specification (Gorgolewski et al. 2016; Pernet et al. 2019):
    // sub-<label>[_task-<label>]_eeg.edf with sub-<label>[_task-<label>]_events.tsv beside it.
    #[test]
    fn sidecar_names_replace_the_data_type_suffix() {
        let [events, channels, electrodes, coordsystem] =
            candidate_sidecars(Path::new("/d/sub-01/eeg/sub-01_task-cue_eeg.edf"));
        assert_eq!(
            electrodes,
            Path::new("/d/sub-01/eeg/sub-01_task-cue_electrodes.tsv")
        );
        assert_eq!(
            coordsystem,
            Path::new("/d/sub-01/eeg/sub-01_task-cue_coordsystem.json")
        );
        assert_eq!(
            events,
            Path::new("/d/sub-01/eeg/sub-01_task-cue_events.tsv")
        );
        assert_eq!(
            channels,
            Path::new("/d/sub-01/eeg/sub-01_task-cue_channels.tsv")
        );
        let [events, ..] = candidate_sidecars(Path::new("rec_ieeg.bdf"));
        assert_eq!(events, Path::new("rec_events.tsv"));
        let [events, ..] = candidate_sidecars(Path::new("night1.edf"));
        assert_eq!(events, Path::new("night1_events.tsv"));
    }

    // BIDS events.tsv: onset and duration in seconds, n/a for missing values.
    #[test]
    fn events_with_na_values() {
        let dir = tempfile::tempdir().unwrap();
        let path = write(
            dir.path(),
            "e.tsv",
            "onset\tduration\ttrial_type\tvalue\r\n2.5\tn/a\tcue-b\t1\r\n1.0\t0.1\tcue-a\t2\r\n3.0\t0\tn/a\t3\r\n\r\n",
        );
        let mut warnings = Vec::new();
        let events = read_events(&path, 10.0, &mut warnings).unwrap();
        let expect = vec![
            Event {
                onset: 1.0,
                duration: 0.1,
                label: "cue-a".into(),
            },
            Event {
                onset: 2.5,
                duration: 0.0,
                label: "cue-b".into(),
            },
        ];
        assert_eq!(events, expect);
        assert_eq!(warnings.len(), 1);
        assert!(warnings[0].contains("lines 4"), "{warnings:?}");
    }

    #[test]
    fn bad_events_name_the_line() {
        let dir = tempfile::tempdir().unwrap();
        let cases = [
            (
                "onset\tduration\ttrial_type\n1\t0\ta\nsoon\t0\tb\n",
                "line 3",
            ),
            (
                "onset\tduration\ttrial_type\n-1\t0\ta\n",
                "line 2: the onset is -1",
            ),
            (
                "onset\tduration\ttrial_type\n1\t0\ta\n12.5\t0\tb\n",
                "line 3: the onset 12.5 s is past the end",
            ),
            (
                "onset\tduration\ttrial_type\n1\t-2\ta\n",
                "line 2: the duration",
            ),
            ("onset\tduration\n1\t0\n", "no `trial_type` column"),
            ("onset\tduration\ttrial_type\n1\t0\n", "line 2 has 2"),
            ("", "header row is required"),
            ("onset\ttrial_type\nnan\ta\n", "line 2"),
        ];
        for (text, needle) in cases {
            let path = write(dir.path(), "bad_events.tsv", text);
            let err = read_events(&path, 10.0, &mut Vec::new())
                .unwrap_err()
                .to_string();
            assert!(
                err.contains(needle) && err.contains("bad_events.tsv"),
                "{err}"
            );
        }
    }

    // BIDS channels.tsv: name, type, units; types are upper case in the specification.
    #[test]
    fn channels_sidecar() {
        let dir = tempfile::tempdir().unwrap();
        let path = write(
            dir.path(),
            "c.tsv",
            "name\ttype\tunits\nFz\tEEG\tuV\nHEOG\teog\tn/a\nX\tn/a\tmV\n",
        );
        let rows = read_channels(&path).unwrap();
        assert_eq!(
            rows[1],
            ChannelRow {
                name: "HEOG".into(),
                kind: Some("EOG".into()),
                units: None,
                bad: false,
            }
        );
        assert_eq!(rows[2].kind, None);
        assert_eq!(rows[2].units.as_deref(), Some("mV"));
        let bad = write(dir.path(), "c2.tsv", "name\tunits\nFz\tuV\n");
        assert!(read_channels(&bad)
            .unwrap_err()
            .to_string()
            .contains("no `type` column"));
    }
}
