//! Integration tests of the runner: freshness, plan reasons, damage, interruption, threads,
//! verify, subjects and the command line's errors (the no-op rerun's speed is the benchmark in
//! benches/noop_rerun.rs). Each test builds a small study of real EDF+ files in a
//! temporary folder and asserts from the manifest's computed/cached flags, the plan's reasons,
//! the files on disk, or the command line's exit status and messages.

use crate::common;

use std::collections::BTreeMap;
use std::process::Command;

use assert_cmd::cargo::CommandCargoExt;
use common::*;
use phasewise::session::Options;
use phasewise::sources::RecordingReader;

fn replace_in(path: &std::path::Path, from: &str, to: &str) {
    let text = std::fs::read_to_string(path).unwrap();
    assert!(text.contains(from), "`{from}` not in {}", path.display());
    std::fs::write(path, text.replace(from, to)).unwrap();
}

// --- a param change --------------------------------------------------------------------------

#[test]
fn a_mid_chain_param_change_recomputes_that_stage_and_its_descendants_only() {
    let p = Project::new(&["01", "02", "03"]);
    let file = p.pipeline(CHAIN);
    let first = p.run();
    assert_eq!(
        cached(&first),
        Vec::<String>::new(),
        "first run computes everything"
    );
    assert_eq!(computed(&first).len(), 10);

    replace_in(&file, "params: { factor: 3 }", "params: { factor: 4 }");
    let second = p.run();
    assert_eq!(
        computed(&second),
        labels(&["b/01", "b/02", "b/03", "c/01", "c/02", "c/03", "g"])
    );
    assert_eq!(cached(&second), labels(&["a/01", "a/02", "a/03"]));

    // The numbers follow: g = mean over subjects of 2·4·0.5·x = 4x.
    let a = read_npy(&p.output().join("group/g.npy"));
    let again = p.run();
    assert_eq!(computed(&again), Vec::<String>::new(), "a rerun is a no-op");
    assert_eq!(read_npy(&p.output().join("group/g.npy")), a);
}

/// The reader of the stages crate, counting the recording headers it is asked for.
struct CountingReader(std::sync::atomic::AtomicUsize);

impl phasewise::sources::Reader for CountingReader {
    fn sidecars(&self, path: &std::path::Path) -> Vec<std::path::PathBuf> {
        phasewise::sources::Reader::sidecars(&RecordingReader, path)
    }
    fn layout(
        &self,
        path: &std::path::Path,
        events: phasewise_stages::io::EventSource,
        choice: &phasewise_stages::io::Choice,
    ) -> Result<phasewise_stages::Layout, phasewise_stages::StageError> {
        self.0.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
        phasewise::sources::Reader::layout(&RecordingReader, path, events, choice)
    }
    fn read(
        &self,
        path: &std::path::Path,
        events: phasewise_stages::io::EventSource,
        choice: &phasewise_stages::io::Choice,
        notes: &mut phasewise_stages::Notes,
    ) -> Result<phasewise_stages::LabelledArray, phasewise_stages::StageError> {
        phasewise::sources::Reader::read(&RecordingReader, path, events, choice, notes)
    }
}

/// Layouts are checked before anything runs, from the recordings' headers down; a unit already
/// in the cache stands in with its recorded layout, so a late change opens no header, while a
/// data-dependent mistake in a stale unit is still found (on its cached input's layout) before
/// anything runs, and a change at the top reads each subject's header again.
#[test]
fn layouts_of_cached_units_come_from_their_records() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    let ops = ops();
    let reader = CountingReader(Default::default());
    let run = |set: &[&str]| {
        reader.0.store(0, std::sync::atomic::Ordering::SeqCst);
        let options = Options {
            overrides: set.iter().map(|s| s.to_string()).collect(),
            ..Options::default()
        };
        let env = phasewise::session::Env {
            ops: &ops,
            reader: &reader,
        };
        let result = phasewise::session::run(&p.pipeline_path(), &options, env);
        (result, reader.0.load(std::sync::atomic::Ordering::SeqCst))
    };
    let (first, headers) = run(&[]);
    assert_eq!(computed(&first.unwrap().manifest).len(), 7);
    assert_eq!(headers, 2, "a cold run checks both subjects' headers");

    let (late, headers) = run(&["c.factor=0.25"]);
    assert_eq!(
        computed(&late.unwrap().manifest),
        labels(&["c/01", "c/02", "g"])
    );
    assert_eq!(headers, 0, "every unit the change leaves alone is cached");

    // The channel list the check needs comes from b's record.
    let (bad, headers) = run(&["c.channel=Nope"]);
    let message = bad.expect_err("an unknown channel is refused").to_string();
    assert!(
        message.contains("no channel `Nope` in the data"),
        "{message}"
    );
    assert_eq!(headers, 0);
    let (known, _) = run(&["c.channel=Cz"]);
    assert_eq!(
        computed(&known.unwrap().manifest),
        labels(&["c/01", "c/02", "g"])
    );

    let (top, headers) = run(&["a.factor=5"]);
    assert_eq!(computed(&top.unwrap().manifest).len(), 7);
    assert_eq!(headers, 2);
}

