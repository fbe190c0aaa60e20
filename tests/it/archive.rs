//! `phasewise archive` and `verify --data` (DESIGN §6, issue 23), through the real binary on the
//! tiny study: the bundle holds what its RO-Crate lists, with matching sha256 (FIPS 180-4, the
//! `sha2` crate) and blake3; a second archive into a non-empty folder and the manifest of a
//! subject selection are refused without writing anything; and an archive copied elsewhere
//! verifies against recordings copied elsewhere, and names the one recording changed after.
//! The outside validators (BIDS, RO-Crate) run on the demo's bundle in
//! tests/reference/check_archive.sh.

use std::fs;
use std::path::Path;

use sha2::Digest;

use crate::reliability::{
    assert_success, copy_tree, files_under, recording_path, run_cli, stderr_of, tiny_project,
    StudySpec,
};

/// The tiny project with the per-subject `norm` stage exported too, run once; returns its folder.
fn archived_project() -> tempfile::TempDir {
    let dir = tempfile::tempdir().expect("tempdir");
    let pipeline = tiny_project(dir.path(), &StudySpec::default());
    let text = fs::read_to_string(&pipeline).expect("pipeline");
    let text = text.replace(
        "    params: { window: [-0.5, -0.2], mode: subtract }\n",
        "    params: { window: [-0.5, -0.2], mode: subtract }\n    export: true\n",
    );
    assert!(text.contains("export: true\n  group:"), "norm not exported");
    fs::write(&pipeline, text).expect("write pipeline");
    assert_success(&run_cli(dir.path(), &["run", "pipeline.yaml"]), "run");
    dir
}

fn archive(cwd: &Path, manifest: &str, out: &str) -> std::process::Output {
    run_cli(cwd, &["archive", manifest, "--out", out])
}

/// `archive results/manifest.json --out bundle` in `dir`, which must succeed.
fn archive_to_bundle(dir: &Path) {
    assert_success(&archive(dir, "results/manifest.json", "bundle"), "archive");
}

/// Every file below `root` with its bytes.
fn tree(root: &Path) -> Vec<(std::path::PathBuf, Vec<u8>)> {
    files_under(root)
        .into_iter()
        .map(|rel| {
            let bytes = fs::read(root.join(&rel)).expect("read");
            (rel, bytes)
        })
        .collect()
}

#[test]
fn the_bundle_holds_every_file_its_crate_lists_with_matching_hashes() {
    let p = archived_project();
    archive_to_bundle(p.path());
    let bundle = p.path().join("bundle");
    let crate_doc: serde_json::Value =
        serde_json::from_slice(&fs::read(bundle.join("ro-crate-metadata.json")).unwrap()).unwrap();
    let graph = crate_doc["@graph"].as_array().expect("@graph");
    let files: Vec<&serde_json::Value> = graph.iter().filter(|e| e["@type"] == "File").collect();
    let on_disk: Vec<String> = files_under(&bundle)
        .into_iter()
        .map(|p| p.to_string_lossy().into_owned())
        .filter(|p| p != "ro-crate-metadata.json")
        .collect();
    let mut listed: Vec<String> = files
        .iter()
        .map(|e| e["@id"].as_str().unwrap().to_string())
        .collect();
    listed.sort();
    assert_eq!(
        listed, on_disk,
        "the crate lists exactly the bundle's files"
    );
    for entity in &files {
        let rel = entity["@id"].as_str().unwrap();
        let bytes = fs::read(bundle.join(rel)).unwrap();
        let sha256: String = sha2::Sha256::digest(&bytes)
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect();
        assert_eq!(entity["sha256"], sha256.as_str(), "{rel}: sha256");
        assert_eq!(
            entity["identifier"],
            format!("blake3:{}", blake3::hash(&bytes).to_hex()).as_str(),
            "{rel}: blake3"
        );
        assert_eq!(entity["contentSize"], bytes.len().to_string().as_str());
    }
    // The root dataset names every file as a part.
    let root = graph.iter().find(|e| e["@id"] == "./").expect("root");
    assert_eq!(root["hasPart"].as_array().unwrap().len(), listed.len());
    // The exports under their BIDS names, byte for byte; the pipeline under code/.
    for (from, to) in [
        (
            "results/01/norm.npy",
            "sub-01/eeg/sub-01_task-cue_desc-norm_conn.npy",
        ),
        (
            "results/02/norm.npy",
            "sub-02/eeg/sub-02_task-cue_desc-norm_conn.npy",
        ),
        (
            "results/group/group.npy",
            "group/task-cue_desc-group_conn.npy",
        ),
        ("pipeline.yaml", "code/pipeline.yaml"),
    ] {
        assert_eq!(
            fs::read(p.path().join(from)).unwrap(),
            fs::read(bundle.join(to)).unwrap(),
            "{to} is not {from}"
        );
    }
    let description: serde_json::Value =
        serde_json::from_slice(&fs::read(bundle.join("dataset_description.json")).unwrap())
            .unwrap();
    assert_eq!(description["DatasetType"], "derivative");
    assert_eq!(description["GeneratedBy"][0]["Name"], "phasewise");
    assert!(description.get("Authors").is_none(), "no author given");
    // No temporary folder is left beside the bundle.
    let leftovers: Vec<_> = fs::read_dir(p.path())
        .unwrap()
        .flatten()
        .filter(|e| e.file_name().to_string_lossy().contains(".partial-"))
        .collect();
    assert!(leftovers.is_empty(), "{leftovers:?}");
}

