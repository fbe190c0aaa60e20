//! `verify MANIFEST`: does the study still reproduce the numbers it recorded?
//!
//! The manifest alone says everything needed: the pipeline file (path relative to the output
//! folder, and its blake3), the `--set` overrides and subject selection, every input file with
//! its size and blake3. Every input is rehashed (stat records are not trusted here), the same
//! effective pipeline is run into a fresh temporary cache and output folder, and each recorded
//! output is compared: bit-identical, or the largest absolute difference between the old and the
//! new values (the old values are read from the exported file, or from the pipeline's default
//! cache when the output was not exported). Every exported file the manifest hashes (the NPY, a
//! Zarr store's files, the sidecar, table and column dictionary) is checked on disk, and the
//! sidecars, tables and dictionaries the rerun writes are compared with the recorded hashes.
//! A manifest from before the sidecars and tables were hashed (no `companions`) has its arrays
//! checked only, and the report says so.

use std::path::{Path, PathBuf};

use phasewise_stages::Values;

use crate::manifest::{self, Companion, Manifest, UnitRecord};
use crate::session::{self, Env, Options};
use crate::sources::hash_file;
use crate::store::{values_from_npy, Store};
use crate::study::subject_label;
use crate::words;

/// The verdict on one recorded output.
#[derive(Clone, Debug, PartialEq)]
pub enum Verdict {
    /// Same bytes.
    Identical,
    /// Different values; the largest absolute difference when both arrays could be read.
    Differs(Option<f64>),
    /// The rerun did not produce this unit.
    Missing,
    /// No content hash to compare: the output was streamed into its consumer a part at a time
    /// and never existed whole (DEVELOPERS.md, execution), in the recorded run or the rerun.
    /// Its values are checked through the outputs it feeds.
    NotHashed,
}

/// One compared output.
#[derive(Clone, Debug, PartialEq)]
pub struct OutputCheck {
    /// The stage.
    pub stage: String,
    /// The subject.
    pub subject: Option<String>,
    /// The verdict.
    pub verdict: Verdict,
}

/// Everything `verify` found.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct VerifyReport {
    /// Input files (and the pipeline file) that changed or are missing, one sentence each.
    pub input_problems: Vec<String>,
    /// Exported files and Zarr stores that changed since the run or are missing, one sentence
    /// each (their recorded blake3 against the files in the output folder).
    pub export_problems: Vec<String>,
    /// Sidecars, tables and column dictionaries the rerun wrote with other bytes than the run
    /// recorded, one sentence each.
    pub companion_differences: Vec<String>,
    /// What could not be checked, one sentence each; not a failure (a manifest that records no
    /// hashes of its sidecars and tables).
    pub unchecked: Vec<String>,
    /// The rerun's failure, if it failed.
    pub run_failure: Option<String>,
    /// Per-output verdicts, in the manifest's order.
    pub outputs: Vec<OutputCheck>,
}

impl VerifyReport {
    /// True when inputs are unchanged and every hashed output is bit-identical (outputs that
    /// were streamed and never hashed are checked through the outputs they feed).
    pub fn reproduced(&self) -> bool {
        self.input_problems.is_empty()
            && self.export_problems.is_empty()
            && self.companion_differences.is_empty()
            && self.run_failure.is_none()
            && self
                .outputs
                .iter()
                .all(|o| matches!(o.verdict, Verdict::Identical | Verdict::NotHashed))
    }

    /// How many outputs could not be compared because they were never hashed.
    pub fn not_hashed(&self) -> usize {
        self.outputs
            .iter()
            .filter(|o| o.verdict == Verdict::NotHashed)
            .count()
    }

