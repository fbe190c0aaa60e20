//! A study ready to plan or run: the resolved pipeline, its subjects and their recordings, the
//! units with their fingerprints and keys, and the store.
//!
//! Preparing a study reads no samples: recordings are found and hashed (through stat records),
//! units expanded, keys computed, and every op's `layout` called down the graph on the
//! recordings' headers, so that a data-dependent mistake in a param (a window outside the data, a
//! frequency above Nyquist) is reported with its line before anything runs. Units already in the
//! cache (same key: same inputs, params and op version) are not planned again: their recorded
//! layout stands in, and recordings that only they read are not opened.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use phasewise_stages::{InputLayout, Layout, StageError};
use rayon::prelude::*;
use serde_json::json;

use crate::graph::{self, StageShape, Unit, UnitInput};
use crate::key::{Fingerprint, InputKey};
use crate::manifest::{Manifest, UnitRecord};
use crate::paths::relative_to;
use crate::pipeline::{Diagnostic, PipelineError, ResolvedPipeline, SOURCE};
use crate::plan::{Plan, Previous, Stored, UnitFacts};
use crate::sources::{self, FileHash, Hasher, Reader, Source, SourceError};
use crate::store::{last_id, Lookup, ObjectRecord, Store};

/// Why a study could not be prepared or run.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    /// The pipeline file or the command line is wrong.
    #[error(transparent)]
    Pipeline(#[from] PipelineError),
    /// The recordings could not be found or read.
    #[error(transparent)]
    Source(#[from] SourceError),
    /// `--subject` named a subject that has no recording.
    #[error("--subject {subject}: no such subject; the subjects are: {known}")]
    UnknownSubject {
        /// The id given.
        subject: String,
        /// The ids found.
        known: String,
    },
    /// A unit failed (at layout time or while running).
    #[error("{}", .0.iter().map(ToString::to_string).collect::<Vec<_>>().join("\n"))]
    Units(Vec<UnitFailure>),
    /// The run would fill a disk before it ends ([`crate::room`]).
    #[error(transparent)]
    NoRoom(#[from] crate::room::NoRoom),
    /// Something else failed (writing outputs, the store).
    #[error("{0}")]
    Other(String),
}

impl RunError {
    /// The exit status: 2 when the pipeline or command line is wrong, 1 when a stage failed.
    pub fn exit_code(&self) -> i32 {
        match self {
            RunError::Pipeline(_) | RunError::Source(_) | RunError::UnknownSubject { .. } => 2,
            // A param error found only while running still means the pipeline is wrong.
            RunError::Units(f) if f.iter().any(|f| f.diagnostic.is_some()) => 2,
            RunError::Units(_) | RunError::NoRoom(_) | RunError::Other(_) => 1,
        }
    }
}

/// A unit that failed.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct UnitFailure {
    /// The stage.
    pub stage: String,
    /// The subject, `None` for group units.
    pub subject: Option<String>,
    /// What went wrong.
    pub message: String,
    /// For an op's param error found only at run time: where the param is in the file.
    pub diagnostic: Option<Box<Diagnostic>>,
}

impl std::fmt::Display for UnitFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let who = subject_label(self.subject.as_deref());
        match &self.diagnostic {
            Some(d) => write!(f, "{d} ({who})"),
            None => write!(f, "stage {} failed for {who}: {}", self.stage, self.message),
        }
    }
}

impl std::error::Error for UnitFailure {}

/// `subject 01` or `the group`.
pub fn subject_label(subject: Option<&str>) -> String {
    match subject {
        Some(s) => format!("subject {s}"),
        None => "the group".into(),
    }
}

