//! `phasewise new`: look at a BIDS-style dataset and write a commented pipeline fitted to it.
//!
//! A scientist should start from their own data, not from a blank file. This module reads only
//! headers and sidecars (never the samples), summarises what it found — recordings, subjects,
//! sampling rates, channels and their types, event labels with their counts, the spacing of
//! events — and derives a starting pipeline from it: one condition per event label, epoch windows
//! that fit between consecutive events, wavelet frequencies below Nyquist whose longest wavelet
//! fits in the epoch's buffer, and a baseline before the event. What it cannot know (the mains
//! frequency of the lab) is written with a `CONFIRM` comment.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Component, Path, PathBuf};

use anyhow::{bail, Context, Result};
use phasewise_stages::io::{
    nwb_series, read_chosen_layout, read_recording_layout_without_events, sidecar_paths, Choice,
    EventSource, Format,
};
use phasewise_stages::ops::morlet;
use phasewise_stages::Layout;

use crate::words::count;

/// Recording patterns tried in order, relative to the dataset folder (BIDS layouts first).
/// BrainVision recordings are found by their header (`.vhdr`), which names the data and marker
/// files.
const PATTERNS: &[&str] = &[
    "sub-*/eeg/*_eeg.edf",
    "sub-*/eeg/*_eeg.bdf",
    "sub-*/eeg/*_eeg.vhdr",
    "sub-*/ses-*/eeg/*_eeg.edf",
    "sub-*/ses-*/eeg/*_eeg.bdf",
    "sub-*/ses-*/eeg/*_eeg.vhdr",
    "sub-*/ieeg/*_ieeg.edf",
    "sub-*/ieeg/*_ieeg.vhdr",
    "sub-*/ses-*/ieeg/*_ieeg.edf",
    "sub-*/ses-*/ieeg/*_ieeg.vhdr",
    "sub-*/ieeg/*_ieeg.nwb",
    "sub-*/ses-*/ieeg/*_ieeg.nwb",
    "sub-*/eeg/*_eeg.nwb",
    "**/*.edf",
    "**/*.bdf",
    "**/*.vhdr",
    "**/*.nwb",
];

/// What the dataset holds, as far as headers and sidecars tell.
#[derive(Debug, Default)]
pub struct DatasetSummary {
    /// The recording pattern that matched, relative to the dataset folder.
    pub pattern: String,
    /// The recordings found.
    pub recordings: Vec<PathBuf>,
    /// Their format (from the pattern's extension).
    pub format: Option<Format>,
    /// Where events come from: `sidecar` when every recording has an events file, else
    /// `annotations` when every recording has its own events (EDF+ annotations, BrainVision
    /// markers) and some hold events; `None` when the dataset has no events the runner can read.
    pub events: Option<EventSource>,
    /// Sampling rates seen, with how many recordings have each (Hz, as text for exact keys).
    pub rates: BTreeMap<String, usize>,
    /// Channel names and types of the first recording.
    pub channels: Vec<(String, String)>,
    /// Recordings whose channel list differs from the first one's.
    pub channel_mismatch: Vec<PathBuf>,
    /// Where the first recording's electrode positions come from, with how many channels have
    /// one (`None`: no positions).
    pub positions: Option<(String, usize)>,
    /// Event labels with their counts over all recordings.
    pub labels: BTreeMap<String, usize>,
    /// Shortest time between consecutive event onsets in any recording (s).
    pub min_interval: Option<f64>,
    /// Median time between consecutive event onsets over all recordings (s).
    pub median_interval: Option<f64>,
    /// Shortest recording (s).
    pub shortest_recording: Option<f64>,
    /// NWB: the `ElectricalSeries` of the first recording (paths in the file).
    pub series: Vec<String>,
    /// What is read of each recording: for NWB files with several series, the first of them
    /// (`data.series`, which the written pipeline asks the user to confirm).
    pub choice: Choice,
    /// The mains frequency the recordings' BIDS sidecars (`<stem>.json`) give as
    /// `PowerLineFrequency`, when those that give one agree.
    pub power_line: Option<f64>,
    /// The dataset's name: `Name` of its BIDS `dataset_description.json`.
    pub name: Option<String>,
}

