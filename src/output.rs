//! Exports (DESIGN §6): what users load directly, next to the manifest.
//!
//! - `<output>/<subject>/<stage>.npy` + `.json` for per-subject stages,
//!   `<output>/group/<stage>.npy` + `.json` for group stages;
//! - a tidy table `<output>/<stage>.tsv` for group outputs whose `meta.extra.table` is true
//!   (`<output>/<subject>/<stage>.tsv` for per-subject ones, so subjects do not overwrite each
//!   other);
//! - `<output>/manifest.json` (written by the caller through [`write_atomically`]).
//!
//! The NPY holds the cached object's bytes, unchanged; the JSON holds dims, coords, units, meta
//! and the NPY's blake3. Every file is written atomically, and only when it does not already
//! hold this unit's result: after an export, an *export record* in the cache
//! (`<cache>/exports/<id>.json`, see [`ExportRecord`]) keeps the unit's key and blake3 and the
//! stat (size, modification and change time, inode) of every file written. A rerun whose record
//! still matches the unit and every file's stat writes nothing, without reading or formatting
//! anything; a file that was edited, replaced or deleted no longer matches and the unit's
//! exports are written again. Exports are copies, never links into the cache, so editing one
//! cannot damage the cache. Temporary files a killed run left in an output folder are removed by
//! the next run that exports there.

use std::path::{Path, PathBuf};

use std::io::Write;

use phasewise_stages::LabelledArray;
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::fsio::{
    atomic_write, bookkeeping_write, remove_stale_temps, write_then_rename, Declined, Destination,
    WriteReason,
};
use crate::manifest::{Companion, CompanionKind};
use crate::store::{write_npy_to, Damage, ObjectRecord, Store, StoreError};

/// An export that could not be written.
#[derive(Debug, thiserror::Error)]
#[error("cannot write {path}: {message}")]
pub struct OutputError {
    /// The file.
    pub path: PathBuf,
    /// Why.
    pub message: String,
}

impl OutputError {
    /// A write of `path` that the system refused.
    pub fn io(path: &Path, error: &std::io::Error) -> OutputError {
        OutputError {
            path: path.to_path_buf(),
            message: WriteReason(error, Destination::Output).to_string(),
        }
    }
}

/// Where one unit's exports go.
pub struct ExportTarget<'a> {
    /// The output folder.
    pub output: &'a Path,
    /// The unit's subject, `None` for group units.
    pub subject: Option<&'a str>,
    /// The stage.
    pub stage: &'a str,
    /// How it is written (the stage's `format:`).
    pub format: ExportFormat,
}

/// How an exported stage is written: its `format:` key (DESIGN §6).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum ExportFormat {
    /// An NPY file and its format-2 JSON sidecar (the default).
    #[default]
    Npy,
    /// One Zarr v3 store, chunked and compressed ([`crate::zarr`]).
    Zarr,
}

impl ExportFormat {
    /// The values the `format:` key takes, as written.
    pub const NAMES: [&'static str; 2] = ["npy", "zarr"];

    /// The format a `format:` value names.
    pub fn from_name(name: &str) -> Option<ExportFormat> {
        match name {
            "npy" => Some(ExportFormat::Npy),
            "zarr" => Some(ExportFormat::Zarr),
            _ => None,
        }
    }
}

impl ExportTarget<'_> {
    /// The NPY path relative to the output folder, as the manifest records it.
    pub fn relative_npy(&self) -> String {
        format!("{}/{}.npy", self.subject.unwrap_or("group"), self.stage)
    }

    /// The exported file (the NPY) or store (`<stage>.zarr`) relative to the output folder, as
    /// the manifest records it.
    pub fn relative_path(&self) -> String {
        match self.format {
            ExportFormat::Npy => self.relative_npy(),
            ExportFormat::Zarr => format!(
                "{}/{}.{}",
                self.subject.unwrap_or("group"),
                self.stage,
                crate::zarr::STORE_EXTENSION
            ),
        }
    }
}

