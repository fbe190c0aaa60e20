//! Files written whole or not at all: every write of the cache, the exports and the manifest
//! goes through a temporary file in the target's folder that is renamed over the target only
//! when it is complete (and, where a crash must not lose it, fsynced first). A reader therefore
//! sees the old file or the new one, never a part of one.
//!
//! The writer of a temporary file decides, once it has written it, whether it is to be renamed:
//! [`Declined`] says why not, as a value the caller matches on.

use std::fs::File;
use std::io::Write;
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};

/// Why a `fill` turned its temporary file down: nothing is renamed and the temporary file is
/// removed.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum Declined {
    /// The file at the target path already holds exactly this content (it is left alone, with
    /// its modification time).
    #[error("the file already holds this content")]
    Unchanged,
    /// The content turned out wrong (a hash that does not match its record, a part that does
    /// not fit): the message says what.
    #[error("{0}")]
    Wrong(String),
}

/// Bytes after which [`Writeback`] asks the kernel to start writing them to disk.
pub(crate) const WRITEBACK_BYTES: u64 = 8 << 20;

/// The temporary file that [`write_then_rename`] hands its `fill`: written in pieces of at most
/// [`WRITEBACK_BYTES`], each handed to the disk as soon as it is written (Linux `sync_file_range(SYNC_FILE_RANGE_WRITE)`, which starts the write and
/// does not wait for it), so that the fsync before the rename finds most of a large object
/// already on its way and waits less. Only when the write goes to disk changes; what is written,
/// and the fsync that makes it durable, do not.
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
            #[cfg(target_os = "linux")]
            {
                use std::os::fd::AsRawFd;
                let (from, len) = (self.started as i64, (self.written - self.started) as i64);
                // SAFETY: a plain system call on an open descriptor; only a hint, so its
                // answer is not needed.
                unsafe {
                    libc::sync_file_range(
                        self.file.as_raw_fd(),
                        from,
                        len,
                        libc::SYNC_FILE_RANGE_WRITE,
                    );
                }
            }
            self.started = self.written;
        }
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.file.flush()
    }
}

/// Write `bytes` to `path` atomically: a temporary file in the same folder, fsync, rename.
pub fn atomic_write(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_then_rename(path, false, |file| file.write_all(bytes).map(Ok))
        .map(|r: Result<(), Declined>| r.unwrap_or(()))
}

/// [`atomic_write`] without the fsyncs, for bookkeeping whose loss in a crash costs only work
/// (the stat records of input files and exports, the last fingerprint of a unit): a reader sees
/// the old file or the new one, never a part, and one lost after a power cut is simply redone.
pub fn bookkeeping_write(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    replace_via_temp(path, false, false, |file| file.write_all(bytes).map(Ok))
        .map(|r: Result<(), Declined>| r.unwrap_or(()))
}

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

/// Prefix of temporary files; they are never read, and `prune` removes old ones.
pub const TEMP_PREFIX: &str = ".tmp-";

/// Fill a temporary file in `path`'s folder with `fill`, fsync it and rename it to `path`. When
/// `fill` declines (`Ok(Err(_))`: the content turned out wrong, or the file already holds it)
/// the temporary file is removed, nothing is renamed and the answer is passed on.
pub fn write_then_rename<T>(
    path: &Path,
    abort_before_rename: bool,
    fill: impl FnOnce(&mut Writeback<'_>) -> std::io::Result<Result<T, Declined>>,
) -> std::io::Result<Result<T, Declined>> {
    replace_via_temp(path, abort_before_rename, true, fill)
}

/// [`write_then_rename`] without the fsyncs, for a cache object's values and record: every read
/// checks an object against the content hash in its record, so one that a power loss left
/// incomplete is recomputed, never used; an exported object is made durable when it is linked
/// ([`link_then_rename`]). See DEVELOPERS.md "Durability".
pub fn write_then_rename_unsynced<T>(
    path: &Path,
    abort_before_rename: bool,
    fill: impl FnOnce(&mut Writeback<'_>) -> std::io::Result<Result<T, Declined>>,
) -> std::io::Result<Result<T, Declined>> {
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
fn replace_via_temp<T>(
    path: &Path,
    abort_before_rename: bool,
    durable: bool,
    fill: impl FnOnce(&mut Writeback<'_>) -> std::io::Result<Result<T, Declined>>,
) -> std::io::Result<Result<T, Declined>> {
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)?;
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned());
    let temp = dir.join(format!(
        "{TEMP_PREFIX}{}-{}-{}",
        std::process::id(),
        TEMP_COUNTER.fetch_add(1, Ordering::Relaxed),
        name.unwrap_or_default()
    ));
    let mut file = File::create(&temp)?;
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
