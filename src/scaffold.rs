//! `phasewise new`: a commented pipeline fitted to a dataset (being written by the lead).

use std::path::Path;

/// Look at a BIDS-style dataset and write a commented pipeline for it.
pub fn run(_data_dir: &Path, _out: Option<&Path>) -> anyhow::Result<()> {
    anyhow::bail!("`phasewise new` is not available yet")
}
