//! Reading recordings made outside convchain (a sound card's WAV file, a scope's CSV export) into one record
//! of samples on a uniform time grid, for the meters ([`analyze`], [`delay`]).
//!
//! Files given by the user may come from any device or be hostile: every problem is a
//! [`crate::Error::BadInput`] naming the file and, for CSV, the line and column, never a panic.

pub mod analyze;
pub mod compare;
pub mod csv;
pub mod delay;
pub mod wav;

use std::path::{Path, PathBuf};

use crate::Error;

/// Which signal of a file to read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Pick {
    /// Nothing said: the file's only channel or value column (a file with several is refused with a list).
    Only,
    /// A WAV channel, counted from 1.
    Channel(u16),
    /// A CSV value column: by its header name, or by its number in the file counted from 1 (the time column
    /// is column 1). A header name that reads like a number wins over the number.
    Column(String),
}

/// What the record was read from, for reports.
#[derive(Debug, Clone, PartialEq)]
pub enum Origin {
    Wav {
        /// The channel read (from 1) and how many the file has.
        channel: u16,
        channels: u16,
        /// Bits per sample, and whether the samples are floating point.
        bits: u16,
        float: bool,
    },
    Csv {
        /// The value column's header and its number in the file (from 1).
        column: String,
        column_number: usize,
        /// The time column's header.
        time_column: String,
    },
}

impl Origin {
    /// The format in words ("24-bit integer WAV, channel 1 of 2", "CSV column \"CH1\" (column 2)").
    pub fn describe(&self) -> String {
        match self {
            Origin::Wav {
                channel,
                channels,
                bits,
                float,
            } => format!(
                "{bits}-bit {} WAV, channel {channel} of {channels}",
                if *float { "float" } else { "integer" }
            ),
            Origin::Csv {
                column,
                column_number,
                ..
            } => format!(
                "CSV column \"{}\" (column {column_number})",
                crate::text::clip(column)
            ),
        }
    }
}

/// One signal of a recording on a uniform grid.
#[derive(Debug, Clone, PartialEq)]
pub struct Capture {
    /// The file it was read from.
    pub file: PathBuf,
    pub origin: Origin,
    /// Sample rate (Hz): the WAV header's, or the inverse of the CSV time column's mean step.
    pub sample_rate_hz: f64,
    /// Time of the first sample (s): 0 for WAV, the first time of a CSV.
    pub t0_s: f64,
    /// The samples: WAV samples scaled to +-1 at the format's full scale; CSV values as written.
    pub samples: Vec<f64>,
}

/// The kinds of file [`read`] knows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Wav,
    Csv,
}

/// The kind of `path`: by its extension (`.wav`, `.csv`, `.txt`, any case), else by its first bytes (`RIFF`
/// starts a WAV file; anything else is read as CSV).
pub fn kind_of(path: &Path) -> Kind {
    let ext = path
        .extension()
        .map(|e| e.to_string_lossy().to_ascii_lowercase());
    match ext.as_deref() {
        Some("wav" | "wave") => Kind::Wav,
        Some("csv" | "txt" | "tsv") => Kind::Csv,
        _ => {
            let mut head = [0u8; 4];
            let riff = std::fs::File::open(path)
                .and_then(|mut f| std::io::Read::read_exact(&mut f, &mut head))
                .is_ok()
                && &head == b"RIFF";
            if riff { Kind::Wav } else { Kind::Csv }
        }
    }
}

/// Read the signal `pick` of the recording at `path` (WAV or CSV, see [`kind_of`]). Asking a WAV file for a
/// column, or a CSV file for a channel, is refused with the option to use instead.
pub fn read(path: &Path, pick: &Pick) -> Result<Capture, Error> {
    match (kind_of(path), pick) {
        (Kind::Wav, Pick::Column(c)) => Err(Error::BadInput(format!(
            "{}: --column {} was given but this is a WAV file; choose its channel with --channel N \
             (from 1)",
            path.display(),
            crate::text::clip(c)
        ))),
        (Kind::Csv, Pick::Channel(c)) => Err(Error::BadInput(format!(
            "{}: --channel {c} was given but this is a CSV file; choose its value column with \
             --column NAME or --column N (N counts the file's columns from 1, the time column being 1)",
            path.display()
        ))),
        (Kind::Wav, _) => wav::read(path, pick),
        (Kind::Csv, _) => csv::read(path, pick),
    }
}