/// Where an export's values come from.
pub enum ExportFrom<'a> {
    /// An array in memory (just computed, or loaded for its table).
    Array(&'a LabelledArray),
    /// The stored object: copied, and hash-checked on the way.
    Object,
}

/// Why an export was not written.
#[derive(Debug)]
pub enum ExportError {
    /// A file could not be written.
    Output(OutputError),
    /// The stored object did not match its record (nothing was written from it).
    Damaged(Damage),
}

impl From<OutputError> for ExportError {
    fn from(e: OutputError) -> Self {
        ExportError::Output(e)
    }
}

/// The stat of one exported file, as recorded after writing it.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileStat {
    /// The file.
    pub path: String,
    /// Size in bytes.
    pub size: u64,
    /// Modification time, ns since the epoch.
    pub mtime_ns: i128,
    /// Status-change time, ns since the epoch (Unix; 0 elsewhere): no edit can set it back.
    pub ctime_ns: i128,
    /// Inode number (Unix; 0 elsewhere).
    pub inode: u64,
}

/// What a unit's last export wrote (kept in the cache, never in the output folder).
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct ExportRecord {
    /// [`EXPORT_FORMAT_VERSION`].
    pub format_version: u32,
    /// The unit's key.
    pub key: String,
    /// The blake3 of its NPY.
    pub blake3: String,
    /// Every file written, with its stat right after.
    pub files: Vec<FileStat>,
    /// For a Zarr store: the blake3 of each of its files, by path inside the store (for the
    /// manifest, [`recorded_export`]).
    #[serde(default, skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub store: crate::zarr::StoreHashes,
    /// The sidecar, table and column dictionary written, with the blake3 of the bytes written
    /// (for the manifest's `companions`).
    #[serde(default)]
    pub companions: Vec<Companion>,
}

impl ExportRecord {
    /// The Zarr store's hashes, `None` for an NPY export.
    pub fn store_hashes(&self) -> Option<crate::zarr::StoreHashes> {
        (!self.store.is_empty()).then(|| self.store.clone())
    }
}

/// Version of [`ExportRecord`]; records of another version are ignored (the export is written).
/// 3: `companions`.
pub const EXPORT_FORMAT_VERSION: u32 = 3;

impl ExportTarget<'_> {
    fn npy_path(&self) -> PathBuf {
        self.output.join(self.relative_npy())
    }

    fn tsv_path(&self) -> PathBuf {
        self.output.join(self.relative_tsv())
    }

    /// The table relative to the output folder.
    fn relative_tsv(&self) -> String {
        match self.subject {
            None => format!("{}.tsv", self.stage),
            Some(s) => format!("{s}/{}.tsv", self.stage),
        }
    }

    /// The column dictionary of the stage's tables, `<output>/<stage>.json`: beside a group
    /// table, and above the subjects' tables of a per-subject stage, to which it applies as a
    /// BIDS sidecar does to the files below it (the BIDS inheritance principle); the subjects'
    /// folders already hold the arrays' `<stage>.json`.
    fn dictionary_path(&self) -> PathBuf {
        self.output.join(self.relative_dictionary())
    }

    /// The column dictionary relative to the output folder.
    fn relative_dictionary(&self) -> String {
        format!("{}.json", self.stage)
    }

    /// The files whose stat the export record keeps: the NPY, JSON and (for tables) TSV an
    /// export of `record` writes, and the stored object it copies, so that an object changed
    /// since (damaged, rewritten) is exported again — and hash-checked on the way.
    fn files(&self, record: &ObjectRecord, store: &Store) -> Vec<PathBuf> {
        let npy = self.npy_path();
        let mut files = match self.format {
            ExportFormat::Npy => vec![npy.clone(), npy.with_extension("json")],
            ExportFormat::Zarr => crate::zarr::store_files(&self.output.join(self.relative_path()))
                .map_or_else(
                    |_| vec![self.output.join(self.relative_path())],
                    |f| f.into_iter().map(|(_, path)| path).collect(),
                ),
        };
        if is_table(record) {
            files.push(self.tsv_path());
            files.push(self.dictionary_path());
        }
        if record.stored {
            files.push(store.object_paths(&record.key).0);
        }
        files
    }

    /// Where the export record of this target lives in the cache.
    pub(crate) fn record_path(&self, store: &Store) -> PathBuf {
        export_record_path(&self.output.join(self.relative_path()), store)
    }
}

