//! Room: what a run will write, against the free space of the disks it writes to, decided
//! before anything runs.
//!
//! A stale unit whose recipe stores its output adds its values' bytes ([`OutputSize`]) to the
//! cache's filesystem; an exported stale unit adds them to the output folder's when the export
//! cannot be a second name of the cache object: its output is not stored, the folder is on
//! another filesystem, or it is a Zarr store (compressed, so counted as at most its values).
//! A size whose layout depends on values (trials left after rejection) is an upper bound, so
//! each filesystem gets two figures, `certain` and `at_most`. [`Room::check`] refuses a run
//! whose certain bytes exceed the free space (it could not finish) and warns when only the
//! bound does. The free space is `statvfs`'s `f_bavail` (what an unprivileged writer may use);
//! a quota is not seen, and a full quota is told when a write fails ([`crate::fsio::WriteReason`]).

use std::path::{Path, PathBuf};

use crate::fsio::Destination;
use crate::output::ExportFormat;
use crate::plan::{Plan, Status};
use crate::recipe::Recipe;
use crate::study::Study;
use crate::words::bytes;

/// What one stored object adds besides its values: its NPY header and its record, each at
/// least one filesystem block.
const PER_OBJECT: u64 = 8 << 10;

/// One filesystem a run writes to.
#[derive(Clone, Debug, PartialEq, Eq, serde::Serialize)]
pub struct Disk {
    /// The folder written (the cache, or the output folder), as the run names it.
    pub folder: PathBuf,
    /// What of the run is on it: `cache`, `output`, or both.
    pub holds: Vec<&'static str>,
    /// Bytes the run writes there, counting exact sizes only.
    pub certain: u64,
    /// Bytes it writes there at most (bounds included).
    pub at_most: u64,
    /// Bytes free for this user, `None` when the system could not tell.
    pub free: Option<u64>,
    /// The filesystem, to merge the cache's with the output folder's.
    #[serde(skip)]
    device: Option<u64>,
}

/// What a run writes, per filesystem.
#[derive(Clone, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(transparent)]
pub struct Room {
    /// The cache's filesystem first; the output folder's when it is another one.
    pub disks: Vec<Disk>,
}

/// A run that cannot fit: it would fill a disk before it ends.
#[derive(Debug, thiserror::Error)]
#[error(
    "not enough disk space for this run: it writes at least {} to {} ({}), whose filesystem has \
     {} free. {} --skip-room-check runs it anyway",
    bytes(*certain), folder.display(), holds.join(" and "), bytes(*free), advice(holds)
)]
pub struct NoRoom {
    /// The folder.
    pub folder: PathBuf,
    /// What of the run is on it.
    pub holds: Vec<&'static str>,
    /// Bytes it certainly writes there.
    pub certain: u64,
    /// Bytes free.
    pub free: u64,
}

fn advice(holds: &[&str]) -> String {
    let mut ways = Vec::new();
    if holds.contains(&"cache") {
        ways.push(Destination::Cache.advice());
    }
    if holds == ["output"] {
        ways.push(Destination::Output.advice());
    }
    ways.join(" ")
}

impl Room {
    /// The bytes the stale units of `plan` write, per filesystem.
    pub fn assess(study: &Study, plan: &Plan, recipes: &[Recipe]) -> Room {
        let mut cache = Disk::new(study.store.root(), "cache");
        let mut output = Disk::new(&study.pipeline.output, "output");
        let shared = cache.device.is_some() && cache.device == output.device;
        for (u, (line, recipe)) in plan.units.iter().zip(recipes).enumerate() {
            if line.status == Status::Fresh {
                continue;
            }
            let Some(size) = study.sizes.get(u).copied().flatten() else {
                continue;
            };
            let certain = if size.exact { size.bytes } else { 0 };
            if recipe.stored {
                cache.add(certain + PER_OBJECT, size.bytes + PER_OBJECT);
            }
            let stage = &study.pipeline.stages[study.units[u].stage];
            if !stage.export {
                continue;
            }
            match stage.format {
                ExportFormat::Npy if recipe.stored && shared => {}
                ExportFormat::Npy => output.add(certain, size.bytes),
                ExportFormat::Zarr => output.add(0, size.bytes),
            }
        }
        if shared {
            cache.holds.push("output");
            cache.add(output.certain, output.at_most);
            return Room { disks: vec![cache] };
        }
        Room {
            disks: vec![cache, output],
        }
    }

    /// Refuse a run that cannot fit; a warning for one that may not.
    pub fn check(&self) -> Result<Option<String>, NoRoom> {
        let mut warnings = Vec::new();
        for disk in &self.disks {
            let Some(free) = disk.free else { continue };
            if disk.certain > free {
                return Err(NoRoom {
                    folder: disk.folder.clone(),
                    holds: disk.holds.clone(),
                    certain: disk.certain,
                    free,
                });
            }
            if disk.at_most > free {
                warnings.push(format!(
                    "this run may write up to {} to {} ({}), whose filesystem has {} free: {} \
                     are certain, the rest is a bound for outputs whose size depends on the data \
                     (trials left after rejection). If the disk fills, the run stops at the \
                     first file it cannot write and names it. {}",
                    bytes(disk.at_most),
                    disk.folder.display(),
                    disk.holds.join(" and "),
                    bytes(free),
                    bytes(disk.certain),
                    advice(&disk.holds)
                ));
            }
        }
        Ok((!warnings.is_empty()).then(|| warnings.join("\n")))
    }
}

