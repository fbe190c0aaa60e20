//! End-to-end: the bundled demo study through the command line.
//!
//! The demo study in `demo-data/` was written by `phasewise simulate` with a planted, lagged theta
//! coupling between two sites after one cue type only, and one generator that two neighbouring
//! sites record at zero lag (volume conduction). Its `truth.json` names both. These tests check
//! that `pipelines/demo.yaml` finds what was planted, that it is not fooled by the zero-lag pair
//! where it should not be, that `demo-data/` is exactly what the documented command writes, and
//! that a baseline change reruns only the baseline and aggregate units.
//!
//! The planted values are the outside reference here: they are inputs to the generator, not
//! outputs of the code under test.

use crate::reliability;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use ndarray::{ArrayD, Axis};
use serde_json::Value;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

pub(crate) fn phasewise(args: &[&str], dir: &Path) -> Output {
    let out = Command::new(env!("CARGO_BIN_EXE_phasewise"))
        .args(args)
        .current_dir(dir)
        .output()
        .expect("the phasewise binary runs");
    let text = String::from_utf8_lossy(&out.stderr);
    assert!(!text.contains("panicked"), "phasewise panicked:\n{text}");
    out
}

pub(crate) fn read_json(path: &Path) -> Value {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

/// A labelled array as written to disk: the NPY values and the sidecar's dims and coords.
struct Saved {
    values: ArrayD<f32>,
    dims: Vec<String>,
    coords: Vec<Value>,
}

impl Saved {
    fn load(npy: &Path, layout: &Value) -> Saved {
        let values: ArrayD<f32> =
            ndarray_npy::read_npy(npy).unwrap_or_else(|e| panic!("{}: {e}", npy.display()));
        let dims = layout["dims"]
            .as_array()
            .expect("dims")
            .iter()
            .map(|d| d.as_str().expect("dim name").to_string())
            .collect();
        // An exported sidecar (format 2: coordinates by name, pairs as channel_a/channel_b)
        // read back into one `{kind, values}` list per axis, as a cache record lists them.
        let coords = if layout["attrs"]["format_version"] == 2 {
            let (_, coords) = phasewise::output::sidecar_axes(layout).expect("sidecar");
            coords
                .iter()
                .map(|c| serde_json::to_value(c).unwrap())
                .collect()
        } else {
            layout["coords"].as_array().expect("coords").clone()
        };
        Saved {
            values,
            dims,
            coords,
        }
    }

    fn axis(&self, name: &str) -> usize {
        self.dims
            .iter()
            .position(|d| d == name)
            .unwrap_or_else(|| panic!("no axis {name} in {:?}", self.dims))
    }

    fn coord_values(&self, name: &str) -> &Vec<Value> {
        self.coords[self.axis(name)]["values"]
            .as_array()
            .expect("coord values")
    }

    fn label_index(&self, name: &str, label: &str) -> usize {
        self.coord_values(name)
            .iter()
            .position(|v| v.as_str() == Some(label))
            .unwrap_or_else(|| panic!("no {label} on axis {name}"))
    }

    fn pairs(&self) -> Vec<[String; 2]> {
        self.coord_values("pair")
            .iter()
            .map(|p| {
                let p = p.as_array().expect("pair");
                [
                    p[0].as_str().unwrap().to_string(),
                    p[1].as_str().unwrap().to_string(),
                ]
            })
            .collect()
    }

    /// Fix one axis at index `i` (the axis disappears).
    fn at(&self, name: &str, i: usize) -> Saved {
        let k = self.axis(name);
        let mut dims = self.dims.clone();
        dims.remove(k);
        let mut coords = self.coords.clone();
        coords.remove(k);
        Saved {
            values: self.values.index_axis(Axis(k), i).to_owned(),
            dims,
            coords,
        }
    }

    /// Mean over the entries of a numeric axis that lie in [lo, hi] (NaN-aware; axis disappears).
    fn mean_in(&self, name: &str, lo: f64, hi: f64) -> Saved {
        let k = self.axis(name);
        let keep: Vec<usize> = self
            .coord_values(name)
            .iter()
            .enumerate()
            .filter(|(_, v)| (lo..=hi).contains(&v.as_f64().unwrap()))
            .map(|(i, _)| i)
            .collect();
        assert!(!keep.is_empty(), "no {name} in [{lo}, {hi}]");
        let picked = self.values.select(Axis(k), &keep);
        let values = picked.map_axis(Axis(k), |lane| {
            let finite: Vec<f64> = lane
                .iter()
                .filter(|v| v.is_finite())
                .map(|v| *v as f64)
                .collect();
            (finite.iter().sum::<f64>() / finite.len() as f64) as f32
        });
        let mut dims = self.dims.clone();
        dims.remove(k);
        let mut coords = self.coords.clone();
        coords.remove(k);
        Saved {
            values,
            dims,
            coords,
        }
    }

    /// The values of a 1-d result.
    fn vector(&self) -> Vec<f64> {
        assert_eq!(
            self.values.ndim(),
            1,
            "expected one axis left, have {:?}",
            self.dims
        );
        self.values.iter().map(|v| *v as f64).collect()
    }
}

fn pair_index(pairs: &[[String; 2]], pair: &[String; 2]) -> usize {
    pairs
        .iter()
        .position(|p| p == pair)
        .unwrap_or_else(|| panic!("pair {pair:?} not in the output"))
}

fn string_pair(v: &Value) -> [String; 2] {
    let p = v.as_array().expect("a pair");
    [p[0].as_str().unwrap().into(), p[1].as_str().unwrap().into()]
}

fn statuses(manifest: &Value) -> Vec<(String, String)> {
    manifest["units"]
        .as_array()
        .expect("units")
        .iter()
        .map(|u| {
            (
                u["stage"].as_str().unwrap().to_string(),
                u["status"].as_str().unwrap().to_string(),
            )
        })
        .collect()
}

/// Lay out a project in a temporary folder: `pipelines/demo.yaml` copied, `demo-data` linked, so
/// outputs and cache stay out of the repository.
fn project() -> tempfile::TempDir {
    project_with("demo.yaml")
}

/// [`project`] with another pipeline of `pipelines/`.
fn project_with(pipeline: &str) -> tempfile::TempDir {
    let tmp = tempfile::tempdir().unwrap();
    std::fs::create_dir(tmp.path().join("pipelines")).unwrap();
    std::fs::copy(
        repo().join("pipelines").join(pipeline),
        tmp.path().join("pipelines").join(pipeline),
    )
    .unwrap();
    std::os::unix::fs::symlink(repo().join("demo-data"), tmp.path().join("demo-data")).unwrap();
    tmp
}

#[test]
fn demo_pipeline_finds_the_planted_coupling_and_reruns_only_what_a_change_touches() {
    let tmp = project();
    let root = tmp.path();
    let truth = read_json(&repo().join("demo-data/truth.json"));
    let pipeline = std::fs::read_to_string(root.join("pipelines/demo.yaml")).unwrap();
    // demo.yaml names the conditions after the cues: `left: [cue-left], right: [cue-right]`.
    assert!(pipeline.contains("left: [cue-left], right: [cue-right]"));
    let condition = match truth["coupling"]["condition"].as_str().unwrap() {
        "cue-left" => ("left", "right"),
        "cue-right" => ("right", "left"),
        other => panic!("unexpected planted condition {other}"),
    };

    let run = phasewise(&["run", "pipelines/demo.yaml"], root);
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let out = root.join("results/demo");
    let manifest = read_json(&out.join("manifest.json"));

    // 1. The planted pair has the largest baseline-corrected group ppc in the planted band and
    //    window, for the planted condition, clearly above the other condition.
    let group = Saved::load(
        &out.join("group/group.npy"),
        &read_json(&out.join("group/group.json")),
    );
    let freq = truth["coupling"]["frequency_hz"].as_f64().unwrap();
    let window = truth["coupling"]["window_s"].as_array().unwrap();
    let (w0, w1) = (window[0].as_f64().unwrap(), window[1].as_f64().unwrap());
    let bands = read_json(&out.join("group/group.json"))["attrs"]["bands"].clone();
    let band = bands
        .as_object()
        .unwrap()
        .iter()
        .find(|(_, r)| (r[0].as_f64().unwrap()..=r[1].as_f64().unwrap()).contains(&freq))
        .map(|(name, _)| name.clone())
        .expect("a band holding the planted frequency");
    let windows = read_json(&out.join("group/group.json"))["attrs"]["windows"].clone();
    let late = windows
        .as_object()
        .unwrap()
        .iter()
        .find(|(_, r)| r[0].as_f64().unwrap() == w0 && r[1].as_f64().unwrap() == w1)
        .map(|(name, _)| name.clone())
        .expect("a window equal to the planted one");
    let ppc_of = |cond: &str| {
        let g = group.at("statistic", group.label_index("statistic", "mean"));
        let g = g.at("subject", g.label_index("subject", "group"));
        let g = g.at("condition", g.label_index("condition", cond));
        let g = g.at("measure", g.label_index("measure", "ppc"));
        let g = g.at("band", g.label_index("band", &band));
        g.at("window", g.label_index("window", &late)).vector()
    };
    let pairs = group.pairs();
    let planted = pair_index(&pairs, &string_pair(&truth["coupling"]["pair"]));
    let on = ppc_of(condition.0);
    let off = ppc_of(condition.1);
    let best = (0..on.len())
        .max_by(|&a, &b| on[a].total_cmp(&on[b]))
        .unwrap();
    assert_eq!(
        best, planted,
        "largest ppc at {:?} = {}, planted {:?} = {}",
        pairs[best], on[best], pairs[planted], on[planted]
    );
    // "Clearly above": measured 0.147 against 0.006 when this test was written; the bound asks
    // for a difference of at least 0.08 and at least three times the other condition's value.
    assert!(
        on[planted] - off[planted] > 0.08 && on[planted] > 3.0 * off[planted].abs(),
        "planted {} vs other {}",
        on[planted],
        off[planted]
    );

    // 2. The zero-lag pair: highest plv of all pairs, yet icoh near zero and wpli no higher than
    //    an unrelated pair's (raw clustering values, before the baseline, from the cache).
    let zero_lag = string_pair(&truth["volume_conduction"]["pair"]);
    let cache = root.join("pipelines/.phasewise");
    for unit in manifest["units"].as_array().unwrap() {
        if unit["stage"] != "sync" {
            continue;
        }
        let key = unit["key"].as_str().unwrap();
        let npy = cache
            .join("objects")
            .join(&key[..2])
            .join(format!("{key}.npy"));
        // The object record packs long numeric axes; its layout, written the way exported
        // sidecars write it, lists every coordinate.
        let record: phasewise::store::ObjectRecord =
            serde_json::from_value(read_json(&npy.with_extension("json"))).unwrap();
        let layout = serde_json::to_value(&record.layout).unwrap();
        let sync = Saved::load(&npy, &layout);
        let sync = sync
            .at("condition", 0)
            .mean_in("freq", 4.0, 8.0)
            .mean_in("time", -0.5, 1.0);
        let pairs = sync.pairs();
        let i = pair_index(&pairs, &zero_lag);
        let measure = |m: &str| sync.at("measure", sync.label_index("measure", m)).vector();
        let (plv, wpli, icoh) = (measure("plv"), measure("wpli"), measure("icoh"));
        let subject = unit["subject"].as_str().unwrap();
        let top = (0..plv.len())
            .max_by(|&a, &b| plv[a].total_cmp(&plv[b]))
            .unwrap();
        assert_eq!(top, i, "subject {subject}: largest plv at {:?}", pairs[top]);
        assert!(plv[i] > 0.45, "subject {subject}: plv {}", plv[i]);
        assert!(icoh[i].abs() < 0.05, "subject {subject}: icoh {}", icoh[i]);
        // Without lagged coupling the imaginary parts are symmetric about zero and wpli sits at
        // its noise floor: for N trials with Gaussian Im S_n, |Σ Im| ≈ √N·sd and Σ|Im| ≈
        // N·sd·√(2/π), so E[wpli] ≈ √(2/π)·√(π/2)/√N = 1/√N ≈ 0.16 for N = 40 (derived here).
        // The bound allows about twice that, and asks the planted pair, in its window, for at
        // least twice the zero-lag pair's value.
        assert!(wpli[i] < 0.3, "subject {subject}: wpli {}", wpli[i]);
        let during = Saved::load(&npy, &layout);
        let during = during
            .at("condition", during.label_index("condition", condition.0))
            .mean_in("freq", 4.0, 8.0)
            .mean_in("time", w0, w1);
        let wpli_planted = during
            .at("measure", during.label_index("measure", "wpli"))
            .vector();
        let k = pair_index(&pairs, &string_pair(&truth["coupling"]["pair"]));
        assert!(
            wpli_planted[k] > 2.0 * wpli[i],
            "subject {subject}: planted wpli {} vs zero-lag wpli {}",
            wpli_planted[k],
            wpli[i]
        );
    }

    // 3. Right after the run every unit is fresh; a baseline change reruns only baseline and
    //    aggregate units.
    let plan = phasewise(&["plan", "pipelines/demo.yaml"], root);
    let text = String::from_utf8_lossy(&plan.stdout);
    assert!(plan.status.success());
    let units: Vec<&str> = text.lines().filter(|l| l.contains(" [")).collect();
    assert_eq!(units.len(), statuses(&manifest).len(), "{text}");
    assert!(units.iter().all(|l| l.starts_with("fresh")), "{text}");
    let rerun = phasewise(
        &[
            "run",
            "pipelines/demo.yaml",
            "--set",
            "norm.window=[-0.4,-0.1]",
        ],
        root,
    );
    assert!(
        rerun.status.success(),
        "{}",
        String::from_utf8_lossy(&rerun.stderr)
    );
    let after = read_json(&out.join("manifest.json"));
    for (stage, status) in statuses(&after) {
        let expected = if stage == "norm" || stage == "group" {
            "computed"
        } else {
            "cached"
        };
        assert_eq!(status, expected, "stage {stage}");
    }
}

#[test]
fn stats_pipeline_finds_the_planted_coupling_as_one_significant_cluster() {
    // pipelines/stats.yaml: left − right across the 6 demo subjects, cluster correction over all
    // pairs of each measure, all 2^6 = 64 sign patterns. A pattern and its mirror image give the
    // same largest |mass|, so the smallest p is 2/64.
    let tmp = project_with("stats.yaml");
    let root = tmp.path();
    let truth = read_json(&repo().join("demo-data/truth.json"));
    let run = phasewise(&["run", "pipelines/stats.yaml"], root);
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let table = std::fs::read_to_string(root.join("results/stats/contrast.tsv")).unwrap();
    let mut lines = table.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    assert_eq!(
        header,
        [
            "measure",
            "channel_a",
            "channel_b",
            "cluster",
            "freq_from",
            "freq_to",
            "time_from",
            "time_to",
            "mass",
            "peak_t",
            "p",
            "significant"
        ]
    );
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split('\t').collect()).collect();
    assert!(!rows.is_empty());
    let planted = string_pair(&truth["coupling"]["pair"]);
    let zero_lag = string_pair(&truth["volume_conduction"]["pair"]);
    let freq = truth["coupling"]["frequency_hz"].as_f64().unwrap();
    let window = truth["coupling"]["window_s"].as_array().unwrap();
    let (w0, w1) = (window[0].as_f64().unwrap(), window[1].as_f64().unwrap());
    let num = |s: &str| s.parse::<f64>().unwrap();
    let significant: Vec<&Vec<&str>> = rows.iter().filter(|r| r[11] == "true").collect();
    for measure in ["ppc", "wpli"] {
        let found: Vec<_> = significant.iter().filter(|r| r[0] == measure).collect();
        assert_eq!(found.len(), 1, "{measure}: {found:?}");
        let r = found[0];
        assert_eq!(
            [r[1], r[2]],
            [planted[0].as_str(), planted[1].as_str()],
            "{r:?}"
        );
        assert!(num(r[4]) <= freq && freq <= num(r[5]), "band {r:?}");
        assert!(num(r[6]) < w1 && num(r[7]) > w0, "window {r:?}");
        assert!(num(r[8]) > 0.0, "left > right: {r:?}");
        // Measured 0.03125 = 2/64, the smallest p 64 patterns allow.
        assert!(num(r[10]) < 0.05, "{r:?}");
    }
    // Every significant cluster is on the planted pair; none on the zero-lag pair in any measure.
    for r in &significant {
        assert_eq!(
            [r[1], r[2]],
            [planted[0].as_str(), planted[1].as_str()],
            "{r:?}"
        );
    }
    assert!(rows
        .iter()
        .filter(|r| [r[1], r[2]] == [zero_lag[0].as_str(), zero_lag[1].as_str()])
        .all(|r| r[11] == "false"));
}

