//! The content-addressed cache.
//!
//! Layout under the cache folder:
//! - `objects/<first two hex>/<key>.npy`: the values, in numpy's NPY format (f32 or complex64);
//! - `objects/<first two hex>/<key>.json`: an [`ObjectRecord`] with format version, layout
//!   (dims, coords, units, meta; long numeric coordinates packed, see [`record_layout`]), shape,
//!   dtype, the NPY's size and blake3, the unit's notes
//!   (warnings and records such as epoch counts, so a cached unit still reports them) and its
//!   fingerprint, sealed by a last field `record_blake3` (the blake3 of the record's bytes before
//!   it, see `seal`). Stages with `cache: false` get the record without the NPY;
//! - `last/<id>.json`: the fingerprint last computed for a pipeline's stage × subject, read only
//!   to explain *why* a unit is stale;
//! - `stat/`: stat records of input files (see [`sources`](crate::sources)).
//!
//! Writes go to a temporary file in the target's folder and are renamed, the NPY before its
//! record, so the record is the commit point: a killed run leaves at most a temporary file or an
//! NPY without a record, neither of which is trusted. They are not fsynced: what a power loss
//! leaves is caught by the seal and the content hash every read checks, and an export is fsynced
//! before it exists (DEVELOPERS.md, "Durability"). Equal keys give equal bytes, so two
//! writers racing on one key (cluster nodes sharing the cache) are harmless. Reading fails toward
//! recomputing: a missing, truncated, unparsable or unknown-version object is treated as absent,
//! every read of a record checks its seal, and a load checks the values' content hash.
//!
//! This module is the store's API (put, look up, load, copy, the last fingerprints); the NPY
//! codec is [`npy`], the record's packed coordinates are [`record_layout`], and the
//! write-then-rename family shared with the exports is [`crate::fsio`].

use std::fs::File;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use phasewise_stages::{LabelledArray, Layout, Notes, Values};
use serde::{Deserialize, Serialize};

use crate::fsio::{
    bookkeeping_write, link_then_rename, write_then_rename, write_then_rename_unsynced, Declined,
};
use crate::key::Fingerprint;

mod damage;
pub(crate) mod npy;
pub use damage::Damage;
use npy::*;
pub use npy::{npy_bytes, npy_digest, values_from_npy, write_npy_to, HashingWriter};

/// Version of the object record format; records of any other version are stale (recomputed once,
/// as if absent). Version 3 seals the record (its last field, `record_blake3`); version 2 packed long numeric
/// coordinates ([`record_layout`]) without a seal; version 1 listed every number.
pub const FORMAT_VERSION: u32 = 3;
const FORMAT: &str = "phasewise-object";

/// Set to make the process abort after a temporary object file is written and before it is
/// renamed — the test of "a killed run leaves nothing a later run trusts" uses it.
pub const ABORT_BEFORE_RENAME: &str = "PHASEWISE_TEST_ABORT_BEFORE_RENAME";

/// Errors writing to the store.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// A file could not be written.
    #[error("cannot write {path}: {}", crate::fsio::WriteReason(.source, crate::fsio::Destination::Cache))]
    Write {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The values could not be encoded (or written while encoding).
    #[error("cannot encode NPY: {0}")]
    Npy(#[from] ndarray_npy::WriteNpyError),
    /// The object record could not be encoded.
    #[error("cannot encode the object record: {0}")]
    Record(#[from] serde_json::Error),
}

impl StoreError {
    /// This error as a failure to write `path` when what failed was the writing itself: the NPY
    /// encoder passes the system's refusal (a full disk, say) on without the file's name.
    pub fn writing(self, path: &Path) -> StoreError {
        match self {
            StoreError::Npy(ndarray_npy::WriteNpyError::Io(source)) => StoreError::Write {
                path: path.to_path_buf(),
                source,
            },
            other => other,
        }
    }
}

/// The record beside every object.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ObjectRecord {
    /// Always `phasewise-object`.
    pub format: String,
    /// [`FORMAT_VERSION`].
    pub format_version: u32,
    /// The unit's key.
    pub key: String,
    /// False for `cache: false` stages: the record is kept, the values are not.
    pub stored: bool,
    /// Dims, coords, units, meta (long numeric coordinates packed, see [`record_layout`]).
    #[serde(with = "record_layout")]
    pub layout: Layout,
    /// The shape of the values.
    pub shape: Vec<usize>,
    /// `<f4` or `<c8`.
    pub dtype: String,
    /// Size of the NPY file in bytes.
    pub npy_size: u64,
    /// blake3 of the NPY file.
    pub blake3: String,
    /// Warnings and records of the run that computed it.
    pub notes: Notes,
    /// What the key was computed from.
    pub fingerprint: Fingerprint,
}

impl ObjectRecord {
    /// The record of a unit with this output layout (its shape from the coordinates), values
    /// type, notes and fingerprint; neither stored nor hashed until [`ObjectRecord::with_values`].
    pub(crate) fn new(
        layout: &Layout,
        dtype: &str,
        notes: &Notes,
        fingerprint: &Fingerprint,
    ) -> ObjectRecord {
        ObjectRecord {
            format: FORMAT.into(),
            format_version: FORMAT_VERSION,
            key: fingerprint.key(),
            stored: false,
            layout: layout.clone(),
            shape: layout.shape(),
            dtype: dtype.into(),
            npy_size: 0,
            blake3: String::new(),
            notes: notes.clone(),
            fingerprint: fingerprint.clone(),
        }
    }

    /// With the NPY's blake3 and size, and whether the NPY is kept.
    pub(crate) fn with_values(self, stored: bool, blake3: String, npy_size: u64) -> ObjectRecord {
        ObjectRecord {
            stored,
            blake3,
            npy_size,
            ..self
        }
    }
}

/// Why an object's values could not be loaded.
#[derive(Clone, Debug, thiserror::Error)]
pub enum LoadError {
    /// Nothing is stored under the key (or only a record, for `cache: false`).
    #[error("nothing is cached under its key")]
    Unavailable,
    /// Something is stored but cannot be trusted.
    #[error("its cached object is damaged: {0}")]
    Damaged(Damage),
}

/// What a cheap look at the store finds for a key.
#[derive(Clone, Debug)]
pub enum Lookup {
    /// A record (and, for stored units, an NPY of the recorded size), shared with the store's
    /// memo of parsed records: a record holds the whole layout (thousands of pair labels), and
    /// a run looks each one up several times.
    Present(Arc<ObjectRecord>),
    /// Nothing.
    Absent,
    /// Something that cannot be trusted; the reason says what.
    Damaged(Damage),
}

/// A cache folder.
#[derive(Clone, Debug)]
pub struct Store {
    root: PathBuf,
    /// Records already parsed in this process, with the size and modification time their file
    /// had: a record read again (the plan, then the executor) is parsed once while its file is
    /// unchanged. Records hold large coordinate lists, so parsing them is most of a no-op rerun.
    parsed: Arc<std::sync::Mutex<std::collections::HashMap<String, ParsedRecord>>>,
    /// Objects this process wrote, by key: the identity their file had once renamed into place
    /// and the content hash of the bytes written (computed from memory on the way out). A read
    /// of such an object whose file still has that identity needs no second pass of the hash
    /// ([`Store::wrote_intact`]).
    written: Arc<std::sync::Mutex<std::collections::HashMap<String, (FileIdentity, String)>>>,
}

/// What tells a file apart from any other and from its own earlier contents, short of reading
/// it: device and inode (a file renamed over it is another inode), size, and the modification
/// time in nanoseconds (any write through any name, the hard link of an export included,
/// changes it).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct FileIdentity {
    dev: u64,
    ino: u64,
    len: u64,
    mtime: (i64, i64),
}

