//! Damaged caches (DESIGN §5: "Reads check the content hash: a damaged object is recomputed,
//! with a warning"): every kind of damage is detected, warned about on stderr and recomputed,
//! and the rerun's outputs and store equal those of an undamaged run.
//!
//! One pristine project is run once; each test copies it, damages its store, deletes the
//! exported outputs (so the rerun must read the store to write them again) and reruns. Two
//! scenarios per kind of damage:
//! - the object of the exported `group` unit only: the rerun must find it damaged when it
//!   reads it and recompute that one unit from its intact inputs;
//! - every object of the store: the rerun must recompute the whole chain, finding each input
//!   damaged in turn.

use crate::reliability;

use std::fs;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use reliability::{
    copy_tree, manifest, output_arrays, output_differences, run_cli, stderr_of, store_problems,
    tiny_project, StudySpec,
};

/// Words of the store's warning about a damaged object (one of them must appear).
const DAMAGE_WORDS: [&str; 3] = ["damaged", "corrupt", "unreadable"];

/// The pristine project, run once; shared by the tests of this file.
struct Pristine {
    _root: tempfile::TempDir,
    dir: PathBuf,
    outputs: Vec<(PathBuf, Vec<u8>)>,
    /// The exported JSON sidecars: an object's record gives their coordinates and labels.
    sidecars: Vec<(PathBuf, Vec<u8>)>,
    /// The key of the `group` unit.
    group_key: String,
}

fn pristine() -> &'static Pristine {
    static PRISTINE: OnceLock<Pristine> = OnceLock::new();
    PRISTINE.get_or_init(|| {
        let root = tempfile::tempdir().expect("tempdir");
        let dir = root.path().join("pristine");
        tiny_project(&dir, &StudySpec::default());
        reliability::assert_success(&run(&dir), "the undamaged run");
        let outputs = output_arrays(&dir.join("results"));
        assert!(!outputs.is_empty(), "the undamaged run exported nothing");
        let group_key = unit_key(&manifest(&dir.join("results")), "group");
        let sidecars = sidecars(&dir.join("results"));
        assert!(
            !sidecars.is_empty(),
            "the undamaged run exported no sidecar"
        );
        Pristine {
            _root: root,
            dir,
            outputs,
            sidecars,
            group_key,
        }
    })
}

fn run(dir: &Path) -> std::process::Output {
    run_cli(dir, &["run", "pipeline.yaml", "--cache", "cache"])
}

/// The exported JSON files of a run (sidecars, column dictionaries) with their bytes: all but
/// the manifest, which holds timings and paths.
fn sidecars(output: &Path) -> Vec<(PathBuf, Vec<u8>)> {
    reliability::files_under(output)
        .into_iter()
        .filter(|p| p.extension().and_then(|e| e.to_str()) == Some("json"))
        .filter(|p| !p.starts_with("manifest.json") && !p.starts_with("manifest.parts"))
        .filter(|p| {
            !p.file_name().is_some_and(|n| {
                n.to_string_lossy()
                    .starts_with(phasewise::fsio::TEMP_PREFIX)
            })
        })
        .map(|p| {
            let bytes = fs::read(output.join(&p)).expect("read sidecar");
            (p, bytes)
        })
        .collect()
}

/// The key of the (first) unit of `stage` in a manifest.
fn unit_key(manifest: &serde_json::Value, stage: &str) -> String {
    manifest["units"]
        .as_array()
        .and_then(|units| units.iter().find(|u| u["stage"] == stage))
        .and_then(|u| u["key"].as_str())
        .unwrap_or_else(|| panic!("no unit of stage {stage} in the manifest"))
        .to_string()
}

/// `<cache>/objects/<first two hex>/<key>.<ext>` (DESIGN §5).
fn object_path(cache: &Path, key: &str, ext: &str) -> PathBuf {
    cache
        .join("objects")
        .join(key.get(..2).unwrap_or(key))
        .join(format!("{key}.{ext}"))
}