/// A prepared study.
pub struct Study {
    /// The pipeline.
    pub pipeline: ResolvedPipeline,
    /// All subjects' recordings, sorted by subject.
    pub sources: Vec<Source>,
    /// Keys of the sources.
    pub source_keys: Vec<String>,
    /// Hashes of each source's files.
    pub source_files: Vec<Vec<FileHash>>,
    /// The units to consider (all, or those of the `--subject` selection).
    pub units: Vec<Unit>,
    /// For each unit, its fingerprint.
    pub fingerprints: Vec<Fingerprint>,
    /// For each unit, its key.
    pub keys: Vec<String>,
    /// For each unit, the units consuming it.
    pub consumers: Vec<Vec<usize>>,
    /// The subject restriction (`--subject`), empty for all.
    pub selection: Vec<String>,
    /// The cache.
    pub store: Store,
    /// Each unit's output layout as far as it is known before anything runs (its record's, or
    /// planned by its op from its inputs'; `None` when it depends on values), set by
    /// [`Study::check_layouts`]. The recipes ([`crate::recipe`]) are decided on them.
    pub layouts: Vec<Option<PlannedLayout>>,
    /// Each unit's output size as far as it is known before anything runs (exact from its
    /// layout, or an upper bound where the layout depends on values), set by
    /// [`Study::check_layouts`]; [`crate::room`] adds them up.
    pub sizes: Vec<Option<OutputSize>>,
}

/// The bytes of a unit's output values (`f32`, or two per complex value), known before it runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct OutputSize {
    /// The bytes.
    pub bytes: u64,
    /// False when the layout depends on values (an `epoch` that rejects trials): `bytes` is
    /// then an upper bound, from the ops' [`phasewise_stages::Op::layout_bound`].
    pub exact: bool,
}

impl OutputSize {
    fn of(layout: &Layout, exact: bool) -> OutputSize {
        let values: u64 = layout.shape().iter().map(|&n| n as u64).product();
        let width = if layout.complex { 8 } else { 4 };
        OutputSize {
            bytes: values.saturating_mul(width),
            exact,
        }
    }
}

impl Study {
    /// Find recordings, expand units and compute keys.
    pub fn prepare(
        pipeline: ResolvedPipeline,
        reader: &dyn Reader,
        store: Store,
        selection: &[String],
        hasher: &Hasher,
    ) -> Result<Study, RunError> {
        let all = match sources::discover(&pipeline.dir, &pipeline.recordings, reader) {
            Ok(all) => all,
            Err(e @ SourceError::Io { .. }) => return Err(RunError::Other(e.to_string())),
            Err(e) => {
                let d = pipeline.recordings_diagnostic(e.to_string());
                return Err(RunError::Pipeline(PipelineError::Invalid(vec![d])));
            }
        };
        check_output_folder(&pipeline, &all, store.root())?;
        let sources = select(all, selection)?;
        let mut source_keys = Vec::new();
        let mut source_files = Vec::new();
        for source in &sources {
            let (key, files) = hasher
                .source_key(source, pipeline.events, &pipeline.choice)
                .map_err(|e| RunError::Other(e.to_string()))?;
            source_keys.push(key);
            source_files.push(files);
        }
        let shapes: Vec<StageShape> = pipeline
            .stages
            .iter()
            .map(|s| StageShape {
                inputs: s.inputs.clone(),
                group: s.group,
            })
            .collect();
        let order: Vec<usize> = (0..pipeline.stages.len()).collect();
        let mut units = graph::expand(&order, &shapes, sources.len());
        if !selection.is_empty() {
            // `run --subject` touches only that subject's chain; group units wait for all.
            units.retain(|u| u.subject.is_some());
        }
        let mut study = Study {
            pipeline,
            sources,
            source_keys,
            source_files,
            units,
            fingerprints: Vec::new(),
            keys: Vec::new(),
            consumers: Vec::new(),
            selection: selection.to_vec(),
            store,
            layouts: Vec::new(),
            sizes: Vec::new(),
        };
        study.compute_keys();
        Ok(study)
    }

    fn compute_keys(&mut self) {
        self.consumers = vec![Vec::new(); self.units.len()];
        for i in 0..self.units.len() {
            let unit = &self.units[i];
            let stage = &self.pipeline.stages[unit.stage];
            let inputs: Vec<InputKey> = unit.inputs.iter().map(|&i| self.input_key(i)).collect();
            for input in &unit.inputs {
                if let UnitInput::Unit(u) = input {
                    self.consumers[*u].push(i);
                }
            }
            let fingerprint = Fingerprint {
                op: stage.op.name().to_string(),
                op_version: stage.op.version(),
                params: stage.params().clone(),
                inputs,
                subject: unit.subject.map(|s| self.sources[s].subject.clone()),
            };
            self.keys.push(fingerprint.key());
            self.fingerprints.push(fingerprint);
        }
    }

