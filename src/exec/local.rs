//! The local executor: runs a [`Plan`] over a [`Study`] on this machine, as the recipes say.
//!
//! Each subject's chain of units runs on its own rayon task (`--jobs N` sizes the pool), the
//! units of a chain in topological order; group units run afterwards, in order. Results are
//! collected by unit index, never in completion order, so outputs and manifests are identical
//! for any number of threads.
//!
//! Values are obtained on demand: from memory if a unit of the same chain just produced them,
//! else from the store (hash-checked), else by computing the unit — which is also what happens
//! when a cached object turns out to be damaged (with a warning) and for `cache: false` stages.
//! An array is dropped from memory as soon as the last consumer in its chain has run.
//! A failing unit stops its subject's chain; other chains finish and stay cached, group units
//! are skipped, and the run reports every failure with its stage and subject.

use std::collections::{BTreeMap, HashMap};
use std::sync::Arc;
use std::time::Instant;

use indicatif::ProgressBar;
use phasewise_stages::{Input, InputLayout, LabelledArray, Layout, Notes, OwnedInput, StageError};
use rayon::prelude::*;

use crate::fsio;
use crate::graph::UnitInput;
use crate::output::{self, ExportError, ExportFrom, ExportTarget};
use crate::parts;
use crate::pipeline::SOURCE;
use crate::plan::{Plan, Reason, Status};
use crate::recipe::{Decider, How, Known, Recipe};
use crate::slabs;
use crate::sources::Reader;
use crate::store::{LoadError, Lookup, ObjectRecord};
use crate::study::{RunError, Study, UnitFailure};

use super::{Executor, Job, Outcome, UnitResult, Warning};

/// The executor of one machine: each subject's chain on a task of the current rayon pool (a
/// run's [`super::pool`]), then the group units.
pub struct Local;

impl Executor for Local {
    fn execute(&self, job: Job<'_>) -> Result<Outcome, RunError> {
        execute(job)
    }
}

fn execute(job: Job<'_>) -> Result<Outcome, RunError> {
    let Job {
        study,
        plan,
        recipes,
        reader,
        bar,
    } = job;
    // Exports of objects this run wrote are linked by a thread of their own, which spends its
    // time waiting for the disk (the fsync that makes an export durable), so that the compute
    // threads go on meanwhile; the run waits for it before the manifest is written.
    std::thread::scope(|scope| {
        let (sender, queue) = std::sync::mpsc::channel::<(usize, Arc<ObjectRecord>)>();
        let exporter = scope.spawn(move || export_queued(study, recipes, queue));
        let ctx = Ctx {
            study,
            plan,
            planned: recipes,
            decider: Decider::new(study, plan),
            reader,
            bar,
            exports: sender,
        };
        let chains: Vec<Vec<usize>> = (0..study.sources.len())
            .map(|s| units_where(study, |u| study.units[u].subject == Some(s)))
            .collect();
        let done: Vec<ChainResult> = chains.par_iter().map(|c| ctx.run_chain(c)).collect();
        let mut merged = Merged::default();
        let mut prepared = HashMap::new();
        for mut chain in done {
            prepared.extend(std::mem::take(&mut chain.prepared));
            merged.absorb(chain);
        }
        if merged.failures.is_empty() {
            let group = units_where(study, |u| study.units[u].subject.is_none());
            let chain = ctx.run_chain_with(&group, prepared);
            merged.absorb(chain);
        }
        // Closes the queue: the exporter ends once it has linked what is in it.
        drop(ctx);
        let failures = exporter.join().unwrap_or_else(|_| {
            vec![UnitFailure {
                stage: String::new(),
                subject: None,
                message: "internal: the export thread panicked".into(),
                diagnostic: None,
            }]
        });
        merged.failures.extend(failures);
        merged.finish(study)
    })
}

/// Link the exports queued by the chains (objects this run wrote and that are unchanged since,
/// see [`crate::store::Store::wrote_intact`]), in the order they arrive; the failures, one per
/// unit whose export could not be written.
///
/// An object that no unit reads back from the store (every reader takes the form prepared in
/// the unit's own chain, or there is none) has its pages dropped from the page cache once its
/// export is on disk ([`fsio::drop_cached`]): the files the run writes next reuse that memory.
fn export_queued(
    study: &Study,
    recipes: &[Recipe],
    queue: std::sync::mpsc::Receiver<(usize, Arc<ObjectRecord>)>,
) -> Vec<UnitFailure> {
    let mut failures = Vec::new();
    for (u, record) in queue {
        let target = ExportTarget {
            output: &study.pipeline.output,
            subject: study.subject(u),
            stage: study.stage_name(u),
            // Only NPY exports are queued (a Zarr store is written where the unit is exported).
            format: output::ExportFormat::Npy,
        };
        match output::export(&target, &record, ExportFrom::Object, &study.store) {
            Ok(_) if !read_back(study, recipes, u) => {
                fsio::drop_cached(&study.store.object_paths(&record.key).0);
            }
            Ok(_) => {}
            // Changed by someone else since it was queued: nothing was exported (the export
            // names the checked object or nothing), and the next run computes it again.
            Err(ExportError::Damaged(why)) => failures.push(unit_failure(
                study,
                u,
                format!("its cached result changed during the run ({why}); run again"),
            )),
            Err(ExportError::Output(e)) => failures.push(unit_failure(study, u, e.to_string())),
        }
    }
    failures
}

