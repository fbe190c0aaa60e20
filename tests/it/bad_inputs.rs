//! The bad-input corpus (`tests/bad-inputs/`), run through the real CLI.
//!
//! Each case is a folder holding a `case.json` and, optionally, a `pipeline.yaml` and other
//! files. The harness builds a project in a temporary folder — the tiny study in `data/`
//! (unless the case says `"study": false`; as BrainVision with `"format": "brainvision"`), the
//! case's files, the base pipeline where the case has none (reading the `.vhdr` headers for a
//! BrainVision study) — applies the case's `edits` (damage to a recording or a sidecar), runs
//! `phasewise <args>` there and checks:
//! - the exit status (DESIGN §7: 2 the pipeline or the command line is wrong, 1 a stage failed);
//! - that stderr holds every `stderr` substring (the file, the field) and, for `line_of`, the
//!   pipeline file's name followed by the line on which that text first appears;
//! - that nothing panicked.
//!
//! Every failing case is collected, so one run lists them all. With `PHASEWISE_SHOW_CORPUS=1`
//! (and `--nocapture`) every case's stderr is printed, to review the messages themselves.

use crate::reliability;

use std::fs;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use reliability::{corpus_dir, has_panic_text, run_cli, stderr_of, write_study, StudySpec};

/// Set this variable to see every case's stderr (to review the messages themselves).
const SHOW: &str = "PHASEWISE_SHOW_CORPUS";

/// A case's `case.json`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Case {
    /// What is wrong with the input, in words.
    about: String,
    /// The command line after `phasewise`; `["run", "pipeline.yaml"]` when absent.
    #[serde(default)]
    args: Option<Vec<String>>,
    /// The study to write into `data/` (`false` for none).
    #[serde(default)]
    study: StudyChoice,
    /// The study's recording format; with `brainvision` the base pipeline reads the `.vhdr`
    /// headers.
    #[serde(default)]
    format: StudyFormat,
    /// Damage applied after the files are in place.
    #[serde(default)]
    edits: Vec<Edit>,
    /// The expected exit status.
    exit: i32,
    /// Substrings stderr must hold.
    #[serde(default)]
    stderr: Vec<String>,
    /// Text of the pipeline file whose line the message must name (`pipeline.yaml:LINE:`): the
    /// first line holding it, or, with a trailing `$`, the first line that is exactly it.
    #[serde(default)]
    line_of: Option<String>,
}

/// Which study a case gets.
#[derive(Debug, Deserialize, Default)]
#[serde(untagged)]
enum StudyChoice {
    /// The default tiny study, or none.
    Flag(bool),
    /// A study of other rates or length.
    Custom { rates: Vec<f64>, seconds: usize },
    /// Same as `Flag(true)`.
    #[default]
    Default,
}

/// The format the study's recordings are written in.
#[derive(Debug, Deserialize, Default, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
enum StudyFormat {
    /// EDF+ (the stages crate's writer).
    #[default]
    Edf,
    /// BrainVision, converted from the EDF+ study by the tests' own writer.
    Brainvision,
}

/// One change to a file of the project, all paths relative to the project folder.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Edit {
    file: String,
    #[serde(flatten)]
    change: Change,
}

#[derive(Debug, Deserialize)]
#[serde(rename_all = "snake_case")]
enum Change {
    /// Set an EDF header field (named as in Kemp et al. 1992) to `text`, space padded;
    /// `signal` (1-based) picks the signal for per-signal fields.
    EdfField {
        field: String,
        signal: Option<usize>,
        text: String,
    },
    /// Keep only the first `n` bytes (`n < 0`: drop the last `-n`).
    Truncate(i64),
    /// Replace the whole file with this text.
    Text(String),
    /// Overwrite bytes from `at` with `hex`.
    Bytes { at: usize, hex: String },
    /// Remove the file (when true).
    Delete(bool),
    /// Replace the first occurrence of `from` in a text file with `to` (`from` must occur).
    Replace { from: String, to: String },
}

