//! A unit computed box by box from its stored input (src/slabs.rs) must give exactly what
//! computing it whole gives: the same output bytes, records, exports, group results and
//! warnings. The reference is the demo pipeline with its wavelet stored, so that nothing
//! streams: the clustering output is joined in memory and the baseline computed whole from it.
//! As written (wavelet `cache: false`), the clustering output streams through a spool into the
//! cache and the baseline reads it in slabs, both in a cold run and when only the baseline's
//! window changes; each is compared with the reference byte for byte.
//!
//! The reference is the whole computation itself, whose ops are checked against numpy elsewhere
//! (stages/src/ops/baseline.rs, aggregate.rs); what is tested here is that slabs change nothing.

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Boxes of 64 kB: each demo subject's clustering output (≈ 1 MB per measure) goes in many.
const SMALL_BOXES: &str = "64000";

/// The demo's re-reference.
const AVERAGE: &str = "params: { method: average }";

/// Run the demo pipeline in `dir` with the baseline `norm` and re-reference as given; returns the
/// manifest (whose recipes say which units ran in slabs) and the runner's log.
fn run(dir: &Path, norm: &str, reference: &str) -> (Value, String) {
    run_with(dir, norm, reference, false)
}

/// [`run`], with the wavelet stored (`cache: true`) when `whole`: nothing streams then, so the
/// clustering output is joined in memory and the baseline computed whole from it.
fn run_with(dir: &Path, norm: &str, reference: &str, whole: bool) -> (Value, String) {
    let text = std::fs::read_to_string(repo().join("pipelines/demo.yaml")).unwrap();
    let demo = repo().join("demo-data");
    let old = "params: { window: [-0.5, -0.2], mode: subtract }";
    let average = "params: { method: average }";
    assert!(
        text.contains(old) && text.contains(average),
        "the demo is as this test expects"
    );
    // `percent` and `db` divide by the baseline mean and refuse measures that can be negative
    // (ppc, dwpli, icoh): with them the demo measures only the non-negative ones.
    let measures = "measure: [plv, ppc, pli, wpli, dwpli, icoh]";
    assert!(text.contains(measures), "the demo is as this test expects");
    let divides = norm.contains("mode: percent") || norm.contains("mode: db");
    let text = text
        .replace(
            measures,
            if divides {
                "measure: [plv, pli, wpli]"
            } else {
                measures
            },
        )
        .replace("../demo-data", demo.to_str().unwrap())
        .replace("output: ../results/demo", "output: results")
        .replace(old, norm)
        .replace(average, reference)
        .replace(
            "cache: false",
            if whole { "cache: true" } else { "cache: false" },
        );
    let pipeline = dir.join("p.yaml");
    std::fs::write(&pipeline, text).unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_phasewise"))
        .args(["run", pipeline.to_str().unwrap(), "-q"])
        .env("PHASEWISE_SLAB_BYTES", SMALL_BOXES)
        .current_dir(dir)
        .output()
        .unwrap();
    let log = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(out.status.success(), "{log}");
    let manifest = std::fs::read_to_string(dir.join("results/manifest.json")).unwrap();
    (serde_json::from_str(&manifest).unwrap(), log)
}

fn units<'m>(manifest: &'m Value, stage: &str) -> Vec<&'m Value> {
    let all = manifest["units"].as_array().unwrap();
    let found: Vec<&Value> = all.iter().filter(|u| u["stage"] == stage).collect();
    assert!(!found.is_empty(), "no {stage} units");
    found
}

fn hashes(manifest: &Value, stage: &str) -> Vec<Value> {
    let found = units(manifest, stage);
    found
        .iter()
        .map(|u| u["outputs"][0]["blake3"].clone())
        .collect()
}

fn statuses(manifest: &Value, stage: &str) -> Vec<String> {
    let found = units(manifest, stage);
    found
        .iter()
        .map(|u| u["status"].as_str().unwrap().to_string())
        .collect()
}

