//! The `epoch` op (placeholder: being implemented).

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{Input, InputLayout, Notes, Op};

/// The `epoch` op.
pub struct Epoch;

/// Parameters of `epoch`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EpochParams {}

impl Op for Epoch {
    type Params = EpochParams;
    const NAME: &'static str = "epoch";
    const VERSION: u32 = 1;

    fn layout(_p: &Self::Params, _inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(None)
    }

    fn run(_p: &Self::Params, _inputs: &[Input<'_>], _notes: &mut Notes) -> Result<LabelledArray, StageError> {
        Err(StageError::data("not implemented yet"))
    }
}
