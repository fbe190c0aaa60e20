//! Records the source revision for the manifest's `tool.revision` and for `--version`: one value,
//! `PHASEWISE_REVISION`, set to `git rev-parse HEAD`, with `-dirty` appended when a tracked file
//! that goes into the binary (the two crates' sources, their Cargo manifests, the lock file, this
//! script) differs from that commit. Outside a git checkout (a release tarball) the revision is
//! simply `unknown`; this script never fails the build.
//!
//! The script reruns when one of those files changes or git's HEAD, index or branch refs move, so
//! the flag follows edits and commits without a clean build.

use std::path::PathBuf;
use std::process::Command;

/// The tracked paths whose changes make a build `-dirty` (and rerun this script).
const SOURCES: &[&str] = &[
    "build.rs",
    "Cargo.toml",
    "Cargo.lock",
    "src",
    "stages/Cargo.toml",
    "stages/src",
];

/// `git ARGS` in the crate's folder: its trimmed stdout, or `None` when git fails or is absent.
fn git(args: &[&str]) -> Option<String> {
    let out = Command::new("git")
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .ok()
        .filter(|o| o.status.success())?;
    String::from_utf8(out.stdout)
        .ok()
        .map(|s| s.trim().to_string())
}

fn main() {
    for path in SOURCES {
        println!("cargo:rerun-if-changed={path}");
    }
    // For the test that checks the flag against git itself.
    println!(
        "cargo:rustc-env=PHASEWISE_REVISION_SOURCES={}",
        SOURCES.join(" ")
    );
    let Some(head) = git(&["rev-parse", "HEAD"]).filter(|s| !s.is_empty()) else {
        println!("cargo:rustc-env=PHASEWISE_REVISION=unknown");
        return;
    };
    // In a worktree `.git` is a file; ask git where HEAD, the index and the refs really are.
    for (flag, files) in [
        ("--git-dir", &["HEAD", "index"][..]),
        ("--git-common-dir", &["refs/heads", "packed-refs"][..]),
    ] {
        if let Some(dir) = git(&["rev-parse", "--path-format=absolute", flag]) {
            for file in files {
                println!(
                    "cargo:rerun-if-changed={}",
                    PathBuf::from(&dir).join(file).display()
                );
            }
        }
    }
    let mut status = vec!["status", "--porcelain", "--untracked-files=no", "--"];
    status.extend(SOURCES);
    let dirty = git(&status).is_some_and(|s| !s.is_empty());
    let suffix = if dirty { "-dirty" } else { "" };
    println!("cargo:rustc-env=PHASEWISE_REVISION={head}{suffix}");
}
