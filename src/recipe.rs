//! Recipes: how each unit of a run will be computed, as data, decided before any value is.
//!
//! The plan ([`crate::plan`]) says *whether* a unit runs; its recipe says *how*. Every decision
//! the executor used to make while running lives here, in pure functions of the study (stages,
//! units, consumers, the ops' declared capabilities), the plan's statuses and the units' layouts:
//!
//! | recipe | when |
//! |---|---|
//! | `cached` | fresh: its stored object (for `cache: false`, its record) stands |
//! | `deferred` | stale, `cache: false`, not exported, no group unit prepares from it, and every consumer is a stale unit of another chain: they compute it when they need it |
//! | `streamed` | stale, `cache: false`, not exported, its only consumer's only input, its op computes parts along an axis ([`phasewise_stages::Op::part_axis`]) and the consumer's op slices along it: computed a part at a time inside the consumer's unit, never whole |
//! | `parts` | the consumer of a `streamed` unit: computed part by part; `spooled` when it is stored and every consumer can read it in slabs (each part written at its place in the object file), else joined in memory |
//! | `slabs` | one input whose values are in the store and not held in memory, no consumer in its own chain, its op (and the `prepare` of every group unit it feeds) slicing along the leading `axes`, output shaped like the input: computed box by box ([`crate::slabs`]) |
//! | `joined` | its op prepares its inputs ([`phasewise_stages::Op::prepares`]): it joins inputs prepared one by one, most of them in their subjects' chains |
//! | `whole` | anything else: computed from its inputs held whole |
//!
//! Besides the variant, a recipe says whether the output is stored and for which group units
//! the unit's output is *prepared* in its own chain (in parallel with the other subjects).
//!
//! **Storage policy** ([`storage_policy`], applied when the pipeline is resolved, so that the
//! plan's freshness rules and every recipe below follow from it): a stage whose `cache` the
//! file does not set, that is not exported, whose op computes its output in parts and whose
//! only consumer takes it as its only input and slices along that axis (the wavelet or hilbert
//! coefficients feeding `clustering`) is not stored. Its output — complex coefficients, the
//! largest array of a chain — is then `streamed` into its consumer a part at a time, and
//! recomputed from the cached epochs when it is needed again: its transforms cost less than
//! writing it, reading it back and checking its hash. `cache: true` stores it anyway. `plan`
//! and the manifest's recipe say `not stored (storage policy)`.
//!
//! A layout that depends on values (an `epoch` with rejection does not know its trial count in
//! advance) cannot be planned; a recipe that needed one is marked `provisional`, and the
//! executor decides that unit again, with the same functions, once its chain has computed what
//! the layout depends on. The manifest records the recipe each computed unit ran with.
//!
//! The executor only carries recipes out; when a stored input turns out damaged or gone, or an
//! op notes something about one box of a slab run, it computes the unit whole instead (with a
//! warning for damage), which gives the same bits.

use phasewise_stages::{InputLayout, Layout};
use serde::{Deserialize, Serialize};

use crate::graph::UnitInput;
use crate::plan::{Plan, Status};
use crate::study::{PlannedLayout, Study};

/// How a unit runs (see the module's table).
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "run", rename_all = "snake_case")]
pub enum How {
    /// Fresh: its stored object (or record) stands.
    Cached,
    /// Computed in one piece from its inputs held whole.
    Whole,
    /// Joins inputs prepared one by one (in their subjects' chains where they are computed).
    Joined,
    /// Computed a part at a time inside its consumer's unit, never whole.
    Streamed {
        /// The consumer's stage.
        into: String,
        /// The axis cut into parts.
        axis: String,
        /// The consumer (unit index).
        #[serde(skip)]
        consumer: usize,
    },
    /// Computed from the parts of a streamed producer.
    Parts {
        /// The producer's stage.
        from: String,
        /// The axis cut into parts.
        axis: String,
        /// True: the parts go through a spool file into the store; false: joined in memory.
        spooled: bool,
        /// The producer (unit index).
        #[serde(skip)]
        producer: usize,
    },
    /// Computed box by box from its stored input.
    Slabs {
        /// How many leading axes the boxes are cut along.
        axes: usize,
    },
    /// Computed by its consumers (in other chains) when they need it.
    Deferred,
}

