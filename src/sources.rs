//! The data source: which recordings a pipeline reads, which subject each belongs to, and the
//! content hash that keys everything computed from it.
//!
//! `data.recordings` is a glob relative to the pipeline file. A recording's subject is the BIDS
//! `sub-<label>` entity of its file name (or of a folder above it), otherwise the file stem.
//! Two recordings of one subject are an error: the runner would not know which chain is whose.
//!
//! Hashing every recording on every run would dominate a no-op rerun, so a *stat record*
//! (size, modification time, hash) is kept per file under `<cache>/stat/`; a file whose size and
//! mtime match its record is not rehashed. The record only saves work: keys are always content
//! hashes, so `touch` on a file changes nothing but the record. `verify` always rehashes.

use std::io::Read;
use std::path::{Path, PathBuf};
use std::time::UNIX_EPOCH;

use phasewise_stages::io::{Choice, EventSource};
use phasewise_stages::{LabelledArray, Layout, Notes, StageError};
use serde::{Deserialize, Serialize};

use crate::fsio::bookkeeping_write;
use crate::key;

/// Reads recordings; the CLI uses [`RecordingReader`], tests may substitute their own.
pub trait Reader: Sync {
    /// The sidecar files of a recording that exist, in a fixed order.
    fn sidecars(&self, path: &Path) -> Vec<PathBuf>;
    /// The layout of a recording, from its header and sidecars only.
    fn layout(
        &self,
        path: &Path,
        events: EventSource,
        choice: &Choice,
    ) -> Result<Layout, StageError>;
    /// The recording (the channels `choice` names, at its rate when it gives one).
    fn read(
        &self,
        path: &Path,
        events: EventSource,
        choice: &Choice,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError>;
}

/// The readers of the stages crate (EDF, EDF+, BDF with BIDS sidecars).
pub struct RecordingReader;

impl Reader for RecordingReader {
    fn sidecars(&self, path: &Path) -> Vec<PathBuf> {
        phasewise_stages::io::sidecar_paths(path)
    }
    fn layout(
        &self,
        path: &Path,
        events: EventSource,
        choice: &Choice,
    ) -> Result<Layout, StageError> {
        phasewise_stages::io::read_chosen_layout(path, events, choice)
    }
    fn read(
        &self,
        path: &Path,
        events: EventSource,
        choice: &Choice,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        phasewise_stages::io::read_chosen(path, events, choice, notes)
    }
}

/// Problems finding the recordings.
#[derive(Debug, thiserror::Error)]
pub enum SourceError {
    /// The glob is malformed.
    #[error("`{pattern}` is not a valid glob: {message}")]
    BadPattern {
        /// The glob.
        pattern: String,
        /// Why.
        message: String,
    },
    /// The glob matched no file.
    #[error("`{pattern}` matches no file (looked in {})", shown(.dir))]
    NoMatch {
        /// The glob.
        pattern: String,
        /// The folder it is relative to.
        dir: PathBuf,
    },
    /// Two recordings map to the same subject.
    #[error(
        "subject `{subject}` has two recordings, {first} and {second}; expected one per subject"
    )]
    DuplicateSubject {
        /// The subject.
        subject: String,
        /// One file.
        first: PathBuf,
        /// The other.
        second: PathBuf,
    },
    /// A subject id would collide with the `group` output folder.
    #[error(
        "data.recordings: {path} gives the subject id `group`, which is reserved for group results"
    )]
    ReservedSubject {
        /// The file.
        path: PathBuf,
    },
    /// A file could not be read.
    #[error("cannot read {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
}

/// A folder for messages: `.` rather than nothing.
fn shown(dir: &Path) -> String {
    if dir.as_os_str().is_empty() {
        ".".into()
    } else {
        dir.display().to_string()
    }
}

/// One subject's recording.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Source {
    /// The subject id.
    pub subject: String,
    /// The recording.
    pub path: PathBuf,
    /// Its sidecars.
    pub sidecars: Vec<PathBuf>,
}

