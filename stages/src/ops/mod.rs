//! The signal-processing ops, one file each. Adding an op: a file here, a `pub mod` line below,
//! and one line in [`crate::registry`].

pub mod aggregate;
pub mod baseline;
pub mod clustering;
pub mod epoch;
pub mod filter;
pub mod notch;
pub mod reref;
pub mod wavelet;