/// Where the export record of the export at `path` lives in the cache.
fn export_record_path(path: &Path, store: &Store) -> PathBuf {
    let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
    let id = blake3::hash(absolute.to_string_lossy().as_bytes()).to_hex();
    store
        .root()
        .join("exports")
        .join(format!("{}.json", &id[..32]))
}

fn stat_of(path: &Path) -> Option<FileStat> {
    let meta = std::fs::metadata(path).ok()?;
    let ns = |t: std::time::SystemTime| {
        t.duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.as_nanos() as i128)
            .unwrap_or_else(|e| -(e.duration().as_nanos() as i128))
    };
    let mtime_ns = ns(meta.modified().ok()?);
    #[cfg(unix)]
    let (ctime_ns, inode) = {
        use std::os::unix::fs::MetadataExt;
        (
            i128::from(meta.ctime()) * 1_000_000_000 + i128::from(meta.ctime_nsec()),
            meta.ino(),
        )
    };
    #[cfg(not(unix))]
    let (ctime_ns, inode) = (0, 0);
    Some(FileStat {
        path: path.to_string_lossy().into_owned(),
        size: meta.len(),
        mtime_ns,
        ctime_ns,
        inode,
    })
}

/// True when the target's files still hold exactly `record`'s export: its export record names
/// this key and blake3, and every file's stat is unchanged since it was written. Reads one small
/// record and stats the files; nothing else.
pub fn is_current(target: &ExportTarget<'_>, record: &ObjectRecord, store: &Store) -> bool {
    let Ok(bytes) = std::fs::read(target.record_path(store)) else {
        return false;
    };
    let Ok(last) = serde_json::from_slice::<ExportRecord>(&bytes) else {
        return false;
    };
    if last.format_version != EXPORT_FORMAT_VERSION
        || last.key != record.key
        || last.blake3 != record.blake3
    {
        return false;
    }
    let files = target.files(record, store);
    files.len() == last.files.len()
        && files
            .iter()
            .zip(&last.files)
            .all(|(path, was)| stat_of(path).as_ref() == Some(was))
}

/// Write a unit's NPY, JSON and (for tables) TSV, then its export record; returns the NPY's
/// path relative to the output. The caller asks [`is_current`] first.
pub fn export(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
    from: ExportFrom<'_>,
    store: &Store,
) -> Result<String, ExportError> {
    if target.format == ExportFormat::Zarr {
        return crate::zarr::export(target, record, from, store);
    }
    let relative = target.relative_npy();
    let npy_path = target.npy_path();
    if let Some(dir) = npy_path.parent() {
        remove_stale_temps(dir);
    }
    let record_path = target.record_path(store);
    // A stale export record must never vouch for files about to change.
    let _ = std::fs::remove_file(&record_path);
    let fail = |e: std::io::Error| OutputError::io(&npy_path, &e);
    // A stored object is exported as a second name of its file (no copy; hash-checked on the
    // way); where no link can be made (another filesystem), it is copied, or written from
    // memory. An array in memory whose stored object turns out damaged is written from memory.
    let linked = match record.stored {
        true => match store.link_object(&record.key, record, &npy_path) {
            Ok(Ok(())) => true,
            Ok(Err(why)) if matches!(from, ExportFrom::Object) => {
                return Err(ExportError::Damaged(why))
            }
            Ok(Err(_)) | Err(_) => false,
        },
        false => false,
    };
    match from {
        _ if linked => {}
        ExportFrom::Object => {
            store
                .copy_object(&record.key, record, &npy_path)
                .map_err(fail)?
                .map_err(ExportError::Damaged)?;
        }
        ExportFrom::Array(array) => {
            let values = &array.values;
            let written = write_then_rename(&npy_path, false, |file| {
                let mut out = std::io::BufWriter::with_capacity(1 << 20, file);
                let done = write_npy_to(values, &mut out).map_err(Declined::Wrong);
                out.flush()?;
                Ok(done)
            });
            let declined = |e: StoreError| match e.writing(&npy_path) {
                StoreError::Write { source, .. } => fail(source),
                other => OutputError {
                    path: npy_path.clone(),
                    message: other.to_string(),
                },
            };
            written.map_err(fail)?.map_err(|d| match d {
                Declined::Wrong(e) => declined(e),
                Declined::Unchanged => unreachable!("a written export's writer does not compare"),
            })?;
        }
    }
    let sidecar = sidecar(target, record);
    let text = serde_json::to_vec_pretty(&sidecar).map_err(|e| OutputError {
        path: npy_path.with_extension("json"),
        message: e.to_string(),
    })?;
    write_atomically(&npy_path.with_extension("json"), &text)?;
    let mut companions = vec![Companion {
        kind: CompanionKind::Sidecar,
        file: format!("{}.json", relative.trim_end_matches(".npy")),
        blake3: blake3::hash(&text).to_hex().to_string(),
    }];
    companions.extend(write_tables(target, record, from, store)?);
    write_export_record(target, record, store, Default::default(), companions);
    Ok(relative)
}

