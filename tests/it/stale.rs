//! `plan`'s reasons once the cache holds other variants of the pipeline (DESIGN §5: which param
//! changed old → new, which input file changed, which upstream stage changed).
//!
//! The demo study's first two subjects are run as the pipeline says, then as a variant with
//! `--set` (another reference, other wavelet cycles, another baseline window), then as the
//! pipeline says again — so the cache holds two variants and the last run is the original. Every
//! reason must compare against that last run (its manifest, or without it the last record of
//! each stage × subject), never against the variant that happens to have computed the unit.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use serde_json::{json, Value};

use crate::demo::{demo_pipeline_for, demo_subjects, phasewise, read_json};
use crate::reliability::copy_tree;

/// The variant run between the two runs of the original.
const VARIANT: [&str; 8] = [
    "--set",
    "reref.method=bipolar",
    "--set",
    "reref.bipolar=[[C3,P3],[C4,P4],[F3,O1],[F4,O2]]",
    "--set",
    "tf.cycles=4",
    "--set",
    "norm.window=[-0.45,-0.25]",
];

const PIPELINE: &str = "pipelines/demo.yaml";

/// The project after the three runs, made once and shared (read-only) by the tests below.
fn project() -> &'static Path {
    static PROJECT: OnceLock<tempfile::TempDir> = OnceLock::new();
    PROJECT
        .get_or_init(|| {
            let tmp = tempfile::tempdir().unwrap();
            let root = tmp.path();
            demo_subjects(root, "data", 2, false);
            std::fs::create_dir(root.join("pipelines")).unwrap();
            let text = demo_pipeline_for("../data/sub-*/eeg/*_eeg.edf", "sidecar", "../results");
            std::fs::write(root.join(PIPELINE), text).unwrap();
            let variant: Vec<&str> = ["run", PIPELINE].into_iter().chain(VARIANT).collect();
            for args in [&["run", PIPELINE][..], &variant, &["run", PIPELINE]] {
                let out = phasewise(args, root);
                assert!(
                    out.status.success(),
                    "{args:?}: {}",
                    String::from_utf8_lossy(&out.stderr)
                );
            }
            let last = read_json(&root.join("results/manifest.json"));
            assert_eq!(
                last["pipeline"]["overrides"],
                json!([]),
                "the original ran last"
            );
            tmp
        })
        .path()
}

/// A copy of the shared project that a test may change.
fn own_copy() -> tempfile::TempDir {
    let tmp = tempfile::tempdir().unwrap();
    copy_tree(project(), tmp.path());
    tmp
}

/// `plan --json` with `extra` arguments: unit label (`stage/subject`, `group`) → its reasons.
fn plan_json(root: &Path, extra: &[&str]) -> std::collections::BTreeMap<String, Value> {
    let args: Vec<&str> = ["plan", PIPELINE, "--json"]
        .iter()
        .chain(extra)
        .copied()
        .collect();
    let out = phasewise(&args, root);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let plan: Value = serde_json::from_slice(&out.stdout).unwrap();
    plan["units"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| {
            let label = match u["subject"].as_str() {
                Some(s) => format!("{}/{s}", u["stage"].as_str().unwrap()),
                None => u["stage"].as_str().unwrap().to_string(),
            };
            (label, u["reasons"].clone())
        })
        .collect()
}

/// The text `plan` prints with `extra` arguments: unit label → its reasons (before `; runs`),
/// or `fresh`.
fn plan_text(root: &Path, extra: &[&str]) -> std::collections::BTreeMap<String, String> {
    let args: Vec<&str> = ["plan", PIPELINE].iter().chain(extra).copied().collect();
    let out = phasewise(&args, root);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter_map(|line| {
            let (head, rest) = line.split_once(" [")?;
            let (who, rest) = rest.split_once(']')?;
            let stage = head.split_whitespace().last()?;
            let label = if who == "group" {
                stage.to_string()
            } else {
                format!("{stage}/{who}")
            };
            let reason = match rest.strip_prefix(": ") {
                Some(r) => r.rsplit_once("; runs ").map_or(r, |(r, _)| r).to_string(),
                None => "fresh".to_string(),
            };
            Some((label, reason))
        })
        .collect()
}

fn upstream(stage: &str) -> Value {
    json!([{"kind": "upstream", "stage": stage}])
}

fn param(name: &str, old: Value, new: Value) -> Value {
    json!({"kind": "param", "param": name, "old": old, "new": new})
}

fn events_file(subject: &str) -> PathBuf {
    PathBuf::from(format!(
        "data/sub-{subject}/eeg/sub-{subject}_task-cue_events.tsv"
    ))
}

