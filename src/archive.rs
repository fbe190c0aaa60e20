//! `archive MANIFEST --out DIR` (DESIGN §6): one folder a journal or a data repository takes.
//!
//! ```text
//! DIR/
//!   dataset_description.json   BIDS derivative (DatasetType, GeneratedBy)
//!   README                     what is here and how to verify it
//!   .bidsignore                the files BIDS has no name for yet (see README.md)
//!   code/<pipeline>.yaml       the pipeline file, byte for byte
//!   manifest.json              the run's manifest, its pipeline path and output files
//!                              pointed into the bundle
//!   sub-01/eeg/sub-01_task-cue_desc-norm_conn.npy + .json     per-subject exports
//!   group/task-cue_desc-group_conn.npy + .json                group exports
//!   group/task-cue_desc-group_conntable.tsv + .json           tables and column dictionaries
//!   ro-crate-metadata.json     RO-Crate 1.1: every file (sha256, blake3), the software, the inputs
//! ```
//!
//! The bundle is refused for a manifest of part of a study (a subject selection), whose pipeline
//! file or exported results changed since the run (an NPY, or a sidecar, table or column
//! dictionary the manifest records in `companions`, each named), or a target that is not empty.
//! A manifest that records no `companions` (an older one) is archived with its arrays checked
//! only, and [`Archived::unchecked`] says which files were copied unchecked. It is written
//! into a temporary folder beside the target and renamed into place at the end, so it appears
//! whole or not at all.

use std::path::{Path, PathBuf};

use serde_json::{json, Value};
use sha2::Digest;

use crate::cluster::script::quote;
use crate::manifest::{self, CompanionKind, Manifest};
use crate::sources::hash_file;

/// Why no bundle was written.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct ArchiveError(pub String);

fn fail(message: impl Into<String>) -> ArchiveError {
    ArchiveError(message.into())
}

/// One file to copy into the bundle.
struct Entry {
    from: PathBuf,
    to: String,
}

/// What [`archive`] wrote.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Archived {
    /// The number of files the bundle holds.
    pub files: usize,
    /// Files copied into the bundle that the manifest records no hash for (sidecars and tables
    /// of a manifest written before they were hashed), so that nothing could check them.
    pub unchecked: Vec<String>,
}

