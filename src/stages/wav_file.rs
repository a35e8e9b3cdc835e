//! Reading a WAV file given by the user, which may come from another device or be hostile: only regular files
//! are opened (a FIFO or a device would block or never end), the header is checked (channels, a sample rate
//! above zero, a supported sample format), the data chunk's declared size is checked against the file's real
//! length before anything is allocated for it, and every sample must be finite (the first NaN or infinity is
//! reported with its index). `convchain check` and `convchain run` both read through here.

use std::fs::{File, OpenOptions};
use std::io::BufReader;
use std::os::unix::fs::OpenOptionsExt;
use std::path::Path;

use crate::Error;

/// One channel of a WAV file, as read.
#[derive(Debug, Clone)]
pub struct WavChannel {
    /// The channel's samples at the file's rate, +-1.0 full scale.
    pub data: Vec<f64>,
    /// The file's sample rate (Hz), above zero.
    pub rate_hz: u32,
    /// Channels in the file.
    pub channels: u16,
}

/// The header of a WAV file, checked (see the module's notes).
#[derive(Debug, Clone, Copy)]
pub struct WavHeader {
    pub rate_hz: u32,
    pub channels: u16,
    /// Frames (samples per channel) the data chunk holds.
    pub frames: u64,
}

fn bad(path: &Path, why: impl std::fmt::Display) -> Error {
    Error::BadInput(format!("{}: {why}", path.display()))
}

fn hound_error(path: &Path, e: hound::Error) -> Error {
    match e {
        hound::Error::IoError(source) => Error::Read {
            path: path.to_path_buf(),
            source,
        },
        other => bad(path, format!("not a readable WAV file ({other})")),
    }
}

/// A reading error of this module as the scenario checker words it: "cannot read WAV file PATH: why".
pub fn describe(e: &Error) -> String {
    match e {
        Error::Read { path, source } => {
            format!("cannot read WAV file {}: {source}", path.display())
        }
        other => format!("cannot read WAV file {other}"),
    }
}

/// Open `path` for reading when it is a regular file; a FIFO, socket, device or folder is refused without
/// blocking (the file is opened non-blocking, then checked on the open handle). `what` names the file expected
/// in the message ("a WAV file").
pub fn open_regular(path: &Path, what: &str) -> Result<(File, u64), Error> {
    let f = OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NONBLOCK | libc::O_CLOEXEC)
        .open(path)
        .map_err(|e| Error::Read {
            path: path.to_path_buf(),
            source: e,
        })?;
    let meta = f.metadata().map_err(|e| Error::Read {
        path: path.to_path_buf(),
        source: e,
    })?;
    if !meta.is_file() {
        return Err(bad(
            path,
            format!(
                "not a regular file (a folder, FIFO, socket or device); give the path of {what}"
            ),
        ));
    }
    Ok((f, meta.len()))
}

fn reader(path: &Path) -> Result<(hound::WavReader<BufReader<File>>, WavHeader), Error> {
    let (f, file_len) = open_regular(path, "a WAV file")?;
    let r = hound::WavReader::new(BufReader::new(f)).map_err(|e| hound_error(path, e))?;
    let spec = r.spec();
    if spec.channels == 0 {
        return Err(bad(path, "the WAV header says 0 channels"));
    }
    if spec.sample_rate == 0 {
        return Err(bad(path, "the WAV header says a sample rate of 0 Hz"));
    }
    match (spec.sample_format, spec.bits_per_sample) {
        (hound::SampleFormat::Float, 32) | (hound::SampleFormat::Int, 1..=32) => {}
        (fmt, bits) => {
            return Err(bad(
                path,
                format!(
                    "unsupported WAV sample format ({bits}-bit {fmt:?}); use 8/16/24/32-bit integer or 32-bit float"
                ),
            ));
        }
    }
    let bytes_per_sample = u64::from(spec.bits_per_sample.div_ceil(8));
    let declared = u64::from(r.len()) * bytes_per_sample;
    if declared > file_len {
        return Err(bad(
            path,
            format!(
                "the data chunk declares {declared} bytes but the whole file holds {file_len}; the file is \
                 truncated or its header is wrong"
            ),
        ));
    }
    let frames = u64::from(r.len()) / u64::from(spec.channels);
    if frames == 0 {
        return Err(bad(
            path,
            "the WAV file has no samples (its data chunk is empty)",
        ));
    }
    Ok((
        r,
        WavHeader {
            rate_hz: spec.sample_rate,
            channels: spec.channels,
            frames,
        },
    ))
}

