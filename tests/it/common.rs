//! Test harness of the runner: small ops of its own, tiny EDF+ studies in temporary folders, and
//! readable helpers over manifests and plans.
//!
//! The ops here are deliberately trivial (multiply by a factor, mean over subjects, fail on
//! demand) so that the tests exercise keys, caching, planning and the executor rather than the
//! signal processing, whose numbers are tested in the stages crate. Recordings are real EDF+
//! files written with `phasewise_stages::io::edf::write_edf_plus` and read back by the real
//! reader, so the content keys and stat records are those of a real study.

#![allow(dead_code)]

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use ndarray::ArrayD;
use phasewise::manifest::Manifest;
use phasewise::plan::Plan;
use phasewise::recipe::Recipe;
use phasewise::session::{self, Env, Options, RunSummary};
use phasewise::sources::RecordingReader;
use phasewise::study::RunError;
use phasewise_stages::io::edf::{write_edf_plus, EdfWriteSpec, SignalSpec};
use phasewise_stages::op::{single, Registered};
use phasewise_stages::{
    DynOp, Input, InputLayout, LabelledArray, Layout, Notes, Op, StageError, Values,
};
use serde::{Deserialize, Serialize};

// ---------------------------------------------------------------------------------------------
// Test ops

/// `scale`: multiply every value by `factor`; `channel`, when given, must name a channel of the
/// input (a data-dependent param, checked in `layout`).
pub struct Scale;

/// Params of [`Scale`].
#[derive(Serialize, Deserialize, phasewise_stages::schemars::JsonSchema)]
#[schemars(crate = "phasewise_stages::schemars")]
#[serde(deny_unknown_fields)]
pub struct ScaleParams {
    /// The factor.
    pub factor: f64,
    /// A channel that must exist.
    #[serde(default)]
    pub channel: Option<String>,
}

impl Op for Scale {
    type Params = ScaleParams;
    const NAME: &'static str = "scale";
    const VERSION: u32 = 1;

    fn check(p: &ScaleParams) -> Result<(), StageError> {
        if !p.factor.is_finite() {
            return Err(StageError::param("factor", "expected a finite number"));
        }
        Ok(())
    }

    fn layout(p: &ScaleParams, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        let input = single(inputs)?;
        if let Some(channel) = &p.channel {
            let channels = input.layout.labels("channel")?;
            if !channels.contains(channel) {
                return Err(StageError::param(
                    "channel",
                    format!(
                        "no channel `{channel}` in the data; the channels are {}",
                        channels.join(", ")
                    ),
                ));
            }
        }
        Ok(Some(input.layout.clone()))
    }

    fn run(
        p: &ScaleParams,
        inputs: &[Input<'_>],
        _: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?;
        let values = input.array.real_values()?;
        let factor = p.factor as f32;
        LabelledArray::real(input.array.layout.clone(), values.mapv(|v| v * factor))
    }
}

/// `mean`: the element-wise mean over subjects (accumulated in f64); records a count in notes.
pub struct Mean;

/// Params of [`Mean`].
#[derive(Serialize, Deserialize, phasewise_stages::schemars::JsonSchema)]
#[schemars(crate = "phasewise_stages::schemars")]
#[serde(deny_unknown_fields)]
pub struct MeanParams {
    /// Must be `subjects`.
    pub over: String,
}

impl Op for Mean {
    type Params = MeanParams;
    const NAME: &'static str = "mean";
    const VERSION: u32 = 1;

    fn check(p: &MeanParams) -> Result<(), StageError> {
        if p.over != "subjects" {
            return Err(StageError::param("over", "expected `subjects`"));
        }
        Ok(())
    }

    fn joins_subjects(_: &MeanParams) -> bool {
        true
    }

    fn layout(_: &MeanParams, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        let first = inputs
            .first()
            .ok_or_else(|| StageError::data("no inputs"))?;
        Ok(Some(first.layout.clone()))
    }

    fn run(
        _: &MeanParams,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let first = inputs
            .first()
            .ok_or_else(|| StageError::data("no inputs"))?;
        let mut sum = first.array.real_values()?.mapv(f64::from);
        for input in &inputs[1..] {
            sum = sum + input.array.real_values()?.mapv(f64::from);
        }
        let n = inputs.len() as f64;
        notes.record("epochs", serde_json::json!({ "subjects": inputs.len() }));
        LabelledArray::real(first.array.layout.clone(), sum.mapv(|v| (v / n) as f32))
    }
}

/// `fail`: passes its input through, but fails for subject `subject`.
pub struct Fail;

/// Params of [`Fail`].
#[derive(Serialize, Deserialize, phasewise_stages::schemars::JsonSchema)]
#[schemars(crate = "phasewise_stages::schemars")]
#[serde(deny_unknown_fields)]
pub struct FailParams {
    /// The subject to fail for.
    pub subject: String,
}

impl Op for Fail {
    type Params = FailParams;
    const NAME: &'static str = "fail";
    const VERSION: u32 = 1;

