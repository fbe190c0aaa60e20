//! `manifest.json`: the documented, versioned record of a run (DESIGN §6), and the merge of
//! per-subject parts.
//!
//! Core shape (format version 1):
//! ```text
//! { "format": "phasewise-manifest", "format_version": 1,
//!   "tool": { "name", "version", "revision" }, "platform": { "os", "arch" },
//!   "pipeline": { "path", "blake3", "name", "overrides", "subjects", "stages",
//!                 "data" (only with data.channels / data.rate) },
//!   "inputs": [ { "path", "size", "blake3" } ],
//!   "units": [ { "stage", "subject", "op", "op_version", "params", "key", "inputs",
//!                "outputs": [ { "file", "blake3", "shape", "dtype",
//!                               "companions": [ { "kind", "file", "blake3" } ] } ],
//!                "status": "computed" | "cached", "seconds" } ],
//!   "epochs": { subject or "group": { stage: record } }, "warnings": [ { "stage", "subject",
//!   "message" } ], "started", "finished" }
//! ```
//! Paths: `pipeline.path` is relative to the manifest's folder, input paths relative to the
//! pipeline's folder, output files relative to the output folder — so an archived study can
//! be verified wherever it is unpacked. `pipeline.subjects` is `null` for a full run and the
//! selection for a `run --subject` part. Ordering is deterministic: units in topological stage
//! order then subject, inputs by path, warnings in unit order.
//!
//! `companions` (an addition to format version 1 that older readers ignore) lists every other
//! file an exported output's export wrote and a user reads — its JSON sidecar (`sidecar`), its
//! tidy table (`table`) and the table's column dictionary (`columns`) — with the blake3 of its
//! bytes, so that `verify` and `archive` check them as they check the NPY against `blake3`. A
//! manifest written before it existed has no `companions` on any output: it still reads, and
//! `verify` and `archive` then check the arrays only and say so.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use serde_json::Value;

use crate::exec::{Outcome, Warning};
use crate::paths::relative_to;
use crate::recipe::Recipe;
use crate::study::Study;

/// `format` of a manifest.
pub const FORMAT: &str = "phasewise-manifest";
/// `format_version` this phasewise writes and reads.
pub const FORMAT_VERSION: u32 = 1;

/// The manifest.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// [`FORMAT`].
    pub format: String,
    /// [`FORMAT_VERSION`].
    pub format_version: u32,
    /// The program that wrote it.
    pub tool: Tool,
    /// Where it ran.
    pub platform: Platform,
    /// The pipeline.
    pub pipeline: PipelineInfo,
    /// Every input file.
    pub inputs: Vec<InputFile>,
    /// Every unit.
    pub units: Vec<UnitRecord>,
    /// Epoch counts: subject (or `group`) → stage → record.
    pub epochs: BTreeMap<String, BTreeMap<String, Value>>,
    /// Warnings.
    pub warnings: Vec<Warning>,
    /// Start time (RFC 3339, UTC).
    pub started: String,
    /// End time.
    pub finished: String,
}

/// The program.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Tool {
    /// `phasewise`.
    pub name: String,
    /// The crate version.
    pub version: String,
    /// The source revision (`git rev-parse HEAD` at build time, `-dirty` appended when the
    /// sources differed from it, or `unknown`).
    pub revision: String,
}

/// The machine.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Platform {
    /// Operating system.
    pub os: String,
    /// CPU architecture.
    pub arch: String,
}

/// The pipeline that ran.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct PipelineInfo {
    /// The pipeline file, relative to the manifest's folder.
    pub path: String,
    /// Its blake3.
    pub blake3: String,
    /// Its `name`.
    pub name: String,
    /// The `--set` arguments.
    pub overrides: Vec<String>,
    /// The `--subject` selection, `None` for all subjects.
    pub subjects: Option<Vec<String>>,
    /// Stage names in topological order (used to order merged parts).
    pub stages: Vec<String>,
    /// What was read of each recording when not all of it at its own rate: `data.channels`
    /// and `data.rate` as the pipeline gave them (absent otherwise).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub data: Option<Value>,
}

