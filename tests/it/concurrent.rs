//! Several processes sharing one cache (DESIGN §5, §8: "equal keys give equal bytes, so the
//! rename race is harmless"; no reliance on file locks for correctness).
//!
//! - Two `run` processes of the same pipeline on the same cache, started together.
//! - Two different pipelines (sharing their first stages, differing from the wavelet on)
//!   writing one cache at once.
//!
//! Each must succeed, its outputs must equal those of a run alone, and afterwards every file of
//! the shared store must be byte-equal to the object of that name in a store written by a run
//! alone: no damaged object, no half-written or temporary file left behind. Each scenario is
//! repeated a few times, as the interleaving differs from one try to the next.

use crate::reliability;

use std::fs;
use std::path::Path;
use std::process::{Output, Stdio};

use reliability::{
    assert_success, command, copy_tree, output_arrays, output_differences, run_cli, store_problems,
    tiny_project, StudySpec,
};

/// Tries per scenario.
const ROUNDS: usize = 3;

/// The second pipeline: the base one with another frequency grid from the wavelet on, its own
/// output folder; `reref`, `line` and `trials` have the same keys in both.
fn second_pipeline(base: &str) -> String {
    let changed = base
        .replace("count: 6", "count: 5")
        .replace("output: results", "output: results-b");
    assert_ne!(
        changed, base,
        "the base pipeline changed shape; update this test"
    );
    changed
}

/// A project with both pipelines and their solo reference runs, each with its own cache.
struct Project {
    _root: tempfile::TempDir,
    pristine: std::path::PathBuf,
    solo: std::path::PathBuf,
}

fn project() -> Project {
    let root = tempfile::tempdir().expect("tempdir");
    let pristine = root.path().join("pristine");
    let pipeline = tiny_project(&pristine, &StudySpec::default());
    let base = fs::read_to_string(&pipeline).expect("pipeline");
    fs::write(pristine.join("second.yaml"), second_pipeline(&base)).expect("second pipeline");
    let solo = root.path().join("solo");
    copy_tree(&pristine, &solo);
    for (file, cache) in [("pipeline.yaml", "cache-a"), ("second.yaml", "cache-b")] {
        assert_success(&run_cli(&solo, &["run", file, "--cache", cache]), file);
    }
    Project {
        _root: root,
        pristine,
        solo,
    }
}

/// Start both runs, then wait for both.
fn run_together(dir: &Path, a: &[&str], b: &[&str]) -> (Output, Output) {
    let spawn = |args: &[&str]| {
        command(dir, args)
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("start phasewise")
    };
    let first = spawn(a);
    let second = spawn(b);
    (
        first.wait_with_output().expect("wait"),
        second.wait_with_output().expect("wait"),
    )
}

#[test]
fn two_runs_of_one_pipeline_share_a_cache() {
    let p = project();
    let want = output_arrays(&p.solo.join("results"));
    for round in 0..ROUNDS {
        let work = tempfile::tempdir().expect("tempdir");
        let dir = work.path().join("project");
        copy_tree(&p.pristine, &dir);
        let args = ["run", "pipeline.yaml", "--cache", "shared"];
        let (a, b) = run_together(&dir, &args, &args);
        assert_success(&a, &format!("round {round}, first run"));
        assert_success(&b, &format!("round {round}, second run"));
        let diff = output_differences(&output_arrays(&dir.join("results")), &want);
        assert!(diff.is_empty(), "round {round}: outputs differ: {diff:?}");
        // Both runs export the same objects: a second link of one file, renamed over the
        // first, must not stay behind under its temporary name.
        let temps: Vec<_> = reliability::files_under(&dir.join("results"))
            .into_iter()
            .filter(|f| {
                f.file_name().is_some_and(|n| {
                    n.to_string_lossy()
                        .starts_with(phasewise::fsio::TEMP_PREFIX)
                })
            })
            .collect();
        assert!(
            temps.is_empty(),
            "round {round}: temporaries left in the output: {temps:?}"
        );
        let store = store_problems(&dir.join("shared"), &[&p.solo.join("cache-a")], false);
        assert!(store.is_empty(), "round {round}: store damaged: {store:?}");
    }
}

#[test]
fn two_pipelines_share_a_cache() {
    let p = project();
    let want_a = output_arrays(&p.solo.join("results"));
    let want_b = output_arrays(&p.solo.join("results-b"));
    for round in 0..ROUNDS {
        let work = tempfile::tempdir().expect("tempdir");
        let dir = work.path().join("project");
        copy_tree(&p.pristine, &dir);
        let (a, b) = run_together(
            &dir,
            &["run", "pipeline.yaml", "--cache", "shared"],
            &["run", "second.yaml", "--cache", "shared"],
        );
        assert_success(&a, &format!("round {round}, pipeline.yaml"));
        assert_success(&b, &format!("round {round}, second.yaml"));
        let diff_a = output_differences(&output_arrays(&dir.join("results")), &want_a);
        let diff_b = output_differences(&output_arrays(&dir.join("results-b")), &want_b);
        assert!(
            diff_a.is_empty(),
            "round {round}: pipeline.yaml outputs differ: {diff_a:?}"
        );
        assert!(
            diff_b.is_empty(),
            "round {round}: second.yaml outputs differ: {diff_b:?}"
        );
        let refs = [p.solo.join("cache-a"), p.solo.join("cache-b")];
        let store = store_problems(&dir.join("shared"), &[&refs[0], &refs[1]], false);
        assert!(store.is_empty(), "round {round}: store damaged: {store:?}");
    }
}
