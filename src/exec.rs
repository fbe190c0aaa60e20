//! The executor: runs a [`Plan`] over a [`Study`].
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

use crate::graph::UnitInput;
use crate::output::{self, ExportError, ExportFrom, ExportTarget};
use crate::parts;
use crate::pipeline::SOURCE;
use crate::plan::{Plan, Reason, Status};
use crate::slabs;
use crate::sources::Reader;
use crate::store::{LoadError, Lookup, ObjectRecord};
use crate::study::{RunError, Study, UnitFailure};

/// What happened to one unit.
#[derive(Clone, Debug)]
pub struct UnitResult {
    /// The object record (layout, hash, notes), shared with the store's memo.
    pub record: Arc<ObjectRecord>,
    /// True when the unit ran in this run.
    pub computed: bool,
    /// Seconds spent computing it in this run (0 when cached).
    pub seconds: f64,
    /// The exported NPY, relative to the output folder.
    pub export: Option<String>,
}

/// A warning of this run, attributed to a unit.
#[derive(Clone, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Warning {
    /// The stage.
    pub stage: String,
    /// The subject, `None` for group units.
    pub subject: Option<String>,
    /// The warning.
    pub message: String,
}

/// The result of a run.
#[derive(Clone, Debug)]
pub struct Outcome {
    /// One result per unit of the study, in unit order.
    pub results: Vec<UnitResult>,
    /// Warnings of the executor itself (damaged objects recomputed), in unit order.
    pub warnings: Vec<Warning>,
}

impl Outcome {
    /// Number of units computed in this run.
    pub fn computed(&self) -> usize {
        self.results.iter().filter(|r| r.computed).count()
    }
}

/// The thread pool of a run: `jobs` threads (all cores when `None`). A run does all its work
/// inside it ([`rayon::ThreadPool::install`]), its start (reading the cache's records) as well
/// as [`execute`], so `--jobs` bounds the whole run.
pub fn pool(jobs: Option<usize>) -> Result<rayon::ThreadPool, RunError> {
    let mut builder = rayon::ThreadPoolBuilder::new();
    if let Some(n) = jobs {
        builder = builder.num_threads(n.max(1));
    }
    builder
        .build()
        .map_err(|e| RunError::Other(format!("cannot start {jobs:?} threads: {e}")))
}

/// Run the plan on the current thread pool (a run's [`pool`]), `bar` ticked per unit.
pub fn execute(
    study: &Study,
    plan: &Plan,
    reader: &dyn Reader,
    bar: &ProgressBar,
) -> Result<Outcome, RunError> {
    let ctx = Ctx {
        study,
        plan,
        reader,
        bar,
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
    merged.finish(study)
}

/// The stage and subject an input comes from.
fn origin<'s>(study: &'s Study, input: UnitInput) -> (&'s str, Option<&'s str>) {
    match input {
        UnitInput::Source(s) => (SOURCE, Some(study.sources[s].subject.as_str())),
        UnitInput::Unit(i) => (study.stage_name(i), study.subject(i)),
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
            let (stage, subject) = origin(study, *input);
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
    reader: &'a dyn Reader,
    bar: &'a ProgressBar,
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
    out: ChainResult,
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
            out: ChainResult::default(),
        };
        for &u in chain {
            for input in &self.study.units[u].inputs {
                *worker.uses_left.entry(*input).or_default() += 1;
            }
        }
        for &u in chain {
            if self.deferred(u, chain) {
                // Its consumers compute it when they run (in their own chain).
                self.bar.inc(1);
                continue;
            }
            if let Err(failure) = worker.process(u) {
                worker.out.failure = Some(failure);
                break;
            }
            worker.release_inputs(u);
            self.bar.inc(1);
        }
        worker.out
    }
}

impl Ctx<'_> {
    /// True for a unit whose values this chain would compute only to forget them: stale,
    /// `cache: false`, not exported, and consumed only by stale units of other chains (a subject's
    /// baseline feeding the group aggregate), which compute it themselves when they need it —
    /// computing it here as well would do the work twice.
    fn deferred(&self, u: usize, chain: &[usize]) -> bool {
        let study = self.study;
        let stage = &study.pipeline.stages[study.units[u].stage];
        if stage.cache || stage.export || self.plan.units[u].status == Status::Fresh {
            return false;
        }
        if self.prepared_for(u).next().is_some() {
            // Prepared here for its group consumer instead (see `Worker::prepare_for_groups`).
            return false;
        }
        let mut consumers = (0..study.units.len())
            .filter(|&c| study.units[c].inputs.contains(&UnitInput::Unit(u)))
            .peekable();
        consumers.peek().is_some()
            && consumers.all(|c| !chain.contains(&c) && self.plan.units[c].status != Status::Fresh)
    }

    /// The stale group units that consume subject unit `u` and prepare their inputs: `u` is
    /// prepared for them in its own chain (in parallel with the other subjects), and only the
    /// prepared (small) array is kept.
    fn prepared_for(&self, u: usize) -> impl Iterator<Item = usize> + '_ {
        let study = self.study;
        let subject_unit = study.units[u].subject.is_some();
        study.consumers[u].iter().copied().filter(move |&g| {
            let stage = &study.pipeline.stages[study.units[g].stage];
            subject_unit
                && study.units[g].subject.is_none()
                && self.plan.units[g].status != Status::Fresh
                && stage.op.prepares()
        })
    }
}