    fn input_key(&self, input: UnitInput) -> InputKey {
        match input {
            UnitInput::Source(s) => InputKey {
                stage: SOURCE.into(),
                subject: Some(self.sources[s].subject.clone()),
                key: self.source_keys[s].clone(),
            },
            UnitInput::Unit(u) => InputKey {
                stage: self.pipeline.stages[self.units[u].stage].name.clone(),
                subject: self.units[u]
                    .subject
                    .map(|s| self.sources[s].subject.clone()),
                key: self.keys[u].clone(),
            },
        }
    }

    /// The stage name of a unit.
    pub fn stage_name(&self, unit: usize) -> &str {
        &self.pipeline.stages[self.units[unit].stage].name
    }

    /// The subject id of a unit.
    pub fn subject(&self, unit: usize) -> Option<&str> {
        self.units[unit]
            .subject
            .map(|s| self.sources[s].subject.as_str())
    }

    /// Drop the layouts planned by ops (those of records stay: the store's memo holds them
    /// anyway). The executor derives a layout again where a recipe needs one.
    pub fn forget_planned_layouts(&mut self) {
        for layout in &mut self.layouts {
            if matches!(layout, Some(PlannedLayout::Computed(_))) {
                *layout = None;
            }
        }
    }

    /// The stage and subject an input comes from.
    pub fn origin(&self, input: UnitInput) -> (&str, Option<&str>) {
        match input {
            UnitInput::Source(s) => (SOURCE, Some(self.sources[s].subject.as_str())),
            UnitInput::Unit(i) => (self.stage_name(i), self.subject(i)),
        }
    }

    /// A path for messages and the manifest: relative to the pipeline's folder when possible.
    pub fn display_path(&self, path: &Path) -> String {
        relative_to(path, &self.pipeline.dir)
            .unwrap_or_else(|| path.to_path_buf())
            .to_string_lossy()
            .into_owned()
    }

    /// The last-record id of a unit.
    pub fn last_id(&self, unit: usize) -> String {
        last_id(
            &self.pipeline.name,
            self.stage_name(unit),
            self.subject(unit),
        )
    }

    fn source_last_id(&self, source: usize) -> String {
        last_id(
            &self.pipeline.name,
            SOURCE,
            Some(&self.sources[source].subject),
        )
    }

    /// The fingerprint by which a source's files are remembered (to name a changed file).
    pub fn source_fingerprint(&self, source: usize) -> Fingerprint {
        let files: Vec<serde_json::Value> = self.source_files[source]
            .iter()
            .map(|f| json!({"path": self.display_path(&f.path), "blake3": f.blake3}))
            .collect();
        Fingerprint {
            op: SOURCE.into(),
            op_version: 0,
            params: json!({ "files": files, "reading": self.reading() }),
            inputs: Vec::new(),
            subject: Some(self.sources[source].subject.clone()),
        }
    }

    /// How the recordings are read, as the settings of the pipeline file name it: `data.events`
    /// always, `data.channels`, `data.rate`, ... when set. Remembered with each source's files,
    /// so that a changed setting is named as the reason its units are stale.
    fn reading(&self) -> serde_json::Value {
        let mut reading = serde_json::Map::new();
        let events = sources::events_name(self.pipeline.events);
        reading.insert("data.events".into(), json!(events));
        if let Ok(serde_json::Value::Object(choice)) = serde_json::to_value(&self.pipeline.choice) {
            for (k, v) in choice {
                reading.insert(format!("data.{k}"), v);
            }
        }
        serde_json::Value::Object(reading)
    }

    /// Remember the sources' file hashes (after a successful run) for later explanations.
    pub fn remember_sources(&self) {
        for s in 0..self.sources.len() {
            let id = self.source_last_id(s);
            let now = self.source_fingerprint(s);
            if self.store.last(&id).as_ref() != Some(&now) {
                self.store.set_last(&id, &now);
            }
        }
    }

    /// Remember every unit's fingerprint (after a successful run, cached units included) as the
    /// last state of its stage × subject, so that a later plan explains against this run and not
    /// against whichever variant computed a unit. Records already equal are not written again.
    pub fn remember_units(&self) {
        (0..self.units.len()).into_par_iter().for_each(|u| {
            let id = self.last_id(u);
            if self.store.last(&id).as_ref() != Some(&self.fingerprints[u]) {
                self.store.set_last(&id, &self.fingerprints[u]);
            }
        });
    }

