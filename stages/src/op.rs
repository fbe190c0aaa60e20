//! The one trait through which the runner knows an op, and its object-safe wrappers.
//!
//! An op is a pure function from labelled arrays to a labelled array, parameterised by a typed
//! `Params` struct. The runner never sees the concrete type: the [registry](crate::registry)
//! lists ops as `&dyn DynOp`, and a stage's params (JSON, from the YAML) are bound to its op
//! once, when the pipeline is resolved.
//!
//! Life of a stage and its units (one stage × one subject) as the runner drives it:
//! 1. [`DynOp::bind`] deserialises the user's params into the op's typed `Params` (unknown fields
//!    are errors, via `#[serde(deny_unknown_fields)]`), checks them ([`Op::check`]) and returns a
//!    [`BoundOp`]: the typed params and their *effective* JSON form (defaults filled in), which
//!    is what is hashed into the stage key. Params are never parsed again.
//! 2. [`BoundOp::layout`] computes the output layout from the input layouts without touching
//!    values, so that data-dependent mistakes (a window outside the data, a frequency at or above
//!    Nyquist) are reported before anything runs.
//! 3. [`BoundOp::run`] computes the output.
//!
//! Parts (how a `cache: false` intermediate can stream into its consumer without ever existing
//! in full): an op whose output's slices along one axis can be computed on their own names that
//! axis in [`Op::part_axis`] and computes a slice in [`Op::run_part`] (the wavelet: a range of
//! frequencies). An op whose output slice along an axis depends only on the same slice of its
//! input says so in [`Op::slices_along`] (the clustering op: each frequency on its own). The
//! runner may then run the pair part by part and join the consumer's parts; the result must be
//! the same bits as running both whole, and each op's tests show that it is.
//!
//! Prepared inputs (how a unit that joins many subjects avoids holding all their arrays at
//! once): an op may reduce each input on its own first ([`Op::prepare`]) and then join the
//! prepared arrays ([`Op::join`]); `run` must equal `join` over the prepared inputs. The runner
//! then prepares each input as soon as it is loaded and drops it before loading the next.

use serde::{de::DeserializeOwned, Serialize};
use serde_json::Value;
use std::collections::BTreeMap;
use std::marker::PhantomData;

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;

/// One input array of a unit: which stage it came from and, for stages that join subjects,
/// which subject.
#[derive(Clone, Copy, Debug)]
pub struct Input<'a> {
    /// The producing stage's name (`recordings` for the data source).
    pub stage: &'a str,
    /// The subject, when the producing unit is per subject.
    pub subject: Option<&'a str>,
    /// The array.
    pub array: &'a LabelledArray,
}

/// The one input of a unit handed to [`Op::run_owned`]: the runner no longer needs the array, so
/// the op may reuse its memory for the output.
#[derive(Debug)]
pub struct OwnedInput<'a> {
    /// The producing stage's name (`recordings` for the data source).
    pub stage: &'a str,
    /// The subject, when the producing unit is per subject.
    pub subject: Option<&'a str>,
    /// The array, now the op's.
    pub array: LabelledArray,
}

/// The input layouts handed to [`Op::layout`], in the same order as [`Input`]s would be.
#[derive(Clone, Copy, Debug)]
pub struct InputLayout<'a> {
    /// The producing stage's name.
    pub stage: &'a str,
    /// The subject, when the producing unit is per subject.
    pub subject: Option<&'a str>,
    /// The layout.
    pub layout: &'a Layout,
}

/// Returns the only input, or an error when there are several or none.
pub fn single<T: Copy>(inputs: &[T]) -> Result<T, StageError> {
    match inputs {
        [one] => Ok(*one),
        _ => Err(StageError::data(format!(
            "this op takes exactly one input array, got {}",
            inputs.len()
        ))),
    }
}

/// Side results of a run besides the output array: warnings for the user and records that
/// the runner copies into the manifest (e.g. epoch counts under the key `epochs`).
#[derive(Clone, Debug, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Notes {
    /// Warnings, each a full sentence naming what it is about.
    #[serde(default)]
    pub warnings: Vec<String>,
    /// Structured records for the manifest.
    #[serde(default)]
    pub records: BTreeMap<String, Value>,
}

impl Notes {
    /// Add a warning.
    pub fn warn(&mut self, message: impl Into<String>) {
        self.warnings.push(message.into());
    }
    /// Add a record for the manifest.
    pub fn record(&mut self, key: impl Into<String>, value: Value) {
        self.records.insert(key.into(), value);
    }
}