/// Look at `data_dir` and write a commented pipeline to `out`, or print it on stdout when no
/// file is given (the dataset summary then goes to stderr). An existing file is never
/// overwritten. `quiet` (`-q`) prints only the pipeline when no file is given: no summary, no
/// warning (a missing events source is also marked in the pipeline itself).
pub fn run(data_dir: &Path, out: Option<&Path>, quiet: bool) -> Result<()> {
    let summary = survey(data_dir)?;
    if summary.events.is_none() && !quiet {
        eprintln!("warning: {NO_EVENTS}");
    }
    let Some(out) = out else {
        let here = absolute(Path::new("."))?;
        let data_rel = relative_to(&absolute(data_dir)?, &here);
        if !quiet {
            eprint!("{}", summary_text(&summary));
        }
        print!("{}", pipeline_text(&summary, &data_rel, data_dir)?);
        return Ok(());
    };
    if out.exists() {
        bail!(
            "{} already exists; choose another name with --out (nothing was written)",
            out.display()
        );
    }
    let out_dir = absolute(out.parent().unwrap_or(Path::new(".")))?;
    let data_rel = relative_to(&absolute(data_dir)?, &out_dir);
    let text = pipeline_text(&summary, &data_rel, data_dir)?;
    if !quiet {
        print!("{}", summary_text(&summary));
    }
    std::fs::write(out, text).with_context(|| format!("writing {}", out.display()))?;
    if !quiet {
        println!(
            "\nwrote {}: read it, confirm the lines marked CONFIRM, then `phasewise plan {}`",
            out.display(),
            out.display()
        );
    }
    Ok(())
}

/// Read headers and sidecars of every recording under `data_dir`.
pub fn survey(data_dir: &Path) -> Result<DatasetSummary> {
    if !data_dir.is_dir() {
        bail!("{}: no such folder", data_dir.display());
    }
    let mut summary = DatasetSummary::default();
    for pattern in PATTERNS {
        let full = crate::sources::glob_under(data_dir, pattern);
        let found: Vec<PathBuf> = glob::glob(&full)
            .with_context(|| format!("bad pattern {pattern}"))?
            .filter_map(|p| p.ok())
            .collect();
        if !found.is_empty() {
            summary.pattern = (*pattern).to_string();
            summary.format = Some(Format::of(&found[0])?);
            if summary.format == Some(Format::Nwb) {
                summary.series = nwb_series(&found[0]).map_err(anyhow::Error::new)?;
                if summary.series.len() > 1 {
                    summary.choice.series = summary.series.first().cloned();
                }
            }
            summary.recordings = found;
            break;
        }
    }
    if summary.recordings.is_empty() {
        bail!(
            "{}: no EDF, BDF, BrainVision (.vhdr) or NWB recordings found (looked for {})",
            data_dir.display(),
            PATTERNS.join(", ")
        );
    }
    summary.events = event_source(&summary.recordings, &summary.choice);
    let mut intervals = Vec::new();
    for path in summary.recordings.clone() {
        let layout = match summary.events {
            Some(source) => read_chosen_layout(&path, source, &summary.choice),
            None => read_recording_layout_without_events(&path, &summary.choice),
        };
        // The reader's messages name the file already.
        let layout = layout.map_err(anyhow::Error::new)?;
        add_recording(&mut summary, &path, &layout, &mut intervals);
    }
    intervals.sort_by(f64::total_cmp);
    summary.min_interval = intervals.first().copied();
    summary.median_interval = intervals.get(intervals.len() / 2).copied();
    summary.power_line = power_line(&summary.recordings);
    summary.name = json_field(&data_dir.join("dataset_description.json"), "Name")
        .and_then(|v| v.as_str().map(str::to_string))
        .filter(|n| !n.trim().is_empty());
    Ok(summary)
}

/// A field of a JSON file, if the file exists, parses and has it.
fn json_field(path: &Path, field: &str) -> Option<serde_json::Value> {
    let text = std::fs::read(path).ok()?;
    let value: serde_json::Value = serde_json::from_slice(&text).ok()?;
    value.get(field).cloned()
}