/// For a table (`meta.extra.table`), write its column dictionary and its TSV; returns them as
/// the manifest records them (none for an output that is no table).
pub(crate) fn write_tables(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
    from: ExportFrom<'_>,
    store: &Store,
) -> Result<Vec<Companion>, ExportError> {
    if !is_table(record) {
        return Ok(Vec::new());
    }
    let columns = write_column_dictionary(target, record)?;
    let table = match from {
        ExportFrom::Array(array) => write_table(target, array)?,
        ExportFrom::Object => {
            let values = store
                .load_values(&record.key, record)
                .map_err(ExportError::Damaged)?;
            let array = LabelledArray::checked(record.layout.clone(), values)
                .map_err(|e| ExportError::Damaged(Damage::Layout(e.into())))?;
            write_table(target, &array)?
        }
    };
    Ok(vec![
        Companion {
            kind: CompanionKind::Table,
            file: target.relative_tsv(),
            blake3: table,
        },
        Companion {
            kind: CompanionKind::Columns,
            file: target.relative_dictionary(),
            blake3: columns,
        },
    ])
}

/// Keep the stat of every file just written (and, for a store, its files' hashes; the hashes
/// of the sidecar and tables written) in the export record, which [`is_current`] reads on the
/// next run and the manifest takes its hashes from ([`recorded_export`]).
pub(crate) fn write_export_record(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
    store: &Store,
    hashes: crate::zarr::StoreHashes,
    companions: Vec<Companion>,
) {
    let files: Option<Vec<FileStat>> = target
        .files(record, store)
        .iter()
        .map(|p| stat_of(p))
        .collect();
    if let Some(files) = files {
        let last = ExportRecord {
            format_version: EXPORT_FORMAT_VERSION,
            key: record.key.clone(),
            blake3: record.blake3.clone(),
            files,
            store: hashes,
            companions,
        };
        // Losing the record only costs a rewrite next time.
        if let Ok(bytes) = serde_json::to_vec(&last) {
            let _ = bookkeeping_write(&target.record_path(store), &bytes);
        }
    }
}

/// The export record of the export at `relative` (below `output`): the hashes of the files
/// written (a Zarr store's files, the sidecar and tables) as they were when written. `None`
/// when the record is gone or of another version (the manifest then lists none of them).
pub fn recorded_export(output: &Path, relative: &str, store: &Store) -> Option<ExportRecord> {
    let bytes = std::fs::read(export_record_path(&output.join(relative), store)).ok()?;
    serde_json::from_slice::<ExportRecord>(&bytes)
        .ok()
        .filter(|r| r.format_version == EXPORT_FORMAT_VERSION)
}

