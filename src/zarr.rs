//! Zarr v3 exports (`format: zarr` on an exported stage; DESIGN §6, README "Results").
//!
//! An exported stage with `format: zarr` is written as one Zarr v3 store,
//! `<output>/<subject>/<stage>.zarr/` (`group/` for group stages), instead of the NPY and its
//! sidecar: a group whose attributes are the sidecar's `attrs` (units, stage, subject, key,
//! blake3, `format: phasewise-array`, `format_version`, the op's metadata), one array of the
//! values named after the stage, and one 1-D array per coordinate of the format-2 sidecar
//! (`freq`, `time` with their units, labels as strings, a pair axis as `channel_a` and
//! `channel_b` along `pair`). Every array carries `dimension_names`; the values array names
//! its non-index coordinates in a `coordinates` attribute (the CF convention xarray reads), so
//! `xarray.open_zarr(path)` gives a Dataset with every coordinate in place.
//!
//! The values are cut into chunks of about [`CHUNK_BYTES`] and each chunk is compressed with
//! gzip and followed by a crc32c checksum (both core codecs of Zarr v3, so every Zarr reader
//! opens it, and a reader that checks the checksum finds a damaged chunk).
//!
//! Written whole or not at all, like every export: the store is built in a temporary folder
//! beside its place, every file and folder of it fsynced, then swapped into place with one
//! rename (Linux `renameat2(RENAME_EXCHANGE)` when an older store is there, so a reader sees
//! the old store or the new one, never a mix; elsewhere the old one is moved aside first, so
//! a crash in between leaves no store, never half of one). The blake3 of every file of the store
//! is returned for the export record and the manifest, so that a rerun and `verify` notice a
//! changed, missing or added file.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use phasewise_stages::{LabelledArray, Values};
use serde_json::{Map, Value};
use zarrs::array::codec::{Crc32cCodec, GzipCodec};
use zarrs::array::{data_type, ArrayBuilder};
use zarrs::filesystem::FilesystemStore;
use zarrs::group::GroupBuilder;

use crate::fsio::{is_leftover, temp_name, TEMP_PREFIX};
use crate::output::{self, ExportError, ExportFrom, ExportTarget, OutputError};
use crate::store::{Damage, ObjectRecord, Store};

/// The file-name extension of a store.
pub const STORE_EXTENSION: &str = "zarr";

/// The uncompressed size a chunk of values aims at. About 1 MiB is common practice for Zarr
/// (large enough that per-chunk overhead is small, small enough to read a slice cheaply).
pub const CHUNK_BYTES: usize = 1 << 20;

/// gzip level of every chunk (the middle of zlib's 1–9; common practice as a default).
pub const GZIP_LEVEL: u32 = 5;

/// The blake3 (hex) of every file of a store, by its path relative to the store with `/`.
pub type StoreHashes = BTreeMap<String, String>;

