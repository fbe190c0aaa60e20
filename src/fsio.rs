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
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned());
    let temp = dir.join(temp_name(&name.unwrap_or_default()));
    std::fs::hard_link(source_path, &temp)?;
    std::fs::rename(&temp, path).inspect_err(|_| {
        let _ = std::fs::remove_file(&temp);
    })?;
    // When `path` already is a name of the same file (an earlier export of this object, or one
    // a concurrent run just made), rename(2) does nothing and succeeds (POSIX: "If the old
    // argument and the new argument resolve to ... the same existing file, rename() shall
    // return successfully and perform no other action"): the temporary name is still there.
    if let Err(e) = std::fs::remove_file(&temp) {
        if e.kind() != std::io::ErrorKind::NotFound {
            tracing::debug!(temp = %temp.display(), "leftover link not removed: {e}");
        }
    }
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

/// Remove the temporary files in `dir` that are leftovers of killed runs ([`is_leftover`]).
pub fn remove_stale_temps(dir: &Path) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        if entry.file_name().to_string_lossy().starts_with(TEMP_PREFIX)
            && is_leftover(&entry.path())
        {
            let _ = std::fs::remove_file(entry.path());
        }
    }
}

/// True when the temporary file (or folder) at `path` is the leftover of a writer that is gone:
/// its name ([`temp_name`]) says a process of this machine's boot and PID namespace
/// ([`process_mark`]) made it and no process of that pid lives, or it has not been modified for
/// [`TEMP_GRACE`] ([`is_stale`]). A temporary of a writer on another host, in another container
/// or of a name that says nothing (another temporary-file maker's) goes by age alone: its pid
/// means nothing here, so it is never taken for dead while it is being written.
pub fn is_leftover(path: &Path) -> bool {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let writer_gone = match (writer_of(&name), process_mark()) {
        (Some((mark, pid)), Some(ours)) if mark == ours => !pid_lives(pid),
        _ => false,
    };
    writer_gone || is_stale(path)
}

/// The process mark and pid that a [`temp_name`] holds (`None` for another form of name).
fn writer_of(name: &str) -> Option<(&str, i32)> {
    let mut fields = name.strip_prefix(TEMP_PREFIX)?.splitn(4, '-');
    let (_host, mark, pid) = (fields.next()?, fields.next()?, fields.next()?);
    let pid: i32 = pid.parse().ok()?;
    (pid > 0 && mark.len() == MARK_LEN).then_some((mark, pid))
}

/// Whether a process of this pid lives in this PID namespace (`kill(pid, 0)`: only "no such
/// process" says it does not; a process of another user, or any other answer, counts as alive).
fn pid_lives(pid: i32) -> bool {
    #[cfg(unix)]
    {
        // SAFETY: signal 0 sends nothing; it only asks whether the process exists.
        let rc = unsafe { libc::kill(pid, 0) };
        rc == 0 || std::io::Error::last_os_error().raw_os_error() != Some(libc::ESRCH)
    }
    #[cfg(not(unix))]
    {
        let _ = pid;
        true
    }
}

/// Hex digits of a [`process_mark`].
const MARK_LEN: usize = 12;

/// What tells this process's pids apart from those of every other machine, boot and container:
/// the first [`MARK_LEN`] hex digits of the blake3 of the kernel's boot id
/// (`/proc/sys/kernel/random/boot_id`, new at every boot of every machine) and of the device and
/// inode of this process's PID namespace (`/proc/self/ns/pid`). Two processes with the same
/// mark see the same pids, so one can ask whether the other's pid lives. `None` where either is
/// unreadable (not Linux, no /proc): then pids are never compared ([`is_leftover`]).
fn process_mark() -> Option<&'static str> {
    use std::sync::OnceLock;
    static MARK: OnceLock<Option<String>> = OnceLock::new();
    MARK.get_or_init(|| {
        #[cfg(target_os = "linux")]
        {
            use std::os::unix::fs::MetadataExt;
            let boot = std::fs::read_to_string("/proc/sys/kernel/random/boot_id").ok()?;
            let namespace = std::fs::metadata("/proc/self/ns/pid").ok()?;
            let text = format!("{}\n{}:{}", boot.trim(), namespace.dev(), namespace.ino());
            let hex = blake3::hash(text.as_bytes()).to_hex();
            Some(hex[..MARK_LEN].to_string())
        }
        #[cfg(not(target_os = "linux"))]
        None
    })
    .as_deref()
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

/// Longest host name a [`temp_name`] holds (Linux's `HOST_NAME_MAX`), so that the name's length
/// is bounded by its target's ([`TEMP_NAME_EXTRA`]).
const TEMP_HOST_MAX: usize = 64;

/// How many bytes a [`temp_name`] adds at most to its target's name: the prefix, the host, the
/// process mark, a pid (at most 10 digits), the random number, the counter (at most 20 digits)
/// and five dashes.
pub const TEMP_NAME_EXTRA: usize = TEMP_PREFIX.len() + TEMP_HOST_MAX + MARK_LEN + 10 + 16 + 20 + 5;