/// One input file.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct InputFile {
    /// Relative to the pipeline's folder.
    pub path: String,
    /// Size in bytes.
    pub size: u64,
    /// blake3 of its bytes.
    pub blake3: String,
}

/// One unit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct UnitRecord {
    /// The stage.
    pub stage: String,
    /// The subject (`null` for group units).
    pub subject: Option<String>,
    /// The op.
    pub op: String,
    /// The op's version.
    pub op_version: u32,
    /// Effective params.
    pub params: Value,
    /// The unit's key.
    pub key: String,
    /// The input keys.
    pub inputs: Vec<String>,
    /// The output.
    pub outputs: Vec<OutputRecord>,
    /// `computed` or `cached`.
    pub status: String,
    /// Seconds spent in this run.
    pub seconds: f64,
    /// How it was computed ([`crate::recipe`]); only for units computed in this run.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub recipe: Option<Recipe>,
    /// The machine that computed it (or found it cached): its host name. A merged manifest
    /// keeps each unit's host from the part that computed it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub host: Option<String>,
}

/// One output array.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct OutputRecord {
    /// The exported NPY relative to the output folder, `null` when not exported.
    pub file: Option<String>,
    /// blake3 of the NPY bytes.
    pub blake3: String,
    /// Shape.
    pub shape: Vec<usize>,
    /// numpy dtype (`<f4`, `<c8`).
    pub dtype: String,
    /// For an export written as a Zarr store (`format: zarr`, where `file` names the store):
    /// the blake3 of each of the store's files, by its path inside the store. `verify` and
    /// `archive` check them as they check an NPY export against `blake3`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub store: Option<crate::zarr::StoreHashes>,
    /// For an exported output: the other files its export wrote (sidecar, table, column
    /// dictionary), each with its blake3, in that order. `None` when not exported, and in
    /// manifests written before phasewise recorded them (whose sidecars and tables nothing
    /// checks).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub companions: Option<Vec<Companion>>,
}

/// A file written beside an exported array, that users read: its sidecar, table or column
/// dictionary.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Companion {
    /// What it is.
    pub kind: CompanionKind,
    /// The file, relative to the output folder (or the bundle's root, in an archive).
    pub file: String,
    /// blake3 of its bytes.
    pub blake3: String,
}

/// What a [`Companion`] is.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CompanionKind {
    /// The array's JSON sidecar (format 2: dims, coords, attrs).
    Sidecar,
    /// The tidy table (TSV).
    Table,
    /// The table's column dictionary (JSON).
    Columns,
}

impl CompanionKind {
    /// How messages name it.
    pub fn describe(self) -> &'static str {
        match self {
            CompanionKind::Sidecar => "sidecar",
            CompanionKind::Table => "table",
            CompanionKind::Columns => "column dictionary",
        }
    }
}

/// The source revision of this build, as `build.rs` recorded it: the commit, with `-dirty` when
/// the sources differed from it, or `unknown` outside a git checkout. `--version` shows the same.
pub const REVISION: &str = env!("PHASEWISE_REVISION");

/// The tool record of this build.
pub fn this_tool() -> Tool {
    Tool {
        name: env!("CARGO_PKG_NAME").into(),
        version: env!("CARGO_PKG_VERSION").into(),
        revision: REVISION.into(),
    }
}

