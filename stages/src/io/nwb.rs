//! Neurodata Without Borders (NWB 2.x, on HDF5): one `ElectricalSeries` (raw or LFP) with its
//! electrodes table and the `trials` table. Built only with the cargo feature `nwb`, which links
//! the system's HDF5 library (Debian: `libhdf5-dev`) through the `hdf5-metno` crate.
//!
//! What is read, by the NWB format specification's names (NWB core schema 2.x, `nwb.ecephys`,
//! `nwb.file`, `nwb.epoch`):
//! - The series: every group under `/acquisition` and `/processing` (at any depth, e.g. inside an
//!   `LFP` container) whose `neurodata_type` attribute is `ElectricalSeries`. One is read; with
//!   several, `data.series` names it (its path, or its name when that is unique).
//! - Values: `data` is `[time, channel]` (a 1-D `data` is one channel); volts = data ×
//!   `conversion` × `channel_conversion[channel]` + `offset` (the attributes of `data`, defaults
//!   1 and 0; `channel_conversion` is optional), as the specification defines them. A `unit`
//!   other than `volts` is kept with a warning.
//! - Time: `starting_time` with its `rate` attribute. Sample k lies at k / rate s from the
//!   series' start; a series with `timestamps` instead of a rate is refused (not resampled).
//! - Channels: the series' `electrodes` region indexes rows of
//!   `/general/extracellular_ephys/electrodes`. A channel's name is that row's `label` column when
//!   the table has one, else `e<id>`. Its type is `EEG` (the type every op analyses) unless a
//!   BIDS `channels.tsv` beside the file says otherwise. `location` goes to
//!   `meta.extra.locations`; `x`, `y`, `z` (when finite) are the electrode positions, unless a
//!   BIDS `electrodes.tsv` is beside the file (which takes precedence, as for every format).
//! - Events (`events: annotations`): the rows of `/intervals/trials`; onset = `start_time` −
//!   the series' `starting_time`, duration = `stop_time` − `start_time`, label = the row's
//!   `trial_type` (else `condition`, else `label`) column, else `trial`.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use hdf5_metno as hdf5;
use ndarray::Array2;

use super::channels::{check_unique, describe_label, keep_chosen, Selection};
use super::recording::{finish_single_rate, full_layout, resampled_length, sidecar_events};
use super::tsv::{candidate_sidecars, read_channels};
use super::{fail, Choice, EventSource};
use crate::array::{Event, LabelledArray, Layout, Positions};
use crate::error::StageError;

/// The NWB class of voltage recordings.
const SERIES_TYPE: &str = "ElectricalSeries";
/// Where NWB keeps the electrodes table.
const ELECTRODES: &str = "general/extracellular_ephys/electrodes";
/// Columns of the trials table that can give an event's label, in order of preference.
const LABEL_COLUMNS: [&str; 3] = ["trial_type", "condition", "label"];

