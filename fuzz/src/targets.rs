//! The three fuzz targets and their seed corpora.
//!
//! - `edf`: the bytes are a recording; [`read_recording_layout`] and [`read_recording`] read it
//!   with `events: annotations`. Seeds: files written by pyEDFlib (the reference fixtures:
//!   EDF, EDF+, BDF, BDF+) and one by our EDF+ writer.
//! - `tsv`: the bytes are an `_events.tsv` (even executions) or a `_channels.tsv` (odd ones)
//!   beside a good recording, read with `events: sidecar`. Seeds: sidecars as the EEG-BIDS
//!   specification lays them out (Pernet et al. 2019), with `n/a` cells.
//! - `pipeline`: the bytes are a pipeline file, loaded and resolved against the op registry by
//!   the runner's [`phasewise::pipeline::load`] and, when that succeeds, opened as a study
//!   ([`phasewise::session::open`]: layouts checked on a small study's headers); text after a 0x1E byte is split into `--set`
//!   arguments, one per line. Seeds: the bad-input corpus's pipelines and the base pipeline.
//!
//! Every target returns normally for any input: errors are the expected answer to bad input,
//! only a panic (or a hang) is a finding.

use std::fs;
use std::path::{Path, PathBuf};

use phasewise_stages::array::Event;
use phasewise_stages::io::edf::{write_edf_plus, EdfWriteSpec, SignalSpec};
use phasewise_stages::io::{read_recording, read_recording_layout, EventSource};
use phasewise_stages::Notes;

use crate::rng::Rng;
use phasewise::session::{self, Env, Options};
use phasewise::sources::RecordingReader;

/// A fuzz target: a name, its seeds and the function that feeds it one input.
pub struct Target {
    /// The name on the command line.
    pub name: &'static str,
    /// Builds the seed corpus; `scratch` is a folder the target may use.
    pub seeds: fn(scratch: &Path) -> Vec<Vec<u8>>,
    /// Feeds one input; `exec` is the execution number.
    pub run: fn(scratch: &Path, input: &[u8], exec: u64),
    /// A mutation that knows the format, applied to about half the inputs.
    pub aware: Option<fn(&mut Rng, &mut [u8])>,
}

/// All targets.
pub const TARGETS: [Target; 3] = [
    Target {
        name: "edf",
        seeds: edf_seeds,
        run: run_edf,
        aware: Some(edf_field),
    },
    Target {
        name: "tsv",
        seeds: tsv_seeds,
        run: run_tsv,
        aware: None,
    },
    Target {
        name: "pipeline",
        seeds: pipeline_seeds,
        run: run_pipeline,
        aware: None,
    },
];

/// The repository root (this crate lives in `fuzz/`).
fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

const RECORDING: &str = "sub-01_task-fuzz_eeg.edf";
const EVENTS: &str = "sub-01_task-fuzz_events.tsv";
const CHANNELS: &str = "sub-01_task-fuzz_channels.tsv";

fn edf_seeds(scratch: &Path) -> Vec<Vec<u8>> {
    let fixtures = repo().join("tests/reference/fixtures/edf");
    let mut seeds: Vec<Vec<u8>> = ["plain.edf", "plus.edf", "bio.bdf", "bioplus.bdf"]
        .iter()
        .filter_map(|f| fs::read(fixtures.join(f)).ok())
        .collect();
    let own = scratch.join("seed.edf");
    write_edf_plus(&own, &small_spec()).expect("the EDF+ writer works on the seed spec");
    seeds.push(fs::read(&own).expect("read seed"));
    seeds
}