/// Version of the exported sidecar's form ([`sidecar`]).
pub const SIDECAR_FORMAT_VERSION: u32 = 2;

/// The units of a coordinate axis, by the axis names of DESIGN §2.
pub fn axis_units(dim: &str) -> Option<&'static str> {
    match dim {
        "freq" => Some("Hz"),
        "time" => Some("s"),
        _ => None,
    }
}

/// Attribute names of the sidecar that the op's metadata may not take.
const OWN_ATTRS: [&str; 7] = [
    "units",
    "stage",
    "subject",
    "key",
    "blake3",
    "format",
    "format_version",
];

/// The exported sidecar, format 2 (DESIGN §6): the shape of xarray's
/// `DataArray.to_dict(data=False)`, so that
/// `xarray.DataArray.from_dict({**json.load(f), "data": numpy.load(npy)})` loads the array.
/// `coords` maps a name to `{"dims", "data", "attrs"}` (units on `freq`, `time`); a pair axis
/// has no coordinate of its own but two along it, `channel_a` and `channel_b`; subjects carry
/// their BIDS names (`sub-01`, `group`). `attrs` holds the values' units, the stage, subject,
/// key, blake3, the format and its version, and the op's metadata: its fields (`sampling_rate`,
/// `events`, `trials`, `positions`, ...) and the entries of its `extra` at the top level (one
/// whose name the sidecar's own attributes take is kept under `meta_<name>`).
pub fn sidecar(target: &ExportTarget<'_>, record: &ObjectRecord) -> serde_json::Value {
    use phasewise_stages::table::bids_subject;
    use phasewise_stages::Coord;
    use serde_json::{Map, Value};
    let layout = &record.layout;
    let mut coords = Map::new();
    for (dim, coord) in layout.dims.iter().zip(&layout.coords) {
        let mut attrs = Map::new();
        if let Some(units) = axis_units(dim) {
            attrs.insert("units".into(), json!(units));
        }
        let along = |data: Value, attrs: Map<String, Value>| json!({ "dims": [dim], "data": data, "attrs": attrs });
        match coord {
            Coord::Pairs(pairs) => {
                for (side, name) in ["channel_a", "channel_b"].into_iter().enumerate() {
                    let channels: Vec<&str> = pairs.iter().map(|p| p[side].as_str()).collect();
                    coords.insert(name.into(), along(json!(channels), Map::new()));
                }
            }
            Coord::Labels(labels) if dim == "subject" => {
                let names: Vec<String> = labels.iter().map(|s| bids_subject(s)).collect();
                coords.insert(dim.clone(), along(json!(names), attrs));
            }
            Coord::Labels(labels) => {
                coords.insert(dim.clone(), along(json!(labels), attrs));
            }
            Coord::Numbers(numbers) => {
                coords.insert(dim.clone(), along(json!(numbers), attrs));
            }
        }
    }
    let mut attrs = Map::new();
    attrs.insert("units".into(), json!(layout.units));
    attrs.insert("stage".into(), json!(target.stage));
    attrs.insert(
        "subject".into(),
        json!(target.subject.map_or_else(|| "group".into(), bids_subject)),
    );
    attrs.insert("key".into(), json!(record.key));
    attrs.insert("blake3".into(), json!(record.blake3));
    attrs.insert("format".into(), json!("phasewise-array"));
    attrs.insert("format_version".into(), json!(SIDECAR_FORMAT_VERSION));
    let mut meta = match serde_json::to_value(&layout.meta) {
        Ok(Value::Object(m)) => m,
        _ => Map::new(),
    };
    let extra = match meta.remove("extra") {
        Some(Value::Object(extra)) => extra,
        _ => Map::new(),
    };
    for (name, value) in meta.into_iter().chain(extra) {
        let name = match OWN_ATTRS.contains(&name.as_str()) || attrs.contains_key(&name) {
            true => format!("meta_{name}"),
            false => name,
        };
        attrs.insert(name, value);
    }
    json!({
        "name": target.stage,
        "dims": layout.dims,
        "coords": coords,
        "attrs": attrs,
        "dtype": match record.dtype.as_str() {
            "<c8" => "complex64",
            "<f4" => "float32",
            other => other,
        },
        "shape": record.shape,
    })
}