    /// A human-readable report, one line per finding.
    pub fn lines(&self) -> Vec<String> {
        let mut lines = self.input_problems.clone();
        lines.extend(self.export_problems.iter().cloned());
        lines.extend(self.companion_differences.iter().cloned());
        lines.extend(self.unchecked.iter().cloned());
        if let Some(f) = &self.run_failure {
            lines.push(format!("the rerun failed: {f}"));
        }
        for o in &self.outputs {
            let who = format!("{} ({})", o.stage, subject_label(o.subject.as_deref()));
            lines.push(match &o.verdict {
                Verdict::Identical => format!("{who}: bit-identical"),
                Verdict::Differs(Some(d)) => {
                    format!("{who}: differs, largest absolute difference {d:e}")
                }
                Verdict::Differs(None) => format!("{who}: differs (old values not available)"),
                Verdict::Missing => format!("{who}: not produced by the rerun"),
                Verdict::NotHashed => format!(
                    "{who}: not compared (streamed into its consumer, never whole, so not \
                     hashed); checked through the outputs it feeds"
                ),
            });
        }
        lines
    }
}

/// Errors that stop `verify` before it can compare anything.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct VerifyError(pub String);

/// Verify a manifest, with the recordings where the run read them.
pub fn verify(manifest_path: &Path, env: Env<'_>) -> Result<VerifyReport, VerifyError> {
    verify_with(manifest_path, None, env)
}

/// Verify a manifest; with `data`, the recordings are looked for under that folder (another
/// machine, a moved folder): each recorded input by its path below the recordings glob's root
/// folder (`../demo-data/sub-01/eeg/x.edf` as `DATA/sub-01/eeg/x.edf`), checked by hash, and
/// the rerun reads them there.
pub fn verify_with(
    manifest_path: &Path,
    data: Option<&Path>,
    env: Env<'_>,
) -> Result<VerifyReport, VerifyError> {
    let old = manifest::read(manifest_path).map_err(|e| VerifyError(e.to_string()))?;
    let output = output_dir(manifest_path);
    let pipeline_file = output.join(&old.pipeline.path);
    let place = match data {
        None => Place::AsRecorded,
        Some(root) => {
            if !root.is_dir() {
                return Err(VerifyError(format!(
                    "--data {}: no such folder",
                    root.display()
                )));
            }
            // The glob's root folder, as the pipeline file names it.
            match crate::pipeline::resolve::load(&pipeline_file, &old.pipeline.overrides, env.ops) {
                Ok(p) => Place::Under {
                    glob_root: crate::sources::glob_root(&p.recordings).0,
                    root: root.to_path_buf(),
                },
                Err(_) => Place::AsRecorded,
            }
        }
    };
    let (export_problems, unchecked) = check_exports(&old, &output);
    let mut report = VerifyReport {
        input_problems: check_inputs(&old, &pipeline_file, &place),
        export_problems,
        unchecked,
        ..VerifyReport::default()
    };
    if !pipeline_file.is_file() {
        return Ok(report);
    }
    let scratch = tempfile::tempdir().map_err(|e| VerifyError(e.to_string()))?;
    let options = Options {
        overrides: old.pipeline.overrides.clone(),
        subjects: old.pipeline.subjects.clone().unwrap_or_default(),
        cache: Some(scratch.path().join("cache")),
        output: Some(scratch.path().join("output")),
        data: data.map(Path::to_path_buf),
        ..Options::default()
    };
    let rerun = match session::run(&pipeline_file, &options, env) {
        Ok(summary) => summary.manifest,
        Err(e) => {
            let mut failure = e.to_string();
            let dir = pipeline_file.parent().unwrap_or(Path::new("."));
            if data.is_none() && old.inputs.iter().any(|i| !dir.join(&i.path).is_file()) {
                failure.push_str(
                    " (the recordings are not where the run read them, e.g. not in a bundle:                      `--data DIR` names the folder they are in now)",
                );
            }
            report.run_failure = Some(failure);
            return Ok(report);
        }
    };
    let new_store = Store::new(scratch.path().join("cache"));
    let old_store = Store::new(
        pipeline_file
            .parent()
            .unwrap_or(Path::new("."))
            .join(".phasewise"),
    );
    for unit in &old.units {
        report
            .companion_differences
            .extend(compare_companions(unit, &rerun));
        let verdict = compare_unit(unit, &rerun, &output, &old_store, &new_store);
        report.outputs.push(OutputCheck {
            stage: unit.stage.clone(),
            subject: unit.subject.clone(),
            verdict,
        });
    }
    Ok(report)
}

