//! How each unit runs is decided before anything runs (src/recipe.rs): these tests choose
//! strategies from plans alone — `plan --json` and the session's plan — and no op runs in them
//! except where a test first needs a cache to exist. Together they cover every recipe:
//! cached, whole, joined, streamed, parts (joined and spooled), slabs, deferred, and a recipe
//! that stays provisional until a layout that depends on the data is known.
//!
//! That a recipe gives the same bits as the whole computation is tested where each strategy
//! lives (tests/it/streaming.rs, tests/it/slabs.rs, the ops' own parts and prepare tests).

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::{Project, CHAIN};
use phasewise::recipe::How;
use phasewise::session::Options;
use serde_json::Value;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The demo pipeline written into `dir` as `p.yaml` (reading the committed demo-data), with
/// each `(from, to)` replaced; panics when the demo no longer holds `from`.
fn demo(dir: &Path, edits: &[(&str, &str)]) -> PathBuf {
    let mut text = std::fs::read_to_string(repo().join("pipelines/demo.yaml")).unwrap();
    let data = repo().join("demo-data");
    text = text
        .replace("../demo-data", data.to_str().unwrap())
        .replace("output: ../results/demo", "output: results");
    for (from, to) in edits {
        assert!(text.contains(from), "the demo no longer holds {from}");
        text = text.replace(from, to);
    }
    let path = dir.join("p.yaml");
    std::fs::write(&path, text).unwrap();
    path
}

fn phasewise(dir: &Path, args: &[&str]) -> String {
    let out = Command::new(env!("CARGO_BIN_EXE_phasewise"))
        .args(args)
        .current_dir(dir)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{args:?} failed:\n{stderr}");
    String::from_utf8(out.stdout).unwrap()
}

/// `plan --json` of `pipeline`, with extra arguments.
fn plan_json(dir: &Path, pipeline: &Path, extra: &[&str]) -> Value {
    let mut args = vec!["plan", pipeline.to_str().unwrap(), "--json"];
    args.extend_from_slice(extra);
    serde_json::from_str(&phasewise(dir, &args)).expect("plan --json prints JSON")
}

/// The recipes of `stage`'s units (one per subject, or the group unit).
fn recipes<'p>(plan: &'p Value, stage: &str) -> Vec<&'p Value> {
    let found: Vec<&Value> = plan["units"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|u| u["stage"] == stage)
        .map(|u| &u["recipe"])
        .collect();
    assert!(!found.is_empty(), "no {stage} units in {plan:#}");
    found
}

/// The one recipe every unit of `stage` shares.
fn recipe<'p>(plan: &'p Value, stage: &str) -> &'p Value {
    let all = recipes(plan, stage);
    assert!(all.iter().all(|r| *r == all[0]), "{stage}: {all:#?}");
    all[0]
}

const SUBJECTS: usize = 6;
const REJECT: &str =
    "      reject: { peak_to_peak: 150e-6 }  # volts (common practice for scalp EEG)\n";

#[test]
fn the_demo_as_written_streams_the_wavelet_and_settles_the_rest_when_trials_are_known() {
    let dir = tempfile::tempdir().unwrap();
    let plan = plan_json(dir.path(), &demo(dir.path(), &[]), &[]);
    assert_eq!(plan["format"], "phasewise-plan");
    assert_eq!(plan["stale"], plan["units"].as_array().unwrap().len());
    for stage in ["reref", "line", "trials"] {
        assert_eq!(recipe(&plan, stage)["run"], "whole", "{stage}");
        assert_eq!(recipe(&plan, stage)["stored"], true, "{stage}");
    }
    let tf = recipe(&plan, "tf");
    assert_eq!(
        (&tf["run"], &tf["into"], &tf["axis"], &tf["stored"]),
        (
            &"streamed".into(),
            &"sync".into(),
            &"freq".into(),
            &false.into()
        )
    );
    // Peak-to-peak rejection decides the trial count from the values: the clustering output's
    // layout is unknown until the epochs exist, so whether it can be spooled is settled then,
    // and the baseline's slabs with it.
    let sync = recipe(&plan, "sync");
    assert_eq!(
        (&sync["run"], &sync["from"]),
        (&"parts".into(), &"tf".into())
    );
    assert_eq!(sync["provisional"], true);
    let norm = recipe(&plan, "norm");
    assert_eq!(norm["provisional"], true);
    assert_eq!(norm["prepared_for"], serde_json::json!(["group"]));
    assert_eq!(recipe(&plan, "group")["run"], "joined");
    assert_eq!(recipes(&plan, "norm").len(), SUBJECTS);
}