impl FileIdentity {
    /// The identity of the file `meta` describes.
    #[cfg(unix)]
    pub fn of(meta: &std::fs::Metadata) -> FileIdentity {
        use std::os::unix::fs::MetadataExt;
        FileIdentity {
            dev: meta.dev(),
            ino: meta.ino(),
            len: meta.len(),
            mtime: (meta.mtime(), meta.mtime_nsec()),
        }
    }

    /// Elsewhere: size and modification time only.
    #[cfg(not(unix))]
    pub fn of(meta: &std::fs::Metadata) -> FileIdentity {
        let mtime = meta
            .modified()
            .ok()
            .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
            .map_or((0, 0), |d| {
                (d.as_secs() as i64, i64::from(d.subsec_nanos()))
            });
        FileIdentity {
            dev: 0,
            ino: 0,
            len: meta.len(),
            mtime,
        }
    }
}

#[derive(Debug)]
struct ParsedRecord {
    len: u64,
    modified: Option<std::time::SystemTime>,
    record: Arc<ObjectRecord>,
}

impl Store {
    /// The store in `root` (created on first write).
    pub fn new(root: impl Into<PathBuf>) -> Self {
        Store {
            root: root.into(),
            parsed: Default::default(),
            written: Default::default(),
        }
    }

    /// Remember that this process has just written `key`'s values, whose bytes hash to
    /// `blake3` (hashed from memory as they were written), as the file now in place.
    pub(crate) fn remember_written(&self, key: &str, blake3: &str) {
        let (npy, _) = self.object_paths(key);
        if let (Ok(meta), Ok(mut written)) = (std::fs::metadata(&npy), self.written.lock()) {
            written.insert(
                key.to_string(),
                (FileIdentity::of(&meta), blake3.to_string()),
            );
        }
    }

    /// [`Store::wrote_intact`] for `key`'s values as they are now in the store.
    pub(crate) fn wrote_intact_object(&self, key: &str, record: &ObjectRecord) -> bool {
        self.open_values(key)
            .is_ok_and(|(_, file)| self.wrote_intact(key, record, &file))
    }

    /// True when `file` (opened as `key`'s values) is the file this process wrote for `key`
    /// and has not changed since (same inode, size and modification time), and `record` names
    /// the content hash of what was written. Its bytes are then those that were hashed on the
    /// way out, still in the page cache: a read can take them without hashing them again. A
    /// damaged object on disk is still found by every later process, which has no such memo
    /// and checks the hash (DEVELOPERS.md "Durability").
    pub(crate) fn wrote_intact(&self, key: &str, record: &ObjectRecord, file: &File) -> bool {
        let Ok(meta) = file.metadata() else {
            return false;
        };
        let now = FileIdentity::of(&meta);
        self.written.lock().is_ok_and(|written| {
            written
                .get(key)
                .is_some_and(|(was, blake3)| *was == now && *blake3 == record.blake3)
        })
    }

    /// The cache folder.
    pub fn root(&self) -> &Path {
        &self.root
    }

    /// Paths of the NPY and the record of `key`.
    pub fn object_paths(&self, key: &str) -> (PathBuf, PathBuf) {
        let dir = self.root.join("objects").join(key.get(..2).unwrap_or("00"));
        (
            dir.join(format!("{key}.npy")),
            dir.join(format!("{key}.json")),
        )
    }