/// The rows of a contrast findings table (header checked by the test above), split at tabs.
fn findings(path: &Path) -> Vec<Vec<String>> {
    let table = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    table
        .lines()
        .skip(1)
        .map(|l| l.split('\t').map(String::from).collect())
        .collect()
}

#[test]
fn a_ten_subject_study_finds_the_planted_coupling_with_a_thousand_sign_flips() {
    // The demo's scenario with 10 participants (the simulator's subject k does not depend on how
    // many there are, so sub-01..06 are the demo's): 2^10 = 1024 sign patterns, all enumerated,
    // so the smallest p is 2/1024. Five pairs keep it small: the planted one, the zero-lag decoy
    // and three others, all tested as one family per measure.
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    let config = phasewise_stages::simulate::SimulateConfig::new(10, 1);
    phasewise_stages::simulate::write_study(&root.join("data"), &config).unwrap();
    let truth = read_json(&root.join("data/truth.json"));
    let planted = string_pair(&truth["coupling"]["pair"]);
    let zero_lag = string_pair(&truth["volume_conduction"]["pair"]);
    assert_eq!(truth["coupling"]["condition"], "cue-left");
    let stats = std::fs::read_to_string(repo().join("pipelines/stats.yaml")).unwrap();
    let pairs = format!(
        "[[{}, {}], [{}, {}], [F4, P3], [C3, C4], [Fz, Pz]]",
        planted[0], planted[1], zero_lag[0], zero_lag[1]
    );
    let pipeline = stats.replace("../demo-data/", "../data/").replace(
        "measure: [plv, ppc, pli, wpli, dwpli, icoh], pairs: all,",
        &format!("measure: [ppc, wpli, icoh], pairs: {pairs},"),
    );
    assert!(pipeline.contains(&pairs) && pipeline.contains("../data/sub-*"));
    std::fs::create_dir(root.join("pipelines")).unwrap();
    std::fs::write(root.join("pipelines/stats.yaml"), pipeline).unwrap();
    let run = phasewise(&["run", "pipelines/stats.yaml"], root);
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let extra = &read_json(&root.join("results/stats/group/contrast.json"))["attrs"];
    assert_eq!(extra["patterns"], 1024, "{extra}");
    assert_eq!(extra["exact"], true, "{extra}");
    let rows = findings(&root.join("results/stats/contrast.tsv"));
    let freq = truth["coupling"]["frequency_hz"].as_f64().unwrap();
    let window = truth["coupling"]["window_s"].as_array().unwrap();
    let (w0, w1) = (window[0].as_f64().unwrap(), window[1].as_f64().unwrap());
    let num = |s: &str| s.parse::<f64>().unwrap();
    let is = |r: &Vec<String>, pair: &[String; 2]| r[1] == pair[0] && r[2] == pair[1];
    let significant: Vec<&Vec<String>> = rows.iter().filter(|r| r[11] == "true").collect();
    for measure in ["ppc", "wpli"] {
        let found: Vec<_> = significant.iter().filter(|r| r[0] == measure).collect();
        assert_eq!(found.len(), 1, "{measure}: {found:?}");
        let r = found[0];
        assert!(is(r, &planted), "{r:?}");
        assert!(num(&r[4]) <= freq && freq <= num(&r[5]), "band {r:?}");
        assert!(num(&r[6]) < w1 && num(&r[7]) > w0, "window {r:?}");
        assert!(num(&r[8]) > 0.0, "left > right: {r:?}");
        assert!(num(&r[10]) < 0.05, "{r:?}");
        println!("{measure}: planted cluster p = {}", r[10]);
    }
    for r in &significant {
        assert!(is(r, &planted), "only the planted pair: {r:?}");
    }
    for measure in ["wpli", "icoh"] {
        assert!(
            rows.iter()
                .filter(|r| r[0] == measure && is(r, &zero_lag))
                .all(|r| r[11] == "false"),
            "zero-lag decoy in {measure}"
        );
    }
}

