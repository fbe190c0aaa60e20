//! The `filter` op (placeholder: being implemented).

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{Input, InputLayout, Notes, Op};

/// The `filter` op.
pub struct Filter;

/// Parameters of `filter`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FilterParams {}

impl Op for Filter {
    type Params = FilterParams;
    const NAME: &'static str = "filter";
    const VERSION: u32 = 1;

    fn layout(_p: &Self::Params, _inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(None)
    }

    fn run(_p: &Self::Params, _inputs: &[Input<'_>], _notes: &mut Notes) -> Result<LabelledArray, StageError> {
        Err(StageError::data("not implemented yet"))
    }
}
