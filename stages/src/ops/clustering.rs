//! The `clustering` op (placeholder: being implemented).

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{Input, InputLayout, Notes, Op};

/// The `clustering` op.
pub struct Clustering;

/// Parameters of `clustering`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ClusteringParams {}

impl Op for Clustering {
    type Params = ClusteringParams;
    const NAME: &'static str = "clustering";
    const VERSION: u32 = 1;

    fn layout(_p: &Self::Params, _inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(None)
    }

    fn run(_p: &Self::Params, _inputs: &[Input<'_>], _notes: &mut Notes) -> Result<LabelledArray, StageError> {
        Err(StageError::data("not implemented yet"))
    }
}