/// Why the series list, the electrodes table or the trials table of an NWB file cannot be read;
/// the reader adds the file's path.
#[derive(Debug, thiserror::Error)]
pub enum NwbError {
    /// A group's subgroups cannot be listed.
    #[error("{group}: cannot list its groups: {source}")]
    Groups {
        /// The group's path.
        group: String,
        /// HDF5's reason.
        source: hdf5::Error,
    },
    /// A column that must hold text does not.
    #[error("{dataset}: expected a column of text: {source}")]
    NotText {
        /// The dataset's path.
        dataset: String,
        /// HDF5's reason.
        source: hdf5::Error,
    },
    /// A column that must hold numbers does not.
    #[error("{dataset}: expected numbers: {source}")]
    NotNumbers {
        /// The dataset's path.
        dataset: String,
        /// HDF5's reason.
        source: hdf5::Error,
    },
    /// No electrodes table.
    #[error("the file has no electrodes table (/{ELECTRODES}), which an ElectricalSeries needs")]
    NoElectrodesTable,
    /// The electrodes table's `id` column cannot be read as integers.
    #[error("/{ELECTRODES}/id: {0}")]
    ElectrodeIds(#[source] hdf5::Error),
    /// The `label` and `id` columns differ in length.
    #[error("/{ELECTRODES}: the label column has {labels} rows, the id column {ids}")]
    LabelRows {
        /// Rows of `label`.
        labels: usize,
        /// Rows of `id`.
        ids: usize,
    },
    /// `events: annotations` on a file without a trials table.
    #[error(
        "`events: annotations` reads the NWB trials table, but the file has none (/intervals/trials); use `events: sidecar`"
    )]
    NoTrials,
    /// The trials table lacks a required column.
    #[error("/intervals/trials has no {column} column")]
    NoTrialColumn {
        /// `start_time` or `stop_time`.
        column: &'static str,
    },
    /// The trials table's columns differ in length.
    #[error("/intervals/trials: its columns have different lengths")]
    RaggedTrials,
    /// A trial starting outside the series.
    #[error(
        "/intervals/trials row {row}: start_time {start_time} s lies outside the series ({from} s to {to} s)"
    )]
    TrialOutside {
        /// 0-based row (as NWB tools count).
        row: usize,
        /// The row's start_time in s.
        start_time: f64,
        /// The series' first sample in s.
        from: f64,
        /// The end of the series in s.
        to: f64,
    },
}

/// An NWB recording whose series, electrodes and events have been read (all but the samples).
pub struct Opened {
    path: PathBuf,
    series: String,
    selection: Selection,
    from_rate: f64,
    conversion: f64,
    offset: f64,
    channel_conversion: Option<Vec<f64>>,
    /// The output layout (values not read yet).
    pub layout: Layout,
    /// Warnings found while opening.
    pub warnings: Vec<String>,
}

/// The paths of every `ElectricalSeries` in the file (`/acquisition/...`, `/processing/...`),
/// sorted.
pub fn electrical_series(path: &Path) -> Result<Vec<String>, StageError> {
    let file = open_file(path)?;
    series_in(&file).map_err(|e| fail(path, e))
}

fn open_file(path: &Path) -> Result<hdf5::File, StageError> {
    hdf5::silence_errors(true);
    hdf5::File::open(path)
        .map_err(|e| fail(path, format!("cannot open it as an HDF5 (NWB) file: {e}")))
}

fn series_in(file: &hdf5::File) -> Result<Vec<String>, NwbError> {
    let mut found = Vec::new();
    for top in ["acquisition", "processing"] {
        if let Ok(group) = file.group(top) {
            collect_series(&group, &mut found)?;
        }
    }
    found.sort();
    Ok(found)
}

fn collect_series(group: &hdf5::Group, found: &mut Vec<String>) -> Result<(), NwbError> {
    let children = group.groups().map_err(|source| NwbError::Groups {
        group: group.name(),
        source,
    })?;
    for child in children {
        if text_attr(&child, "neurodata_type").as_deref() == Some(SERIES_TYPE) {
            found.push(child.name().trim_start_matches('/').to_string());
        } else {
            collect_series(&child, found)?;
        }
    }
    Ok(())
}

/// A string attribute (variable-length UTF-8 or ASCII, as h5py and hdmf write them).
fn text_attr(location: &hdf5::Location, name: &str) -> Option<String> {
    let attr = location.attr(name).ok()?;
    if let Ok(v) = attr.read_scalar::<hdf5::types::VarLenUnicode>() {
        return Some(v.as_str().to_string());
    }
    attr.read_scalar::<hdf5::types::VarLenAscii>()
        .ok()
        .map(|v| v.as_str().to_string())
}

fn number_attr(location: &hdf5::Location, name: &str) -> Option<f64> {
    location.attr(name).ok()?.read_scalar::<f64>().ok()
}

