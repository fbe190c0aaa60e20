//! # phasewise
//!
//! The runner of phasewise: a phase-synchronization connectivity study written once as a YAML
//! pipeline is turned into a graph of stage × subject units, each keyed by the content of its
//! inputs and its effective params, cached on disk, recomputed only when something it depends on
//! changed, and recorded in a manifest that `verify` can later check.
//!
//! Data flow, each step a type of its own:
//! [`pipeline`] (YAML → raw → [`ResolvedPipeline`](pipeline::ResolvedPipeline)) →
//! [`study`] (recordings, units, keys; layouts checked) → [`plan`] (fresh/stale and why) →
//! [`exec`] (rayon, store, exports) → [`manifest`].
//! The signal processing lives in the `phasewise-stages` crate; the runner knows ops only through
//! its `DynOp` trait, and takes the registry as a parameter ([`session::Env`]).
//!
//! ```no_run
//! use phasewise::session::{self, Env, Options};
//! use phasewise::sources::RecordingReader;
//!
//! let ops = phasewise_stages::registry::all();
//! let env = Env { ops: &ops, reader: &RecordingReader };
//! let summary = session::run("pipelines/demo.yaml".as_ref(), &Options::default(), env)?;
//! println!("{} computed, {} cached", summary.computed, summary.cached);
//! # Ok::<(), phasewise::study::RunError>(())
//! ```
//!
//! Research software: results are not a clinical measurement.
#![deny(missing_docs)]

pub mod alloc;
pub mod archive;
pub mod cli;
pub mod cluster;
pub mod exec;
pub mod fsio;
pub mod graph;
pub mod inspect;
pub mod key;
pub mod manifest;
pub mod output;
pub mod parts;
pub mod paths;
pub mod pipeline;
pub mod plan;
pub mod prune;
pub mod recipe;
pub mod report;
pub mod room;
pub mod scaffold;
pub mod schema;
pub mod session;
pub mod slabs;
pub mod sources;
pub mod store;
pub mod study;
pub mod sweep;
pub mod verify;
pub mod words;
pub mod zarr;