#[test]
fn without_rejection_the_plan_spools_the_clustering_output_and_reads_it_in_slabs() {
    let dir = tempfile::tempdir().unwrap();
    let plan = plan_json(dir.path(), &demo(dir.path(), &[(REJECT, "")]), &[]);
    let sync = recipe(&plan, "sync");
    assert_eq!(
        (&sync["run"], &sync["spooled"]),
        (&"parts".into(), &true.into())
    );
    assert!(sync.get("provisional").is_none(), "{sync}");
    let norm = recipe(&plan, "norm");
    // [condition, measure, pair, freq, time]: boxes fix a condition and a measure and take a
    // run of pairs.
    assert_eq!((&norm["run"], &norm["axes"]), (&"slabs".into(), &3.into()));
    assert_eq!(norm["prepared_for"], serde_json::json!(["group"]));
    assert_eq!(recipe(&plan, "group")["run"], "joined");
}

#[test]
fn a_stored_wavelet_is_computed_whole_and_nothing_streams() {
    let dir = tempfile::tempdir().unwrap();
    let plan = plan_json(
        dir.path(),
        &demo(dir.path(), &[(REJECT, ""), ("cache: false", "cache: true")]),
        &[],
    );
    for stage in ["tf", "sync"] {
        assert_eq!(recipe(&plan, stage)["run"], "whole", "{stage}");
    }
    // The clustering output is in memory when the baseline runs: computed whole, then prepared.
    let norm = recipe(&plan, "norm");
    assert_eq!(norm["run"], "whole");
    assert_eq!(norm["prepared_for"], serde_json::json!(["group"]));
}

#[test]
fn the_storage_policy_streams_a_wavelet_whose_cache_is_not_written() {
    // Issue 21: without a `cache:` line the runner decides; coefficients that stream into
    // their only consumer are not stored, and plan and manifest say that the policy chose it.
    let dir = tempfile::tempdir().unwrap();
    let unset =
        "    cache: false                        # coefficients are handed on, not stored\n";
    let pipeline = demo(dir.path(), &[(REJECT, ""), (unset, "")]);
    let plan = plan_json(dir.path(), &pipeline, &[]);
    let tf = recipe(&plan, "tf");
    assert_eq!(tf["run"], "streamed", "{tf}");
    assert_eq!(tf["stored"], false);
    assert_eq!(tf["unstored_by_policy"], true);
    assert_eq!(recipe(&plan, "sync")["run"], "parts");
    assert!(recipe(&plan, "sync").get("unstored_by_policy").is_none());
    let text = phasewise(dir.path(), &["plan", pipeline.to_str().unwrap()]);
    assert!(text.contains("not stored (storage policy"), "{text}");
    // The manifest records the recipe each computed unit ran with.
    phasewise(dir.path(), &["run", pipeline.to_str().unwrap(), "-q"]);
    let manifest: Value = serde_json::from_str(
        &std::fs::read_to_string(dir.path().join("results/manifest.json")).unwrap(),
    )
    .unwrap();
    let tf_units: Vec<&Value> = manifest["units"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|u| u["stage"] == "tf")
        .collect();
    assert_eq!(tf_units.len(), SUBJECTS);
    for unit in tf_units {
        assert_eq!(unit["recipe"]["unstored_by_policy"], true, "{unit}");
    }
    // `cache: true` written: stored, nothing streams.
    let other = tempfile::tempdir().unwrap();
    let asked = demo(other.path(), &[(REJECT, ""), (unset, "    cache: true\n")]);
    let plan = plan_json(other.path(), &asked, &[]);
    assert_eq!(recipe(&plan, "tf")["run"], "whole");
    assert_eq!(recipe(&plan, "tf")["stored"], true);
}