/// One cue's trial type changed in sub-01's events: its recording is the reason, its later
/// stages are cascades of it, and sub-02 is untouched.
fn check_edited_events(root: &Path) {
    let file = root.join(events_file("01"));
    let text = std::fs::read_to_string(&file).unwrap();
    let edited = text.replacen("\tcue-left\n", "\tcue-right\n", 1);
    assert_ne!(edited, text);
    std::fs::write(&file, edited).unwrap();
    let plan = plan_json(root, &[]);
    assert_eq!(
        plan["reref/01"],
        json!([{"kind": "input_file", "path": "../data/sub-01/eeg/sub-01_task-cue_events.tsv"}])
    );
    for (stage, from) in [
        ("line", "reref"),
        ("trials", "line"),
        ("tf", "trials"),
        ("sync", "tf"),
        ("norm", "sync"),
    ] {
        assert_eq!(plan[&format!("{stage}/01")], upstream(from), "{stage}/01");
        assert_eq!(plan[&format!("{stage}/02")], json!([]), "{stage}/02");
    }
    assert_eq!(plan["group"], upstream("norm"));
}

#[test]
fn plan_after_variants_names_an_edited_events_file() {
    let tmp = own_copy();
    check_edited_events(tmp.path());
}

#[test]
fn plan_after_variants_tells_a_cascade_from_an_upstream_param_change() {
    let set = ["--set", "sync.measure=[ppc,dwpli]"];
    let plan = plan_json(project(), &set);
    for s in ["01", "02"] {
        assert_eq!(
            plan[&format!("sync/{s}")],
            json!([param(
                "measure",
                json!(["plv", "ppc", "pli", "wpli", "dwpli", "icoh"]),
                json!(["ppc", "dwpli"])
            )]),
        );
        assert_eq!(plan[&format!("norm/{s}")], upstream("sync"), "norm/{s}");
        // `cache: false`: its coefficients are recomputed for sync, which says so.
        assert_eq!(
            plan[&format!("tf/{s}")],
            json!([{"kind": "not_stored", "consumer": "sync"}])
        );
        for stage in ["reref", "line", "trials"] {
            assert_eq!(plan[&format!("{stage}/{s}")], json!([]), "{stage}/{s}");
        }
    }
    assert_eq!(plan["group"], upstream("norm"));
    let text = plan_text(project(), &set);
    assert_eq!(text["norm/01"], "upstream sync changed");
}

/// The old value of a changed downstream param is the last run's (the file's), not the
/// variant's; without the manifest, the last records of the stage × subject say the same.
fn check_downstream_old_value(root: &Path) {
    let set = ["--set", "norm.window=[-0.4,-0.2]"];
    let plan = plan_json(root, &set);
    for s in ["01", "02"] {
        assert_eq!(
            plan[&format!("norm/{s}")],
            json!([param("window", json!([-0.5, -0.2]), json!([-0.4, -0.2]))]),
            "norm/{s}"
        );
        assert_eq!(plan[&format!("sync/{s}")], json!([]), "sync/{s}");
    }
    let text = plan_text(root, &set);
    assert_eq!(
        text["norm/02"],
        "param window changed: [-0.5,-0.2] → [-0.4,-0.2]"
    );
}

#[test]
fn plan_after_variants_shows_the_last_runs_old_value() {
    check_downstream_old_value(project());
}

#[test]
fn plan_after_variants_lists_every_changed_param() {
    let set = [
        "--set",
        "reref.method=channels",
        "--set",
        "reref.channels=[O1,O2]",
    ];
    let plan = plan_json(project(), &set);
    for s in ["01", "02"] {
        assert_eq!(
            plan[&format!("reref/{s}")],
            json!([
                param("channels", Value::Null, json!(["O1", "O2"])),
                param("method", json!("average"), json!("channels")),
            ]),
            "reref/{s}"
        );
        assert_eq!(plan[&format!("line/{s}")], upstream("reref"), "line/{s}");
    }
    let text = plan_text(project(), &set);
    assert_eq!(
        text["reref/01"],
        "param channels changed: absent → [\"O1\",\"O2\"]; \
         param method changed: \"average\" → \"channels\""
    );
}

/// Without the output folder's manifest, the last record of each stage × subject is the
/// previous state: the last run's, even for units that run found cached.
#[test]
fn plan_after_variants_without_the_manifest_uses_the_last_runs_records() {
    let tmp = own_copy();
    std::fs::remove_dir_all(tmp.path().join("results")).unwrap();
    check_downstream_old_value(tmp.path());
    check_edited_events(tmp.path());
}
