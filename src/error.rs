//! Typed errors of the library. Every message is one line and names the file (and page or line)
//! it is about, so the command line can print it as it is.

use std::path::PathBuf;

pub type Result<T> = std::result::Result<T, Error>;

#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("{path}: {msg}")]
    Io { path: PathBuf, msg: String },
    #[error("{path}: {msg}")]
    Format { path: PathBuf, msg: String },
    #[error("{path}: page {page}: {msg}")]
    Page { path: PathBuf, page: usize, msg: String },
    #[error("{path}: line {line}: {msg}")]
    Line { path: PathBuf, line: usize, msg: String },
    #[error("{0}")]
    Invalid(String),
    #[error("cancelled")]
    Cancelled,
}

impl Error {
    pub fn io(path: impl Into<PathBuf>, e: impl std::fmt::Display) -> Self {
        Error::Io { path: path.into(), msg: e.to_string() }
    }
    pub fn format(path: impl Into<PathBuf>, msg: impl Into<String>) -> Self {
        Error::Format { path: path.into(), msg: msg.into() }
    }
    pub fn page(path: impl Into<PathBuf>, page: usize, msg: impl Into<String>) -> Self {
        Error::Page { path: path.into(), page, msg: msg.into() }
    }
    pub fn line(path: impl Into<PathBuf>, line: usize, msg: impl Into<String>) -> Self {
        Error::Line { path: path.into(), line, msg: msg.into() }
    }
    pub fn invalid(msg: impl Into<String>) -> Self {
        Error::Invalid(msg.into())
    }
}