/// The recordings' `PowerLineFrequency` (BIDS: the recording's `.json` sidecar, same stem), when
/// at least one sidecar gives it and all that give it agree.
fn power_line(recordings: &[PathBuf]) -> Option<f64> {
    let mut found: Option<f64> = None;
    for path in recordings {
        let Some(f) = json_field(&path.with_extension("json"), "PowerLineFrequency")
            .and_then(|v| v.as_f64())
            .filter(|f| f.is_finite() && *f > 0.0)
        else {
            continue;
        };
        match found {
            Some(g) if g != f => return None,
            _ => found = Some(f),
        }
    }
    found
}

/// What `new` says, on stderr and in the written file, when the dataset has no events.
pub const NO_EVENTS: &str = "no events found: no recording has an events sidecar \
(`<recording stem>_events.tsv` with columns onset, duration, trial_type, in seconds) and the files \
hold no EDF+ annotations. Add an events sidecar beside every recording (the pipeline reads them \
with `events: sidecar`), or use EDF+/BDF+ files whose annotations mark the events and set \
`events: annotations`; then list the conditions in the epoch stage";

/// Where the events of every recording can be read from, if anywhere: a sidecar beside every
/// recording, else annotations in every file with at least one event among them.
fn event_source(recordings: &[PathBuf], choice: &Choice) -> Option<EventSource> {
    let has_sidecar = |p: &PathBuf| {
        sidecar_paths(p)
            .iter()
            .any(|s| s.to_string_lossy().ends_with("_events.tsv"))
    };
    if recordings.iter().all(has_sidecar) {
        return Some(EventSource::Sidecar);
    }
    let mut any_event = false;
    for path in recordings {
        match read_chosen_layout(path, EventSource::Annotations, choice) {
            Ok(layout) => any_event |= layout.meta.events.iter().flatten().next().is_some(),
            Err(_) => return None,
        }
    }
    any_event.then_some(EventSource::Annotations)
}

fn add_recording(s: &mut DatasetSummary, path: &Path, layout: &Layout, intervals: &mut Vec<f64>) {
    let rate = layout.meta.sampling_rate.unwrap_or(f64::NAN);
    *s.rates.entry(format!("{rate}")).or_default() += 1;
    let names = layout
        .labels("channel")
        .map(<[String]>::to_vec)
        .unwrap_or_default();
    let types = layout.meta.channel_types.clone().unwrap_or_default();
    let channels: Vec<(String, String)> = names
        .into_iter()
        .enumerate()
        .map(|(i, n)| (n, types.get(i).cloned().unwrap_or_else(|| "EEG".into())))
        .collect();
    if s.channels.is_empty() {
        s.channels = channels;
        s.positions = layout
            .meta
            .positions
            .as_ref()
            .map(|p| (p.source.clone(), p.by_channel.len()));
    } else if s.channels != channels {
        s.channel_mismatch.push(path.to_path_buf());
    }
    if let Ok(time) = layout.numbers("time") {
        let duration = time.len() as f64 / rate;
        s.shortest_recording = Some(s.shortest_recording.map_or(duration, |d| d.min(duration)));
    }
    let mut onsets: Vec<f64> = Vec::new();
    for event in layout.meta.events.iter().flatten() {
        *s.labels.entry(event.label.clone()).or_default() += 1;
        onsets.push(event.onset);
    }
    onsets.sort_by(f64::total_cmp);
    intervals.extend(onsets.windows(2).map(|w| w[1] - w[0]).filter(|d| *d > 0.0));
}

