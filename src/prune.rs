//! `prune PIPELINE...`: drop cache objects that no manifest of the given pipelines refers to.
//!
//! The keep-set is every unit key in each pipeline's `manifest.json` and `manifest.parts/*.json`.
//! A cache shared by several pipelines must be pruned with all of them at once, or the others'
//! objects go too. Temporary files older than an hour (left by killed runs) are removed as well;
//! younger ones may belong to a run in progress on another machine.

use std::collections::BTreeSet;
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
    for file in store.object_files() {
        let name = file
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let remove = if name.starts_with(TEMP_PREFIX) {
            is_leftover(&file)
        } else {
            let key = name.split('.').next().unwrap_or_default();
            let keep_it = keep.contains(key);
            if keep_it {
                kept.insert(key.to_string());
            }
            !keep_it
        };
        if remove {
            report.bytes += std::fs::metadata(&file).map_or(0, |m| m.len());
            if dry_run || std::fs::remove_file(&file).is_ok() {
                report.removed.push(file);
            }
        }
    }
    report.kept = kept.len();
    report
}
