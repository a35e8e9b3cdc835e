//! A channel of a WAV recording, through the checked reader the WAV source uses
//! ([`crate::stages::wav_file`]): every format hound reads (8/16/24/32-bit integer, 32-bit float, any channel
//! count), samples scaled to +-1 at the format's full scale.

use std::io::BufReader;
use std::path::Path;

use super::{Body, Capture, CaptureFile, Origin, Pick};
use crate::Error;
use crate::stages::wav_file;

/// Read channel `pick` (from 1; [`Pick::Only`] for a one-channel file) of the WAV file at `path`, whole.
pub fn read(path: &Path, pick: &Pick) -> Result<Capture, Error> {
    let f = open(path, pick)?;
    f.stretch(0, f.len)
}

/// Open channel `pick` of the WAV file at `path` (header checked, no sample read): stretches of it are then read
/// one at a time ([`CaptureFile::stretch`]).
pub fn open(path: &Path, pick: &Pick) -> Result<CaptureFile, Error> {
    let header = wav_file::read_header(path)?;
    let channels = header.channels;
    let channel = match pick {
        Pick::Channel(c) if *c >= 1 && *c <= channels => *c,
        Pick::Channel(c) => {
            return Err(Error::BadInput(format!(
                "{}: --channel {c} was given but the file has {channels} channel(s); choose one of \
                 1..={channels}",
                path.display()
            )));
        }
        Pick::Only if channels == 1 => 1,
        Pick::Only => {
            return Err(Error::BadInput(format!(
                "{}: the file has {channels} channels; choose the one to analyse with --channel N \
                 (1..={channels})",
                path.display()
            )));
        }
        Pick::Column(_) => {
            return Err(Error::BadInput(format!(
                "{}: a WAV file has channels, not columns; use --channel N",
                path.display()
            )));
        }
    };
    // The header was checked above; read its format for the report (bits, integer or float).
    let (f, _) = wav_file::open_regular(path, "a WAV file")?;
    let spec = hound::WavReader::new(BufReader::new(f))
        .map_err(|e| Error::BadInput(format!("{}: not a readable WAV file ({e})", path.display())))?
        .spec();
    Ok(CaptureFile {
        file: path.to_path_buf(),
        origin: Origin::Wav {
            channel,
            channels,
            bits: spec.bits_per_sample,
            float: spec.sample_format == hound::SampleFormat::Float,
        },
        sample_rate_hz: f64::from(header.rate_hz),
        t0_s: 0.0,
        len: header.frames,
        body: Body::Wav {
            channel0: usize::from(channel - 1),
        },
    })
}

/// Frames `start .. start + len` of channel `channel0` (from 0).
pub(super) fn stretch(
    path: &Path,
    channel0: usize,
    start: u64,
    len: u64,
) -> Result<Vec<f64>, Error> {
    Ok(wav_file::read_channel_range(path, channel0, start, len)?.data)
}
