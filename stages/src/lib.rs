//! # phasewise-stages
//!
//! Pure computation for phase-synchronization connectivity studies of multichannel
//! electrophysiology: readers (EDF/EDF+/BDF and BIDS-style sidecars), re-referencing, notch and
//! band-pass filtering, epoching, complex Morlet wavelets, phase-clustering measures between
//! channel pairs, baseline normalisation and aggregation. Every op takes and returns
//! [`LabelledArray`]s; there is no YAML, no cache and no command line here, so the crate can be
//! used as a library on its own.
//!
//! Research software: results are not a clinical measurement.
#![deny(missing_docs)]

pub mod array;
pub mod dsp;
pub mod error;
pub mod io;
pub mod op;
pub mod ops;
pub mod range;
pub mod registry;
pub mod simulate;
pub mod spatial;
pub mod stats;
pub mod table;
pub mod wide;

pub use array::{
    Coord, Event, Joining, LabelledArray, Layout, Meta, Positions, SharedList, TrialInfo, Values,
};
pub use error::StageError;
pub use op::{BoundOp, DynOp, Input, InputLayout, Notes, Op, OwnedInput};
/// The JSON Schema library the ops derive their params' schemas with (for `phasewise schema`).
pub use schemars;

#[cfg(test)]
pub(crate) mod testutil;
