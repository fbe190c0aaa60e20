//! Tidy tables from labelled arrays (placeholder: being implemented).

use crate::array::LabelledArray;

/// A tab-separated table with one row per element: one column per axis holding its coordinate,
/// then the value.
pub fn tidy_tsv(_array: &LabelledArray) -> String {
    String::new()
}
