//! The simulated demo study (placeholder: being implemented).

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::StageError;

/// Size and seed of a simulated study.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SimulateConfig {
    /// Number of participants.
    pub subjects: usize,
    /// Seed of the random generator: same seed, same bytes.
    pub seed: u64,
}

/// Write a BIDS-style study into `dir` (recordings, sidecars, `truth.json`).
pub fn write_study(_dir: &Path, _config: &SimulateConfig) -> Result<(), StageError> {
    Err(StageError::input("not implemented yet"))
}
