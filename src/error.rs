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
    /// A side file named in a model lies outside the model's folder (or is absolute) and the
    /// loader was not told to allow that. The message names no way to allow it: each front
    /// says that in its own terms (a command-line flag, a button).
    #[error(
        "{file}: {what}: side-file path '{path}' {}; side files must stay in the model's folder",
        if *absolute { "is absolute" } else { "climbs out of the model's folder" }
    )]
    OutsidePath {
        /// The model file that names the side file, as the user named it.
        file: String,
        /// What refers to the side file, e.g. "layer 'h1' weights".
        what: String,
        /// The side-file path as written in the model.
        path: String,
        /// True for an absolute path, false for one that climbs out with `..`.
        absolute: bool,
    },
    /// A checkpoint of a series does not have the architecture of the series' first
    /// checkpoint (input size, layer names, types, activations and weight shapes).
    #[error(
        "{file}: not the same architecture as the series' first checkpoint {first}: {difference}"
    )]
    ArchitectureMismatch {
        /// The checkpoint that differs, as the user named it.
        file: String,
        /// The series' first checkpoint, as the user named it.
        first: String,
        /// The first difference, naming the layer and both shapes.
        difference: String,
    },
    /// A layer was asked for by a name the model does not have.
    #[error("there is no layer '{name}'; the layers are: {}", layers.join(", "))]
    UnknownLayer {
        /// The name asked for.
        name: String,
        /// The model's layer names, in order.
        layers: Vec<String>,
    },
    /// An option value is outside what is allowed, on its own (`restarts` 0) or for this
    /// model (a unit the layer does not have, a total-variation penalty on a vector input).
    #[error("{option} {allowed} (got {value})")]
    BadOption {
        /// The option's name, in the core's terms (`restarts`, `chunk_rows`, ...); the command
        /// line shows it as its flag (`--restarts`, `--chunk-rows`).
        option: &'static str,
        /// The value given, as text.
        value: String,
        /// What is allowed, as a phrase that follows the option's name ("must be at least 1").
        allowed: String,
    },
    /// A request that cannot be carried out in the current state (for example nothing to
    /// export yet). The typed variants above cover bad options, unknown layers and side
    /// files outside the model's folder.
    #[error("{0}")]
    Usage(String),
    /// A failure of the program itself rather than of its input: a thread that cannot be
    /// started, an image that cannot be encoded, a buffer of the wrong length.
    #[error("internal error: {0}")]
    Internal(String),
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

    /// A request that cannot be carried out now (see [`Error::Usage`]).
    pub fn usage(msg: impl Into<String>) -> Self {
        Error::Usage(msg.into())
    }

    /// A bad value `value` of `option`; `allowed` follows the option's name in the message
    /// ("must be at least 1").
    pub fn bad_option(
        option: &'static str,
        value: impl std::fmt::Display,
        allowed: impl Into<String>,
    ) -> Self {
        Error::BadOption {
            option,
            value: value.to_string(),
            allowed: allowed.into(),
        }
    }

    /// A failure of the program itself (see [`Error::Internal`]).
    pub fn internal(msg: impl Into<String>) -> Self {
        Error::Internal(msg.into())
    }

    /// The same error with a [`Error::BadOption`]'s option renamed to `option` (for a value
    /// checked by a shared rule under another name); other errors are returned unchanged.
    #[must_use]
    pub fn for_option(self, option: &'static str) -> Self {
        match self {
            Error::BadOption { value, allowed, .. } => Error::BadOption {
                option,
                value,
                allowed,
            },
            other => other,
        }
    }
}
