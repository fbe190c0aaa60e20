//! Files written whole or not at all: every write of the cache, the exports and the manifest
//! goes through a temporary file in the target's folder that is renamed over the target only
//! when it is complete (and, where a crash must not lose it, fsynced first). A reader therefore
//! sees the old file or the new one, never a part of one.
//!
//! The writer of a temporary file decides, once it has written it, whether it is to be renamed:
//! [`Declined`] says why not, as a value the caller matches on (the writer's own error type
//! when the content turned out wrong).

use std::fs::File;
use std::io::Write;
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};

/// Why a `fill` turned its temporary file down: nothing is renamed and the temporary file is
/// removed. `E` is the writer's own error type (a stored object's [`Damage`](crate::store::Damage),
/// an encoding error); writers that never find their content wrong use [`Never`].
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum Declined<E> {
    /// The file at the target path already holds exactly this content (it is left alone, with
    /// its modification time).
    #[error("the file already holds this content")]
    Unchanged,
    /// The content turned out wrong (a hash that does not match its record, a part that does
    /// not fit): the writer's error says what.
    #[error(transparent)]
    Wrong(E),
}

/// The error of a writer whose content cannot turn out wrong.
pub type Never = std::convert::Infallible;

/// Bytes after which [`Writeback`] asks the kernel to start writing them to disk.
pub(crate) const WRITEBACK_BYTES: u64 = 8 << 20;

/// The temporary file that [`write_then_rename`] hands its `fill`: written in pieces of at most
/// [`WRITEBACK_BYTES`], each handed to the disk as soon as it is written ([`hand_to_disk`],
/// which starts the write and waits for nothing), so that the fsync before the rename finds most
/// of a large object already on its way and waits less. Only when the write goes to disk
/// changes; what is written, and the fsync that makes it durable, do not.
pub struct Writeback<'f> {
    file: &'f mut File,
    written: u64,
    started: u64,
}

impl<'f> Writeback<'f> {
    fn new(file: &'f mut File) -> Self {
        Writeback {
            file,
            written: 0,
            started: 0,
        }
    }
}

impl Write for Writeback<'_> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let piece = buf.len().min(WRITEBACK_BYTES as usize);
        let n = self.file.write(&buf[..piece])?;
        self.written += n as u64;
        if self.written - self.started >= WRITEBACK_BYTES {
            hand_to_disk(self.file, self.started, self.written - self.started);
            self.started = self.written;
        }
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.file.flush()
    }
}

/// How many disk-write hints may wait for the writeback thread ([`hand_to_disk`]).
#[cfg(target_os = "linux")]
const WRITEBACK_QUEUE: usize = 16;

/// Ask the kernel to start writing every dirty page of `file` to disk, without waiting for it
/// ([`hand_to_disk`] over the whole file): a later fsync then waits for less. Only when the
/// bytes reach the disk changes.
pub fn start_writeback(file: &File) {
    hand_to_disk(file, 0, 0);
}