/// The dataset summary printed to the user.
pub fn summary_text(s: &DatasetSummary) -> String {
    let mut t = String::new();
    let format = match s.format {
        Some(Format::BrainVision) => {
            "BrainVision: .vhdr headers with their .vmrk markers and binary data files".into()
        }
        Some(Format::Nwb) => format!(
            "NWB: the ElectricalSeries {} with its electrodes table",
            s.choice
                .series
                .as_deref()
                .or(s.series.first().map(String::as_str))
                .unwrap_or("?")
        ),
        _ => "EDF/BDF".to_string(),
    };
    let _ = writeln!(
        t,
        "recordings: {} (pattern {}, {format})",
        s.recordings.len(),
        s.pattern
    );
    let rates: Vec<String> = s
        .rates
        .iter()
        .map(|(r, n)| format!("{r} Hz × {n}"))
        .collect();
    let _ = writeln!(t, "sampling rates: {}", rates.join(", "));
    let mut by_type: BTreeMap<&str, Vec<&str>> = BTreeMap::new();
    for (name, kind) in &s.channels {
        by_type.entry(kind).or_default().push(name);
    }
    for (kind, names) in &by_type {
        let _ = writeln!(t, "channels ({kind}, {}): {}", names.len(), names.join(" "));
    }
    let _ = match &s.positions {
        Some((source, n)) => writeln!(t, "electrode positions: {n} channels, from {source}"),
        None => writeln!(
            t,
            "electrode positions: none (no *_electrodes.tsv and no standard 10-20 labels); \
             laplacian and interpolate need them"
        ),
    };
    if s.series.len() > 1 {
        let _ = writeln!(
            t,
            "note: the first recording holds {} ElectricalSeries ({}); the pipeline reads the first (data.series: CONFIRM)",
            s.series.len(),
            s.series.join(", ")
        );
    }
    for path in &s.channel_mismatch {
        let _ = writeln!(
            t,
            "note: {} has other channels than the first recording",
            path.display()
        );
    }
    let source = match (s.events, s.format) {
        (Some(EventSource::Sidecar), _) => "events.tsv sidecars",
        (Some(EventSource::Annotations), Some(Format::BrainVision)) => "BrainVision markers",
        (Some(EventSource::Annotations), Some(Format::Nwb)) => "the NWB trials table",
        (Some(EventSource::Annotations), _) => "EDF+ annotations",
        (None, _) => {
            let _ = writeln!(t, "events: none found");
            return t;
        }
    };
    let _ = writeln!(t, "events (from {source}):");
    for (label, n) in &s.labels {
        let _ = writeln!(t, "  {label}: {n}");
    }
    if let (Some(min), Some(median)) = (s.min_interval, s.median_interval) {
        let _ = writeln!(
            t,
            "time between events: shortest {min:.3} s, median {median:.3} s"
        );
    }
    t
}

/// Epoch and analysis windows derived from the event spacing and sampling rate.
#[derive(Debug, Clone, PartialEq)]
pub struct Windows {
    /// Epoch window [t0, t1] in s, buffer included.
    pub epoch: [f64; 2],
    /// Lowest and highest wavelet frequency in Hz.
    pub freqs: [f64; 2],
    /// Wavelet cycles at the lowest and highest frequency.
    pub cycles: [f64; 2],
    /// The part kept after convolution.
    pub crop: [f64; 2],
    /// Baseline window, when the crop leaves room before the event.
    pub baseline: Option<[f64; 2]>,
}

/// Round down (towards zero) to a multiple of 0.05 s, so windows are readable numbers.
fn tidy(x: f64) -> f64 {
    // The small nudge keeps -0.5 + 0.4 (= -0.0999…) at -0.1 instead of dropping to -0.05.
    (x / 0.05 + 1e-9 * x.signum()).trunc() * 0.05
}

/// Fit windows to the data. The epoch spans 40 % of the shortest inter-event interval before the
/// event and 60 % after it (capped at 1 s and 1.5 s), so consecutive epochs overlap little. The
/// buffer at each end must hold half a wavelet at the lowest frequency; we count a Gaussian's
/// width as 3σ (σ = n / (2π f), DESIGN §4), beyond which its weight is below 1.2 % of the peak.
pub fn fit_windows(min_interval: f64, rate: f64) -> Windows {
    let pre = tidy((0.4 * min_interval).min(1.0));
    let post = tidy((0.6 * min_interval).min(1.5));
    let cycles = [3.0, 8.0];
    let high = (0.4 * rate).min(40.0).floor();
    // Leave at least 0.2 s of analysed data on each side of the event.
    let room = (pre.min(post) - 0.2).max(0.05);
    let mut low = (3.0 * cycles[0] / (2.0 * std::f64::consts::PI * room))
        .max(3.0)
        .ceil();
    if low >= high {
        low = (high / 2.0).floor().max(1.0);
    }
    let buffer = 3.0 * morlet::sigma(low, cycles[0]);
    let crop = [-tidy(pre - buffer), tidy(post - buffer)];
    // The cropped time axis starts at its first sample (times are k / rate, DESIGN §4), which
    // can lie after `crop[0]`; the baseline starts there or later, on the 0.05 s grid.
    let first = (crop[0] * rate - 1e-9).ceil() / rate;
    let start = -tidy(-first);
    let baseline = (start < -0.15).then(|| [start, tidy(start + (-0.1 - start).min(0.4))]);
    Windows {
        epoch: [-pre, post],
        freqs: [low, high],
        cycles,
        crop,
        baseline,
    }
}

