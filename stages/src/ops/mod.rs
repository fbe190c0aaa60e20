//! The signal-processing ops, one file each. Adding an op: a file here, a `pub mod` line below,
//! and one line in [`crate::registry`].

pub mod aggregate;
pub mod baseline;
pub mod clustering;
pub mod contrast;
pub mod epoch;
pub mod filter;
pub mod hilbert;
pub mod interpolate;
pub mod laplacian;
pub mod measures;
pub mod morlet;
pub mod notch;
pub mod params_de;
pub mod reref;
pub mod resample;
pub mod surrogate;
#[cfg(test)]
pub(crate) mod tf_testing;
pub mod trial_sums;
pub mod wavelet;