impl Source {
    /// The recording and its sidecars, each with its role in the key (`recording`,
    /// `events.tsv`, ...).
    pub fn files(&self) -> Vec<(String, &Path)> {
        let mut files = vec![("recording".to_string(), self.path.as_path())];
        for sidecar in &self.sidecars {
            files.push((sidecar_role(sidecar), sidecar.as_path()));
        }
        files
    }
}

fn sidecar_role(path: &Path) -> String {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    match name.rsplit_once('_') {
        Some((_, role)) => role.to_string(),
        None => name,
    }
}

/// Find the recordings of `pattern` (relative to `dir`), sorted by subject.
pub fn discover(
    dir: &Path,
    pattern: &str,
    reader: &dyn Reader,
) -> Result<Vec<Source>, SourceError> {
    let full_text = glob_under(dir, pattern);
    let paths = glob::glob(&full_text).map_err(|e| SourceError::BadPattern {
        pattern: pattern.to_string(),
        message: e.msg.to_string(),
    })?;
    let mut sources: Vec<Source> = Vec::new();
    for entry in paths {
        let path = entry.map_err(|e| SourceError::Io {
            path: e.path().to_path_buf(),
            source: std::io::Error::new(e.error().kind(), e.error().to_string()),
        })?;
        if path.is_file() {
            sources.push(source_for(path, reader)?);
        }
    }
    if sources.is_empty() {
        return Err(SourceError::NoMatch {
            pattern: pattern.to_string(),
            dir: dir.to_path_buf(),
        });
    }
    sources.sort_by(|a, b| a.subject.cmp(&b.subject).then(a.path.cmp(&b.path)));
    check_unique(&sources)?;
    Ok(sources)
}

/// `pattern` joined to `dir` as one glob. The folder is escaped, so that a study kept in a folder
/// whose name holds glob characters (`study [pilot]/`) is matched literally; an absolute pattern
/// is taken as it is.
pub fn glob_under(dir: &Path, pattern: &str) -> String {
    if Path::new(pattern).is_absolute() || dir.as_os_str().is_empty() {
        return pattern.to_string();
    }
    let dir = glob::Pattern::escape(&dir.to_string_lossy());
    Path::new(&dir).join(pattern).to_string_lossy().into_owned()
}

/// A recordings glob split at its first component with a wildcard: the folder the recordings
/// live under (`../demo-data`) and the pattern below it (`sub-*/eeg/*_eeg.edf`).
pub fn glob_root(pattern: &str) -> (PathBuf, String) {
    let wild = |c: &str| c.contains(['*', '?', '[', '{']);
    let parts: Vec<&str> = pattern.split('/').collect();
    // The file name stays in the pattern even when it has no wildcard.
    let at = parts
        .iter()
        .position(|c| wild(c))
        .unwrap_or(parts.len().saturating_sub(1));
    let root = parts[..at].join("/");
    let root = match (root.is_empty(), pattern.starts_with('/')) {
        (true, true) => PathBuf::from("/"),
        (true, false) => PathBuf::from("."),
        _ => PathBuf::from(root),
    };
    (root, parts[at..].join("/"))
}

/// The recordings glob moved under a new folder (`verify --data DIR`): the pattern below the
/// glob's root folder ([`glob_root`]), under `root` (made absolute and matched literally).
pub fn relocate_glob(pattern: &str, root: &Path) -> String {
    let (_, below) = glob_root(pattern);
    let root = std::path::absolute(root).unwrap_or_else(|_| root.to_path_buf());
    let root = glob::Pattern::escape(&root.to_string_lossy());
    Path::new(&root).join(below).to_string_lossy().into_owned()
}

fn source_for(path: PathBuf, reader: &dyn Reader) -> Result<Source, SourceError> {
    let subject = subject_of(&path);
    if subject == "group" {
        return Err(SourceError::ReservedSubject { path });
    }
    let sidecars = reader.sidecars(&path);
    Ok(Source {
        subject,
        path,
        sidecars,
    })
}