/// Three channels, 4 records of 1 s at 32 Hz, two annotations.
fn small_spec() -> EdfWriteSpec {
    let signal = |label: &str, k: f64| SignalSpec {
        label: label.into(),
        unit: "uV".into(),
        samples: (0..128).map(|i| (f64::from(i) * k).sin() * 20.0).collect(),
    };
    EdfWriteSpec {
        patient: "X X X X".into(),
        recording: "Startdate X X X X".into(),
        start_date: "01.01.26".into(),
        start_time: "00.00.00".into(),
        record_seconds: 1.0,
        sampling_rate: 32.0,
        signals: vec![
            signal("EEG Fz", 0.3),
            signal("EEG Cz", 0.5),
            signal("EOG left", 0.1),
        ],
        annotations: vec![
            Event {
                onset: 1.0,
                duration: 0.0,
                label: "cue-a".into(),
            },
            Event {
                onset: 2.5,
                duration: 0.5,
                label: "cue-b".into(),
            },
        ],
    }
}

/// Widths of the per-signal header fields, stored field by field over all signals
/// (Kemp et al. 1992).
const SIGNAL_WIDTHS: [usize; 10] = [16, 80, 8, 8, 8, 8, 8, 80, 8, 32];

/// Numbers that probe the header's checks: signs, zero, the 16- and 24-bit limits, overflow.
const FIELD_VALUES: [&str; 16] = [
    "-1", "0", "1", "-32768", "32767", "-8388608", "8388607", "99999999", "-9999999", "1e300",
    "nan", "inf", "0.000001", "2", "256", "x",
];

/// Write a probing number, space padded, into a random numeric header field: the number of
/// records, record duration, number of signals, header size, or a signal's ranges or samples
/// per record.
fn edf_field(rng: &mut Rng, data: &mut [u8]) {
    let signals = std::str::from_utf8(data.get(252..256).unwrap_or_default())
        .ok()
        .and_then(|t| t.trim().parse::<usize>().ok())
        .filter(|&n| (1..=64).contains(&n))
        .unwrap_or(1);
    let (start, width) = match rng.below(5) {
        0 => (236, 8),
        1 => (244, 8),
        2 => (252, 4),
        3 => (184, 8),
        _ => {
            // Fields 3..=6 (physical/digital min/max) and 8 (samples per record).
            let field = *rng.pick(&[3usize, 4, 5, 6, 8]);
            let before: usize = SIGNAL_WIDTHS[..field].iter().sum::<usize>() * signals;
            let signal = rng.below(signals);
            (
                256 + before + signal * SIGNAL_WIDTHS[field],
                SIGNAL_WIDTHS[field],
            )
        }
    };
    let text = rng.pick(&FIELD_VALUES).as_bytes();
    if let Some(slot) = data.get_mut(start..start + width) {
        slot.fill(b' ');
        let n = text.len().min(width);
        slot[..n].copy_from_slice(&text[..n]);
    }
}

fn run_edf(scratch: &Path, input: &[u8], _exec: u64) {
    let path = scratch.join(RECORDING);
    fs::write(&path, input).expect("scratch is writable");
    let _ = read_recording_layout(&path, EventSource::Annotations);
    let _ = read_recording(&path, EventSource::Annotations, &mut Notes::default());
}

fn tsv_seeds(scratch: &Path) -> Vec<Vec<u8>> {
    let good = scratch.join("good");
    fs::create_dir_all(&good).expect("scratch is writable");
    write_edf_plus(&good.join(RECORDING), &small_spec()).expect("seed recording");
    [
        "onset\tduration\ttrial_type\n1.0\t0\tcue-a\n2.5\t0.5\tcue-b\n3\tn/a\tn/a\n",
        "onset\tduration\ttrial_type\tresponse_time\n0.5\t0\tcue-a\t0.31\n1.5\t0\tcue-b\tn/a\n",
        "name\ttype\tunits\nFz\tEEG\tuV\nCz\tEEG\tuV\nleft\tEOG\tuV\n",
        "name\ttype\tunits\tstatus\nEEG Fz\tEEG\tuV\tgood\nEEG Cz\tMISC\tn/a\tbad\n",
    ]
    .iter()
    .map(|s| s.as_bytes().to_vec())
    .collect()
}