// --- touched and changed recordings ----------------------------------------------------------

#[test]
fn touch_recomputes_nothing_and_a_changed_file_only_its_subject_and_the_group() {
    let p = Project::new(&["01", "02", "03"]);
    p.pipeline(CHAIN);
    p.run();

    // Same bytes, new modification time.
    let recording = p.recording("02");
    let later = std::time::SystemTime::now() + std::time::Duration::from_secs(5);
    std::fs::File::options()
        .append(true)
        .open(&recording)
        .unwrap()
        .set_modified(later)
        .unwrap();
    let touched = p.run();
    assert_eq!(computed(&touched), Vec::<String>::new());

    p.write_recording("02", 7);
    let changed = p.run();
    assert_eq!(computed(&changed), labels(&["a/02", "b/02", "c/02", "g"]));
}

// --- plan reasons ----------------------------------------------------------------------------

#[test]
fn plan_names_the_changed_param_for_the_root_and_upstream_for_descendants() {
    let p = Project::new(&["01", "02"]);
    let file = p.pipeline(CHAIN);
    p.run();
    let fresh = plan_lines(&p.plan(&Options::default()));
    assert!(fresh.values().all(|l| l == "fresh"), "{fresh:#?}");

    replace_in(&file, "params: { factor: 3 }", "params: { factor: 4 }");
    let lines = plan_lines(&p.plan(&Options::default()));
    let expected: BTreeMap<String, String> = [
        ("a/01", "fresh"),
        ("a/02", "fresh"),
        ("b/01", "param factor changed: 3 → 4"),
        ("b/02", "param factor changed: 3 → 4"),
        ("c/01", "upstream b changed"),
        ("c/02", "upstream b changed"),
        ("g", "upstream c changed"),
    ]
    .into_iter()
    .map(|(k, v)| (k.to_string(), v.to_string()))
    .collect();
    assert_eq!(lines, expected);

    // An override on the command line is explained the same way.
    let set = Options {
        overrides: vec!["c.factor=0.25".into()],
        ..Options::default()
    };
    let lines = plan_lines(&p.plan(&set));
    assert_eq!(lines["c/01"], "param factor changed: 0.5 → 0.25");
}

#[test]
fn plan_names_a_changed_input_file() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    p.run();
    p.write_recording("01", 9);
    let lines = plan_lines(&p.plan(&Options::default()));
    assert_eq!(
        lines["a/01"],
        "input file changed: ../data/sub-01/eeg/sub-01_task-cue_eeg.edf"
    );
    assert_eq!(lines["a/02"], "fresh");
    assert_eq!(lines["b/01"], "upstream a changed");
}

// --- damaged objects -------------------------------------------------------------------------

#[test]
fn a_truncated_object_is_recomputed() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    let first = p.run();
    let (npy, _) = p.object(&first, "g", None);
    let bytes = std::fs::read(&npy).unwrap();
    std::fs::write(&npy, &bytes[..bytes.len() / 2]).unwrap();
    let second = p.run();
    assert_eq!(computed(&second), labels(&["g"]));
    assert_eq!(
        std::fs::read(&npy).unwrap(),
        bytes,
        "the object is whole again"
    );
}

#[test]
fn a_flipped_byte_is_detected_on_read_and_recomputed_with_a_warning() {
    let p = Project::new(&["01", "02"]);
    let file = p.pipeline(CHAIN);
    let first = p.run();
    // Damage a/01 (same size, so only the content hash can tell), then change b so that b must
    // read a's values.
    let (npy, _) = p.object(&first, "a", Some("01"));
    let mut bytes = std::fs::read(&npy).unwrap();
    let last = bytes.len() - 1;
    bytes[last] ^= 0x40;
    std::fs::write(&npy, &bytes).unwrap();
    replace_in(&file, "params: { factor: 3 }", "params: { factor: 5 }");
    let second = p.run();
    assert_eq!(
        computed(&second),
        labels(&["a/01", "b/01", "b/02", "c/01", "c/02", "g"])
    );
    let warned: Vec<&str> = second.warnings.iter().map(|w| w.message.as_str()).collect();
    assert!(
        second.warnings.iter().any(|w| w.stage == "a"
            && w.subject.as_deref() == Some("01")
            && w.message.contains("damaged")),
        "{warned:?}"
    );
    // An exported object with a flipped byte is caught when it is exported.
    let (g_npy, _) = p.object(&second, "g", None);
    let mut g = std::fs::read(&g_npy).unwrap();
    let end = g.len() - 1;
    g[end] ^= 0x01;
    std::fs::write(&g_npy, &g).unwrap();
    let third = p.run();
    assert_eq!(computed(&third), labels(&["g"]));
}

