//! The library's error type: each variant says what kind of thing went wrong,
//! and the message names the file or value concerned.

use std::path::PathBuf;

/// Everything the library can fail with.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// Sizes that do not fit together (stride 0, kernel larger than the padded input, …).
    #[error("{0}")]
    Geometry(String),
    /// A kernel or bank that is not usable (ragged taps, NaN, unknown family, …).
    #[error("{0}")]
    Kernel(String),
    /// A bank or recipe file that could not be parsed or holds something unusable.
    #[error("{path}: {message}")]
    File {
        /// The file.
        path: PathBuf,
        /// What is wrong with it (with line and column where known).
        message: String,
    },
    /// An image that could not be read or decoded.
    #[error("{path}: {message}")]
    Image {
        /// The file.
        path: PathBuf,
        /// What is wrong with it.
        message: String,
    },
    /// A stage that cannot run on its input (channel mismatch, bad parameter).
    #[error("{0}")]
    Stage(String),
    /// Input/output failure on a named file.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The underlying error.
        source: std::io::Error,
    },
}

impl Error {
    /// Wraps an I/O error with the path it concerns.
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }
}

/// Shorthand for results of this library.
pub type Result<T, E = Error> = std::result::Result<T, E>;