/// A column of strings (variable-length UTF-8 or ASCII).
fn text_column(dataset: &hdf5::Dataset) -> Result<Vec<String>, NwbError> {
    if let Ok(v) = dataset.read_raw::<hdf5::types::VarLenUnicode>() {
        return Ok(v.iter().map(|s| s.as_str().to_string()).collect());
    }
    dataset
        .read_raw::<hdf5::types::VarLenAscii>()
        .map(|v| v.iter().map(|s| s.as_str().to_string()).collect())
        .map_err(|source| NwbError::NotText {
            dataset: dataset.name(),
            source,
        })
}

fn numbers(dataset: &hdf5::Dataset) -> Result<Vec<f64>, NwbError> {
    dataset
        .read_raw::<f64>()
        .map_err(|source| NwbError::NotNumbers {
            dataset: dataset.name(),
            source,
        })
}

/// The series `choice.series` names, or the only one there is.
fn choose_series(path: &Path, all: &[String], choice: &Choice) -> Result<String, StageError> {
    let listed = || all.join(", ");
    match (&choice.series, all) {
        (None, []) => Err(fail(
            path,
            "the file holds no ElectricalSeries (NWB's class for voltage recordings, raw or LFP) in /acquisition or /processing; there is nothing to read",
        )),
        (None, [one]) => Ok(one.clone()),
        (None, _) => Err(fail(
            path,
            format!(
                "data.series: the file holds {} ElectricalSeries ({}); name the one to read with `data.series`",
                all.len(),
                listed()
            ),
        )),
        (Some(wanted), _) => {
            let wanted = wanted.trim_start_matches('/');
            let by_path = all.iter().find(|s| s.as_str() == wanted);
            let by_name: Vec<&String> = all
                .iter()
                .filter(|s| s.rsplit('/').next() == Some(wanted))
                .collect();
            match (by_path, by_name.as_slice()) {
                (Some(s), _) => Ok(s.clone()),
                (None, [one]) => Ok((*one).clone()),
                (None, []) => Err(fail(
                    path,
                    format!(
                        "data.series: the file holds no ElectricalSeries {wanted:?}; it holds {}",
                        if all.is_empty() { "none".to_string() } else { listed() }
                    ),
                )),
                (None, _) => Err(fail(
                    path,
                    format!(
                        "data.series: {wanted:?} names several ElectricalSeries ({}); give its path",
                        listed()
                    ),
                )),
            }
        }
    }
}

/// The electrodes table's rows: name, location, position.
struct ElectrodeRows {
    names: Vec<String>,
    locations: Option<Vec<String>>,
    positions: Option<Vec<[f64; 3]>>,
}

fn electrode_rows(file: &hdf5::File) -> Result<ElectrodeRows, NwbError> {
    let table = file
        .group(ELECTRODES)
        .map_err(|_| NwbError::NoElectrodesTable)?;
    let ids = table
        .dataset("id")
        .and_then(|d| d.read_raw::<i64>())
        .map_err(NwbError::ElectrodeIds)?;
    let names = match table.dataset("label") {
        Ok(d) => text_column(&d)?,
        Err(_) => ids.iter().map(|i| format!("e{i}")).collect(),
    };
    let locations = match table.dataset("location") {
        Ok(d) => Some(text_column(&d)?),
        Err(_) => None,
    };
    let positions = match (table.dataset("x"), table.dataset("y"), table.dataset("z")) {
        (Ok(x), Ok(y), Ok(z)) => {
            let (x, y, z) = (numbers(&x)?, numbers(&y)?, numbers(&z)?);
            Some(
                (0..x.len().min(y.len()).min(z.len()))
                    .map(|i| [x[i], y[i], z[i]])
                    .collect(),
            )
        }
        _ => None,
    };
    if names.len() != ids.len() {
        return Err(NwbError::LabelRows {
            labels: names.len(),
            ids: ids.len(),
        });
    }
    Ok(ElectrodeRows {
        names,
        locations,
        positions,
    })
}