#[test]
fn a_deleted_sidecar_is_detected_and_recomputed() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    let first = p.run();
    let (_, json) = p.object(&first, "b", Some("02"));
    std::fs::remove_file(&json).unwrap();
    let lines = plan_lines(&p.plan(&Options::default()));
    assert!(
        lines["b/02"].starts_with("cached object damaged"),
        "{}",
        lines["b/02"]
    );
    let second = p.run();
    // b/02 is recomputed to the same bytes, so its consumers keep their keys and stay cached.
    assert_eq!(computed(&second), labels(&["b/02"]));
    assert!(json.is_file());
}

// --- a killed run ----------------------------------------------------------------------------

#[test]
fn a_run_killed_between_temp_write_and_rename_leaves_nothing_trusted() {
    // The phasewise binary itself, told by the store to abort right after writing its first
    // temporary object file and before renaming it.
    let p = Project::new(&["01", "02"]);
    let notch = "  line:\n    op: notch\n    input: reref\n    params: { freqs: [10], q: 30 }\n";
    p.pipeline(&real_pipeline(&format!("{REREF}{notch}")));
    let killed = Command::cargo_bin("phasewise")
        .unwrap()
        .current_dir(p.dir())
        .args(["run", "pipelines/p.yaml", "--jobs", "1", "-q"])
        .env_remove("PHASEWISE_CACHE")
        .env(phasewise::store::ABORT_BEFORE_RENAME, "1")
        .output()
        .unwrap();
    assert!(!killed.status.success(), "the run must die");
    let left = files_under(&p.cache().join("objects"));
    let names: Vec<&String> = left.keys().collect();
    assert!(
        !names.is_empty() && names.iter().all(|n| n.contains("/.tmp-")),
        "only temporary files may be left, found {names:?}"
    );
    // The next run trusts none of it: everything is computed, and the result is complete.
    let plan = Command::cargo_bin("phasewise")
        .unwrap()
        .current_dir(p.dir())
        .args(["plan", "pipelines/p.yaml", "--json"])
        .env_remove("PHASEWISE_CACHE")
        .output()
        .unwrap();
    let plan: serde_json::Value = serde_json::from_slice(&plan.stdout).unwrap();
    for unit in plan["units"].as_array().unwrap() {
        assert_eq!(unit["reasons"][0]["kind"], "not_cached", "{unit}");
    }
    let (code, stderr) = cli(p.dir(), &["run", "pipelines/p.yaml"]);
    assert_eq!(code, 0, "{stderr}");
    let manifest = phasewise::manifest::read(&p.dir().join("results/real/manifest.json")).unwrap();
    assert_eq!(cached(&manifest), Vec::<String>::new());
    assert_eq!(computed(&manifest).len(), 4);
}

// --- threads ---------------------------------------------------------------------------------

#[test]
fn one_and_two_threads_give_identical_outputs_and_manifests() {
    let p = Project::new(&["01", "02", "03", "04"]);
    p.pipeline(CHAIN);
    let run_with = |jobs: usize| {
        let options = Options {
            jobs: Some(jobs),
            cache: Some(p.dir().join(format!("cache-{jobs}"))),
            output: Some(p.dir().join(format!("results/jobs-{jobs}"))),
            ..Options::default()
        };
        let manifest = p.run_with(&options);
        let mut files = files_under(&p.dir().join(format!("results/jobs-{jobs}")));
        files.remove("manifest.json");
        (comparable(&manifest), files)
    };
    let (m1, f1) = run_with(1);
    let (m2, f2) = run_with(2);
    assert_eq!(f1.keys().collect::<Vec<_>>(), f2.keys().collect::<Vec<_>>());
    assert_eq!(
        f1, f2,
        "exported files differ between --jobs 1 and --jobs 2"
    );
    assert_eq!(m1, m2, "manifests differ (timings aside)");
    assert_eq!(
        files_under(&p.dir().join("cache-1/objects")),
        files_under(&p.dir().join("cache-2/objects"))
    );
}