fn check_unique(sources: &[Source]) -> Result<(), SourceError> {
    for pair in sources.windows(2) {
        if pair[0].subject == pair[1].subject {
            return Err(SourceError::DuplicateSubject {
                subject: pair[0].subject.clone(),
                first: pair[0].path.clone(),
                second: pair[1].path.clone(),
            });
        }
    }
    Ok(())
}

/// The subject id of a recording: the `sub-<label>` entity, else the file stem.
pub fn subject_of(path: &Path) -> String {
    let from_entity = |text: &str| {
        text.split('_')
            .find_map(|part| part.strip_prefix("sub-"))
            .filter(|label| !label.is_empty())
            .map(str::to_string)
    };
    let stem = path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    if let Some(label) = from_entity(&stem) {
        return label;
    }
    let folders = path.ancestors().skip(1).filter_map(Path::file_name);
    for folder in folders {
        if let Some(label) = from_entity(&folder.to_string_lossy()) {
            return label;
        }
    }
    stem
}

/// A file's size and content hash.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileHash {
    /// The file.
    pub path: PathBuf,
    /// Its size in bytes.
    pub size: u64,
    /// blake3 of its bytes.
    pub blake3: String,
}

/// The stat record of one file.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
struct StatRecord {
    format_version: u32,
    path: PathBuf,
    size: u64,
    mtime_ns: u128,
    blake3: String,
}

const STAT_VERSION: u32 = 1;

/// Hashes files, skipping those whose stat record in `<cache>/stat/` still matches.
pub struct Hasher {
    stat_dir: Option<PathBuf>,
}

impl Hasher {
    /// A hasher that keeps stat records under `cache`.
    pub fn with_records(cache: &Path) -> Self {
        Hasher {
            stat_dir: Some(cache.join("stat")),
        }
    }

    /// A hasher that always reads every byte (for `verify`).
    pub fn always_rehash() -> Self {
        Hasher { stat_dir: None }
    }

    /// The size and hash of `path`.
    pub fn hash(&self, path: &Path) -> Result<FileHash, SourceError> {
        let io = |source| SourceError::Io {
            path: path.to_path_buf(),
            source,
        };
        let meta = std::fs::metadata(path).map_err(io)?;
        let mtime_ns = meta
            .modified()
            .ok()
            .and_then(|t| t.duration_since(UNIX_EPOCH).ok())
            .map_or(0, |d| d.as_nanos());
        let record_path = self.record_path(path);
        if let Some(record) = record_path.as_deref().and_then(read_record) {
            if record.size == meta.len() && record.mtime_ns == mtime_ns && record.path == path {
                return Ok(FileHash {
                    path: path.to_path_buf(),
                    size: record.size,
                    blake3: record.blake3,
                });
            }
        }
        let (size, blake3) = hash_file(path).map_err(io)?;
        if let Some(record_path) = record_path {
            let record = StatRecord {
                format_version: STAT_VERSION,
                path: path.to_path_buf(),
                size,
                mtime_ns,
                blake3: blake3.clone(),
            };
            // A record that cannot be written only costs a rehash next time.
            if let Ok(bytes) = serde_json::to_vec(&record) {
                let _ = bookkeeping_write(&record_path, &bytes);
            }
        }
        Ok(FileHash {
            path: path.to_path_buf(),
            size,
            blake3,
        })
    }

