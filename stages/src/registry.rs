//! The registry: every op the runner can name in a pipeline file.

use crate::op::{DynOp, Registered};
use crate::ops;

static REREFERENCE: Registered<ops::reref::ReReference> = Registered::new();
static NOTCH: Registered<ops::notch::Notch> = Registered::new();
static FILTER: Registered<ops::filter::Filter> = Registered::new();
static RESAMPLE: Registered<ops::resample::Resample> = Registered::new();
static INTERPOLATE: Registered<ops::interpolate::Interpolate> = Registered::new();
static LAPLACIAN: Registered<ops::laplacian::Laplacian> = Registered::new();
static EPOCH: Registered<ops::epoch::Epoch> = Registered::new();
static WAVELET: Registered<ops::wavelet::Wavelet> = Registered::new();
static HILBERT: Registered<ops::hilbert::Hilbert> = Registered::new();
static CLUSTERING: Registered<ops::clustering::Clustering> = Registered::new();
static BASELINE: Registered<ops::baseline::Baseline> = Registered::new();
static AGGREGATE: Registered<ops::aggregate::Aggregate> = Registered::new();
static CONTRAST: Registered<ops::contrast::Contrast> = Registered::new();
static SURROGATE: Registered<ops::surrogate::Surrogate> = Registered::new();

/// All ops, in the order a pipeline usually uses them.
pub fn all() -> Vec<&'static dyn DynOp> {
    vec![
        &REREFERENCE,
        &NOTCH,
        &FILTER,
        &RESAMPLE,
        &INTERPOLATE,
        &LAPLACIAN,
        &EPOCH,
        &WAVELET,
        &HILBERT,
        &CLUSTERING,
        &SURROGATE,
        &BASELINE,
        &AGGREGATE,
        &CONTRAST,
    ]
}

/// The op called `name`, if there is one.
pub fn find(name: &str) -> Option<&'static dyn DynOp> {
    all().into_iter().find(|op| op.name() == name)
}

/// The names of all ops (for error messages).
pub fn names() -> Vec<&'static str> {
    all().into_iter().map(|op| op.name()).collect()
}
