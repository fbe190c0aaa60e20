//! Errors of the stages crate.

/// An error from an op or a reader.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StageError {
    /// A parameter has a value the op cannot use; `field` is its dotted path inside `params`
    /// (`window`, `freqs.to`, `reject.peak_to_peak`) so the runner can point at its line.
    #[error("{field}: {message}")]
    Param {
        /// Dotted path of the parameter inside `params`.
        field: String,
        /// What is wrong and what was expected.
        message: String,
    },
    /// The data cannot be processed (wrong axes, zero epochs left, NaN samples, ...).
    #[error("{0}")]
    Data(String),
    /// A file could not be read or parsed; the message names the file.
    #[error("{0}")]
    Input(String),
}

impl StageError {
    /// A parameter error.
    pub fn param(field: impl Into<String>, message: impl Into<String>) -> Self {
        StageError::Param {
            field: field.into(),
            message: message.into(),
        }
    }
    /// A data error.
    pub fn data(message: impl Into<String>) -> Self {
        StageError::Data(message.into())
    }
    /// An input-file error.
    pub fn input(message: impl Into<String>) -> Self {
        StageError::Input(message.into())
    }
}