/// True when some unit reads unit `u`'s output from the store (whole or in slabs), in this
/// run or in a later one where only that unit is stale: a reader other than a group unit that
/// `u`'s chain prepares for.
fn read_back(study: &Study, recipes: &[Recipe], u: usize) -> bool {
    let prepared = &recipes[u].prepared_for_units;
    study
        .units
        .iter()
        .enumerate()
        .any(|(v, unit)| unit.inputs.contains(&UnitInput::Unit(u)) && !prepared.contains(&v))
}

/// A failure of unit `u`.
fn unit_failure(study: &Study, u: usize, message: impl Into<String>) -> UnitFailure {
    UnitFailure {
        stage: study.stage_name(u).to_string(),
        subject: study.subject(u).map(str::to_string),
        message: message.into(),
        diagnostic: None,
    }
}

/// The op inputs for `held` arrays; their carried warnings are appended to `warnings`.
fn as_inputs<'h>(
    study: &'h Study,
    held: &'h [(UnitInput, Held)],
    warnings: &mut Vec<String>,
) -> Vec<Input<'h>> {
    held.iter()
        .map(|(input, (array, carried))| {
            warnings.extend(carried.iter().cloned());
            let (stage, subject) = study.origin(*input);
            Input {
                stage,
                subject,
                array: array.as_ref(),
            }
        })
        .collect()
}

fn units_where(study: &Study, keep: impl Fn(usize) -> bool) -> Vec<usize> {
    (0..study.units.len()).filter(|&u| keep(u)).collect()
}

struct Ctx<'a> {
    study: &'a Study,
    plan: &'a Plan,
    /// The recipes decided before the run ([`crate::recipe::decide_all`]).
    planned: &'a [Recipe],
    decider: Decider<'a>,
    reader: &'a dyn Reader,
    bar: &'a ProgressBar,
    /// The queue of the export thread ([`export_queued`]).
    exports: std::sync::mpsc::Sender<(usize, Arc<ObjectRecord>)>,
}

/// What one chain produced.
#[derive(Default)]
struct ChainResult {
    results: BTreeMap<usize, UnitResult>,
    /// Inputs of group units prepared where they were produced: (group unit, input unit).
    prepared: HashMap<(usize, usize), Held>,
    warnings: Vec<(usize, String)>,
    failure: Option<UnitFailure>,
}

#[derive(Default)]
struct Merged {
    results: BTreeMap<usize, UnitResult>,
    warnings: Vec<(usize, String)>,
    failures: Vec<UnitFailure>,
}

impl Merged {
    fn absorb(&mut self, chain: ChainResult) {
        for (u, r) in chain.results {
            // A unit recomputed by another chain (a `cache: false` input of a group unit) counts
            // as computed.
            let entry = self.results.entry(u).or_insert_with(|| r.clone());
            if r.computed && !entry.computed {
                entry.computed = true;
                entry.seconds = r.seconds;
            }
            if entry.export.is_none() {
                entry.export = r.export;
            }
            if entry.recipe.is_none() {
                entry.recipe = r.recipe;
            }
        }
        self.warnings.extend(chain.warnings);
        self.failures.extend(chain.failure);
    }

    fn finish(mut self, study: &Study) -> Result<Outcome, RunError> {
        if !self.failures.is_empty() {
            return Err(RunError::Units(self.failures));
        }
        self.warnings.sort_by_key(|(u, _)| *u);
        let warnings = self
            .warnings
            .into_iter()
            .map(|(u, message)| Warning {
                stage: study.stage_name(u).to_string(),
                subject: study.subject(u).map(str::to_string),
                message,
            })
            .collect();
        let results: Vec<UnitResult> = self.results.into_values().collect();
        if results.len() != study.units.len() {
            return Err(RunError::Other(format!(
                "internal: {} of {} units have results",
                results.len(),
                study.units.len()
            )));
        }
        Ok(Outcome { results, warnings })
    }
}

/// An array in memory, with the notes of reading it (for sources).
type Held = (Arc<LabelledArray>, Vec<String>);

