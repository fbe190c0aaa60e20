//! Shared signal-processing code of the preprocessing ops (`notch`, `filter`, `re-reference`,
//! `epoch`): filter design, zero-phase application of second-order sections, and the checks and
//! channel-type rules every op on a continuous recording needs.
//!
//! Everything here computes in `f64`; only the ops convert to and from the `f32` storage type.

pub mod analytic;
pub mod design;
pub mod recording;
pub mod resample;
pub mod sos;
pub mod spline_map;