    /// A cheap check: record readable, right version and key, NPY present with the recorded size.
    pub fn lookup(&self, key: &str) -> Lookup {
        let (npy, json) = self.object_paths(key);
        let npy_meta = std::fs::metadata(&npy).ok();
        let json_meta = std::fs::metadata(&json).ok();
        let stamp = json_meta.as_ref().map(|m| (m.len(), m.modified().ok()));
        let known = self.parsed.lock().ok().and_then(|memo| {
            memo.get(key)
                .filter(|p| Some((p.len, p.modified)) == stamp)
                .map(|p| Arc::clone(&p.record))
        });
        let record = match known {
            Some(record) => record,
            None => {
                let bytes = match std::fs::read(&json) {
                    Ok(b) => b,
                    Err(_) if npy_meta.is_some() => return Lookup::Damaged(Damage::RecordMissing),
                    Err(_) => return Lookup::Absent,
                };
                let record = match parse_record(&bytes, key, &json) {
                    Ok(r) => Arc::new(r),
                    // Written by a phasewise of another record format: not damage, just not
                    // a result this version can use; it is recomputed (and overwritten).
                    Err(Unreadable::OtherVersion) => return Lookup::Absent,
                    Err(Unreadable::Damaged(why)) => return Lookup::Damaged(why),
                };
                if let (Some((len, modified)), Ok(mut memo)) = (stamp, self.parsed.lock()) {
                    if len == bytes.len() as u64 {
                        let parsed = ParsedRecord {
                            len,
                            modified,
                            record: Arc::clone(&record),
                        };
                        memo.insert(key.to_string(), parsed);
                    }
                }
                record
            }
        };
        if record.stored {
            match npy_meta {
                None => return Lookup::Damaged(Damage::ValuesMissing),
                Some(m) if m.len() != record.npy_size => {
                    return Lookup::Damaged(Damage::Size {
                        found: m.len(),
                        recorded: record.npy_size,
                    })
                }
                Some(_) => {}
            }
        }
        Lookup::Present(record)
    }

    /// Load and verify an object's values: read straight into the array's buffer, hashing on the
    /// way; nothing is returned unless the whole file matches the recorded blake3.
    pub fn load(&self, key: &str) -> Result<(LabelledArray, Arc<ObjectRecord>), LoadError> {
        let record = match self.lookup(key) {
            Lookup::Present(r) if r.stored => r,
            Lookup::Present(_) | Lookup::Absent => return Err(LoadError::Unavailable),
            Lookup::Damaged(why) => return Err(LoadError::Damaged(why)),
        };
        let values = self.load_values(key, &record).map_err(LoadError::Damaged)?;
        let array = LabelledArray::checked(record.layout.clone(), values)
            .map_err(|e| LoadError::Damaged(Damage::Layout(Arc::new(e))))?;
        Ok((array, record))
    }

    /// The values of a stored object, verified against its record.
    pub fn load_values(&self, key: &str, record: &ObjectRecord) -> Result<Values, Damage> {
        let (_, mut file) = self.open_values(key)?;
        if let Some(values) = read_values(&mut file, record)? {
            return Ok(values);
        }
        // A header this reader does not know: the general way (read, hash, decode).
        let bytes = self.load_bytes(key, record)?;
        values_from_npy(&bytes, record.layout.complex).map_err(|e| Damage::Undecodable(Arc::new(e)))
    }

    /// The NPY bytes of an object, verified against its record.
    pub fn load_bytes(&self, key: &str, record: &ObjectRecord) -> Result<Vec<u8>, Damage> {
        let (npy, _) = self.object_paths(key);
        let bytes = std::fs::read(&npy).map_err(Damage::unreadable)?;
        check_hash(blake3::hash(&bytes), record)?;
        Ok(bytes)
    }

    /// The path of `key`'s values and the file opened for reading.
    fn open_values(&self, key: &str) -> Result<(PathBuf, File), Damage> {
        let (npy, _) = self.object_paths(key);
        let file = File::open(&npy).map_err(Damage::unreadable)?;
        Ok((npy, file))
    }

    /// Copy a stored object's NPY to `path` (atomically), hashing it on the way: `Ok(Err(why))`
    /// when the object does not match its record, and then nothing is written at `path`.
    pub fn copy_object(
        &self,
        key: &str,
        record: &ObjectRecord,
        path: &Path,
    ) -> std::io::Result<Result<(), Damage>> {
        let (_, mut from) = match self.open_values(key) {
            Ok(opened) => opened,
            Err(damage) => return Ok(Err(damage)),
        };
        let copied = write_then_rename(path, false, |to| {
            Ok(
                read_checked(&mut from, record, |chunk| to.write_all(chunk))?
                    .map_err(Declined::Wrong),
            )
        });
        copied.map(|r| match r {
            Ok(()) => Ok(()),
            Err(declined) => match declined {
                Declined::Wrong(damage) => Err(damage),
                // `read_checked` never compares with the target; were it found to hold these
                // checked bytes already, the copy would be done.
                Declined::Unchanged => Ok(()),
            },
        })
    }

    /// Give a stored object's values the name `path` without copying them (an export): its
    /// values are read once and checked against the record's content hash, made durable, then
    /// hard-linked ([`link_then_rename`]). `Ok(Err(why))` when the object is damaged (nothing
    /// is written); an I/O error when the link cannot be made (another filesystem): the caller
    /// copies instead.
    pub fn link_object(
        &self,
        key: &str,
        record: &ObjectRecord,
        path: &Path,
    ) -> std::io::Result<Result<(), Damage>> {
        let (npy, mut from) = match self.open_values(key) {
            Ok(opened) => opened,
            Err(damage) => return Ok(Err(damage)),
        };
        // An object this process wrote and has not changed since is not read again: its hash
        // was taken from memory as it was written.
        if !self.wrote_intact(key, record, &from) {
            if let Err(why) = read_checked(&mut from, record, |_| Ok(()))? {
                return Ok(Err(why));
            }
        }
        link_then_rename(&from, &npy, path).map(Ok)
    }

    /// Write an object (values only when `stored`), NPY first, record last. The NPY is streamed
    /// from the array's memory to the file and hashed on the way; for `cache: false` it is only
    /// hashed. Its bytes (and so its blake3) are those of [`npy_bytes`].
    pub fn put(
        &self,
        array: &LabelledArray,
        notes: &Notes,
        fingerprint: &Fingerprint,
        stored: bool,
    ) -> Result<ObjectRecord, StoreError> {
        let key = fingerprint.key();
        let (npy_path, json_path) = self.object_paths(&key);
        let (blake3, npy_size) = if stored {
            write_object_file(&npy_path, &array.values)?
        } else {
            npy_digest(&array.values)?
        };
        if stored {
            self.remember_written(&key, &blake3);
        }
        let record = ObjectRecord::new(&array.layout, array.values.dtype(), notes, fingerprint)
            .with_values(stored, blake3, npy_size);
        write_record(&json_path, &record)?;
        Ok(record)
    }