/// A YAML-safe condition name for an event label.
fn condition_name(label: &str) -> String {
    let name: String = label
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect();
    if name.is_empty() {
        "condition".into()
    } else {
        name
    }
}

/// YAML double-quoted string.
fn quoted(s: &str) -> String {
    serde_json::to_string(s).unwrap_or_else(|_| format!("\"{s}\""))
}

/// The commented pipeline text.
pub fn pipeline_text(s: &DatasetSummary, data_rel: &Path, data_dir: &Path) -> Result<String> {
    let rate: f64 = s
        .rates
        .iter()
        .max_by_key(|(_, n)| **n)
        .and_then(|(r, _)| r.parse().ok())
        .context("no sampling rate found")?;
    let min_interval = s.min_interval.unwrap_or(4.0);
    let w = fit_windows(min_interval, rate);
    let folder = data_dir
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "study".into());
    let name = s.name.clone().unwrap_or_else(|| folder.clone());
    let has_eeg = s
        .channels
        .iter()
        .any(|(_, t)| t.eq_ignore_ascii_case("EEG"));
    let events = match s.events {
        Some(EventSource::Annotations) => "annotations",
        _ => "sidecar",
    };
    // The folder is escaped, so that a dataset under `study [pilot]/` is matched literally.
    let recordings = crate::sources::glob_under(data_rel, &s.pattern);
    let mut t = String::new();
    let _ = writeln!(
        t,
        "# phasewise pipeline written by `phasewise new` for {}",
        data_dir.display()
    );
    let _ = writeln!(
        t,
        "# {} at {rate} Hz. Read every comment; confirm the lines marked CONFIRM.",
        count(s.recordings.len(), "recording", "recordings")
    );
    let _ = writeln!(
        t,
        "# Research software: results are not a clinical measurement."
    );
    if s.events.is_none() {
        let _ = writeln!(
            t,
            "#\n{}",
            comment_lines(&format!("ADD EVENTS before running: {NO_EVENTS}"))
        );
    }
    let _ = writeln!(t);
    let _ = writeln!(t, "name: {}", quoted(&name));
    let _ = writeln!(t, "data:");
    let _ = writeln!(
        t,
        "  recordings: {}   # relative to this file",
        quoted(&recordings)
    );
    let _ = writeln!(t, "  events: {events}   # sidecar = *_events.tsv beside each recording; annotations = the recording's own (EDF+ annotations, BrainVision markers, NWB trials)");
    if let Some(series) = &s.choice.series {
        let _ = writeln!(
            t,
            "  series: {}   # CONFIRM: the NWB ElectricalSeries to read; the files hold {}",
            quoted(series),
            s.series.join(", ")
        );
    }
    let _ = writeln!(
        t,
        "output: results/{}   # relative to this file\n",
        condition_name(&folder)
    );
    let _ = writeln!(t, "stages:");
    let _ = writeln!(t, "  reref:");
    let _ = writeln!(t, "    op: re-reference");
    let _ = writeln!(t, "    input: recordings");
    let _ = writeln!(
        t,
        "    # average of the data channels (EOG and other non-data channels pass through); add `exclude: [..]` for bad channels"
    );
    if !has_eeg {
        let _ = writeln!(t, "    # CONFIRM: these are not scalp EEG channels; for intracranial contacts a bipolar reference between neighbours (`method: bipolar`) is common practice");
    }
    let _ = writeln!(t, "    params: {{ method: average }}");
    let harmonics = rate / 2.0 > 100.0;
    let _ = writeln!(t, "  line:");
    let _ = writeln!(t, "    op: notch");
    let _ = writeln!(t, "    input: reref");
    let mains = match s.power_line {
        Some(f) => {
            let _ = writeln!(
                t,
                "    # the mains frequency the recordings' sidecars give (PowerLineFrequency)"
            );
            f
        }
        None => {
            let _ = writeln!(t, "    # CONFIRM the mains frequency: 50 Hz in Europe, Asia, Africa and Australia, 60 Hz in the Americas");
            50.0
        }
    };
    let _ = writeln!(
        t,
        "    params: {{ freqs: [{mains}], harmonics: {harmonics}, q: 30 }}"
    );
    let _ = writeln!(t, "  trials:");
    let _ = writeln!(t, "    op: epoch");
    let _ = writeln!(t, "    input: line");
    let _ = writeln!(t, "    params:");
    let _ = writeln!(t, "      # one condition per event label found; merge labels into one condition by listing them together");
    if s.labels.is_empty() {
        let _ = writeln!(
            t,
            "      # ADD one condition per event label once the events exist, e.g. `target: [target]`"
        );
        let _ = writeln!(t, "      conditions: {{}}");
    } else {
        let _ = writeln!(t, "      conditions:");
    }
    for (label, n) in &s.labels {
        let _ = writeln!(
            t,
            "        {}: [{}]   # {}",
            quoted(&condition_name(label)),
            quoted(label),
            count(*n, "event", "events")
        );
    }
    let (fewest, most) = (s.labels.values().min(), s.labels.values().max());
    if let (Some(&fewest), Some(&most)) = (fewest, most) {
        if most > fewest {
            let _ = writeln!(t, "      # the labels have {fewest} to {most} events: plv, wpli and icoh depend on the trial count, so conditions of");
            let _ = writeln!(t, "      # different counts are not comparable with them; keep the same number per condition (drawn at random, reproducibly):");
            let _ = writeln!(t, "      equalize: {{ seed: 1 }}");
        }
    }
    let _ = writeln!(t, "      # seconds around each event, buffer included; the shortest time between events is {min_interval:.2} s");
    let _ = writeln!(t, "      window: [{:.2}, {:.2}]", w.epoch[0], w.epoch[1]);
    if has_eeg {
        let _ = writeln!(t, "      # volts; about 100-150 µV is common practice for scalp EEG (not for intracranial data)");
        let _ = writeln!(t, "      reject: {{ peak_to_peak: 150e-6 }}");
    }
    let _ = writeln!(t, "  tf:");
    let _ = writeln!(t, "    op: wavelet");
    let _ = writeln!(t, "    input: trials");
    let _ = writeln!(t, "    params:");
    let _ = writeln!(t, "      # log-spaced up to {:.0} Hz (Nyquist is {:.0} Hz); the lowest frequency is the lowest whose wavelet fits the buffer", w.freqs[1], rate / 2.0);
    let _ = writeln!(
        t,
        "      freqs: {{ from: {}, to: {}, count: 20, spacing: log }}",
        w.freqs[0], w.freqs[1]
    );
    let _ = writeln!(t, "      cycles: {{ from: {}, to: {} }}   # fewer cycles: sharper in time, blurrier in frequency", w.cycles[0], w.cycles[1]);
    let _ = writeln!(
        t,
        "      crop: [{:.2}, {:.2}]   # drop the buffer after convolution",
        w.crop[0], w.crop[1]
    );
    let _ = writeln!(t, "  sync:");
    let _ = writeln!(t, "    op: clustering");
    let _ = writeln!(t, "    input: tf");
    let _ = writeln!(t, "    # ppc is unbiased by trial count; wpli and icoh ignore zero-lag (volume-conducted) coupling");
    let _ = writeln!(
        t,
        "    params: {{ measure: [plv, ppc, wpli, icoh], pairs: all, across: trials }}"
    );
    let last = match w.baseline {
        Some(b) => {
            let _ = writeln!(t, "  norm:");
            let _ = writeln!(t, "    op: baseline");
            let _ = writeln!(t, "    input: sync");
            let _ = writeln!(
                t,
                "    params: {{ window: [{:.2}, {:.2}], mode: subtract }}",
                b[0], b[1]
            );
            "norm"
        }
        None => {
            let _ = writeln!(
                t,
                "  # no baseline: the crop leaves no room before the event"
            );
            "sync"
        }
    };
    let _ = writeln!(t, "  group:");
    let _ = writeln!(t, "    op: aggregate");
    let _ = writeln!(t, "    input: {last}");
    let _ = writeln!(t, "    params:");
    let _ = writeln!(t, "      over: subjects");
    let bands = [
        ("theta", 4.0, 8.0),
        ("alpha", 8.0, 12.0),
        ("beta", 13.0, 30.0),
    ];
    let kept: Vec<String> = bands
        .iter()
        .filter(|(_, lo, hi)| *lo >= w.freqs[0] && *hi <= w.freqs[1])
        .map(|(n, lo, hi)| format!("{n}: [{lo}, {hi}]"))
        .collect();
    let bands_text = if kept.is_empty() {
        format!("all: [{}, {}]", w.freqs[0], w.freqs[1])
    } else {
        kept.join(", ")
    };
    let _ = writeln!(t, "      bands: {{ {bands_text} }}");
    let mid = tidy(w.crop[1] / 2.0);
    let _ = writeln!(
        t,
        "      windows: {{ early: [0.0, {mid:.2}], late: [{mid:.2}, {:.2}] }}",
        w.crop[1]
    );
    let _ = writeln!(t, "    export: true");
    Ok(t)
}