impl Disk {
    fn new(folder: &Path, holds: &'static str) -> Disk {
        let existing = existing_ancestor(folder);
        Disk {
            folder: folder.to_path_buf(),
            holds: vec![holds],
            certain: 0,
            at_most: 0,
            free: existing.as_deref().and_then(free_bytes),
            device: existing.as_deref().and_then(device),
        }
    }

    fn add(&mut self, certain: u64, at_most: u64) {
        self.certain = self.certain.saturating_add(certain);
        self.at_most = self.at_most.saturating_add(at_most);
    }
}

impl std::fmt::Display for Disk {
    /// One line, as `plan` prints it: `writes 1.2 GiB (up to 1.5 GiB) to .phasewise (cache;
    /// 80.3 GiB free)`.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "writes {}", bytes(self.certain))?;
        if self.at_most > self.certain {
            write!(f, " (up to {})", bytes(self.at_most))?;
        }
        write!(
            f,
            " to {} ({}; ",
            self.folder.display(),
            self.holds.join(" and ")
        )?;
        match self.free {
            Some(free) => write!(f, "{} free)", bytes(free)),
            None => write!(f, "free space unknown)"),
        }
    }
}

/// The folder itself or the nearest of its parents that exists (a cache or output folder a
/// first run has still to make).
fn existing_ancestor(folder: &Path) -> Option<PathBuf> {
    let absolute = std::path::absolute(folder).ok()?;
    absolute
        .ancestors()
        .find(|p| p.exists())
        .map(Path::to_path_buf)
}

fn device(path: &Path) -> Option<u64> {
    use std::os::unix::fs::MetadataExt;
    std::fs::metadata(path).ok().map(|m| m.dev())
}

/// Bytes an unprivileged writer may still use on the filesystem of `path` (`statvfs`).
fn free_bytes(path: &Path) -> Option<u64> {
    use std::os::unix::ffi::OsStrExt;
    let name = std::ffi::CString::new(path.as_os_str().as_bytes()).ok()?;
    let mut stat = std::mem::MaybeUninit::<libc::statvfs>::uninit();
    // SAFETY: `name` is a NUL-terminated path and `stat` is written by the call before it is
    // read, which happens only when the call succeeds.
    let done = unsafe { libc::statvfs(name.as_ptr(), stat.as_mut_ptr()) };
    if done != 0 {
        return None;
    }
    // SAFETY: statvfs returned 0, so it filled `stat`.
    let stat = unsafe { stat.assume_init() };
    #[allow(clippy::useless_conversion)] // the field widths differ between platforms
    Some(u64::from(stat.f_bavail).saturating_mul(u64::from(stat.f_frsize)))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn disk(holds: &[&'static str], certain: u64, at_most: u64, free: u64) -> Room {
        Room {
            disks: vec![Disk {
                folder: PathBuf::from("/data/study/.phasewise"),
                holds: holds.to_vec(),
                certain,
                at_most,
                free: Some(free),
                device: None,
            }],
        }
    }

    const GIB: u64 = 1 << 30;

    #[test]
    fn a_run_that_cannot_fit_is_refused_naming_the_folder_and_the_ways_out() {
        let err = disk(&["cache"], 41 * GIB, 50 * GIB, 30 * GIB)
            .check()
            .unwrap_err();
        assert_eq!(
            err.to_string(),
            "not enough disk space for this run: it writes at least 41.0 GiB to \
             /data/study/.phasewise (cache), whose filesystem has 30.0 GiB free. `phasewise \
             prune PIPELINE...` removes the cache objects that no manifest of those pipelines \
             uses; --cache DIR puts the cache on another disk. --skip-room-check runs it anyway"
        );
        let err = disk(&["output"], 2 * GIB, 2 * GIB, GIB)
            .check()
            .unwrap_err();
        assert!(err
            .to_string()
            .contains("The pipeline's `output:` can name a folder on another disk"));
        assert!(!err.to_string().contains("--cache DIR"));
    }

    #[test]
    fn a_run_that_may_not_fit_is_warned_about_and_one_that_fits_is_not() {
        let warning = disk(&["cache", "output"], 10 * GIB, 40 * GIB, 30 * GIB)
            .check()
            .unwrap()
            .unwrap();
        assert!(warning.starts_with(
            "this run may write up to 40.0 GiB to /data/study/.phasewise (cache and output), \
             whose filesystem has 30.0 GiB free: 10.0 GiB are certain"
        ));
        assert_eq!(
            disk(&["cache"], 10 * GIB, 30 * GIB, 30 * GIB)
                .check()
                .unwrap(),
            None
        );
        // Exactly full fits: the certain bytes are not more than the free ones.
        assert_eq!(
            disk(&["cache"], 30 * GIB, 30 * GIB, 30 * GIB)
                .check()
                .unwrap(),
            None
        );
    }

    #[test]
    fn free_space_is_what_statvfs_reports_for_the_nearest_existing_folder() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("not/yet/made");
        let found = existing_ancestor(&missing).unwrap();
        assert_eq!(found, std::path::absolute(dir.path()).unwrap());
        // `df` reads the same call; here: a real filesystem has some room and is not larger
        // than 2^60 bytes.
        let free = free_bytes(&found).unwrap();
        assert!(free > 0 && free < 1 << 60, "{free}");
        assert_eq!(device(&found), device(dir.path()));
    }
}