/// Start the disk write of `len` bytes of `file` from `from` (`len` 0: to its end), on the
/// writeback thread: Linux `sync_file_range(SYNC_FILE_RANGE_WRITE)` on a duplicate of the
/// descriptor. The call does not wait for the disk, but it does wait for room in the disk's
/// queue, which a write of hundreds of megabytes fills; on a thread of its own that wait never
/// holds up the thread that wrote the bytes. At most [`WRITEBACK_QUEUE`] hints wait for the
/// thread (each holds a descriptor open); one given while they all wait is dropped. Only a hint:
/// when it cannot be given (queue full, no duplicate descriptor, no thread, another system)
/// nothing happens, and the fsync that makes a file durable writes whatever is left.
fn hand_to_disk(file: &File, from: u64, len: u64) {
    #[cfg(target_os = "linux")]
    {
        use std::sync::mpsc::SyncSender;
        use std::sync::OnceLock;
        static QUEUE: OnceLock<Option<SyncSender<(File, u64, u64)>>> = OnceLock::new();
        let queue = QUEUE.get_or_init(|| {
            let (sender, receiver) =
                std::sync::mpsc::sync_channel::<(File, u64, u64)>(WRITEBACK_QUEUE);
            let thread = std::thread::Builder::new()
                .name("phasewise-writeback".into())
                .spawn(move || {
                    use std::os::fd::AsRawFd;
                    for (file, from, len) in receiver {
                        // SAFETY: a plain system call on a descriptor this thread owns; only a
                        // hint, so its answer is not needed.
                        unsafe {
                            libc::sync_file_range(
                                file.as_raw_fd(),
                                from as i64,
                                len as i64,
                                libc::SYNC_FILE_RANGE_WRITE,
                            );
                        }
                    }
                });
            thread.ok().map(|_| sender)
        });
        if let (Some(queue), Ok(duplicate)) = (queue, file.try_clone()) {
            let _ = queue.try_send((duplicate, from, len));
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = (file, from, len);
}

/// Tell the kernel that the pages of the file at `path` in the page cache will not be read
/// again soon (Linux `posix_fadvise(POSIX_FADV_DONTNEED)` over the whole file; nothing
/// elsewhere): pages already on disk are freed at once, so that the next files this run writes
/// take them instead of memory the system has not touched for a while (on a virtual machine
/// that hands idle guest memory back to its host, a first touch of such memory costs many times
/// more; BENCHMARKS.md has the measurements). Only a hint: the file's bytes, and any later read
/// of them, are unchanged.
pub fn drop_cached(path: &Path) {
    #[cfg(target_os = "linux")]
    if let Ok(file) = File::open(path) {
        use std::os::fd::AsRawFd;
        // SAFETY: a plain system call on an open descriptor; only a hint, so its answer is
        // not needed.
        unsafe {
            libc::posix_fadvise(file.as_raw_fd(), 0, 0, libc::POSIX_FADV_DONTNEED);
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = path;
}

/// Where a refused write was going; what frees room differs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Destination {
    /// The cache (objects, records, spools).
    Cache,
    /// The output folder (exports).
    Output,
}

impl Destination {
    /// What frees room on this destination's disk, as one or two sentences.
    pub fn advice(self) -> &'static str {
        match self {
            Destination::Cache => {
                "`phasewise prune PIPELINE...` removes the cache objects that no manifest of \
                 those pipelines uses; --cache DIR puts the cache on another disk."
            }
            Destination::Output => {
                "The pipeline's `output:` can name a folder on another disk; when the cache \
                 shares this disk, `phasewise prune PIPELINE...` frees room too."
            }
        }
    }
}

/// The system's reason a write failed, as the user reads it. When the filesystem or the user's
/// quota is full it goes on to say what frees room there ([`Destination::advice`]), since a
/// cache that keeps every variant a study has tried is the usual cause.
pub struct WriteReason<'a>(pub &'a std::io::Error, pub Destination);

impl std::fmt::Display for WriteReason<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}", self.0)?;
        if matches!(
            self.0.kind(),
            std::io::ErrorKind::StorageFull | std::io::ErrorKind::QuotaExceeded
        ) {
            write!(f, " (the disk or your quota is full. {})", self.1.advice())?;
        }
        Ok(())
    }
}

/// Write `bytes` to `path` atomically: a temporary file in the same folder, fsync, rename.
pub fn atomic_write(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_then_rename(path, false, |file| file.write_all(bytes).map(Ok))
        .map(|r: Result<(), Declined<Never>>| r.unwrap_or(()))
}

/// [`atomic_write`] without the fsyncs, for bookkeeping whose loss in a crash costs only work
/// (the stat records of input files and exports, the last fingerprint of a unit): a reader sees
/// the old file or the new one, never a part, and one lost after a power cut is simply redone.
pub fn bookkeeping_write(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    replace_via_temp(path, false, false, |file| file.write_all(bytes).map(Ok))
        .map(|r: Result<(), Declined<Never>>| r.unwrap_or(()))
}

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

/// Prefix of temporary files; they are never read, and `prune` removes old ones.
pub const TEMP_PREFIX: &str = ".tmp-";

