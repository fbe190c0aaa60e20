//! Shared harness of the reliability tests (`bad_inputs`, `interrupt`, `damage`, `concurrent`):
//! a tiny, deterministic study written with the stages crate's EDF+ writer, the small pipeline
//! that runs on it, and helpers to run the real `phasewise` binary and read what it left behind.
//!
//! A module of the one test binary (`tests/it/main.rs`); not every test module uses every
//! helper, hence the `dead_code` allowance below.
#![allow(dead_code)]

pub mod brainvision;

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use phasewise_stages::array::Event;
use phasewise_stages::io::edf::{write_edf_plus, EdfWriteSpec, SignalSpec};

/// The CLI binary cargo built for these tests.
pub fn bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_phasewise"))
}

/// Text that only a panic (or a request for a backtrace) prints.
pub const PANIC_MARKERS: [&str; 2] = ["panicked", "RUST_BACKTRACE"];

/// The EEG channels of the tiny study: 10-20 labels (common practice in scalp EEG).
pub const CHANNELS: [&str; 4] = ["Fz", "Cz", "Pz", "Oz"];

/// Size of a tiny study. Each subject gets one recording, its events and channels sidecars.
#[derive(Clone, Debug)]
pub struct StudySpec {
    /// Sampling rate of each subject's recording, in Hz (one entry per subject).
    pub rates: Vec<f64>,
    /// Length of each recording in seconds (a whole number of 1-s data records).
    pub seconds: usize,
}

impl Default for StudySpec {
    fn default() -> Self {
        StudySpec {
            rates: vec![128.0, 128.0],
            seconds: 24,
        }
    }
}

/// The BIDS-style stem of subject `n` (1-based): `sub-01/eeg/sub-01_task-cue`.
pub fn subject_stem(n: usize) -> String {
    format!("sub-{n:02}/eeg/sub-{n:02}_task-cue")
}

/// The recording of subject `n` inside a study folder.
pub fn recording_path(study: &Path, n: usize) -> PathBuf {
    study.join(format!("{}_eeg.edf", subject_stem(n)))
}

/// Write the tiny study into `study`: per subject an EDF+ file, `_events.tsv` and
/// `_channels.tsv` (column names from the EEG-BIDS specification, Pernet et al. 2019).
pub fn write_study(study: &Path, spec: &StudySpec) {
    for (i, &rate) in spec.rates.iter().enumerate() {
        let n = i + 1;
        let edf = recording_path(study, n);
        fs::create_dir_all(edf.parent().expect("recording has a folder")).expect("mkdir");
        let events = events(spec.seconds);
        write_edf_plus(&edf, &edf_spec(n, rate, spec.seconds, &events)).expect("write EDF");
        let stem = study.join(subject_stem(n));
        fs::write(with_suffix(&stem, "_events.tsv"), events_tsv(&events)).expect("events");
        fs::write(with_suffix(&stem, "_channels.tsv"), channels_tsv()).expect("channels");
    }
}

/// Rewrite the tiny study in `study` as BrainVision (`brainvision::convert`): each subject's
/// EDF becomes `<stem>_eeg.vhdr` with its `.vmrk` and `.eeg`; the EDF is removed, the sidecars
/// stay.
pub fn study_as_brainvision(study: &Path, spec: &StudySpec) {
    for n in 1..=spec.rates.len() {
        let edf = recording_path(study, n);
        brainvision::convert(&edf, &edf.with_extension("vhdr"));
        fs::remove_file(&edf).expect("remove the EDF");
    }
}

/// `stem` with `suffix` appended to its file name.
pub fn with_suffix(stem: &Path, suffix: &str) -> PathBuf {
    let mut name = stem.as_os_str().to_owned();
    name.push(suffix);
    PathBuf::from(name)
}

/// Two cue types alternating every 2 s, from 2 s to 3 s before the end, so every epoch of the
/// tiny pipeline's window [-1.2, 1.7] s fits.
fn events(seconds: usize) -> Vec<Event> {
    (1..)
        .map(|k| 2.0 * k as f64)
        .take_while(|&onset| onset + 3.0 <= seconds as f64)
        .enumerate()
        .map(|(k, onset)| Event {
            onset,
            duration: 0.0,
            label: if k % 2 == 0 { "cue-a" } else { "cue-b" }.into(),
        })
        .collect()
}