/// Every file below `dir`, relative to it, sorted.
fn files(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for entry in std::fs::read_dir(&d).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                stack.push(path);
            } else {
                out.push(path.strip_prefix(dir).unwrap().to_path_buf());
            }
        }
    }
    out.sort();
    out
}

#[test]
fn demo_data_is_what_the_documented_command_writes() {
    // README: `phasewise simulate --out demo-data --subjects 6 --seed 1`.
    let tmp = tempfile::tempdir().unwrap();
    let fresh = tmp.path().join("demo-data");
    let out = phasewise(
        &[
            "simulate",
            "--out",
            fresh.to_str().unwrap(),
            "--subjects",
            "6",
            "--seed",
            "1",
        ],
        tmp.path(),
    );
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let committed = repo().join("demo-data");
    assert_eq!(files(&fresh), files(&committed));
    for rel in files(&committed) {
        let a = std::fs::read(committed.join(&rel)).unwrap();
        let b = std::fs::read(fresh.join(&rel)).unwrap();
        assert!(a == b, "{} differs from a fresh simulation", rel.display());
    }
}

#[test]
fn new_writes_a_pipeline_that_fits_the_demo_data_and_plans() {
    let tmp = tempfile::tempdir().unwrap();
    let file = tmp.path().join("study.yaml");
    let data = repo().join("demo-data");
    let out = phasewise(
        &[
            "new",
            "--data",
            data.to_str().unwrap(),
            "--out",
            file.to_str().unwrap(),
        ],
        tmp.path(),
    );
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let summary = String::from_utf8_lossy(&out.stdout);
    // truth.json: 6 subjects × 40 cues of each type, 2.6–3.2 s apart, 19 EEG sites + VEOG at 250 Hz.
    assert!(summary.contains("recordings: 6"), "{summary}");
    assert!(
        summary.contains("cue-left: 240") && summary.contains("cue-right: 240"),
        "{summary}"
    );
    assert!(
        summary.contains("channels (EEG, 19)") && summary.contains("channels (EOG, 1): VEOG"),
        "{summary}"
    );
    // demo-data has an electrodes sidecar per recording (written by `simulate`): `new` says so.
    assert!(
        summary.contains("electrode positions: 19 channels, from sub-01_task-cue_electrodes.tsv"),
        "{summary}"
    );
    let text = std::fs::read_to_string(&file).unwrap();
    // The sidecars' PowerLineFrequency (50 Hz) and dataset_description.json's Name are used.
    assert!(text.contains("params: { freqs: [50],"), "{text}");
    assert!(
        text.contains("sidecars give (PowerLineFrequency)"),
        "{text}"
    );
    assert!(!text.contains("CONFIRM the mains frequency"), "{text}");
    assert!(
        text.contains("name: \"phasewise demo: simulated two-cue study\""),
        "{text}"
    );
    assert!(text.contains("output: results/demo-data "), "{text}");
    // 240 events of each label: nothing to equalise.
    assert!(!text.contains("equalize"), "{text}");
    // The written pipeline is valid for this data: `plan` accepts it (every unit not cached yet).
    let plan = phasewise(&["plan", file.to_str().unwrap()], tmp.path());
    let stdout = String::from_utf8_lossy(&plan.stdout);
    assert!(
        plan.status.success(),
        "{}\n{stdout}",
        String::from_utf8_lossy(&plan.stderr)
    );
    assert!(stdout.contains("37 of 37 units stale"), "{stdout}");
    // Never overwrite.
    let again = phasewise(
        &[
            "new",
            "--data",
            data.to_str().unwrap(),
            "--out",
            file.to_str().unwrap(),
        ],
        tmp.path(),
    );
    assert!(!again.status.success());
    assert!(String::from_utf8_lossy(&again.stderr).contains("already exists"));
}