/// Fill a temporary file in `path`'s folder with `fill`, fsync it and rename it to `path`. When
/// `fill` declines (`Ok(Err(_))`: the content turned out wrong, or the file already holds it)
/// the temporary file is removed, nothing is renamed and the answer is passed on.
pub fn write_then_rename<T, E>(
    path: &Path,
    abort_before_rename: bool,
    fill: impl FnOnce(&mut Writeback<'_>) -> std::io::Result<Result<T, Declined<E>>>,
) -> std::io::Result<Result<T, Declined<E>>> {
    replace_via_temp(path, abort_before_rename, true, fill)
}

/// [`write_then_rename`] without the fsyncs, for a cache object's values and record: every read
/// checks an object against the content hash in its record, so one that a power loss left
/// incomplete is recomputed, never used; an exported object is made durable when it is linked
/// ([`link_then_rename`]). See DEVELOPERS.md "Durability".
pub fn write_then_rename_unsynced<T, E>(
    path: &Path,
    abort_before_rename: bool,
    fill: impl FnOnce(&mut Writeback<'_>) -> std::io::Result<Result<T, Declined<E>>>,
) -> std::io::Result<Result<T, Declined<E>>> {
    replace_via_temp(path, abort_before_rename, false, fill)
}

/// Make `source` durable (fsync), then give it the name `path` too: a hard link under a
/// temporary name in `path`'s folder, renamed over `path`, and the folder fsynced. No byte is
/// copied. Fails (and leaves nothing behind) where the two are on different filesystems or the
/// filesystem has no hard links; the caller then copies.
pub fn link_then_rename(source: &File, source_path: &Path, path: &Path) -> std::io::Result<()> {
    source.sync_all()?;
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)?;
    let temp = dir.join(format!(
        "{TEMP_PREFIX}{}-{}-link",
        std::process::id(),
        TEMP_COUNTER.fetch_add(1, Ordering::Relaxed),
    ));
    std::fs::hard_link(source_path, &temp)?;
    std::fs::rename(&temp, path).inspect_err(|_| {
        let _ = std::fs::remove_file(&temp);
    })?;
    if let Ok(d) = File::open(dir) {
        let _ = d.sync_all();
    }
    Ok(())
}

/// [`write_then_rename`], with the fsyncs of the file and its folder only when `durable`.
fn replace_via_temp<T, E>(
    path: &Path,
    abort_before_rename: bool,
    durable: bool,
    fill: impl FnOnce(&mut Writeback<'_>) -> std::io::Result<Result<T, Declined<E>>>,
) -> std::io::Result<Result<T, Declined<E>>> {
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)?;
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned());
    let temp = dir.join(temp_name(&name.unwrap_or_default()));
    // Exclusive create: an existing file of that name (which the host, pid and random number
    // make all but impossible) is an error, never a file shared with another writer.
    let mut file = std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&temp)?;
    // Only a file about to be renamed is made durable; one that `fill` turned down is removed.
    let filled = fill(&mut Writeback::new(&mut file)).and_then(|r| {
        if durable && r.is_ok() {
            file.sync_all()?;
        }
        Ok(r)
    });
    drop(file);
    let value = match filled {
        Ok(Ok(value)) => value,
        Ok(Err(why)) => {
            let _ = std::fs::remove_file(&temp);
            return Ok(Err(why));
        }
        Err(e) => {
            let _ = std::fs::remove_file(&temp);
            return Err(e);
        }
    };
    if abort_before_rename {
        std::process::abort();
    }
    std::fs::rename(&temp, path).inspect_err(|_| {
        let _ = std::fs::remove_file(&temp);
    })?;
    // The rename itself must survive a crash too; failing to sync a folder is not fatal.
    if durable {
        if let Ok(d) = File::open(dir) {
            let _ = d.sync_all();
        }
    }
    Ok(Ok(value))
}

/// How old a temporary file must be before [`remove_stale_temps`] (and `prune`) take it for the
/// leftover of a killed writer. No write of one file takes this long; a live writer on another
/// host cannot be told from a dead one by anything but age (its pid means nothing here).
pub const TEMP_GRACE: std::time::Duration = std::time::Duration::from_secs(3600);

/// Remove temporary files in `dir` that have not been modified for [`TEMP_GRACE`]: leftovers of
/// killed runs. Age is the only test: a temporary file of a live writer on another host (whose
/// pid may well be a live or dead pid here) is never taken for dead while it is being written.
pub fn remove_stale_temps(dir: &Path) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        if entry.file_name().to_string_lossy().starts_with(TEMP_PREFIX) && is_stale(&entry.path()) {
            let _ = std::fs::remove_file(entry.path());
        }
    }
}

