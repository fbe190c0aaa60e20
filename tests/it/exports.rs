//! Exports on reruns (issue 7): a rerun that changes nothing rewrites no exported file; an
//! exported file that was edited or deleted is written again; and the object files the store
//! streams from an array's memory are byte for byte the NPY encoding of that array (numpy's NPY
//! format 1.0 as its specification describes it, and the encoder the store used before).

use crate::common;

use std::collections::BTreeMap;
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};

use common::*;
use ndarray::{ArrayD, IxDyn, ShapeBuilder};
use num_complex::Complex32;
use phasewise::session::{self, Env, Options};
use phasewise::sources::RecordingReader;
use phasewise::store::{npy_bytes, Lookup, Store};
use phasewise_stages::{Coord, LabelledArray, Layout, Notes, Values};

/// (mtime ns, inode, size) of every file under the output folder but the manifest, which
/// records the run's start and end times and so is rewritten by every run.
fn export_stats(output: &Path) -> BTreeMap<PathBuf, (i128, u64, u64)> {
    let mut stats = BTreeMap::new();
    let mut dirs = vec![output.to_path_buf()];
    while let Some(dir) = dirs.pop() {
        for entry in std::fs::read_dir(&dir).unwrap().flatten() {
            let path = entry.path();
            let meta = entry.metadata().unwrap();
            if meta.is_dir() {
                dirs.push(path);
            } else if path.file_name().unwrap() != "manifest.json" {
                let mtime =
                    i128::from(meta.mtime()) * 1_000_000_000 + i128::from(meta.mtime_nsec());
                stats.insert(path, (mtime, meta.ino(), meta.len()));
            }
        }
    }
    stats
}

/// The test chain with every per-subject stage exported as well.
fn exported_chain() -> String {
    CHAIN.replace(
        "    params: { factor: 3 }",
        "    export: true\n    params: { factor: 3 }",
    )
}

#[test]
fn a_no_op_rerun_rewrites_no_export() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(&exported_chain());
    p.run();
    let before = export_stats(&p.output());
    assert!(
        before.keys().any(|f| f.ends_with("01/b.npy"))
            && before.keys().any(|f| f.ends_with("group/g.npy")),
        "{before:?}"
    );
    // Let a rewrite show in the modification time even on coarse clocks.
    std::thread::sleep(std::time::Duration::from_millis(20));
    let second = p.run();
    assert_eq!(computed(&second), Vec::<String>::new());
    assert_eq!(
        export_stats(&p.output()),
        before,
        "a no-op rerun rewrote an export"
    );
    // The manifest still names every export.
    assert_eq!(
        unit(&second, "b", Some("01")).outputs[0].file.as_deref(),
        Some("01/b.npy")
    );
}

#[test]
fn an_edited_or_deleted_export_is_written_again() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(&exported_chain());
    let first = p.run();
    let out = p.output();
    let npy = out.join("01/b.npy");
    let json = out.join("group/g.json");
    let good_npy = std::fs::read(&npy).unwrap();
    let good_json = std::fs::read(&json).unwrap();
    // The export is the cached object's bytes (DESIGN §6): a hard link to the object where the
    // filesystem allows it (issue "Speed by default"), so an edit in place reaches the object too;
    // the rerun below must notice both.
    let (object, _) = p.object(&first, "b", Some("01"));
    assert_eq!(std::fs::read(&object).unwrap(), good_npy);

    // An edit of the same size (only the content differs) in an NPY; a deleted sidecar.
    let mut edited = good_npy.clone();
    let last = edited.len() - 1;
    edited[last] ^= 0x10;
    let linked =
        std::fs::metadata(&object).unwrap().ino() == std::fs::metadata(&npy).unwrap().ino();
    std::fs::write(&npy, &edited).unwrap();
    std::fs::remove_file(&json).unwrap();
    let second = p.run();
    // A linked export edited in place damaged the object with it: the damage is found by the
    // object's hash and that one unit is computed again; a copied export is only rewritten.
    let expected: Vec<String> = if linked {
        vec!["b/01".to_string()]
    } else {
        Vec::new()
    };
    assert_eq!(computed(&second), expected, "linked export: {linked}");
    assert_eq!(std::fs::read(&npy).unwrap(), good_npy);
    assert_eq!(std::fs::read(&json).unwrap(), good_json);
    // The cache holds the right bytes again.
    assert_eq!(std::fs::read(&object).unwrap(), good_npy);

    // A deleted NPY and an edited sidecar, this time of another subject.
    let npy2 = out.join("02/b.npy");
    let good_npy2 = std::fs::read(&npy2).unwrap();
    std::fs::remove_file(&npy2).unwrap();
    let json2 = out.join("01/b.json");
    let good_json2 = std::fs::read(&json2).unwrap();
    std::fs::write(&json2, b"{}").unwrap();
    p.run();
    assert_eq!(std::fs::read(&npy2).unwrap(), good_npy2);
    assert_eq!(std::fs::read(&json2).unwrap(), good_json2);
}