#[test]
fn every_bad_input_is_refused_with_a_message_naming_it() {
    let cases = case_dirs();
    assert!(
        cases.len() >= 40,
        "the corpus should hold at least 40 cases (issue 5), found {}",
        cases.len()
    );
    let failures: Vec<String> = cases
        .iter()
        .filter_map(|dir| check_case(dir).err())
        .collect();
    assert!(
        failures.is_empty(),
        "{} of {} bad-input cases failed:\n\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}

/// The counterpart of the corpus's `output-*` cases: an output folder inside the dataset's
/// folder that holds no recording (BIDS puts derivatives there), with the cache inside it, is
/// accepted, and the run leaves every recording and sidecar as it was.
#[test]
fn an_output_folder_beside_the_recordings_with_the_cache_inside_it_is_accepted() {
    let work = tempfile::tempdir().unwrap();
    let data = work.path().join("data");
    write_study(&data, &StudySpec::default());
    let pipeline = reliability::base_pipeline()
        .replace("output: results", "output: data/derivatives/phasewise");
    fs::write(work.path().join("pipeline.yaml"), pipeline).unwrap();
    let before: Vec<(PathBuf, Vec<u8>)> = reliability::files_under(&data)
        .into_iter()
        .map(|p| (p.clone(), fs::read(data.join(&p)).unwrap()))
        .collect();
    let args = [
        "run",
        "pipeline.yaml",
        "--cache",
        "data/derivatives/phasewise/cache",
    ];
    reliability::assert_success(&run_cli(work.path(), &args), "run");
    let output = data.join("derivatives/phasewise");
    assert!(output.join("manifest.json").is_file());
    assert!(output.join("cache").is_dir());
    for (path, bytes) in before {
        assert_eq!(
            fs::read(data.join(&path)).unwrap(),
            bytes,
            "{}",
            path.display()
        );
    }
}

/// Every folder of the corpus with a `case.json`, sorted.
fn case_dirs() -> Vec<PathBuf> {
    let mut dirs: Vec<PathBuf> = fs::read_dir(corpus_dir())
        .expect("tests/bad-inputs exists")
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join("case.json").is_file())
        .collect();
    dirs.sort();
    dirs
}

/// Run one case; `Err` describes what differed.
fn check_case(dir: &Path) -> Result<(), String> {
    let name = dir
        .file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().into_owned());
    let text = fs::read_to_string(dir.join("case.json")).map_err(|e| format!("{name}: {e}"))?;
    let case: Case = serde_json::from_str(&text).map_err(|e| format!("{name}: case.json: {e}"))?;
    let work = tempfile::tempdir().map_err(|e| e.to_string())?;
    prepare(dir, &case, work.path()).map_err(|e| format!("{name}: preparing: {e}"))?;
    let default_args = vec!["run".to_string(), "pipeline.yaml".to_string()];
    let args: Vec<&str> = case
        .args
        .as_ref()
        .unwrap_or(&default_args)
        .iter()
        .map(String::as_str)
        .collect();
    let out = run_cli(work.path(), &args);
    let err = stderr_of(&out);
    if std::env::var_os(SHOW).is_some() {
        eprintln!("== {name} (exit {:?})\n{err}", out.status.code());
    }
    let mut problems = Vec::new();
    if out.status.code() != Some(case.exit) {
        problems.push(format!(
            "exit status {:?}, expected {}",
            out.status.code(),
            case.exit
        ));
    }
    if has_panic_text(&err) {
        problems.push("stderr holds panic text".into());
    }
    for line in err.lines() {
        if let Some(file) = named_twice(line) {
            problems.push(format!("a line names {file} twice"));
        }
    }
    for wanted in expected_substrings(&case, work.path())? {
        if !err.contains(&wanted) {
            problems.push(format!("stderr lacks {wanted:?}"));
        }
    }
    if problems.is_empty() {
        return Ok(());
    }
    Err(format!(
        "case {name} ({}): {}\n  command: phasewise {}\n  stderr: {}",
        case.about,
        problems.join("; "),
        args.join(" "),
        err.trim_end().replace('\n', "\n          ")
    ))
}