// --- verify ----------------------------------------------------------------------------------

#[test]
fn verify_reports_bit_identical_and_names_a_changed_input() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    p.run();
    let ops = ops();
    let env = phasewise::session::Env {
        ops: &ops,
        reader: &RecordingReader,
    };
    let manifest = p.output().join("manifest.json");
    let report = phasewise::verify::verify(&manifest, env).unwrap();
    assert!(report.reproduced(), "{:#?}", report.lines());
    assert_eq!(report.outputs.len(), 7);

    p.write_recording("02", 4);
    let report = phasewise::verify::verify(&manifest, env).unwrap();
    assert!(!report.reproduced());
    assert_eq!(
        report.input_problems,
        vec!["input file ../data/sub-02/eeg/sub-02_task-cue_eeg.edf changed".to_string()]
    );
    let lines = report.lines();
    assert!(
        lines
            .iter()
            .any(|l| l.starts_with("a (subject 02): differs, largest absolute difference")),
        "{lines:#?}"
    );
    assert!(
        lines.iter().any(|l| l == "a (subject 01): bit-identical"),
        "{lines:#?}"
    );
}

// --- failing units --------------------------------------------------------------------------

#[test]
fn a_failing_unit_names_stage_and_subject_and_finished_units_stay_cached() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(&CHAIN.replace(
        "    op: scale\n    input: b\n    params: { factor: 0.5 }",
        "    op: fail\n    input: b\n    params: { subject: \"02\" }",
    ));
    let err = p.try_run(&Options::default()).unwrap_err();
    assert_eq!(err.exit_code(), 1);
    assert_eq!(
        err.to_string(),
        "stage c failed for subject 02: this op fails on purpose for this subject"
    );
    let lines = plan_lines(&p.plan(&Options::default()));
    assert_eq!(lines["a/01"], "fresh");
    assert_eq!(lines["b/02"], "fresh");
    assert_eq!(lines["c/01"], "fresh");
    assert_eq!(lines["c/02"], "not cached");
}

// --- subjects -------------------------------------------------------------------------------

#[test]
fn run_subject_touches_only_that_subject_and_parts_merge_into_the_one_machine_manifest() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    let only = |s: &str| Options {
        subjects: vec![s.into()],
        ..Options::default()
    };
    let part1 = p.run_with(&only("01"));
    assert_eq!(computed(&part1), labels(&["a/01", "b/01", "c/01"]));
    assert!(p.output().join("manifest.parts/01.json").is_file());
    assert!(!p.output().join("02").exists(), "subject 02 untouched");
    assert!(
        !p.output().join("manifest.json").exists(),
        "a part is not the manifest"
    );
    let part2 = p.run_with(&only("sub-02"));
    assert_eq!(computed(&part2), labels(&["a/02", "b/02", "c/02"]));
    let group = p.run();
    assert_eq!(computed(&group), labels(&["g"]));

    let merged = phasewise::manifest::merge(&[part1, part2, group]).unwrap();
    let alone = Project::new(&["01", "02"]);
    alone.pipeline(CHAIN);
    let single = alone.run();
    let strip = |m: &phasewise::manifest::Manifest| {
        let mut v = comparable(m);
        // Warnings name absolute file paths, which differ between the two projects.
        v["warnings"] = serde_json::Value::Null;
        v
    };
    assert_eq!(strip(&merged), strip(&single));
}

// --- pipeline errors -------------------------------------------------------------------------

/// `phasewise ARGS` in `dir`: exit status and stderr.
fn cli(dir: &std::path::Path, args: &[&str]) -> (i32, String) {
    let out = Command::cargo_bin("phasewise")
        .unwrap()
        .current_dir(dir)
        .args(args)
        .env_remove("PHASEWISE_CACHE")
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(!stderr.contains("panicked"), "panic: {stderr}");
    (out.status.code().unwrap_or(-1), stderr)
}

/// A real-op pipeline with `body` as its stages section.
fn real_pipeline(body: &str) -> String {
    format!(
        "name: real\ndata:\n  recordings: \"../data/sub-*/eeg/*_eeg.edf\"\n  events: sidecar\noutput: ../results/real\nstages:\n{body}"
    )
}

const REREF: &str =
    "  reref:\n    op: re-reference\n    input: recordings\n    params: { method: average }\n";