/// The cache record packs long numeric axes (its own format), but the exported sidecar, which
/// users read from Python, lists every coordinate as `{dims: [time], data: [...]}` (format 2,
/// xarray's `DataArray.to_dict` form) with the very f64s of the cached layout.
#[test]
fn exported_sidecars_list_every_coordinate_that_the_cache_record_packs() {
    let p = Project::new(&["01"]);
    p.pipeline(&exported_chain());
    let first = p.run();
    let (_, record_path) = p.object(&first, "b", Some("01"));
    let read = |path: &Path| -> serde_json::Value {
        serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap()
    };
    let sidecar = read(&p.output().join("01/b.json"));
    let raw = read(&record_path);
    let dims = sidecar["dims"].as_array().unwrap();
    let t = dims.iter().position(|d| d == "time").expect("a time axis");
    assert_eq!(raw["layout"]["coords"][t]["kind"], "numbers_delta2");
    let coord = &sidecar["coords"]["time"];
    assert_eq!(coord["dims"], serde_json::json!(["time"]));
    assert_eq!(coord["attrs"]["units"], "s");
    assert_eq!(sidecar["attrs"]["format_version"], 2);
    let listed: Vec<u64> = coord["data"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap().to_bits())
        .collect();
    let key = unit(&first, "b", Some("01")).key.clone();
    let Lookup::Present(record) = Store::new(p.cache()).lookup(&key) else {
        panic!("the record of b/01 does not read back");
    };
    let cached: Vec<u64> = record.layout.coords[t]
        .numbers()
        .unwrap()
        .iter()
        .map(|x| x.to_bits())
        .collect();
    assert!(listed.len() > 64, "{} times", listed.len());
    assert_eq!(listed, cached);
}

#[test]
fn an_edited_or_deleted_table_is_written_again() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(
        "name: t\ndata:\n  recordings: \"../data/sub-*/eeg/*_eeg.edf\"\n  events: sidecar\n\
         output: ../results/t\nstages:\n  reref:\n    op: re-reference\n    input: recordings\n    \
         params: { method: average }\n  group:\n    op: aggregate\n    input: reref\n    \
         export: true\n    params: { over: subjects }\n",
    );
    let ops = phasewise_stages::registry::all();
    let run = || {
        let env = Env {
            ops: &ops,
            reader: &RecordingReader,
        };
        match session::run(&p.pipeline_path(), &Options::default(), env) {
            Ok(s) => s.manifest,
            Err(e) => panic!("run failed:\n{e}"),
        }
    };
    run();
    let table = p.dir().join("results/t/group.tsv");
    let good = std::fs::read_to_string(&table).unwrap();
    assert!(good.starts_with("subject\t"), "{good}");
    let before = export_stats(&p.dir().join("results/t"));
    std::thread::sleep(std::time::Duration::from_millis(20));
    run();
    assert_eq!(export_stats(&p.dir().join("results/t")), before);

    std::fs::write(&table, good.replace("group", "grove")).unwrap();
    run();
    assert_eq!(std::fs::read_to_string(&table).unwrap(), good);
    std::fs::remove_file(&table).unwrap();
    let again = run();
    assert_eq!(computed(&again), Vec::<String>::new());
    assert_eq!(std::fs::read_to_string(&table).unwrap(), good);
}

