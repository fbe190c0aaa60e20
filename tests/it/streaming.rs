//! A `cache: false` wavelet streaming into the clustering op part by part (src/parts.rs) must
//! give exactly the bits of running both whole: the demo pipeline on one demo subject, once as
//! written (the wavelet is `cache: false`, so it streams; parts forced small so that there are
//! several) and once with the wavelet cached (no streaming), compared byte for byte.
//!
//! The reference is the unstreamed run itself, whose ops are checked against numpy elsewhere
//! (stages/src/ops/wavelet.rs, clustering.rs); what is tested here is that streaming changes
//! nothing.

use std::path::{Path, PathBuf};
use std::process::Command;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Run the demo pipeline (with `tf.cache` as given) on subject 01 in `dir`; returns the
/// manifest part (a `--subject` run writes `manifest.parts/<subject>.json`).
fn run(dir: &Path, cache_tf: bool, part_bytes: &str) -> serde_json::Value {
    run_with(dir, cache_tf, part_bytes, "")
}

/// [`run`] with `extra` YAML appended to the pipeline's stages.
fn run_with(dir: &Path, cache_tf: bool, part_bytes: &str, extra: &str) -> serde_json::Value {
    let text = std::fs::read_to_string(repo().join("pipelines/demo.yaml")).unwrap();
    let demo = repo().join("demo-data");
    assert!(
        text.contains("cache: false"),
        "the demo pipeline has a cache: false stage"
    );
    let text = text
        .replace("../demo-data", demo.to_str().unwrap())
        .replace("output: ../results/demo", "output: results")
        .replace(
            "cache: false",
            if cache_tf {
                "cache: true"
            } else {
                "cache: false"
            },
        );
    let pipeline = dir.join("p.yaml");
    std::fs::write(&pipeline, text + extra).unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_phasewise"))
        .args(["run", pipeline.to_str().unwrap(), "--subject", "01", "-q"])
        .env("PHASEWISE_PART_BYTES", part_bytes)
        .current_dir(dir)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let manifest = std::fs::read_to_string(dir.join("results/manifest.parts/01.json")).unwrap();
    serde_json::from_str(&manifest).unwrap()
}

fn unit<'m>(manifest: &'m serde_json::Value, stage: &str) -> &'m serde_json::Value {
    manifest["units"]
        .as_array()
        .unwrap()
        .iter()
        .find(|u| u["stage"] == stage && u["subject"] == "01")
        .unwrap_or_else(|| panic!("no unit {stage}/01"))
}

#[test]
fn streamed_wavelet_gives_the_same_bits_as_whole_runs() {
    let (streamed, whole) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    // 1 MB parts: the demo's coefficients (≈ 40 MB per subject) go in many parts.
    let a = run(streamed.path(), false, "1000000");
    let b = run(whole.path(), true, "1000000");
    let tf = unit(&a, "tf");
    assert_eq!(tf["status"], "computed");
    assert_eq!(
        tf["outputs"][0]["blake3"], "",
        "a streamed unit is never whole, so it has no content hash"
    );
    assert_ne!(unit(&b, "tf")["outputs"][0]["blake3"], "");
    assert_eq!(
        tf["outputs"][0]["shape"],
        unit(&b, "tf")["outputs"][0]["shape"]
    );
    for stage in ["sync", "norm"] {
        assert_eq!(
            unit(&a, stage)["outputs"][0]["blake3"],
            unit(&b, stage)["outputs"][0]["blake3"],
            "{stage} differs between streamed and whole runs"
        );
    }
    let file = "results/01/norm.npy";
    let (x, y) = (
        std::fs::read(streamed.path().join(file)).unwrap(),
        std::fs::read(whole.path().join(file)).unwrap(),
    );
    assert!(
        x == y,
        "exported norm differs between streamed and whole runs"
    );
}

/// The runner hands the baseline op its input to overwrite (`Op::run_owned`) when the baseline is
/// the clustering output's last use in the chain. Reference: the same op on a borrowed input,
/// which it gets when a second consumer of the clustering output comes after it.
#[test]
fn baseline_over_its_input_gives_the_bits_of_baseline_beside_it() {
    let (alone, shared) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let a = run(alone.path(), false, "48000000");
    let second = "  again:\n    op: baseline\n    input: sync\n    params: { window: [-0.5, -0.2], mode: zscore }\n";
    let b = run_with(shared.path(), false, "48000000", second);
    assert_eq!(unit(&b, "again")["status"], "computed");
    assert_eq!(
        unit(&a, "norm")["outputs"][0]["blake3"],
        unit(&b, "norm")["outputs"][0]["blake3"]
    );
    let file = "results/01/norm.npy";
    let (x, y) = (
        std::fs::read(alone.path().join(file)).unwrap(),
        std::fs::read(shared.path().join(file)).unwrap(),
    );
    assert!(x == y, "exported norm differs between the two paths");
}

/// `verify` on a run whose wavelet was streamed: that unit has no content hash in either run,
/// so it must not be reported bit-identical (it was never compared); the stages it feeds are
/// compared as usual, and the study still counts as reproduced.
#[test]
fn verify_does_not_call_a_streamed_unit_bit_identical() {
    let dir = tempfile::tempdir().unwrap();
    let manifest = run(dir.path(), false, "1000000");
    assert_eq!(unit(&manifest, "tf")["outputs"][0]["blake3"], "");
    let out = Command::new(env!("CARGO_BIN_EXE_phasewise"))
        .args(["verify", "results/manifest.parts/01.json"])
        .env("PHASEWISE_PART_BYTES", "1000000")
        .current_dir(dir.path())
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let lines: Vec<&str> = text.lines().collect();
    assert!(
        lines.contains(
            &"tf (subject 01): not compared (streamed into its consumer, never whole, so not \
              hashed); checked through the outputs it feeds"
        ),
        "{text}"
    );
    assert!(!text.contains("tf (subject 01): bit-identical"), "{text}");
    for stage in ["sync", "norm"] {
        assert!(
            lines.contains(&format!("{stage} (subject 01): bit-identical").as_str()),
            "{text}"
        );
    }
    assert_eq!(
        lines.last().copied(),
        Some(
            "verified: every hashed output is bit-identical; 1 streamed output had no hash \
             and is checked through the outputs it feeds"
        ),
        "{text}"
    );
}
