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

/// The manifest's `companions` of every exported output: (kind, file, blake3).
fn companions(manifest: &Path) -> Vec<(String, String, String)> {
    let m: serde_json::Value = serde_json::from_slice(&fs::read(manifest).unwrap()).unwrap();
    let mut out = Vec::new();
    for unit in m["units"].as_array().unwrap() {
        for output in unit["outputs"].as_array().unwrap() {
            if output["file"].is_null() {
                continue;
            }
            let list = output["companions"]
                .as_array()
                .unwrap_or_else(|| panic!("no companions for {}", output["file"]));
            for c in list {
                let text = |k: &str| c[k].as_str().unwrap().to_string();
                out.push((text("kind"), text("file"), text("blake3")));
            }
        }
    }
    out
}

fn stdout_of(out: &std::process::Output) -> String {
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// An exported table or sidecar edited after the run: `verify` names it and exits 1, `archive`
/// refuses naming it and writes nothing; the same files unedited pass both. The manifest records
/// every file an export wrote beside its array (sidecar, table, column dictionary) with the
/// blake3 of the bytes on disk (blake3 crate, not phasewise's code, recomputes them here).
#[test]
fn an_edited_table_or_sidecar_fails_verify_and_archive_naming_the_file() {
    let p = archived_project();
    let dir = p.path();
    let results = dir.join("results");
    // Unedited: both pass.
    let ok = run_cli(dir, &["verify", "results/manifest.json"]);
    assert_success(&ok, "verify");
    assert!(stdout_of(&ok).contains("verified"), "{}", stdout_of(&ok));
    assert!(
        !stdout_of(&ok).contains("not checked"),
        "{}",
        stdout_of(&ok)
    );
    assert_success(
        &archive(dir, "results/manifest.json", "bundle-ok"),
        "archive",
    );

    for (edited, what) in [
        ("group.tsv", "table"),
        ("group/group.json", "sidecar"),
        ("group.json", "column dictionary"),
    ] {
        let path = results.join(edited);
        let original = fs::read(&path).unwrap();
        // One byte changed, the file as long as before (as a hand edit `false`→`False` does).
        let mut bytes = original.clone();
        let at = bytes.iter().position(u8::is_ascii_lowercase).unwrap();
        bytes[at] = bytes[at].to_ascii_uppercase();
        fs::write(&path, &bytes).unwrap();

        let bad = run_cli(dir, &["verify", "results/manifest.json"]);
        assert_eq!(bad.status.code(), Some(1), "{}", stderr_of(&bad));
        let text = stdout_of(&bad);
        let named: Vec<&str> = text
            .lines()
            .filter(|l| l.contains("changed since the run"))
            .collect();
        assert_eq!(named.len(), 1, "{text}");
        assert!(
            named[0].contains(&format!("exported {what} {edited} ")),
            "{text}"
        );
        assert!(text.contains("not reproduced"), "{text}");

        let out = format!("bundle-{}", edited.replace('/', "-"));
        let refused = archive(dir, "results/manifest.json", &out);
        assert_eq!(refused.status.code(), Some(2), "{}", stderr_of(&refused));
        let err = stderr_of(&refused);
        assert!(
            err.contains(&format!("exported {what} {edited} changed since the run")),
            "{err}"
        );
        assert!(!dir.join(&out).exists(), "a bundle was written");
        fs::write(&path, &original).unwrap();
    }

    let recorded = companions(&results.join("manifest.json"));
    let files: Vec<&str> = recorded.iter().map(|(_, f, _)| f.as_str()).collect();
    for expected in [
        "group/group.json",
        "group.tsv",
        "group.json",
        "01/norm.json",
        "02/norm.json",
    ] {
        assert!(files.contains(&expected), "{expected} not in {files:?}");
    }
    for (kind, file, hash) in &recorded {
        let bytes = fs::read(results.join(file)).unwrap();
        assert_eq!(
            &blake3::hash(&bytes).to_hex().to_string(),
            hash,
            "{kind} {file}"
        );
    }

    // The bundle's manifest points its companions at the bundle's files, with the same hashes,
    // so that the bundle verifies on its own (a_copied_archive_verifies_… runs it).
    let bundled = companions(&dir.join("bundle-ok/manifest.json"));
    assert_eq!(bundled.len(), recorded.len());
    for ((kind, file, hash), (was_kind, _, was_hash)) in bundled.iter().zip(&recorded) {
        assert_eq!((kind, hash), (was_kind, was_hash));
        let bytes = fs::read(dir.join("bundle-ok").join(file)).unwrap();
        assert_eq!(&blake3::hash(&bytes).to_hex().to_string(), hash, "{file}");
    }
    assert!(
        bundled
            .iter()
            .any(|(_, f, _)| f == "group/task-cue_desc-group_conntable.tsv"),
        "{bundled:?}"
    );
}

/// A manifest written before sidecars and tables were hashed (no `companions`) still reads:
/// `verify` checks the arrays and says which exports' sidecars and tables it could not check;
/// `archive` writes the bundle and warns, naming the files it copied unchecked.
#[test]
fn a_manifest_without_companions_is_checked_for_its_arrays_and_says_what_it_did_not_check() {
    let p = archived_project();
    let dir = p.path();
    let manifest = dir.join("results/manifest.json");
    let mut m: serde_json::Value = serde_json::from_slice(&fs::read(&manifest).unwrap()).unwrap();
    for unit in m["units"].as_array_mut().unwrap() {
        for output in unit["outputs"].as_array_mut().unwrap() {
            output.as_object_mut().unwrap().remove("companions");
        }
    }
    fs::write(&manifest, serde_json::to_vec_pretty(&m).unwrap()).unwrap();
    let tsv = dir.join("results/group.tsv");
    let mut text = fs::read_to_string(&tsv).unwrap();
    text.push('\n');
    fs::write(&tsv, text).unwrap();

    let verified = run_cli(dir, &["verify", "results/manifest.json"]);
    assert_success(&verified, "verify of an older manifest");
    let said = stdout_of(&verified);
    let note: Vec<&str> = said.lines().filter(|l| l.contains("not checked")).collect();
    assert_eq!(note.len(), 1, "{said}");
    assert!(
        note[0].contains("3 exports (01/norm.npy, 02/norm.npy, group/group.npy)"),
        "{said}"
    );
    assert!(said.contains("verified"), "{said}");

    let archived = archive(dir, "results/manifest.json", "bundle");
    assert_success(&archived, "archive of an older manifest");
    let err = stderr_of(&archived);
    assert!(err.contains("unchecked"), "{err}");
    assert!(err.contains("results/group.tsv"), "{err}");
}

/// A sweep variant's bundle: its README says the pipeline under code/ ran with the variant's
/// overrides, lists them as `--set` arguments, and gives the command that runs it so again; run
/// by a shell (so its quoting is tested too) beside the recordings, that command gives the
/// recorded outputs bit for bit.
#[test]
fn a_variant_bundle_says_its_overrides_and_its_rerun_command_reproduces_it() {
    let dir = tempfile::tempdir().expect("tempdir");
    tiny_project(dir.path(), &StudySpec::default());
    assert_success(
        &run_cli(
            dir.path(),
            &[
                "sweep",
                "pipeline.yaml",
                "--vary",
                "tf.cycles=[4]",
                "--vary",
                "norm.window=[[-0.4, -0.1]]",
            ],
        ),
        "sweep",
    );
    let variants = dir.path().join("results/variants");
    let variant = fs::read_dir(&variants).unwrap().next().unwrap().unwrap();
    let manifest = variant.path().join("manifest.json");
    assert_success(
        &archive(dir.path(), manifest.to_str().unwrap(), "bundle"),
        "archive of a variant",
    );
    let bundle = dir.path().join("bundle");
    let readme = fs::read_to_string(bundle.join("README")).unwrap();
    let m: serde_json::Value =
        serde_json::from_slice(&fs::read(bundle.join("manifest.json")).unwrap()).unwrap();
    let overrides: Vec<&str> = m["pipeline"]["overrides"]
        .as_array()
        .unwrap()
        .iter()
        .map(|o| o.as_str().unwrap())
        .collect();
    assert_eq!(overrides.len(), 2, "{overrides:?}");
    assert!(
        !readme.contains("byte for byte as it ran"),
        "the README still says the file ran as it stands:\n{readme}"
    );
    let sets = "--set tf.cycles=4 --set 'norm.window=[-0.4,-0.1]'";
    assert!(readme.contains(&format!("    {sets}\n")), "{readme}");
    let command = format!("phasewise run code/pipeline.yaml {sets}");
    let line = readme
        .lines()
        .find(|l| l.trim_start().starts_with("phasewise run "))
        .unwrap_or_else(|| panic!("no run command in\n{readme}"))
        .trim();
    assert_eq!(line, command);

    // Run that line in the bundle, with the recordings where the pipeline looks for them.
    copy_tree(&dir.path().join("data"), &bundle.join("code/data"));
    let shell_line = line.replacen(
        "phasewise",
        &crate::reliability::bin().display().to_string(),
        1,
    );
    let ran = std::process::Command::new("sh")
        .args(["-c", &shell_line])
        .current_dir(&bundle)
        .env_remove("PHASEWISE_CACHE")
        .env("NO_COLOR", "1")
        .output()
        .expect("sh");
    assert_success(&ran, "the README's run command");
    let again: serde_json::Value =
        serde_json::from_slice(&fs::read(bundle.join("code/results/manifest.json")).unwrap())
            .unwrap();
    assert_eq!(again["pipeline"]["overrides"], m["pipeline"]["overrides"]);
    let hashes = |m: &serde_json::Value| -> Vec<[String; 3]> {
        m["units"]
            .as_array()
            .unwrap()
            .iter()
            .map(|u| {
                let text = |v: &serde_json::Value| v.to_string();
                [&u["stage"], &u["subject"], &u["outputs"][0]["blake3"]].map(text)
            })
            .collect()
    };
    assert_eq!(
        hashes(&again),
        hashes(&m),
        "the rerun did not reproduce the variant"
    );
}

/// `verify` compares the tables the rerun writes with the recorded ones, not only the files on
/// disk: a manifest whose recorded table hash matches an edited table on disk (as if the run had
/// written that table) is not reproduced, and the line names the table.
#[test]
fn verify_names_a_table_the_rerun_writes_differently() {
    let p = archived_project();
    let dir = p.path();
    let tsv = dir.join("results/group.tsv");
    let mut text = fs::read_to_string(&tsv).unwrap();
    text.push_str("# an extra line\n");
    fs::write(&tsv, &text).unwrap();
    let manifest = dir.join("results/manifest.json");
    let mut m: serde_json::Value = serde_json::from_slice(&fs::read(&manifest).unwrap()).unwrap();
    let group = m["units"]
        .as_array_mut()
        .unwrap()
        .iter_mut()
        .find(|u| u["stage"] == "group")
        .unwrap();
    let table = group["outputs"][0]["companions"]
        .as_array_mut()
        .unwrap()
        .iter_mut()
        .find(|c| c["kind"] == "table")
        .unwrap();
    table["blake3"] = blake3::hash(text.as_bytes()).to_hex().to_string().into();
    fs::write(&manifest, serde_json::to_vec_pretty(&m).unwrap()).unwrap();

    let out = run_cli(dir, &["verify", "results/manifest.json"]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr_of(&out));
    let said = stdout_of(&out);
    assert!(!said.contains("changed since the run"), "{said}");
    assert!(
        said.contains(
            "group (the group): the rerun wrote a different table than group.tsv recorded"
        ),
        "{said}"
    );
}