struct Worker<'c, 'a> {
    ctx: &'c Ctx<'a>,
    memory: HashMap<UnitInput, Held>,
    /// Inputs already prepared for a group unit (by the chains that produced them).
    prepared: HashMap<(usize, usize), Held>,
    /// Consumers left in this chain, per array held.
    uses_left: HashMap<UnitInput, usize>,
    /// The recipes of this chain's units, decided as the chain reaches them.
    recipes: HashMap<usize, Recipe>,
    /// Layouts derived during the run for units whose layout depended on values.
    derived: HashMap<usize, Arc<Layout>>,
    out: ChainResult,
}

/// What a chain knows when it decides a recipe: the layouts of the units it computed (their
/// records), the planned ones, those derived since, and the recipes decided so far.
struct ChainKnown<'w> {
    study: &'w Study,
    results: &'w BTreeMap<usize, UnitResult>,
    derived: &'w HashMap<usize, Arc<Layout>>,
    recipes: &'w HashMap<usize, Recipe>,
}

impl Known for ChainKnown<'_> {
    fn layout(&self, u: usize) -> Option<&Layout> {
        if let Some(r) = self.results.get(&u) {
            return Some(&r.record.layout);
        }
        if let Some(l) = self.study.layouts.get(u).and_then(Option::as_ref) {
            return Some(l.layout());
        }
        self.derived.get(&u).map(Arc::as_ref)
    }
    fn recipe(&self, u: usize) -> Option<&Recipe> {
        self.recipes.get(&u)
    }
}

impl Ctx<'_> {
    fn run_chain(&self, chain: &[usize]) -> ChainResult {
        self.run_chain_with(chain, HashMap::new())
    }

    fn run_chain_with(
        &self,
        chain: &[usize],
        prepared: HashMap<(usize, usize), Held>,
    ) -> ChainResult {
        let mut worker = Worker {
            ctx: self,
            memory: HashMap::new(),
            prepared,
            uses_left: HashMap::new(),
            recipes: HashMap::new(),
            derived: HashMap::new(),
            out: ChainResult::default(),
        };
        for &u in chain {
            for input in &self.study.units[u].inputs {
                *worker.uses_left.entry(*input).or_default() += 1;
            }
        }
        for &u in chain {
            let recipe = worker.decide(u);
            worker.recipes.insert(u, recipe.clone());
            if recipe.how == How::Deferred {
                // Its consumers compute it when they run (in their own chain).
                self.bar.inc(1);
                continue;
            }
            match worker.process(u, &recipe) {
                Ok(ran) => worker.recipes.insert(u, ran),
                Err(failure) => {
                    worker.out.failure = Some(failure);
                    break;
                }
            };
            worker.release_inputs(u);
            self.bar.inc(1);
        }
        for (u, result) in worker.out.results.iter_mut() {
            if result.computed && result.recipe.is_none() {
                // Computed on demand for a consumer in this chain (a deferred unit of another
                // chain, or a damaged object recomputed): its planned recipe says which.
                let recipe = worker.recipes.get(u).unwrap_or(&self.planned[*u]);
                result.recipe = Some(recipe.clone());
            }
        }
        worker.out
    }
}

impl Worker<'_, '_> {
    fn study(&self) -> &Study {
        self.ctx.study
    }

    fn fail(&self, u: usize, message: impl Into<String>) -> UnitFailure {
        unit_failure(self.study(), u, message)
    }

    /// An op's error; a param error also points at the param's line.
    fn op_failure(&self, u: usize, error: &StageError) -> UnitFailure {
        let mut failure = self.fail(u, error.to_string());
        if matches!(error, StageError::Param { .. }) {
            let stage = self.study().units[u].stage;
            failure.diagnostic = Some(Box::new(
                self.study().pipeline.stage_diagnostic(stage, error),
            ));
        }
        failure
    }

    /// Unit `u`'s recipe, decided on what this chain knows now: the layouts of the units it
    /// computed and of those derived from them, so a recipe that was provisional in the plan
    /// is settled here by the same rules.
    fn decide(&mut self, u: usize) -> Recipe {
        let study = self.ctx.study;
        self.derive_layout(u);
        for input in &study.units[u].inputs {
            if let UnitInput::Unit(i) = *input {
                self.derive_layout(i);
            }
        }
        self.ctx.decider.decide(u, &self.known())
    }

