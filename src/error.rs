//! The library's error type.

use std::path::PathBuf;

/// Everything the library can fail with. Bad input (scenario, files given by the user) is
/// distinguished from run failures so the binary can choose its exit code.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The scenario (or a value given on the command line) is wrong; the message names where and how to fix it.
    #[error("{0}")]
    BadInput(String),
    /// An input file could not be read.
    #[error("cannot read {path}: {source}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// Writing an output failed.
    #[error("cannot write {path}: {source}")]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The simulation or a measurement could not be completed.
    #[error("{0}")]
    Run(String),
}

impl Error {
    /// True when the fault lies in what the user gave (exit code 2), false for run failures (exit code 1).
    pub fn is_bad_input(&self) -> bool {
        matches!(self, Error::BadInput(_) | Error::Read { .. })
    }
}

/// Shorthand result type.
pub type Result<T, E = Error> = std::result::Result<T, E>;