    /// The manifests of the last run of this pipeline in its output folder, most specific
    /// first: the part of this `--subject` selection, then `manifest.json`. Manifests of another
    /// pipeline, or that cannot be read, are left out (the last records explain instead).
    fn previous_runs(&self) -> Vec<Manifest> {
        let mut paths = vec![crate::manifest::path_for(
            &self.pipeline.output,
            &self.selection,
        )];
        if !self.selection.is_empty() {
            paths.push(crate::manifest::path_for(&self.pipeline.output, &[]));
        }
        paths
            .iter()
            .filter_map(|path| crate::manifest::read(path).ok())
            .filter(|m| m.pipeline.name == self.pipeline.name)
            .collect()
    }

    /// What the planner needs to know about every unit. A unit's previous state is the one the
    /// last run of this pipeline recorded: the output folder's manifest (DESIGN §6), else the
    /// last record of its stage × subject; its changed files are those since that same run.
    pub fn facts(&self) -> Vec<UnitFacts> {
        let runs = self.previous_runs();
        let since_record: Vec<Vec<String>> = (0..self.sources.len())
            .map(|s| self.changed_files(s))
            .collect();
        let since_run: Vec<Vec<Vec<String>>> = runs
            .iter()
            .map(|run| {
                (0..self.sources.len())
                    .map(|s| self.changed_files_since(s, run))
                    .collect()
            })
            .collect();
        let reading: Vec<_> = (0..self.sources.len())
            .map(|s| self.changed_reading(s))
            .collect();
        // Each run's units by stage and subject, so that finding one is not a scan per unit.
        let by_unit: Vec<std::collections::HashMap<(&str, Option<&str>), &UnitRecord>> = runs
            .iter()
            .map(|run| {
                let mut units = std::collections::HashMap::new();
                for x in &run.units {
                    units
                        .entry((x.stage.as_str(), x.subject.as_deref()))
                        .or_insert(x);
                }
                units
            })
            .collect();
        (0..self.units.len())
            .map(|u| {
                let stored = match self.store.lookup(&self.keys[u]) {
                    Lookup::Present(_) => Stored::Present,
                    Lookup::Absent => Stored::Absent,
                    Lookup::Damaged(why) => Stored::Damaged(why.to_string()),
                };
                let (stage, subject) = (self.stage_name(u), self.subject(u));
                let recorded = by_unit.iter().enumerate().find_map(|(r, units)| {
                    let unit = units.get(&(stage, subject))?;
                    Some((r, Previous::from(*unit)))
                });
                let (last, changed) = match recorded {
                    Some((r, previous)) => (Some(previous), &since_run[r]),
                    None => (
                        self.store
                            .last(&self.last_id(u))
                            .as_ref()
                            .map(Previous::from),
                        &since_record,
                    ),
                };
                let sources = || {
                    self.units[u].inputs.iter().filter_map(|i| match i {
                        UnitInput::Source(s) => Some(*s),
                        UnitInput::Unit(_) => None,
                    })
                };
                UnitFacts {
                    stage: stage.to_string(),
                    subject: subject.map(str::to_string),
                    fingerprint: self.fingerprints[u].clone(),
                    stored,
                    last,
                    changed_files: sources().flat_map(|s| changed[s].clone()).collect(),
                    changed_reading: sources().flat_map(|s| reading[s].clone()).collect(),
                    consumers: self.consumers[u].clone(),
                    cache: self.pipeline.stages[self.units[u].stage].cache,
                }
            })
            .collect()
    }

    /// The plan of this study.
    pub fn plan(&self) -> Plan {
        Plan::decide(&self.facts())
    }

    /// The reading settings that differ from those last remembered for `source` (none when
    /// nothing was remembered, or by a version that did not remember settings).
    fn changed_reading(&self, source: usize) -> Vec<(String, String, String)> {
        let Some(last) = self.store.last(&self.source_last_id(source)) else {
            return Vec::new();
        };
        let Some(old) = last.params.get("reading") else {
            return Vec::new();
        };
        crate::plan::differences("", old, &self.reading())
    }

