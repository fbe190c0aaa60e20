//! The everyday command line: what a user sees around a run, through the real binary.
//!
//! A study under a folder whose name holds glob characters; logs without escape codes when
//! stderr is a file; `-q`; counts in the singular; `inspect`'s exit status and wording; "did you
//! mean" for misspelt keys, params, ops, stages and measures; `new` on recordings without events;
//! `--version`; shell completions; the license and citation files; `prune --dry-run`'s list;
//! `-q` on every command; `--jobs 0`, a `--set` list without brackets, `inspect` of several
//! subjects, `verify` of moved recordings.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use crate::reliability::{
    assert_success, corpus_dir, manifest, recording_path, run_cli, stderr_of, tiny_project,
    with_suffix, write_study, StudySpec,
};

/// One subject of the tiny study: the quickest real run.
fn one_subject() -> StudySpec {
    StudySpec {
        rates: vec![128.0],
        seconds: 24,
    }
}

fn stdout_of(out: &Output) -> String {
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// Exit status and stderr of `phasewise ARGS` in `dir`.
fn status_and_stderr(dir: &Path, args: &[&str]) -> (Option<i32>, String) {
    let out = run_cli(dir, args);
    (out.status.code(), stderr_of(&out))
}

#[test]
fn a_study_in_a_folder_whose_name_holds_glob_characters_runs() {
    let tmp = tempfile::tempdir().unwrap();
    let study = tmp.path().join("study [pilot]");
    tiny_project(&study, &one_subject());
    // From the parent, so the pipeline's folder (joined to its glob) holds `[pilot]`.
    let out = run_cli(tmp.path(), &["run", "study [pilot]/pipeline.yaml"]);
    assert_success(&out, "run under `study [pilot]`");
    assert!(study.join("results/manifest.json").is_file());

    // `new` finds the recordings there too, and the pipeline it writes finds them again.
    let out = run_cli(
        tmp.path(),
        &[
            "new",
            "--data",
            "study [pilot]/data",
            "--out",
            "study [pilot]/new.yaml",
        ],
    );
    assert_success(&out, "new under `study [pilot]`");
    let out = run_cli(tmp.path(), &["plan", "study [pilot]/new.yaml"]);
    assert_success(&out, "plan of the pipeline `new` wrote");
    // The same from inside the study, where the glob's folder is `data` but `new` writes a path
    // relative to a pipeline elsewhere.
    let out = run_cli(&study, &["new", "--data", ".", "--out", "../outside.yaml"]);
    assert_success(&out, "new --data . from inside `study [pilot]`");
    let out = run_cli(tmp.path(), &["plan", "outside.yaml"]);
    assert_success(&out, "plan of a pipeline whose data folder holds `[pilot]`");
}

#[test]
fn a_verbose_log_redirected_to_a_file_holds_no_escape_codes() {
    let tmp = tempfile::tempdir().unwrap();
    tiny_project(tmp.path(), &one_subject());
    let log = tmp.path().join("log.txt");
    // `phasewise -v run pipeline.yaml 2>log.txt`, with no NO_COLOR to help.
    let status = Command::new(crate::reliability::bin())
        .args(["-v", "run", "pipeline.yaml"])
        .current_dir(tmp.path())
        .env_remove("NO_COLOR")
        .env_remove("RUST_LOG")
        .env_remove("PHASEWISE_CACHE")
        .stdout(Stdio::null())
        .stderr(fs::File::create(&log).unwrap())
        .status()
        .unwrap();
    assert!(status.success());
    let text = fs::read_to_string(&log).unwrap();
    assert!(text.contains("computing"), "-v logs each unit:\n{text}");
    assert!(
        !text.contains('\u{1b}'),
        "escape codes in the log:\n{text:?}"
    );
}

/// A project whose channels sidecar leaves out `Oz`: a successful run with a warning.
fn project_with_a_warning(dir: &Path) {
    // Two subjects, so the group's standard error has what it needs.
    tiny_project(
        dir,
        &StudySpec {
            rates: vec![128.0, 128.0],
            seconds: 24,
        },
    );
    let stem = dir.join("data").join(crate::reliability::subject_stem(1));
    let channels = with_suffix(&stem, "_channels.tsv");
    let text = fs::read_to_string(&channels).unwrap();
    let kept: Vec<&str> = text.lines().filter(|l| !l.starts_with("Oz")).collect();
    fs::write(&channels, kept.join("\n") + "\n").unwrap();
}

#[test]
fn quiet_prints_nothing_on_a_successful_run_with_warnings_which_stay_in_the_manifest() {
    let tmp = tempfile::tempdir().unwrap();
    project_with_a_warning(tmp.path());
    let out = run_cli(tmp.path(), &["-q", "run", "pipeline.yaml"]);
    assert_success(&out, "-q run");
    assert_eq!(stdout_of(&out), "", "-q prints nothing on stdout");
    assert_eq!(stderr_of(&out), "", "-q prints nothing on stderr");
    let warnings = manifest(&tmp.path().join("results"))["warnings"].clone();
    let text = warnings.to_string();
    assert!(
        text.contains("Oz"),
        "the warning is in the manifest: {text}"
    );

    // Without -q the same run (now cached) tells the warning, counted in the singular.
    let out = run_cli(tmp.path(), &["run", "pipeline.yaml"]);
    assert_success(&out, "run");
    let err = stderr_of(&out);
    assert!(err.starts_with("1 warning:\n"), "{err}");
    assert!(err.contains("Oz"), "{err}");
    // The group stage is the one exported output.
    let summary = stdout_of(&out);
    assert!(summary.contains("; 1 output; manifest"), "{summary}");
}

#[test]
fn inspect_refuses_an_unknown_stage_or_subject_as_a_command_line_mistake() {
    let tmp = tempfile::tempdir().unwrap();
    let pipeline = tiny_project(tmp.path(), &one_subject());
    // The wavelet stage keeps no values.
    let text = fs::read_to_string(&pipeline).unwrap().replace(
        "    input: trials\n",
        "    input: trials\n    cache: false\n",
    );
    fs::write(&pipeline, text).unwrap();
    assert_success(&run_cli(tmp.path(), &["run", "pipeline.yaml"]), "run");

    let (code, err) = status_and_stderr(tmp.path(), &["inspect", "pipeline.yaml", "snyc"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("no stage `snyc`"), "{err}");
    assert!(err.contains("did you mean `sync`?"), "{err}");

    let (code, err) = status_and_stderr(
        tmp.path(),
        &["inspect", "pipeline.yaml", "sync", "--subject", "07"],
    );
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("--subject 07: no such subject"), "{err}");

    let (code, err) = status_and_stderr(tmp.path(), &["inspect", "pipeline.yaml", "tf"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("`cache: false`"), "{err}");
    assert!(err.contains("set `cache: true` on tf"), "{err}");
    assert!(!err.contains("Unavailable"), "{err}");
    // Without a `cache:` line the storage policy decided, and the message says so.
    let text = fs::read_to_string(&pipeline).unwrap();
    fs::write(&pipeline, text.replace("    cache: false\n", "")).unwrap();
    let (code, err) = status_and_stderr(tmp.path(), &["inspect", "pipeline.yaml", "tf"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("tf is not stored: the storage policy"),
        "{err}"
    );
    assert!(!err.contains("`cache: false`"), "{err}");
    assert!(err.contains("set `cache: true` on tf"), "{err}");
    fs::write(&pipeline, text).unwrap();

    // A stored stage is described; a group stage needs no subject.
    let out = run_cli(tmp.path(), &["inspect", "pipeline.yaml", "group"]);
    assert_success(&out, "inspect group");
    assert!(stdout_of(&out).starts_with("group (the group), key "));
}

/// `plan` of the tiny pipeline with `from` replaced by `to`: exit 2 and stderr.
fn plan_error(dir: &Path, from: &str, to: &str, extra: &[&str]) -> String {
    let base = fs::read_to_string(corpus_dir().join("base.yaml")).unwrap();
    assert!(base.contains(from), "{from} is not in base.yaml");
    fs::write(dir.join("pipeline.yaml"), base.replacen(from, to, 1)).unwrap();
    let mut args = vec!["plan", "pipeline.yaml"];
    args.extend(extra);
    let (code, err) = status_and_stderr(dir, &args);
    assert_eq!(code, Some(2), "{err}");
    err
}

#[test]
fn misspelt_keys_params_ops_stages_and_measures_get_a_suggestion() {
    let tmp = tempfile::tempdir().unwrap();
    write_study(&tmp.path().join("data"), &one_subject());
    let dir = tmp.path();
    let cases: [(&str, &str, &[&str], &str); 7] = [
        // A pipeline key.
        ("output:", "outptu:", &[], "did you mean `output`?"),
        // A param of an op (serde's unknown field).
        (
            "cycles: { from: 3",
            "cycels: { from: 3",
            &[],
            "did you mean `cycles`?",
        ),
        // An op.
        ("op: notch", "op: nocth", &[], "did you mean `notch`?"),
        // A stage named as an input.
        ("input: line", "input: lien", &[], "did you mean `line`?"),
        // A stage named in --set.
        (
            "name: tiny",
            "name: tiny",
            &["--set", "lnie.q=20"],
            "did you mean `line`?",
        ),
        // A measure (serde's unknown variant).
        (
            "measure: [plv, wpli]",
            "measure: [plv, wpil]",
            &[],
            "did you mean `wpli`?",
        ),
        // Nothing close: no suggestion.
        ("op: notch", "op: zzzzzz", &[], "the ops are:"),
    ];
    for (from, to, extra, wanted) in cases {
        let err = plan_error(dir, from, to, extra);
        assert!(err.contains(wanted), "{to}: `{wanted}` missing from\n{err}");
        if to == "op: zzzzzz" {
            assert!(!err.contains("did you mean"), "{err}");
        }
    }
}

#[test]
fn new_on_recordings_without_events_says_what_to_add() {
    let tmp = tempfile::tempdir().unwrap();
    // Plain EDF (no annotations signal), no events sidecar.
    let plain =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/fixtures/edf/plain.edf");
    for n in 1..=2 {
        let edf = recording_path(&tmp.path().join("data"), n);
        fs::create_dir_all(edf.parent().unwrap()).unwrap();
        fs::copy(&plain, &edf).unwrap();
    }
    let out = run_cli(tmp.path(), &["new", "--data", "data", "--out", "p.yaml"]);
    assert_success(&out, "new on recordings without events");
    let err = stderr_of(&out);
    assert!(err.contains("no events found"), "{err}");
    assert!(err.contains("_events.tsv"), "{err}");
    let text = fs::read_to_string(tmp.path().join("p.yaml")).unwrap();
    assert!(
        !text
            .lines()
            .any(|l| l.trim_start().starts_with("events: annotations")),
        "{text}"
    );
    assert!(text.contains("# ADD EVENTS before running"), "{text}");
    assert!(text.contains("events: sidecar"), "{text}");
    assert!(text.ends_with("\n"), "the file ends with a newline");
    // Its own pipeline then stops at what the file says to add: the conditions first, then,
    // once they are listed, the events sidecar, naming the recording once.
    let (code, err) = status_and_stderr(tmp.path(), &["plan", "p.yaml"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("stages.trials.params.conditions"), "{err}");
    let text = text.replace("conditions: {}", "conditions: { A: [cue-a] }");
    fs::write(tmp.path().join("p.yaml"), text).unwrap();
    let (code, err) = status_and_stderr(tmp.path(), &["plan", "p.yaml"]);
    assert_ne!(code, Some(0), "{err}");
    assert!(err.contains("sub-01_task-cue_events.tsv"), "{err}");
    assert_named_once(&err, "sub-01_task-cue_eeg.edf");
}

/// No line of `err` holds `name` twice ("a.edf: a.edf: …").
fn assert_named_once(err: &str, name: &str) {
    for line in err.lines() {
        assert!(line.matches(name).count() <= 1, "path twice: {line}");
    }
}

#[test]
fn new_writes_yaml_that_ends_with_a_newline_on_stdout_and_in_a_file() {
    let tmp = tempfile::tempdir().unwrap();
    write_study(&tmp.path().join("data"), &one_subject());
    let out = run_cli(tmp.path(), &["new", "--data", "data"]);
    assert_success(&out, "new to stdout");
    assert!(stdout_of(&out).ends_with("\n"));
    let out = run_cli(tmp.path(), &["new", "--data", "data", "--out", "p.yaml"]);
    assert_success(&out, "new to a file");
    let text = fs::read_to_string(tmp.path().join("p.yaml")).unwrap();
    assert!(text.ends_with("export: true\n"), "{text}");
    // No sidecar JSON: the mains frequency is a guess to confirm; equal counts: no equalising.
    assert!(text.contains("CONFIRM the mains frequency"), "{text}");
    assert!(!text.contains("equalize"), "{text}");
}

#[test]
fn new_takes_the_mains_frequency_and_name_from_the_bids_sidecars_and_equalises_unequal_counts() {
    let tmp = tempfile::tempdir().unwrap();
    let data = tmp.path().join("data");
    write_study(&data, &StudySpec::default());
    // BIDS: `PowerLineFrequency` in each recording's `_eeg.json`, `Name` in
    // dataset_description.json (BIDS specification 1.8, "Modality agnostic files").
    for n in 1..=2 {
        let json = recording_path(&data, n).with_extension("json");
        fs::write(
            &json,
            r#"{ "PowerLineFrequency": 60, "SamplingFrequency": 128 }"#,
        )
        .unwrap();
    }
    fs::write(
        data.join("dataset_description.json"),
        r#"{ "Name": "face-house pilot", "BIDSVersion": "1.8.0" }"#,
    )
    .unwrap();
    // One `cue-a` event fewer in subject 01: the labels' counts differ.
    let events = with_suffix(&data.join("sub-01/eeg/sub-01_task-cue"), "_events.tsv");
    let text = fs::read_to_string(&events).unwrap();
    let first_a = text.lines().position(|l| l.ends_with("cue-a")).unwrap();
    let kept: Vec<&str> = text
        .lines()
        .enumerate()
        .filter(|(i, _)| *i != first_a)
        .map(|(_, l)| l)
        .collect();
    fs::write(&events, kept.join("\n") + "\n").unwrap();

    let out = run_cli(tmp.path(), &["new", "--data", "data", "--out", "p.yaml"]);
    assert_success(&out, "new");
    let text = fs::read_to_string(tmp.path().join("p.yaml")).unwrap();
    assert!(text.contains("params: { freqs: [60],"), "{text}");
    assert!(!text.contains("CONFIRM the mains frequency"), "{text}");
    assert!(text.contains("name: \"face-house pilot\""), "{text}");
    assert!(text.contains("output: results/data "), "{text}");
    assert!(text.contains("      equalize: { seed: 1 }"), "{text}");
    // The pipeline it wrote runs (equalize included).
    assert_success(
        &run_cli(tmp.path(), &["plan", "p.yaml"]),
        "plan of the new pipeline",
    );

    // Sidecars that disagree: back to the guess to confirm.
    fs::write(
        recording_path(&data, 2).with_extension("json"),
        r#"{ "PowerLineFrequency": 50 }"#,
    )
    .unwrap();
    let out = run_cli(tmp.path(), &["new", "--data", "data"]);
    assert_success(&out, "new");
    assert!(stdout_of(&out).contains("CONFIRM the mains frequency"));
}

#[test]
fn a_bad_recording_is_named_once_per_message() {
    let tmp = tempfile::tempdir().unwrap();
    write_study(&tmp.path().join("data"), &one_subject());
    let edf = recording_path(&tmp.path().join("data"), 1);
    let bytes = fs::read(&edf).unwrap();
    fs::write(&edf, &bytes[..300]).unwrap();
    let name = "sub-01_task-cue_eeg.edf";
    for args in [
        &["new", "--data", "data"][..],
        &["new", "--data", "data", "--out", "p.yaml"],
    ] {
        let (code, err) = status_and_stderr(tmp.path(), args);
        assert_ne!(code, Some(0), "{err}");
        assert!(err.contains(name), "{err}");
        assert_named_once(&err, name);
    }
}

#[test]
fn version_shows_the_revision_the_manifest_records() {
    let tmp = tempfile::tempdir().unwrap();
    let out = run_cli(tmp.path(), &["--version"]);
    assert_success(&out, "--version");
    let revision = phasewise::manifest::REVISION;
    assert_eq!(
        stdout_of(&out).trim_end(),
        format!(
            "phasewise {} (revision {revision})",
            env!("CARGO_PKG_VERSION")
        )
    );
    // What git says now about HEAD and the files build.rs watches.
    let mut status = vec!["status", "--porcelain", "--untracked-files=no", "--"];
    status.extend(env!("PHASEWISE_REVISION_SOURCES").split(' '));
    let [head, changes] = [&["rev-parse", "HEAD"][..], &status].map(|args| {
        Command::new("git")
            .args(args)
            .current_dir(env!("CARGO_MANIFEST_DIR"))
            .output()
            .ok()
            .filter(|o| o.status.success())
            .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
    });
    let expected = match (head, changes) {
        (Some(head), Some(changes)) if changes.is_empty() => head,
        (Some(head), Some(_)) => format!("{head}-dirty"),
        _ => "unknown".to_string(),
    };
    assert_eq!(revision, expected);
    // The manifest of a run records the same revision.
    tiny_project(tmp.path(), &one_subject());
    assert_success(&run_cli(tmp.path(), &["run", "pipeline.yaml"]), "run");
    let m = manifest(&tmp.path().join("results"));
    assert_eq!(m["tool"]["revision"], revision);
}

#[test]
fn completions_for_bash_load_in_bash() {
    let tmp = tempfile::tempdir().unwrap();
    let out = run_cli(tmp.path(), &["completions", "bash"]);
    assert_success(&out, "completions bash");
    let script = tmp.path().join("phasewise.bash");
    fs::write(&script, &out.stdout).unwrap();
    let text = stdout_of(&out);
    assert!(
        text.contains("phasewise") && text.contains("inspect"),
        "{text}"
    );
    let check = Command::new("bash")
        .arg("-n")
        .arg(&script)
        .output()
        .unwrap();
    assert!(check.status.success(), "{}", stderr_of(&check));
    for shell in ["zsh", "fish", "elvish", "powershell"] {
        let out = run_cli(tmp.path(), &["completions", shell]);
        assert_success(&out, shell);
        assert!(!out.stdout.is_empty(), "{shell}");
    }
    let (code, _) = status_and_stderr(tmp.path(), &["completions", "tcsh"]);
    assert_eq!(code, Some(2));
}

#[test]
fn the_license_files_exist_and_the_citation_names_the_crate_version() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let mit = fs::read_to_string(root.join("LICENSE-MIT")).unwrap();
    assert!(mit.contains("Copyright (c) 2026 phasewise developers"));
    let apache = fs::read_to_string(root.join("LICENSE-APACHE")).unwrap();
    assert!(apache.contains("Apache License") && apache.contains("Version 2.0, January 2004"));
    let cff = fs::read_to_string(root.join("CITATION.cff")).unwrap();
    assert!(cff.starts_with("cff-version: 1.2.0\n"), "{cff}");
    let version = cff
        .lines()
        .find_map(|l| l.strip_prefix("version: "))
        .expect("CITATION.cff has a version")
        .trim_matches('"');
    assert_eq!(
        version,
        env!("CARGO_PKG_VERSION"),
        "CITATION.cff's version must follow Cargo.toml's"
    );
}

/// The schema committed for editors is what `phasewise schema` prints today, and every pipeline
/// shipped in the repository points its editor at it. (Whether the pipelines validate against it
/// is checked by an outside validator: tests/reference/check_schema.py, run by .ci/run.)
#[test]
fn the_committed_schema_is_what_schema_prints_and_every_pipeline_points_at_it() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let tmp = tempfile::tempdir().unwrap();
    let out = run_cli(tmp.path(), &["schema"]);
    assert_success(&out, "schema");
    let committed = fs::read_to_string(root.join(phasewise::schema::COMMITTED)).unwrap();
    assert!(
        stdout_of(&out) == committed,
        "{} is out of date: regenerate it with `cargo run -- schema > {}`",
        phasewise::schema::COMMITTED,
        phasewise::schema::COMMITTED
    );
    let modeline = "# yaml-language-server: $schema=../schema/pipeline.schema.json";
    let mut pipelines: Vec<PathBuf> = fs::read_dir(root.join("pipelines"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "yaml"))
        .collect();
    pipelines.push(root.join("bench/chain.yaml"));
    assert!(pipelines.len() >= 4, "{pipelines:?}");
    for p in pipelines {
        let text = fs::read_to_string(&p).unwrap();
        assert_eq!(text.lines().next(), Some(modeline), "{}", p.display());
    }
}

/// The files of a cache object listed by `prune --dry-run`: the path printed (its NPY, or its
/// record for a `cache: false` unit) and the other file of the same key.
fn object_size(path: &Path) -> u64 {
    ["npy", "json"]
        .iter()
        .map(|ext| fs::metadata(path.with_extension(ext)).map_or(0, |m| m.len()))
        .sum()
}

#[test]
fn prune_dry_run_lists_each_object_with_its_op_subject_size_and_path() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let pipeline = tiny_project(dir, &StudySpec::default());
    assert_success(&run_cli(dir, &["run", "pipeline.yaml"]), "run");
    // A new baseline mode: the old norm objects (one per subject) and the old group object are
    // referenced by no manifest any more.
    let text = fs::read_to_string(&pipeline).unwrap();
    fs::write(&pipeline, text.replace("mode: subtract", "mode: zscore")).unwrap();
    assert_success(&run_cli(dir, &["run", "pipeline.yaml"]), "second run");
    let objects_now = || {
        let mut files = crate::reliability::files_under(&dir.join(".phasewise/objects"));
        files.sort();
        files
    };
    let objects = objects_now();

    let out = run_cli(dir, &["prune", "pipeline.yaml", "--dry-run"]);
    assert_success(&out, "prune --dry-run");
    let listed = stdout_of(&out);
    let lines: Vec<&str> = listed.lines().collect();
    assert_eq!(lines.len(), 4, "three objects and the total:\n{listed}");
    let mut whats = Vec::new();
    let mut total = 0;
    for line in &lines[..3] {
        // `op baseline, subject 01: 1.2 KiB /path/to/key.npy`
        let (what, rest) = line.split_once(": ").unwrap_or_else(|| panic!("{line}"));
        let mut words = rest.splitn(3, ' ');
        let size = format!("{} {}", words.next().unwrap(), words.next().unwrap());
        let path = dir.join(words.next().unwrap());
        assert!(path.is_file(), "{line}: a dry run removes nothing");
        assert_eq!(size, phasewise::words::bytes(object_size(&path)), "{line}");
        total += object_size(&path);
        whats.push(what.to_string());
    }
    whats.sort();
    assert_eq!(
        whats,
        [
            "op aggregate, the group",
            "op baseline, subject 01",
            "op baseline, subject 02",
        ]
    );
    // Objects by key (a unit streamed into its consumer keeps a record and no NPY).
    let keys: std::collections::BTreeSet<_> =
        objects.iter().map(|f| f.with_extension("")).collect();
    let kept = keys.len() - 3;
    assert_eq!(
        lines[3],
        format!(
            "would remove 3 objects (6 files, {}); {kept} objects kept",
            phasewise::words::bytes(total)
        )
    );
    assert_eq!(objects_now(), objects, "--dry-run removed nothing");

    // The real prune prints only the total, and -q nothing.
    let out = run_cli(dir, &["-q", "prune", "pipeline.yaml"]);
    assert_success(&out, "-q prune");
    assert_eq!(stdout_of(&out), "");
    assert_eq!(objects_now().len(), objects.len() - 6);
    let out = run_cli(dir, &["prune", "pipeline.yaml"]);
    assert_eq!(
        stdout_of(&out),
        format!("removed 0 objects (0 files, 0 B); {kept} objects kept\n")
    );
}

#[test]
fn quiet_silences_the_success_lines_of_every_command_and_its_help_says_so() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    tiny_project(dir, &one_subject());
    assert_success(&run_cli(dir, &["-q", "run", "pipeline.yaml"]), "-q run");
    for args in [
        &["report", "pipeline.yaml", "-q"][..],
        &["-q", "verify", "results/manifest.json"],
        &["-q", "archive", "results/manifest.json", "--out", "bundle"],
        &["-q", "new", "--data", "data", "--out", "new.yaml"],
        &["-q", "simulate", "--out", "sim", "--subjects", "1"],
    ] {
        let out = run_cli(dir, args);
        assert_success(&out, &args.join(" "));
        assert_eq!(stdout_of(&out), "", "{args:?}");
        assert_eq!(stderr_of(&out), "", "{args:?}");
    }
    // They did their work.
    assert!(dir.join("results/report.html").is_file());
    assert!(dir.join("bundle").is_dir());
    assert!(dir.join("new.yaml").is_file());
    assert!(dir.join("sim").is_dir());
    // What a command is asked to show is still shown.
    let out = run_cli(dir, &["-q", "plan", "pipeline.yaml"]);
    assert!(stdout_of(&out).contains("0 of "), "{}", stdout_of(&out));

    for command in ["new", "simulate", "inspect", "run"] {
        let out = run_cli(dir, &[command, "--help"]);
        let help = stdout_of(&out);
        assert!(
            help.contains("Only errors are printed; a run's warnings stay in its manifest"),
            "{command}: {help}"
        );
        assert!(!help.contains("(warnings stay in the manifest)"), "{help}");
    }
}