/// True when the file at `path` was last modified more than [`TEMP_GRACE`] ago.
pub fn is_stale(path: &Path) -> bool {
    std::fs::metadata(path)
        .and_then(|m| m.modified())
        .ok()
        .and_then(|t| std::time::SystemTime::now().duration_since(t).ok())
        .is_some_and(|age| age > TEMP_GRACE)
}

/// This machine's host name (`gethostname`), or `unknown-host`.
pub fn host_name() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its length; gethostname writes at most that many bytes.
    let rc = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) };
    let end = buf.iter().position(|&b| b == 0).unwrap_or(buf.len());
    match std::str::from_utf8(&buf[..end]) {
        Ok(name) if rc == 0 && !name.is_empty() => name.to_string(),
        _ => "unknown-host".into(),
    }
}

/// The name of a new temporary file for `target`: [`TEMP_PREFIX`], the host, the pid, a random
/// number and a counter, then the target's name. Host and pid tell apart writers that share a
/// folder over a network filesystem; the random number those that share both (two containers or
/// PID namespaces with the same host name); the counter the writes of one process.
pub(crate) fn temp_name(target: &str) -> String {
    use std::hash::{BuildHasher, Hasher};
    use std::sync::OnceLock;
    static HOST: OnceLock<String> = OnceLock::new();
    let host = HOST.get_or_init(|| {
        host_name()
            .chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '.' {
                    c
                } else {
                    '_'
                }
            })
            .collect()
    });
    // A hasher with the process's random keys (std seeds them from the OS), fed the counter:
    // a fresh random number per temporary file.
    let n = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
    let mut hasher = std::collections::hash_map::RandomState::new().build_hasher();
    hasher.write_u64(n);
    hasher.write_u32(std::process::id());
    format!(
        "{TEMP_PREFIX}{host}-{}-{:016x}-{n}-{target}",
        std::process::id(),
        hasher.finish()
    )
}

#[cfg(test)]
mod tests {
    use super::{Destination, WriteReason};
    use std::io::{Error, ErrorKind};

    #[test]
    fn a_full_disk_or_quota_says_what_frees_room_there_and_other_failures_do_not() {
        for kind in [ErrorKind::StorageFull, ErrorKind::QuotaExceeded] {
            let said = WriteReason(&Error::from(kind), Destination::Cache).to_string();
            assert!(said.contains("phasewise prune PIPELINE..."), "{said}");
            assert!(said.contains("--cache DIR"), "{said}");
            let said = WriteReason(&Error::from(kind), Destination::Output).to_string();
            assert!(said.contains("`output:` can name a folder"), "{said}");
            assert!(!said.contains("--cache DIR"), "{said}");
        }
        // ENOSPC as the kernel reports it, not only as a constructed kind.
        let said = WriteReason(&Error::from_raw_os_error(libc::ENOSPC), Destination::Cache);
        let said = said.to_string();
        assert!(said.starts_with("No space left on device"), "{said}");
        assert!(said.contains("phasewise prune"), "{said}");
        let denied = Error::from(ErrorKind::PermissionDenied);
        for to in [Destination::Cache, Destination::Output] {
            assert_eq!(WriteReason(&denied, to).to_string(), denied.to_string());
        }
    }

    #[test]
    fn cache_and_export_failures_name_the_file_and_carry_the_full_disk_advice() {
        let path = std::path::Path::new("/study/.phasewise/objects/ab/ab12.npy");
        let full = || Error::from_raw_os_error(libc::ENOSPC);
        let cache = crate::store::StoreError::Write {
            path: path.to_path_buf(),
            source: full(),
        }
        .to_string();
        let export = crate::output::OutputError::io(path, &full()).to_string();
        // The NPY encoder's own error for the same refusal, named as a write of the file.
        let encoder = crate::store::StoreError::Npy(ndarray_npy::WriteNpyError::Io(full()))
            .writing(path)
            .to_string();
        for said in [&cache, &export, &encoder] {
            assert!(
                said.starts_with(&format!("cannot write {}: No space", path.display())),
                "{said}"
            );
        }
        for cache_side in [&cache, &encoder] {
            assert!(cache_side.contains("--cache DIR"), "{cache_side}");
        }
        assert!(export.contains("`output:` can name a folder"), "{export}");
    }
}