/// The demo study's first `n` subjects in `root/<folder>/`: with `brainvision`, each EDF written
/// as BrainVision by the tests' writer (IEEE_FLOAT_32 in µV) with its channels sidecar and no
/// events sidecar, so that the events come from the markers; else the EDF and both sidecars.
pub(crate) fn demo_subjects(root: &Path, folder: &str, n: usize, brainvision: bool) {
    for s in 1..=n {
        let rel = format!("sub-{s:02}/eeg/sub-{s:02}_task-cue");
        let from = repo().join("demo-data").join(&rel);
        let to = root.join(folder).join(&rel);
        std::fs::create_dir_all(to.parent().unwrap()).unwrap();
        let with = |base: &Path, suffix: &str| PathBuf::from(format!("{}{suffix}", base.display()));
        std::fs::copy(with(&from, "_channels.tsv"), with(&to, "_channels.tsv")).unwrap();
        if brainvision {
            reliability::brainvision::convert(&with(&from, "_eeg.edf"), &with(&to, "_eeg.vhdr"));
        } else {
            for suffix in ["_eeg.edf", "_events.tsv"] {
                std::fs::copy(with(&from, suffix), with(&to, suffix)).unwrap();
            }
        }
    }
}

/// The demo pipeline pointed at `recordings` with `events`, writing to `output`.
pub(crate) fn demo_pipeline_for(recordings: &str, events: &str, output: &str) -> String {
    let text = std::fs::read_to_string(repo().join("pipelines/demo.yaml")).unwrap();
    let replaced = text
        .replace(
            "\"../demo-data/sub-*/eeg/*_eeg.edf\"",
            &format!("\"{recordings}\""),
        )
        .replace("events: sidecar", &format!("events: {events}"))
        .replace("output: ../results/demo", &format!("output: {output}"));
    assert!(
        replaced.contains(recordings) && replaced.contains(output),
        "{replaced}"
    );
    replaced
}

