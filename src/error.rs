//! The library's error type. Each variant is one kind of failure and carries
//! what a person needs to act on it: the file (where there is one), the place in
//! it (line and column, where known) and what is wrong, in plain words.
//!
//! [`Error::problem`] gives the message without the file, for tables that have a
//! path column of their own; `Display` gives the whole message, file first.

use std::fmt;
use std::path::{Path, PathBuf};

/// Everything the library can fail with.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// Reading or writing a named file or folder failed.
    #[error("{}: {source}", path.display())]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// An input image that cannot be used: not an image, cut short, damaged, a
    /// layout tapmap does not read, samples that are not finite.
    #[error("{}: {problem}", path.display())]
    Decode {
        /// The input file.
        path: PathBuf,
        /// What is wrong with it.
        problem: String,
    },
    /// A bank that cannot be used: a bank file, weight file, shipped bank or
    /// kernel family with something wrong in it.
    #[error("{}", Located { file: file.as_deref(), at: *at, message })]
    Bank {
        /// The bank or weight file, when the bank came from one.
        file: Option<PathBuf>,
        /// Line and column in it (1-based), where known.
        at: Option<(usize, usize)>,
        /// What is wrong.
        message: String,
    },
    /// A recipe that cannot be used (a recipe file, or stages given by flags).
    #[error("{}", Located { file: file.as_deref(), at: *at, message })]
    Recipe {
        /// The recipe file, when there is one.
        file: Option<PathBuf>,
        /// Line and column in it (1-based), where known.
        at: Option<(usize, usize)>,
        /// What is wrong.
        message: String,
    },
    /// Sizes that do not fit together: a stage that cannot run on an input of
    /// this shape (kernel larger than the padded input, channel counts that
    /// differ, a pool window larger than its map, buffers of the wrong length).
    #[error("{0}")]
    Shape(String),
    /// Something over a limit: pixels or memory of one image, or sizes whose
    /// arithmetic overflows.
    #[error("{}", Located { file: path.as_deref(), at: None, message })]
    Limit {
        /// The input concerned, if any.
        path: Option<PathBuf>,
        /// What is over which limit.
        message: String,
    },
    /// A request that cannot be carried out as asked: option values out of
    /// range, inputs that match nothing, an output folder that cannot be used.
    #[error("{0}")]
    Usage(String),
    /// A file that tapmap itself writes (manifest, journal, shard folder) that
    /// does not fit: another program's, a newer format, another job's.
    #[error("{}: {message}", path.display())]
    Record {
        /// The file or folder.
        path: PathBuf,
        /// What does not fit.
        message: String,
    },
}

/// `file: line L, column C: message`, leaving out what is not known.
struct Located<'a> {
    file: Option<&'a Path>,
    at: Option<(usize, usize)>,
    message: &'a str,
}

impl fmt::Display for Located<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some(p) = self.file {
            write!(f, "{}: ", p.display())?;
        }
        if let Some((l, c)) = self.at {
            write!(f, "line {l}, column {c}: ")?;
        }
        f.write_str(self.message)
    }
}