/// Why a format-2 sidecar's axes cannot be read ([`sidecar_axes`]).
#[derive(Debug, thiserror::Error)]
pub enum SidecarAxesError {
    /// `dims` is not a list of names.
    #[error("`dims` should be a list of axis names ({0})")]
    Dims(serde_json::Error),
    /// `coords` is not an object.
    #[error("`coords` should map coordinate names to {{dims, data, attrs}}")]
    Coords,
    /// A coordinate lies along other axes than its own.
    #[error("coordinate `{name}` should lie along `{dim}` alone")]
    NotAlong {
        /// The coordinate.
        name: String,
        /// The axis it should lie along.
        dim: String,
    },
    /// A coordinate without values.
    #[error("coordinate `{0}` has no `data` list")]
    NoData(String),
    /// A label coordinate with values that are not text.
    #[error("coordinate `{0}` mixes text with other values")]
    MixedText(String),
    /// An axis without a coordinate (nor a channel_a/channel_b pair of them).
    #[error("axis `{0}` has no coordinate")]
    NoCoordinate(String),
}

/// The axis names and coordinates of a format-2 sidecar ([`sidecar`]), read back: one list
/// per axis, a pair axis from its `channel_a`, `channel_b` coordinates. Subjects keep the
/// names the sidecar gives them (`sub-01`).
pub fn sidecar_axes(
    sidecar: &serde_json::Value,
) -> Result<(Vec<String>, Vec<phasewise_stages::Coord>), SidecarAxesError> {
    use phasewise_stages::Coord;
    use serde_json::Value;
    let dims: Vec<String> =
        serde_json::from_value(sidecar["dims"].clone()).map_err(SidecarAxesError::Dims)?;
    let coords = sidecar["coords"]
        .as_object()
        .ok_or(SidecarAxesError::Coords)?;
    let along = |name: &str, dim: &str| -> Result<Option<&Vec<Value>>, SidecarAxesError> {
        let Some(c) = coords.get(name) else {
            return Ok(None);
        };
        if c["dims"] != json!([dim]) {
            return Err(SidecarAxesError::NotAlong {
                name: name.to_string(),
                dim: dim.to_string(),
            });
        }
        c["data"]
            .as_array()
            .map(Some)
            .ok_or_else(|| SidecarAxesError::NoData(name.to_string()))
    };
    let texts = |name: &str, data: &[Value]| -> Result<Vec<String>, SidecarAxesError> {
        data.iter()
            .map(|v| v.as_str().map(str::to_string))
            .collect::<Option<_>>()
            .ok_or_else(|| SidecarAxesError::MixedText(name.to_string()))
    };
    let mut out = Vec::with_capacity(dims.len());
    for dim in &dims {
        let coord = match along(dim, dim)? {
            Some(data) if data.iter().all(Value::is_number) => Coord::Numbers(
                data.iter()
                    .map(|v| v.as_f64().unwrap_or(f64::NAN))
                    .collect(),
            ),
            Some(data) => Coord::Labels(texts(dim, data)?),
            None => match (along("channel_a", dim)?, along("channel_b", dim)?) {
                (Some(a), Some(b)) if a.len() == b.len() => {
                    let (a, b) = (texts("channel_a", a)?, texts("channel_b", b)?);
                    Coord::Pairs(a.into_iter().zip(b).map(|(a, b)| [a, b]).collect())
                }
                _ => return Err(SidecarAxesError::NoCoordinate(dim.clone())),
            },
        };
        out.push(coord);
    }
    Ok((dims, out))
}