/// The output folder of a manifest (parts live one level down, in `manifest.parts/`).
fn output_dir(manifest_path: &Path) -> PathBuf {
    let dir = manifest_path.parent().unwrap_or(Path::new("."));
    if dir.file_name().is_some_and(|n| n == "manifest.parts") {
        dir.parent().unwrap_or(dir).to_path_buf()
    } else {
        dir.to_path_buf()
    }
}

/// Where `verify` looks for the recorded inputs.
enum Place {
    /// At their recorded paths, relative to the pipeline file.
    AsRecorded,
    /// Below `root`, at their recorded paths' part below `glob_root` (`--data`).
    Under { glob_root: PathBuf, root: PathBuf },
}

fn check_inputs(old: &Manifest, pipeline_file: &Path, place: &Place) -> Vec<String> {
    let mut problems = Vec::new();
    match hash_file(pipeline_file) {
        Err(_) => problems.push(format!(
            "the pipeline file {} is missing",
            pipeline_file.display()
        )),
        Ok((_, hash)) if hash != old.pipeline.blake3 => problems.push(format!(
            "the pipeline file {} changed",
            pipeline_file.display()
        )),
        Ok(_) => {}
    }
    let dir = pipeline_file.parent().unwrap_or(Path::new("."));
    for input in &old.inputs {
        let (path, shown) = match place {
            Place::AsRecorded => (dir.join(&input.path), input.path.clone()),
            Place::Under { glob_root, root } => {
                match Path::new(&input.path).strip_prefix(glob_root) {
                    Ok(below) => (root.join(below), root.join(below).display().to_string()),
                    Err(_) => {
                        problems.push(format!(
                            "input file {} is not below the recordings' folder {}, so --data \
                             cannot say where it is now",
                            input.path,
                            glob_root.display()
                        ));
                        continue;
                    }
                }
            }
        };
        match hash_file(&path) {
            Err(_) => problems.push(format!("input file {shown} is missing")),
            Ok((size, hash)) if size != input.size || hash != input.blake3 => {
                problems.push(format!("input file {shown} changed"))
            }
            Ok(_) => {}
        }
    }
    problems
}

/// The recorded exports against the output folder: an NPY by its blake3, a Zarr store by the
/// blake3 of each of its files (naming those that changed, are missing or were added), the
/// sidecar, table and column dictionary by theirs. Returns the problems, and a note when some
/// exports' sidecars and tables have no recorded hash (an older manifest).
fn check_exports(old: &Manifest, output: &Path) -> (Vec<String>, Vec<String>) {
    let mut problems = Vec::new();
    let mut unrecorded = Vec::new();
    for unit in &old.units {
        for record in &unit.outputs {
            let Some(file) = &record.file else { continue };
            match &record.companions {
                None => unrecorded.push(file.clone()),
                Some(companions) => problems.extend(changed_companions(companions, output)),
            }
            let path = output.join(file);
            match &record.store {
                Some(_) if !path.is_dir() => {
                    problems.push(format!("the exported store {file} is missing"))
                }
                Some(recorded) => {
                    let changed = crate::zarr::changed_files(&path, recorded);
                    if !changed.is_empty() {
                        problems.push(format!(
                            "the exported store {file} changed since the run: {}",
                            changed.join(", ")
                        ));
                    }
                }
                None if record.blake3.is_empty() => {}
                None => match hash_file(&path) {
                    Err(_) => problems.push(format!("the exported file {file} is missing")),
                    Ok((_, hash)) if hash != record.blake3 => {
                        problems.push(format!("the exported file {file} changed since the run"))
                    }
                    Ok(_) => {}
                },
            }
        }
    }
    let mut unchecked = Vec::new();
    if !unrecorded.is_empty() {
        unchecked.push(format!(
            "not checked: the sidecars and tables exported beside {} ({}): this manifest records              no hash of them (written by an older phasewise, or its export record was lost), so              only the arrays were checked; running the pipeline again records them",
            words::count(unrecorded.len(), "export", "exports"),
            unrecorded.join(", ")
        ));
    }
    (problems, unchecked)
}

