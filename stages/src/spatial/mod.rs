//! Electrode positions and spherical splines: the numbers behind the `laplacian` and
//! `interpolate` ops (DESIGN.md §4b).

pub mod splines;
pub mod standard;