impl Opened {
    /// Read the series' metadata, its electrodes, the sidecars and (for `events: annotations`)
    /// the trials table.
    pub fn open(
        path: &Path,
        events: Option<EventSource>,
        choice: &Choice,
    ) -> Result<Opened, StageError> {
        let file = open_file(path)?;
        let all = series_in(&file).map_err(|e| fail(path, e))?;
        let series_path = choose_series(path, &all, choice)?;
        let at = |m: String| fail(path, format!("/{series_path}: {m}"));
        let series = file.group(&series_path).map_err(|e| at(e.to_string()))?;
        let data = series
            .dataset("data")
            .map_err(|_| at("the series has no `data`".into()))?;
        let shape = data.shape();
        let (n_times, n_channels) = match shape.as_slice() {
            [t] => (*t, 1),
            [t, c] => (*t, *c),
            other => {
                return Err(at(format!(
                    "`data` has shape {other:?}; expected [time, channel]"
                )))
            }
        };
        if n_times == 0 {
            return Err(at("`data` holds no samples".into()));
        }
        let conversion = number_attr(&data, "conversion").unwrap_or(1.0);
        let offset = number_attr(&data, "offset").unwrap_or(0.0);
        let mut warnings = Vec::new();
        if let Some(unit) = text_attr(&data, "unit").filter(|u| u != "volts") {
            warnings.push(format!(
                "/{series_path}: the data's unit is {unit:?}, not volts; values are kept as conversion and offset give them"
            ));
        }
        let channel_conversion = match series.dataset("channel_conversion") {
            Ok(d) => {
                let v = numbers(&d).map_err(|e| at(e.to_string()))?;
                if v.len() != n_channels {
                    return Err(at(format!(
                        "channel_conversion has {} values for {n_channels} channels",
                        v.len()
                    )));
                }
                Some(v)
            }
            Err(_) => None,
        };
        let (rate, start) = match series.dataset("starting_time") {
            Ok(d) => {
                let rate = number_attr(&d, "rate")
                    .filter(|r| r.is_finite() && *r > 0.0)
                    .ok_or_else(|| at("starting_time has no positive `rate` attribute".into()))?;
                let start = d.read_scalar::<f64>().map_err(|e| at(e.to_string()))?;
                (rate, start)
            }
            Err(_) => {
                return Err(at(
                    "the series gives `timestamps` instead of a sampling rate; phasewise reads only regularly sampled series (starting_time with a rate)".into(),
                ))
            }
        };
        let rows: Vec<i64> = series
            .dataset("electrodes")
            .and_then(|d| d.read_raw::<i64>())
            .map_err(|_| at("the series has no `electrodes` region".into()))?;
        if rows.len() != n_channels {
            return Err(at(format!(
                "`electrodes` names {} rows of the electrodes table for {n_channels} channels of data",
                rows.len()
            )));
        }
        let table = electrode_rows(&file).map_err(|m| fail(path, m))?;
        let row_of = |r: i64| -> Result<usize, StageError> {
            usize::try_from(r)
                .ok()
                .filter(|&r| r < table.names.len())
                .ok_or_else(|| {
                    at(format!(
                        "`electrodes` points at row {r}, but the electrodes table has {} rows",
                        table.names.len()
                    ))
                })
        };
        let rows: Vec<usize> = rows.into_iter().map(row_of).collect::<Result<_, _>>()?;

        let [events_path, channels_path, electrodes_path, coordsystem_path] =
            candidate_sidecars(path);
        let sidecar = match channels_path.is_file() {
            true => Some(read_channels(&channels_path)?),
            false => None,
        };
        let channels: Vec<_> = rows
            .iter()
            .enumerate()
            .map(|(i, &r)| {
                describe_label(
                    i,
                    &table.names[r],
                    "V",
                    "EEG",
                    sidecar.as_deref(),
                    &mut warnings,
                )
            })
            .collect();
        check_unique(&channels).map_err(|m| fail(path, m))?;
        let channels = keep_chosen(channels, choice.channels.as_deref(), |c| {
            (c.name.clone(), c.name.clone())
        })
        .map_err(|m| fail(path, m))?;
        let (out_rate, samples) = match choice.rate {
            None => (rate, n_times),
            Some(to) => {
                let native: Vec<(&str, f64, usize)> = channels
                    .iter()
                    .map(|c| (c.name.as_str(), rate, n_times))
                    .collect();
                (
                    to,
                    resampled_length(&native, to).map_err(|m| fail(path, m))?,
                )
            }
        };
        let resampled_from = choice.rate.map(|_| vec![n_times; channels.len()]);
        let selection = Selection {
            channels,
            rate: out_rate,
            samples_per_record: n_times,
            resampled_from,
        };
        let length = samples as f64 / out_rate;
        let events = match events {
            None => Vec::new(),
            Some(EventSource::Annotations) => {
                trials(&file, start, length).map_err(|m| fail(path, m))?
            }
            Some(EventSource::Sidecar) => sidecar_events(
                path,
                EventSource::Sidecar,
                &events_path,
                length,
                &mut warnings,
            )?,
        };
        let mut layout = full_layout(
            &selection,
            samples,
            events,
            sidecar.as_deref(),
            [&electrodes_path, &coordsystem_path],
        )?;
        add_table_positions(&mut layout, &selection, &rows, &table, &electrodes_path);
        Ok(Opened {
            path: path.to_path_buf(),
            series: series_path,
            selection,
            from_rate: rate,
            conversion,
            offset,
            channel_conversion,
            layout,
            warnings,
        })
    }