/// Expect exit 2 and every `needle` in stderr.
fn expect_error(p: &Project, text: &str, args: &[&str], needles: &[&str]) {
    p.pipeline(text);
    let mut full = args.to_vec();
    full.push("pipelines/p.yaml");
    let (code, stderr) = cli(p.dir(), &full);
    assert_eq!(code, 2, "exit status for {args:?}; stderr:\n{stderr}");
    for needle in needles {
        assert!(
            stderr.contains(needle),
            "`{needle}` missing from:\n{stderr}"
        );
    }
}

#[test]
fn pipeline_errors_exit_2_with_file_line_and_field() {
    let p = Project::new(&["01"]);
    let f = "pipelines/p.yaml";
    // Malformed YAML.
    expect_error(&p, "name: [x\nstages: {}\n", &["plan"], &[f, "(YAML)"]);
    // Unknown top-level key, with the allowed ones listed.
    let text = real_pipeline(REREF).replace("output:", "outptu:");
    expect_error(
        &p,
        &text,
        &["plan"],
        &[&format!("{f}:5:1: outptu: unknown key `outptu`, expected one of: name, data, output, stages, report")],
    );
    // Unknown op, with the ops listed.
    let text = real_pipeline(&REREF.replace("re-reference", "re-ref"));
    expect_error(
        &p,
        &text,
        &["plan"],
        &[&format!(
            "{f}:8:9: stages.reref.op: unknown op `re-ref`; the ops are: re-reference"
        )],
    );
    // Wrong type of a param (from the op's typed params).
    let text = real_pipeline(&format!(
        "{REREF}  line:\n    op: notch\n    input: reref\n    params:\n      freqs: fifty\n"
    ));
    expect_error(
        &p,
        &text,
        &["plan"],
        &[&format!("{f}:15:7: stages.line.params.freqs:")],
    );
    // Unknown stage as input, and a missing input, both reported from one file.
    let text = real_pipeline(&format!(
        "{REREF}  line:\n    op: notch\n    input: rref\n    params: {{ freqs: [50] }}\n  other:\n    op: notch\n    params: {{ freqs: [50] }}\n"
    ));
    expect_error(
        &p,
        &text,
        &["plan"],
        &[
            &format!("{f}:13:12: stages.line.input: unknown stage `rref`"),
            &format!("{f}:15:3: stages.other.input: missing"),
            "2 problems",
        ],
    );
    // Duplicate stage.
    let text = real_pipeline(&format!("{REREF}{REREF}"));
    expect_error(
        &p,
        &text,
        &["plan"],
        &[&format!(
            "{f}:11:3: stages.reref: duplicate stage `reref` (first at line 7)"
        )],
    );
    // A cycle, naming its stages.
    let text = real_pipeline(
        "  a:\n    op: notch\n    input: b\n    params: { freqs: [50] }\n  b:\n    op: notch\n    input: a\n    params: { freqs: [50] }\n",
    );
    expect_error(
        &p,
        &text,
        &["plan"],
        &["the stages form a cycle: a → b → a"],
    );
    // An output that escapes the project.
    let text = real_pipeline(REREF).replace("../results/real", "../../../elsewhere");
    expect_error(
        &p,
        &text,
        &["plan"],
        &[&format!(
            "{f}:5:9: output: `../../../elsewhere` climbs 3 levels"
        )],
    );
    // A glob that matches nothing.
    let text = real_pipeline(REREF).replace("sub-*", "nobody-*");
    expect_error(
        &p,
        &text,
        &["plan"],
        &["data.recordings: `../data/nobody-*/eeg/*_eeg.edf` matches no file"],
    );
}

#[test]
fn bad_overrides_and_data_dependent_params_exit_2() {
    let p = Project::new(&["01"]);
    let f = "pipelines/p.yaml";
    let text = real_pipeline(&format!(
        "{REREF}  line:\n    op: notch\n    input: reref\n    params:\n      freqs: [50]\n"
    ));
    // Unknown stage in --set.
    expect_error(
        &p,
        &text,
        &["plan", "--set", "nope.q=3"],
        &["--set nope.q=3", "no stage `nope`"],
    );
    // Unknown param in --set.
    expect_error(
        &p,
        &text,
        &["plan", "--set", "line.qq=3"],
        &["--set line.qq=3", "unknown field `qq`"],
    );
    // Wrong type in --set (the value is YAML).
    expect_error(
        &p,
        &text,
        &["plan", "--set", "line.freqs=[a, b]"],
        &["--set line.freqs=[a, b]", "freqs"],
    );
    // No `=`.
    expect_error(
        &p,
        &text,
        &["plan", "--set", "line.freqs"],
        &["--set line.freqs", "no `=`"],
    );
    // A frequency at Nyquist (32 Hz for these 64 Hz recordings): found by the op's layout
    // check on the recording's header, reported at the line of the frequency.
    let text = real_pipeline(&format!(
        "{REREF}  line:\n    op: notch\n    input: reref\n    params:\n      freqs: [40]\n"
    ));
    expect_error(
        &p,
        &text,
        &["run"],
        &[
            &format!("{f}:15:15: stages.line.params.freqs[0]:"),
            "Nyquist",
        ],
    );
    // Unknown subject, and an unknown command-line flag (clap).
    expect_error(
        &p,
        &text,
        &["plan", "--subject", "99"],
        &["--subject 99: no such subject"],
    );
    let (code, _) = cli(p.dir(), &["run", "--no-such-flag", "pipelines/p.yaml"]);
    assert_eq!(code, 2);
}

