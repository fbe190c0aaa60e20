//! Room on disk: `plan` says what a run will write, a run the disk cannot hold stops before it
//! starts, and a param that cannot work is found before anything is stored, also below an
//! `epoch` whose trial count depends on the data.

use std::fs;
use std::path::Path;

use crate::reliability::{
    assert_success, cache_objects, run_cli, stderr_of, tiny_project, StudySpec,
};

/// The tiny pipeline's `reject` line: without it every layout is known before the run.
const REJECT: &str = "      reject: { peak_to_peak: 150e-6 }\n";

/// The `room` of `plan --json`: one entry per filesystem (the tiny project keeps the cache and
/// the output on one).
fn room(dir: &Path) -> Vec<serde_json::Value> {
    let out = run_cli(dir, &["plan", "pipeline.yaml", "--json"]);
    assert_success(&out, "plan --json");
    let plan: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    plan["room"]
        .as_array()
        .expect("plan --json has `room`")
        .clone()
}

fn number(disk: &serde_json::Value, field: &str) -> u64 {
    disk[field]
        .as_u64()
        .unwrap_or_else(|| panic!("{field} in {disk}"))
}

/// The bytes of the NPY files in the cache.
fn stored_bytes(cache: &Path) -> (u64, u64) {
    let objects: Vec<_> = cache_objects(cache)
        .into_iter()
        .filter(|p| p.extension().is_some_and(|e| e == "npy"))
        .collect();
    let bytes = objects
        .iter()
        .map(|p| fs::metadata(cache.join(p)).unwrap().len())
        .sum();
    (bytes, objects.len() as u64)
}

#[test]
fn plan_says_how_much_the_run_stores_and_the_run_stores_that_much() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let pipeline = tiny_project(dir, &StudySpec::default());
    let text = fs::read_to_string(&pipeline).unwrap();
    fs::write(&pipeline, text.replace(REJECT, "")).unwrap();

    // Every layout is known: the figure is exact, and it is what the NPY files hold (each
    // file's header, at most a few hundred bytes, within the 8 KiB per object the estimate
    // adds for header, record and last block).
    let disks = room(dir);
    assert_eq!(disks.len(), 1, "{disks:?}");
    assert_eq!(disks[0]["holds"], serde_json::json!(["cache", "output"]));
    let certain = number(&disks[0], "certain");
    assert_eq!(certain, number(&disks[0], "at_most"));
    assert!(number(&disks[0], "free") > 0);
    assert_success(&run_cli(dir, &["run", "pipeline.yaml"]), "run");
    let (stored, objects) = stored_bytes(&dir.join(".phasewise"));
    assert!(objects > 0);
    assert!(stored <= certain, "stored {stored} > planned {certain}");
    assert!(certain - stored <= objects * 8192, "{certain} vs {stored}");
    // Nothing left to write.
    let disks = room(dir);
    assert_eq!(number(&disks[0], "at_most"), 0);

    // With rejection the trial counts wait for the data: what is certain is less than what is
    // stored, and the bound (every trial kept) is not.
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    tiny_project(dir, &StudySpec::default());
    let disks = room(dir);
    let (certain, at_most) = (number(&disks[0], "certain"), number(&disks[0], "at_most"));
    assert!(certain < at_most, "{certain} {at_most}");
    assert_success(&run_cli(dir, &["run", "pipeline.yaml"]), "run");
    let (stored, _) = stored_bytes(&dir.join(".phasewise"));
    assert!(
        certain <= stored && stored <= at_most,
        "{certain} {stored} {at_most}"
    );
}

#[test]
fn a_run_the_disk_cannot_hold_stops_before_it_starts_and_says_what_frees_room() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let pipeline = tiny_project(dir, &StudySpec::default());
    // Ten million frequencies, their complex coefficients stored: about 1.4 TB per subject.
    let text = fs::read_to_string(&pipeline)
        .unwrap()
        .replace(REJECT, "")
        .replace("count: 6,", "count: 10000000,")
        .replace(
            "    input: trials\n",
            "    input: trials\n    cache: true\n",
        );
    fs::write(&pipeline, text).unwrap();
    let disks = room(dir);
    let (certain, free) = (number(&disks[0], "certain"), number(&disks[0], "free"));
    assert!(
        certain > free,
        "this test needs a disk with less than {certain} bytes free (it has {free})"
    );
    let plan = run_cli(dir, &["plan", "pipeline.yaml"]);
    assert_success(&plan, "plan");
    let said = String::from_utf8_lossy(&plan.stdout).into_owned();
    assert!(
        said.contains("not enough disk space for this run"),
        "{said}"
    );

    let out = run_cli(dir, &["run", "pipeline.yaml"]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr_of(&out));
    let err = stderr_of(&out);
    assert!(err.contains("not enough disk space for this run"), "{err}");
    assert!(err.contains(".phasewise (cache and output)"), "{err}");
    assert!(err.contains("phasewise prune PIPELINE..."), "{err}");
    assert!(err.contains("--skip-room-check runs it anyway"), "{err}");
    assert!(cache_objects(&dir.join(".phasewise")).is_empty());
    assert!(!dir.join("results/manifest.json").exists());
}

#[test]
fn a_param_that_cannot_work_below_a_rejecting_epoch_is_found_before_anything_is_stored() {
    // The epoch's trial count waits for the data, but the sampling rate does not: a wavelet
    // frequency above Nyquist (64 Hz here) is refused by `plan`, and `run` stores nothing.
    for (from, to, field) in [
        ("to: 30", "to: 90", "stages.tf.params.freqs"),
        (
            "window: [-0.5, -0.2]",
            "window: [-0.9, -0.7]",
            "stages.norm.params.window",
        ),
    ] {
        let tmp = tempfile::tempdir().unwrap();
        let dir = tmp.path();
        let pipeline = tiny_project(dir, &StudySpec::default());
        let text = fs::read_to_string(&pipeline).unwrap();
        assert!(text.contains(REJECT) && text.contains(from));
        fs::write(&pipeline, text.replace(from, to)).unwrap();
        for command in ["plan", "run"] {
            let out = run_cli(dir, &[command, "pipeline.yaml"]);
            assert_eq!(out.status.code(), Some(2), "{command}: {}", stderr_of(&out));
            assert!(stderr_of(&out).contains(field), "{}", stderr_of(&out));
        }
        assert!(cache_objects(&dir.join(".phasewise")).is_empty());
    }
}