    /// The key of a source and the hashes of its files (the events sidecar among them, when
    /// there is one). How the files are read joins the key when it is not the default, so a
    /// pipeline without those settings keeps its keys: `events` (`data.events`; the default
    /// reads the events sidecar, `annotations` the recording's own events, which can differ)
    /// and `choice` (`data.channels`, `data.rate`, ...).
    pub fn source_key(
        &self,
        source: &Source,
        events: EventSource,
        choice: &Choice,
    ) -> Result<(String, Vec<FileHash>), SourceError> {
        // What the reader makes of the files is part of the key too.
        let reader = phasewise_stages::io::READER_VERSION.to_string();
        let mut roles = vec![("reader".to_string(), reader)];
        if events != EventSource::Sidecar {
            roles.push(("events".to_string(), events_name(events).to_string()));
        }
        if !choice.is_default() {
            let value = serde_json::to_value(choice).unwrap_or_default();
            roles.push(("choice".to_string(), key::canonical_json(&value)));
        }
        let mut hashes = Vec::new();
        for (role, path) in source.files() {
            let h = self.hash(path)?;
            roles.push((role, h.blake3.clone()));
            hashes.push(h);
        }
        Ok((key::source_key(&roles), hashes))
    }

    fn record_path(&self, path: &Path) -> Option<PathBuf> {
        let dir = self.stat_dir.as_ref()?;
        let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
        let id = blake3::hash(absolute.to_string_lossy().as_bytes()).to_hex();
        Some(dir.join(format!("{}.json", &id[..32])))
    }
}

fn read_record(path: &Path) -> Option<StatRecord> {
    let bytes = std::fs::read(path).ok()?;
    let record: StatRecord = serde_json::from_slice(&bytes).ok()?;
    (record.format_version == STAT_VERSION).then_some(record)
}

/// `data.events` as the pipeline file writes it.
pub fn events_name(events: EventSource) -> &'static str {
    match events {
        EventSource::Sidecar => "sidecar",
        EventSource::Annotations => "annotations",
    }
}

/// Size and blake3 of a file, read in chunks.
pub fn hash_file(path: &Path) -> std::io::Result<(u64, String)> {
    let mut file = std::fs::File::open(path)?;
    let mut hasher = blake3::Hasher::new();
    let mut buffer = vec![0u8; 1 << 16];
    let mut size = 0u64;
    loop {
        let n = file.read(&mut buffer)?;
        if n == 0 {
            break;
        }
        size += n as u64;
        hasher.update(&buffer[..n]);
    }
    Ok((size, hasher.finalize().to_hex().to_string()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_glob_splits_at_its_first_wildcard_and_moves_under_a_new_root() {
        let (root, below) = glob_root("../demo-data/sub-*/eeg/*_eeg.edf");
        assert_eq!(
            (root, below.as_str()),
            (PathBuf::from("../demo-data"), "sub-*/eeg/*_eeg.edf")
        );
        assert_eq!(glob_root("*.edf"), (PathBuf::from("."), "*.edf".into()));
        assert_eq!(glob_root("/d/x.edf"), (PathBuf::from("/d"), "x.edf".into()));
        assert_eq!(
            relocate_glob("../demo-data/sub-*/eeg/*.edf", Path::new("/new [copy]")),
            "/new [[]copy[]]/sub-*/eeg/*.edf"
        );
    }

    #[test]
    fn subjects_come_from_the_bids_entity_or_the_stem() {
        assert_eq!(
            subject_of(Path::new("d/sub-07/eeg/sub-07_task-cue_eeg.edf")),
            "07"
        );
        assert_eq!(subject_of(Path::new("d/sub-x3/eeg/recording.edf")), "x3");
        assert_eq!(subject_of(Path::new("d/patient4.edf")), "patient4");
    }

    #[test]
    fn the_stat_record_skips_rehashing_but_a_change_is_seen() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("a.bin");
        std::fs::write(&file, b"abc").unwrap();
        let hasher = Hasher::with_records(&dir.path().join("cache"));
        let first = hasher.hash(&file).unwrap();
        // blake3 of "abc", from the BLAKE3 reference implementation's test vectors.
        assert_eq!(
            first.blake3,
            "6437b3ac38465133ffb63b75273a8db548c558465d79db03fd359c6cd5bd9d85"
        );
        assert_eq!(hasher.hash(&file).unwrap(), first);
        std::fs::write(&file, b"abd").unwrap();
        assert_ne!(hasher.hash(&file).unwrap().blake3, first.blake3);
    }
}