/// Write the column dictionary of the unit's table ([`ExportTarget::dictionary_path`]); returns
/// the blake3 of its bytes.
fn write_column_dictionary(
    target: &ExportTarget<'_>,
    record: &ObjectRecord,
) -> Result<String, OutputError> {
    let path = target.dictionary_path();
    let dictionary = phasewise_stages::table::column_dictionary(&record.layout);
    let fail = |message: String| OutputError {
        path: path.clone(),
        message,
    };
    if path == target.output.join("manifest.json") {
        return Err(fail(format!(
            "the table of stage `{}` would have its column dictionary where the manifest goes; \
             rename the stage",
            target.stage
        )));
    }
    let text = serde_json::to_vec_pretty(&dictionary).map_err(|e| fail(e.to_string()))?;
    write_atomically(&path, &text)?;
    Ok(blake3::hash(&text).to_hex().to_string())
}

/// True for outputs that are also written as a tidy table.
pub fn is_table(record: &ObjectRecord) -> bool {
    record.layout.meta.extra.get("table") == Some(&serde_json::Value::Bool(true))
}

/// The table of `array`, streamed to its file as it is formatted (never whole in memory), and
/// hashed on the way; returns the blake3 of its bytes.
fn write_table(target: &ExportTarget<'_>, array: &LabelledArray) -> Result<String, OutputError> {
    let mut hasher = blake3::Hasher::new();
    write_streamed_atomically(&target.tsv_path(), |sink| {
        phasewise_stages::table::write_tidy_tsv(array, &mut |piece: &str| {
            hasher.update(piece.as_bytes());
            sink(piece)
        })
    })?;
    Ok(hasher.finalize().to_hex().to_string())
}

/// [`write_atomically`] for text that `fill` hands on piece by piece: through a temporary file,
/// and the file already at `path` left alone (with its modification time) when it holds exactly
/// this text, found by comparing along the way.
fn write_streamed_atomically(
    path: &Path,
    fill: impl FnOnce(&mut (dyn FnMut(&str) -> std::io::Result<()> + Send)) -> std::io::Result<()>,
) -> Result<(), OutputError> {
    let mut old = SameAs::open(path);
    let written = write_then_rename::<_, crate::fsio::Never>(path, false, |file| {
        fill(&mut |piece: &str| {
            old.feed(piece.as_bytes());
            file.write_all(piece.as_bytes())
        })?;
        // Declining only stops the rename (and removes the temporary file).
        Ok(if old.finish() {
            Err(Declined::Unchanged)
        } else {
            Ok(())
        })
    });
    match written {
        Ok(Ok(())) | Ok(Err(Declined::Unchanged)) => Ok(()),
        Ok(Err(Declined::Wrong(never))) => match never {},
        Err(e) => Err(OutputError::io(path, &e)),
    }
}

/// Write a file atomically unless it already holds exactly these bytes.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), OutputError> {
    if holds(path, bytes) {
        return Ok(());
    }
    atomic_write(path, bytes).map_err(|e| OutputError::io(path, &e))
}

/// Whether the file at `path` holds exactly `bytes`: its size first, then its contents piece by
/// piece, stopping at the first piece that differs (a changed table usually differs in its first
/// rows, so a rerun reads little of the old one and never holds it whole).
fn holds(path: &Path, bytes: &[u8]) -> bool {
    let mut old = SameAs::open(path);
    if old.len() != Some(bytes.len() as u64) {
        return false;
    }
    old.feed(bytes);
    old.finish()
}

/// Compares bytes handed to it piece by piece with the contents of a file, reading the file
/// along (in pieces of at most [`SAME_AS_PIECE`] bytes) and no further once they differ.
struct SameAs {
    /// The file, while everything fed so far matched it.
    file: Option<std::fs::File>,
    piece: Vec<u8>,
}

const SAME_AS_PIECE: usize = 1 << 18;

impl SameAs {
    /// The file at `path` (none, or not a plain file: nothing matches).
    fn open(path: &Path) -> SameAs {
        let file = std::fs::File::open(path)
            .ok()
            .filter(|f| f.metadata().is_ok_and(|m| m.is_file()));
        SameAs {
            file,
            piece: Vec::new(),
        }
    }