#[test]
fn rough_edges_of_the_command_line_get_words_a_user_can_act_on() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    tiny_project(dir, &StudySpec::default());

    // --jobs 0.
    let (code, err) = status_and_stderr(dir, &["run", "pipeline.yaml", "--jobs", "0"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("expected at least 1"), "{err}");
    assert!(!err.contains("18446744073709551615"), "{err}");

    // A list written without brackets in --set.
    let (code, err) = status_and_stderr(
        dir,
        &["plan", "pipeline.yaml", "--set", "norm.window=-0.2,-0.1"],
    );
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("--set norm.window=[-0.2,-0.1]"), "{err}");

    // inspect with two subjects describes both; the values to 4 significant digits.
    assert_success(&run_cli(dir, &["run", "pipeline.yaml"]), "run");
    let out = run_cli(
        dir,
        &[
            "inspect",
            "pipeline.yaml",
            "sync",
            "--subject",
            "01",
            "--subject",
            "02",
        ],
    );
    assert_success(&out, "inspect two subjects");
    let text = stdout_of(&out);
    assert!(text.starts_with("sync (subject 01), key "), "{text}");
    assert!(text.contains("\nsync (subject 02), key "), "{text}");
    let summaries: Vec<&str> = text.lines().filter(|l| l.starts_with("values:")).collect();
    assert_eq!(summaries.len(), 2, "{text}");
    for line in summaries {
        // `values: min 0.01234, max 1, mean 0.4676, 0 NaN`
        for (name, rest) in ["min ", "max ", "mean "]
            .iter()
            .map(|n| (n, line.split(n).nth(1).unwrap()))
        {
            let number = rest.split(',').next().unwrap();
            number
                .parse::<f64>()
                .unwrap_or_else(|e| panic!("{line}: {e}"));
            let mantissa = number.split('e').next().unwrap();
            let digits = mantissa
                .trim_start_matches('-')
                .replace('.', "")
                .trim_start_matches('0')
                .len();
            assert!(digits <= 4, "{name}{number} in {line}");
        }
    }

    // verify of a study whose recordings moved, without --data, says where to point it.
    fs::rename(dir.join("data"), dir.join("moved")).unwrap();
    let out = run_cli(dir, &["verify", "results/manifest.json"]);
    let text = stdout_of(&out);
    assert_ne!(out.status.code(), Some(0), "{text}");
    assert!(text.contains("matches no file"), "{text}");
    assert!(text.contains("`--data DIR` names the folder"), "{text}");
}

/// What users read never cites DESIGN.md, which is not in the repository: no help text of any
/// command or argument (clap's own rendering of every subcommand's long help), and no
/// description in the pipeline schema editors show.
#[test]
fn help_texts_and_the_schema_cite_no_file_users_lack() {
    fn walk(command: &mut clap::Command, path: String, found: &mut Vec<String>) {
        let help = command.render_long_help().to_string();
        if help.contains("DESIGN") {
            found.push(path.clone());
        }
        for sub in command.get_subcommands_mut() {
            let name = format!("{path} {}", sub.get_name());
            walk(sub, name, found);
        }
    }
    let mut command = <phasewise::cli::Cli as clap::CommandFactory>::command();
    command.build();
    let mut found = Vec::new();
    walk(&mut command, "phasewise".into(), &mut found);
    assert!(found.is_empty(), "help citing DESIGN: {found:?}");
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let schema = fs::read_to_string(root.join(phasewise::schema::COMMITTED)).unwrap();
    assert!(!schema.contains("DESIGN"), "the schema cites DESIGN");
}