    /// The files of `source` whose hash is not the one `run`'s manifest lists for their path
    /// (or that it does not list), by the path the manifest uses.
    fn changed_files_since(&self, source: usize, run: &Manifest) -> Vec<String> {
        let listed: BTreeSet<(&str, &str)> = run
            .inputs
            .iter()
            .map(|f| (f.path.as_str(), f.blake3.as_str()))
            .collect();
        let mut paths: Vec<String> = self.source_files[source]
            .iter()
            .map(|f| (self.display_path(&f.path), f.blake3.as_str()))
            .filter(|(path, blake3)| !listed.contains(&(path.as_str(), *blake3)))
            .map(|(path, _)| path)
            .collect();
        paths.sort();
        paths
    }

    fn changed_files(&self, source: usize) -> Vec<String> {
        let Some(last) = self.store.last(&self.source_last_id(source)) else {
            return Vec::new();
        };
        let old: BTreeSet<(String, String)> = file_list(&last.params);
        let now: BTreeSet<(String, String)> = file_list(&self.source_fingerprint(source).params);
        let mut paths: Vec<String> = now.difference(&old).map(|(p, _)| p.clone()).collect();
        paths.extend(old.difference(&now).map(|(p, _)| p.clone()));
        paths.sort();
        paths.dedup();
        paths
    }

    /// Call every op's `layout` down the graph on the recordings' headers. A unit whose record
    /// is in the cache was computed from these very inputs and params (its key says so): its
    /// layout is the record's and there is nothing left to check, so only the other units are
    /// planned, and only the recordings they read are opened (a rerun after a late change reads
    /// no recording header at all).
    pub fn check_layouts(&mut self, reader: &dyn Reader) -> Result<(), RunError> {
        // Reading and parsing the records (their time axes can be long) is most of a no-op
        // run: in parallel, on the run's pool.
        let recorded: Vec<Option<Arc<ObjectRecord>>> = self
            .keys
            .par_iter()
            .map(|key| match self.store.lookup(key) {
                Lookup::Present(record) => Some(record),
                Lookup::Absent | Lookup::Damaged(_) => None,
            })
            .collect();
        let mut read = vec![false; self.sources.len()];
        let planned = self
            .units
            .iter()
            .zip(&recorded)
            .filter(|(_, r)| r.is_none());
        for (unit, _) in planned {
            for input in &unit.inputs {
                if let UnitInput::Source(s) = *input {
                    read[s] = true;
                }
            }
        }
        let mut source_layouts: Vec<Option<Layout>> = Vec::new();
        let mut failures = Vec::new();
        for (source, &needed) in self.sources.iter().zip(&read) {
            if !needed {
                source_layouts.push(None);
                continue;
            }
            match reader.layout(&source.path, self.pipeline.events, &self.pipeline.choice) {
                Ok(l) => source_layouts.push(Some(l)),
                Err(e) => {
                    failures.push(UnitFailure {
                        stage: SOURCE.into(),
                        subject: Some(source.subject.clone()),
                        // The reader's messages already name the file.
                        message: e.to_string(),
                        diagnostic: None,
                    });
                    source_layouts.push(None);
                }
            }
        }
        let mut layouts: Vec<Option<PlannedLayout>> = Vec::new();
        let mut diagnostics: Vec<Diagnostic> = Vec::new();
        for (u, known) in recorded.into_iter().enumerate() {
            let layout = match known {
                Some(record) => Some(PlannedLayout::Recorded(record)),
                None => self
                    .unit_layout(
                        u,
                        &source_layouts,
                        &layouts,
                        &mut diagnostics,
                        &mut failures,
                    )
                    .map(|l| PlannedLayout::Computed(Arc::new(l))),
            };
            layouts.push(layout);
        }
        self.sizes = self.output_sizes(&source_layouts, &layouts, &mut diagnostics);
        if !diagnostics.is_empty() {
            return Err(RunError::Pipeline(PipelineError::Invalid(diagnostics)));
        }
        if !failures.is_empty() {
            return Err(RunError::Units(failures));
        }
        self.layouts = layouts;
        Ok(())
    }