#[test]
fn a_data_dependent_param_of_a_test_op_points_at_its_line() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(&CHAIN.replace(
        "params: { factor: 3 }",
        "params:\n      factor: 3\n      channel: Pz",
    ));
    let err = p.try_run(&Options::default()).unwrap_err();
    assert_eq!(err.exit_code(), 2);
    let text = err.to_string();
    assert!(
        text.contains("p.yaml:16:7: stages.b.params.channel: no channel `Pz` in the data; the channels are Fz, Cz (subject 01)"),
        "{text}"
    );
}

#[test]
fn the_cli_runs_real_ops_end_to_end_and_a_rerun_is_cached() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(&real_pipeline(REREF));
    let (code, stderr) = cli(p.dir(), &["run", "pipelines/p.yaml", "--jobs", "2"]);
    assert_eq!(code, 0, "{stderr}");
    let manifest = phasewise::manifest::read(&p.dir().join("results/real/manifest.json")).unwrap();
    assert_eq!(computed(&manifest), labels(&["reref/01", "reref/02"]));
    assert!(p.dir().join("results/real/01/reref.npy").is_file());
    let (code, _) = cli(p.dir(), &["run", "pipelines/p.yaml"]);
    assert_eq!(code, 0);
    let manifest = phasewise::manifest::read(&p.dir().join("results/real/manifest.json")).unwrap();
    assert_eq!(computed(&manifest), Vec::<String>::new());
    let (code, stderr) = cli(p.dir(), &["verify", "results/real/manifest.json"]);
    assert_eq!(code, 0, "{stderr}");
    let (code, stderr) = cli(p.dir(), &["report", "pipelines/p.yaml"]);
    assert_eq!(code, 0, "{stderr}");
    assert!(p.dir().join("results/real/report.html").is_file());
}

// --- cache: false, inspect, prune -----------------------------------------------------------

#[test]
fn an_unstored_stage_is_recomputed_only_when_a_consumer_needs_it() {
    let p = Project::new(&["01", "02"]);
    let file = p.pipeline(&CHAIN.replace(
        "    input: a\n    params: { factor: 3 }",
        "    input: a\n    cache: false\n    params: { factor: 3 }",
    ));
    let first = p.run();
    let (npy, json) = p.object(&first, "b", Some("01"));
    assert!(!npy.exists(), "a cache: false stage stores no values");
    assert!(json.is_file(), "but keeps its record (notes, hash)");
    assert_eq!(computed(&p.run()), Vec::<String>::new());

    replace_in(&file, "params: { factor: 0.5 }", "params: { factor: 0.25 }");
    let lines = plan_lines(&p.plan(&Options::default()));
    assert_eq!(lines["b/01"], "not kept in the cache; c needs it");
    let second = p.run();
    assert_eq!(
        computed(&second),
        labels(&["b/01", "b/02", "c/01", "c/02", "g"])
    );
    assert_eq!(cached(&second), labels(&["a/01", "a/02"]));
}

#[test]
fn inspect_describes_a_cached_result_and_prune_drops_what_no_manifest_names() {
    let p = Project::new(&["01", "02"]);
    let file = p.pipeline(CHAIN);
    p.run();
    let ops = ops();
    let env = phasewise::session::Env {
        ops: &ops,
        reader: &RecordingReader,
    };
    let study = phasewise::session::open(&file, &Options::default(), env).unwrap();
    let text = phasewise::inspect::inspect(&study, "g", None).unwrap();
    assert!(
        text.contains("dtype <f4, shape [2, 128], units V"),
        "{text}"
    );
    assert!(text.contains("channel [2]: Fz, Cz"), "{text}");
    let err = phasewise::inspect::inspect(&study, "a", None).unwrap_err();
    assert!(
        err.to_string().contains("choose one with --subject"),
        "{err}"
    );

    // After a param change and a run, the old b, c and g objects are referenced by no manifest.
    replace_in(&file, "params: { factor: 3 }", "params: { factor: 6 }");
    p.run();
    let before = files_under(&p.cache().join("objects")).len();
    let keep = phasewise::prune::referenced_keys(&[p.output()]).unwrap();
    let store = phasewise::store::Store::new(p.cache());
    let report = phasewise::prune::prune(&store, &keep, false);
    // 5 units (b, c per subject and g), each an .npy and a .json.
    assert_eq!(report.removed.len(), 10, "{:#?}", report.removed);
    assert_eq!(files_under(&p.cache().join("objects")).len(), before - 10);
    assert_eq!(
        computed(&p.run()),
        Vec::<String>::new(),
        "nothing needed was pruned"
    );
}