/// The name of a new temporary file for `target`: [`TEMP_PREFIX`], the host, the process mark,
/// the pid, a random number and a counter, then the target's name. Host and pid tell apart
/// writers that share a folder over a network filesystem; the random number those that share
/// both (two containers or PID namespaces with the same host name); the counter the writes of
/// one process. The mark ([`process_mark`]; `0` where there is none) says whose pids the pid is,
/// so that the leftover of a writer that died is known at once ([`is_leftover`]).
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
            .take(TEMP_HOST_MAX)
            .collect()
    });
    // A hasher with the process's random keys (std seeds them from the OS), fed the counter:
    // a fresh random number per temporary file.
    let n = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
    let mut hasher = std::collections::hash_map::RandomState::new().build_hasher();
    hasher.write_u64(n);
    hasher.write_u32(std::process::id());
    format!(
        "{TEMP_PREFIX}{host}-{}-{}-{:016x}-{n}-{target}",
        process_mark().unwrap_or("0"),
        std::process::id(),
        hasher.finish()
    )
}

#[cfg(test)]
mod tests {
    use super::{Destination, WriteReason};
    use std::io::{Error, ErrorKind};
    use std::path::Path;

    /// The names in `dir` that start with the temporary prefix.
    fn temps_in(dir: &Path) -> Vec<String> {
        let mut names: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|n| n.starts_with(super::TEMP_PREFIX))
            .collect();
        names.sort();
        names
    }

    #[test]
    #[cfg(unix)]
    fn renaming_a_link_over_another_name_of_its_file_leaves_no_temporary() {
        use std::os::unix::fs::MetadataExt;
        let dir = tempfile::tempdir().unwrap();
        let object = dir.path().join("object.npy");
        std::fs::write(&object, b"values").unwrap();
        let out = dir.path().join("out");
        let target = out.join("norm.npy");
        let source = std::fs::File::open(&object).unwrap();
        super::link_then_rename(&source, &object, &target).unwrap();
        // The second export finds `target` already a name of the object: rename(2) does nothing.
        super::link_then_rename(&source, &object, &target).unwrap();
        assert_eq!(temps_in(&out), Vec::<String>::new());
        let meta = std::fs::metadata(&object).unwrap();
        assert_eq!(meta.nlink(), 2, "the object and its export, nothing else");
        assert_eq!(std::fs::metadata(&target).unwrap().ino(), meta.ino());
    }

    #[test]
    #[cfg(target_os = "linux")]
    fn the_sweep_removes_a_dead_writers_temporaries_at_once_and_no_live_ones() {
        let dir = tempfile::tempdir().unwrap();
        let ours = std::process::id().to_string();
        // A pid that was alive a moment ago and is not any more.
        let mut child = std::process::Command::new("true").spawn().unwrap();
        let dead = child.id().to_string();
        child.wait().unwrap();
        let named = |target: &str, pid: &str| {
            let name = super::temp_name(target);
            let mark = super::process_mark().expect("Linux has a boot id and a PID namespace");
            let with_pid =
                name.replacen(&format!("-{mark}-{ours}-"), &format!("-{mark}-{pid}-"), 1);
            assert_ne!(with_pid, name, "{name} holds the mark, then the pid");
            with_pid
        };
        let dead_link = named("norm.npy", &dead);
        let dead_json = named("norm.json", &dead);
        let live = super::temp_name("tf.npy");
        // The same dead pid on another machine, boot or container: only its age counts.
        let elsewhere = dead_link.replacen(super::process_mark().unwrap(), "0123456789ab", 1);
        // A temporary of an older form, which names no mark.
        let old_form = format!("{}{dead}-0-link", super::TEMP_PREFIX);
        for name in [&dead_link, &dead_json, &live, &elsewhere, &old_form] {
            std::fs::write(dir.path().join(name), b"x").unwrap();
        }
        super::remove_stale_temps(dir.path());
        let mut kept = vec![live, elsewhere, old_form];
        kept.sort();
        assert_eq!(temps_in(dir.path()), kept);
    }

    #[test]
    fn a_temporary_name_tells_its_mark_and_pid() {
        let name = super::temp_name("sub-01_norm.npy");
        let mark = super::process_mark().unwrap_or("0");
        let pid = std::process::id() as i32;
        let found = super::writer_of(&name);
        match super::process_mark() {
            Some(_) => assert_eq!(found, Some((mark, pid))),
            None => assert_eq!(found, None, "no mark: pids are never compared"),
        }
        assert_eq!(super::writer_of(".tmp-abc.npy"), None);
        assert_eq!(super::writer_of(".tmp-23902-0-link"), None);
        assert!(name.len() <= "sub-01_norm.npy".len() + super::TEMP_NAME_EXTRA);
    }

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