    /// Every unit's [`OutputSize`]: from its layout where it is known, else from the ops'
    /// bounds down the graph (`None` where not even a bound can be had). A param that cannot
    /// work with the bound layouts (a frequency above Nyquist below an `epoch` that rejects
    /// trials) cannot work with the real ones either, so it is reported here, before anything
    /// runs, like any other param error.
    fn output_sizes(
        &self,
        sources: &[Option<Layout>],
        layouts: &[Option<PlannedLayout>],
        diagnostics: &mut Vec<Diagnostic>,
    ) -> Vec<Option<OutputSize>> {
        let mut bounds: Vec<Option<Layout>> = Vec::with_capacity(self.units.len());
        let mut sizes = Vec::with_capacity(self.units.len());
        for u in 0..self.units.len() {
            if let Some(layout) = &layouts[u] {
                sizes.push(Some(OutputSize::of(layout.layout(), true)));
                bounds.push(None);
                continue;
            }
            let layout_of =
                |i: usize| (layouts[i].as_ref().map(PlannedLayout::layout)).or(bounds[i].as_ref());
            let bound = self.unit_inputs(u, sources, layout_of).and_then(|inputs| {
                let stage = &self.pipeline.stages[self.units[u].stage];
                match stage.op.layout_bound(&inputs) {
                    Ok(bound) => bound,
                    Err(e @ StageError::Param { .. }) => {
                        self.param_diagnostic(u, &e, diagnostics);
                        None
                    }
                    // Data errors of a bound (too few trials, say) need not hold for the real
                    // layout: the run finds them.
                    Err(_) => None,
                }
            });
            sizes.push(bound.as_ref().map(|l| OutputSize::of(l, false)));
            bounds.push(bound);
        }
        sizes
    }

    /// A unit's input layouts, `None` when one is not known.
    fn unit_inputs<'a>(
        &'a self,
        u: usize,
        sources: &'a [Option<Layout>],
        layout_of: impl Fn(usize) -> Option<&'a Layout>,
    ) -> Option<Vec<InputLayout<'a>>> {
        let unit = &self.units[u];
        let mut inputs = Vec::new();
        for input in &unit.inputs {
            let (stage, subject, layout) = match *input {
                UnitInput::Source(s) => (
                    SOURCE,
                    Some(self.sources[s].subject.as_str()),
                    sources[s].as_ref(),
                ),
                UnitInput::Unit(i) => (self.stage_name(i), self.subject(i), layout_of(i)),
            };
            inputs.push(InputLayout {
                stage,
                subject,
                layout: layout?,
            });
        }
        Some(inputs)
    }

    fn unit_layout(
        &self,
        u: usize,
        sources: &[Option<Layout>],
        units: &[Option<PlannedLayout>],
        diagnostics: &mut Vec<Diagnostic>,
        failures: &mut Vec<UnitFailure>,
    ) -> Option<Layout> {
        let unit = &self.units[u];
        let inputs =
            self.unit_inputs(u, sources, |i| units[i].as_ref().map(PlannedLayout::layout))?;
        let stage = &self.pipeline.stages[unit.stage];
        match stage.op.layout(&inputs) {
            Ok(layout) => layout,
            Err(e @ StageError::Param { .. }) => {
                self.param_diagnostic(u, &e, diagnostics);
                None
            }
            Err(e) => {
                failures.push(UnitFailure {
                    stage: stage.name.clone(),
                    subject: self.subject(u).map(str::to_string),
                    message: e.to_string(),
                    diagnostic: None,
                });
                None
            }
        }
    }

    /// A param error of unit `u` as a diagnostic of its stage's line, once per field and line.
    fn param_diagnostic(&self, u: usize, e: &StageError, diagnostics: &mut Vec<Diagnostic>) {
        let mut d = self.pipeline.stage_diagnostic(self.units[u].stage, e);
        if let Some(subject) = self.subject(u) {
            d.message = format!("{} (subject {subject})", d.message);
        }
        if !diagnostics
            .iter()
            .any(|x| x.field == d.field && x.line == d.line)
        {
            diagnostics.push(d);
        }
    }

    /// The folder where a unit's exports go: `<output>/<subject>` or `<output>/group`.
    pub fn export_dir(&self, unit: usize) -> PathBuf {
        self.pipeline
            .output
            .join(self.subject(unit).unwrap_or("group"))
    }
}