/// Build the manifest of a finished run.
pub fn build(study: &Study, outcome: &Outcome, started: &str, finished: &str) -> Manifest {
    let pipeline = &study.pipeline;
    let path = relative_to(&pipeline.file, &pipeline.output)
        .unwrap_or_else(|| pipeline.file.clone())
        .to_string_lossy()
        .into_owned();
    let mut inputs: Vec<InputFile> = study
        .source_files
        .iter()
        .flatten()
        .map(|f| InputFile {
            path: study.display_path(&f.path),
            size: f.size,
            blake3: f.blake3.clone(),
        })
        .collect();
    inputs.sort_by(|a, b| a.path.cmp(&b.path));
    let units = (0..study.units.len())
        .map(|u| unit_record(study, outcome, u))
        .collect();
    Manifest {
        format: FORMAT.into(),
        format_version: FORMAT_VERSION,
        tool: this_tool(),
        platform: Platform {
            os: std::env::consts::OS.into(),
            arch: std::env::consts::ARCH.into(),
        },
        pipeline: PipelineInfo {
            path,
            blake3: pipeline.file_blake3.clone(),
            name: pipeline.name.clone(),
            overrides: pipeline.overrides.clone(),
            subjects: (!study.selection.is_empty()).then(|| study.selection.clone()),
            stages: pipeline.stages.iter().map(|s| s.name.clone()).collect(),
            data: (!pipeline.choice.is_default())
                .then(|| serde_json::to_value(&pipeline.choice).unwrap_or_default()),
        },
        inputs,
        units,
        epochs: epochs(study, outcome),
        warnings: warnings(study, outcome),
        started: started.into(),
        finished: finished.into(),
    }
}

fn unit_record(study: &Study, outcome: &Outcome, u: usize) -> UnitRecord {
    let fp = &study.fingerprints[u];
    let result = &outcome.results[u];
    let recorded = result.export.as_deref().and_then(|file| {
        crate::output::recorded_export(&study.pipeline.output, file, &study.store)
    });
    UnitRecord {
        stage: study.stage_name(u).into(),
        subject: study.subject(u).map(str::to_string),
        op: fp.op.clone(),
        op_version: fp.op_version,
        params: fp.params.clone(),
        key: study.keys[u].clone(),
        inputs: fp.inputs.iter().map(|i| i.key.clone()).collect(),
        outputs: vec![OutputRecord {
            file: result.export.clone(),
            blake3: result.record.blake3.clone(),
            shape: result.record.shape.clone(),
            dtype: result.record.dtype.clone(),
            store: recorded.as_ref().and_then(|r| r.store_hashes()),
            companions: recorded.map(|r| r.companions),
        }],
        status: if result.computed {
            "computed"
        } else {
            "cached"
        }
        .into(),
        seconds: result.seconds,
        recipe: result.recipe.clone().filter(|_| result.computed),
        host: Some(crate::fsio::host_name()),
    }
}

fn epochs(study: &Study, outcome: &Outcome) -> BTreeMap<String, BTreeMap<String, Value>> {
    let mut out: BTreeMap<String, BTreeMap<String, Value>> = BTreeMap::new();
    for (u, result) in outcome.results.iter().enumerate() {
        if let Some(record) = result.record.notes.records.get("epochs") {
            let who = study.subject(u).unwrap_or("group").to_string();
            out.entry(who)
                .or_default()
                .insert(study.stage_name(u).into(), record.clone());
        }
    }
    out
}

/// Warnings of every unit's notes (cached ones included), then the executor's, in unit order.
fn warnings(study: &Study, outcome: &Outcome) -> Vec<Warning> {
    let mut out = Vec::new();
    for (u, result) in outcome.results.iter().enumerate() {
        for message in &result.record.notes.warnings {
            out.push(Warning {
                stage: study.stage_name(u).into(),
                subject: study.subject(u).map(str::to_string),
                message: message.clone(),
            });
        }
        let stage = study.stage_name(u);
        let subject = study.subject(u);
        out.extend(
            outcome
                .warnings
                .iter()
                .filter(|w| w.stage == stage && w.subject.as_deref() == subject)
                .cloned(),
        );
    }
    out
}

/// Where a run writes its manifest: `manifest.json`, or `manifest.parts/<subjects>.json` for a
/// `run --subject` part (so that parallel parts never overwrite each other).
pub fn path_for(output: &Path, selection: &[String]) -> std::path::PathBuf {
    if selection.is_empty() {
        output.join("manifest.json")
    } else {
        output
            .join("manifest.parts")
            .join(format!("{}.json", selection.join("+")))
    }
}