/// The keys of every object in a store.
fn all_keys(cache: &Path) -> Vec<String> {
    reliability::cache_objects(cache)
        .iter()
        .filter_map(|p| p.file_stem().and_then(|s| s.to_str()).map(str::to_string))
        .collect()
}

/// One kind of damage, done to the object `key` of the store `cache`.
type Damage = fn(cache: &Path, key: &str);

/// Copy the pristine project, damage the objects that `which` picks, rerun and check.
fn check(damage: Damage, what: &str) {
    let p = pristine();
    for everything in [false, true] {
        let work = tempfile::tempdir().expect("tempdir");
        let dir = work.path().join("project");
        copy_tree(&p.dir, &dir);
        fs::remove_dir_all(dir.join("results")).expect("remove outputs");
        let cache = dir.join("cache");
        let keys = if everything {
            all_keys(&cache)
        } else {
            vec![p.group_key.clone()]
        };
        for key in &keys {
            damage(&cache, key);
        }
        let scenario = if everything {
            "every object"
        } else {
            "the group object"
        };
        let out = run(&dir);
        let err = stderr_of(&out);
        let context = format!("{what}, {scenario}: stderr:\n{err}");
        assert!(
            out.status.success(),
            "rerun failed ({:?}); {context}",
            out.status.code()
        );
        assert!(!reliability::has_panic_text(&err), "panic text; {context}");
        assert!(
            err.lines()
                .any(|l| l.contains("group") && DAMAGE_WORDS.iter().any(|w| l.contains(w))),
            "no warning naming the damaged group unit ({DAMAGE_WORDS:?}); {context}"
        );
        let m = manifest(&dir.join("results"));
        let group = m["units"]
            .as_array()
            .and_then(|u| u.iter().find(|u| u["key"] == p.group_key.as_str()))
            .expect("group unit in manifest");
        assert_eq!(
            group["status"], "computed",
            "group was not recomputed; {context}"
        );
        let diff = output_differences(&output_arrays(&dir.join("results")), &p.outputs);
        assert!(diff.is_empty(), "outputs differ: {diff:?}; {context}");
        let diff = output_differences(&sidecars(&dir.join("results")), &p.sidecars);
        assert!(diff.is_empty(), "sidecars differ: {diff:?}; {context}");
        // After the rerun the damaged objects are whole again: byte-equal to the pristine
        // store's (equal keys give equal bytes, DESIGN §5), except objects that nothing read.
        let left: Vec<String> = store_problems(&cache, &[&p.dir.join("cache")], false)
            .into_iter()
            .filter(|problem| !everything || keys_read(&m).iter().any(|k| problem.contains(k)))
            .collect();
        assert!(left.is_empty(), "store still damaged: {left:?}; {context}");
    }
}

/// Keys of the units the manifest says were computed (they read their inputs).
fn keys_read(manifest: &serde_json::Value) -> Vec<String> {
    manifest["units"]
        .as_array()
        .into_iter()
        .flatten()
        .filter(|u| u["status"] == "computed")
        .flat_map(|u| {
            let own = u["key"].as_str().map(str::to_string);
            let inputs = u["inputs"]
                .as_array()
                .into_iter()
                .flatten()
                .filter_map(|k| k.as_str().map(str::to_string))
                .collect::<Vec<_>>();
            own.into_iter().chain(inputs)
        })
        .collect()
}

fn truncate_npy(cache: &Path, key: &str) {
    let path = object_path(cache, key, "npy");
    let bytes = fs::read(&path).expect("read object");
    fs::write(&path, &bytes[..bytes.len() / 2]).expect("truncate");
}

fn flip_data_byte(cache: &Path, key: &str) {
    let path = object_path(cache, key, "npy");
    let mut bytes = fs::read(&path).expect("read object");
    // The last byte is data, never the NPY header (NEP 1 / numpy format: header first).
    if let Some(last) = bytes.last_mut() {
        *last ^= 0x01;
    }
    fs::write(&path, bytes).expect("flip");
}

