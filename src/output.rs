//! Exports (DESIGN §6): what users load directly, next to the manifest.
//!
//! - `<output>/<subject>/<stage>.npy` + `.json` for per-subject stages,
//!   `<output>/group/<stage>.npy` + `.json` for group stages;
//! - a tidy table `<output>/<stage>.tsv` for group outputs whose `meta.extra.table` is true
//!   (`<output>/<subject>/<stage>.tsv` for per-subject ones, so subjects do not overwrite each
//!   other);
//! - `<output>/manifest.json` (written by the caller through [`write_atomically`]).
//!
//! The NPY is the cached object's bytes, unchanged; the JSON holds dims, coords, units, meta and
//! the NPY's blake3. Every file is written atomically, and only when its bytes differ from what is
//! there, so a no-op rerun writes nothing. Temporary files a killed run left in an output folder
//! are removed by the next run that exports there.

use std::path::{Path, PathBuf};

use phasewise_stages::LabelledArray;
use serde_json::json;

use crate::store::{atomic_write, values_from_npy, ObjectRecord, TEMP_PREFIX};

/// An export that could not be written.
#[derive(Debug, thiserror::Error)]
#[error("cannot write {path}: {message}")]
pub struct OutputError {
    /// The file.
    pub path: PathBuf,
    /// Why.
    pub message: String,
}

/// Where one unit's exports go.
pub struct ExportTarget<'a> {
    /// The output folder.
    pub output: &'a Path,
    /// The unit's subject, `None` for group units.
    pub subject: Option<&'a str>,
    /// The stage.
    pub stage: &'a str,
}

impl ExportTarget<'_> {
    /// The NPY path relative to the output folder, as the manifest records it.
    pub fn relative_npy(&self) -> String {
        format!("{}/{}.npy", self.subject.unwrap_or("group"), self.stage)
    }
}

/// Write a unit's NPY, JSON and (for tables) TSV; returns the NPY's path relative to the output.
pub fn export(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
    npy: &[u8],
) -> Result<String, OutputError> {
    let relative = target.relative_npy();
    let npy_path = target.output.join(&relative);
    if let Some(dir) = npy_path.parent() {
        remove_dead_temps(dir);
    }
    write_atomically(&npy_path, npy)?;
    let sidecar = json!({
        "stage": target.stage,
        "subject": target.subject,
        "key": record.key,
        "blake3": record.blake3,
        "shape": record.shape,
        "dtype": record.dtype,
        "dims": record.layout.dims,
        "coords": record.layout.coords,
        "units": record.layout.units,
        "meta": record.layout.meta,
    });
    let text = serde_json::to_vec_pretty(&sidecar).map_err(|e| OutputError {
        path: npy_path.with_extension("json"),
        message: e.to_string(),
    })?;
    write_atomically(&npy_path.with_extension("json"), &text)?;
    if is_table(record) {
        write_table(target, record, npy)?;
    }
    Ok(relative)
}

fn is_table(record: &ObjectRecord) -> bool {
    record.layout.meta.extra.get("table") == Some(&serde_json::Value::Bool(true))
}

fn write_table(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
    npy: &[u8],
) -> Result<(), OutputError> {
    let path = match target.subject {
        None => target.output.join(format!("{}.tsv", target.stage)),
        Some(s) => target.output.join(s).join(format!("{}.tsv", target.stage)),
    };
    let fail = |message: String| OutputError {
        path: path.clone(),
        message,
    };
    let values = values_from_npy(npy, record.layout.complex).map_err(fail)?;
    let array =
        LabelledArray::checked(record.layout.clone(), values).map_err(|e| fail(e.to_string()))?;
    let table = phasewise_stages::table::tidy_tsv(&array);
    write_atomically(&path, table.as_bytes())
}

/// Remove temporary files left in `dir` by killed runs: those named after a process that no
/// longer exists on this machine. Where liveness cannot be told (no `/proc`), nothing is removed.
/// Another machine's live temporary file could be taken for dead; its rename then fails and that
/// run reports an error — never a wrong file — and in the planned cluster mode each subject's
/// folder has a single writer anyway.
pub fn remove_dead_temps(dir: &Path) {
    let proc_dir = Path::new("/proc");
    if !proc_dir.join("self").exists() {
        return;
    }
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        let pid = name
            .strip_prefix(TEMP_PREFIX)
            .and_then(|rest| rest.split('-').next())
            .and_then(|pid| pid.parse::<u32>().ok());
        if let Some(pid) = pid {
            if !proc_dir.join(pid.to_string()).exists() {
                let _ = std::fs::remove_file(entry.path());
            }
        }
    }
}

/// Write a file atomically unless it already holds exactly these bytes.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), OutputError> {
    if std::fs::read(path).is_ok_and(|existing| existing == bytes) {
        return Ok(());
    }
    atomic_write(path, bytes).map_err(|e| OutputError {
        path: path.to_path_buf(),
        message: e.to_string(),
    })
}