    /// Read the samples in volts (the chosen channels, resampled when `data.rate` asks).
    pub fn read(self) -> Result<LabelledArray, StageError> {
        let at = |m: String| fail(&self.path, format!("/{}: {m}", self.series));
        let file = open_file(&self.path)?;
        let data = file
            .dataset(&format!("{}/data", self.series))
            .map_err(|e| at(e.to_string()))?;
        let raw: Vec<f64> = data
            .read_raw::<f64>()
            .map_err(|e| at(format!("reading `data` failed: {e}")))?;
        let n_channels = self
            .channel_conversion
            .as_ref()
            .map_or_else(|| data.shape().get(1).copied().unwrap_or(1), Vec::len);
        let n_times = raw.len() / n_channels.max(1);
        // [time, channel] in the file → [channel, time], in volts.
        let mut values = Array2::<f32>::zeros((n_channels, n_times));
        for c in 0..n_channels {
            let gain = self.conversion * self.channel_conversion.as_ref().map_or(1.0, |v| v[c]);
            let mut row = values.row_mut(c);
            for (t, v) in row.iter_mut().enumerate() {
                *v = (raw[t * n_channels + c] * gain + self.offset) as f32;
            }
        }
        let values = finish_single_rate(values, &self.selection, self.from_rate, &self.layout)
            .map_err(|m| fail(&self.path, m))?;
        LabelledArray::real(self.layout, values.into_dyn())
    }
}

/// The NWB electrodes table's locations, and its x, y, z when no BIDS electrodes sidecar gave
/// positions, into the layout's metadata.
fn add_table_positions(
    layout: &mut Layout,
    selection: &Selection,
    rows: &[usize],
    table: &ElectrodeRows,
    electrodes_sidecar: &Path,
) {
    if let Some(locations) = &table.locations {
        let by_channel: BTreeMap<&str, &str> = selection
            .channels
            .iter()
            .map(|c| (c.name.as_str(), locations[rows[c.signal]].as_str()))
            .collect();
        layout
            .meta
            .extra
            .insert("locations".into(), serde_json::json!(by_channel));
    }
    let Some(positions) = &table.positions else {
        return;
    };
    if electrodes_sidecar.is_file() {
        return;
    }
    let by_channel: BTreeMap<String, [f64; 3]> = selection
        .channels
        .iter()
        .filter_map(|c| {
            let p = *positions.get(rows[c.signal])?;
            p.iter().all(|v| v.is_finite()).then(|| (c.name.clone(), p))
        })
        .collect();
    if by_channel.is_empty() {
        return;
    }
    layout.meta.positions = Some(Box::new(Positions {
        source: "the NWB electrodes table (x, y, z)".into(),
        units: "as in the file".into(),
        by_channel,
    }));
}