fn layout_of(shape: &[usize], complex: bool) -> Layout {
    Layout {
        dims: (0..shape.len()).map(|a| format!("d{a}")).collect(),
        coords: shape
            .iter()
            .map(|&n| Coord::Numbers((0..n).map(|i| i as f64).collect()))
            .collect(),
        units: "1".into(),
        complex,
        ..Layout::default()
    }
}

/// numpy's NPY format 1.0, written out from its specification
/// (numpy.lib.format: magic `\x93NUMPY`, version 1 0, a little-endian u16 header length, the
/// header dict as a Python literal padded with spaces and ended by `\n` so that the data starts
/// at a multiple of 64 bytes, then the values in C order, little-endian).
fn npy_from_spec(shape: &[usize], descr: &str, data: &[u8]) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
    let tuple = match dims.len() {
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    // The spec asks for a Python dict literal; numpy's own writer adds a trailing `, ` before
    // the brace, the Rust encoder the cache has always used does not. Either is valid NPY; the
    // cache keeps its bytes (and so its hashes), checked here.
    let dict = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple}}}");
    let mut header = dict.into_bytes();
    let unpadded = 10 + header.len() + 1;
    header.resize(header.len() + (64 - unpadded % 64) % 64, b' ');
    header.push(b'\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(&header);
    out.extend_from_slice(data);
    out
}

#[test]
fn stored_objects_are_the_npy_encoding_of_the_array() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::new(dir.path());
    let shapes: [&[usize]; 5] = [&[7], &[2, 3], &[2, 3, 4, 5, 6], &[1, 1, 65], &[3, 0, 2]];
    for (n, shape) in shapes.iter().enumerate() {
        for complex in [false, true] {
            let len: usize = shape.iter().product();
            let reals: Vec<f32> = (0..len)
                .map(|i| (i as f32 * 0.37 - 3.0).sin() * 1e3)
                .collect();
            let (values, descr, data) = if complex {
                let z: Vec<Complex32> =
                    reals.iter().map(|&x| Complex32::new(x, -0.5 * x)).collect();
                let data: Vec<u8> = z
                    .iter()
                    .flat_map(|c| [c.re.to_le_bytes(), c.im.to_le_bytes()].concat())
                    .collect();
                let a = ArrayD::from_shape_vec(IxDyn(shape), z).unwrap();
                (Values::Complex(a), "<c8", data)
            } else {
                let data: Vec<u8> = reals.iter().flat_map(|x| x.to_le_bytes()).collect();
                let a = ArrayD::from_shape_vec(IxDyn(shape), reals.clone()).unwrap();
                (Values::Real(a), "<f4", data)
            };
            let array = LabelledArray::checked(layout_of(shape, complex), values).unwrap();
            let fp = phasewise::key::Fingerprint {
                op: "test".into(),
                op_version: 1,
                params: serde_json::json!({ "n": n, "complex": complex }),
                inputs: vec![],
                subject: None,
            };
            let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
            let (path, _) = store.object_paths(&record.key);
            let written = std::fs::read(&path).unwrap();
            let spec = npy_from_spec(shape, descr, &data);
            assert_eq!(written, spec, "shape {shape:?}, {descr}: not numpy's NPY");
            assert_eq!(
                written,
                npy_bytes(&array.values).unwrap(),
                "differs from the old encoder"
            );
            assert_eq!(record.blake3, blake3::hash(&spec).to_hex().to_string());
            assert_eq!(record.npy_size, spec.len() as u64);
            // A cache: false record carries the same hash without writing the values.
            let unstored = store.put(&array, &Notes::default(), &fp, false).unwrap();
            assert_eq!(unstored.blake3, record.blake3);
            // Loading reads the same values back.
            let again = store.put(&array, &Notes::default(), &fp, true).unwrap();
            let (back, _) = store.load(&again.key).unwrap();
            assert_eq!(back, array);
        }
    }
}

