//! Executors: what carries a run's plan out.
//!
//! The runner decides everything before a value is computed: the plan says which units are
//! stale and why ([`crate::plan`]), the recipes say how each unit runs ([`crate::recipe`]). An
//! [`Executor`] takes that [`Job`] and brings every unit up to date, storing outputs in the
//! cache and exporting what the pipeline exports; it returns one [`UnitResult`] per unit, in
//! unit order, from which the session writes the manifest.
//!
//! [`local::Local`] runs the job on this machine's rayon pool. Another executor (a cluster
//! scheduler) is one more file in this folder implementing [`Executor`], and one arm where the
//! session picks it ([`crate::session::run`]).

pub mod local;

use std::sync::Arc;

use indicatif::ProgressBar;

use crate::plan::Plan;
use crate::recipe::Recipe;
use crate::sources::Reader;
use crate::store::ObjectRecord;
use crate::study::{RunError, Study};

pub use local::Local;

/// Everything an executor needs: the study, what is stale (the plan), how each unit runs (the
/// recipes, one per unit), how recordings are read, and a progress bar ticked per unit.
#[derive(Clone, Copy)]
pub struct Job<'a> {
    /// The study (pipeline, units, keys, store).
    pub study: &'a Study,
    /// Fresh or stale, per unit.
    pub plan: &'a Plan,
    /// How each unit runs, decided before the run.
    pub recipes: &'a [Recipe],
    /// How recordings are read.
    pub reader: &'a dyn Reader,
    /// Ticked once per unit.
    pub bar: &'a ProgressBar,
}

/// Carries out a [`Job`].
pub trait Executor {
    /// Bring every unit of the job up to date; one result per unit, in unit order. A failing
    /// unit stops its subject's chain and the group units; the error lists every failure.
    fn execute(&self, job: Job<'_>) -> Result<Outcome, RunError>;
}

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
    /// How it was computed in this run (`None` when it was not).
    pub recipe: Option<Recipe>,
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