/// The trials table as events (onsets relative to the series' first sample).
fn trials(file: &hdf5::File, start: f64, length: f64) -> Result<Vec<Event>, NwbError> {
    let table = file
        .group("intervals/trials")
        .map_err(|_| NwbError::NoTrials)?;
    let column = |name: &'static str| {
        table
            .dataset(name)
            .map_err(|_| NwbError::NoTrialColumn { column: name })
    };
    let starts = numbers(&column("start_time")?)?;
    let stops = numbers(&column("stop_time")?)?;
    let labels = match LABEL_COLUMNS.iter().find_map(|c| table.dataset(c).ok()) {
        Some(d) => text_column(&d)?,
        None => vec!["trial".to_string(); starts.len()],
    };
    if stops.len() != starts.len() || labels.len() != starts.len() {
        return Err(NwbError::RaggedTrials);
    }
    let mut events = Vec::with_capacity(starts.len());
    for (i, ((&s, &e), label)) in starts.iter().zip(&stops).zip(labels).enumerate() {
        let onset = s - start;
        if !(onset.is_finite() && (0.0..length).contains(&onset)) {
            return Err(NwbError::TrialOutside {
                row: i,
                start_time: s,
                from: start,
                to: start + length,
            });
        }
        events.push(Event {
            onset,
            duration: (e - s).max(0.0),
            label,
        });
    }
    events.sort_by(|a, b| a.onset.total_cmp(&b.onset));
    Ok(events)
}

#[cfg(test)]
mod tests {
    //! Reference checks: files written by pynwb 4.2.0 (tests/reference/gen_nwb.py) read back
    //! by our reader must give the values in volts that pynwb's
    //! `ElectricalSeries.get_data_in_units()` gives (data × conversion × channel_conversion +
    //! offset, the NWB specification's formula), and pynwb's electrode labels, locations,
    //! positions and trial times.
    use super::*;
    use crate::io::{read_chosen, read_chosen_layout};
    use crate::op::Notes;
    use crate::testutil::{fixture_path, max_rel_diff, read_f64, read_json};

    /// f32 storage: relative error at most 2^-24 of the value (IEEE 754 binary32), so at most
    /// 2^-24 of the series' peak.
    const F32_ROUNDING: f64 = 5.97e-8;

    fn check_values(file: &str, series: Option<&str>, npy: &str) -> LabelledArray {
        let path = fixture_path("nwb", file);
        let choice = Choice {
            series: series.map(str::to_string),
            ..Choice::default()
        };
        let mut notes = Notes::default();
        let array = read_chosen(&path, EventSource::Annotations, &choice, &mut notes);
        let array = match array {
            Ok(a) => a,
            // two.nwb has no trials: read its events from nowhere.
            Err(_) => {
                let dir = tempfile::tempdir().unwrap();
                let copy = dir.path().join("x_ieeg.nwb");
                std::fs::copy(&path, &copy).unwrap();
                std::fs::write(
                    dir.path().join("x_events.tsv"),
                    "onset\tduration\ttrial_type\n",
                )
                .unwrap();
                read_chosen(&copy, EventSource::Sidecar, &choice, &mut notes).unwrap()
            }
        };
        let want = read_f64("nwb", npy);
        let got = array.real_values().unwrap();
        assert_eq!(got.shape(), want.shape(), "{file}");
        let peak = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let got: Vec<f64> = got.iter().map(|&v| f64::from(v)).collect();
        let want: Vec<f64> = want.iter().copied().collect();
        // Relative to the series' peak: each value is one f32 rounding of pynwb's f64 value.
        let err = max_rel_diff(&got, &want, peak);
        eprintln!("{file}: largest difference {err:.1e} of the peak");
        assert!(err <= F32_ROUNDING, "{file}: {err:e}");
        array
    }

