//! The runner's entry points: load → prepare → plan → execute → write the manifest.
//!
//! Every command goes through [`open`], which loads and resolves the pipeline, prepares the
//! study and checks layouts, so a mistake is reported the same way by `plan`, `run` and
//! `inspect` before anything runs. The op registry and the recording reader are parameters
//! ([`Env`]) so that tests can drive the runner with small ops of their own.

use std::path::{Path, PathBuf};
use std::time::SystemTime;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use phasewise_stages::DynOp;

use crate::exec::{self, Executor, Job, Outcome, Warning};
use crate::fsio::remove_stale_temps;
use crate::manifest::{self, Manifest};
use crate::output::write_atomically;
use crate::paths::clean;
use crate::pipeline::{self, ResolvedPipeline};
use crate::plan::Plan;
use crate::recipe::{self, Recipe};
use crate::room::Room;
use crate::sources::{Hasher, Reader};
use crate::store::Store;
use crate::study::{RunError, Study};

/// The ops and the reader a run uses.
#[derive(Clone, Copy)]
pub struct Env<'a> {
    /// The op registry.
    pub ops: &'a [&'a dyn DynOp],
    /// How recordings are read.
    pub reader: &'a dyn Reader,
}

/// Options shared by `plan`, `run` and `inspect`.
#[derive(Clone, Debug, Default)]
pub struct Options {
    /// `--set STAGE.PARAM=VALUE` arguments.
    pub overrides: Vec<String>,
    /// `--subject ID` selection (empty: all subjects).
    pub subjects: Vec<String>,
    /// `--cache DIR` (else `.phasewise/` beside the pipeline file).
    pub cache: Option<PathBuf>,
    /// `--jobs N` (else all cores).
    pub jobs: Option<usize>,
    /// Write outputs here instead of the pipeline's `output` (used by `verify`).
    pub output: Option<PathBuf>,
    /// Show a progress bar on stderr (hidden anyway when stderr is not a terminal).
    pub progress: bool,
    /// Read the recordings under this folder instead of the glob's own root folder (the glob's
    /// pattern below its root kept; used by `verify --data`).
    pub data: Option<PathBuf>,
    /// `--skip-room-check`: run even when the disk cannot hold what the run writes
    /// ([`crate::room`]).
    pub skip_room_check: bool,
}

/// The cache folder: `--cache`, else `.phasewise/` beside the pipeline file.
pub fn cache_dir(pipeline: &ResolvedPipeline, explicit: Option<&Path>) -> PathBuf {
    explicit.map_or_else(|| pipeline.dir.join(".phasewise"), Path::to_path_buf)
}

/// Load the pipeline and prepare the study, checking layouts on the recordings' headers.
pub fn open(file: &Path, options: &Options, env: Env<'_>) -> Result<Study, RunError> {
    let mut pipeline = pipeline::load(file, &options.overrides, env.ops)?;
    if let Some(output) = &options.output {
        pipeline.output = output.clone();
    }
    if let Some(root) = &options.data {
        pipeline.recordings = crate::sources::relocate_glob(&pipeline.recordings, root);
    }
    let cache = cache_dir(&pipeline, options.cache.as_deref());
    if cache.exists() && !cache.is_dir() {
        return Err(RunError::Pipeline(pipeline::PipelineError::Invalid(vec![
            pipeline::Diagnostic {
                file: None,
                line: 0,
                col: 0,
                field: "--cache".into(),
                message: format!(
                    "{} is a file; expected the cache's folder (made when missing)",
                    cache.display()
                ),
            },
        ])));
    }
    let store = Store::new(cache);
    let hasher = Hasher::with_records(store.root());
    let subjects: Vec<String> = options
        .subjects
        .iter()
        .map(|s| s.strip_prefix("sub-").unwrap_or(s).to_string())
        .collect();
    let mut study = Study::prepare(pipeline, env.reader, store, &subjects, &hasher)?;
    study.check_layouts(env.reader)?;
    Ok(study)
}

