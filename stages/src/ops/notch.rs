//! The `notch` op (placeholder: being implemented).

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{Input, InputLayout, Notes, Op};

/// The `notch` op.
pub struct Notch;

/// Parameters of `notch`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NotchParams {}

impl Op for Notch {
    type Params = NotchParams;
    const NAME: &'static str = "notch";
    const VERSION: u32 = 1;

    fn layout(_p: &Self::Params, _inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(None)
    }

    fn run(_p: &Self::Params, _inputs: &[Input<'_>], _notes: &mut Notes) -> Result<LabelledArray, StageError> {
        Err(StageError::data("not implemented yet"))
    }
}