#[test]
fn a_changed_baseline_names_its_param_cascades_to_the_group_and_runs_in_slabs() {
    let dir = tempfile::tempdir().unwrap();
    let pipeline = demo(dir.path(), &[]);
    phasewise(dir.path(), &["run", pipeline.to_str().unwrap(), "-q"]);
    let fresh = plan_json(dir.path(), &pipeline, &[]);
    assert_eq!(fresh["stale"], 0);
    for unit in fresh["units"].as_array().unwrap() {
        assert_eq!(unit["status"], "fresh");
        assert_eq!(unit["reasons"], serde_json::json!([]));
        assert_eq!(unit["recipe"]["run"], "cached", "{unit}");
    }

    let plan = plan_json(dir.path(), &pipeline, &["--set", "norm.window=[-0.4,-0.1]"]);
    for unit in plan["units"].as_array().unwrap() {
        assert!(unit["recipe"].is_object(), "{unit}");
        match unit["stage"].as_str().unwrap() {
            "norm" => {
                assert_eq!(unit["status"], "stale");
                assert_eq!(unit["cascade"], false);
                let reason = &unit["reasons"][0];
                assert_eq!(reason["kind"], "param");
                assert_eq!(reason["param"], "window");
                assert_eq!(reason["old"], serde_json::json!([-0.5, -0.2]));
                assert_eq!(reason["new"], serde_json::json!([-0.4, -0.1]));
                // Its input is cached and stored: box by box from the store.
                assert_eq!(unit["recipe"]["run"], "slabs", "{unit}");
            }
            "group" => {
                assert_eq!(unit["status"], "stale");
                assert_eq!(unit["cascade"], true);
                assert_eq!(unit["reasons"][0]["kind"], "upstream");
                assert_eq!(unit["reasons"][0]["stage"], "norm");
            }
            _ => assert_eq!(unit["status"], "fresh", "{unit}"),
        }
    }
}

#[test]
fn an_unstored_input_of_a_group_unit_that_does_not_prepare_is_deferred_to_it() {
    let project = Project::new(&["01", "02"]);
    project.pipeline(&CHAIN.replace(
        "    params: { factor: 0.5 }\n",
        "    params: { factor: 0.5 }\n    cache: false\n",
    ));
    let (plan, recipes) = project.plan_and_recipes(&Options::default());
    for (unit, recipe) in plan.units.iter().zip(&recipes) {
        let want = match unit.stage.as_str() {
            "a" | "b" => How::Whole,
            // `c` is stored nowhere and only the group mean reads it: the group computes it.
            "c" => How::Deferred,
            "g" => How::Whole,
            other => panic!("unexpected stage {other}"),
        };
        assert_eq!(recipe.how, want, "{}", unit.stage);
        assert_eq!(recipe.stored, unit.stage != "c");
    }
    // After a run the manifest records how the deferred unit was computed.
    let manifest = project.run();
    let c: Vec<_> = manifest.units.iter().filter(|u| u.stage == "c").collect();
    assert_eq!(c.len(), 2);
    for unit in c {
        assert_eq!(unit.status, "computed");
        assert_eq!(unit.recipe.as_ref().map(|r| &r.how), Some(&How::Deferred));
    }
    let (_, recipes) = project.plan_and_recipes(&Options::default());
    assert!(recipes.iter().all(|r| r.how == How::Cached), "{recipes:?}");
}