/// `text` as YAML comment lines of at most about 90 characters.
fn comment_lines(text: &str) -> String {
    let mut out = String::from("#");
    let mut width = 1;
    for word in text.split_whitespace() {
        if width + 1 + word.len() > 90 {
            out.push_str("\n#  ");
            width = 3;
        }
        out.push(' ');
        out.push_str(word);
        width += 1 + word.len();
    }
    out
}

fn absolute(p: &Path) -> Result<PathBuf> {
    let p = if p.as_os_str().is_empty() {
        Path::new(".")
    } else {
        p
    };
    p.canonicalize()
        .with_context(|| format!("{}: cannot resolve", p.display()))
}

/// `target` expressed relative to the folder `base` (both absolute).
fn relative_to(target: &Path, base: &Path) -> PathBuf {
    let t: Vec<Component> = target.components().collect();
    let b: Vec<Component> = base.components().collect();
    let common = t.iter().zip(&b).take_while(|(x, y)| x == y).count();
    let mut rel = PathBuf::new();
    for _ in common..b.len() {
        rel.push("..");
    }
    for c in &t[common..] {
        rel.push(c);
    }
    if rel.as_os_str().is_empty() {
        rel.push(".");
    }
    rel
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_paths() {
        assert_eq!(
            relative_to(Path::new("/a/b/data"), Path::new("/a/b")),
            PathBuf::from("data")
        );
        assert_eq!(
            relative_to(Path::new("/a/data"), Path::new("/a/b/c")),
            PathBuf::from("../../data")
        );
        assert_eq!(
            relative_to(Path::new("/a"), Path::new("/a")),
            PathBuf::from(".")
        );
    }

    #[test]
    fn windows_fit_the_event_spacing() {
        // Events 2.5 s apart at 250 Hz: epoch [-1.0, 1.5], wavelets below 0.4·fs = 100 → 40 Hz.
        let w = fit_windows(2.5, 250.0);
        assert_eq!(w.epoch, [-1.0, 1.5]);
        assert_eq!(w.freqs[1], 40.0);
        // The buffer left by the crop holds 3σ of the lowest-frequency wavelet.
        let sigma = morlet::sigma(w.freqs[0], w.cycles[0]);
        assert!(w.crop[0] - w.epoch[0] >= 3.0 * sigma - 1e-9, "{w:?}");
        assert!(w.epoch[1] - w.crop[1] >= 3.0 * sigma - 1e-9, "{w:?}");
        let b = w.baseline.expect("room for a baseline");
        assert!(
            b[0] >= w.crop[0] && b[1] <= -0.1 + 1e-9 && b[0] < b[1],
            "{b:?}"
        );
        assert_eq!(b[0], w.crop[0]); // -0.6 s is a sample at 250 Hz
                                     // At 128 Hz a crop from -0.3 s starts at sample -38/128 = -0.296875 s (times k/fs): the
                                     // baseline starts after it, at -0.25 s.
        let w = fit_windows(2.0, 128.0);
        assert!((w.crop[0] + 0.3).abs() < 1e-12, "{w:?}");
        assert_eq!(w.baseline, Some([-0.25, -0.1]), "{w:?}");
    }

    #[test]
    fn condition_names_are_yaml_safe() {
        assert_eq!(condition_name("cue left"), "cue_left");
        assert_eq!(condition_name("cue-a"), "cue-a");
        assert_eq!(condition_name(""), "condition");
    }
}