// --- manifest shape -------------------------------------------------------------------------

fn keys_of(value: &serde_json::Value) -> Vec<String> {
    let mut keys: Vec<String> = value.as_object().unwrap().keys().cloned().collect();
    keys.sort();
    keys
}

#[test]
fn the_manifest_has_the_core_shape_of_design_section_6() {
    let p = Project::new(&["01", "02"]);
    p.pipeline(CHAIN);
    p.run();
    let text = std::fs::read_to_string(p.output().join("manifest.json")).unwrap();
    let m: serde_json::Value = serde_json::from_str(&text).unwrap();
    // DESIGN.md §6: the fixed core shape (plus `platform`, which §6 lists in its prose).
    assert_eq!(
        keys_of(&m),
        labels(&[
            "format",
            "format_version",
            "tool",
            "platform",
            "pipeline",
            "inputs",
            "units",
            "epochs",
            "warnings",
            "started",
            "finished"
        ])
    );
    assert_eq!(m["format"], "phasewise-manifest");
    assert_eq!(m["format_version"], 1);
    assert_eq!(
        keys_of(&m["tool"]),
        labels(&["name", "version", "revision"])
    );
    let unit = &m["units"][0];
    assert_eq!(
        keys_of(unit),
        labels(&[
            "stage",
            "subject",
            "op",
            "op_version",
            "params",
            "key",
            "inputs",
            "outputs",
            "status",
            "seconds",
            "recipe",
            "host"
        ])
    );
    // DESIGN §7: a computed unit records how it ran (the first unit reads a recording whole).
    assert_eq!(unit["recipe"]["run"], "whole");
    assert_eq!(unit["recipe"]["stored"], true);
    assert_eq!(
        keys_of(&unit["outputs"][0]),
        labels(&["file", "blake3", "shape", "dtype"])
    );
    assert_eq!(
        keys_of(&m["inputs"][0]),
        labels(&["path", "size", "blake3"])
    );
    // Units in topological stage order, then subject; the group unit's subject is null.
    let order: Vec<String> = m["units"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| label(u["stage"].as_str().unwrap(), u["subject"].as_str()))
        .collect();
    assert_eq!(order, ["a/01", "a/02", "b/01", "b/02", "c/01", "c/02", "g"]);
    // The recorded output hash and shape are those of the exported file (blake3 of its bytes;
    // shape as the NPY header gives it).
    let g = m["units"].as_array().unwrap().last().unwrap();
    let file = p.output().join(g["outputs"][0]["file"].as_str().unwrap());
    let bytes = std::fs::read(&file).unwrap();
    assert_eq!(
        g["outputs"][0]["blake3"],
        blake3::hash(&bytes).to_hex().as_str()
    );
    assert_eq!(
        g["outputs"][0]["shape"],
        serde_json::json!(read_npy(&file).shape())
    );
    assert_eq!(
        m["epochs"]["group"]["g"],
        serde_json::json!({"subjects": 2})
    );
    // Input sizes are the files' sizes.
    for input in m["inputs"].as_array().unwrap() {
        let path = p
            .pipeline_path()
            .parent()
            .unwrap()
            .join(input["path"].as_str().unwrap());
        assert_eq!(input["size"], std::fs::metadata(&path).unwrap().len());
    }
}

// --- data.events ------------------------------------------------------------------------------