/// A unit's recipe.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Recipe {
    /// How it runs.
    #[serde(flatten)]
    pub how: How,
    /// Whether its output is stored in the cache.
    pub stored: bool,
    /// The group stages its output is prepared for in its own chain.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub prepared_for: Vec<String>,
    /// The same, as unit indices.
    #[serde(skip)]
    pub prepared_for_units: Vec<usize>,
    /// True when the storage policy, not the pipeline file, decided that its output is not
    /// stored ([`storage_policy`]).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub unstored_by_policy: bool,
    /// True when a layout it depends on is known only once values are: the run decides again.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub provisional: bool,
    /// In a manifest: why the unit ran whole although its recipe said otherwise (a slab run
    /// gave up: its input damaged or gone, or the op noted something about one box).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fallback: Option<String>,
}

impl std::fmt::Display for Recipe {
    /// One short phrase, as `plan` prints it.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match &self.how {
            How::Cached => write!(f, "cached")?,
            How::Whole => write!(f, "whole")?,
            How::Joined => write!(f, "joined from prepared inputs")?,
            How::Streamed { into, axis, .. } => write!(f, "streamed into {into} by {axis}")?,
            How::Parts {
                from,
                axis,
                spooled,
                ..
            } => {
                let to = if *spooled { "spooled" } else { "joined" };
                write!(f, "in parts of {from} by {axis}, {to}")?
            }
            How::Slabs { axes } => write!(f, "in slabs over {axes} axes")?,
            How::Deferred => write!(f, "deferred to its consumers")?,
        }
        if !self.prepared_for.is_empty() {
            write!(f, ", prepared for {}", self.prepared_for.join(", "))?;
        }
        if !self.stored && self.how != How::Cached {
            write!(f, ", not stored")?;
            if self.unstored_by_policy {
                write!(f, " (storage policy; `cache: true` stores it)")?;
            }
        }
        if self.provisional {
            write!(f, " (provisional: settled when its layout is known)")?;
        }
        Ok(())
    }
}

/// The runner's storage policy (see the module's doc): marks as not stored every stage whose
/// `cache` the file leaves unset, that is not exported, whose op computes parts along an axis
/// and whose only consumer has it as its only input and slices along that axis — the stages
/// that [`Decider::streamed_input`] then streams. A pure function of the resolved stages.
pub fn storage_policy(stages: &mut [crate::pipeline::ResolvedStage]) {
    for s in 0..stages.len() {
        let stage = &stages[s];
        if stage.cache_given || stage.export || !stage.cache {
            continue;
        }
        let Some(axis) = stage.op.part_axis() else {
            continue;
        };
        let &[c] = &stage.consumers[..] else {
            continue;
        };
        let consumer = &stages[c];
        if consumer.inputs[..] == [Some(s)] && consumer.op.slices_along(axis) {
            stages[s].cache = false;
            stages[s].unstored_by_policy = true;
        }
    }
}

/// Decides recipes for one study and plan.
pub struct Decider<'s> {
    study: &'s Study,
    plan: &'s Plan,
}

/// The layouts known when a recipe is decided, and the recipes already decided (for earlier
/// units of the same chain).
pub trait Known {
    /// Unit `u`'s output layout, when known.
    fn layout(&self, u: usize) -> Option<&Layout>;
    /// The recipe decided for unit `u`, an earlier unit of the chain being decided.
    fn recipe(&self, u: usize) -> Option<&Recipe>;
}

/// Every unit's recipe from the layouts known before anything runs ([`Study::layouts`]).
pub fn decide_all(study: &Study, plan: &Plan) -> Vec<Recipe> {
    struct Planned<'a> {
        layouts: &'a [Option<PlannedLayout>],
        recipes: Vec<Recipe>,
    }
    impl Known for Planned<'_> {
        fn layout(&self, u: usize) -> Option<&Layout> {
            self.layouts.get(u)?.as_ref().map(PlannedLayout::layout)
        }
        fn recipe(&self, u: usize) -> Option<&Recipe> {
            self.recipes.get(u)
        }
    }
    let decider = Decider::new(study, plan);
    let mut known = Planned {
        layouts: &study.layouts,
        recipes: Vec::with_capacity(study.units.len()),
    };
    for u in 0..study.units.len() {
        let recipe = decider.decide(u, &known);
        known.recipes.push(recipe);
    }
    known.recipes
}