/// Every exported file (NPY, sidecar, table), by path under `results/`.
fn exports(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut files = Vec::new();
    let root = dir.join("results");
    let mut stack = vec![root.clone()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap().flatten() {
            let path = e.path();
            let name = path
                .strip_prefix(&root)
                .unwrap()
                .to_string_lossy()
                .into_owned();
            if path.is_dir() {
                stack.push(path);
            } else if !name.starts_with("manifest") && !name.starts_with("report") {
                files.push((name, std::fs::read(&path).unwrap()));
            }
        }
    }
    files.sort();
    files
}

/// How many units of `stage` the manifest says ran with a recipe `run`, and how many of those
/// fell back to a whole computation.
fn ran(manifest: &Value, stage: &str, run: &str) -> usize {
    units(manifest, stage)
        .iter()
        .filter(|u| u["recipe"]["run"] == run)
        .count()
}

fn fell_back(manifest: &Value, stage: &str) -> usize {
    units(manifest, stage)
        .iter()
        .filter(|u| u["recipe"]["fallback"].is_string())
        .count()
}

/// Every baseline unit computed in both runs; the clustering, baseline and group outputs with
/// the same hashes; every export byte for byte equal.
fn assert_same_results((whole, cold): (&Value, &Path), (other, warm): (&Value, &Path)) {
    assert_eq!(statuses(other, "norm"), statuses(whole, "norm"));
    assert!(statuses(other, "norm").iter().all(|s| s == "computed"));
    for stage in ["sync", "norm", "group"] {
        assert_eq!(
            hashes(whole, stage),
            hashes(other, stage),
            "{stage} differs between whole and slabs"
        );
    }
    let (a, b) = (exports(cold), exports(warm));
    assert_eq!(
        a.iter().map(|(n, _)| n).collect::<Vec<_>>(),
        b.iter().map(|(n, _)| n).collect::<Vec<_>>()
    );
    for ((name, x), (_, y)) in a.iter().zip(&b) {
        assert!(x == y, "exported {name} differs between whole and slabs");
    }
}

/// A cold [`run`] in which every subject's clustering output was spooled to the cache, never
/// whole in memory.
fn spooled_run(dir: &Path, norm: &str, reference: &str) -> (Value, String) {
    let (manifest, log) = run(dir, norm, reference);
    let sync = units(&manifest, "sync");
    assert!(
        sync.iter()
            .all(|u| u["recipe"]["run"] == "parts" && u["recipe"]["spooled"] == true),
        "{sync:#?}"
    );
    (manifest, log)
}

/// Cold run with `norm` in one folder; in another, a cold run with `before` and then a rerun
/// with `norm`. Returns both final manifests and logs; the exports must be equal.
fn cold_and_changed(
    norm: &str,
    before: &str,
    reference: &str,
    damage: bool,
) -> [(Value, String); 2] {
    let (cold, warm) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let whole = run_with(cold.path(), norm, reference, true);
    let (first, _) = spooled_run(warm.path(), before, reference);
    if damage {
        // Flip one byte in the middle of subject 01's stored clustering output.
        let sync = units(&first, "sync")[0]["key"]
            .as_str()
            .unwrap()
            .to_string();
        let npy = warm
            .path()
            .join(".phasewise/objects")
            .join(&sync[..2])
            .join(format!("{sync}.npy"));
        let mut bytes = std::fs::read(&npy).unwrap();
        let middle = bytes.len() / 2;
        bytes[middle] ^= 0x40;
        std::fs::write(&npy, bytes).unwrap();
    }
    let changed = run(warm.path(), norm, reference);
    assert_eq!(hashes(&whole.0, "sync"), hashes(&first, "sync"));
    assert_same_results((&whole.0, cold.path()), (&changed.0, warm.path()));
    [whole, changed]
}