fn flip_header_byte(cache: &Path, key: &str) {
    let path = object_path(cache, key, "npy");
    let mut bytes = fs::read(&path).expect("read object");
    // Byte 6 is the NPY major version (numpy format spec): 1 → 0 is no valid NPY.
    if let Some(b) = bytes.get_mut(6) {
        *b ^= 0x01;
    }
    fs::write(&path, bytes).expect("flip");
}

fn delete_sidecar(cache: &Path, key: &str) {
    fs::remove_file(object_path(cache, key, "json")).expect("delete sidecar");
}

fn garble_sidecar(cache: &Path, key: &str) {
    fs::write(object_path(cache, key, "json"), "{\"dims\": [\"chan").expect("garble sidecar");
}

fn delete_npy(cache: &Path, key: &str) {
    fs::remove_file(object_path(cache, key, "npy")).expect("delete object");
}

/// A foreign, well-formed NPY file in the object's place: the store's own NPY of another key,
/// or (for the group object, the smallest) a numpy-format file of other values.
fn foreign_npy(cache: &Path, key: &str) {
    let others: Vec<String> = all_keys(cache).into_iter().filter(|k| k != key).collect();
    let source = others.first().expect("another object");
    fs::copy(
        object_path(cache, source, "npy"),
        object_path(cache, key, "npy"),
    )
    .expect("copy foreign object");
}

/// Another object's NPY *and* sidecar in this object's place: a consistent pair of the wrong
/// key, which only a sidecar that records its key can expose.
fn foreign_pair(cache: &Path, key: &str) {
    foreign_npy(cache, key);
    let source = all_keys(cache)
        .into_iter()
        .find(|k| k != key)
        .expect("another object");
    fs::copy(
        object_path(cache, &source, "json"),
        object_path(cache, key, "json"),
    )
    .expect("copy foreign sidecar");
}

/// The text of `key`'s record and the span of its layout's coordinates in it.
fn record_coords(cache: &Path, key: &str) -> (PathBuf, String, std::ops::Range<usize>) {
    let path = object_path(cache, key, "json");
    let text = fs::read_to_string(&path).expect("read record");
    let start = text.find("\"coords\"").expect("a record's coords");
    let end = start + text[start..].find("\"units\"").expect("a record's units");
    (path, text, start..end)
}

/// The condition labels of a record swapped (`A` and `B`, the tiny pipeline's conditions):
/// a record that still parses and names the same values, in the other order. Records without
/// both labels are left alone.
fn swap_condition_labels(cache: &Path, key: &str) {
    let (path, mut text, coords) = record_coords(cache, key);
    let Some(a) = text[coords.clone()].find("\"A\"").map(|i| coords.start + i) else {
        return;
    };
    let Some(b) = text[a..coords.end].find("\"B\"").map(|i| a + i) else {
        return;
    };
    text.replace_range(b..b + 3, "\"A\"");
    text.replace_range(a..a + 3, "\"B\"");
    fs::write(path, text).expect("swap labels");
}

#[test]
fn swapped_condition_labels_in_a_record_are_recomputed() {
    check(
        swap_condition_labels,
        "condition labels swapped in the record",
    );
}

/// A rerun of the tiny project with `norm`'s window changed, in `dir`.
fn run_with_new_window(dir: &Path) -> std::process::Output {
    run_cli(
        dir,
        &[
            "run",
            "pipeline.yaml",
            "--cache",
            "cache",
            "--set",
            "norm.window=[-0.45,-0.1]",
        ],
    )
}