    /// Write the record of a unit whose output was streamed into its consumer part by part
    /// ([`crate::parts`]): never whole in memory, so neither stored nor hashed (`blake3` and
    /// `npy_size` are empty).
    pub fn put_streamed(
        &self,
        layout: &Layout,
        dtype: &str,
        notes: &Notes,
        fingerprint: &Fingerprint,
    ) -> Result<ObjectRecord, StoreError> {
        let record = ObjectRecord::new(layout, dtype, notes, fingerprint);
        write_record(&self.object_paths(&record.key).1, &record)?;
        Ok(record)
    }

    /// The fingerprint last computed for `id` (see [`last_id`]), if any.
    pub fn last(&self, id: &str) -> Option<Fingerprint> {
        let bytes = std::fs::read(self.last_path(id)).ok()?;
        let record: LastRecord = serde_json::from_slice(&bytes).ok()?;
        (record.format_version == FORMAT_VERSION).then_some(record.fingerprint)
    }

    /// Remember the fingerprint last computed for `id`; a failure only loses an explanation.
    pub fn set_last(&self, id: &str, fingerprint: &Fingerprint) {
        let record = LastRecord {
            format_version: FORMAT_VERSION,
            fingerprint: fingerprint.clone(),
        };
        if let Ok(bytes) = serde_json::to_vec(&record) {
            let _ = bookkeeping_write(&self.last_path(id), &bytes);
        }
    }

    fn last_path(&self, id: &str) -> PathBuf {
        self.root.join("last").join(format!("{id}.json"))
    }

    /// Every file under `objects/`, for `prune`.
    pub fn object_files(&self) -> Vec<PathBuf> {
        let mut files = Vec::new();
        let Ok(dirs) = std::fs::read_dir(self.root.join("objects")) else {
            return files;
        };
        for dir in dirs.flatten() {
            if let Ok(entries) = std::fs::read_dir(dir.path()) {
                files.extend(entries.flatten().map(|e| e.path()));
            }
        }
        files.sort();
        files
    }
}

/// The id under which the last fingerprint of a stage × subject of a pipeline is kept: from the
/// pipeline's name, not its path, so that a moved project keeps its explanations.
pub fn last_id(pipeline: &str, stage: &str, subject: Option<&str>) -> String {
    let text = format!("{pipeline}\0{stage}\0{}", subject.unwrap_or("\0group"));
    blake3::hash(text.as_bytes()).to_hex()[..32].to_string()
}

#[derive(Serialize, Deserialize)]
struct LastRecord {
    format_version: u32,
    fingerprint: Fingerprint,
}

/// Write an object's record (atomically), sealed ([`seal`]).
pub(crate) fn write_record(json_path: &Path, record: &ObjectRecord) -> Result<(), StoreError> {
    let json = seal(serde_json::to_vec_pretty(record)?);
    // Not fsynced: a record lost or left incomplete by a power loss makes its object absent
    // or damaged (recomputed), never wrong; see DEVELOPERS.md "Durability".
    bookkeeping_write(json_path, &json).map_err(|source| StoreError::Write {
        path: json_path.to_path_buf(),
        source,
    })
}

/// Why a record could not be used.
enum Unreadable {
    /// Another record format or format version.
    OtherVersion,
    /// Not a record, or not this key's.
    Damaged(Damage),
}

fn parse_record(bytes: &[u8], key: &str, json: &Path) -> Result<ObjectRecord, Unreadable> {
    let damaged = Unreadable::Damaged;
    let sealed = match check_seal(bytes) {
        Seal::Intact => true,
        Seal::Broken { found, recorded } => {
            return Err(damaged(Damage::RecordAltered {
                path: json.to_path_buf(),
                found,
                recorded,
            }))
        }
        Seal::Missing => false,
    };
    // One pass straight into the record; the slower look at the raw value below only runs to
    // explain a record that does not parse (or is of another format, or unsealed).
    if sealed {
        if let Ok(record) = serde_json::from_slice::<ObjectRecord>(bytes) {
            if record.format == FORMAT && record.format_version == FORMAT_VERSION {
                if record.key != key {
                    return Err(damaged(Damage::OtherKey { key: record.key }));
                }
                return Ok(record);
            }
        }
    }
    let value: serde_json::Value =
        serde_json::from_slice(bytes).map_err(|e| damaged(Damage::RecordNotJson(Arc::new(e))))?;
    let version = value.get("format_version").and_then(|v| v.as_u64());
    if value.get("format").and_then(|v| v.as_str()) != Some(FORMAT) {
        return Err(damaged(Damage::NotARecord));
    }
    if version != Some(u64::from(FORMAT_VERSION)) {
        return Err(Unreadable::OtherVersion);
    }
    if !sealed {
        return Err(damaged(Damage::RecordUnsealed {
            path: json.to_path_buf(),
        }));
    }
    let record: ObjectRecord = serde_json::from_value(value)
        .map_err(|e| damaged(Damage::RecordIncomplete(Arc::new(e))))?;
    if record.key != key {
        return Err(damaged(Damage::OtherKey { key: record.key }));
    }
    Ok(record)
}

/// The record's last line but one opens its seal: `,\n  "record_blake3": "`, then 64 hex digits
/// and [`SEAL_CLOSE`] end the file.
const SEAL_OPEN: &[u8] = b",\n  \"record_blake3\": \"";
const SEAL_CLOSE: &[u8] = b"\"\n}";
const SEAL_HEX: usize = 64;

