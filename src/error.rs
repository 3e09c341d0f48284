//! The one error type of the core: every message names the file and the exact problem.

use std::path::Path;

/// Result alias used throughout the core.
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// Errors from reading models and probe data, from analysis, and from writing results.
///
/// Each variant's message is complete on its own (file, layer, row, expected vs found), so
/// the command line prints it as one line and the app shows it as is.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// A model file (or one of its side files) is malformed or violates the schema.
    #[error("{file}: {problem}")]
    Model {
        /// The file as the user named it.
        file: String,
        /// What is wrong, with layer names and shapes.
        problem: String,
    },
    /// A probe data file is malformed or does not fit the model.
    #[error("{file}: {problem}")]
    Probe {
        /// The file as the user named it.
        file: String,
        /// What is wrong, with row and column numbers.
        problem: String,
    },
    /// Reading or writing a file failed at the operating-system level.
    #[error("{file}: {action}: {source}")]
    Io {
        /// The file as the user named it.
        file: String,
        /// What we were doing, e.g. "cannot read" or "cannot write".
        action: &'static str,
        /// The operating system's reason.
        #[source]
        source: std::io::Error,
    },
    /// The request itself does not make sense for this model (unknown layer, unit out of range, ...).
    #[error("{0}")]
    Usage(String),
    /// Long work was cancelled by the user.
    #[error("cancelled")]
    Cancelled,
}

impl Error {
    /// A model-file error for `file`.
    pub fn model(file: impl AsRef<Path>, problem: impl Into<String>) -> Self {
        Error::Model {
            file: file.as_ref().display().to_string(),
            problem: problem.into(),
        }
    }

    /// A probe-file error for `file`.
    pub fn probe(file: impl AsRef<Path>, problem: impl Into<String>) -> Self {
        Error::Probe {
            file: file.as_ref().display().to_string(),
            problem: problem.into(),
        }
    }

    /// An I/O error while doing `action` on `file`.
    pub fn io(file: impl AsRef<Path>, action: &'static str, source: std::io::Error) -> Self {
        Error::Io {
            file: file.as_ref().display().to_string(),
            action,
            source,
        }
    }

    /// A usage error (bad request for this model).
    pub fn usage(msg: impl Into<String>) -> Self {
        Error::Usage(msg.into())
    }
}