/// One bit flipped in a number of a record's coordinates: `sync`'s first frequency, 4.0 (the
/// tiny pipeline's `freqs.from`), becomes 0.0 (`'4' ^ 0x04 == '0'`), which leaves the group's
/// theta band [4, 8]. A rerun that has to read `sync` (its consumer's params changed) must find
/// the record damaged, recompute `sync`, and export what a run on an undamaged store exports.
#[test]
fn a_flipped_coordinate_bit_in_a_record_is_recomputed() {
    let p = pristine();
    let work = tempfile::tempdir().expect("tempdir");
    let clean = work.path().join("clean");
    copy_tree(&p.dir, &clean);
    reliability::assert_success(&run_with_new_window(&clean), "the clean rerun");
    let dir = work.path().join("project");
    copy_tree(&p.dir, &dir);
    let cache = dir.join("cache");
    let m = manifest(&dir.join("results"));
    let sync_key = unit_key(&m, "sync");
    let (path, mut text, coords) = record_coords(&cache, &sync_key);
    let at = coords.start
        + text[coords]
            .find(" 4.0,")
            .expect("sync's frequencies start at 4.0")
        + 1;
    assert_eq!(text.as_bytes()[at] ^ 0x04, b'0');
    text.replace_range(at..at + 1, "0");
    fs::write(&path, text).expect("flip a bit");
    let out = run_with_new_window(&dir);
    reliability::assert_success(&out, "the rerun on a damaged record");
    let err = stderr_of(&out);
    assert!(
        err.lines()
            .any(|l| l.contains("sync") && l.contains("damaged") && l.contains(&sync_key)),
        "no warning naming sync and its record; stderr:\n{err}"
    );
    let m = manifest(&dir.join("results"));
    let sync = m["units"]
        .as_array()
        .and_then(|u| u.iter().find(|u| u["key"] == sync_key.as_str()))
        .expect("sync in the manifest");
    assert_eq!(sync["status"], "computed", "sync was not recomputed");
    let diff = output_differences(
        &output_arrays(&dir.join("results")),
        &output_arrays(&clean.join("results")),
    );
    assert!(
        diff.is_empty(),
        "outputs differ from the clean run's: {diff:?}"
    );
    let diff = output_differences(
        &sidecars(&dir.join("results")),
        &sidecars(&clean.join("results")),
    );
    assert!(
        diff.is_empty(),
        "sidecars differ from the clean run's: {diff:?}"
    );
    let left = store_problems(&cache, &[&clean.join("cache")], false);
    assert!(
        left.is_empty(),
        "store differs from the clean run's: {left:?}"
    );
}

/// Every record rewritten as the previous record format (version 2) wrote it: the same fields
/// without the seal. Such records are not trusted: every unit is recomputed once, to outputs
/// equal to the undamaged run's, and a second run finds everything cached.
#[test]
fn records_of_the_previous_format_are_recomputed_once() {
    let p = pristine();
    let work = tempfile::tempdir().expect("tempdir");
    let dir = work.path().join("project");
    copy_tree(&p.dir, &dir);
    fs::remove_dir_all(dir.join("results")).expect("remove outputs");
    let cache = dir.join("cache");
    // Every record, those of units streamed into their consumer (no NPY) included.
    let records: Vec<PathBuf> = reliability::files_under(&cache.join("objects"))
        .into_iter()
        .filter(|p| p.extension().and_then(|e| e.to_str()) == Some("json"))
        .map(|p| cache.join("objects").join(p))
        .collect();
    assert!(!records.is_empty(), "no records in the store");
    for path in &records {
        let text = fs::read_to_string(path).expect("read record");
        let seal = text
            .rfind(",\n  \"record_blake3\": ")
            .expect("a sealed record");
        let old = format!("{}\n}}", &text[..seal]).replacen(
            "\"format_version\": 3,",
            "\"format_version\": 2,",
            1,
        );
        assert!(old.contains("\"format_version\": 2,"), "{}", path.display());
        fs::write(path, old).expect("write an old record");
    }
    let out = run(&dir);
    reliability::assert_success(&out, "the run on records of the previous format");
    let statuses = reliability::unit_statuses(&manifest(&dir.join("results")));
    assert!(
        statuses.iter().all(|(_, _, status)| status == "computed"),
        "units not recomputed: {statuses:?}"
    );
    let diff = output_differences(&output_arrays(&dir.join("results")), &p.outputs);
    assert!(diff.is_empty(), "outputs differ: {diff:?}");
    let diff = output_differences(&sidecars(&dir.join("results")), &p.sidecars);
    assert!(diff.is_empty(), "sidecars differ: {diff:?}");
    let left = store_problems(&cache, &[&p.dir.join("cache")], false);
    assert!(left.is_empty(), "store differs: {left:?}");
    let again = run(&dir);
    reliability::assert_success(&again, "the run after");
    let statuses = reliability::unit_statuses(&manifest(&dir.join("results")));
    assert!(
        statuses.iter().all(|(_, _, status)| status == "cached"),
        "units not cached the second time: {statuses:?}"
    );
}