    fn layout(_: &FailParams, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(Some(single(inputs)?.layout.clone()))
    }

    fn run(
        p: &FailParams,
        inputs: &[Input<'_>],
        _: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?;
        if input.subject == Some(p.subject.as_str()) {
            return Err(StageError::data(
                "this op fails on purpose for this subject",
            ));
        }
        Ok(input.array.clone())
    }
}

static SCALE: Registered<Scale> = Registered::new();
static MEAN: Registered<Mean> = Registered::new();
static FAIL: Registered<Fail> = Registered::new();

/// The test registry.
pub fn ops() -> Vec<&'static dyn DynOp> {
    vec![&SCALE, &MEAN, &FAIL]
}

// ---------------------------------------------------------------------------------------------
// Projects

/// The chain most tests use: three per-subject stages and a group mean.
pub const CHAIN: &str = r#"name: chain
data:
  recordings: "../data/sub-*/eeg/*_eeg.edf"
  events: sidecar
output: ../results/chain
stages:
  a:
    op: scale
    input: recordings
    params: { factor: 2 }
  b:
    op: scale
    input: a
    params: { factor: 3 }
  c:
    op: scale
    input: b
    params: { factor: 0.5 }
  g:
    op: mean
    input: c
    params: { over: subjects }
"#;

/// A study in a temporary folder: `data/sub-XX/eeg/…`, `pipelines/p.yaml`, `results/`.
pub struct Project {
    root: tempfile::TempDir,
}

impl Project {
    /// A project whose subjects each have a small EDF+ recording and an events sidecar.
    pub fn new(subjects: &[&str]) -> Project {
        let project = Project {
            root: tempfile::tempdir().expect("temporary folder"),
        };
        for (i, s) in subjects.iter().enumerate() {
            project.write_recording(s, i as u64);
        }
        project
    }

    /// The project folder.
    pub fn dir(&self) -> &Path {
        self.root.path()
    }

    /// The recording of `subject`.
    pub fn recording(&self, subject: &str) -> PathBuf {
        self.dir().join(format!(
            "data/sub-{subject}/eeg/sub-{subject}_task-cue_eeg.edf"
        ))
    }

    /// (Re)write the recording of `subject`; `variant` changes its samples.
    pub fn write_recording(&self, subject: &str, variant: u64) {
        let path = self.recording(subject);
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        let rate = 64.0;
        let signal = |label: &str, phase: f64| SignalSpec {
            label: label.into(),
            unit: "uV".into(),
            samples: (0..128)
                .map(|k| 20.0 * (2.0 * std::f64::consts::PI * 6.0 * k as f64 / rate + phase).sin())
                .collect(),
        };
        let offset = variant as f64 * 0.37;
        let spec = EdfWriteSpec {
            patient: "X X X X".into(),
            recording: "Startdate X X X X".into(),
            start_date: "01.01.20".into(),
            start_time: "00.00.00".into(),
            record_seconds: 1.0,
            sampling_rate: rate,
            signals: vec![signal("EEG Fz", offset), signal("EEG Cz", offset + 1.0)],
            annotations: vec![],
        };
        write_edf_plus(&path, &spec).expect("write EDF+");
        let events = path.with_file_name(format!("sub-{subject}_task-cue_events.tsv"));
        std::fs::write(
            events,
            "onset\tduration\ttrial_type\n0.5\t0\tcue-a\n1.2\t0\tcue-b\n",
        )
        .unwrap();
    }

    /// Write `pipelines/p.yaml` and return its path.
    pub fn pipeline(&self, text: &str) -> PathBuf {
        let path = self.dir().join("pipelines/p.yaml");
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        std::fs::write(&path, text).unwrap();
        path
    }

    /// The pipeline file.
    pub fn pipeline_path(&self) -> PathBuf {
        self.dir().join("pipelines/p.yaml")
    }

    /// The cache the runner uses by default.
    pub fn cache(&self) -> PathBuf {
        self.dir().join("pipelines/.phasewise")
    }

    /// The output folder of [`CHAIN`].
    pub fn output(&self) -> PathBuf {
        self.dir().join("results/chain")
    }

    /// Run with the test ops; the summary or the error.
    pub fn try_run(&self, options: &Options) -> Result<RunSummary, RunError> {
        let ops = ops();
        let env = Env {
            ops: &ops,
            reader: &RecordingReader,
        };
        session::run(&self.pipeline_path(), options, env)
    }