#[test]
fn a_fortran_order_array_is_stored_as_the_npy_encoder_writes_it_and_loads_back() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::new(dir.path());
    let values: Vec<f32> = (0..24).map(|i| i as f32 - 7.5).collect();
    let a = ArrayD::from_shape_vec(IxDyn(&[2, 3, 4]).f(), values).unwrap();
    let array = LabelledArray::checked(layout_of(&[2, 3, 4], false), Values::Real(a)).unwrap();
    let fp = phasewise::key::Fingerprint {
        op: "test".into(),
        op_version: 1,
        params: serde_json::json!({ "fortran": true }),
        inputs: vec![],
        subject: None,
    };
    let record = store.put(&array, &Notes::default(), &fp, true).unwrap();
    let (path, _) = store.object_paths(&record.key);
    let written = std::fs::read(&path).unwrap();
    assert_eq!(written, npy_bytes(&array.values).unwrap());
    assert!(String::from_utf8_lossy(&written[..64]).contains("'fortran_order': True"));
    let (back, _) = store.load(&record.key).unwrap();
    assert_eq!(back, array);
}

/// `format: zarr` (issue 23): the tiny study's `norm` (per subject) and `group` exported as Zarr
/// v3 stores. The store holds the values bit for bit (decoded here by the `zarrs` crate and
/// compared with the cached object), every array carries `dimension_names`, the coordinates
/// carry their units; no NPY is written for those stages; a rerun rewrites nothing; a changed
/// chunk is named by `verify`, and the next run writes the store again.
#[test]
fn a_zarr_export_holds_the_values_and_a_changed_chunk_is_named() {
    use crate::reliability::{assert_success, base_pipeline, run_cli, tiny_project, StudySpec};
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    tiny_project(dir, &StudySpec::default());
    let text = base_pipeline()
        .replace(
            "    params: { window: [-0.5, -0.2], mode: subtract }\n",
            "    params: { window: [-0.5, -0.2], mode: subtract }\n    export: true\n    format: zarr\n",
        )
        .replace("    export: true\n", "    export: true\n    format: zarr\n")
        .replace("    format: zarr\n    format: zarr\n", "    format: zarr\n");
    assert_eq!(text.matches("format: zarr").count(), 2, "{text}");
    std::fs::write(dir.join("pipeline.yaml"), &text).unwrap();
    let cache = dir.join("cache");
    let cache_arg = cache.to_str().unwrap();
    assert_success(
        &run_cli(dir, &["run", "pipeline.yaml", "--cache", cache_arg]),
        "run",
    );
    let output = dir.join("results");
    let manifest: phasewise::manifest::Manifest =
        serde_json::from_slice(&std::fs::read(output.join("manifest.json")).unwrap()).unwrap();
    let store = Store::new(&cache);
    let mut stores = 0;
    for u in manifest
        .units
        .iter()
        .filter(|u| u.stage == "norm" || u.stage == "group")
    {
        let record = &u.outputs[0];
        let file = record.file.clone().expect("exported");
        let owner = u.subject.clone().unwrap_or_else(|| "group".into());
        assert_eq!(file, format!("{owner}/{}.zarr", u.stage));
        let root = output.join(&file);
        assert!(!output.join(format!("{owner}/{}.npy", u.stage)).exists());
        // The manifest lists every file of the store with its blake3.
        let hashes = record.store.clone().expect("store hashes in the manifest");
        assert_eq!(Some(hashes.clone()), phasewise::zarr::hash_store(&root));
        // Group and values metadata (Zarr v3 core: zarr.json per node).
        let read = |rel: &str| -> serde_json::Value {
            serde_json::from_slice(&std::fs::read(root.join(rel)).unwrap()).unwrap()
        };
        let group = read("zarr.json");
        assert_eq!(group["node_type"], "group");
        assert_eq!(group["attributes"]["format"], "phasewise-array");
        assert_eq!(group["attributes"]["format_version"], 2);
        assert_eq!(group["attributes"]["blake3"], record.blake3.as_str());
        let values = read(&format!("{}/zarr.json", u.stage));
        let (cached, _) = store.load(&u.key).unwrap();
        assert_eq!(values["zarr_format"], 3);
        assert_eq!(
            values["dimension_names"],
            serde_json::json!(cached.layout.dims)
        );
        assert_eq!(values["attributes"]["coordinates"], "channel_a channel_b");
        let codecs: Vec<&str> = values["codecs"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c["name"].as_str().unwrap())
            .collect();
        assert_eq!(codecs, ["bytes", "gzip", "crc32c"]);
        if cached.layout.dims.iter().any(|d| d == "freq") {
            assert_eq!(read("freq/zarr.json")["attributes"]["units"], "Hz");
            assert_eq!(read("time/zarr.json")["attributes"]["units"], "s");
        }
        for c in ["channel_a", "channel_b"] {
            assert_eq!(
                read(&format!("{c}/zarr.json"))["dimension_names"],
                serde_json::json!(["pair"])
            );
        }
        // The values, decoded by zarrs, are the cached object's bit for bit.
        let fs = std::sync::Arc::new(zarrs::filesystem::FilesystemStore::new(&root).unwrap());
        let array = zarrs::array::Array::open(fs, &format!("/{}", u.stage)).unwrap();
        let decoded: Vec<f32> = array.retrieve_array_subset(&array.subset_all()).unwrap();
        let want: Vec<u32> = real(&cached.values).iter().map(|v| v.to_bits()).collect();
        assert_eq!(
            decoded.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
            want
        );
        stores += 1;
    }
    assert_eq!(stores, 3, "two subjects' norm and the group");
    // A rerun computes nothing and rewrites nothing.
    let before = export_stats(&output);
    std::thread::sleep(std::time::Duration::from_millis(20));
    assert_success(
        &run_cli(dir, &["run", "pipeline.yaml", "--cache", cache_arg]),
        "rerun",
    );
    assert_eq!(
        export_stats(&output),
        before,
        "a no-op rerun rewrote a store"
    );
    assert_success(
        &run_cli(dir, &["verify", "results/manifest.json"]),
        "verify",
    );
    // One byte of one chunk changed: verify names the store and the chunk.
    let chunk = phasewise::zarr::store_files(&output.join("group/group.zarr"))
        .unwrap()
        .into_iter()
        .find(|(name, _)| name.starts_with("group/c/"))
        .expect("a chunk of the group's values");
    let mut bytes = std::fs::read(&chunk.1).unwrap();
    bytes[0] ^= 0x20;
    std::fs::write(&chunk.1, &bytes).unwrap();
    let verify = run_cli(dir, &["verify", "results/manifest.json"]);
    let said = format!(
        "{}{}",
        String::from_utf8_lossy(&verify.stdout),
        String::from_utf8_lossy(&verify.stderr)
    );
    assert!(!verify.status.success(), "{said}");
    assert!(
        said.contains("group/group.zarr changed since the run") && said.contains(&chunk.0),
        "{said}"
    );
    // The next run notices the changed file and writes the store again, whole.
    assert_success(
        &run_cli(dir, &["run", "pipeline.yaml", "--cache", cache_arg]),
        "run after the damage",
    );
    assert_eq!(std::fs::read(&chunk.1).unwrap()[0], bytes[0] ^ 0x20);
    assert_success(
        &run_cli(dir, &["verify", "results/manifest.json"]),
        "verify again",
    );
}