/// A signal-processing op with typed parameters.
pub trait Op: Send + Sync + 'static {
    /// The op's parameters, deserialised with `deny_unknown_fields`. Their JSON Schema (derived
    /// from the same type, so it cannot drift from what the parser accepts) is what
    /// `phasewise schema` publishes for editors.
    type Params: DeserializeOwned + Serialize + schemars::JsonSchema + Send + Sync;
    /// The name used in pipeline files (`op: wavelet`).
    const NAME: &'static str;
    /// Bumped whenever the op's numbers change, so that cached results go stale.
    const VERSION: u32;

    /// Checks of the params on their own (ranges, consistency), before any data is seen.
    fn check(_params: &Self::Params) -> Result<(), StageError> {
        Ok(())
    }

    /// True when a unit of this op joins all subjects (one group unit instead of one per subject).
    fn joins_subjects(_params: &Self::Params) -> bool {
        false
    }

    /// The output layout for these inputs, without computing values. Return `Ok(None)` when it
    /// cannot be known in advance; downstream checks are then deferred to run time.
    fn layout(
        params: &Self::Params,
        inputs: &[InputLayout<'_>],
    ) -> Result<Option<Layout>, StageError>;

    /// A layout at least as large as the output's, on every axis, for an op whose
    /// [`Op::layout`] cannot say in advance (an `epoch` that rejects trials: the trials before
    /// rejection). Only sizes are read from it: the runner estimates the room a run needs. The
    /// default is [`Op::layout`].
    fn layout_bound(
        params: &Self::Params,
        inputs: &[InputLayout<'_>],
    ) -> Result<Option<Layout>, StageError> {
        Self::layout(params, inputs)
    }

    /// Compute the output.
    fn run(
        params: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError>;

    /// [`Op::run`] on a unit's only input when nothing else needs that array any more: an op
    /// whose output has the input's shape may write it into the input's memory instead of new
    /// memory. Must give the same output, bit for bit, as `run` on the same input. The default
    /// calls `run`.
    fn run_owned(
        params: &Self::Params,
        input: OwnedInput<'_>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let borrowed = Input {
            stage: input.stage,
            subject: input.subject,
            array: &input.array,
        };
        Self::run(params, &[borrowed], notes)
    }

    /// The axis of the output along which [`Op::run_part`] computes slices, if any.
    fn part_axis(_params: &Self::Params) -> Option<&'static str> {
        None
    }

    /// The slice `part` (index range along [`Op::part_axis`]) of the output of [`Op::run`], with
    /// the same values bit for bit and the axis' coordinate cut to the range.
    fn run_part(
        _params: &Self::Params,
        _inputs: &[Input<'_>],
        _part: std::ops::Range<usize>,
        _notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        Err(StageError::data(format!(
            "{} cannot compute parts",
            Self::NAME
        )))
    }

    /// [`Op::run`] with the bound op's private [`Plans`]: an op whose work starts with a plan
    /// derived from its params and its input's layout alone (frequencies, kernels, FFT plans)
    /// computes it once per input layout ([`Plans::get_or_make`]) and reuses it for every unit
    /// and part with that layout. Must give the same output as `run`; the default calls `run`.
    fn run_planned(
        params: &Self::Params,
        _plans: &Plans,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        Self::run(params, inputs, notes)
    }

    /// [`Op::run_part`] with the bound op's private [`Plans`] (see [`Op::run_planned`]). The
    /// default calls `run_part`.
    fn run_part_planned(
        params: &Self::Params,
        _plans: &Plans,
        inputs: &[Input<'_>],
        part: std::ops::Range<usize>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        Self::run_part(params, inputs, part, notes)
    }

    /// True when [`Op::prepare`] gives `Some` for these params (so the runner may prepare each
    /// input where it is produced).
    fn prepares(_params: &Self::Params) -> bool {
        false
    }

    /// The per-input step of a join, if the op has one (`None`: the runner calls `run`).
    fn prepare(
        _params: &Self::Params,
        _input: &Input<'_>,
    ) -> Option<Result<LabelledArray, StageError>> {
        None
    }

    /// The output from inputs that went through [`Op::prepare`] (their stage and subject
    /// unchanged). Only called when `prepare` gives `Some`.
    fn join(
        params: &Self::Params,
        prepared: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        Self::run(params, prepared, notes)
    }

    /// True when, for inputs cut to a range along `axis`, [`Op::run`] gives exactly the output
    /// cut to the same range along the output's axis of the same name (its warnings may then
    /// speak of the slice alone).
    fn slices_along(_params: &Self::Params, _axis: &str) -> bool {
        false
    }

    /// True when [`Op::prepare`] slices along `axis` as [`Op::slices_along`] says of `run`:
    /// the input cut to a range along `axis` gives exactly the prepared array cut to that range
    /// along its axis of the same name, at the same position.
    fn prepare_slices_along(_params: &Self::Params, _axis: &str) -> bool {
        false
    }
}

/// An op as the registry lists it, before it has params: its name, its version, and how to
/// bind params to it. Object-safe, so the registry is a list of `&dyn DynOp`.
pub trait DynOp: Send + Sync {
    /// The op's name.
    fn name(&self) -> &'static str;
    /// The op's version.
    fn version(&self) -> u32;
    /// Parse and check the params once ([`Op::check`]) and bind them to the op: everything the
    /// runner does with this stage afterwards goes through the [`BoundOp`], which never parses
    /// again.
    fn bind(&self, params: &Value) -> Result<Box<dyn BoundOp>, StageError>;
    /// The effective params (defaults filled in) of [`DynOp::bind`].
    fn resolve(&self, params: &Value) -> Result<Value, StageError> {
        Ok(self.bind(params)?.params().clone())
    }
    /// The JSON Schema (draft 2020-12) of the op's params, derived from [`Op::Params`]; the
    /// types it refers to are added to `generator`'s definitions.
    fn params_schema(&self, generator: &mut schemars::SchemaGenerator) -> schemars::Schema;
}

/// An op with its typed params parsed and checked once ([`DynOp::bind`]). Each method is the
/// [`Op`] method of the same name with the bound params.
pub trait BoundOp: Send + Sync {
    /// The op's name.
    fn name(&self) -> &'static str;
    /// The op's version.
    fn version(&self) -> u32;
    /// The effective params (defaults filled in) as JSON: what keys hash and the manifest shows.
    fn params(&self) -> &Value;
    /// See [`Op::joins_subjects`].
    fn joins_subjects(&self) -> bool;
    /// See [`Op::layout`].
    fn layout(&self, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError>;
    /// See [`Op::layout_bound`].
    fn layout_bound(&self, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError>;
    /// See [`Op::run`].
    fn run(&self, inputs: &[Input<'_>], notes: &mut Notes) -> Result<LabelledArray, StageError>;
    /// See [`Op::run_owned`].
    fn run_owned(
        &self,
        input: OwnedInput<'_>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError>;
    /// See [`Op::part_axis`].
    fn part_axis(&self) -> Option<&'static str>;
    /// See [`Op::run_part`].
    fn run_part(
        &self,
        inputs: &[Input<'_>],
        part: std::ops::Range<usize>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError>;
    /// See [`Op::slices_along`].
    fn slices_along(&self, axis: &str) -> bool;
    /// See [`Op::prepare_slices_along`].
    fn prepare_slices_along(&self, axis: &str) -> bool;
    /// See [`Op::prepares`].
    fn prepares(&self) -> bool;
    /// See [`Op::prepare`].
    fn prepare(&self, input: &Input<'_>) -> Option<Result<LabelledArray, StageError>>;
    /// See [`Op::join`].
    fn join(&self, prepared: &[Input<'_>], notes: &mut Notes) -> Result<LabelledArray, StageError>;
}

/// Plans an op derives from its params and an input layout alone (frequencies, kernels, FFT
/// plans), kept by its [`BoundOp`] so that each is computed once per distinct input layout and
/// reused by every unit (subject) and part with that layout, on any thread. A plan is found by a
/// key the op computes from everything the plan depends on (see [`PlanKey`]); the last
/// [`Plans::KEPT`] plans are kept. A plan never holds values of the data, so outputs are the same
/// whether a plan was made or found.
#[derive(Default)]
pub struct Plans {
    kept: std::sync::Mutex<Vec<(PlanKey, SharedPlan)>>,
}

type SharedPlan = std::sync::Arc<dyn std::any::Any + Send + Sync>;

impl Plans {
    /// Plans kept per bound op (the study's subjects usually share one input layout).
    pub const KEPT: usize = 4;

    /// The plan of type `T` under `key`, made by `make` when there is none yet (outside the
    /// lock, so two threads may both make it the first time; both get equal plans). An error of
    /// `make` is returned and nothing is kept.
    pub fn get_or_make<T: Send + Sync + 'static, E>(
        &self,
        key: &PlanKey,
        make: impl FnOnce() -> Result<T, E>,
    ) -> Result<std::sync::Arc<T>, E> {
        let found = self
            .lock()
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, p)| p.clone());
        if let Some(plan) = found.and_then(|p| p.downcast::<T>().ok()) {
            return Ok(plan);
        }
        let plan = std::sync::Arc::new(make()?);
        let mut kept = self.lock();
        kept.retain(|(k, _)| k != key);
        if kept.len() >= Self::KEPT {
            kept.remove(0);
        }
        kept.push((key.clone(), plan.clone()));
        Ok(plan)
    }

    /// How many plans are kept (for tests).
    pub fn len(&self) -> usize {
        self.lock().len()
    }

    /// True when no plan is kept.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Vec<(PlanKey, SharedPlan)>> {
        // A panic while the lock was held leaves a list that is still valid: keep using it.
        self.kept.lock().unwrap_or_else(|e| e.into_inner())
    }
}

/// The key of a plan in [`Plans`]: everything the plan depends on, numbers by their bit
/// patterns, compared in full (two layouts share a plan only when those numbers are identical).
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct PlanKey(Vec<u64>);

impl PlanKey {
    /// Adds numbers, by their bit patterns.
    pub fn numbers(mut self, values: &[f64]) -> Self {
        self.0.push(values.len() as u64);
        self.0.extend(values.iter().map(|v| v.to_bits()));
        self
    }

    /// Adds counts.
    pub fn counts(mut self, values: &[usize]) -> Self {
        self.0.push(values.len() as u64);
        self.0.extend(values.iter().map(|&v| v as u64));
        self
    }
}

/// Wraps an [`Op`] type as a [`DynOp`] value.
pub struct Registered<O: Op>(PhantomData<O>);

impl<O: Op> Registered<O> {
    /// The wrapper (a zero-sized value).
    pub const fn new() -> Self {
        Registered(PhantomData)
    }
}

impl<O: Op> Default for Registered<O> {
    fn default() -> Self {
        Self::new()
    }
}

/// Deserialise typed params from JSON, reporting the dotted path of the offending field.
pub fn parse_params<P: DeserializeOwned>(params: &Value) -> Result<P, StageError> {
    serde_path_to_error::deserialize(params).map_err(|e| {
        let path = e.path().to_string();
        let field = if path == "." { String::new() } else { path };
        StageError::param(field, e.into_inner().to_string())
    })
}

impl<O: Op> DynOp for Registered<O> {
    fn name(&self) -> &'static str {
        O::NAME
    }
    fn version(&self) -> u32 {
        O::VERSION
    }
    fn params_schema(&self, generator: &mut schemars::SchemaGenerator) -> schemars::Schema {
        generator.subschema_for::<O::Params>()
    }
    fn bind(&self, params: &Value) -> Result<Box<dyn BoundOp>, StageError> {
        let typed: O::Params = parse_params(params)?;
        O::check(&typed)?;
        let effective = serde_json::to_value(&typed)
            .map_err(|e| StageError::data(format!("cannot serialise params: {e}")))?;
        Ok(Box::new(Bound::<O> {
            params: typed,
            effective,
            plans: Plans::default(),
        }))
    }
}

/// An [`Op`] with its typed params (and their JSON form, for keys and the manifest).
struct Bound<O: Op> {
    params: O::Params,
    effective: Value,
    /// The op's private plans, computed once per input layout ([`Op::run_planned`]).
    plans: Plans,
}

impl<O: Op> BoundOp for Bound<O> {
    fn name(&self) -> &'static str {
        O::NAME
    }
    fn version(&self) -> u32 {
        O::VERSION
    }
    fn params(&self) -> &Value {
        &self.effective
    }
    fn joins_subjects(&self) -> bool {
        O::joins_subjects(&self.params)
    }
    fn layout(&self, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        O::layout(&self.params, inputs)
    }
    fn layout_bound(&self, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        O::layout_bound(&self.params, inputs)
    }
    fn run(&self, inputs: &[Input<'_>], notes: &mut Notes) -> Result<LabelledArray, StageError> {
        O::run_planned(&self.params, &self.plans, inputs, notes)
    }
    fn run_owned(
        &self,
        input: OwnedInput<'_>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        O::run_owned(&self.params, input, notes)
    }
    fn part_axis(&self) -> Option<&'static str> {
        O::part_axis(&self.params)
    }
    fn run_part(
        &self,
        inputs: &[Input<'_>],
        part: std::ops::Range<usize>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        O::run_part_planned(&self.params, &self.plans, inputs, part, notes)
    }
    fn slices_along(&self, axis: &str) -> bool {
        O::slices_along(&self.params, axis)
    }
    fn prepare_slices_along(&self, axis: &str) -> bool {
        O::prepare_slices_along(&self.params, axis)
    }
    fn prepares(&self) -> bool {
        O::prepares(&self.params)
    }
    fn prepare(&self, input: &Input<'_>) -> Option<Result<LabelledArray, StageError>> {
        O::prepare(&self.params, input)
    }
    fn join(&self, prepared: &[Input<'_>], notes: &mut Notes) -> Result<LabelledArray, StageError> {
        O::join(&self.params, prepared, notes)
    }
}