/// Why a store could not be written.
#[derive(Debug, thiserror::Error)]
pub enum ZarrError {
    /// A file or folder of the store.
    #[error("{path}: {}", crate::fsio::WriteReason(.source, crate::fsio::Destination::Output))]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The store could not be opened on its folder.
    #[error("cannot open a Zarr store there: {0}")]
    Store(#[from] zarrs::filesystem::FilesystemStoreCreateError),
    /// An array's metadata could not be built.
    #[error("Zarr array: {0}")]
    Create(#[from] zarrs::array::ArrayCreateError),
    /// The group's metadata could not be built.
    #[error("Zarr group: {0}")]
    Group(#[from] zarrs::group::GroupCreateError),
    /// Values could not be encoded or stored.
    #[error("Zarr array: {0}")]
    Array(#[from] zarrs::array::ArrayError),
    /// Metadata could not be stored.
    #[error("Zarr metadata: {0}")]
    Storage(#[from] zarrs::storage::StorageError),
    /// The gzip level is out of range (a constant here: an internal mistake).
    #[error("gzip: {0}")]
    Gzip(#[from] zarrs::array::codec::bytes_to_bytes::gzip::GzipCompressionLevelError),
    /// The sidecar this store mirrors lacks a part (an internal mistake, named).
    #[error("the export's description has no {0}")]
    Sidecar(&'static str),
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> ZarrError + '_ {
    move |source| ZarrError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// The chunk shape of an array of `shape` with items of `item` bytes: trailing axes whole as
/// far as [`CHUNK_BYTES`] allows, the axis where the budget runs out cut, leading axes one at
/// a time (so a chunk is one contiguous run of the row-major values). Never zero.
pub fn chunk_shape(shape: &[usize], item: usize) -> Vec<u64> {
    let mut budget = (CHUNK_BYTES / item.max(1)).max(1);
    let mut chunk = vec![1u64; shape.len()];
    for (c, &n) in chunk.iter_mut().zip(shape).rev() {
        let take = n.clamp(1, budget);
        *c = take as u64;
        budget = (budget / take).max(1);
    }
    chunk
}

/// The name of the values array: the stage's, unless a coordinate has it.
pub fn values_name(stage: &str, coords: &Map<String, Value>) -> String {
    match coords.contains_key(stage) {
        true => format!("{stage}_values"),
        false => stage.to_string(),
    }
}

/// Export one unit as a store (the `format: zarr` branch of [`output::export`]): the values
/// (from memory, or the stored object, hash-checked on the way), then the unit's table if it
/// has one, then its export record with the store's hashes. Returns the store's path relative
/// to the output folder.
pub fn export(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
    from: ExportFrom<'_>,
    store: &Store,
) -> Result<String, ExportError> {
    let relative = target.relative_path();
    let path = target.output.join(&relative);
    // A stale export record must never vouch for files about to change.
    let _ = std::fs::remove_file(target.record_path(store));
    let loaded;
    let array = match from {
        ExportFrom::Array(array) => array,
        ExportFrom::Object => {
            let values = store
                .load_values(&record.key, record)
                .map_err(ExportError::Damaged)?;
            loaded = LabelledArray::checked(record.layout.clone(), values)
                .map_err(|e| ExportError::Damaged(Damage::Layout(e.into())))?;
            &loaded
        }
    };
    let sidecar = output::sidecar(target, record);
    let hashes = write_store(&path, &sidecar, &array.values).map_err(|e| OutputError {
        path: path.clone(),
        message: e.to_string(),
    })?;
    let companions = output::write_tables(target, record, ExportFrom::Array(array), store)?;
    output::write_export_record(target, record, store, hashes, companions);
    Ok(relative)
}

/// Write `values` with the coordinates and attributes of their format-2 `sidecar`
/// ([`crate::output::sidecar`]) as a store at `path`, whole or not at all; returns the blake3 of
/// every file written.
pub fn write_store(
    path: &Path,
    sidecar: &Value,
    values: &Values,
) -> Result<StoreHashes, ZarrError> {
    let parent = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(parent).map_err(io(parent))?;
    remove_stale_temp_stores(parent);
    let name = path
        .file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().into_owned());
    let temp = parent.join(temp_name(&name));
    std::fs::create_dir(&temp).map_err(io(&temp))?;
    let built = fill(&temp, sidecar, values).and_then(|()| hash_and_sync(&temp));
    let hashes = match built {
        Ok(h) => h,
        Err(e) => {
            let _ = std::fs::remove_dir_all(&temp);
            return Err(e);
        }
    };
    swap_into_place(&temp, path).map_err(|e| {
        let _ = std::fs::remove_dir_all(&temp);
        io(path)(e)
    })?;
    Ok(hashes)
}

/// The group, the coordinate arrays and the values array, into the empty folder `dir`.
fn fill(dir: &Path, sidecar: &Value, values: &Values) -> Result<(), ZarrError> {
    let store = Arc::new(FilesystemStore::new(dir)?);
    let attrs = sidecar["attrs"]
        .as_object()
        .cloned()
        .ok_or(ZarrError::Sidecar("attrs"))?;
    let coords = sidecar["coords"]
        .as_object()
        .ok_or(ZarrError::Sidecar("coords"))?;
    let dims: Vec<String> = sidecar["dims"]
        .as_array()
        .ok_or(ZarrError::Sidecar("dims"))?
        .iter()
        .filter_map(|d| d.as_str().map(str::to_string))
        .collect();
    let stage = sidecar["name"].as_str().ok_or(ZarrError::Sidecar("name"))?;
    let gzip =
        || -> Result<Arc<GzipCodec>, ZarrError> { Ok(Arc::new(GzipCodec::new(GZIP_LEVEL)?)) };
    let mut written: Vec<String> = Vec::new();
    for (name, coord) in coords {
        let dim = coord["dims"][0]
            .as_str()
            .ok_or(ZarrError::Sidecar("coordinate axis"))?;
        let data = coord["data"]
            .as_array()
            .ok_or(ZarrError::Sidecar("coordinate data"))?;
        let n = data.len() as u64;
        let mut builder = match data.iter().all(Value::is_number) {
            true => ArrayBuilder::new(vec![n], vec![n.max(1)], data_type::float64(), f64::NAN),
            false => ArrayBuilder::new(vec![n], vec![n.max(1)], data_type::string(), ""),
        };
        builder
            .bytes_to_bytes_codecs(vec![gzip()?, Arc::new(Crc32cCodec::new())])
            .dimension_names(Some([dim]))
            .attributes(coord["attrs"].as_object().cloned().unwrap_or_default());
        let array = builder.build(store.clone(), &format!("/{name}"))?;
        array.store_metadata_opt(&metadata_options())?;
        written.push(name.clone());
        let subset = array.subset_all();
        match data.iter().all(Value::is_number) {
            true => {
                let numbers: Vec<f64> = data
                    .iter()
                    .map(|v| v.as_f64().unwrap_or(f64::NAN))
                    .collect();
                array.store_array_subset(&subset, numbers)?;
            }
            false => {
                let texts: Vec<String> = data
                    .iter()
                    .map(|v| v.as_str().map_or_else(|| v.to_string(), str::to_string))
                    .collect();
                array.store_array_subset(&subset, texts)?;
            }
        }
    }
    // Coordinates that are not an axis of their own (`channel_a`, `channel_b` along `pair`).
    let extra: Vec<&str> = coords
        .keys()
        .filter(|name| !dims.iter().any(|d| d == *name))
        .map(String::as_str)
        .collect();
    let mut value_attrs = attrs.clone();
    if !extra.is_empty() {
        value_attrs.insert("coordinates".into(), Value::from(extra.join(" ")));
    }
    let shape: Vec<u64> = values.shape().iter().map(|&n| n as u64).collect();
    let (data_type, item, fill): (_, usize, zarrs::array::builder::ArrayBuilderFillValue) =
        match values {
            Values::Real(_) => (data_type::float32(), 4, f32::NAN.into()),
            Values::Complex(_) => (
                data_type::complex64(),
                8,
                [f32::NAN, f32::NAN]
                    .map(zarrs::metadata::FillValueMetadata::from)
                    .into(),
            ),
        };
    let chunks = chunk_shape(values.shape(), item);
    let array = ArrayBuilder::new(shape, chunks, data_type, fill)
        .bytes_to_bytes_codecs(vec![gzip()?, Arc::new(Crc32cCodec::new())])
        .dimension_names(Some(dims.iter().map(String::as_str)))
        .attributes(value_attrs)
        .build(store.clone(), &format!("/{}", values_name(stage, coords)))?;
    array.store_metadata_opt(&metadata_options())?;
    written.push(values_name(stage, coords));
    let subset = array.subset_all();
    match values {
        Values::Real(a) => {
            let a = a.as_standard_layout();
            array.store_array_subset(&subset, a.as_slice().unwrap_or_default())?;
        }
        Values::Complex(a) => {
            let a = a.as_standard_layout();
            array.store_array_subset(&subset, a.as_slice().unwrap_or_default())?;
        }
    }
    // The group last, with every array's metadata consolidated into it (inline, as zarr-python
    // and zarrs read it; not required by the Zarr v3 core, so `must_understand: false`), so
    // that a reader finds everything in one file: `xarray.open_zarr(path)` opens it without
    // listing the folder, and without a warning. Sorted by name, so the bytes are the same on
    // every run.
    written.sort();
    let mut nodes = Map::new();
    for name in &written {
        let path = dir.join(name).join("zarr.json");
        let text = std::fs::read(&path).map_err(io(&path))?;
        let node: Value = serde_json::from_slice(&text).map_err(|e| ZarrError::Io {
            path: path.clone(),
            source: e.into(),
        })?;
        nodes.insert(name.clone(), node);
    }
    let mut fields = zarrs::metadata::v3::AdditionalFieldsV3::default();
    fields.insert(
        "consolidated_metadata".into(),
        zarrs::metadata::v3::AdditionalFieldV3::new(
            serde_json::json!({ "kind": "inline", "metadata": nodes }),
            false,
        ),
    );
    GroupBuilder::new()
        .attributes(attrs)
        .additional_fields(fields)
        .build(store.clone(), "/")?
        .store_metadata()?;
    Ok(())
}

/// Array metadata as the Zarr v3 specification has it, without zarrs's own `_zarrs`
/// attribute (which readers would show among the export's attributes).
fn metadata_options() -> zarrs::array::ArrayMetadataOptions {
    zarrs::array::ArrayMetadataOptions::default().with_include_zarrs_metadata(false)
}

/// Every file below `dir` with its path relative to `dir` (`/`-separated), sorted.
pub fn store_files(dir: &Path) -> std::io::Result<Vec<(String, PathBuf)>> {
    let mut out = Vec::new();
    let mut pending = vec![dir.to_path_buf()];
    while let Some(folder) = pending.pop() {
        for entry in std::fs::read_dir(&folder)? {
            let entry = entry?;
            let path = entry.path();
            if entry.file_type()?.is_dir() {
                pending.push(path);
            } else {
                let relative = path.strip_prefix(dir).unwrap_or(&path);
                let name = relative
                    .components()
                    .map(|c| c.as_os_str().to_string_lossy())
                    .collect::<Vec<_>>()
                    .join("/");
                out.push((name, path));
            }
        }
    }
    out.sort();
    Ok(out)
}

/// The blake3 of every file of the store at `dir` (`None` when it cannot be read).
pub fn hash_store(dir: &Path) -> Option<StoreHashes> {
    store_files(dir)
        .ok()?
        .into_iter()
        .map(|(name, path)| {
            let bytes = std::fs::read(&path).ok()?;
            Some((name, blake3::hash(&bytes).to_hex().to_string()))
        })
        .collect()
}

/// The files of a store that differ from `recorded` (changed, missing or added), by name.
pub fn changed_files(dir: &Path, recorded: &StoreHashes) -> Vec<String> {
    let now = hash_store(dir).unwrap_or_default();
    let mut changed: Vec<String> = recorded
        .iter()
        .filter(|(name, hash)| now.get(*name) != Some(*hash))
        .map(|(name, _)| name.clone())
        .collect();
    changed.extend(now.keys().filter(|n| !recorded.contains_key(*n)).cloned());
    changed.sort();
    changed
}

/// Hash every file of the finished store and make it durable (files, then folders).
fn hash_and_sync(dir: &Path) -> Result<StoreHashes, ZarrError> {
    let mut hashes = StoreHashes::new();
    let mut folders = std::collections::BTreeSet::new();
    for (name, path) in store_files(dir).map_err(io(dir))? {
        let file = std::fs::File::open(&path).map_err(io(&path))?;
        let mut hasher = blake3::Hasher::new();
        hasher.update_reader(&file).map_err(io(&path))?;
        file.sync_all().map_err(io(&path))?;
        hashes.insert(name, hasher.finalize().to_hex().to_string());
        let mut up = path.parent();
        while let Some(folder) = up.filter(|f| f.starts_with(dir)) {
            folders.insert(folder.to_path_buf());
            up = folder.parent();
        }
    }
    for folder in folders {
        if let Ok(f) = std::fs::File::open(&folder) {
            let _ = f.sync_all();
        }
    }
    Ok(hashes)
}

/// Put the finished store `temp` at `path` with one rename, replacing an older store there.
fn swap_into_place(temp: &Path, path: &Path) -> std::io::Result<()> {
    let parent = path.parent().unwrap_or(Path::new("."));
    let old = std::fs::symlink_metadata(path).ok();
    match old {
        None => std::fs::rename(temp, path)?,
        Some(meta) if meta.is_dir() => {
            if !exchange(temp, path)? {
                // No atomic exchange here: move the old store aside, then the new one in.
                let aside = parent.join(temp_name(&format!("old-{}", display_name(path))));
                std::fs::rename(path, &aside)?;
                std::fs::rename(temp, path)?;
                let _ = std::fs::remove_dir_all(&aside);
                return sync_folder(parent);
            }
            // `temp` now holds the old store.
            let _ = std::fs::remove_dir_all(temp);
        }
        // A file where the store goes (an earlier mistake, or another tool's): replaced.
        Some(_) => {
            std::fs::remove_file(path)?;
            std::fs::rename(temp, path)?;
        }
    }
    sync_folder(parent)
}

fn display_name(path: &Path) -> String {
    path.file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().into_owned())
}

fn sync_folder(dir: &Path) -> std::io::Result<()> {
    if let Ok(d) = std::fs::File::open(dir) {
        let _ = d.sync_all();
    }
    Ok(())
}

/// Exchange two paths atomically; `Ok(false)` where the system cannot.
#[cfg(target_os = "linux")]
fn exchange(a: &Path, b: &Path) -> std::io::Result<bool> {
    use std::os::unix::ffi::OsStrExt;
    let c = |p: &Path| std::ffi::CString::new(p.as_os_str().as_bytes());
    let (Ok(ca), Ok(cb)) = (c(a), c(b)) else {
        return Ok(false);
    };
    // SAFETY: two valid NUL-terminated paths, relative to the working directory.
    let done = unsafe {
        libc::renameat2(
            libc::AT_FDCWD,
            ca.as_ptr(),
            libc::AT_FDCWD,
            cb.as_ptr(),
            libc::RENAME_EXCHANGE,
        )
    };
    if done == 0 {
        return Ok(true);
    }
    let e = std::io::Error::last_os_error();
    match e.raw_os_error() {
        Some(libc::EINVAL | libc::ENOSYS | libc::EOPNOTSUPP) => Ok(false),
        _ => Err(e),
    }
}

#[cfg(not(target_os = "linux"))]
fn exchange(_: &Path, _: &Path) -> std::io::Result<bool> {
    Ok(false)
}

/// Remove temporary store folders a killed run left in `dir` (older than
/// [`crate::fsio::TEMP_GRACE`], as for temporary files).
fn remove_stale_temp_stores(dir: &Path) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let is_dir = entry.file_type().is_ok_and(|t| t.is_dir());
        if is_dir
            && entry.file_name().to_string_lossy().starts_with(TEMP_PREFIX)
            && is_leftover(&entry.path())
        {
            let _ = std::fs::remove_dir_all(entry.path());
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn chunks_keep_trailing_axes_whole_within_the_budget() {
        // 4-byte items: 262144 per chunk.
        assert_eq!(chunk_shape(&[6, 16, 100], 4), vec![6, 16, 100]);
        assert_eq!(chunk_shape(&[10, 1000, 1000], 4), vec![1, 262, 1000]);
        assert_eq!(chunk_shape(&[3, 2_000_000], 4), vec![1, 262_144]);
        assert_eq!(chunk_shape(&[0, 5], 8), vec![1, 5]);
        for shape in [[7usize, 300, 900], [1, 1, 1], [50, 50, 50]] {
            let chunk = chunk_shape(&shape, 4);
            let elements: u64 = chunk.iter().product();
            assert!(
                elements as usize * 4 <= CHUNK_BYTES.max(4),
                "{shape:?} -> {chunk:?}"
            );
            assert!(chunk.iter().all(|&c| c >= 1));
        }
    }

    #[test]
    fn changed_files_names_changed_missing_and_added_files() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("v/c")).unwrap();
        std::fs::write(dir.path().join("zarr.json"), b"{}").unwrap();
        std::fs::write(dir.path().join("v/c/0"), b"abc").unwrap();
        let recorded = hash_store(dir.path()).unwrap();
        assert_eq!(recorded.keys().collect::<Vec<_>>(), ["v/c/0", "zarr.json"]);
        assert!(changed_files(dir.path(), &recorded).is_empty());
        std::fs::write(dir.path().join("v/c/0"), b"abd").unwrap();
        std::fs::write(dir.path().join("v/c/1"), b"new").unwrap();
        std::fs::remove_file(dir.path().join("zarr.json")).unwrap();
        assert_eq!(
            changed_files(dir.path(), &recorded),
            ["v/c/0", "v/c/1", "zarr.json"]
        );
    }

    #[test]
    fn a_store_replaces_the_old_one_whole_and_leaves_no_temporary_folder() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s.zarr");
        let sidecar = serde_json::json!({
            "name": "s", "dims": ["freq"],
            "coords": {"freq": {"dims": ["freq"], "data": [1.0, 2.0], "attrs": {"units": "Hz"}}},
            "attrs": {"units": "1", "format": "phasewise-array"},
        });
        let first = Values::Real(ndarray::arr1(&[1.0f32, 2.0]).into_dyn());
        let a = write_store(&path, &sidecar, &first).unwrap();
        let second = Values::Real(ndarray::arr1(&[1.0f32, 3.0]).into_dyn());
        let b = write_store(&path, &sidecar, &second).unwrap();
        assert_eq!(hash_store(&path).unwrap(), b);
        assert_ne!(a, b, "the values' chunk changed");
        assert!(a.contains_key("zarr.json") && a.contains_key("s/zarr.json"));
        let names: Vec<String> = std::fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names, ["s.zarr"]);
    }
}