#[test]
fn a_cold_run_spooled_and_in_slabs_gives_the_bits_of_a_whole_run() {
    let norm = "params: { window: [-0.45, -0.2], mode: percent }";
    let (cold, streamed) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let whole = run_with(cold.path(), norm, AVERAGE, true);
    let (other, _) = spooled_run(streamed.path(), norm, AVERAGE);
    let subjects = units(&other, "norm").len();
    assert_eq!(ran(&other, "norm", "slabs"), subjects);
    assert_eq!(fell_back(&other, "norm"), 0);
    assert_same_results((&whole.0, cold.path()), (&other, streamed.path()));
    assert_eq!(whole.0["warnings"], other["warnings"]);
}

#[test]
fn a_baseline_change_computed_in_slabs_gives_the_bits_of_a_whole_run() {
    let norm = "params: { window: [-0.45, -0.2], mode: zscore }";
    let before = "params: { window: [-0.5, -0.2], mode: zscore }";
    let [(whole, _), (changed, _)] = cold_and_changed(norm, before, AVERAGE, false);
    let subjects = units(&changed, "norm").len();
    // The reference had the clustering output in memory; the rerun read it from the cache in
    // slabs, every subject.
    assert_eq!(ran(&whole, "norm", "whole"), subjects);
    assert_eq!(ran(&whole, "sync", "whole"), subjects);
    assert_eq!(ran(&changed, "norm", "slabs"), subjects);
    assert_eq!(fell_back(&changed, "norm"), 0);
    assert_eq!(whole["warnings"], changed["warnings"]);
}

#[test]
fn a_damaged_input_met_in_slabs_is_recomputed_once_with_one_warning() {
    let norm = "params: { window: [-0.45, -0.2], mode: subtract }";
    let before = "params: { window: [-0.5, -0.2], mode: subtract }";
    let [(_, _), (changed, _)] = cold_and_changed(norm, before, AVERAGE, true);
    // Subject 01 gave up in slabs (the hash failed at the end) and ran whole, which found the
    // damage, warned and recomputed the clustering output; the others ran in slabs.
    let subjects = units(&changed, "norm").len();
    assert_eq!(ran(&changed, "norm", "slabs"), subjects - 1);
    assert_eq!(ran(&changed, "norm", "whole"), 1);
    assert_eq!(fell_back(&changed, "norm"), 1);
    let warnings: Vec<&Value> = changed["warnings"].as_array().unwrap().iter().collect();
    let damaged: Vec<&&Value> = warnings
        .iter()
        .filter(|w| w.to_string().contains("damaged"))
        .collect();
    assert_eq!(damaged.len(), 1, "{warnings:?}");
    assert_eq!(damaged[0]["stage"], "sync");
    assert_eq!(damaged[0]["subject"], "01");
    let sync = statuses(&changed, "sync");
    assert_eq!(
        sync.iter().filter(|s| *s == "computed").count(),
        1,
        "{sync:?}"
    );
}

#[test]
fn a_baseline_that_warns_is_computed_whole_with_the_same_warnings() {
    // Referenced to Cz alone, Cz is zero: its pairs have no phase, so the clustering output is
    // NaN there and the baseline warns about NaN time courses. A box's warning would count only
    // its own time courses, so the runner computes the unit whole instead.
    let reference = "params: { method: channels, channels: [Cz] }";
    let norm = "params: { window: [-0.45, -0.2], mode: subtract }";
    let before = "params: { window: [-0.5, -0.2], mode: subtract }";
    let [(whole, _), (changed, _)] = cold_and_changed(norm, before, reference, false);
    let subjects = units(&changed, "norm").len();
    assert_eq!(ran(&changed, "norm", "whole"), subjects);
    assert_eq!(fell_back(&changed, "norm"), subjects);
    assert_eq!(whole["warnings"], changed["warnings"]);
    let norm_warnings: Vec<&Value> = changed["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|w| w["stage"] == "norm")
        .collect();
    assert_eq!(norm_warnings.len(), subjects, "{norm_warnings:?}");
    assert!(
        norm_warnings[0].to_string().contains("NaN values"),
        "{norm_warnings:?}"
    );
}