/// Read and check the header only (no sample is read).
pub fn read_header(path: &Path) -> Result<WavHeader, Error> {
    reader(path).map(|(_, h)| h)
}

/// Read channel `channel` (from 0) of the WAV file at `path`, checking the whole file as the module says:
/// every sample of every channel must be finite.
pub fn read_channel(path: &Path, channel: usize) -> Result<WavChannel, Error> {
    read_channel_range(path, channel, 0, u64::MAX)
}

/// Read frames `start .. start + frames` (cut to the file's end) of channel `channel` (from 0): the reader seeks
/// to the first frame, so memory and time follow the stretch read, not the file. Every sample read (of every
/// channel) must be finite; a stretch that starts beyond the file's end is an error.
pub fn read_channel_range(
    path: &Path,
    channel: usize,
    start: u64,
    frames: u64,
) -> Result<WavChannel, Error> {
    let (mut r, h) = reader(path)?;
    let channels = usize::from(h.channels);
    if channel >= channels {
        return Err(bad(
            path,
            format!(
                "channel {channel} requested but the file has {channels} channel(s) (channels count from 0)"
            ),
        ));
    }
    if start >= h.frames {
        return Err(bad(
            path,
            format!(
                "the stretch asked for starts at frame {start} but the file holds {} frames",
                h.frames
            ),
        ));
    }
    let frames = frames.min(h.frames - start);
    if start > 0 {
        let at = u32::try_from(start).map_err(|_| bad(path, "the file is too long to seek in"))?;
        r.seek(at).map_err(|e| Error::Read {
            path: path.to_path_buf(),
            source: e,
        })?;
    }
    let wanted = frames as usize * channels;
    // The size was checked against the file's length, so this allocation is bounded by the file.
    let mut data = Vec::with_capacity(frames as usize);
    let spec = r.spec();
    let first = start as usize * channels;
    let not_finite = |i: usize, v: f32| {
        let i = first + i;
        bad(
            path,
            format!(
                "sample {i} (frame {}, channel {}) is {v}; a WAV source must hold finite samples",
                i / channels,
                i % channels
            ),
        )
    };
    match spec.sample_format {
        hound::SampleFormat::Float => {
            for (i, s) in r.samples::<f32>().take(wanted).enumerate() {
                let s = s.map_err(|e| hound_error(path, e))?;
                if !s.is_finite() {
                    return Err(not_finite(i, s));
                }
                if i % channels == channel {
                    data.push(f64::from(s));
                }
            }
        }
        hound::SampleFormat::Int => {
            let scale = 1.0 / f64::powi(2.0, i32::from(spec.bits_per_sample) - 1);
            for (i, s) in r.samples::<i32>().take(wanted).enumerate() {
                let s = s.map_err(|e| hound_error(path, e))?;
                if i % channels == channel {
                    data.push(f64::from(s) * scale);
                }
            }
        }
    }
    if data.is_empty() {
        return Err(bad(path, "the WAV file has no samples"));
    }
    Ok(WavChannel {
        data,
        rate_hz: h.rate_hz,
        channels: h.channels,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A minimal PCM/float WAV: RIFF header, fmt chunk, data chunk declaring `declared` bytes.
    fn wav_bytes(format_tag: u16, bits: u16, rate: u32, declared: u32, data: &[u8]) -> Vec<u8> {
        let mut b = Vec::new();
        b.extend_from_slice(b"RIFF");
        b.extend_from_slice(&(36 + data.len() as u32).to_le_bytes());
        b.extend_from_slice(b"WAVEfmt ");
        b.extend_from_slice(&16u32.to_le_bytes());
        b.extend_from_slice(&format_tag.to_le_bytes());
        b.extend_from_slice(&1u16.to_le_bytes());
        b.extend_from_slice(&rate.to_le_bytes());
        let align = bits / 8;
        b.extend_from_slice(&(rate.wrapping_mul(u32::from(align))).to_le_bytes());
        b.extend_from_slice(&align.to_le_bytes());
        b.extend_from_slice(&bits.to_le_bytes());
        b.extend_from_slice(b"data");
        b.extend_from_slice(&declared.to_le_bytes());
        b.extend_from_slice(data);
        b
    }

    fn floats(v: &[f32]) -> Vec<u8> {
        v.iter().flat_map(|x| x.to_le_bytes()).collect()
    }

    fn write(dir: &Path, name: &str, bytes: &[u8]) -> std::path::PathBuf {
        let p = dir.join(name);
        std::fs::write(&p, bytes).unwrap();
        p
    }

    #[test]
    fn a_nan_sample_is_refused_with_its_index() {
        let d = tempfile::tempdir().unwrap();
        let data = floats(&[0.0, 0.5, f32::NAN, 0.1]);
        let p = write(d.path(), "nan.wav", &wav_bytes(3, 32, 48_000, 16, &data));
        let e = read_channel(&p, 0).unwrap_err().to_string();
        assert!(e.contains("sample 2") && e.contains("NaN"), "{e}");
        let data = floats(&[f32::INFINITY]);
        let p = write(d.path(), "inf.wav", &wav_bytes(3, 32, 48_000, 4, &data));
        let e = read_channel(&p, 0).unwrap_err().to_string();
        assert!(e.contains("sample 0") && e.contains("inf"), "{e}");
    }

    #[test]
    fn a_zero_rate_an_oversized_data_chunk_and_an_empty_one_are_refused() {
        let d = tempfile::tempdir().unwrap();
        let p = write(d.path(), "r0.wav", &wav_bytes(1, 16, 0, 4, &[0, 0, 1, 0]));
        let e = read_header(&p).unwrap_err().to_string();
        assert!(e.contains("sample rate of 0"), "{e}");
        let p = write(
            d.path(),
            "big.wav",
            &wav_bytes(1, 16, 48_000, 0xFFFF_FFF0, &[0, 0, 1, 0]),
        );
        let e = read_channel(&p, 0).unwrap_err().to_string();
        assert!(e.contains("declares 4294967280 bytes"), "{e}");
        let p = write(d.path(), "empty.wav", &wav_bytes(1, 16, 48_000, 0, &[]));
        let e = read_header(&p).unwrap_err().to_string();
        assert!(e.contains("no samples"), "{e}");
    }

    #[test]
    fn a_fifo_is_refused_without_blocking() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("pipe.wav");
        let c = std::ffi::CString::new(p.to_str().unwrap()).unwrap();
        // SAFETY: a valid NUL-terminated path; mkfifo does not keep the pointer.
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        let e = read_header(&p).unwrap_err().to_string();
        assert!(e.contains("not a regular file"), "{e}");
    }

    #[test]
    fn a_good_file_reads_back_its_samples() {
        let d = tempfile::tempdir().unwrap();
        let data = floats(&[0.0, 0.5, -0.25]);
        let p = write(d.path(), "ok.wav", &wav_bytes(3, 32, 8000, 12, &data));
        let w = read_channel(&p, 0).unwrap();
        assert_eq!(w.data, vec![0.0, 0.5, -0.25]);
        assert_eq!((w.rate_hz, w.channels), (8000, 1));
    }

    #[test]
    fn a_stretch_of_one_channel_is_read_after_a_seek() {
        // Stereo 16-bit: channel 0 holds frame index k, channel 1 holds -k (in LSBs).
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("ramp.wav");
        let spec = hound::WavSpec {
            channels: 2,
            sample_rate: 1000,
            bits_per_sample: 16,
            sample_format: hound::SampleFormat::Int,
        };
        let mut w = hound::WavWriter::create(&p, spec).unwrap();
        for k in 0..100i16 {
            w.write_sample(k).unwrap();
            w.write_sample(-k).unwrap();
        }
        w.finalize().unwrap();
        let lsb = 1.0 / 32768.0;
        let r = read_channel_range(&p, 1, 40, 5).unwrap();
        assert_eq!(
            r.data,
            (40..45).map(|k| -f64::from(k) * lsb).collect::<Vec<_>>()
        );
        // Cut at the file's end; a start beyond it is refused.
        assert_eq!(read_channel_range(&p, 0, 98, 10).unwrap().data.len(), 2);
        let e = read_channel_range(&p, 0, 100, 1).unwrap_err();
        assert!(e.to_string().contains("holds 100 frames"), "{e}");
    }
}