/// `data.events` decides which events the recordings carry (the sidecar's or the file's own), so
/// it is part of the source's key: switching it makes the units reading the recordings stale
/// with a reason naming `data.events` and its old and new values, their consumers stale as a
/// cascade, and everything computed again; switching back finds the first results cached. The
/// default (`sidecar`) keeps the keys a pipeline had before the setting joined the key.
#[test]
fn switching_data_events_makes_the_recordings_units_stale_naming_it() {
    let p = Project::new(&["01", "02"]);
    let file = p.pipeline(CHAIN);
    let first = p.run();
    let key_a = |m: &phasewise::manifest::Manifest| unit(m, "a", Some("01")).key.clone();
    replace_in(&file, "  events: sidecar\n", "  events: annotations\n");
    let plan = p.plan(&Options::default());
    let lines = plan_lines(&plan);
    for s in ["01", "02"] {
        assert_eq!(
            lines[&label("a", Some(s))],
            "data.events changed: \"sidecar\" → \"annotations\"",
            "{lines:?}"
        );
        assert_eq!(lines[&label("b", Some(s))], "upstream a changed");
    }
    assert_eq!(lines[&label("g", None)], "upstream c changed");
    let a = plan.units.iter().find(|u| u.stage == "a").unwrap();
    let phasewise::plan::Status::Stale(reasons) = &a.status else {
        panic!("a is fresh");
    };
    let reasons: Vec<_> = reasons.iter().map(|r| r.to_json()).collect();
    assert_eq!(
        reasons,
        vec![serde_json::json!({
            "kind": "reading", "setting": "data.events", "old": "sidecar", "new": "annotations"
        })]
    );
    let switched = p.run();
    assert_eq!(computed(&switched).len(), 7, "every unit runs again");
    assert_ne!(key_a(&switched), key_a(&first));
    replace_in(&file, "  events: annotations\n", "  events: sidecar\n");
    let back = p.run();
    assert_eq!(
        computed(&back),
        Vec::<String>::new(),
        "the first results are cached"
    );
    assert_eq!(key_a(&back), key_a(&first));
    // Without the setting, the default: the same keys.
    replace_in(&file, "  events: sidecar\n", "");
    assert_eq!(key_a(&p.run()), key_a(&first));
}

// --- data.channels and data.rate ---------------------------------------------------------------

/// `data.channels` and `data.rate` shape what is read (the test recordings hold Fz and Cz at
/// 64 Hz for 2 s), join the source's key (changing the rate recomputes everything; a pipeline
/// without them keeps the keys it had) and are recorded in the manifest; a bad value is an error
/// naming the field.
#[test]
fn data_channels_and_rate_are_read_keyed_and_recorded() {
    let p = Project::new(&["01"]);
    let file = p.pipeline(CHAIN);
    let plain = p.run();
    assert_eq!(plain.pipeline.data, None);
    let key_a = |m: &phasewise::manifest::Manifest| unit(m, "a", Some("01")).inputs.clone();
    replace_in(
        &file,
        "  events: sidecar\n",
        "  events: sidecar\n  channels: [Cz]\n  rate: 32\n",
    );
    let chosen = p.run();
    assert_eq!(
        computed(&chosen).len(),
        4,
        "a new source key reruns every unit"
    );
    assert_ne!(key_a(&chosen), key_a(&plain));
    assert_eq!(
        chosen.pipeline.data,
        Some(serde_json::json!({ "channels": ["Cz"], "rate": 32.0 }))
    );
    // One channel, 2 s at 32 Hz.
    let (npy, _) = p.object(&chosen, "a", Some("01"));
    assert_eq!(read_npy(&npy).shape(), [1, 64]);
    replace_in(&file, "  rate: 32\n", "  rate: 16\n");
    assert_eq!(computed(&p.run()).len(), 4);
    replace_in(&file, "  channels: [Cz]\n  rate: 16\n", "");
    let again = p.run();
    assert_eq!(key_a(&again), key_a(&plain), "no choice, the old keys");
    assert_eq!(computed(&again), Vec::<String>::new());

    for (text, needle) in [
        (
            "  rate: -5\n",
            "data.rate: expected a positive number of Hz, found -5",
        ),
        (
            "  rate: fast\n",
            "data.rate: expected a sampling rate in Hz",
        ),
        (
            "  channels: Cz\n",
            "data.channels: expected a list of channel names",
        ),
        (
            "  channels: [Cz, Oz]\n",
            "data.channels: the recording has no channel named \"Oz\"",
        ),
        (
            "  rate: 63.97\n",
            "data.rate: channel Fz: going from 64 Hz to 63.97 Hz",
        ),
    ] {
        std::fs::write(
            &file,
            CHAIN.replace("  events: sidecar\n", &format!("  events: sidecar\n{text}")),
        )
        .unwrap();
        let err = match p.try_run(&Options::default()) {
            Ok(_) => panic!("{text}: the run succeeded"),
            Err(e) => e.to_string(),
        };
        assert!(err.contains(needle), "{text}: {err}");
        assert!(
            err.contains("p.yaml") || err.contains("sub-01_task-cue_eeg.edf"),
            "{err}"
        );
    }
}