/// What `run` did.
#[derive(Clone, Debug)]
pub struct RunSummary {
    /// The manifest written.
    pub manifest: Manifest,
    /// Where.
    pub manifest_path: PathBuf,
    /// Units computed in this run.
    pub computed: usize,
    /// Units taken from the cache.
    pub cached: usize,
    /// Files exported.
    pub outputs: usize,
    /// Warnings of all units.
    pub warnings: Vec<Warning>,
    /// The pipeline asks for the HTML report after the run (`report: true`).
    pub report: bool,
}

/// Run a pipeline and write its outputs and manifest.
pub fn run(file: &Path, options: &Options, env: Env<'_>) -> Result<RunSummary, RunError> {
    let started = now();
    exec::pool(options.jobs)?.install(|| {
        let mut study = open(file, options, env)?;
        let plan = study.plan();
        tracing::info!(
            units = plan.units.len(),
            stale = plan.stale_count(),
            subjects = study.sources.len(),
            "planned"
        );
        let recipes = recipe::decide_all(&study, &plan);
        check_room(&Room::assess(&study, &plan, &recipes), options)?;
        // The chains derive again what they need; the planned layouts (long time axes of the
        // continuous stages among them) need not stay in memory while they run.
        study.forget_planned_layouts();
        let bar = progress_bar(study.units.len(), options.progress);
        let job = Job {
            study: &study,
            plan: &plan,
            recipes: &recipes,
            reader: env.reader,
            bar: &bar,
        };
        // The one place an executor is chosen.
        let executor: &dyn Executor = &exec::Local;
        let outcome = executor.execute(job)?;
        bar.finish_and_clear();
        study.remember_sources();
        study.remember_units();
        finish(&study, &outcome, &started)
    })
}

fn finish(study: &Study, outcome: &Outcome, started: &str) -> Result<RunSummary, RunError> {
    let manifest = manifest::build(study, outcome, started, &now());
    let manifest_path = clean(&manifest::path_for(
        &study.pipeline.output,
        &study.selection,
    ));
    if let Some(dir) = manifest_path.parent() {
        remove_stale_temps(dir);
    }
    write_atomically(&manifest_path, &manifest::to_bytes(&manifest))
        .map_err(|e| RunError::Other(e.to_string()))?;
    let computed = outcome.computed();
    Ok(RunSummary {
        computed,
        cached: outcome.results.len() - computed,
        outputs: outcome
            .results
            .iter()
            .filter(|r| r.export.is_some())
            .count(),
        warnings: manifest.warnings.clone(),
        report: study.pipeline.report,
        manifest,
        manifest_path,
    })
}

/// Refuse a run the disk cannot hold (unless `--skip-room-check`); warn about one it may not.
pub fn check_room(room: &Room, options: &Options) -> Result<(), RunError> {
    if options.skip_room_check {
        return Ok(());
    }
    if let Some(warning) = room.check()? {
        tracing::warn!("{warning}");
    }
    Ok(())
}

/// The plan of a pipeline and every unit's recipe (nothing runs).
pub fn plan(
    file: &Path,
    options: &Options,
    env: Env<'_>,
) -> Result<(Study, Plan, Vec<Recipe>), RunError> {
    let study = open(file, options, env)?;
    let plan = study.plan();
    let recipes = recipe::decide_all(&study, &plan);
    Ok((study, plan, recipes))
}

/// The current time as RFC 3339 (UTC, seconds).
pub fn now() -> String {
    humantime::format_rfc3339_seconds(SystemTime::now()).to_string()
}

fn progress_bar(units: usize, wanted: bool) -> ProgressBar {
    use std::io::IsTerminal;
    if !wanted || !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::with_draw_target(Some(units as u64), ProgressDrawTarget::stderr());
    if let Ok(style) = ProgressStyle::with_template("{bar:30} {pos}/{len} units {elapsed}") {
        bar.set_style(style);
    }
    bar
}