impl<'s> Decider<'s> {
    /// A decider for `study` under `plan`.
    pub fn new(study: &'s Study, plan: &'s Plan) -> Self {
        Decider { study, plan }
    }

    fn stale(&self, u: usize) -> bool {
        self.plan.units[u].status != Status::Fresh
    }

    fn stage(&self, u: usize) -> &crate::pipeline::ResolvedStage {
        &self.study.pipeline.stages[self.study.units[u].stage]
    }

    /// True when `c` runs in the same chain as `u` (the same subject, or both group units).
    fn same_chain(&self, u: usize, c: usize) -> bool {
        self.study.units[u].subject == self.study.units[c].subject
    }

    /// The recipe of unit `u`, given what is `known` (the layouts, and the recipes of the
    /// earlier units of its chain).
    pub fn decide(&self, u: usize, known: &dyn Known) -> Recipe {
        let stage = self.stage(u);
        let prepared_for_units = self.prepared_for(u);
        let mut recipe = Recipe {
            how: How::Whole,
            stored: stage.cache,
            prepared_for: prepared_for_units
                .iter()
                .map(|&g| self.study.stage_name(g).to_string())
                .collect(),
            prepared_for_units,
            unstored_by_policy: stage.unstored_by_policy,
            provisional: false,
            fallback: None,
        };
        // A decision downstream of a provisional one is provisional too.
        recipe.provisional = self.stale(u)
            && self.study.units[u].inputs.iter().any(|input| {
                matches!(*input, UnitInput::Unit(i) if known.recipe(i).is_some_and(|r| r.provisional))
            });
        recipe.how = if !self.stale(u) {
            How::Cached
        } else if self.deferred(u, &recipe) {
            How::Deferred
        } else if let Some((consumer, axis)) = self.streams_into(u) {
            How::Streamed {
                into: self.study.stage_name(consumer).into(),
                axis: axis.into(),
                consumer,
            }
        } else if let Some((producer, axis)) = self.streamed_input(u) {
            let spooled = stage.cache
                && match known.layout(u) {
                    Some(out) => self.slabs_can_read(u, out),
                    None => {
                        recipe.provisional = true;
                        false
                    }
                };
            How::Parts {
                from: self.study.stage_name(producer).into(),
                axis: axis.into(),
                spooled,
                producer,
            }
        } else if let Some(axes) = self.slab_axes(u, known, &mut recipe.provisional) {
            How::Slabs { axes }
        } else if stage.op.prepares() {
            How::Joined
        } else {
            How::Whole
        };
        recipe
    }

    /// Stale, `cache: false`, not exported, prepared for no group unit, and consumed only by
    /// stale units of other chains (a subject's baseline feeding the group aggregate), which
    /// compute it themselves when they need it: computing it in its own chain as well would do
    /// the work twice.
    fn deferred(&self, u: usize, recipe: &Recipe) -> bool {
        let stage = self.stage(u);
        let consumers = &self.study.consumers[u];
        !stage.cache
            && !stage.export
            && recipe.prepared_for_units.is_empty()
            && !consumers.is_empty()
            && consumers
                .iter()
                .all(|&c| !self.same_chain(u, c) && self.stale(c))
    }

    /// The stale group units consuming subject unit `u` whose op prepares its inputs: `u` is
    /// prepared for them in its own chain, and only the prepared (small) array is kept.
    pub fn prepared_for(&self, u: usize) -> Vec<usize> {
        let study = self.study;
        if study.units[u].subject.is_none() {
            return Vec::new();
        }
        study.consumers[u]
            .iter()
            .copied()
            .filter(|&g| {
                study.units[g].subject.is_none() && self.stale(g) && self.stage(g).op.prepares()
            })
            .collect()
    }