/// A file name (`*.edf`, `*.bdf`, `*.tsv`, `*.yaml`) that `line` holds more than once, as in
/// "a.edf: a.edf: …" when an error is wrapped with the path it already names.
fn named_twice(line: &str) -> Option<String> {
    let names: Vec<&str> = line
        .split(|c: char| c.is_whitespace() || matches!(c, ':' | '/' | '`' | '(' | ')' | ',' | ';'))
        .filter(|w| {
            [".edf", ".bdf", ".tsv", ".yaml"]
                .iter()
                .any(|e| w.ends_with(e))
        })
        .collect();
    names
        .iter()
        .enumerate()
        .find(|(i, n)| names[..*i].contains(n))
        .map(|(_, n)| n.to_string())
}

#[test]
fn a_file_named_twice_on_one_line_is_found() {
    let twice = "reading data/sub-01/eeg/a_eeg.edf: data/sub-01/eeg/a_eeg.edf: channel Oz";
    assert_eq!(named_twice(twice).as_deref(), Some("a_eeg.edf"));
    assert_eq!(
        named_twice("reading data/a_eeg.edf: data/a_events.tsv: bad row"),
        None
    );
}

/// The case's substrings, plus `pipeline.yaml:LINE:` for `line_of`.
fn expected_substrings(case: &Case, work: &Path) -> Result<Vec<String>, String> {
    let mut wanted = case.stderr.clone();
    if let Some(marker) = &case.line_of {
        let text = fs::read_to_string(work.join("pipeline.yaml")).map_err(|e| e.to_string())?;
        let line = text
            .lines()
            .position(|l| match marker.strip_suffix('$') {
                Some(whole) => l.trim_end() == whole,
                None => l.contains(marker.as_str()),
            })
            .ok_or_else(|| format!("line_of {marker:?} is not in pipeline.yaml"))?;
        wanted.push(format!("pipeline.yaml:{}:", line + 1));
    }
    Ok(wanted)
}

/// Lay out the project of a case in `work`.
fn prepare(dir: &Path, case: &Case, work: &Path) -> Result<(), String> {
    let spec = match &case.study {
        StudyChoice::Flag(false) => None,
        StudyChoice::Flag(true) | StudyChoice::Default => Some(StudySpec::default()),
        StudyChoice::Custom { rates, seconds } => Some(StudySpec {
            rates: rates.clone(),
            seconds: *seconds,
        }),
    };
    let brainvision = case.format == StudyFormat::Brainvision;
    if let Some(spec) = &spec {
        write_study(&work.join("data"), spec);
        if brainvision {
            reliability::study_as_brainvision(&work.join("data"), spec);
        }
    }
    copy_case_files(dir, work)?;
    if !work.join("pipeline.yaml").exists() {
        let mut base = reliability::base_pipeline();
        if brainvision {
            base = base.replace("_eeg.edf\"", "_eeg.vhdr\"");
        }
        fs::write(work.join("pipeline.yaml"), base).map_err(|e| e.to_string())?;
    }
    case.edits.iter().try_for_each(|e| apply(work, e))
}

/// Copy every file of the case folder but `case.json` into `work`, keeping sub-folders.
fn copy_case_files(dir: &Path, work: &Path) -> Result<(), String> {
    for rel in reliability::files_under(dir) {
        if rel == Path::new("case.json") {
            continue;
        }
        let target = work.join(&rel);
        if let Some(parent) = target.parent() {
            fs::create_dir_all(parent).map_err(|e| e.to_string())?;
        }
        fs::copy(dir.join(&rel), &target).map_err(|e| format!("{}: {e}", rel.display()))?;
    }
    Ok(())
}