/// A unit's output layout known before it runs: its record's, or planned by its op.
#[derive(Clone, Debug)]
pub enum PlannedLayout {
    /// The layout of the unit's record in the cache (computed from the same inputs and params).
    Recorded(Arc<ObjectRecord>),
    /// The layout its op derives from its inputs' layouts.
    Computed(Arc<Layout>),
}

impl PlannedLayout {
    /// The layout.
    pub fn layout(&self) -> &Layout {
        match self {
            PlannedLayout::Recorded(record) => &record.layout,
            PlannedLayout::Computed(layout) => layout,
        }
    }
}

fn file_list(params: &serde_json::Value) -> BTreeSet<(String, String)> {
    params
        .get("files")
        .and_then(|f| f.as_array())
        .map(|files| {
            files
                .iter()
                .map(|f| {
                    let text = |k: &str| {
                        f.get(k)
                            .and_then(|v| v.as_str())
                            .unwrap_or_default()
                            .to_string()
                    };
                    (text("path"), text("blake3"))
                })
                .collect()
        })
        .unwrap_or_default()
}

fn select(all: Vec<Source>, selection: &[String]) -> Result<Vec<Source>, RunError> {
    if selection.is_empty() {
        return Ok(all);
    }
    for wanted in selection {
        if !all.iter().any(|s| &s.subject == wanted) {
            let known: Vec<&str> = all.iter().map(|s| s.subject.as_str()).collect();
            return Err(RunError::UnknownSubject {
                subject: wanted.clone(),
                known: known.join(", "),
            });
        }
    }
    Ok(all
        .into_iter()
        .filter(|s| selection.contains(&s.subject))
        .collect())
}

/// Refuse an output folder that a run would write into what it reads or keeps: the cache
/// folder or a folder inside it (an export could take the name of a cache file, and the cache's
/// housekeeping is no place for results), or a folder holding a recording or a sidecar of the
/// study (an export named like one — a stage `sub-01_task-cue_events` exports
/// `sub-01_task-cue_events.tsv` — would replace it). Checked against every subject's files,
/// whatever `--subject` selects. A cache inside the output folder is accepted: every file
/// phasewise writes there has a name of its own (`manifest.json`, `<stage>.tsv`/`.json`, the
/// `<subject>/` and `group/` folders), none of which a cache folder is.
fn check_output_folder(
    pipeline: &ResolvedPipeline,
    sources: &[Source],
    cache: &Path,
) -> Result<(), RunError> {
    let output = resolved(&pipeline.output);
    let cache_resolved = resolved(cache);
    let refuse = |message: String| {
        RunError::Pipeline(PipelineError::Invalid(vec![
            pipeline.output_diagnostic(message)
        ]))
    };
    if output.starts_with(&cache_resolved) {
        let what = if output == cache_resolved {
            "is"
        } else {
            "is inside"
        };
        return Err(refuse(format!(
            "the output folder `{}` {what} the cache `{}`; expected a folder of its own outside \
             the cache",
            crate::paths::clean(&pipeline.output).display(),
            cache.display()
        )));
    }
    for source in sources {
        for (_, file) in source.files() {
            if resolved(file).starts_with(&output) {
                return Err(refuse(format!(
                    "the output folder `{}` holds `{}`, which the study reads, and an export could \
                     replace it; expected a folder that holds no recording or sidecar (e.g. \
                     derivatives/phasewise)",
                    crate::paths::clean(&pipeline.output).display(),
                    relative_to(file, &pipeline.dir)
                        .unwrap_or_else(|| file.to_path_buf())
                        .display()
                )));
            }
        }
    }
    Ok(())
}

/// `path` made absolute with its symbolic links followed as far as it exists (the rest, not
/// yet created, appended as written), so that two names of one folder compare equal.
fn resolved(path: &Path) -> PathBuf {
    let absolute = crate::paths::normalize(path);
    let mut existing = absolute.as_path();
    let mut missing = Vec::new();
    loop {
        if let Ok(real) = existing.canonicalize() {
            return missing.iter().rev().fold(real, |p, part| p.join(part));
        }
        match (existing.parent(), existing.file_name()) {
            (Some(parent), Some(name)) => {
                missing.push(name.to_os_string());
                existing = parent;
            }
            _ => return absolute,
        }
    }
}
