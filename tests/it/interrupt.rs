//! A run killed with SIGKILL at any moment must leave a cache that the next run can finish from,
//! with outputs bit-identical to an uninterrupted run's (DESIGN §5: objects are written to a
//! temporary file, synced and renamed, so a killed run leaves no half object).
//!
//! The harness runs the demo pipeline (`pipelines/demo.yaml`, which also has a `cache: false`
//! stage) on the first subject of the committed demo study, once, uninterrupted, to get the
//! reference outputs and store and to measure how long a run takes; then, for 20 delays spread
//! evenly over that duration, it starts a fresh run, kills it after the delay, runs again to
//! completion and compares outputs and store with the reference. One subject keeps the test
//! near a minute on a 2-core machine.

use crate::reliability;

use std::fs;
use std::path::Path;
use std::thread::sleep;
use std::time::{Duration, Instant};

use reliability::{assert_success, command, copy_tree, output_arrays, run_cli, store_problems};

/// How many moments to kill at (issue 5).
const KILLS: u32 = 20;

/// A copy of the demo project with its first subject only: `pipelines/demo.yaml` and
/// `demo-data/sub-01/`, laid out as in the repository so the pipeline's relative paths hold.
fn demo_project(dir: &Path) {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR"));
    copy_tree(
        &repo.join("demo-data/sub-01"),
        &dir.join("demo-data/sub-01"),
    );
    fs::create_dir_all(dir.join("pipelines")).expect("mkdir");
    fs::copy(
        repo.join("pipelines/demo.yaml"),
        dir.join("pipelines/demo.yaml"),
    )
    .expect("copy the demo pipeline");
}

/// The demo pipeline's `output`, relative to the project.
const OUTPUT: &str = "results/demo";
/// The command line of a run.
const RUN: [&str; 4] = ["run", "pipelines/demo.yaml", "--cache", "cache"];

#[test]
fn a_killed_run_resumes_to_bit_identical_outputs() {
    let root = tempfile::tempdir().expect("tempdir");
    let pristine = root.path().join("pristine");
    demo_project(&pristine);
    let reference = root.path().join("reference");
    copy_tree(&pristine, &reference);
    let started = Instant::now();
    assert_success(&run(&reference), "the uninterrupted run");
    let duration = started.elapsed();
    eprintln!("uninterrupted run: {duration:?}");
    let want = output_arrays(&reference.join(OUTPUT));
    assert!(!want.is_empty(), "the reference run exported nothing");

    let mut failures = Vec::new();
    let mut left_over = 0;
    let mut killed_mid_run = 0;
    for i in 0..KILLS {
        // Delays at the midpoints of 20 equal slices of the measured run.
        let delay = duration.mul_f64((f64::from(i) + 0.5) / f64::from(KILLS));
        let dir = root.path().join(format!("kill-{i:02}"));
        copy_tree(&pristine, &dir);
        let killed_early = kill_after(&dir, delay);
        killed_mid_run += u32::from(killed_early);
        let out = run(&dir);
        let mut problems = Vec::new();
        if !out.status.success() {
            problems.push(format!(
                "the rerun failed ({:?}): {}",
                out.status.code(),
                String::from_utf8_lossy(&out.stderr)
            ));
        }
        let got = output_arrays(&dir.join(OUTPUT));
        problems.extend(reliability::output_differences(&got, &want));
        problems.extend(store_problems(
            &dir.join("cache"),
            &[&reference.join("cache")],
            true,
        ));
        left_over += reliability::leftovers(&dir.join("cache")).len();
        if !problems.is_empty() {
            failures.push(format!(
                "killed after {delay:?} (finished on its own first: {}): {}",
                !killed_early,
                problems.join("; ")
            ));
        }
    }
    // Temporary files of a killed process are harmless (never trusted), but worth seeing.
    eprintln!(
        "{killed_mid_run} of {KILLS} runs killed mid-run; {left_over} temporary files left in their stores"
    );
    // Delays are fractions of one measured run, so on a loaded machine the last few may come
    // after the end; most must still land inside a run, or the test proves nothing.
    assert!(
        killed_mid_run >= KILLS / 2,
        "only {killed_mid_run} of {KILLS} runs were still running when killed"
    );
    assert!(
        failures.is_empty(),
        "run of {duration:?} killed at {KILLS} moments; {} reruns went wrong:\n{}",
        failures.len(),
        failures.join("\n")
    );
}

/// A complete run of the project in `dir`, with its cache in `dir/cache`.
fn run(dir: &Path) -> std::process::Output {
    run_cli(dir, &RUN)
}

/// Start a run in `dir` and SIGKILL it after `delay`; false when it had finished before.
fn kill_after(dir: &Path, delay: Duration) -> bool {
    let mut child = command(dir, &RUN)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("start phasewise");
    sleep(delay);
    let running = matches!(child.try_wait(), Ok(None));
    // `Child::kill` sends SIGKILL on Unix: no handler runs, nothing gets cleaned up.
    let _ = child.kill();
    let _ = child.wait();
    running
}