    /// The unit that streams into `u`, with the axis: its producer is `cache: false`, not
    /// exported and consumed by `u` alone, `u` has no other input, the producer's op computes
    /// parts along the axis and `u`'s op slices along it.
    pub fn streamed_input(&self, u: usize) -> Option<(usize, &'static str)> {
        let [UnitInput::Unit(p)] = self.study.units[u].inputs[..] else {
            return None;
        };
        let producer = self.stage(p);
        if producer.cache || producer.export || self.study.consumers[p] != [u] {
            return None;
        }
        let axis = producer.op.part_axis()?;
        self.stage(u).op.slices_along(axis).then_some((p, axis))
    }

    /// The consumer `p` streams into, with the axis.
    fn streams_into(&self, p: usize) -> Option<(usize, &'static str)> {
        let &[c] = &self.study.consumers[p][..] else {
            return None;
        };
        self.streamed_input(c)
            .filter(|&(q, _)| q == p)
            .map(|(_, axis)| (c, axis))
    }

    /// The number of leading axes along which `u` can run box by box on its input (see the
    /// module's table), when its input's values will be in the store and not held in memory.
    /// Sets `provisional` when that depends on a layout not known yet.
    fn slab_axes(&self, u: usize, known: &dyn Known, provisional: &mut bool) -> Option<usize> {
        let [UnitInput::Unit(i)] = self.study.units[u].inputs[..] else {
            return None;
        };
        let in_store = match known.recipe(i).map(|r| &r.how) {
            Some(How::Cached) => self.stage(i).cache,
            Some(How::Slabs { .. }) | Some(How::Parts { spooled: true, .. }) => true,
            _ => false,
        };
        // An earlier consumer of the input in this chain that loads it whole leaves it in
        // memory for this one.
        let held = self.study.consumers[i].iter().any(|&c| {
            c < u
                && self.same_chain(u, c)
                && matches!(
                    known.recipe(c).map(|r| &r.how),
                    Some(How::Whole | How::Joined)
                )
        });
        if !in_store || held || self.has_consumer_in_chain(u) {
            return None;
        }
        match known.layout(i) {
            Some(input) => self.slab_cut(u, input),
            None => {
                *provisional = true;
                None
            }
        }
    }

    fn has_consumer_in_chain(&self, u: usize) -> bool {
        self.study.consumers[u]
            .iter()
            .any(|&c| self.same_chain(u, c))
    }

    /// How many leading axes of `input` (the layout of `u`'s only input) `u` can be cut along:
    /// its op and the `prepare` of every group unit it is prepared for slice along them (at
    /// least one), its output keeps them and the input's shape, it is not needed whole later in
    /// its chain, and every consumer either is prepared for here or can read the stored result.
    pub fn slab_cut(&self, u: usize, input: &Layout) -> Option<usize> {
        let study = self.study;
        let unit = &study.units[u];
        let stage = self.stage(u);
        let [from @ UnitInput::Unit(_)] = unit.inputs[..] else {
            return None;
        };
        let groups = self.prepared_for(u);
        let elsewhere = study.consumers[u].iter().any(|c| !groups.contains(c));
        if self.has_consumer_in_chain(u) || (elsewhere || stage.export) && !stage.cache {
            return None;
        }
        let k = input
            .dims
            .iter()
            .take_while(|d| {
                stage.op.slices_along(d)
                    && groups
                        .iter()
                        .all(|&g| self.stage(g).op.prepare_slices_along(d))
            })
            .count();
        let (stage_name, subject) = study.origin(from);
        let whole_input = [InputLayout {
            stage: stage_name,
            subject,
            layout: input,
        }];
        let Ok(Some(out)) = stage.op.layout(&whole_input) else {
            return None;
        };
        let keeps = out.dims.get(..k) == input.dims.get(..k) && out.shape() == input.shape();
        (k > 0 && keeps).then_some(k)
    }

    /// True when every consumer of `u` (whose output has layout `out`) is fresh or could run
    /// in slabs on it in its chain, so `u` need not be held whole in memory.
    pub fn slabs_can_read(&self, u: usize, out: &Layout) -> bool {
        let study = self.study;
        study.consumers[u].iter().all(|&c| {
            !self.stale(c) || study.units[c].subject.is_some() && self.slab_cut(c, out).is_some()
        })
    }
}
