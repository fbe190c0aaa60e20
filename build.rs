//! Records the source revision (`git rev-parse HEAD`) for the manifest's `tool.revision`.
//! Outside a git checkout (a release tarball) the revision is simply `unknown`; this script never
//! fails the build.

use std::process::Command;

fn main() {
    let revision = Command::new("git")
        .args(["rev-parse", "HEAD"])
        .output()
        .ok()
        .filter(|o| o.status.success())
        .and_then(|o| String::from_utf8(o.stdout).ok())
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .unwrap_or_else(|| "unknown".to_string());
    println!("cargo:rustc-env=PHASEWISE_REVISION={revision}");
    // Rerun when HEAD moves (a commit or a checkout); missing files are fine for cargo.
    println!("cargo:rerun-if-changed=.git/HEAD");
    println!("cargo:rerun-if-changed=.git/refs/heads");
}