/// Seal a record's pretty-printed JSON: its closing `\n}` gives way to a last field,
/// `record_blake3`, the blake3 of every byte before that field, and the closing brace. The file
/// stays JSON (readers ignore the field), and checking it ([`check_seal`]) hashes the bytes as
/// stored, once, without printing the record again: one edited or flipped byte anywhere in the
/// record (a coordinate, a label, the notes, the seal itself) breaks it. A later format that
/// seals differently must name its field otherwise, or a record of it reads as damaged here.
fn seal(mut json: Vec<u8>) -> Vec<u8> {
    // serde_json's pretty form of a struct with fields ends with a newline and its brace.
    if json.ends_with(b"\n}") {
        json.truncate(json.len() - 2);
    }
    let hash = blake3::hash(&json).to_hex();
    json.extend_from_slice(SEAL_OPEN);
    json.extend_from_slice(hash.as_bytes());
    json.extend_from_slice(SEAL_CLOSE);
    json
}

/// What the seal of a record's bytes says.
enum Seal {
    /// The bytes before the seal hash to what it records.
    Intact,
    /// They do not.
    Broken {
        /// The blake3 of the bytes before the seal.
        found: String,
        /// What the seal records.
        recorded: String,
    },
    /// The bytes do not end in a seal (another format version, a cut or garbled record).
    Missing,
}

fn check_seal(bytes: &[u8]) -> Seal {
    let seal_len = SEAL_OPEN.len() + SEAL_HEX + SEAL_CLOSE.len();
    let Some(body_len) = bytes.len().checked_sub(seal_len) else {
        return Seal::Missing;
    };
    let (body, seal) = bytes.split_at(body_len);
    let Some(recorded) = seal
        .strip_prefix(SEAL_OPEN)
        .and_then(|s| s.strip_suffix(SEAL_CLOSE))
    else {
        return Seal::Missing;
    };
    let found = blake3::hash(body).to_hex();
    if found.as_bytes() == recorded {
        Seal::Intact
    } else {
        Seal::Broken {
            found: found.to_string(),
            recorded: String::from_utf8_lossy(recorded).into_owned(),
        }
    }
}

fn write_object_file(path: &Path, values: &Values) -> Result<(String, u64), StoreError> {
    let abort = std::env::var_os(ABORT_BEFORE_RENAME).is_some();
    let written = write_then_rename_unsynced(path, abort, |file| {
        Ok(stream_npy(values, file).map_err(Declined::Wrong))
    });
    match written {
        Ok(Ok(digest)) => Ok(digest),
        Ok(Err(Declined::Wrong(e))) => Err(e.writing(path)),
        Ok(Err(Declined::Unchanged)) => unreachable!("an object's writer does not compare"),
        Err(source) => Err(StoreError::Write {
            path: path.to_path_buf(),
            source,
        }),
    }
}

/// How an [`ObjectRecord`] writes its layout: as `Layout`'s own serialisation (the form exported
/// sidecars use, which this module leaves alone), except that a numeric coordinate of more than
/// [`PLAIN_NUMBERS`](record_layout::PLAIN_NUMBERS) entries, or holding a number JSON cannot write
/// (NaN, ±infinity), is packed into one base64 string and read back bit for bit:
///
/// - `{"kind": "numbers_delta2", "values": "<base64>"}`: for each number, the second difference
///   of the IEEE-754 bit patterns read as `u64` (`b[k] − 2·b[k−1] + b[k−2]`, wrapping, with
///   `b[−1] = b[−2] = 0`), zigzag-mapped and written as an unsigned LEB128 varint. Evenly spaced
///   axes (sample times, trial indices) give residuals of a few units, one byte each;
/// - `{"kind": "numbers_f64le", "values": "<base64>"}`: the numbers' little-endian bytes, used
///   when that is the shorter of the two (irregular numbers).
///
/// Everything is integer arithmetic on the bit patterns, so no rounding enters either way.
/// Short coordinates stay plain lists, so records remain readable.
pub mod record_layout;

/// Read a stored object's values to the end, handing each chunk to `sink` and hashing it on the
/// way: `Ok(Err(damage))` when they do not match the record (content hash or size) or cannot
/// be read; an I/O error only from `sink`. Shared by [`Store::copy_object`] and
/// [`Store::link_object`].
fn read_checked(
    from: &mut File,
    record: &ObjectRecord,
    mut sink: impl FnMut(&[u8]) -> std::io::Result<()>,
) -> std::io::Result<Result<(), Damage>> {
    let mut hasher = blake3::Hasher::new();
    let mut buffer = vec![0u8; READ_CHUNK];
    let mut total = 0u64;
    loop {
        let n = match from.read(&mut buffer) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
            Err(e) => return Ok(Err(Damage::unreadable(e))),
        };
        hash_update(&mut hasher, &buffer[..n]);
        sink(&buffer[..n])?;
        total += n as u64;
    }
    if total != record.npy_size {
        return Ok(Err(Damage::Size {
            found: total,
            recorded: record.npy_size,
        }));
    }
    Ok(check_hash(hasher.finalize(), record))
}

#[cfg(test)]
mod tests {
    use super::*;
    use base64::Engine;
    use ndarray::ArrayD;
    use phasewise_stages::Coord;
    use serde_json::json;

