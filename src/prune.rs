//! `prune PIPELINE...`: drop cache objects that no manifest of the given pipelines refers to.
//!
//! The keep-set is every unit key in each pipeline's `manifest.json` and `manifest.parts/*.json`.
//! A cache shared by several pipelines must be pruned with all of them at once, or the others'
//! objects go too. Temporary files older than an hour (left by killed runs) are removed as well;
//! younger ones may belong to a run in progress on another machine.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use crate::fsio::{is_leftover, TEMP_PREFIX};
use crate::manifest;
use crate::store::Store;

/// What `prune` removed (or would remove).
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct PruneReport {
    /// Files removed.
    pub removed: Vec<PathBuf>,
    /// Their total size.
    pub bytes: u64,
    /// Objects kept.
    pub kept: usize,
    /// What was removed, one entry per object (its NPY and record together) or temporary file,
    /// in the order of their paths.
    pub objects: Vec<RemovedObject>,
}

/// One cache object (or left-over temporary file) that `prune` removed or would remove.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct RemovedObject {
    /// Its values (`<key>.npy`), else its record (`<key>.json`, a `cache: false` unit), else
    /// the temporary file.
    pub path: PathBuf,
    /// The size of all its files.
    pub bytes: u64,
    /// What its record says it is: the op that computed it and the subject (`None` for a
    /// group unit). `None` for a temporary file or an unreadable record. An object is named by
    /// its key, which does not depend on the stage's name (two stages with the same op, params
    /// and inputs share one), so the record names the op, not a stage.
    pub made_by: Option<(String, Option<String>)>,
}

/// The unit keys referred to by the manifests in these output folders.
pub fn referenced_keys(outputs: &[PathBuf]) -> Result<BTreeSet<String>, manifest::ManifestError> {
    let mut keys = BTreeSet::new();
    for output in outputs {
        for path in manifest_files(output) {
            let m = manifest::read(&path)?;
            keys.extend(m.units.into_iter().map(|u| u.key));
        }
    }
    Ok(keys)
}

fn manifest_files(output: &Path) -> Vec<PathBuf> {
    let mut files = Vec::new();
    let main = output.join("manifest.json");
    if main.is_file() {
        files.push(main);
    }
    if let Ok(parts) = std::fs::read_dir(output.join("manifest.parts")) {
        let mut parts: Vec<PathBuf> = parts.flatten().map(|e| e.path()).collect();
        parts.sort();
        files.extend(parts);
    }
    // A sweep's variants (`<output>/variants/<name>/`), each with its own manifest.
    if let Ok(variants) = std::fs::read_dir(output.join("variants")) {
        let mut found: Vec<PathBuf> = variants
            .flatten()
            .map(|e| e.path().join("manifest.json"))
            .filter(|p| p.is_file())
            .collect();
        found.sort();
        files.extend(found);
    }
    files
}

/// Remove unreferenced objects (only list them when `dry_run`).
pub fn prune(store: &Store, keep: &BTreeSet<String>, dry_run: bool) -> PruneReport {
    let mut report = PruneReport::default();
    let mut kept = BTreeSet::new();
    // The files of each object to remove, by key (or by file name for a temporary file).
    let mut doomed: BTreeMap<String, Vec<PathBuf>> = BTreeMap::new();
    for file in store.object_files() {
        let name = file
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        if name.starts_with(TEMP_PREFIX) {
            if is_leftover(&file) {
                doomed.entry(name).or_default().push(file);
            }
            continue;
        }
        let key = name.split('.').next().unwrap_or_default();
        if keep.contains(key) {
            kept.insert(key.to_string());
        } else {
            doomed.entry(key.to_string()).or_default().push(file);
        }
    }
    for (name, files) in doomed {
        let made_by = (!name.starts_with(TEMP_PREFIX))
            .then(|| made_by(&store.object_paths(&name).1))
            .flatten();
        let path = files
            .iter()
            .find(|f| f.extension().is_some_and(|e| e == "npy"))
            .unwrap_or(&files[0])
            .clone();
        let (mut bytes, mut any) = (0, false);
        for file in files {
            let size = std::fs::metadata(&file).map_or(0, |m| m.len());
            if dry_run || std::fs::remove_file(&file).is_ok() {
                bytes += size;
                any = true;
                report.removed.push(file);
            }
        }
        if !any {
            continue;
        }
        report.bytes += bytes;
        report.objects.push(RemovedObject {
            path,
            bytes,
            made_by,
        });
    }
    report.kept = kept.len();
    report
}

/// The op and subject an object's record names, read leniently (any record format that has a
/// fingerprint with an op).
fn made_by(record: &Path) -> Option<(String, Option<String>)> {
    let text = std::fs::read(record).ok()?;
    let value: serde_json::Value = serde_json::from_slice(&text).ok()?;
    let fingerprint = value.get("fingerprint")?;
    let op = fingerprint.get("op")?.as_str()?.to_string();
    let subject = fingerprint
        .get("subject")
        .and_then(|s| s.as_str())
        .map(str::to_string);
    Some((op, subject))
}
