//! Issue 2, item 9: a no-op rerun (everything fresh) of 20 subjects × 8 stages.
//!
//! The study: 20 subjects with small EDF+ recordings and events sidecars, seven per-subject
//! `scale` stages and one group `mean` (the test ops of tests/it/common.rs), so 141 units. One run
//! fills the cache; then each timed rerun goes through everything a real rerun does — load and
//! resolve the pipeline, find the recordings, check their stat records, read every header for
//! the layout checks, look up all 141 objects, verify and re-export the exported one, write the
//! manifest — and must compute nothing. Run with `cargo bench --bench noop_rerun`.

#[path = "../tests/it/common.rs"]
mod common;

use std::time::{Duration, Instant};

use common::{computed, Project};

const SUBJECTS: usize = 20;
const RERUNS: usize = 15;

fn pipeline() -> String {
    let mut text = String::from(
        "name: bench\ndata:\n  recordings: \"../data/sub-*/eeg/*_eeg.edf\"\noutput: ../results/chain\nstages:\n",
    );
    let mut input = "recordings".to_string();
    for i in 1..=7 {
        text.push_str(&format!(
            "  s{i}:\n    op: scale\n    input: {input}\n    params: {{ factor: {i} }}\n"
        ));
        input = format!("s{i}");
    }
    text.push_str(&format!(
        "  group:\n    op: mean\n    input: {input}\n    params: {{ over: subjects }}\n"
    ));
    text
}

fn main() {
    let names: Vec<String> = (1..=SUBJECTS).map(|i| format!("{i:02}")).collect();
    let refs: Vec<&str> = names.iter().map(String::as_str).collect();
    let project = Project::new(&refs);
    project.pipeline(&pipeline());
    let first = project.run();
    assert_eq!(first.units.len(), SUBJECTS * 7 + 1);
    let mut times: Vec<Duration> = Vec::new();
    for _ in 0..RERUNS {
        let started = Instant::now();
        let manifest = project.run();
        times.push(started.elapsed());
        assert!(
            computed(&manifest).is_empty(),
            "a no-op rerun computed something"
        );
    }
    times.sort();
    let ms = |d: Duration| d.as_secs_f64() * 1e3;
    println!(
        "no-op rerun, {SUBJECTS} subjects x 8 stages ({} units), {RERUNS} reruns: min {:.1} ms, median {:.1} ms, max {:.1} ms",
        first.units.len(),
        ms(times[0]),
        ms(times[RERUNS / 2]),
        ms(times[RERUNS - 1])
    );
}