impl Worker<'_, '_> {
    fn study(&self) -> &Study {
        self.ctx.study
    }

    fn fail(&self, u: usize, message: impl Into<String>) -> UnitFailure {
        UnitFailure {
            stage: self.study().stage_name(u).to_string(),
            subject: self.study().subject(u).map(str::to_string),
            message: message.into(),
            diagnostic: None,
        }
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

    /// Bring one unit up to date and export it if asked.
    fn process(&mut self, u: usize) -> Result<(), UnitFailure> {
        let status = &self.ctx.plan.units[u].status;
        let stale = *status != Status::Fresh;
        if let Status::Stale(Reason::Damaged { why }) = status {
            self.warn_damaged(u, why);
        }
        let mut prepared_here = false;
        let array = if stale && parts::streams(self.study(), u) {
            // Computed part by part inside its consumer's unit (see `parts`).
            None
        } else if stale && self.compute_slabs(u)? {
            // Computed, stored and prepared box by box (see `slabs`).
            prepared_here = true;
            None
        } else if stale {
            self.compute_spooling(u)?
        } else {
            self.record_cached(u)?
        };
        let study = self.ctx.study;
        let stage = &study.pipeline.stages[study.units[u].stage];
        let groups: Vec<usize> = self.ctx.prepared_for(u).collect();
        if !groups.is_empty() && !prepared_here {
            let whole = match &array {
                Some(a) => a.clone(),
                None => self.values(UnitInput::Unit(u))?.0,
            };
            self.prepare_for_groups(u, &whole, &groups)?;
        }
        if stage.export {
            self.export(u, array)?;
        }
        if !self.uses_left.contains_key(&UnitInput::Unit(u)) {
            self.memory.remove(&UnitInput::Unit(u));
        }
        Ok(())
    }

    /// Prepare unit `u`'s array for each group unit in `groups` ([`Ctx::prepared_for`]).
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
                    },
                );
                Ok(None)
            }
            // Gone or damaged since the plan was made (another process, a disk): recompute.
            Lookup::Absent | Lookup::Damaged(_) => self.compute(u).map(Some),
        }
    }

    fn warn_damaged(&mut self, u: usize, why: &str) {
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
        };
        let record = self.record_of(u)?;
        let file = if output::is_current(&target, &record, &study.store) {
            target.relative_npy()
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
                            ExportError::Damaged(why) => self.fail(u, why),
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
            .read(&source.path, study.pipeline.events, &mut notes)
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
        if let Some((p, axis)) = parts::streamed_input(study, u) {
            if !self.memory.contains_key(&UnitInput::Unit(p)) {
                let whole = self.compute_streamed((p, u), axis, false)?;
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
            let (stage_name, subject) = origin(study, input);
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
        let (stage_name, subject) = origin(study, input);
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
            },
        );
    }

    /// How unit `u` would run in slabs on an input of layout `input` ([`slabs`]): the number
    /// of leading axes to cut along, its output layout and the group units it prepares for.
    /// `None` unless its op and the `prepare` of every group unit it feeds slice along those
    /// axes (at least one), the output keeps them, the output is not needed whole later in this
    /// chain, and every consumer either is prepared here or can read the stored result.
    fn slab_cut(&self, u: usize, input: &Layout) -> Option<(usize, Layout, Vec<usize>)> {
        let study = self.ctx.study;
        let unit = &study.units[u];
        let stage = &study.pipeline.stages[unit.stage];
        let [from @ UnitInput::Unit(_)] = unit.inputs[..] else {
            return None;
        };
        let groups: Vec<usize> = self.ctx.prepared_for(u).collect();
        let elsewhere = study.consumers[u].iter().any(|c| !groups.contains(c));
        if self.uses_left.contains_key(&UnitInput::Unit(u))
            || (elsewhere || stage.export) && !stage.cache
        {
            return None;
        }
        let group_stages: Vec<_> = groups
            .iter()
            .map(|&g| &study.pipeline.stages[study.units[g].stage])
            .collect();
        let k = input
            .dims
            .iter()
            .take_while(|d| {
                stage.op.slices_along(d)
                    && group_stages.iter().all(|g| g.op.prepare_slices_along(d))
            })
            .count();
        let (stage_name, subject) = origin(study, from);
        let whole_input = [InputLayout {
            stage: stage_name,
            subject,
            layout: input,
        }];
        let Ok(Some(out)) = stage.op.layout(&whole_input) else {
            return None;
        };
        let keeps = out.dims.get(..k) == input.dims.get(..k) && out.shape() == input.shape();
        (k > 0 && keeps).then_some((k, out, groups))
    }

    /// Unit `u` box by box from its stored input ([`slabs`]) when [`Worker::slab_cut`] allows
    /// and the input is not in memory. True when done (result recorded, stored, prepared for
    /// the groups); false when the unit is to be computed whole, which then also finds and
    /// reports a damaged input.
    fn compute_slabs(&mut self, u: usize) -> Result<bool, UnitFailure> {
        let study = self.ctx.study;
        let unit = &study.units[u];
        let stage = &study.pipeline.stages[unit.stage];
        let [input @ UnitInput::Unit(i)] = unit.inputs[..] else {
            return Ok(false);
        };
        if self.memory.contains_key(&input) {
            return Ok(false);
        }
        let Lookup::Present(record) = study.store.lookup(&study.keys[i]) else {
            return Ok(false);
        };
        let Some((k, out_layout, groups)) = self.slab_cut(u, &record.layout) else {
            return Ok(false);
        };
        if !record.stored {
            return Ok(false);
        }
        let group_stages: Vec<_> = groups
            .iter()
            .map(|&g| &study.pipeline.stages[study.units[g].stage])
            .collect();
        let (stage_name, subject) = origin(study, input);
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
                                    .map_err(|e| e.to_string())?;
                                if notes != Notes::default() {
                                    return Err("the op noted something about one box".into());
                                }
                                if out.layout
                                    != slabs::box_layout(&out_layout, b)
                                        .map_err(|e| e.to_string())?
                                {
                                    return Err(
                                        "a box's output is not the whole output's cut".into()
                                    );
                                }
                                slabs::value_bytes(&out.values, &mut *write)
                                    .map_err(|e| e.to_string())?;
                                let input = Input {
                                    stage: &stage.name,
                                    subject: study.subject(u),
                                    array: &out,
                                };
                                for (g, list) in group_stages.iter().zip(&mut prepared) {
                                    match g.op.prepare(&input) {
                                        Some(Ok(small)) => list.push(small),
                                        Some(Err(e)) => return Err(e.to_string()),
                                        None => return Err("a group unit did not prepare".into()),
                                    }
                                }
                                Ok(())
                            });
                    read.map(|()| Notes::default()).map_err(|stop| match stop {
                        slabs::SlabStop::Damaged(why) | slabs::SlabStop::Declined(why) => why,
                    })
                });
        let record = match written {
            Ok(Ok(record)) => record,
            Ok(Err(why)) => {
                tracing::debug!(stage = %stage.name, subject = ?study.subject(u), "computed whole: {why}");
                return Ok(false);
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
        Ok(true)
    }

    /// A stale unit that is not streamed into its consumer: its array, or `None` when it was
    /// streamed from its producer into the cache without ever being whole in memory (see
    /// [`Worker::compute_streamed`]).
    fn compute_spooling(&mut self, u: usize) -> Result<Option<Arc<LabelledArray>>, UnitFailure> {
        let study = self.ctx.study;
        let stage = &study.pipeline.stages[study.units[u].stage];
        match parts::streamed_input(study, u) {
            Some((p, axis)) if stage.cache && !self.memory.contains_key(&UnitInput::Unit(p)) => {
                self.compute_streamed((p, u), axis, true)
            }
            _ => self.compute(u).map(Some),
        }
    }

    /// Producer `p` and its consumer `u` part by part ([`parts`]): the producer gets a record
    /// without values, the consumer is stored. Returns the consumer's array, joined in memory;
    /// or, when `spool` allows, `u` is stored and every consumer of `u` could read it in slabs
    /// ([`Worker::slab_cut`]), `None`: the parts went through a [`slabs::Spool`] into the store
    /// and `u` was never whole in memory.
    fn compute_streamed(
        &mut self,
        (p, u): (usize, usize),
        axis: &'static str,
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
            parts::plan(study, (p, u), axis, &inputs).map_err(|(at, e)| self.op_failure(at, &e))?;
        let spooled = match &plan.consumer_layout {
            Some(out) if spool && self.slabs_can_read(u, out) => {
                let k = out.axis(axis).map_err(|e| self.op_failure(u, &e))?;
                let dir = study.store.root().join("objects");
                let spool = slabs::Spool::new(&dir, out, k)
                    .map_err(|e| self.fail(u, format!("cannot spool in {}: {e}", dir.display())))?;
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
                    Ok(Err(why)) => return Err(self.fail(u, why)),
                    Err(e) => return Err(self.fail(u, e.to_string())),
                };
                self.record_result(u, record, seconds());
                Ok(None)
            }
        }
    }

    /// True when every consumer of `u` (whose output has layout `out`) is fresh or could run
    /// in slabs on it in this chain, so `u` need not be held whole in memory.
    fn slabs_can_read(&self, u: usize, out: &Layout) -> bool {
        let study = self.ctx.study;
        study.consumers[u].iter().all(|&c| {
            self.ctx.plan.units[c].status == Status::Fresh
                || study.units[c].subject.is_some() && self.slab_cut(c, out).is_some()
        })
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
