//! Coverage-guided fuzzing with AFL++ (through the `afl` crate and `cargo afl`, on stable Rust).
//!
//! `phasewise-fuzz seeds <target> DIR` writes the target's seed corpus as files for `afl-fuzz -i`;
//! `phasewise-fuzz afl <target>` is the program `afl-fuzz` runs: it prepares the target's scratch
//! folder once (the good recording or study the target reads beside the fuzzed bytes) and then
//! feeds each input AFL++ chooses to the same target function the seeded fuzzer uses, in
//! persistent mode. Built without the `afl` feature it says how to build it. See README.md.

use std::fs;
use std::path::Path;
#[cfg(feature = "afl")]
use std::sync::atomic::{AtomicU64, Ordering};

use crate::targets::Target;

/// Writes `target`'s seeds as `DIR/seed-<n>` (the folder is created); returns how many.
pub fn write_seeds(target: &Target, dir: &Path) -> std::io::Result<usize> {
    let scratch = tempfile::tempdir()?;
    let seeds = (target.seeds)(scratch.path());
    fs::create_dir_all(dir)?;
    for (i, seed) in seeds.iter().enumerate() {
        fs::write(dir.join(format!("seed-{i:03}")), seed)?;
    }
    Ok(seeds.len())
}

/// Runs `target` under `afl-fuzz` (never returns while AFL++ drives it).
#[cfg(feature = "afl")]
pub fn run(target: &Target) {
    static EXEC: AtomicU64 = AtomicU64::new(0);
    let scratch = tempfile::tempdir().expect("a temporary folder");
    // The seeds function also lays out what the target reads beside its input.
    let _ = (target.seeds)(scratch.path());
    let dir = scratch.path().to_path_buf();
    let feed = target.run;
    afl::fuzz(true, move |data: &[u8]| {
        let exec = EXEC.fetch_add(1, Ordering::Relaxed);
        feed(&dir, data, exec);
    });
}

/// Without the `afl` feature there is no AFL++ runtime to link against.
#[cfg(not(feature = "afl"))]
pub fn run(_target: &Target) {
    eprintln!(
        "this build has no AFL++ runtime: build it with `cargo afl build --release --features afl` \
         (see fuzz/README.md)"
    );
    std::process::exit(2);
}