/// Merge `current` (the manifest of a whole run, usually one whose subjects were computed by
/// `run --subject` parts and found cached) with the parts in `<output>/manifest.parts/` that
/// come from the same pipeline file and overrides; parts of other pipelines or overrides, and
/// unreadable ones, are left out. The units, inputs and order are `current`'s; a unit that a part
/// computed (with the same key) is recorded as that part recorded it, host included.
pub fn merge_with_parts(current: Manifest, output: &Path) -> Result<Manifest, ManifestError> {
    let mut parts = vec![current];
    let dir = output.join("manifest.parts");
    let mut files: Vec<_> = std::fs::read_dir(&dir)
        .map(|entries| entries.flatten().map(|e| e.path()).collect())
        .unwrap_or_default();
    files.sort();
    for file in files {
        if file.extension().and_then(|e| e.to_str()) != Some("json") {
            continue;
        }
        let Ok(part) = read(&file) else { continue };
        if part.pipeline.blake3 == parts[0].pipeline.blake3
            && part.pipeline.overrides == parts[0].pipeline.overrides
        {
            parts.push(part);
        }
    }
    let mut merged = merge(&parts)?;
    // Only units of the current run: a part may hold a subject no longer in the study.
    let current = &parts[0];
    merged.units.retain(|u| {
        current
            .units
            .iter()
            .any(|c| c.stage == u.stage && c.subject == u.subject)
    });
    merged.warnings.retain(|w| {
        merged
            .units
            .iter()
            .any(|u| u.stage == w.stage && u.subject == w.subject)
    });
    merged
        .epochs
        .retain(|who, _| current.epochs.contains_key(who));
    merged.inputs.clone_from(&current.inputs);
    merged.finished.clone_from(&current.finished);
    Ok(merged)
}

/// Why a manifest could not be read or merged.
#[derive(Debug, thiserror::Error)]
pub enum ManifestError {
    /// The file could not be read.
    #[error("cannot read {}: {source}", path.display())]
    Read {
        /// The manifest file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The file is not JSON.
    #[error("{} is not valid JSON: {source}", path.display())]
    NotJson {
        /// The manifest file.
        path: PathBuf,
        /// Where and why it does not parse.
        source: serde_json::Error,
    },
    /// JSON, but not a manifest of this format version.
    #[error(
        "{} is not a phasewise manifest of format version {FORMAT_VERSION} (its format is {found})",
        path.display()
    )]
    OtherFormat {
        /// The manifest file.
        path: PathBuf,
        /// Its `format` and `format_version`, as found.
        found: String,
    },
    /// A manifest of this format with a field missing or of the wrong type.
    #[error("{}: {source}", path.display())]
    Field {
        /// The manifest file.
        path: PathBuf,
        /// Which field, and what was expected.
        source: serde_json::Error,
    },
    /// [`merge`] was given no manifests.
    #[error("no manifest parts to merge")]
    NoParts,
    /// [`merge`] was given parts of different pipelines or overrides.
    #[error(
        "the parts come from different pipelines or overrides (part {index} has {found}, the \
         first {expected})"
    )]
    OtherPipeline {
        /// The part's position in the list.
        index: usize,
        /// The first part's pipeline blake3 and overrides.
        expected: String,
        /// This part's.
        found: String,
    },
}

/// Read a manifest, checking its format and version.
pub fn read(path: &Path) -> Result<Manifest, ManifestError> {
    let path_buf = || path.to_path_buf();
    let bytes = std::fs::read(path).map_err(|source| ManifestError::Read {
        path: path_buf(),
        source,
    })?;
    let value: Value = serde_json::from_slice(&bytes).map_err(|source| ManifestError::NotJson {
        path: path_buf(),
        source,
    })?;
    let format = value.get("format").and_then(Value::as_str);
    let version = value.get("format_version").and_then(Value::as_u64);
    if format != Some(FORMAT) || version != Some(u64::from(FORMAT_VERSION)) {
        let shown = |v: Option<&Value>| v.map_or("none".to_string(), Value::to_string);
        return Err(ManifestError::OtherFormat {
            path: path_buf(),
            found: format!(
                "{} version {}",
                shown(value.get("format")),
                shown(value.get("format_version"))
            ),
        });
    }
    serde_json::from_value(value).map_err(|source| ManifestError::Field {
        path: path_buf(),
        source,
    })
}