/// Write the bundle of `manifest_path` to `out`.
pub fn archive(
    manifest_path: &Path,
    out: &Path,
    license: Option<&str>,
    authors: &[String],
) -> Result<Archived, ArchiveError> {
    let mut m = manifest::read(manifest_path).map_err(|e| ArchiveError(e.to_string()))?;
    let output = manifest_path.parent().unwrap_or(Path::new("."));
    if let Some(subjects) = &m.pipeline.subjects {
        return Err(fail(format!(
            "{} records a run of only some subjects ({}): archive the manifest of a whole run",
            manifest_path.display(),
            subjects.join(", ")
        )));
    }
    if out.exists() && std::fs::read_dir(out).map_or(true, |mut d| d.next().is_some()) {
        return Err(fail(format!(
            "{} is not an empty folder: the bundle goes into a new or empty one",
            out.display()
        )));
    }
    let pipeline_file = output.join(&m.pipeline.path);
    match hash_file(&pipeline_file) {
        Ok((_, hash)) if hash == m.pipeline.blake3 => {}
        Ok(_) => {
            return Err(fail(format!(
                "the pipeline file {} changed since the run",
                pipeline_file.display()
            )))
        }
        Err(e) => {
            return Err(fail(format!(
                "the pipeline file {}: {e}",
                pipeline_file.display()
            )))
        }
    }
    let pipeline_name = pipeline_file
        .file_name()
        .map_or("pipeline.yaml".into(), |n| n.to_string_lossy().into_owned());
    let mut entries = vec![Entry {
        from: pipeline_file.clone(),
        to: format!("code/{pipeline_name}"),
    }];
    m.pipeline.path = format!("code/{pipeline_name}");
    let mut unchecked = Vec::new();
    for unit in &mut m.units {
        let Some(record) = unit.outputs.first_mut() else {
            return Err(fail(format!(
                "stage {} has no output recorded: the run did not finish",
                unit.stage
            )));
        };
        let Some(file) = record.file.clone() else {
            continue;
        };
        if record.store.is_some() {
            return Err(fail(format!(
                "stage {} was exported as a Zarr store ({file}, `format: zarr`); a bundle holds \
                 NPY exports only (BIDS has no place for a Zarr store of connectivity yet): \
                 remove `format: zarr`, run again and archive that manifest",
                unit.stage
            )));
        }
        let npy = output.join(&file);
        match hash_file(&npy) {
            Ok((_, hash)) if hash == record.blake3 => {}
            Ok(_) => return Err(fail(format!("{} changed since the run", npy.display()))),
            Err(_) => return Err(fail(format!("{} is missing", npy.display()))),
        }
        let subject = unit.subject.as_deref();
        let (folder, prefix) = bids_place(&m.inputs, subject);
        let stem = format!("{prefix}desc-{}_conn", unit.stage);
        let table = format!("{prefix}desc-{}_conntable", unit.stage);
        let to = format!("{folder}/{stem}.npy");
        entries.push(Entry {
            from: npy.clone(),
            to: to.clone(),
        });
        // The bundle's name of each file written beside the array.
        let bundled = |kind: CompanionKind| match kind {
            CompanionKind::Sidecar => format!("{folder}/{stem}.json"),
            CompanionKind::Table => format!("{folder}/{table}.tsv"),
            CompanionKind::Columns => format!("{folder}/{table}.json"),
        };
        match &mut record.companions {
            Some(companions) => {
                let changed = crate::verify::changed_companions(companions, output);
                if let Some(first) = changed.first() {
                    return Err(fail(format!(
                        "{first} (in {}): the bundle would not hold what the run wrote; run \
                         the pipeline again to write it afresh, then archive",
                        output.display()
                    )));
                }
                for c in companions.iter_mut() {
                    let to = bundled(c.kind);
                    entries.push(Entry {
                        from: output.join(&c.file),
                        to: to.clone(),
                    });
                    c.file = to;
                }
            }
            None => {
                // A manifest from before the sidecars and tables were hashed: found by name,
                // copied unchecked, and said so.
                let sidecar = npy.with_extension("json");
                if !sidecar.is_file() {
                    return Err(fail(format!("{} is missing", sidecar.display())));
                }
                let tsv = match subject {
                    None => output.join(format!("{}.tsv", unit.stage)),
                    Some(s) => output.join(s).join(format!("{}.tsv", unit.stage)),
                };
                let dictionary = output.join(format!("{}.json", unit.stage));
                let mut found = vec![(sidecar, CompanionKind::Sidecar)];
                if tsv.is_file() {
                    found.push((tsv, CompanionKind::Table));
                    if dictionary.is_file() {
                        found.push((dictionary, CompanionKind::Columns));
                    }
                }
                for (from, kind) in found {
                    let shown = from.display().to_string();
                    if !unchecked.contains(&shown) {
                        unchecked.push(shown);
                    }
                    entries.push(Entry {
                        from,
                        to: bundled(kind),
                    });
                }
            }
        }
        record.file = Some(to);
    }
    let name = out
        .file_name()
        .map_or("bundle".into(), |n| n.to_string_lossy().into_owned());
    let parent = match out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    std::fs::create_dir_all(&parent).map_err(|e| fail(format!("{}: {e}", parent.display())))?;
    let temp = tempfile::Builder::new()
        .prefix(&format!(".{name}.partial-"))
        .tempdir_in(&parent)
        .map_err(|e| fail(format!("{}: {e}", parent.display())))?;
    let count = write_bundle(temp.path(), &m, &entries, license, authors)?;
    let built = temp.keep();
    if out.exists() {
        // An empty folder: replaced by the bundle.
        let _ = std::fs::remove_dir(out);
    }
    std::fs::rename(&built, out).map_err(|e| {
        let _ = std::fs::remove_dir_all(&built);
        fail(format!("cannot move the bundle to {}: {e}", out.display()))
    })?;
    Ok(Archived {
        files: count,
        unchecked,
    })
}

