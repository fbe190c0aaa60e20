//! Pipeline files: from YAML text to a validated [`ResolvedPipeline`].
//!
//! Three steps, each a type of its own (raw values first, then a validated form that everything
//! downstream uses):
//! 1. [`yaml`] builds a marked YAML tree, every node knowing its line and column;
//! 2. [`raw`] reads that tree into a [`RawPipeline`] of plain fields, still unchecked against the
//!    op registry, and applies `--set` overrides;
//! 3. [`resolve`] checks names, ops, params (through each op's `resolve`), inputs and the graph,
//!    and yields a [`ResolvedPipeline`].
//!
//! Every problem found on the way becomes a [`Diagnostic`] naming the file, line, column and
//! field; all of them are collected so that a file with several mistakes reports each one.

use std::fmt;
use std::path::PathBuf;

pub mod raw;
pub mod resolve;
pub mod yaml;

pub use raw::{Override, RawPipeline, RawStage};
pub use resolve::{load, ResolvedPipeline, ResolvedStage, SOURCE};

/// One problem in a pipeline file or on the command line.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Diagnostic {
    /// The pipeline file, or `None` for a problem of the command line.
    pub file: Option<PathBuf>,
    /// 1-based line (0 when unknown).
    pub line: usize,
    /// 1-based column (0 when unknown).
    pub col: usize,
    /// The field, as a dotted path from the top of the file (`stages.tf.params.cycles`), or
    /// the `--set` argument it came from.
    pub field: String,
    /// What is wrong and what was expected.
    pub message: String,
}

impl fmt::Display for Diagnostic {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.file {
            Some(file) => write!(
                f,
                "{}:{}:{}: {}: {}",
                file.display(),
                self.line,
                self.col,
                self.field,
                self.message
            ),
            None => write!(f, "command line: {}: {}", self.field, self.message),
        }
    }
}

/// Why a pipeline could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum PipelineError {
    /// The file could not be read.
    #[error("cannot read pipeline file {path}: {source}")]
    Read {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// One or more problems in the file or the overrides.
    #[error("{}", render(.0))]
    Invalid(Vec<Diagnostic>),
}

fn render(diagnostics: &[Diagnostic]) -> String {
    let lines: Vec<String> = diagnostics.iter().map(ToString::to_string).collect();
    let count = diagnostics.len();
    let noun = if count == 1 { "problem" } else { "problems" };
    format!("{}\n{count} {noun} in the pipeline", lines.join("\n"))
}