// Issue 26: the demo study written as BrainVision gives the EDF original's connectivity. The
// writer stores each EDF value v (f32 volts, as phasewise reads the EDF) as f32(v · 10^6) µV and
// the reader returns f32(stored · 10^-6): two roundings, each at most 2^-24 relative (IEEE 754
// binary32), so every input sample agrees within 2^-23 ≈ 1.2e-7 relative. Events come from
// the markers here (positions round(onset · fs) + 1), the EDF run's from events.tsv; the epoch
// op takes the sample nearest onset · fs, the same sample for both.
#[test]
fn demo_study_as_brainvision_gives_the_edf_results() {
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    demo_subjects(root, "edf", 2, false);
    demo_subjects(root, "bv", 2, true);
    std::fs::create_dir(root.join("pipelines")).unwrap();
    let edf = demo_pipeline_for("../edf/sub-*/eeg/*_eeg.edf", "sidecar", "../results/edf");
    let bv = demo_pipeline_for("../bv/sub-*/eeg/*_eeg.vhdr", "annotations", "../results/bv");
    std::fs::write(root.join("pipelines/edf.yaml"), edf).unwrap();
    std::fs::write(root.join("pipelines/bv.yaml"), bv).unwrap();
    for name in ["edf", "bv"] {
        let run = phasewise(&["run", &format!("pipelines/{name}.yaml")], root);
        assert!(
            run.status.success(),
            "{name}: {}",
            String::from_utf8_lossy(&run.stderr)
        );
    }
    assert_group_results_agree(root, "edf", "bv");

    // The data file is part of the recording's key: a changed sample makes sub-01 stale.
    let data = root.join("bv/sub-01/eeg/sub-01_task-cue_eeg.eeg");
    let mut bytes = std::fs::read(&data).unwrap();
    bytes[..4].copy_from_slice(&1.5f32.to_le_bytes());
    std::fs::write(&data, bytes).unwrap();
    let plan = phasewise(&["plan", "pipelines/bv.yaml"], root);
    let stdout = String::from_utf8_lossy(&plan.stdout);
    assert!(
        plan.status.success(),
        "{}",
        String::from_utf8_lossy(&plan.stderr)
    );
    assert!(
        stdout.contains("input file changed") && stdout.contains("sub-01_task-cue_eeg.eeg"),
        "{stdout}"
    );

    // `phasewise new` recognises the BrainVision headers and reads the markers.
    let new = phasewise(&["new", "--data", "bv"], root);
    let summary = String::from_utf8_lossy(&new.stderr);
    assert!(new.status.success(), "{summary}");
    assert!(
        summary.contains("recordings: 2 (pattern sub-*/eeg/*_eeg.vhdr, BrainVision")
            && summary.contains("events (from BrainVision markers)")
            && summary.contains("cue-left: 80")
            && summary.contains("channels (EOG, 1): VEOG"),
        "{summary}"
    );
}