/// The recorded companions (sidecar, table, column dictionary) whose file under `root` is
/// missing or no longer has its recorded blake3, one sentence each naming the file.
pub fn changed_companions(companions: &[Companion], root: &Path) -> Vec<String> {
    let mut problems = Vec::new();
    for c in companions {
        let what = c.kind.describe();
        match hash_file(&root.join(&c.file)) {
            Err(_) => problems.push(format!("the exported {what} {} is missing", c.file)),
            Ok((_, hash)) if hash != c.blake3 => problems.push(format!(
                "the exported {what} {} changed since the run (its blake3 is not the one the \
                 manifest records)",
                c.file
            )),
            Ok(_) => {}
        }
    }
    problems
}

/// The sidecar, table and column dictionary of `unit` against those the rerun wrote: one
/// sentence for each whose bytes differ.
fn compare_companions(unit: &UnitRecord, rerun: &Manifest) -> Vec<String> {
    let new = rerun
        .units
        .iter()
        .find(|u| u.stage == unit.stage && u.subject == unit.subject)
        .and_then(|u| u.outputs.first())
        .and_then(|o| o.companions.as_ref());
    let (Some(old), Some(new)) = (
        unit.outputs.first().and_then(|o| o.companions.as_ref()),
        new,
    ) else {
        return Vec::new();
    };
    let who = format!(
        "{} ({})",
        unit.stage,
        subject_label(unit.subject.as_deref())
    );
    old.iter()
        .filter_map(|c| {
            let again = new.iter().find(|n| n.kind == c.kind)?;
            (again.blake3 != c.blake3).then(|| {
                format!(
                    "{who}: the rerun wrote a different {} than {} recorded",
                    c.kind.describe(),
                    c.file
                )
            })
        })
        .collect()
}

fn compare_unit(
    unit: &UnitRecord,
    rerun: &Manifest,
    output: &Path,
    old_store: &Store,
    new_store: &Store,
) -> Verdict {
    let Some(new) = rerun
        .units
        .iter()
        .find(|u| u.stage == unit.stage && u.subject == unit.subject)
    else {
        return Verdict::Missing;
    };
    let (Some(a), Some(b)) = (unit.outputs.first(), new.outputs.first()) else {
        return Verdict::Missing;
    };
    if a.blake3.is_empty() || b.blake3.is_empty() {
        return Verdict::NotHashed;
    }
    if a.blake3 == b.blake3 {
        return Verdict::Identical;
    }
    let old_values = a
        .file
        .as_ref()
        .and_then(|f| read_npy_file(&output.join(f), a.dtype == "<c8"))
        .or_else(|| old_store.load(&unit.key).ok().map(|(arr, _)| arr.values));
    let new_values = new_store.load(&new.key).ok().map(|(arr, _)| arr.values);
    match (old_values, new_values) {
        (Some(x), Some(y)) => Verdict::Differs(max_abs_difference(&x, &y)),
        _ => Verdict::Differs(None),
    }
}

fn read_npy_file(path: &Path, complex: bool) -> Option<Values> {
    let bytes = std::fs::read(path).ok()?;
    values_from_npy(&bytes, complex).ok()
}

/// The largest |a − b| over all elements (NaN where exactly one side is NaN counts as infinite);
/// `None` when shapes or kinds differ.
pub fn max_abs_difference(a: &Values, b: &Values) -> Option<f64> {
    let pairs: Vec<f64> = match (a, b) {
        (Values::Real(x), Values::Real(y)) if x.shape() == y.shape() => x
            .iter()
            .zip(y.iter())
            .map(|(p, q)| difference(f64::from(*p), f64::from(*q)))
            .collect(),
        (Values::Complex(x), Values::Complex(y)) if x.shape() == y.shape() => x
            .iter()
            .zip(y.iter())
            .map(|(p, q)| {
                let re = f64::from(p.re) - f64::from(q.re);
                let im = f64::from(p.im) - f64::from(q.im);
                if re.is_nan() || im.is_nan() {
                    f64::INFINITY
                } else {
                    re.hypot(im)
                }
            })
            .collect(),
        _ => return None,
    };
    Some(pairs.into_iter().fold(0.0, f64::max))
}

fn difference(p: f64, q: f64) -> f64 {
    match (p.is_nan(), q.is_nan()) {
        (true, true) => 0.0,
        (false, false) => (p - q).abs(),
        _ => f64::INFINITY,
    }
}