impl Error {
    /// An I/O error with the path it concerns.
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }

    /// An input that cannot be used, with what is wrong with it.
    pub fn decode(path: impl Into<PathBuf>, problem: impl Into<String>) -> Self {
        Error::Decode {
            path: path.into(),
            problem: problem.into(),
        }
    }

    /// A bank that cannot be used (no file, or the file added later with [`Error::in_file`]).
    pub fn bank(message: impl Into<String>) -> Self {
        Error::Bank {
            file: None,
            at: None,
            message: message.into(),
        }
    }

    /// A recipe that cannot be used.
    pub fn recipe(message: impl Into<String>) -> Self {
        Error::Recipe {
            file: None,
            at: None,
            message: message.into(),
        }
    }

    /// Sizes that do not fit.
    pub fn shape(message: impl Into<String>) -> Self {
        Error::Shape(message.into())
    }

    /// Something over a limit, not tied to a file.
    pub fn limit(message: impl Into<String>) -> Self {
        Error::Limit {
            path: None,
            message: message.into(),
        }
    }

    /// A request that cannot be carried out as asked.
    pub fn usage(message: impl Into<String>) -> Self {
        Error::Usage(message.into())
    }

    /// A record file of tapmap's that does not fit.
    pub fn record(path: impl Into<PathBuf>, message: impl Into<String>) -> Self {
        Error::Record {
            path: path.into(),
            message: message.into(),
        }
    }

    /// The same error placed in `file`, when it names no file yet (bank and
    /// recipe errors found while reading a file, limits met by an input).
    pub fn in_file(self, path: &Path) -> Self {
        match self {
            Error::Bank {
                file: None,
                at,
                message,
            } => Error::Bank {
                file: Some(path.to_path_buf()),
                at,
                message,
            },
            Error::Recipe {
                file: None,
                at,
                message,
            } => Error::Recipe {
                file: Some(path.to_path_buf()),
                at,
                message,
            },
            Error::Limit {
                path: None,
                message,
            } => Error::Limit {
                path: Some(path.to_path_buf()),
                message,
            },
            Error::Shape(message) => Error::decode(path, message),
            other => other,
        }
    }

    /// The same error with `what: ` put before its message (which stage, which
    /// kernel); the file it names, if any, stays first.
    pub fn within(self, what: &str) -> Self {
        let pre = |m: String| format!("{what}: {m}");
        match self {
            Error::Decode { path, problem } => Error::Decode {
                path,
                problem: pre(problem),
            },
            Error::Bank { file, at, message } => Error::Bank {
                file,
                at,
                message: pre(message),
            },
            Error::Recipe { file, at, message } => Error::Recipe {
                file,
                at,
                message: pre(message),
            },
            Error::Shape(m) => Error::Shape(pre(m)),
            Error::Limit { path, message } => Error::Limit {
                path,
                message: pre(message),
            },
            Error::Usage(m) => Error::Usage(pre(m)),
            Error::Record { path, message } => Error::Record {
                path,
                message: pre(message),
            },
            io @ Error::Io { .. } => io,
        }
    }

    /// The file the error is about, if it names one.
    pub fn path(&self) -> Option<&Path> {
        match self {
            Error::Io { path, .. } | Error::Decode { path, .. } | Error::Record { path, .. } => {
                Some(path)
            }
            Error::Bank { file, .. } | Error::Recipe { file, .. } => file.as_deref(),
            Error::Limit { path, .. } => path.as_deref(),
            Error::Shape(_) | Error::Usage(_) => None,
        }
    }

    /// What is wrong, without the file name in front: for a table whose row
    /// already names the file (images.csv), or a message that names it itself.
    pub fn problem(&self) -> String {
        match self {
            Error::Io { source, .. } => source.to_string(),
            Error::Decode { problem, .. } => problem.clone(),
            Error::Bank { at, message, .. } | Error::Recipe { at, message, .. } => Located {
                file: None,
                at: *at,
                message,
            }
            .to_string(),
            Error::Limit { message, .. } | Error::Record { message, .. } => message.clone(),
            Error::Shape(m) | Error::Usage(m) => m.clone(),
        }
    }
}

/// Shorthand for results of this library.
pub type Result<T, E = Error> = std::result::Result<T, E>;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn messages_name_the_file_once_and_problems_leave_it_out() {
        let e = Error::Bank {
            file: Some("banks/a.toml".into()),
            at: Some((3, 7)),
            message: "taps are ragged".into(),
        };
        assert_eq!(
            e.to_string(),
            "banks/a.toml: line 3, column 7: taps are ragged"
        );
        assert_eq!(e.problem(), "line 3, column 7: taps are ragged");
        let d = Error::decode("in/x.png", "is truncated").within("stage 1");
        assert_eq!(d.to_string(), "in/x.png: stage 1: is truncated");
        assert_eq!(d.problem(), "stage 1: is truncated");
        let s = Error::shape("kernel height 5 is larger").in_file(Path::new("t.png"));
        assert_eq!(s.to_string(), "t.png: kernel height 5 is larger");
    }
}