    /// Run with the test ops and return the manifest; panics with the error's text.
    pub fn run(&self) -> Manifest {
        self.run_with(&Options::default())
    }

    /// Run with options and return the manifest.
    pub fn run_with(&self, options: &Options) -> Manifest {
        match self.try_run(options) {
            Ok(s) => s.manifest,
            Err(e) => panic!("run failed:\n{e}"),
        }
    }

    /// The plan with the test ops.
    pub fn plan(&self, options: &Options) -> Plan {
        self.plan_and_recipes(options).0
    }

    /// The plan and every unit's recipe with the test ops (nothing runs).
    pub fn plan_and_recipes(&self, options: &Options) -> (Plan, Vec<Recipe>) {
        let ops = ops();
        let env = Env {
            ops: &ops,
            reader: &RecordingReader,
        };
        match session::plan(&self.pipeline_path(), options, env) {
            Ok((_, plan, recipes)) => (plan, recipes),
            Err(e) => panic!("plan failed:\n{e}"),
        }
    }

    /// The path of the cached object of `stage` × `subject` recorded in `manifest`.
    pub fn object(
        &self,
        manifest: &Manifest,
        stage: &str,
        subject: Option<&str>,
    ) -> (PathBuf, PathBuf) {
        let key = unit(manifest, stage, subject).key.clone();
        let dir = self.cache().join("objects").join(&key[..2]);
        (
            dir.join(format!("{key}.npy")),
            dir.join(format!("{key}.json")),
        )
    }
}

// ---------------------------------------------------------------------------------------------
// Reading manifests and plans

/// `stage` or `stage/subject`, the label used in expected-vs-actual listings.
pub fn label(stage: &str, subject: Option<&str>) -> String {
    match subject {
        Some(s) => format!("{stage}/{s}"),
        None => stage.to_string(),
    }
}

/// The units of a manifest with status `computed`, as sorted labels.
pub fn computed(manifest: &Manifest) -> Vec<String> {
    with_status(manifest, "computed")
}

/// The units of a manifest with status `cached`, as sorted labels.
pub fn cached(manifest: &Manifest) -> Vec<String> {
    with_status(manifest, "cached")
}

fn with_status(manifest: &Manifest, status: &str) -> Vec<String> {
    let mut out: Vec<String> = manifest
        .units
        .iter()
        .filter(|u| u.status == status)
        .map(|u| label(&u.stage, u.subject.as_deref()))
        .collect();
    out.sort();
    out
}

/// Sorted labels from a list of literals, for readable expectations.
pub fn labels(items: &[&str]) -> Vec<String> {
    let mut out: Vec<String> = items.iter().map(|s| s.to_string()).collect();
    out.sort();
    out
}

/// A unit record of a manifest.
pub fn unit<'m>(
    manifest: &'m Manifest,
    stage: &str,
    subject: Option<&str>,
) -> &'m phasewise::manifest::UnitRecord {
    manifest
        .units
        .iter()
        .find(|u| u.stage == stage && u.subject.as_deref() == subject)
        .unwrap_or_else(|| panic!("no unit {} in the manifest", label(stage, subject)))
}

/// The plan as `label → status line`.
pub fn plan_lines(plan: &Plan) -> BTreeMap<String, String> {
    plan.units
        .iter()
        .map(|u| (label(&u.stage, u.subject.as_deref()), u.status_line()))
        .collect()
}

/// The manifest as JSON with everything that legitimately differs between runs blanked
/// (timings, start and end, the computed/cached flags when asked).
pub fn comparable(manifest: &Manifest) -> serde_json::Value {
    let mut m = manifest.clone();
    m.started.clear();
    m.finished.clear();
    for u in &mut m.units {
        u.seconds = 0.0;
    }
    serde_json::to_value(&m).unwrap()
}

/// Every file under `dir`, relative path → bytes.
pub fn files_under(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    let mut out = BTreeMap::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for entry in std::fs::read_dir(&d).unwrap().flatten() {
            let p = entry.path();
            if p.is_dir() {
                stack.push(p);
            } else {
                let rel = p.strip_prefix(dir).unwrap().to_string_lossy().into_owned();
                out.insert(rel, std::fs::read(&p).unwrap());
            }
        }
    }
    out
}

/// The values of an exported NPY file (read with ndarray-npy, numpy's NPY format).
pub fn read_npy(path: &Path) -> ArrayD<f32> {
    use ndarray_npy::ReadNpyExt;
    ArrayD::<f32>::read_npy(std::fs::File::open(path).unwrap()).unwrap()
}

/// Real values of a labelled array.
pub fn real(values: &Values) -> &ArrayD<f32> {
    match values {
        Values::Real(a) => a,
        Values::Complex(_) => panic!("expected real values"),
    }
}
