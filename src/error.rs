//! The library's one error type. Input errors carry the file, the 1-based line and the column so
//! a user can open the log at the offending field; the binary maps every variant to exit code 2.

use std::fmt;

/// Where in an input file something went wrong.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Position {
    /// Path as the user gave it (`-` is shown as `<stdin>`).
    pub file: String,
    /// 1-based line number, when known.
    pub line: Option<u64>,
    /// 1-based column number and its header, when the problem is in one field.
    pub column: Option<(usize, String)>,
}

impl fmt::Display for Position {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.file)?;
        if let Some(line) = self.line {
            write!(f, ", line {line}")?;
        }
        if let Some((index, header)) = &self.column {
            write!(f, ", column {index} ('{header}')")?;
        }
        Ok(())
    }
}

/// Bad data in an input file: what was wrong, where, and what to do about it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputError {
    pub at: Position,
    pub message: String,
    pub hint: Option<String>,
}

impl fmt::Display for InputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.at, self.message)?;
        if let Some(hint) = &self.hint {
            write!(f, "\n  hint: {hint}")?;
        }
        Ok(())
    }
}

#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// The content of a log or other input file is malformed.
    #[error("{0}")]
    Input(Box<InputError>),
    /// A file could not be opened, read or written.
    #[error("{path}: {source}")]
    Io {
        path: String,
        #[source]
        source: std::io::Error,
    },
    /// Options that do not fit together, or an analysis the data cannot support.
    #[error("{0}")]
    Usage(String),
}

impl Error {
    pub fn input(at: Position, message: impl Into<String>) -> Self {
        Error::Input(Box::new(InputError {
            at,
            message: message.into(),
            hint: None,
        }))
    }

    pub fn input_hint(at: Position, message: impl Into<String>, hint: impl Into<String>) -> Self {
        Error::Input(Box::new(InputError {
            at,
            message: message.into(),
            hint: Some(hint.into()),
        }))
    }

    pub fn io(path: impl Into<String>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }

    pub fn usage(message: impl Into<String>) -> Self {
        Error::Usage(message.into())
    }
}

pub type Result<T, E = Error> = std::result::Result<T, E>;