    fn known(&self) -> ChainKnown<'_> {
        ChainKnown {
            study: self.ctx.study,
            results: &self.out.results,
            derived: &self.derived,
            recipes: &self.recipes,
        }
    }

    /// Derive unit `u`'s layout from its inputs' when it is not known yet (its op's `layout`,
    /// as the plan does); nothing when it cannot be.
    fn derive_layout(&mut self, u: usize) {
        let study = self.ctx.study;
        if self.known().layout(u).is_some() {
            return;
        }
        for input in &study.units[u].inputs {
            match *input {
                UnitInput::Unit(i) => self.derive_layout(i),
                // A unit reading a recording has a planned layout unless its op cannot say.
                UnitInput::Source(_) => return,
            }
        }
        let known = self.known();
        let mut inputs = Vec::new();
        for input in &study.units[u].inputs {
            let UnitInput::Unit(i) = *input else {
                return;
            };
            let Some(layout) = known.layout(i) else {
                return;
            };
            let (stage, subject) = study.origin(*input);
            inputs.push(InputLayout {
                stage,
                subject,
                layout,
            });
        }
        let stage = &study.pipeline.stages[study.units[u].stage];
        if let Ok(Some(layout)) = stage.op.layout(&inputs) {
            self.derived.insert(u, Arc::new(layout));
        }
    }

    /// Bring one unit up to date as its recipe says, and export it if asked. Returns the recipe
    /// it ran with: the one given, or `whole` when a slab run gave up.
    fn process(&mut self, u: usize, recipe: &Recipe) -> Result<Recipe, UnitFailure> {
        if let Status::Stale(reasons) = &self.ctx.plan.units[u].status {
            for reason in reasons {
                if let Reason::Damaged { why } = reason {
                    self.warn_damaged(u, why);
                }
            }
        }
        let mut ran = recipe.clone();
        let mut prepared_here = false;
        let array = match &recipe.how {
            How::Cached => self.record_cached(u)?,
            // Computed part by part inside its consumer's unit (see `parts`), or by its
            // consumers in other chains.
            How::Streamed { .. } | How::Deferred => None,
            How::Slabs { axes } => {
                match self.compute_slabs(u, *axes, &recipe.prepared_for_units)? {
                    Ok(()) => {
                        prepared_here = true;
                        None
                    }
                    Err(why) => {
                        ran.how = How::Whole;
                        ran.fallback = Some(format!("computed whole, not in slabs: {why}"));
                        Some(self.compute(u)?)
                    }
                }
            }
            How::Parts {
                producer, spooled, ..
            } => self.compute_streamed((*producer, u), *spooled)?,
            How::Whole | How::Joined => Some(self.compute(u)?),
        };
        let study = self.ctx.study;
        let stage = &study.pipeline.stages[study.units[u].stage];
        let groups = &recipe.prepared_for_units;
        if !groups.is_empty() && !prepared_here {
            let whole = match &array {
                Some(a) => a.clone(),
                None => self.values(UnitInput::Unit(u))?.0,
            };
            self.prepare_for_groups(u, &whole, groups)?;
        }
        if stage.export {
            self.export(u, array)?;
        }
        if !self.uses_left.contains_key(&UnitInput::Unit(u)) {
            self.memory.remove(&UnitInput::Unit(u));
        }
        Ok(ran)
    }

    /// Prepare unit `u`'s array for each group unit in `groups` (its recipe's `prepared_for`).
    fn prepare_for_groups(
        &mut self,
        u: usize,
        whole: &LabelledArray,
        groups: &[usize],
    ) -> Result<(), UnitFailure> {
        let study = self.ctx.study;
        let input = Input {
            stage: study.stage_name(u),
            subject: study.subject(u),
            array: whole,
        };
        for &g in groups {
            let stage = &study.pipeline.stages[study.units[g].stage];
            if let Some(result) = stage.op.prepare(&input) {
                let small = result.map_err(|e| self.op_failure(g, &e))?;
                self.out
                    .prepared
                    .insert((g, u), (Arc::new(small), Vec::new()));
            }
        }
        Ok(())
    }

    /// Record a fresh unit; the array when it had to be computed after all.
    fn record_cached(&mut self, u: usize) -> Result<Option<Arc<LabelledArray>>, UnitFailure> {
        match self.study().store.lookup(&self.study().keys[u]) {
            Lookup::Present(record) => {
                self.out.results.insert(
                    u,
                    UnitResult {
                        record,
                        computed: false,
                        seconds: 0.0,
                        export: None,
                        recipe: None,
                    },
                );
                Ok(None)
            }
            // Gone or damaged since the plan was made (another process, a disk): recompute.
            Lookup::Absent | Lookup::Damaged(_) => self.compute(u).map(Some),
        }
    }

    fn warn_damaged(&mut self, u: usize, why: &dyn std::fmt::Display) {
        tracing::warn!(
            stage = %self.study().stage_name(u),
            subject = ?self.study().subject(u),
            "damaged cache object recomputed: {why}"
        );
        self.out.warnings.push((
            u,
            format!("the cached result was damaged ({why}); it was recomputed"),
        ));
    }

    fn record_of(&self, u: usize) -> Result<Arc<ObjectRecord>, UnitFailure> {
        match self.out.results.get(&u) {
            Some(r) => Ok(Arc::clone(&r.record)),
            None => Err(self.fail(u, "internal: export before result")),
        }
    }

    /// Export a unit unless its exported files already hold its result. `array` is its value
    /// when this run has it in memory; else the stored object is copied (hash-checked on the
    /// way), or loaded for a table, and a damaged object is recomputed.
    fn export(&mut self, u: usize, array: Option<Arc<LabelledArray>>) -> Result<(), UnitFailure> {
        let study = self.ctx.study;
        let target = ExportTarget {
            output: &study.pipeline.output,
            subject: study.subject(u),
            stage: study.stage_name(u),
            format: study.pipeline.stages[study.units[u].stage].format,
        };
        let record = self.record_of(u)?;
        let file = if output::is_current(&target, &record, &study.store) {
            target.relative_path()
        } else if target.format == output::ExportFormat::Npy
            && record.stored
            && !output::is_table(&record)
            && study.store.wrote_intact_object(&record.key, &record)
        {
            // Written by this run: linked (and made durable) by the export thread.
            let _ = self.ctx.exports.send((u, Arc::clone(&record)));
            target.relative_path()
        } else {
            let array = match array {
                Some(a) => Some(a),
                // `cache: false`: the values were never stored.
                None if !record.stored => Some(self.compute(u)?),
                None if output::is_table(&record) => match study.store.load(&record.key) {
                    Ok((a, _)) => Some(Arc::new(a)),
                    Err(e) => {
                        if let LoadError::Damaged(why) = e {
                            self.warn_damaged(u, &why);
                        }
                        Some(self.compute(u)?)
                    }
                },
                None => None,
            };
            let from = match &array {
                Some(a) => ExportFrom::Array(a),
                None => ExportFrom::Object,
            };
            let record = self.record_of(u)?;
            match output::export(&target, &record, from, &study.store) {
                Ok(file) => file,
                Err(ExportError::Output(e)) => return Err(self.fail(u, e.to_string())),
                Err(ExportError::Damaged(why)) => {
                    self.warn_damaged(u, &why);
                    let array = self.compute(u)?;
                    let record = self.record_of(u)?;
                    output::export(&target, &record, ExportFrom::Array(&array), &study.store)
                        .map_err(|e| match e {
                            ExportError::Output(e) => self.fail(u, e.to_string()),
                            ExportError::Damaged(why) => self.fail(u, why.to_string()),
                        })?
                }
            }
        };
        if let Some(r) = self.out.results.get_mut(&u) {
            r.export = Some(file);
        }
        Ok(())
    }

    /// The values of an input: memory, then the store, then computing it. The array is kept in
    /// memory only while a later unit of this chain still needs it.
    fn values(&mut self, input: UnitInput) -> Result<Held, UnitFailure> {
        if let Some(held) = self.memory.get(&input) {
            return Ok(held.clone());
        }
        let held = match input {
            UnitInput::Source(s) => self.read_source(s)?,
            UnitInput::Unit(u) => match self.study().store.load(&self.study().keys[u]) {
                Ok((array, _)) => (Arc::new(array), Vec::new()),
                Err(e) => {
                    if let LoadError::Damaged(why) = e {
                        self.warn_damaged(u, &why);
                    }
                    (self.compute(u)?, Vec::new())
                }
            },
        };
        if self.uses_left.contains_key(&input) {
            self.memory.insert(input, held.clone());
        }
        Ok(held)
    }

    fn read_source(&mut self, s: usize) -> Result<Held, UnitFailure> {
        let study = self.ctx.study;
        let source = &study.sources[s];
        let mut notes = Notes::default();
        let array = self
            .ctx
            .reader
            .read(
                &source.path,
                study.pipeline.events,
                &study.pipeline.choice,
                &mut notes,
            )
            .map_err(|e| UnitFailure {
                stage: SOURCE.into(),
                subject: Some(source.subject.clone()),
                message: format!("{}: {e}", study.display_path(&source.path)),
                diagnostic: None,
            })?;
        let warnings = notes
            .warnings
            .into_iter()
            .map(|w| format!("reading {}: {w}", study.display_path(&source.path)))
            .collect();
        Ok((Arc::new(array), warnings))
    }

    /// Run one unit's op and store the result (kept in memory while this chain still needs it).
    fn compute(&mut self, u: usize) -> Result<Arc<LabelledArray>, UnitFailure> {
        let study = self.ctx.study;
        if let Some((p, _)) = self.ctx.decider.streamed_input(u) {
            if !self.memory.contains_key(&UnitInput::Unit(p)) {
                let whole = self.compute_streamed((p, u), false)?;
                return whole.ok_or_else(|| self.fail(u, "internal: a streamed unit was spooled"));
            }
        }
        let started = Instant::now();
        if let Some((array, notes)) = self.run_owned(u)? {
            return self.store_result(u, array, &notes, started.elapsed().as_secs_f64());
        }
        let unit = &study.units[u];
        let stage = &study.pipeline.stages[unit.stage];
        // An op that prepares its inputs gets each one prepared as soon as it is loaded (or
        // finds it prepared by the chain that produced it); the whole input is dropped before
        // the next one is loaded.
        let prepared = stage.op.prepares();
        let mut held = Vec::new();
        for &input in &unit.inputs {
            if let UnitInput::Unit(i) = input {
                if let Some(ready) = self.prepared.remove(&(u, i)) {
                    held.push((input, ready));
                    continue;
                }
            }
            let (array, warnings) = self.values(input)?;
            if !prepared {
                held.push((input, (array, warnings)));
                continue;
            }
            let (stage_name, subject) = study.origin(input);
            let whole = Input {
                stage: stage_name,
                subject,
                array: array.as_ref(),
            };
            let Some(result) = stage.op.prepare(&whole) else {
                return Err(self.fail(u, "internal: an input could not be prepared"));
            };
            let small = result.map_err(|e| self.op_failure(u, &e))?;
            drop(array);
            if self.uses_left.get(&input) == Some(&1) {
                // This unit is its last use in the chain.
                self.memory.remove(&input);
            }
            held.push((input, (Arc::new(small), warnings)));
        }
        let mut notes = Notes::default();
        let inputs = as_inputs(study, &held, &mut notes.warnings);
        tracing::info!(stage = %stage.name, subject = ?study.subject(u), "computing");
        let array = if prepared {
            stage.op.join(&inputs, &mut notes)
        } else {
            stage.op.run(&inputs, &mut notes)
        }
        .map_err(|e| self.op_failure(u, &e))?;
        drop(inputs);
        drop(held);
        self.store_result(u, array, &notes, started.elapsed().as_secs_f64())
    }

    /// Run unit `u`'s op on its only input handed over whole ([`phasewise_stages::Op::run_owned`])
    /// when this unit is that array's last use in the chain and nothing else holds it; `None`
    /// (and the input left as it was) otherwise.
    fn run_owned(&mut self, u: usize) -> Result<Option<(LabelledArray, Notes)>, UnitFailure> {
        let study = self.ctx.study;
        let unit = &study.units[u];
        let stage = &study.pipeline.stages[unit.stage];
        let [input] = unit.inputs[..] else {
            return Ok(None);
        };
        let ready = matches!(input, UnitInput::Unit(i) if self.prepared.contains_key(&(u, i)));
        if ready || stage.op.prepares() || self.uses_left.get(&input) != Some(&1) {
            return Ok(None);
        }
        let (array, carried) = self.values(input)?;
        // The chain's own copy goes first, so that the array is ours alone if no other holds it.
        let was_held = self.memory.remove(&input).is_some();
        let array = match Arc::try_unwrap(array) {
            Ok(array) => array,
            Err(shared) => {
                if was_held {
                    self.memory.insert(input, (shared, carried));
                }
                return Ok(None);
            }
        };
        let mut notes = Notes::default();
        notes.warnings.extend(carried);
        let (stage_name, subject) = study.origin(input);
        let owned = OwnedInput {
            stage: stage_name,
            subject,
            array,
        };
        tracing::info!(stage = %stage.name, subject = ?study.subject(u), "computing");
        let array = stage
            .op
            .run_owned(owned, &mut notes)
            .map_err(|e| self.op_failure(u, &e))?;
        Ok(Some((array, notes)))
    }

    /// Store a computed unit's output, keep it while the chain needs it, record its result.
    fn store_result(
        &mut self,
        u: usize,
        array: LabelledArray,
        notes: &Notes,
        seconds: f64,
    ) -> Result<Arc<LabelledArray>, UnitFailure> {
        let study = self.ctx.study;
        let stage = &study.pipeline.stages[study.units[u].stage];
        let fingerprint = &study.fingerprints[u];
        let record = study
            .store
            .put(&array, notes, fingerprint, stage.cache)
            .map_err(|e| self.fail(u, e.to_string()))?;
        let array = Arc::new(array);
        if self.uses_left.contains_key(&UnitInput::Unit(u)) {
            self.memory
                .insert(UnitInput::Unit(u), (array.clone(), Vec::new()));
        }
        self.record_result(u, record, seconds);
        Ok(array)
    }

    /// Note that unit `u` was computed in this run (its object just written as `record`).
    fn record_result(&mut self, u: usize, record: ObjectRecord, seconds: f64) {
        let study = self.ctx.study;
        study
            .store
            .set_last(&study.last_id(u), &study.fingerprints[u]);
        let export = self.out.results.get(&u).and_then(|r| r.export.clone());
        self.out.results.insert(
            u,
            UnitResult {
                record: Arc::new(record),
                computed: true,
                seconds,
                export,
                recipe: None,
            },
        );
    }

    /// Unit `u` box by box from its stored input ([`slabs`]), cut after `axes` leading axes,
    /// each box prepared for the group units `groups` (its recipe). `Ok(())` when done (result
    /// recorded, stored, prepared for the groups); `Err(why)` when the unit is to be computed
    /// whole after all (the input in memory, gone or damaged, or a box the op noted something
    /// about), which then also finds and reports a damaged input.
    fn compute_slabs(
        &mut self,
        u: usize,
        axes: usize,
        groups: &[usize],
    ) -> Result<Result<(), WholeAfterAll>, UnitFailure> {
        let study = self.ctx.study;
        let unit = &study.units[u];
        let stage = &study.pipeline.stages[unit.stage];
        let [input @ UnitInput::Unit(i)] = unit.inputs[..] else {
            return Ok(Err(WholeAfterAll::NotOneInput));
        };
        if self.memory.contains_key(&input) {
            return Ok(Err(WholeAfterAll::InputInMemory));
        }
        let Lookup::Present(record) = study.store.lookup(&study.keys[i]) else {
            return Ok(Err(WholeAfterAll::InputNotCached));
        };
        let (stage_name, subject) = study.origin(input);
        let whole_input = [InputLayout {
            stage: stage_name,
            subject,
            layout: &record.layout,
        }];
        let Ok(Some(out_layout)) = stage.op.layout(&whole_input) else {
            return Ok(Err(WholeAfterAll::LayoutUnknown));
        };
        if !record.stored {
            return Ok(Err(WholeAfterAll::InputNotStored));
        }
        let k = axes;
        let group_stages: Vec<_> = groups
            .iter()
            .map(|&g| &study.pipeline.stages[study.units[g].stage])
            .collect();
        let started = Instant::now();
        let element = if record.layout.complex { 8 } else { 4 };
        let boxes = slabs::boxes(&record.shape, k, element);
        let mut prepared: Vec<Vec<LabelledArray>> = vec![Vec::new(); groups.len()];
        tracing::info!(stage = %stage.name, subject = ?study.subject(u), "computing in slabs");
        let written =
            study
                .store
                .put_slabs(&out_layout, &study.fingerprints[u], stage.cache, |write| {
                    let read =
                        study
                            .store
                            .read_slabs(&study.keys[i], &record, &boxes, |b, slab| {
                                let mut notes = Notes::default();
                                let owned = OwnedInput {
                                    stage: stage_name,
                                    subject,
                                    array: slab,
                                };
                                let out = stage
                                    .op
                                    .run_owned(owned, &mut notes)
                                    .map_err(WholeAfterAll::BoxFailed)?;
                                if notes != Notes::default() {
                                    return Err(WholeAfterAll::BoxNoted);
                                }
                                if out.layout
                                    != slabs::box_layout(&out_layout, b)
                                        .map_err(WholeAfterAll::BoxFailed)?
                                {
                                    return Err(WholeAfterAll::BoxNotACut);
                                }
                                slabs::value_bytes(&out.values, &mut *write)
                                    .map_err(WholeAfterAll::Write)?;
                                let input = Input {
                                    stage: &stage.name,
                                    subject: study.subject(u),
                                    array: &out,
                                };
                                for (g, list) in group_stages.iter().zip(&mut prepared) {
                                    match g.op.prepare(&input) {
                                        Some(Ok(small)) => list.push(small),
                                        Some(Err(e)) => return Err(WholeAfterAll::BoxFailed(e)),
                                        None => return Err(WholeAfterAll::GroupDidNotPrepare),
                                    }
                                }
                                Ok(())
                            });
                    read.map(|()| Notes::default()).map_err(|stop| match stop {
                        slabs::SlabStop::Damaged(d) => WholeAfterAll::InputDamaged(d),
                        slabs::SlabStop::Declined(d) => WholeAfterAll::Declined(d),
                        slabs::SlabStop::Visitor(why) => why,
                    })
                });
        let record = match written {
            Ok(Ok(record)) => record,
            Ok(Err(why)) => {
                tracing::debug!(stage = %stage.name, subject = ?study.subject(u), "computed whole: {why}");
                return Ok(Err(why));
            }
            Err(e) => return Err(self.fail(u, e.to_string())),
        };
        for (&g, parts) in groups.iter().zip(prepared) {
            let joined = slabs::join_boxes(parts, &boxes).map_err(|e| self.op_failure(g, &e))?;
            self.out
                .prepared
                .insert((g, u), (Arc::new(joined), Vec::new()));
        }
        self.record_result(u, record, started.elapsed().as_secs_f64());
        Ok(Ok(()))
    }

    /// Producer `p` and its consumer `u` part by part ([`parts`]): the producer gets a record
    /// without values, the consumer is stored. Returns the consumer's array, joined in memory;
    /// or, when `spool` allows, `u` is stored and every consumer of `u` could read it in slabs
    /// ([`crate::recipe::Decider::slabs_can_read`]), `None`: the parts went through a [`slabs::Spool`] into the store
    /// and `u` was never whole in memory.
    fn compute_streamed(
        &mut self,
        (p, u): (usize, usize),
        spool: bool,
    ) -> Result<Option<Arc<LabelledArray>>, UnitFailure> {
        let started = Instant::now();
        let study = self.ctx.study;
        let mut held = Vec::new();
        for &input in &study.units[p].inputs {
            held.push((input, self.values(input)?));
        }
        let mut carried = Vec::new();
        let inputs = as_inputs(study, &held, &mut carried);
        let plan =
            parts::plan(study, (p, u), &inputs).map_err(|(at, e)| self.op_failure(at, &e))?;
        let spooled = match &plan.consumer_layout {
            Some(out) if spool => {
                let axis = plan.axis;
                let k = out.axis(axis).map_err(|e| self.op_failure(u, &e))?;
                let dir = study.store.root().join("objects");
                let spool = slabs::Spool::new(&dir, out, k).map_err(|e| {
                    self.fail(
                        u,
                        format!(
                            "cannot spool in {}: {}",
                            dir.display(),
                            fsio::WriteReason(&e, fsio::Destination::Cache)
                        ),
                    )
                })?;
                Some(spool)
            }
            _ => None,
        };
        tracing::info!(
            stage = %study.stage_name(u),
            subject = ?study.subject(u),
            "computing in parts{}",
            if spooled.is_some() { ", spooled" } else { "" }
        );
        let (streamed, output) = match spooled {
            Some(mut spool) => {
                let streamed = parts::run(study, (p, u), &plan, &inputs, |part| spool.push(&part));
                (streamed, Err(spool))
            }
            None => {
                let mut joined = parts::Joined::new(&plan).map_err(|e| self.op_failure(u, &e))?;
                let streamed = parts::run(study, (p, u), &plan, &inputs, |part| joined.push(part));
                (streamed, Ok(joined))
            }
        };
        let streamed = streamed.map_err(|(at, e)| self.op_failure(at, &e))?;
        drop(inputs);
        drop(held);
        let mut producer_notes = streamed.producer_notes;
        producer_notes.warnings.splice(0..0, carried);
        let record = study
            .store
            .put_streamed(
                &plan.producer_layout,
                streamed.producer_dtype,
                &producer_notes,
                &study.fingerprints[p],
            )
            .map_err(|e| self.fail(p, e.to_string()))?;
        study
            .store
            .set_last(&study.last_id(p), &study.fingerprints[p]);
        self.out.results.insert(
            p,
            UnitResult {
                record: Arc::new(record),
                computed: true,
                seconds: streamed.producer_seconds,
                export: None,
                recipe: None,
            },
        );
        let notes = &streamed.consumer_notes;
        let producer_seconds = streamed.producer_seconds;
        let seconds = || (started.elapsed().as_secs_f64() - producer_seconds).max(0.0);
        match output {
            Ok(joined) => {
                let array = joined.finish().map_err(|e| self.op_failure(u, &e))?;
                self.store_result(u, array, notes, seconds()).map(Some)
            }
            Err(spool) => {
                let record = match spool.commit(&study.store, &study.fingerprints[u], notes) {
                    Ok(Ok(record)) => record,
                    Ok(Err(why)) => return Err(self.fail(u, why.to_string())),
                    Err(e) => return Err(self.fail(u, e.to_string())),
                };
                self.record_result(u, record, seconds());
                Ok(None)
            }
        }
    }

    /// Drop arrays whose last consumer in this chain has run.
    fn release_inputs(&mut self, u: usize) {
        for input in &self.ctx.study.units[u].inputs {
            if let Some(left) = self.uses_left.get_mut(input) {
                *left = left.saturating_sub(1);
                if *left == 0 {
                    self.uses_left.remove(input);
                    self.memory.remove(input);
                }
            }
        }
    }
}

/// Why a unit whose recipe said "in slabs" was computed whole after all. Recorded in the
/// manifest as [`Recipe::fallback`]; a damaged input is then found and reported by the whole run.
#[derive(Debug, thiserror::Error)]
enum WholeAfterAll {
    #[error("it has not one input")]
    NotOneInput,
    #[error("its input is in memory")]
    InputInMemory,
    #[error("its input is not in the cache")]
    InputNotCached,
    #[error("its layout is not known in advance")]
    LayoutUnknown,
    #[error("its input's values are not stored")]
    InputNotStored,
    #[error("the op noted something about one box")]
    BoxNoted,
    #[error("a box's output is not the whole output's cut")]
    BoxNotACut,
    #[error("a group unit did not prepare")]
    GroupDidNotPrepare,
    #[error("{0}")]
    BoxFailed(StageError),
    #[error("writing a box: {0}")]
    Write(std::io::Error),
    #[error(transparent)]
    InputDamaged(crate::store::Damage),
    #[error(transparent)]
    Declined(slabs::SlabDecline),
}