/// The BIDS folder and file-name prefix of a unit's exports: `sub-01/eeg`, `sub-01_task-cue_`
/// from the subject's recordings (their folder and `task-` entity); `group`, `task-cue_` for
/// group units.
fn bids_place(inputs: &[manifest::InputFile], subject: Option<&str>) -> (String, String) {
    let find = |pick: &dyn Fn(&Path) -> bool| {
        inputs
            .iter()
            .map(|i| Path::new(&i.path))
            .find(|p| pick(p))
            .map(Path::to_path_buf)
    };
    let task_of = |p: &Path| {
        p.file_name()?
            .to_string_lossy()
            .split('_')
            .find(|e| e.starts_with("task-"))
            .map(|t| format!("{t}_"))
    };
    match subject {
        Some(s) => {
            let tag = format!("sub-{s}");
            let recording = find(&|p| p.to_string_lossy().contains(&format!("{tag}_")));
            let datatype = recording
                .as_ref()
                .and_then(|p| p.parent()?.file_name())
                .map(|n| n.to_string_lossy().into_owned())
                .filter(|n| ["eeg", "meg", "ieeg"].contains(&n.as_str()))
                .unwrap_or_else(|| "eeg".into());
            let task = recording.as_deref().and_then(task_of).unwrap_or_default();
            (format!("{tag}/{datatype}"), format!("{tag}_{task}"))
        }
        None => {
            let task = find(&|p| task_of(p).is_some())
                .as_deref()
                .and_then(task_of)
                .unwrap_or_default();
            ("group".into(), task)
        }
    }
}

fn write_file(root: &Path, rel: &str, bytes: &[u8]) -> Result<(), ArchiveError> {
    let path = root.join(rel);
    if let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir).map_err(|e| fail(format!("{}: {e}", dir.display())))?;
    }
    std::fs::write(&path, bytes).map_err(|e| fail(format!("{}: {e}", path.display())))
}