fn apply(work: &Path, edit: &Edit) -> Result<(), String> {
    let path = work.join(&edit.file);
    let fail = |e: std::io::Error| format!("{}: {e}", edit.file);
    match &edit.change {
        Change::Delete(true) => fs::remove_file(&path).map_err(fail),
        Change::Delete(false) => Ok(()),
        Change::Text(text) => fs::write(&path, text).map_err(fail),
        Change::Replace { from, to } => {
            let text = fs::read_to_string(&path).map_err(fail)?;
            if !text.contains(from.as_str()) {
                return Err(format!("{}: {from:?} does not occur", edit.file));
            }
            fs::write(&path, text.replacen(from.as_str(), to, 1)).map_err(fail)
        }
        Change::Truncate(n) => {
            let bytes = fs::read(&path).map_err(fail)?;
            let keep = if *n < 0 {
                bytes.len().saturating_sub(n.unsigned_abs() as usize)
            } else {
                (*n as usize).min(bytes.len())
            };
            fs::write(&path, &bytes[..keep]).map_err(fail)
        }
        Change::Bytes { at, hex } => {
            let mut bytes = fs::read(&path).map_err(fail)?;
            let patch = decode_hex(hex)?;
            let end = at + patch.len();
            if end > bytes.len() {
                return Err(format!("{}: patch ends at {end}, past the file", edit.file));
            }
            bytes[*at..end].copy_from_slice(&patch);
            fs::write(&path, bytes).map_err(fail)
        }
        Change::EdfField {
            field,
            signal,
            text,
        } => {
            let mut bytes = fs::read(&path).map_err(fail)?;
            set_edf_field(&mut bytes, field, *signal, text)?;
            fs::write(&path, bytes).map_err(fail)
        }
    }
}

fn decode_hex(hex: &str) -> Result<Vec<u8>, String> {
    (0..hex.len())
        .step_by(2)
        .map(|i| {
            hex.get(i..i + 2)
                .and_then(|h| u8::from_str_radix(h, 16).ok())
                .ok_or_else(|| format!("bad hex {hex:?}"))
        })
        .collect()
}

/// Offsets and widths of the fixed header fields (Kemp et al. 1992, Table 1).
const FIXED_FIELDS: [(&str, usize, usize); 10] = [
    ("version", 0, 8),
    ("patient", 8, 80),
    ("recording", 88, 80),
    ("start_date", 168, 8),
    ("start_time", 176, 8),
    ("header_bytes", 184, 8),
    ("reserved", 192, 44),
    ("records", 236, 8),
    ("record_seconds", 244, 8),
    ("signals", 252, 4),
];

/// Widths of the per-signal fields, stored field by field over all signals (Kemp et al. 1992).
const SIGNAL_FIELDS: [(&str, usize); 10] = [
    ("label", 16),
    ("transducer", 80),
    ("physical_dimension", 8),
    ("physical_min", 8),
    ("physical_max", 8),
    ("digital_min", 8),
    ("digital_max", 8),
    ("prefiltering", 80),
    ("samples_per_record", 8),
    ("signal_reserved", 32),
];

/// Write `text`, space padded, into an EDF header field.
fn set_edf_field(
    bytes: &mut [u8],
    field: &str,
    signal: Option<usize>,
    text: &str,
) -> Result<(), String> {
    let (start, width) = match signal {
        None => FIXED_FIELDS
            .iter()
            .find(|f| f.0 == field)
            .map(|f| (f.1, f.2))
            .ok_or_else(|| format!("no fixed EDF field {field:?}"))?,
        Some(s) => signal_field(bytes, field, s)?,
    };
    if text.len() > width {
        return Err(format!(
            "{text:?} does not fit the {width}-byte field {field}"
        ));
    }
    let slot = bytes
        .get_mut(start..start + width)
        .ok_or_else(|| format!("field {field} is past the end of the file"))?;
    slot.fill(b' ');
    slot[..text.len()].copy_from_slice(text.as_bytes());
    Ok(())
}

/// Offset and width of field `field` of signal `signal` (1-based).
fn signal_field(bytes: &[u8], field: &str, signal: usize) -> Result<(usize, usize), String> {
    let count: usize = std::str::from_utf8(bytes.get(252..256).unwrap_or_default())
        .ok()
        .and_then(|t| t.trim().parse().ok())
        .ok_or("the file's signal count is unreadable")?;
    if signal == 0 || signal > count {
        return Err(format!("signal {signal} of {count}"));
    }
    let mut start = 256;
    for (name, width) in SIGNAL_FIELDS {
        if name == field {
            return Ok((start + (signal - 1) * width, width));
        }
        start += width * count;
    }
    Err(format!("no per-signal EDF field {field:?}"))
}
