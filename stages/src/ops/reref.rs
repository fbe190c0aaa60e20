//! The `re-reference` op (placeholder: being implemented).

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{Input, InputLayout, Notes, Op};

/// The `re-reference` op.
pub struct ReReference;

/// Parameters of `re-reference`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReReferenceParams {}

impl Op for ReReference {
    type Params = ReReferenceParams;
    const NAME: &'static str = "re-reference";
    const VERSION: u32 = 1;

    fn layout(_p: &Self::Params, _inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(None)
    }

    fn run(_p: &Self::Params, _inputs: &[Input<'_>], _notes: &mut Notes) -> Result<LabelledArray, StageError> {
        Err(StageError::data("not implemented yet"))
    }
}