    /// The file's size, if there is a file.
    fn len(&self) -> Option<u64> {
        self.file.as_ref()?.metadata().ok().map(|m| m.len())
    }

    /// Compare the next bytes.
    fn feed(&mut self, mut bytes: &[u8]) {
        use std::io::Read;
        while let (Some(file), false) = (&mut self.file, bytes.is_empty()) {
            let n = bytes.len().min(SAME_AS_PIECE);
            self.piece.resize(n, 0);
            if file.read_exact(&mut self.piece).is_err() || self.piece[..] != bytes[..n] {
                self.file = None;
            }
            bytes = &bytes[n..];
        }
    }

    /// Whether everything fed matched and the file ends there (it may have grown since).
    fn finish(mut self) -> bool {
        use std::io::Read;
        self.file
            .as_mut()
            .is_some_and(|f| matches!(f.read(&mut [0u8; 1]), Ok(0)))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fsio::TEMP_PREFIX;

    #[test]
    #[cfg(unix)]
    fn streamed_writes_replace_changed_contents_only() {
        use std::os::unix::fs::MetadataExt;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.tsv");
        let write = |pieces: &[&str]| {
            write_streamed_atomically(&path, |sink| pieces.iter().try_for_each(|p| sink(p)))
                .unwrap();
            let meta = std::fs::metadata(&path).unwrap();
            (std::fs::read_to_string(&path).unwrap(), meta.ino())
        };
        // Longer than one comparison piece, so later pieces are compared too.
        let long = "x".repeat(SAME_AS_PIECE + 10);
        let (text, first) = write(&["ab", &long, "cd"]);
        assert_eq!(text, format!("ab{long}cd"));
        // The same text in other pieces: the file is left alone (a rename would change it).
        let (text, inode) = write(&["a", &format!("b{long}c"), "d"]);
        assert_eq!((text.len(), inode), (long.len() + 4, first));
        for changed in [
            vec!["ab", &long, "ce"],
            vec!["ab", &long, "c"],
            vec!["ab", &long, "cde"],
        ] {
            let (text, _) = write(&changed);
            assert_eq!(text, changed.concat());
        }
        let no_temps = std::fs::read_dir(dir.path()).unwrap().all(|e| {
            !e.unwrap()
                .file_name()
                .to_string_lossy()
                .starts_with(TEMP_PREFIX)
        });
        assert!(no_temps, "temporary files left behind");
    }

    #[test]
    fn holds_compares_size_and_every_byte() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.tsv");
        // Longer than one piece, so a difference in a later piece must be found too.
        let bytes: Vec<u8> = (0..700_000u32).map(|i| (i % 251) as u8).collect();
        assert!(!holds(&path, &bytes), "no file");
        std::fs::write(&path, &bytes).unwrap();
        assert!(holds(&path, &bytes));
        let mut late = bytes.clone();
        *late.last_mut().unwrap() ^= 1;
        assert!(!holds(&path, &late), "last byte differs");
        assert!(!holds(&path, &bytes[..bytes.len() - 1]), "file is longer");
        let mut longer = bytes.clone();
        longer.push(0);
        assert!(!holds(&path, &longer), "file is shorter");
        std::fs::write(&path, b"").unwrap();
        assert!(holds(&path, b""));
        assert!(!holds(dir.path(), b""), "a folder holds nothing");
    }

    #[test]
    fn write_atomically_replaces_changed_contents_only() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.json");
        write_atomically(&path, b"one").unwrap();
        let before = std::fs::metadata(&path).unwrap().modified().unwrap();
        std::thread::sleep(std::time::Duration::from_millis(20));
        write_atomically(&path, b"one").unwrap();
        assert_eq!(
            std::fs::metadata(&path).unwrap().modified().unwrap(),
            before
        );
        write_atomically(&path, b"two").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"two");
    }
}