// Issue 26: the demo study written as NWB by pynwb (tests/reference/nwb_demo.py, pinned pynwb
// 4.2.0) gives the EDF original's connectivity. The script stores pyEDFlib's physical values
// × 1e-6 as float32 volts (conversion 1, offset 0); phasewise reads the EDF as f32 of the same
// f64 volts, so every input sample agrees within one f32 rounding (2^-24 relative, IEEE 754
// binary32), less than the BrainVision case above, and the same 1e-6 tolerance applies for the
// same reasons. Events come from the NWB trials table (start_time = the events.tsv onset).
// The NWB files are written by CI (.ci/run) before this test runs, into the folder that
// PHASEWISE_NWB_DEMO names: they are large and pynwb's bytes differ from run to run, so they
// are not committed fixtures. Run by hand:
//   python tests/reference/nwb_demo.py demo-data /tmp/nwb-demo
//   PHASEWISE_NWB_DEMO=/tmp/nwb-demo cargo test --features nwb --test it nwb -- --ignored
#[test]
#[ignore = "needs the NWB demo files of tests/reference/nwb_demo.py and --features nwb"]
fn demo_study_as_nwb_gives_the_edf_results() {
    let nwb = PathBuf::from(
        std::env::var("PHASEWISE_NWB_DEMO").expect("PHASEWISE_NWB_DEMO names the NWB demo folder"),
    );
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    demo_subjects(root, "edf", 2, false);
    std::os::unix::fs::symlink(&nwb, root.join("nwb")).unwrap();
    std::fs::create_dir(root.join("pipelines")).unwrap();
    let edf = demo_pipeline_for("../edf/sub-*/eeg/*_eeg.edf", "sidecar", "../results/edf");
    let from_nwb = demo_pipeline_for(
        "../nwb/sub-*/ieeg/*_ieeg.nwb",
        "annotations",
        "../results/nwb",
    );
    std::fs::write(root.join("pipelines/edf.yaml"), edf).unwrap();
    std::fs::write(root.join("pipelines/nwb.yaml"), from_nwb).unwrap();
    for name in ["edf", "nwb"] {
        let run = phasewise(&["run", &format!("pipelines/{name}.yaml")], root);
        assert!(
            run.status.success(),
            "{name}: {}",
            String::from_utf8_lossy(&run.stderr)
        );
    }
    assert_group_results_agree(root, "edf", "nwb");

    // `phasewise new` recognises the NWB files and says what it found.
    let new = phasewise(&["new", "--data", "nwb"], root);
    let summary = String::from_utf8_lossy(&new.stderr);
    assert!(new.status.success(), "{summary}");
    assert!(
        summary.contains("recordings: 2 (pattern sub-*/ieeg/*_ieeg.nwb, NWB: the ElectricalSeries acquisition/eeg")
            && summary.contains("events (from the NWB trials table)")
            && summary.contains("cue-left: 80")
            && summary.contains("channels (EOG, 1): VEOG"),
        "{summary}"
    );
}

/// The group outputs of the runs `a_name` and `b_name` (under `root/results/`) agree: the same
/// epoch counts, coords and shapes, and every measure within 1e-6 (see the tolerance's note).
fn assert_group_results_agree(root: &Path, a_name: &str, b_name: &str) {
    let out = |name: &str| root.join("results").join(name);
    // The same trials were kept (no trial sits on the rejection threshold within 1e-7).
    let counts = |name: &str| read_json(&out(name).join("manifest.json"))["epochs"].clone();
    assert_eq!(counts(a_name), counts(b_name));
    assert!(!counts(a_name).is_null());
    let load = |name: &str| {
        let json = read_json(&out(name).join("group/group.json"));
        (Saved::load(&out(name).join("group/group.npy"), &json), json)
    };
    let ((a, a_json), (b, b_json)) = (load(a_name), load(b_name));
    assert_eq!(a_json["coords"], b_json["coords"]);
    assert_eq!(a.values.shape(), b.values.shape());
    // Tolerance 1e-6 on measures of order 0.1-1: the inputs agree within 2^-23 relative, and
    // the chain (linear up to the wavelet, then ratios of sums over trials) carries that
    // through as a few f32 roundings (observed: at most 3e-8, two units in the last place).
    // pli is the exception in principle: it counts signs of Im S_n, and a sign flip would move
    // a group value by 2 / (trials × bins averaged × subjects), of order 1e-4 here (40 trials,
    // ~5 frequencies × ~38 times in a band and window, 2 subjects), over the tolerance. None
    // happens on this data (observed difference 0); a flip would mean a trial's Im S_n lies
    // within 1e-7 relative of zero, which this test would then report for a look.
    const TOLERANCE: f64 = 1e-6;
    let measures = a.coord_values("measure").clone();
    let k = a.axis("measure");
    for (m, measure) in measures.iter().enumerate() {
        let x = a.values.index_axis(Axis(k), m);
        let y = b.values.index_axis(Axis(k), m);
        let mut largest = 0.0f64;
        for (p, q) in x.iter().zip(y.iter()) {
            assert_eq!(p.is_nan(), q.is_nan(), "{measure}: NaN in one run only");
            if p.is_finite() {
                largest = largest.max((f64::from(*p) - f64::from(*q)).abs());
            }
        }
        eprintln!("{measure}: largest difference {largest:e}");
        assert!(
            largest <= TOLERANCE,
            "{measure}: {a_name} and {b_name} differ by {largest:e}"
        );
    }
}