    #[test]
    fn lfp_series_matches_pynwb() {
        let array = check_values("lfp.nwb", None, "lfp_volts");
        let meta = read_json("nwb", "lfp");
        let layout = &array.layout;
        let labels: Vec<String> = serde_json::from_value(meta["labels"].clone()).unwrap();
        assert_eq!(layout.labels("channel").unwrap(), labels);
        assert_eq!(layout.meta.sampling_rate, meta["rate"].as_f64());
        let time = layout.numbers("time").unwrap();
        assert_eq!(time[3], 3.0 / 1000.0);
        // Trials: onset = start_time − starting_time (the series starts at 0.5 s).
        let start = meta["starting_time"].as_f64().unwrap();
        let events = layout.meta.events.as_ref().unwrap();
        let trials = meta["trials"].as_array().unwrap();
        assert_eq!(events.len(), trials.len());
        for (e, t) in events.iter().zip(trials) {
            let s = t["start_time"].as_f64().unwrap();
            assert!((e.onset - (s - start)).abs() < 1e-12, "{e:?}");
            assert!((e.duration - (t["stop_time"].as_f64().unwrap() - s)).abs() < 1e-12);
            assert_eq!(e.label, t["trial_type"].as_str().unwrap());
        }
        let positions = layout.meta.positions.as_ref().unwrap();
        let want: Vec<[f64; 3]> = serde_json::from_value(meta["positions"].clone()).unwrap();
        for (label, p) in labels.iter().zip(want) {
            assert_eq!(positions.by_channel[label], p);
        }
        let locations: Vec<String> = serde_json::from_value(meta["locations"].clone()).unwrap();
        assert_eq!(
            layout.meta.extra["locations"][&labels[2]],
            serde_json::json!(locations[2])
        );
    }

    #[test]
    fn a_chosen_series_with_channel_conversion_matches_pynwb() {
        check_values("two.nwb", Some("raw"), "two_raw_volts");
        check_values("two.nwb", Some("/acquisition/raw"), "two_raw_volts");
    }

    #[test]
    fn bad_nwb_input_names_the_file_and_field() {
        let cases: Vec<(&str, Option<&str>, &str)> = vec![
            ("none.nwb", None, "holds no ElectricalSeries"),
            (
                "two.nwb",
                None,
                "data.series: the file holds 2 ElectricalSeries (acquisition/hp, acquisition/raw)",
            ),
            (
                "two.nwb",
                Some("lfp"),
                "data.series: the file holds no ElectricalSeries \"lfp\"",
            ),
            (
                "two.nwb",
                Some("hp"),
                "NWB trials table, but the file has none",
            ),
        ];
        for (file, series, needle) in cases {
            let choice = Choice {
                series: series.map(str::to_string),
                ..Choice::default()
            };
            let path = fixture_path("nwb", file);
            let err = read_chosen_layout(&path, EventSource::Annotations, &choice).unwrap_err();
            let err = err.to_string();
            assert!(err.contains(needle) && err.contains(file), "{file}: {err}");
            assert_eq!(err.matches(file).count(), 1, "{err}");
        }
        let two = open_file(&fixture_path("nwb", "two.nwb")).unwrap();
        assert!(matches!(trials(&two, 0.0, 1.0), Err(NwbError::NoTrials)));
        let lfp = open_file(&fixture_path("nwb", "lfp.nwb")).unwrap();
        assert!(matches!(
            trials(&lfp, 1e6, 1.0),
            Err(NwbError::TrialOutside { row: 0, .. })
        ));
        assert_eq!(electrode_rows(&lfp).unwrap().names.len(), 4);
        let not_hdf5 = fixture_path("multirate", "rates.json");
        let dir = tempfile::tempdir().unwrap();
        let copy = dir.path().join("x.nwb");
        std::fs::copy(not_hdf5, &copy).unwrap();
        let err = read_chosen_layout(&copy, EventSource::Annotations, &Choice::default());
        assert!(err
            .unwrap_err()
            .to_string()
            .contains("cannot open it as an HDF5"));
    }
}