fn events_tsv(events: &[Event]) -> String {
    let mut text = String::from("onset\tduration\ttrial_type\n");
    for e in events {
        text.push_str(&format!("{}\t{}\t{}\n", e.onset, e.duration, e.label));
    }
    text
}

fn channels_tsv() -> String {
    let mut text = String::from("name\ttype\tunits\n");
    for name in CHANNELS {
        text.push_str(&format!("{name}\tEEG\tuV\n"));
    }
    text
}

fn edf_spec(subject: usize, rate: f64, seconds: usize, events: &[Event]) -> EdfWriteSpec {
    let samples = (rate as usize) * seconds;
    let signals = CHANNELS
        .iter()
        .enumerate()
        .map(|(c, name)| SignalSpec {
            label: format!("EEG {name}"),
            unit: "uV".into(),
            samples: (0..samples)
                .map(|k| sample(subject, c, k as f64 / rate))
                .collect(),
        })
        .collect();
    EdfWriteSpec {
        patient: format!("sub-{subject:02} X X X"),
        recording: "Startdate X X X X".into(),
        start_date: "01.01.26".into(),
        start_time: "00.00.00".into(),
        record_seconds: 1.0,
        sampling_rate: rate,
        signals,
        annotations: events.to_vec(),
    }
}

/// One sample in µV: a 6 Hz and a 10 Hz rhythm with channel-dependent phases plus hashed noise,
/// a few tens of µV peak to peak (scalp EEG is tens of µV: common practice), so the tiny
/// pipeline's 150 µV rejection threshold keeps every trial.
fn sample(subject: usize, channel: usize, t: f64) -> f64 {
    use std::f64::consts::TAU;
    let phase = 0.7 * channel as f64 + 0.3 * subject as f64;
    let noise = unit_noise((subject * 131 + channel) as u64, (t * 1e4) as u64);
    8.0 * (TAU * 6.0 * t + phase).sin() + 5.0 * (TAU * 10.0 * t - phase).sin() + 4.0 * noise
}

/// A deterministic value in [-1, 1) from two integers (splitmix64's finaliser).
fn unit_noise(a: u64, b: u64) -> f64 {
    let mut z = a.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ b;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^= z >> 31;
    (z >> 11) as f64 / (1u64 << 52) as f64 - 1.0
}

/// The tiny pipeline (`tests/bad-inputs/base.yaml`): every op of the chain, small sizes.
pub fn base_pipeline() -> String {
    let path = corpus_dir().join("base.yaml");
    fs::read_to_string(&path).unwrap_or_else(|e| panic!("reading {}: {e}", path.display()))
}

/// `tests/bad-inputs/`.
pub fn corpus_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad-inputs")
}

/// A project folder: the tiny study in `data/` and the base pipeline as `pipeline.yaml`.
pub fn tiny_project(dir: &Path, spec: &StudySpec) -> PathBuf {
    write_study(&dir.join("data"), spec);
    let pipeline = dir.join("pipeline.yaml");
    fs::write(&pipeline, base_pipeline()).expect("write pipeline");
    pipeline
}

/// Run the CLI with `args` in `cwd`, logs at their default level, no colour.
pub fn run_cli(cwd: &Path, args: &[&str]) -> Output {
    command(cwd, args).output().expect("start phasewise")
}

/// The command [`run_cli`] runs, for callers that need to spawn and kill it.
pub fn command(cwd: &Path, args: &[&str]) -> Command {
    let mut cmd = Command::new(bin());
    cmd.args(args)
        .current_dir(cwd)
        .env_remove("PHASEWISE_CACHE")
        .env_remove("RUST_LOG")
        .env("NO_COLOR", "1");
    cmd
}

/// A run's stderr as text.
pub fn stderr_of(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).into_owned()
}

/// Panics with the run's output unless it exited 0 without panic text.
pub fn assert_success(out: &Output, what: &str) {
    let err = stderr_of(out);
    assert!(
        out.status.success() && !has_panic_text(&err),
        "{what}: expected success, got {:?}\nstdout:\n{}\nstderr:\n{err}",
        out.status.code(),
        String::from_utf8_lossy(&out.stdout)
    );
}