    fn sample() -> (LabelledArray, Fingerprint) {
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(vec!["Fz".into()]),
                Coord::Numbers(vec![0.0, 0.5, 1.0]),
            ],
            units: "V".into(),
            ..Layout::default()
        };
        let values = ArrayD::from_shape_vec(vec![1, 3], vec![1.0f32, -2.5, 3.25]).unwrap();
        let fp = Fingerprint {
            op: "test".into(),
            op_version: 1,
            params: json!({}),
            inputs: vec![],
            subject: None,
        };
        (LabelledArray::real(layout, values).unwrap(), fp)
    }

    #[test]
    fn an_object_written_here_is_trusted_only_while_its_file_is_unchanged() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (array, fp) = sample();
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let npy = store.object_paths(&record.key).0;
        assert!(store.wrote_intact_object(&record.key, &record));
        // Another process (another Store) never wrote it: it checks the hash.
        assert!(!Store::new(dir.path()).wrote_intact_object(&record.key, &record));
        // A record naming other content is not vouched for.
        let mut other = record.clone();
        other.blake3 = "0".repeat(64);
        assert!(!store.wrote_intact_object(&record.key, &other));
        // Changed in place through another name (as an export's hard link would be): the
        // modification time moves, the memo no longer applies, and the export link checks the
        // hash and refuses the damaged object.
        let mut bytes = std::fs::read(&npy).unwrap();
        let last = bytes.len() - 1;
        bytes[last] ^= 1;
        std::thread::sleep(std::time::Duration::from_millis(20));
        std::fs::OpenOptions::new()
            .write(true)
            .open(&npy)
            .and_then(|mut f| f.write_all(&bytes))
            .unwrap();
        assert!(!store.wrote_intact_object(&record.key, &record));
        let out = dir.path().join("export.npy");
        assert!(matches!(
            store.link_object(&record.key, &record, &out),
            Ok(Err(Damage::Hash { .. }))
        ));
        assert!(!out.exists());
    }

    #[test]
    fn objects_round_trip_and_damage_is_detected() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (array, fp) = sample();
        let npy = npy_bytes(&array.values).unwrap();
        // NPY format 1.0 (numpy's format spec): magic `\x93NUMPY`, version 1.0, a header
        // dict naming the dtype `<f4`.
        assert_eq!(&npy[..8], b"\x93NUMPY\x01\x00");
        assert!(String::from_utf8_lossy(&npy[..128]).contains("'descr': '<f4'"));
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let (back, _) = store.load(&record.key).unwrap();
        assert_eq!(back, array);
        let (npy_path, json_path) = store.object_paths(&record.key);
        let mut bytes = std::fs::read(&npy_path).unwrap();
        let last = bytes.len() - 1;
        bytes[last] ^= 1;
        std::fs::write(&npy_path, &bytes).unwrap();
        assert!(matches!(
            store.load(&record.key),
            Err(LoadError::Damaged(Damage::Hash { .. }))
        ));
        std::fs::remove_file(&json_path).unwrap();
        assert!(matches!(store.lookup(&record.key), Lookup::Damaged(_)));
    }

    #[test]
    fn a_large_object_written_in_pieces_has_the_bytes_and_hash_of_its_npy_encoding() {
        use crate::fsio::WRITEBACK_BYTES;
        // Reference: numpy's NPY encoding as `npy_bytes` builds it in memory (the format spec's
        // header, then the values) and blake3 of those bytes. The store writes objects of more
        // than WRITEBACK_BYTES in pieces, starting the disk write of each as it goes.
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (mut array, fp) = sample();
        let n = (3 * WRITEBACK_BYTES as usize) / 4 + 12_345;
        let times: Vec<f64> = (0..n).map(|k| k as f64 / 1000.0).collect();
        array.layout.coords[1] = Coord::Numbers(times);
        let values: Vec<f32> = (0..n).map(|k| (k as f32).sin()).collect();
        array.values = Values::Real(ArrayD::from_shape_vec(vec![1, n], values).unwrap());
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let want = npy_bytes(&array.values).unwrap();
        let (npy, _) = store.object_paths(&record.key);
        let got = std::fs::read(npy).unwrap();
        assert!(got.len() as u64 > 3 * WRITEBACK_BYTES);
        assert!(got == want, "the stored bytes differ from the NPY encoding");
        assert_eq!(record.blake3, blake3::hash(&want).to_hex().to_string());
        assert_eq!(record.npy_size, want.len() as u64);
        let (back, _) = store.load(&record.key).unwrap();
        assert_eq!(back.values, array.values);
    }

    #[test]
    fn a_record_of_another_format_version_is_not_used() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (array, fp) = sample();
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let (_, json_path) = store.object_paths(&record.key);
        let text = std::fs::read_to_string(&json_path).unwrap();
        let current = format!("\"format_version\": {FORMAT_VERSION}");
        assert!(text.contains(&current));
        // Sealed as its own version would seal it.
        let newer = resealed(&text.replace(&current, "\"format_version\": 99"));
        std::fs::write(&json_path, newer).unwrap();
        // Recomputed as if absent, without a damage warning.
        assert!(matches!(store.lookup(&record.key), Lookup::Absent));
    }

    /// A record's text, edited after it was written, with its seal made again over the edit.
    fn resealed(text: &str) -> Vec<u8> {
        let body = &text[..text.rfind(",\n  \"record_blake3\"").unwrap()];
        seal(format!("{body}\n}}").into_bytes())
    }

    /// A record as the previous format (version 2) wrote it: serde_json's pretty form, unsealed.
    fn version_2_text(record: &ObjectRecord) -> Vec<u8> {
        let mut value = serde_json::to_value(record).unwrap();
        value["format_version"] = json!(2);
        serde_json::to_vec_pretty(&value).unwrap()
    }

    #[test]
    fn a_record_is_pretty_json_sealed_by_the_blake3_of_its_bytes_before_the_seal() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (array, fp) = sample();
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let bytes = std::fs::read(store.object_paths(&record.key).1).unwrap();
        // The reference: serde_json's own pretty form of the record with a last field
        // `record_blake3`, the blake3 of the text before that field.
        let unsealed = serde_json::to_string_pretty(&record).unwrap();
        let body = unsealed.strip_suffix("\n}").unwrap();
        let mut value = serde_json::to_value(&record).unwrap();
        let want = blake3::hash(body.as_bytes()).to_hex().to_string();
        value["record_blake3"] = json!(want);
        let text = String::from_utf8(bytes.clone()).unwrap();
        assert_eq!(
            text,
            format!("{body},\n  \"record_blake3\": \"{want}\"\n}}")
        );
        let parsed: serde_json::Value = serde_json::from_slice(&bytes).unwrap();
        assert_eq!(parsed, value);
    }

    #[test]
    fn a_record_changed_after_it_was_written_is_damaged_and_named() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (mut array, fp) = sample();
        array.layout.coords[0] = Coord::Labels(vec!["left".into()]);
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let (_, json_path) = store.object_paths(&record.key);
        let text = std::fs::read_to_string(&json_path).unwrap();
        assert!(matches!(store.lookup(&record.key), Lookup::Present(_)));
        // One digit of a coordinate (0.5 → 4.5), a label, a note's place, the seal itself.
        let edits = [
            ("0.5,", "4.5,"),
            ("\"left\"", "\"rite\""),
            ("\"units\": \"V\"", "\"units\": \"W\""),
            (&record.key[..8], "00000000"),
        ];
        let seal_at = text.rfind("record_blake3").unwrap();
        let mut edits: Vec<(String, String)> = edits
            .iter()
            .map(|(a, b)| (a.to_string(), b.to_string()))
            .collect();
        let recorded = &text[seal_at + 17..seal_at + 17 + 64];
        let first = if recorded.starts_with('0') { "1" } else { "0" };
        let flipped = format!("{first}{}", &recorded[1..]);
        edits.push((recorded.to_string(), flipped));
        for (from, to) in &edits {
            assert!(text.contains(from.as_str()), "{from}");
            std::fs::write(&json_path, text.replacen(from.as_str(), to, 1)).unwrap();
            for store in [&store, &Store::new(dir.path())] {
                match store.lookup(&record.key) {
                    Lookup::Damaged(why @ Damage::RecordAltered { .. }) => {
                        let message = why.to_string();
                        assert!(message.contains(&*json_path.to_string_lossy()), "{message}");
                    }
                    other => panic!("{from} → {to}: read as {other:?}"),
                }
                assert!(matches!(
                    store.load(&record.key),
                    Err(LoadError::Damaged(Damage::RecordAltered { .. }))
                ));
            }
        }
        // Put back, it is trusted again.
        std::fs::write(&json_path, &text).unwrap();
        assert!(matches!(store.lookup(&record.key), Lookup::Present(_)));
    }

    #[test]
    fn one_bit_flipped_anywhere_in_a_record_makes_it_damaged() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (array, fp) = sample();
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let (_, json_path) = store.object_paths(&record.key);
        let bytes = std::fs::read(&json_path).unwrap();
        for at in 0..bytes.len() {
            let mut flipped = bytes.clone();
            flipped[at] ^= 1 << (at % 8);
            std::fs::write(&json_path, &flipped).unwrap();
            match Store::new(dir.path()).lookup(&record.key) {
                Lookup::Damaged(_) => {}
                other => panic!("bit {} of byte {at} flipped: read as {other:?}", at % 8),
            }
        }
    }

    #[test]
    fn a_record_of_the_previous_format_is_absent_and_one_of_this_format_unsealed_is_damaged() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (array, fp) = sample();
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        let (_, json_path) = store.object_paths(&record.key);
        std::fs::write(&json_path, version_2_text(&record)).unwrap();
        // Recomputed as if absent (and overwritten), as records of version 1 are.
        assert!(matches!(
            Store::new(dir.path()).lookup(&record.key),
            Lookup::Absent
        ));
        std::fs::write(&json_path, serde_json::to_vec_pretty(&record).unwrap()).unwrap();
        match Store::new(dir.path()).lookup(&record.key) {
            Lookup::Damaged(why @ Damage::RecordUnsealed { .. }) => {
                assert!(why.to_string().contains(&*json_path.to_string_lossy()))
            }
            other => panic!("an unsealed record was read as {other:?}"),
        }
    }

    /// Samples of the benchmark's continuous recordings: 148,750 times `k / 250` s.
    fn long_time_axis() -> Vec<f64> {
        (0..148_750).map(|k| k as f64 / 250.0).collect()
    }

    /// Numbers that text formatting or a packing could get wrong: signed zeros, subnormals,
    /// 1/3, the extremes, infinities and NaNs with sign and payload.
    fn awkward() -> Vec<f64> {
        vec![
            -0.0,
            0.0,
            f64::from_bits(1),
            f64::MIN_POSITIVE / 3.0,
            -f64::from_bits(0x000f_ffff_ffff_ffff),
            f64::MIN_POSITIVE,
            1.0 / 3.0,
            -1.0 / 3.0,
            f64::EPSILON,
            f64::MAX,
            f64::MIN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NAN,
            -f64::NAN,
            f64::from_bits(0x7ff0_0000_0000_0001),
            f64::from_bits(0xfff8_dead_beef_0001),
        ]
    }

    /// Numbers without a pattern (every bit pattern, NaNs included): a 64-bit LCG (Knuth's MMIX
    /// constants).
    fn irregular(n: usize) -> Vec<f64> {
        let mut x = 0x9e37_79b9_7f4a_7c15u64;
        (0..n)
            .map(|_| {
                x = x
                    .wrapping_mul(6_364_136_223_846_793_005)
                    .wrapping_add(1_442_695_040_888_963_407);
                f64::from_bits(x)
            })
            .collect()
    }

    fn fingerprint(op: &str) -> Fingerprint {
        Fingerprint {
            op: op.into(),
            op_version: 1,
            params: json!({}),
            inputs: vec![],
            subject: None,
        }
    }

    fn bits(coord: &Coord) -> Vec<u64> {
        coord
            .numbers()
            .unwrap()
            .iter()
            .map(|x| x.to_bits())
            .collect()
    }

    /// A layout as version 1 wrote it: `Layout`'s own serialisation, every number listed.
    fn version_1_text(record: &ObjectRecord) -> Vec<u8> {
        let mut value = serde_json::to_value(record).unwrap();
        value["layout"] = serde_json::to_value(&record.layout).unwrap();
        value["format_version"] = json!(1);
        serde_json::to_vec_pretty(&value).unwrap()
    }

    fn kinds(json_path: &Path) -> Vec<String> {
        let value: serde_json::Value =
            serde_json::from_slice(&std::fs::read(json_path).unwrap()).unwrap();
        value["layout"]["coords"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c["kind"].as_str().unwrap().to_string())
            .collect()
    }

    #[test]
    fn a_long_time_axis_round_trips_bit_exactly_in_a_third_of_the_size() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let times = long_time_axis();
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(vec!["Fz".into()]),
                Coord::Numbers(times.clone()),
            ],
            units: "V".into(),
            ..Layout::default()
        };
        let values = ArrayD::from_elem(vec![1, times.len()], 0.5f32);
        let array = LabelledArray::real(layout, values).unwrap();
        let record = store
            .put(&array, &Notes::default(), &fingerprint("long"), true)
            .unwrap();
        let (_, json_path) = store.object_paths(&record.key);
        assert_eq!(kinds(&json_path), ["labels", "numbers_delta2"]);
        // A fresh store parses the file (no memo).
        let (back, back_record) = Store::new(dir.path()).load(&record.key).unwrap();
        assert_eq!(*back_record, record);
        let want: Vec<u64> = times.iter().map(|x| x.to_bits()).collect();
        assert_eq!(bits(&back.layout.coords[1]), want);
        assert_eq!(back, array);
        let new_size = std::fs::metadata(&json_path).unwrap().len();
        let old_size = version_1_text(&record).len() as u64;
        assert!(
            3 * new_size < old_size,
            "record of {new_size} bytes, version 1 wrote {old_size}"
        );
    }

    #[test]
    fn awkward_numbers_round_trip_bit_exactly_packed_or_plain() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let finite: Vec<f64> = awkward().into_iter().filter(|x| x.is_finite()).collect();
        let mut long_awkward = long_time_axis()[..1000].to_vec();
        long_awkward.extend(awkward());
        long_awkward.extend(long_time_axis()[..1000].iter().map(|t| -t));
        let axes = [
            // Short and finite: a plain list, read back through serde_json's float parsing.
            (finite, "numbers"),
            // Short but holding what JSON cannot write (NaN, infinities): packed.
            (awkward(), "numbers_delta2"),
            (long_awkward, "numbers_delta2"),
            // Without a pattern the little-endian bytes are shorter.
            (irregular(300), "numbers_f64le"),
            (Vec::new(), "numbers"),
            (vec![f64::NAN], "numbers_f64le"),
        ];
        for (i, (numbers, kind)) in axes.iter().enumerate() {
            let layout = Layout {
                dims: vec!["x".into()],
                coords: vec![Coord::Numbers(numbers.clone())],
                units: "1".into(),
                ..Layout::default()
            };
            let fp = fingerprint(&format!("awkward {i}"));
            let record = store
                .put_streamed(&layout, "<f4", &Notes::default(), &fp)
                .unwrap();
            let (_, json_path) = store.object_paths(&record.key);
            assert_eq!(kinds(&json_path), [*kind], "axis {i}");
            let Lookup::Present(back) = Store::new(dir.path()).lookup(&record.key) else {
                panic!("axis {i}: the record does not read back");
            };
            let want: Vec<u64> = numbers.iter().map(|x| x.to_bits()).collect();
            assert_eq!(bits(&back.layout.coords[0]), want, "axis {i}");
        }
    }

    #[test]
    fn a_record_of_version_1_is_not_used_and_the_memo_does_not_hide_it() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (mut array, fp) = sample();
        let times = long_time_axis()[..200].to_vec();
        array.layout.coords[1] = Coord::Numbers(times.clone());
        array.values = Values::Real(ArrayD::from_elem(vec![1, times.len()], 1.0f32));
        let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
        assert!(matches!(store.lookup(&record.key), Lookup::Present(_)));
        // The file is replaced by what version 1 wrote for the same object; the memo of the
        // current record must not answer for it.
        let (_, json_path) = store.object_paths(&record.key);
        std::fs::write(&json_path, version_1_text(&record)).unwrap();
        for store in [&store, &Store::new(dir.path())] {
            match store.lookup(&record.key) {
                Lookup::Absent => {}
                other => panic!("a version 1 record was read as {other:?}"),
            }
            assert!(matches!(
                store.load(&record.key),
                Err(LoadError::Unavailable)
            ));
        }
    }

    #[test]
    fn a_garbled_packed_coordinate_is_damaged() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let layout = Layout {
            dims: vec!["time".into()],
            coords: vec![Coord::Numbers(long_time_axis()[..100].to_vec())],
            ..Layout::default()
        };
        let record = store
            .put_streamed(&layout, "<f4", &Notes::default(), &fingerprint("garbled"))
            .unwrap();
        let (_, json_path) = store.object_paths(&record.key);
        let text = std::fs::read_to_string(&json_path).unwrap();
        let packed = record_layout::delta2_bytes(layout.coords[0].numbers().unwrap());
        let encoded = base64::engine::general_purpose::STANDARD.encode(&packed);
        assert!(text.contains(&encoded));
        // The last varint cut short; a varint of more than 64 bits; not base64 at all.
        let cut = base64::engine::general_purpose::STANDARD
            .encode([&packed[..packed.len() - 1], &[0x80][..]].concat());
        let long = base64::engine::general_purpose::STANDARD.encode([0xffu8; 10]);
        for bad in [cut, long, "not base64!".to_string()] {
            // Sealed again, so that what is found is the packed coordinate, not the edit.
            std::fs::write(&json_path, resealed(&text.replace(&encoded, &bad))).unwrap();
            match Store::new(dir.path()).lookup(&record.key) {
                Lookup::Damaged(why) => {
                    assert!(why.to_string().contains("packed coordinate"), "{why}")
                }
                other => panic!("a garbled record was read as {other:?}"),
            }
        }
    }
}