fn run_tsv(scratch: &Path, input: &[u8], exec: u64) {
    let good = scratch.join("good");
    let dir = scratch.join("tsv");
    let _ = fs::remove_dir_all(&dir);
    fs::create_dir_all(&dir).expect("scratch is writable");
    fs::copy(good.join(RECORDING), dir.join(RECORDING)).expect("copy recording");
    let (fuzzed, other, other_text) = if exec.is_multiple_of(2) {
        (EVENTS, CHANNELS, "name\ttype\tunits\nFz\tEEG\tuV\n")
    } else {
        (
            CHANNELS,
            EVENTS,
            "onset\tduration\ttrial_type\n1\t0\tcue-a\n",
        )
    };
    fs::write(dir.join(fuzzed), input).expect("write sidecar");
    fs::write(dir.join(other), other_text).expect("write sidecar");
    let path = dir.join(RECORDING);
    let _ = read_recording_layout(&path, EventSource::Sidecar);
    let _ = read_recording(&path, EventSource::Sidecar, &mut Notes::default());
}

fn pipeline_seeds(scratch: &Path) -> Vec<Vec<u8>> {
    write_study(scratch);
    let corpus = repo().join("tests/bad-inputs");
    let mut seeds = vec![fs::read(corpus.join("base.yaml")).expect("base pipeline")];
    let mut cases: Vec<PathBuf> = fs::read_dir(&corpus)
        .map(|d| {
            d.flatten()
                .map(|e| e.path().join("pipeline.yaml"))
                .collect()
        })
        .unwrap_or_default();
    cases.sort();
    seeds.extend(cases.iter().filter_map(|p| fs::read(p).ok()));
    let with_set = [
        seeds[0].clone(),
        b"\x1etf.cycles=6\nline.q=[1, 2]\n".to_vec(),
    ]
    .concat();
    seeds.push(with_set);
    seeds
}

fn run_pipeline(scratch: &Path, input: &[u8], _exec: u64) {
    let (yaml, sets) = match input.iter().position(|&b| b == 0x1E) {
        Some(i) => (&input[..i], &input[i + 1..]),
        None => (input, &[][..]),
    };
    let overrides: Vec<String> = String::from_utf8_lossy(sets)
        .lines()
        .map(str::to_string)
        .collect();
    let path = scratch.join("pipeline.yaml");
    fs::write(&path, yaml).expect("scratch is writable");
    let ops = phasewise_stages::registry::all();
    if phasewise::pipeline::load(&path, &overrides, &ops).is_err() {
        return;
    }
    // A pipeline that loads goes on to the layout check against the study's headers, where
    // data-dependent params (Nyquist, windows, crops) are validated.
    let options = Options {
        overrides,
        cache: Some(scratch.join("cache")),
        ..Options::default()
    };
    let env = Env {
        ops: &ops,
        reader: &RecordingReader,
    };
    let _ = session::open(&path, &options, env);
}

/// A study the base pipeline fits: one subject, 4 EEG channels, 128 Hz, 24 s, a cue every 2 s,
/// in `data/` as the base pipeline's glob expects.
fn write_study(scratch: &Path) {
    let eeg = scratch.join("data/sub-01/eeg");
    fs::create_dir_all(&eeg).expect("scratch is writable");
    let signal = |label: &str, k: f64| SignalSpec {
        label: label.into(),
        unit: "uV".into(),
        samples: (0..128 * 24)
            .map(|i| (f64::from(i) * k).sin() * 20.0)
            .collect(),
    };
    let spec = EdfWriteSpec {
        sampling_rate: 128.0,
        signals: ["EEG Fz", "EEG Cz", "EEG Pz", "EEG Oz"]
            .iter()
            .zip([0.3, 0.5, 0.7, 0.9])
            .map(|(l, k)| signal(l, k))
            .collect(),
        annotations: Vec::new(),
        ..small_spec()
    };
    write_edf_plus(&eeg.join("sub-01_task-cue_eeg.edf"), &spec).expect("study recording");
    let mut events = String::from("onset\tduration\ttrial_type\n");
    for k in 1..=10 {
        let label = if k % 2 == 0 { "cue-b" } else { "cue-a" };
        events.push_str(&format!("{}\t0\t{label}\n", 2 * k));
    }
    fs::write(eeg.join("sub-01_task-cue_events.tsv"), events).expect("study events");
}