/// True when `text` holds anything a panic prints.
pub fn has_panic_text(text: &str) -> bool {
    PANIC_MARKERS.iter().any(|m| text.contains(m))
}

/// Every regular file under `root`, relative to it, sorted; missing `root` gives none.
pub fn files_under(root: &Path) -> Vec<PathBuf> {
    let mut found = Vec::new();
    let mut todo = vec![root.to_path_buf()];
    while let Some(dir) = todo.pop() {
        let Ok(entries) = fs::read_dir(&dir) else {
            continue;
        };
        for entry in entries.flatten() {
            let path = entry.path();
            if path.is_dir() {
                todo.push(path);
            } else if let Ok(rel) = path.strip_prefix(root) {
                found.push(rel.to_path_buf());
            }
        }
    }
    found.sort();
    found
}

/// The exported arrays and tables of a run (`<output>/**.npy|.tsv`), with their bytes. The
/// JSON sidecars and the manifest are left out: they hold timings and absolute paths; so are
/// temporary files (`.tmp-…`) a killed run left, which nothing reads and which are removed by
/// age only (`fsio::remove_stale_temps`).
pub fn output_arrays(output: &Path) -> Vec<(PathBuf, Vec<u8>)> {
    files_under(output)
        .into_iter()
        .filter(|p| {
            !p.file_name().is_some_and(|n| {
                n.to_string_lossy()
                    .starts_with(phasewise::fsio::TEMP_PREFIX)
            })
        })
        .filter(|p| matches!(p.extension().and_then(|e| e.to_str()), Some("npy" | "tsv")))
        .map(|p| {
            let bytes = fs::read(output.join(&p)).expect("read output");
            (p, bytes)
        })
        .collect()
}

/// The cache objects (`<cache>/objects/<xx>/<key>.npy`) as paths relative to the cache.
pub fn cache_objects(cache: &Path) -> Vec<PathBuf> {
    files_under(&cache.join("objects"))
        .into_iter()
        .filter(|p| p.extension().and_then(|e| e.to_str()) == Some("npy"))
        .map(|p| Path::new("objects").join(p))
        .collect()
}

/// The manifest of a run as JSON.
pub fn manifest(output: &Path) -> serde_json::Value {
    let path = output.join("manifest.json");
    let text =
        fs::read_to_string(&path).unwrap_or_else(|e| panic!("reading {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {}: {e}", path.display()))
}

/// `(stage, subject, status)` of every unit in a manifest, sorted.
pub fn unit_statuses(manifest: &serde_json::Value) -> Vec<(String, String, String)> {
    let mut units: Vec<(String, String, String)> = manifest["units"]
        .as_array()
        .map(|units| {
            units
                .iter()
                .map(|u| {
                    let text = |k: &str| u[k].as_str().unwrap_or("-").to_string();
                    (text("stage"), text("subject"), text("status"))
                })
                .collect()
        })
        .unwrap_or_default();
    units.sort();
    units
}

/// Copy the tree `src` into `dst` (created), files and folders only.
pub fn copy_tree(src: &Path, dst: &Path) {
    fs::create_dir_all(dst).expect("mkdir");
    for rel in files_under(src) {
        let target = dst.join(&rel);
        if let Some(parent) = target.parent() {
            fs::create_dir_all(parent).expect("mkdir");
        }
        fs::copy(src.join(&rel), &target).expect("copy");
    }
}

/// Every file of the store (`<cache>/objects/**`) with its bytes, by path relative to the cache.
pub fn store_files(cache: &Path) -> std::collections::BTreeMap<PathBuf, Vec<u8>> {
    files_under(&cache.join("objects"))
        .into_iter()
        .map(|rel| {
            let path = Path::new("objects").join(&rel);
            let bytes = fs::read(cache.join(&path)).expect("read object");
            (path, bytes)
        })
        .collect()
}