/// The manifest as written: pretty JSON with a final newline.
pub fn to_bytes(manifest: &Manifest) -> Vec<u8> {
    let mut bytes = serde_json::to_vec_pretty(manifest).unwrap_or_default();
    bytes.push(b'\n');
    bytes
}

/// Merge per-subject parts (and a part holding the group units) into one manifest, as a run on
/// one machine would have written it: units in the pipeline's stage order then subject, each
/// unit taken from the part that computed it, inputs by path, times spanning all parts. A unit
/// of a later part replaces one already taken only when it was computed, the one taken was not,
/// and both have the same key (a part left by an earlier run with other params never replaces
/// the current record).
pub fn merge(parts: &[Manifest]) -> Result<Manifest, ManifestError> {
    let first = parts.first().ok_or(ManifestError::NoParts)?;
    for (index, part) in parts.iter().enumerate() {
        if part.pipeline.blake3 != first.pipeline.blake3
            || part.pipeline.overrides != first.pipeline.overrides
        {
            let origin = |m: &Manifest| {
                let o = &m.pipeline.overrides;
                format!("pipeline blake3 {} and overrides {o:?}", m.pipeline.blake3)
            };
            return Err(ManifestError::OtherPipeline {
                index,
                expected: origin(first),
                found: origin(part),
            });
        }
    }
    let stage_rank = |stage: &str| first.pipeline.stages.iter().position(|s| s == stage);
    let mut units: BTreeMap<(Option<usize>, Option<String>), UnitRecord> = BTreeMap::new();
    let mut inputs: BTreeMap<String, InputFile> = BTreeMap::new();
    let mut epochs = first.epochs.clone();
    for part in parts {
        for unit in &part.units {
            let slot = (stage_rank(&unit.stage), unit.subject.clone());
            let replace = units.get(&slot).is_none_or(|u| {
                u.status != "computed" && unit.status == "computed" && u.key == unit.key
            });
            if replace {
                units.insert(slot, unit.clone());
            }
        }
        for input in &part.inputs {
            inputs.insert(input.path.clone(), input.clone());
        }
        for (who, stages) in &part.epochs {
            epochs
                .entry(who.clone())
                .or_default()
                .extend(stages.clone());
        }
    }
    // Group units (subject None) sort before subjects in a BTreeMap; a one-machine run lists
    // them by stage order, and group stages come after the stages feeding them.
    let mut ordered: Vec<UnitRecord> = units.into_values().collect();
    ordered.sort_by_key(|u| (stage_rank(&u.stage), u.subject.is_none(), u.subject.clone()));
    let mut merged = first.clone();
    merged.pipeline.subjects = None;
    merged.warnings = merged_warnings(parts, &ordered);
    merged.units = ordered;
    merged.inputs = inputs.into_values().collect();
    merged.epochs = epochs;
    merged.started = parts
        .iter()
        .map(|p| p.started.clone())
        .min()
        .unwrap_or_default();
    merged.finished = parts
        .iter()
        .map(|p| p.finished.clone())
        .max()
        .unwrap_or_default();
    Ok(merged)
}

fn merged_warnings(parts: &[Manifest], units: &[UnitRecord]) -> Vec<Warning> {
    let mut out: Vec<Warning> = Vec::new();
    for unit in units {
        for part in parts {
            let mine: Vec<&Warning> = part
                .warnings
                .iter()
                .filter(|w| w.stage == unit.stage && w.subject == unit.subject)
                .collect();
            if !mine.is_empty() {
                out.extend(mine.into_iter().cloned());
                break;
            }
        }
    }
    out
}