fn write_bundle(
    root: &Path,
    m: &Manifest,
    entries: &[Entry],
    license: Option<&str>,
    authors: &[String],
) -> Result<usize, ArchiveError> {
    for e in entries {
        let bytes =
            std::fs::read(&e.from).map_err(|err| fail(format!("{}: {err}", e.from.display())))?;
        write_file(root, &e.to, &bytes)?;
    }
    let json_bytes = |v: &Value| serde_json::to_vec_pretty(v).unwrap_or_default();
    write_file(
        root,
        "manifest.json",
        &serde_json::to_vec_pretty(m).map_err(|e| fail(e.to_string()))?,
    )?;
    let mut description = json!({
        "Name": m.pipeline.name,
        "BIDSVersion": "1.10.0",
        "DatasetType": "derivative",
        "GeneratedBy": [{
            "Name": m.tool.name,
            "Version": m.tool.version,
            "Description": format!("source revision {}; pipeline code/{}{}", m.tool.revision,
                Path::new(&m.pipeline.path).file_name().map_or(String::new(), |n| n.to_string_lossy().into_owned()),
                set_arguments(m).map_or(String::new(), |sets| format!(" with {sets}"))),
        }],
    });
    if let Some(l) = license {
        description["License"] = json!(l);
    }
    if !authors.is_empty() {
        description["Authors"] = json!(authors);
    }
    write_file(root, "dataset_description.json", &json_bytes(&description))?;
    write_file(root, ".bidsignore", BIDSIGNORE.as_bytes())?;
    write_file(root, "README", readme(m).as_bytes())?;
    // Every file but the crate's own metadata, in a stable order.
    let mut files = Vec::new();
    let mut dirs = vec![root.to_path_buf()];
    while let Some(dir) = dirs.pop() {
        for entry in std::fs::read_dir(&dir)
            .map_err(|e| fail(e.to_string()))?
            .flatten()
        {
            let path = entry.path();
            if path.is_dir() {
                dirs.push(path);
            } else if let Ok(rel) = path.strip_prefix(root) {
                files.push(rel.to_string_lossy().into_owned());
            }
        }
    }
    files.sort();
    let mut graph = vec![
        json!({
            "@id": "ro-crate-metadata.json",
            "@type": "CreativeWork",
            "conformsTo": {"@id": "https://w3id.org/ro/crate/1.1"},
            "about": {"@id": "./"},
        }),
        Value::Null, // the root dataset, once its parts are known
        json!({
            "@id": "#phasewise",
            "@type": "SoftwareApplication",
            "name": m.tool.name,
            "version": m.tool.version,
            "identifier": format!("revision {}", m.tool.revision),
        }),
    ];
    let mut parts = Vec::new();
    let mut results = Vec::new();
    for rel in &files {
        let path = root.join(rel);
        let bytes = std::fs::read(&path).map_err(|e| fail(format!("{}: {e}", path.display())))?;
        let sha256 = hex(&sha2::Sha256::digest(&bytes));
        let format = match rel.rsplit_once('.').map(|(_, e)| e) {
            Some("json") => "application/json",
            Some("tsv") => "text/tab-separated-values",
            Some("yaml") => "application/yaml",
            Some("npy") => "application/octet-stream",
            _ => "text/plain",
        };
        parts.push(json!({"@id": rel}));
        if rel.ends_with(".npy") {
            results.push(json!({"@id": rel}));
        }
        graph.push(json!({
            "@id": rel,
            "@type": "File",
            "name": rel,
            "contentSize": bytes.len().to_string(),
            "encodingFormat": format,
            "sha256": sha256,
            "identifier": format!("blake3:{}", blake3::hash(&bytes).to_hex()),
        }));
    }
    let mut objects = Vec::new();
    for (i, input) in m.inputs.iter().enumerate() {
        let id = format!("#input-{}", i + 1);
        objects.push(json!({"@id": id}));
        graph.push(json!({
            "@id": id,
            "@type": "CreativeWork",
            "name": input.path,
            "description": "an input recording or sidecar of the run (not in this bundle), by \
                            its path relative to the pipeline file and its blake3",
            "contentSize": input.size.to_string(),
            "identifier": format!("blake3:{}", input.blake3),
        }));
    }
    graph.push(json!({
        "@id": "#run",
        "@type": "CreateAction",
        "name": format!("phasewise run of {}", m.pipeline.name),
        "instrument": {"@id": "#phasewise"},
        "object": objects,
        "result": results,
        "startTime": m.started,
        "endTime": m.finished,
    }));
    let license_entity = match license {
        Some(l) if l.contains("://") => json!({"@id": l}),
        Some(l) => json!({"@id": format!("https://spdx.org/licenses/{l}")}),
        None => {
            graph.push(json!({
                "@id": "#license",
                "@type": "CreativeWork",
                "name": "not stated",
                "description": "The author has not stated a license (phasewise archive --license)",
            }));
            json!({"@id": "#license"})
        }
    };
    let mut author_refs = Vec::new();
    for (i, name) in authors.iter().enumerate() {
        let id = format!("#author-{}", i + 1);
        author_refs.push(json!({"@id": id}));
        graph.push(json!({"@id": id, "@type": "Person", "name": name}));
    }
    graph[1] = json!({
        "@id": "./",
        "@type": "Dataset",
        "name": m.pipeline.name,
        "description": format!("Results of the phasewise pipeline `{}` with its manifest, \
                                laid out as a BIDS derivative dataset", m.pipeline.name),
        "datePublished": m.finished.get(..10).unwrap_or(&m.finished),
        "license": license_entity,
        "hasPart": parts,
        "mentions": {"@id": "#run"},
    });
    if !author_refs.is_empty() {
        graph[1]["author"] = json!(author_refs);
    }
    // `sha256` is no term of the RO-Crate 1.1 context (later versions map it to schema.org's
    // `sha256`): the same mapping is added here, as RO-Crate 1.1 allows ("Extending the
    // context"), so the document stays compacted JSON-LD.
    let crate_doc = json!({
        "@context": [
            "https://w3id.org/ro/crate/1.1/context",
            {"sha256": "http://schema.org/sha256"},
        ],
        "@graph": graph,
    });
    write_file(root, "ro-crate-metadata.json", &json_bytes(&crate_doc))?;
    Ok(files.len() + 1)
}