/// Problems of a store compared with reference stores: DESIGN §5 says equal keys give equal
/// bytes, so every object file (`<key>.npy`, `<key>.json`) of `cache` must equal the file of
/// that name in one of `references`. Other files (temporary files a killed process could not
/// remove) are problems too unless `leftovers_allowed`; they are never objects a run trusts.
pub fn store_problems(cache: &Path, references: &[&Path], leftovers_allowed: bool) -> Vec<String> {
    let reference: std::collections::BTreeMap<PathBuf, Vec<u8>> =
        references.iter().flat_map(|r| store_files(r)).collect();
    store_files(cache)
        .into_iter()
        .filter_map(|(path, bytes)| {
            if !is_object_name(&path) {
                return (!leftovers_allowed)
                    .then(|| format!("{}: a file that is no object was left", path.display()));
            }
            match reference.get(&path) {
                None => Some(format!("{}: not in the reference store", path.display())),
                Some(want) if *want != bytes => Some(format!(
                    "{}: {} bytes differ from the reference's {}{}",
                    path.display(),
                    bytes.len(),
                    want.len(),
                    json_difference(&bytes, want)
                )),
                Some(_) => None,
            }
        })
        .collect()
}

/// Where two JSON texts differ (`" at fingerprint.inputs[0]: a → b"`), or nothing when either
/// is not JSON: a hint for whoever reads a failing test.
fn json_difference(got: &[u8], want: &[u8]) -> String {
    let parse = |b: &[u8]| serde_json::from_slice::<serde_json::Value>(b).ok();
    match (parse(got), parse(want)) {
        (Some(g), Some(w)) => first_difference(&g, &w, String::new())
            .map(|(at, g, w)| format!(" at {at}: {w} → {g}"))
            .unwrap_or_default(),
        _ => String::new(),
    }
}

fn first_difference(
    got: &serde_json::Value,
    want: &serde_json::Value,
    at: String,
) -> Option<(String, String, String)> {
    use serde_json::Value;
    match (got, want) {
        (Value::Object(g), Value::Object(w)) => w.iter().find_map(|(k, wv)| {
            let gv = g.get(k).unwrap_or(&Value::Null);
            first_difference(gv, wv, format!("{at}.{k}"))
        }),
        (Value::Array(g), Value::Array(w)) if g.len() == w.len() => g
            .iter()
            .zip(w)
            .enumerate()
            .find_map(|(i, (gv, wv))| first_difference(gv, wv, format!("{at}[{i}]"))),
        _ if got == want => None,
        _ => Some((at, short(got), short(want))),
    }
}

fn short(v: &serde_json::Value) -> String {
    let text = v.to_string();
    match text.char_indices().nth(120) {
        Some((i, _)) => format!("{}…", &text[..i]),
        None => text,
    }
}

/// The files of a store that are not objects (`<key>.npy`, `<key>.json`).
pub fn leftovers(cache: &Path) -> Vec<PathBuf> {
    store_files(cache)
        .into_keys()
        .filter(|p| !is_object_name(p))
        .collect()
}

/// True for `<hex>.npy` and `<hex>.json`, the names of a store's objects (DESIGN §5).
pub fn is_object_name(path: &Path) -> bool {
    let ext = path.extension().and_then(|e| e.to_str());
    let stem = path.file_stem().and_then(|s| s.to_str()).unwrap_or("");
    matches!(ext, Some("npy" | "json"))
        && !stem.is_empty()
        && stem.chars().all(|c| c.is_ascii_hexdigit())
}

/// Paths of the outputs whose bytes differ between two output lists, or that only one has.
pub fn output_differences(got: &[(PathBuf, Vec<u8>)], want: &[(PathBuf, Vec<u8>)]) -> Vec<String> {
    let mut problems = Vec::new();
    for (path, bytes) in want {
        match got.iter().find(|(p, _)| p == path) {
            None => problems.push(format!("{}: missing", path.display())),
            Some((_, b)) if b != bytes => {
                problems.push(format!("{}: bytes differ", path.display()))
            }
            Some(_) => {}
        }
    }
    for (path, _) in got {
        if !want.iter().any(|(p, _)| p == path) {
            problems.push(format!("{}: not in the reference outputs", path.display()));
        }
    }
    problems
}