/// The group mean ppc of every pair for `condition` in the theta band and the `late` window (the
/// measure and summary the README quotes), and the pairs.
fn group_theta_ppc(out: &Path, condition: &str) -> (Vec<[String; 2]>, Vec<f64>) {
    // demo.yaml's condition `left` holds the cue truth.json plants the coupling after.
    let truth = read_json(&repo().join("demo-data/truth.json"));
    assert_eq!(truth["coupling"]["condition"], "cue-left");
    let side = read_json(&out.join("group/group.json"));
    let group = Saved::load(&out.join("group/group.npy"), &side);
    let g = group.at("statistic", group.label_index("statistic", "mean"));
    let g = g.at("subject", g.label_index("subject", "group"));
    let g = g.at("condition", g.label_index("condition", condition));
    let g = g.at("measure", g.label_index("measure", "ppc"));
    let g = g.at("band", g.label_index("band", "theta"));
    let g = g.at("window", g.label_index("window", "late"));
    (group.pairs(), g.vector())
}

/// Per subject, the raw (before baseline) plv of `pair` in 4–8 Hz over −0.5…1.0 s of the first
/// condition, from the cached `sync` units of a run.
fn raw_theta_plv(root: &Path, manifest: &Value, pair: &[String; 2]) -> Vec<f64> {
    let cache = root.join("pipelines/.phasewise/objects");
    let mut out = Vec::new();
    for unit in manifest["units"].as_array().unwrap() {
        if unit["stage"] != "sync" {
            continue;
        }
        let key = unit["key"].as_str().unwrap();
        let npy = cache.join(&key[..2]).join(format!("{key}.npy"));
        let record: phasewise::store::ObjectRecord =
            serde_json::from_value(read_json(&npy.with_extension("json"))).unwrap();
        let sync = Saved::load(&npy, &serde_json::to_value(&record.layout).unwrap());
        let sync = sync
            .at("condition", 0)
            .mean_in("freq", 4.0, 8.0)
            .mean_in("time", -0.5, 1.0);
        let i = pair_index(&sync.pairs(), pair);
        out.push(
            sync.at("measure", sync.label_index("measure", "plv"))
                .vector()[i],
        );
    }
    out
}

fn run_ok(pipeline: &str, root: &Path) -> Value {
    let run = phasewise(&["run", pipeline], root);
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let name = std::fs::read_to_string(root.join(pipeline)).unwrap();
    let output = name
        .lines()
        .find_map(|l| l.strip_prefix("output: ../"))
        .map(|l| l.split_whitespace().next().unwrap().to_string())
        .expect("an output line");
    read_json(&root.join(output).join("manifest.json"))
}