#[test]
fn truncated_npy_is_recomputed() {
    check(truncate_npy, "truncated NPY");
}

#[test]
fn flipped_data_byte_is_recomputed() {
    check(flip_data_byte, "flipped data byte");
}

#[test]
fn flipped_header_byte_is_recomputed() {
    check(flip_header_byte, "flipped NPY header byte");
}

#[test]
fn missing_sidecar_is_recomputed() {
    check(delete_sidecar, "missing sidecar");
}

#[test]
fn unparsable_sidecar_is_recomputed() {
    check(garble_sidecar, "unparsable sidecar");
}

#[test]
fn foreign_npy_is_recomputed() {
    check(foreign_npy, "foreign NPY in the object's place");
}

#[test]
fn foreign_object_pair_is_recomputed() {
    check(
        foreign_pair,
        "foreign NPY and sidecar in the object's place",
    );
}

/// A missing object is not damage the reader can see, only absence: the rerun recomputes it
/// (it is "not cached" in plan terms) without a damage warning.
#[test]
fn missing_object_is_recomputed() {
    let p = pristine();
    let work = tempfile::tempdir().expect("tempdir");
    let dir = work.path().join("project");
    copy_tree(&p.dir, &dir);
    fs::remove_dir_all(dir.join("results")).expect("remove outputs");
    delete_npy(&dir.join("cache"), &p.group_key);
    let out = run(&dir);
    reliability::assert_success(&out, "rerun after a deleted object");
    let m = manifest(&dir.join("results"));
    let statuses = reliability::unit_statuses(&m);
    assert!(
        statuses
            .iter()
            .any(|(s, _, st)| s == "group" && st == "computed"),
        "group not recomputed: {statuses:?}"
    );
    let diff = output_differences(&output_arrays(&dir.join("results")), &p.outputs);
    assert!(diff.is_empty(), "outputs differ: {diff:?}");
    let left = store_problems(&dir.join("cache"), &[&p.dir.join("cache")], false);
    assert!(left.is_empty(), "store differs: {left:?}");
}

/// Files that are no objects (a stray note, an editor's backup, a half-written temporary file
/// of a killed run, a file of garbage under a key-like name in another shard) must neither
/// break a run nor be trusted; the run's outputs stay those of the undamaged run.
#[test]
fn foreign_files_in_the_store_are_ignored() {
    let p = pristine();
    let work = tempfile::tempdir().expect("tempdir");
    let dir = work.path().join("project");
    copy_tree(&p.dir, &dir);
    fs::remove_dir_all(dir.join("results")).expect("remove outputs");
    let objects = dir.join("cache/objects");
    let shard = objects.join(p.group_key.get(..2).unwrap_or("00"));
    fs::write(objects.join("README.txt"), "not an object").expect("stray file");
    fs::write(shard.join(format!("{}.npy~", p.group_key)), "backup").expect("backup file");
    fs::write(shard.join(format!(".{}.npy.tmp", p.group_key)), [0u8; 10]).expect("temp file");
    fs::create_dir_all(objects.join("zz")).expect("shard");
    fs::write(objects.join("zz").join("zz00.npy"), [0xFFu8; 64]).expect("garbage object");
    let out = run(&dir);
    reliability::assert_success(&out, "run with foreign files in the store");
    let diff = output_differences(&output_arrays(&dir.join("results")), &p.outputs);
    assert!(diff.is_empty(), "outputs differ: {diff:?}");
}