#[test]
fn a_second_archive_into_a_non_empty_folder_is_refused_and_changes_nothing() {
    let p = archived_project();
    archive_to_bundle(p.path());
    let bundle = p.path().join("bundle");
    let before = tree(&bundle);
    // The same manifest again, into the bundle just written.
    let again = archive(p.path(), "results/manifest.json", "bundle");
    assert_eq!(again.status.code(), Some(2), "{}", stderr_of(&again));
    let err = stderr_of(&again);
    assert!(
        err.contains("bundle") && err.contains("not an empty folder"),
        "{err}"
    );
    assert_eq!(tree(&bundle), before, "the existing bundle was touched");
    // A folder holding one unrelated file is not empty either.
    fs::create_dir(p.path().join("other")).unwrap();
    fs::write(p.path().join("other/notes.txt"), "mine").unwrap();
    let third = archive(p.path(), "results/manifest.json", "other");
    assert_eq!(third.status.code(), Some(2), "{}", stderr_of(&third));
    assert_eq!(files_under(&p.path().join("other")).len(), 1);
    assert_eq!(fs::read(p.path().join("other/notes.txt")).unwrap(), b"mine");
}

#[test]
fn the_manifest_of_a_subject_selection_is_refused() {
    let dir = tempfile::tempdir().expect("tempdir");
    tiny_project(dir.path(), &StudySpec::default());
    assert_success(
        &run_cli(dir.path(), &["run", "pipeline.yaml", "--subject", "01"]),
        "run --subject 01",
    );
    let part = "results/manifest.parts/01.json";
    assert!(dir.path().join(part).is_file(), "no manifest part");
    let out = archive(dir.path(), part, "bundle");
    assert_eq!(out.status.code(), Some(2), "{}", stderr_of(&out));
    let err = stderr_of(&out);
    assert!(err.contains("only some subjects (01)"), "{err}");
    assert!(!dir.path().join("bundle").exists(), "a bundle was written");
}

#[test]
fn a_copied_archive_verifies_against_copied_recordings_and_names_a_changed_one() {
    let p = archived_project();
    archive_to_bundle(p.path());
    // Another machine: the bundle and the recordings in two other folders, the originals gone.
    let elsewhere = tempfile::tempdir().expect("tempdir");
    let bundle = elsewhere.path().join("from-journal");
    let data = elsewhere.path().join("recordings-now");
    copy_tree(&p.path().join("bundle"), &bundle);
    copy_tree(&p.path().join("data"), &data);
    drop(p);
    let manifest = bundle.join("manifest.json");
    let args = [
        "verify",
        manifest.to_str().unwrap(),
        "--data",
        data.to_str().unwrap(),
    ];
    let ok = run_cli(elsewhere.path(), &args);
    assert_success(&ok, "verify --data");
    let text = String::from_utf8_lossy(&ok.stdout);
    assert!(text.contains("bit-identical"), "{text}");

    // One byte of subject 02's recording changes (in the last data record, so the file still
    // reads): verify fails and names that file only.
    let recording = recording_path(&data, 2);
    let mut bytes = fs::read(&recording).unwrap();
    let at = bytes.len() - 10;
    bytes[at] ^= 0x01;
    fs::write(&recording, bytes).unwrap();
    let bad = run_cli(elsewhere.path(), &args);
    assert_eq!(bad.status.code(), Some(1), "{}", stderr_of(&bad));
    let text = String::from_utf8_lossy(&bad.stdout);
    let changed: Vec<&str> = text.lines().filter(|l| l.contains("changed")).collect();
    assert_eq!(changed.len(), 1, "{text}");
    assert!(
        changed[0].contains(&recording.display().to_string()),
        "{text}"
    );
    assert!(text.contains("not reproduced"), "{text}");
}

#[test]
fn authors_are_named_in_the_bids_description_and_the_crate_in_order() {
    let p = archived_project();
    let out = run_cli(
        p.path(),
        &[
            "archive",
            "results/manifest.json",
            "--out",
            "bundle",
            "--author",
            "Ada Example",
            "--author",
            "Ben Example",
        ],
    );
    assert_success(&out, "archive --author");
    let bundle = p.path().join("bundle");
    let read = |name: &str| -> serde_json::Value {
        serde_json::from_slice(&fs::read(bundle.join(name)).unwrap()).unwrap()
    };
    assert_eq!(
        read("dataset_description.json")["Authors"],
        serde_json::json!(["Ada Example", "Ben Example"])
    );
    let crate_doc = read("ro-crate-metadata.json");
    let graph = crate_doc["@graph"].as_array().unwrap();
    let root = graph.iter().find(|e| e["@id"] == "./").unwrap();
    let names: Vec<&str> = root["author"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| {
            let person = graph.iter().find(|e| e["@id"] == r["@id"]).unwrap();
            assert_eq!(person["@type"], "Person");
            person["name"].as_str().unwrap()
        })
        .collect();
    assert_eq!(names, ["Ada Example", "Ben Example"]);
}