/// What BIDS has no name for yet (README.md, "Archiving and verifying"): the manifest and the
/// crate's metadata at the root, the group folder (BIDS has no group level in a derivative's
/// layout), and connectivity arrays and tables (no suffix for them in BIDS 1.10; NPY is no
/// BIDS file format). The folder is written `/group`, anchored at the root and without the
/// trailing slash: bids-validator-deno 3.0.2 still reports `/group/` as NOT_INCLUDED when the
/// pattern is `group/`.
const BIDSIGNORE: &str = "manifest.json\nro-crate-metadata.json\n/group\n*_conn.npy\n*_conn.json\n*_conntable.tsv\n*_conntable.json\n";

/// The run's overrides as command-line arguments, each value one quoted shell word
/// (`--set tf.cycles=6 --set 'norm.window=[-0.3,-0.1]'`); `None` for a run without.
fn set_arguments(m: &Manifest) -> Option<String> {
    let sets: Vec<String> = m
        .pipeline
        .overrides
        .iter()
        .map(|o| format!("--set {}", quote(o)))
        .collect();
    (!sets.is_empty()).then(|| sets.join(" "))
}

/// What the bundle's README says of `code/`: the pipeline file as it ran, or, for a run with
/// `--set` overrides (a sweep's variant), the file and the overrides it ran with, and the
/// command that runs it so again.
fn code_note(m: &Manifest) -> String {
    let file = Path::new(&m.pipeline.path).file_name().map_or_else(
        || m.pipeline.path.clone(),
        |n| n.to_string_lossy().into_owned(),
    );
    let Some(sets) = set_arguments(m) else {
        return "- code/: the pipeline file, byte for byte as it ran.\n".into();
    };
    format!(
        "- code/: the pipeline file, byte for byte. The run did not use it as it stands: it ran \
         with these overrides of its params (recorded in manifest.json as pipeline.overrides), \
         which take the place of the values the file gives:\n\n    {sets}\n\n  \
         `phasewise verify` applies them itself. To run the pipeline exactly as it ran, give \
         them again, with the recordings where the file's `recordings` glob points \
         (relative to code/):\n\n    phasewise run code/{file} {sets}\n\n",
    )
}

fn readme(m: &Manifest) -> String {
    format!(
        "{name}\n\nResults of the phasewise pipeline `{name}` (phasewise {version}, source \
         revision {revision}), run {started} to {finished}.\n\n\
         {code}\
         - manifest.json: what ran, with which parameters, on which inputs (by blake3), and the \
         hash of every output and of every exported file (arrays, sidecars, tables).\n\
         - sub-*/: each subject's exported arrays (NPY) with their sidecars (xarray \
         DataArray.to_dict form); group/: the group arrays, tables (TSV) and column dictionaries.\n\
         - ro-crate-metadata.json: RO-Crate 1.1 description of every file (sha256, blake3).\n\n\
         To check that the numbers reproduce, with the recordings in DATA (the folder the \
         pipeline's recordings glob starts from):\n\n    phasewise verify manifest.json --data DATA\n\n\
         Research software, not a clinical device.\n",
        name = m.pipeline.name,
        version = m.tool.version,
        revision = m.tool.revision,
        started = m.started,
        finished = m.finished,
        code = code_note(m),
    )
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}
