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

/// A recording opened for reading a stretch at a time: a WAV file's samples stay on disk (each stretch is read
/// after a seek, so memory follows the stretch, not the file); a CSV export is held whole (its time column is
/// checked whole; see [`csv::MAX_ROWS`]).
#[derive(Debug, Clone, PartialEq)]
pub struct CaptureFile {
    pub file: PathBuf,
    pub origin: Origin,
    pub sample_rate_hz: f64,
    /// Time of the file's first sample (s).
    pub t0_s: f64,
    /// Samples in the file (of the signal picked).
    pub len: u64,
    body: Body,
}

#[derive(Debug, Clone, PartialEq)]
enum Body {
    Wav { channel0: usize },
    Csv(Vec<f64>),
}

/// Most samples measured at once by `analyze` and `run --compare` (2^23, about 175 s at 48 kHz, 64 MiB as
/// numbers): a longer recording is measured over a stretch of it (the first, unless the user says which).
pub const RECORD_MAX: u64 = 1 << 23;

impl CaptureFile {
    /// Samples `start .. start + len` (cut to the end) as a [`Capture`] whose `t0_s` is its first sample's time.
    pub fn stretch(&self, start: u64, len: u64) -> Result<Capture, Error> {
        if start >= self.len {
            return Err(Error::BadInput(format!(
                "{}: the stretch asked for starts at sample {start} but the recording holds {} samples ({:.6} s)",
                self.file.display(),
                self.len,
                self.len as f64 / self.sample_rate_hz
            )));
        }
        let len = len.min(self.len - start);
        let samples = match &self.body {
            Body::Wav { channel0 } => wav::stretch(&self.file, *channel0, start, len)?,
            Body::Csv(v) => v[start as usize..(start + len) as usize].to_vec(),
        };
        Ok(Capture {
            file: self.file.clone(),
            origin: self.origin.clone(),
            sample_rate_hz: self.sample_rate_hz,
            t0_s: self.t0_s + start as f64 / self.sample_rate_hz,
            samples,
        })
    }

    /// The stretch a meter reads: from `start_s` (seconds from the file's first sample, default 0) for
    /// `length_s` (default: to the end), at most [`RECORD_MAX`] samples. Returns it with a note when the
    /// record was cut to that limit.
    pub fn record(
        &self,
        start_s: Option<f64>,
        length_s: Option<f64>,
    ) -> Result<(Capture, Option<String>), Error> {
        let fs = self.sample_rate_hz;
        let bad = |what: &str, v: f64| {
            Error::BadInput(format!(
                "{}: {what} {v} s lies outside the recording, which lasts {:.6} s",
                self.file.display(),
                self.len as f64 / fs
            ))
        };
        let start = match start_s {
            Some(s) if !(s.is_finite() && s >= 0.0) || (s * fs) as u64 >= self.len => {
                return Err(bad("--start", s));
            }
            Some(s) => (s * fs).round() as u64,
            None => 0,
        };
        let avail = self.len - start.min(self.len);
        let asked = match length_s {
            Some(l) if !(l.is_finite() && l > 0.0) => return Err(bad("--length", l)),
            Some(l) => ((l * fs).round() as u64).clamp(1, avail),
            None => avail,
        };
        let len = asked.min(RECORD_MAX);
        let note = (len < asked).then(|| {
            format!(
                "measured over {len} samples ({:.3} s) from {:.3} s: at most {RECORD_MAX} samples are measured at \
                 once (the recording holds {:.3} s; choose another stretch with --start and --length)",
                len as f64 / fs,
                start as f64 / fs,
                self.len as f64 / fs
            )
        });
        Ok((self.stretch(start, len)?, note))
    }
}

impl crate::measure::delay::Records for CaptureFile {
    fn samples(&self) -> usize {
        self.len as usize
    }
    fn stretch(&self, start: usize, len: usize) -> Result<std::borrow::Cow<'_, [f64]>, Error> {
        match &self.body {
            Body::Csv(v) => Ok(std::borrow::Cow::Borrowed(&v[start..start + len])),
            Body::Wav { .. } => Ok(std::borrow::Cow::Owned(
                CaptureFile::stretch(self, start as u64, len as u64)?.samples,
            )),
        }
    }
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

/// Read the signal `pick` of the recording at `path` (WAV or CSV, see [`kind_of`]) whole. Asking a WAV file for
/// a column, or a CSV file for a channel, is refused with the option to use instead.
pub fn read(path: &Path, pick: &Pick) -> Result<Capture, Error> {
    let f = open(path, pick)?;
    f.stretch(0, f.len)
}

/// Open the signal `pick` of the recording at `path` for reading a stretch at a time ([`CaptureFile`]).
pub fn open(path: &Path, pick: &Pick) -> Result<CaptureFile, Error> {
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
        (Kind::Wav, _) => wav::open(path, pick),
        (Kind::Csv, _) => {
            let c = csv::read(path, pick)?;
            Ok(CaptureFile {
                file: c.file,
                origin: c.origin,
                sample_rate_hz: c.sample_rate_hz,
                t0_s: c.t0_s,
                len: c.samples.len() as u64,
                body: Body::Csv(c.samples),
            })
        }
    }
}