#[test]
fn after_the_laplacian_the_planted_pair_stays_and_the_zero_lag_decoy_weakens() {
    // pipelines/laplacian.yaml: demo.yaml with a surface Laplacian (positions derived from the
    // 10-20 labels) before the epochs. The planted values in truth.json are the reference.
    let tmp = project();
    let root = tmp.path();
    std::fs::copy(
        repo().join("pipelines/laplacian.yaml"),
        root.join("pipelines/laplacian.yaml"),
    )
    .unwrap();
    let truth = read_json(&repo().join("demo-data/truth.json"));
    let planted = string_pair(&truth["coupling"]["pair"]);
    let decoy = string_pair(&truth["volume_conduction"]["pair"]);
    let plain = run_ok("pipelines/demo.yaml", root);
    let surface = run_ok("pipelines/laplacian.yaml", root);

    let (pairs, ppc) = group_theta_ppc(&root.join("results/laplacian"), "left");
    let best = (0..ppc.len())
        .max_by(|&a, &b| ppc[a].total_cmp(&ppc[b]))
        .unwrap();
    eprintln!(
        "laplacian: largest group ppc {:?} = {:.3}",
        pairs[best], ppc[best]
    );
    assert_eq!(pairs[best], planted, "largest ppc at {:?}", pairs[best]);

    let (before, after) = (
        raw_theta_plv(root, &plain, &decoy),
        raw_theta_plv(root, &surface, &decoy),
    );
    eprintln!("decoy plv per subject: wavelet {before:.3?}, after the Laplacian {after:.3?}");
    assert_eq!(before.len(), after.len());
    for (b, a) in before.iter().zip(&after) {
        assert!(a < b, "the decoy's plv rose from {b} to {a}");
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    assert!(
        mean(&after) < 0.8 * mean(&before),
        "the decoy's mean plv fell only from {} to {}",
        mean(&before),
        mean(&after)
    );
}

#[test]
fn with_hilbert_instead_of_wavelet_the_planted_pair_is_still_the_strongest() {
    // demo.yaml with its `tf` stage's op replaced by `hilbert` on the aggregate's own bands:
    // the README's measure (group ppc, theta, late window, planted condition) must still be
    // largest at the planted pair of truth.json.
    let tmp = project();
    let root = tmp.path();
    let demo = std::fs::read_to_string(root.join("pipelines/demo.yaml")).unwrap();
    let swapped = demo
        .replace("output: ../results/demo", "output: ../results/hilbert")
        .replace("op: wavelet", "op: hilbert")
        .replace(
            "      freqs: { from: 4, to: 30, count: 16, spacing: log }\n      cycles: { from: 3, to: 8 }\n",
            "      bands: [[4, 8], [8, 12], [13, 30]]\n",
        );
    assert!(swapped.contains("op: hilbert") && swapped.contains("bands: [[4, 8]"));
    std::fs::write(root.join("pipelines/hilbert.yaml"), swapped).unwrap();
    run_ok("pipelines/hilbert.yaml", root);
    let truth = read_json(&repo().join("demo-data/truth.json"));
    let planted = string_pair(&truth["coupling"]["pair"]);
    let (pairs, ppc) = group_theta_ppc(&root.join("results/hilbert"), "left");
    let best = (0..ppc.len())
        .max_by(|&a, &b| ppc[a].total_cmp(&ppc[b]))
        .unwrap();
    eprintln!(
        "hilbert: largest group ppc {:?} = {:.3}",
        pairs[best], ppc[best]
    );
    assert_eq!(pairs[best], planted, "largest ppc at {:?}", pairs[best]);
}

/// Issue 23, "what it must show" 4: `sweep --vary 'tf.cycles=[4, 6, 8]'` on the demo computes
/// re-reference, notch and epoch once, the wavelet and everything after it once per variant;
/// `sweep.tsv` holds the planted pair's group value for each variant, and the planted coupling
/// (truth.json, an input of the generator) holds for every cycle count: the planted condition's
/// group ppc in the planted band and window is above the other condition's. A second sweep
/// computes nothing.
#[test]
fn demo_sweep_over_wavelet_cycles_shares_the_preprocessing_and_keeps_the_planted_pair() {
    let tmp = project();
    let root = tmp.path();
    let truth = read_json(&repo().join("demo-data/truth.json"));
    let args = [
        "sweep",
        "pipelines/demo.yaml",
        "--vary",
        "tf.cycles=[4, 6, 8]",
    ];
    let out = phasewise(&args, root);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let results = root.join("results/demo");
    let names = ["tf.cycles=4", "tf.cycles=6", "tf.cycles=8"];
    let subjects = truth["config"]["subjects"].as_u64().unwrap() as usize;
    for (i, name) in names.iter().enumerate() {
        let manifest = read_json(&results.join("variants").join(name).join("manifest.json"));
        let count = |stage: &str, status: &str| {
            statuses(&manifest)
                .iter()
                .filter(|(s, st)| s == stage && st == status)
                .count()
        };
        for stage in ["reref", "line", "trials"] {
            let expected = if i == 0 { "computed" } else { "cached" };
            assert_eq!(count(stage, expected), subjects, "{name}: {stage}");
        }
        for stage in ["sync", "norm"] {
            assert_eq!(count(stage, "computed"), subjects, "{name}: {stage}");
        }
        assert_eq!(count("group", "computed"), 1, "{name}: group");
    }

    // sweep.tsv: the planted pair, ppc, planted band and window, group rows, both conditions.
    let freq = truth["coupling"]["frequency_hz"].as_f64().unwrap();
    let window = truth["coupling"]["window_s"].as_array().unwrap();
    let first = read_json(&results.join("variants/tf.cycles=4/group/group.json"));
    let band = first["attrs"]["bands"]
        .as_object()
        .unwrap()
        .iter()
        .find(|(_, r)| (r[0].as_f64().unwrap()..=r[1].as_f64().unwrap()).contains(&freq))
        .map(|(name, _)| name.clone())
        .unwrap();
    let late = first["attrs"]["windows"]
        .as_object()
        .unwrap()
        .iter()
        .find(|(_, r)| r[0] == window[0] && r[1] == window[1])
        .map(|(name, _)| name.clone())
        .unwrap();
    let pair = string_pair(&truth["coupling"]["pair"]);
    let condition = truth["coupling"]["condition"].as_str().unwrap();
    let (on, off) = if condition == "cue-left" {
        ("left", "right")
    } else {
        ("right", "left")
    };
    let sweep = std::fs::read_to_string(results.join("sweep.tsv")).unwrap();
    let mut lines = sweep.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    let col = |name: &str| header.iter().position(|c| *c == name).unwrap();
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split('\t').collect()).collect();
    let value = |variant: &str, cond: &str| -> f64 {
        let found: Vec<&Vec<&str>> = rows
            .iter()
            .filter(|r| {
                r[col("variant")] == variant
                    && r[col("condition")] == cond
                    && r[col("measure")] == "ppc"
                    && r[col("channel_a")] == pair[0]
                    && r[col("channel_b")] == pair[1]
                    && r[col("band")] == band
                    && r[col("window")] == late
            })
            .collect();
        assert_eq!(found.len(), 1, "{variant} {cond}: {found:?}");
        assert_eq!(found[0][col("subject")], "group");
        found[0][col("mean")].parse().unwrap()
    };
    for name in names {
        let cycles = name.trim_start_matches("tf.cycles=");
        assert!(rows
            .iter()
            .any(|r| r[col("variant")] == name && r[col("tf.cycles")] == cycles));
        let (a, b) = (value(name, on), value(name, off));
        assert!(a > b, "{name}: planted {on} {a} vs {off} {b}");
    }

    // Nothing left to compute.
    let again = phasewise(&args, root);
    assert!(again.status.success());
    for name in names {
        let manifest = read_json(&results.join("variants").join(name).join("manifest.json"));
        assert!(
            statuses(&manifest).iter().all(|(_, s)| s == "cached"),
            "{name}: {:?}",
            statuses(&manifest)
        );
    }
}

/// A sweep whose second variant puts the baseline window outside the wavelet's crop (the demo
/// crops to [-0.6, 1.1] s) is refused before the first variant runs: exit 2, the bad variant
/// named, and nothing written under the output folder, not even the good variant's folder.
#[test]
fn demo_sweep_with_a_window_outside_the_crop_in_a_later_variant_writes_nothing() {
    let tmp = project();
    let root = tmp.path();
    let out = phasewise(
        &[
            "sweep",
            "pipelines/demo.yaml",
            "--vary",
            "norm.window=[[-0.28,-0.1],[-0.9,-0.5]]",
        ],
        root,
    );
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("variant norm.window=[-0.9,-0.5]") && err.contains("time axis"),
        "{err}"
    );
    // Not even the output folder (the demo's is results/demo).
    let results = root.join("results");
    assert!(
        !results.exists(),
        "the refused sweep wrote {:?}",
        reliability::files_under(&results)
    );
}
