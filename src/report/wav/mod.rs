//! Listening files: band-limited resampling of simulated records to an audio rate and WAV encoding of the
//! input, the output and the error (what the chain added), so a person can hear a converter chain.
//!
//! Resampling: [`resample`] (a phase-bank Kaiser-windowed sinc; its design and measured quality are in
//! src/report/wav/resample.rs).

use std::io::Cursor;

use crate::Error;

mod resample;
pub use resample::resample;
use resample::{Resampler, check_rate};

/// Peak of the error file after the gain cap, as a fraction of digital full scale (the same 1/1.05
/// headroom the input and output files get).
const ERROR_PEAK_CAP: f64 = 1.0 / 1.05;
/// Headroom factor between the larger signal peak and the chosen full scale.
const FULL_SCALE_HEADROOM: f64 = 1.05;

/// Sample format of a written WAV file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WavFormat {
    /// 24-bit signed integer PCM; +1.0 full scale is 2^23 (clamped to 2^23 - 1).
    Int24,
    /// 32-bit IEEE float; full scale is +-1.0.
    Float32,
}

/// Options for the listening files.
#[derive(Debug, Clone, PartialEq)]
pub struct WavOptions {
    /// Sample rate of the written files (Hz); default 48000.
    pub rate_hz: u32,
    /// Sample format; default 24-bit integer.
    pub format: WavFormat,
    /// Gain applied to the error file relative to the shared volts-to-full-scale mapping (linear, not dB);
    /// default 1. Lowered automatically if the error file would clip.
    pub listen_gain: f64,
}

impl Default for WavOptions {
    fn default() -> Self {
        WavOptions {
            rate_hz: 48_000,
            format: WavFormat::Int24,
            listen_gain: 1.0,
        }
    }
}

/// `dwChannelMask` of a mono WAVE_FORMAT_EXTENSIBLE file: SPEAKER_FRONT_CENTER (Microsoft's
/// WAVEFORMATEXTENSIBLE documentation, ksmedia.h speaker positions; from memory). The WAV writer we use puts
/// SPEAKER_FRONT_LEFT (0x1) in every mono file, so a player routes it to the left speaker only.
pub const MONO_CHANNEL_MASK: u32 = 0x4;

/// Byte offset of `dwChannelMask` in a WAV file whose `fmt ` chunk is WAVE_FORMAT_EXTENSIBLE with one channel
/// and starts right after the RIFF header (as the writer lays it out): None for any other file.
pub fn mono_channel_mask_offset(header: &[u8]) -> Option<usize> {
    let u16_at = |i: usize| {
        header
            .get(i..i + 2)
            .map(|b| u16::from_le_bytes([b[0], b[1]]))
    };
    let extensible = header.get(0..4) == Some(b"RIFF")
        && header.get(8..16) == Some(b"WAVEfmt ")
        && u16_at(20) == Some(0xfffe)
        && u16_at(22) == Some(1)
        && u16_at(36) == Some(22);
    (extensible && header.len() >= 44).then_some(40)
}

/// Encode mono samples (volts) as a WAV file in memory: `full_scale_v` maps to digital full scale (1.0).
/// Values beyond full scale are clamped (both formats), so the file never holds more than +-1.0.
pub fn encode(
    samples_v: &[f64],
    full_scale_v: f64,
    rate_hz: u32,
    format: WavFormat,
) -> Result<Vec<u8>, Error> {
    if !(full_scale_v.is_finite() && full_scale_v > 0.0) {
        return Err(Error::BadInput(format!(
            "WAV full scale must be a positive number of volts, got {full_scale_v}"
        )));
    }
    if rate_hz == 0 {
        return Err(Error::BadInput("WAV sample rate must be above 0 Hz".into()));
    }
    if let Some(i) = samples_v.iter().position(|v| !v.is_finite()) {
        return Err(Error::Run(format!(
            "cannot encode a WAV file: sample {i} is not a finite number ({})",
            samples_v[i]
        )));
    }
    let spec = match format {
        WavFormat::Int24 => hound::WavSpec {
            channels: 1,
            sample_rate: rate_hz,
            bits_per_sample: 24,
            sample_format: hound::SampleFormat::Int,
        },
        WavFormat::Float32 => hound::WavSpec {
            channels: 1,
            sample_rate: rate_hz,
            bits_per_sample: 32,
            sample_format: hound::SampleFormat::Float,
        },
    };
    let hound_err = |e: hound::Error| Error::Run(format!("cannot encode a WAV file: {e}"));
    let mut bytes = Vec::with_capacity(44 + samples_v.len() * 4);
    {
        let mut writer = hound::WavWriter::new(Cursor::new(&mut bytes), spec).map_err(hound_err)?;
        let inv = 1.0 / full_scale_v;
        for &v in samples_v {
            let s = (v * inv).clamp(-1.0, 1.0);
            match format {
                WavFormat::Int24 => {
                    const FULL: f64 = 8_388_608.0; // 2^23
                    let i = (s * FULL).round().clamp(-FULL, FULL - 1.0) as i32;
                    writer.write_sample(i).map_err(hound_err)?;
                }
                WavFormat::Float32 => writer.write_sample(s as f32).map_err(hound_err)?,
            }
        }
        writer.finalize().map_err(hound_err)?;
    }
    if let Some(i) = mono_channel_mask_offset(&bytes) {
        bytes[i..i + 4].copy_from_slice(&MONO_CHANNEL_MASK.to_le_bytes());
    }
    Ok(bytes)
}

/// The three listening files and how they were scaled.
#[derive(Debug, Clone)]
pub struct ListeningSet {
    /// input.wav: the input, shifted by the chain's delay so it lines up with the output sample for sample.
    pub input: Vec<u8>,
    /// output.wav: the chain's output.
    pub output: Vec<u8>,
    /// error.wav: output - (gain x delayed input + offset), scaled by `error_gain_used`.
    pub error: Vec<u8>,
    /// Volts that map to digital full scale in input.wav and output.wav (and, before the error gain, in error.wav).
    pub full_scale_v: f64,
    /// Linear gain actually applied to the error file: the requested `listen_gain`, or lower if that would clip.
    pub error_gain_used: f64,
    /// Rms of the error (volts, mean removed, band-limited to the file's band, before the listening gain),
    /// over the records once (not over repeats, not faded).
    pub error_rms_v: f64,
    /// Number of samples in each file.
    pub length: usize,
    /// Sample rate of the files (Hz).
    pub rate_hz: u32,
    /// How the files were made longer than the records: [`Looped::No`] when the records were long enough.
    pub looped: Looped,
    /// Length of the records' span the files were made from (s), before any loop.
    pub record_s: f64,
}

/// How a listening file was extended to [`ListeningRecords::min_seconds`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Looped {
    /// Not extended: the records were long enough.
    No,
    /// The records hold whole periods of a periodic signal (a coherent record), so the band-limited
    /// resampler read them as one period of an endless signal: the loop has no seam at all.
    Seamless,
    /// The span was repeated with a raised-cosine crossfade of [`LOOP_CROSSFADE_S`] at each join.
    Crossfaded,
}

impl Looped {
    /// The word report.json uses.
    pub fn as_str(self) -> &'static str {
        match self {
            Looped::No => "no",
            Looped::Seamless => "seamless",
            Looped::Crossfaded => "crossfaded",
        }
    }
}

/// Shortest listening file the runs write (s): a 46 ms record played once is a click, not something to listen
/// to.
pub const LISTEN_MIN_S: f64 = 2.0;
/// Raised-cosine fade in at the start and out at the end of every listening file (s): the files start and stop
/// without a click (common practice, no source).
pub const LISTEN_FADE_S: f64 = 0.02;
/// Crossfade at each join when a span that is not periodic is repeated (s).
pub const LOOP_CROSSFADE_S: f64 = 0.01;

/// The records a run hands to [`listening_files`], and how to read them.
#[derive(Debug, Clone)]
pub struct ListeningRecords<'a> {
    /// The source (volts) on the analysis grid.
    pub input_v: &'a [f64],
    /// The chain's output (volts) on the same grid, sample 0 at the same instant.
    pub output_v: &'a [f64],
    /// Rate of the grid (Hz).
    pub rate_hz: f64,
    /// The chain as output(t) ~= gain x input(t - delay_s) + offset_v.
    pub delay_s: f64,
    pub gain: f64,
    pub offset_v: f64,
    /// Both records hold a whole number of periods of the signal (a coherent record): they are read as one
    /// period of an endless signal, so the files loop without a seam and lose no edge to the resampler.
    pub periodic: bool,
    /// The smallest volts-to-full-scale mapping the files may use (0 for none): a chain with a converter gives
    /// its full scale here, so two runs of the same chain map volts to the files alike whatever their signals
    /// add (see [`listening_files`]).
    pub full_scale_floor_v: f64,
    /// The files last at least this long (s): the records are looped when they are shorter.
    pub min_seconds: f64,
    /// Raised-cosine fade at both ends of every file (s).
    pub fade_s: f64,
}

/// Build input.wav, output.wav and error.wav.
///
/// `input_v` and `output_v` are records (volts) on the same uniform grid at `rate_hz_in` (sample 0 of both at
/// the same instant). The chain is modelled as output(t) ~= gain x input(t - delay_s) + offset_v; the error is
/// `output - (gain x input delayed by delay_s + offset_v)`, i.e. what the chain added. Both records are
/// resampled to `opts.rate_hz` with the band-limited resampler of [`resample`], and the delay is applied in
/// the same step by evaluating the band-limited input at t - delay_s (band-limited fractional delay).
///
/// The files cover the span where both the output and the delayed input are known, less the resampling
/// kernel's half-length at each end (about 1.3 ms at 48 kHz), so record edges do not leak into the error.
/// input.wav holds the input shifted by `delay_s`, so the three files line up sample for sample.
///
/// **The mean (DC) is removed from all three signals before encoding**: a chain working around a mid-rail
/// bias (say 2.5 V) would otherwise waste headroom and thump when played.
///
/// Input and output share one volts-to-full-scale mapping so they compare by ear: `full_scale_v` is 1.05 x
/// the larger peak of the two (after resampling and DC removal), rounded up to a tidy value (1, 1.2, 1.5, 2,
/// 2.5, 3, 4, 5, 6 or 8 times a power of ten). The error file uses the same mapping times
/// `opts.listen_gain`, but that gain is lowered so the error's peak stays at 1/1.05 of full scale: no file
/// ever clips. The gain used is reported.
///
/// This is the records' span as it is, neither looped nor faded; a run writes [`listening_files`].
pub fn listening_set(
    input_v: &[f64],
    output_v: &[f64],
    rate_hz_in: f64,
    delay_s: f64,
    gain: f64,
    offset_v: f64,
    opts: &WavOptions,
) -> Result<ListeningSet, Error> {
    listening_files(
        &ListeningRecords {
            input_v,
            output_v,
            rate_hz: rate_hz_in,
            delay_s,
            gain,
            offset_v,
            periodic: false,
            full_scale_floor_v: 0.0,
            min_seconds: 0.0,
            fade_s: 0.0,
        },
        opts,
    )
}

/// The listening files a run writes: as [`listening_set`], then
/// - made at least `rec.min_seconds` long: periodic records are read as one period of an endless signal (no
///   seam; the whole record is used, no edge is trimmed); other spans are repeated with a raised-cosine
///   crossfade of [`LOOP_CROSSFADE_S`] at each join;
/// - faded in and out over `rec.fade_s` (raised cosine);
/// - mapped with `full_scale_v` at least `tidy(1.05 x rec.full_scale_floor_v)`, so two runs of one chain
///   share a mapping even when one adds more noise than the other (whose peaks would otherwise round to
///   different tidy values). The signals' own peak still raises it when they exceed the floor: no file clips.
///
/// `error_rms_v` is that of the records once, before any loop or fade.
pub fn listening_files(
    rec: &ListeningRecords<'_>,
    opts: &WavOptions,
) -> Result<ListeningSet, Error> {
    let (input_v, output_v, rate_hz_in) = (rec.input_v, rec.output_v, rec.rate_hz);
    let (delay_s, gain, offset_v) = (rec.delay_s, rec.gain, rec.offset_v);
    check_rate("the records' sample rate", rate_hz_in)?;
    if opts.rate_hz == 0 {
        return Err(Error::BadInput(
            "the listening files' sample rate must be above 0 Hz".into(),
        ));
    }
    for (name, v) in [
        ("delay", delay_s),
        ("gain", gain),
        ("offset", offset_v),
        ("full-scale floor", rec.full_scale_floor_v),
        ("minimum length", rec.min_seconds),
        ("fade", rec.fade_s),
    ] {
        if !v.is_finite() {
            return Err(Error::BadInput(format!(
                "listening files: {name} must be a finite number, got {v}"
            )));
        }
    }
    if !(opts.listen_gain.is_finite() && opts.listen_gain > 0.0) {
        return Err(Error::BadInput(format!(
            "listening gain must be a positive number, got {}",
            opts.listen_gain
        )));
    }
    if let Some(i) = input_v.iter().chain(output_v).position(|v| !v.is_finite()) {
        return Err(Error::Run(format!(
            "listening files: record sample {i} is not a finite number"
        )));
    }
    let rate_out = f64::from(opts.rate_hz);
    let periodic = rec.periodic && !input_v.is_empty() && input_v.len() == output_v.len();
    let resampler = Resampler::new(rate_hz_in, rate_out, periodic.then_some(output_v.len()));
    let step = rate_hz_in / rate_out;
    let delay_in_samples = delay_s * rate_hz_in;
    let min_len = (rec.min_seconds.max(0.0) * rate_out).ceil() as usize;

    let (mut in_r, mut out_r, record_len) = if periodic {
        // One period of the record in output samples; the files hold at least that and at least min_len.
        let period_len = (output_v.len() as f64 / step).floor() as usize;
        let length = period_len.max(min_len).max(1);
        let mut out_r = vec![0.0; length];
        resampler.eval_grid_circular(output_v, 0.0, &mut out_r);
        let mut in_r = vec![0.0; length];
        resampler.eval_grid_circular(input_v, -delay_in_samples, &mut in_r);
        (in_r, out_r, period_len.clamp(1, length))
    } else {
        let margin = resampler.half_length_in_samples.ceil();
        // Positions in input samples along the output record's time axis.
        let start = 0.0f64.max(delay_in_samples) + margin;
        let end = (output_v.len() as f64 - 1.0).min(delay_in_samples + input_v.len() as f64 - 1.0)
            - margin;
        if input_v.is_empty() || output_v.is_empty() || end < start {
            let need_s = (2.0 * margin + 1.0) / rate_hz_in + delay_s.abs();
            return Err(Error::BadInput(format!(
                "records too short for listening files: the input ({} samples) and output ({} samples) \
                 overlap for less than {need_s:.6} s once the {delay_s} s delay and the resampler's edges are \
                 allowed for",
                input_v.len(),
                output_v.len()
            )));
        }
        let length = ((end - start) / step + 1e-9).floor() as usize + 1;
        let mut out_r = vec![0.0; length];
        resampler.eval_grid(output_v, start, &mut out_r);
        let mut in_r = vec![0.0; length];
        resampler.eval_grid(input_v, start - delay_in_samples, &mut in_r);
        (in_r, out_r, length)
    };
    let mut err: Vec<f64> = out_r
        .iter()
        .zip(&in_r)
        .map(|(o, i)| o - (gain * i + offset_v))
        .collect();
    // The mean of the records once (a periodic file's first period; the rest repeats it) comes off all of it.
    for x in [&mut in_r, &mut out_r, &mut err] {
        let mean = x[..record_len].iter().sum::<f64>() / record_len as f64;
        for v in x.iter_mut() {
            *v -= mean;
        }
    }
    let error_rms_v = rms_of(&err[..record_len]);

    let looped = if periodic {
        if in_r.len() > record_len {
            Looped::Seamless
        } else {
            Looped::No
        }
    } else if record_len < min_len {
        let crossfade = ((LOOP_CROSSFADE_S * rate_out).round() as usize).min(record_len / 4);
        for x in [&mut in_r, &mut out_r, &mut err] {
            *x = loop_with_crossfade(x, min_len, crossfade);
        }
        Looped::Crossfaded
    } else {
        Looped::No
    };
    let length = in_r.len();
    let fade_len = ((rec.fade_s.max(0.0) * rate_out).round() as usize).min(length / 4);
    for x in [&mut in_r, &mut out_r, &mut err] {
        fade_ends(x, fade_len);
    }

    let signal_peak_v = peak(&in_r).max(peak(&out_r));
    let from_peak_v = if signal_peak_v > 0.0 {
        tidy_up(FULL_SCALE_HEADROOM * signal_peak_v)
    } else {
        1.0
    };
    let full_scale_v = if rec.full_scale_floor_v > 0.0 {
        from_peak_v.max(tidy_up(FULL_SCALE_HEADROOM * rec.full_scale_floor_v))
    } else {
        from_peak_v
    };
    let error_peak_v = peak(&err);
    let mut error_gain_used = opts.listen_gain;
    if error_peak_v * error_gain_used > ERROR_PEAK_CAP * full_scale_v {
        error_gain_used = ERROR_PEAK_CAP * full_scale_v / error_peak_v;
    }
    let input = encode(&in_r, full_scale_v, opts.rate_hz, opts.format)?;
    let output = encode(&out_r, full_scale_v, opts.rate_hz, opts.format)?;
    for e in &mut err {
        *e *= error_gain_used;
    }
    let error = encode(&err, full_scale_v, opts.rate_hz, opts.format)?;
    Ok(ListeningSet {
        input,
        output,
        error,
        full_scale_v,
        error_gain_used,
        error_rms_v,
        length,
        rate_hz: opts.rate_hz,
        looped,
        record_s: record_len as f64 / rate_out,
    })
}

/// `x` repeated to `total` samples: copy k starts at k (n - crossfade), and over the `crossfade` samples where
/// copy k - 1's tail and copy k's head overlap, a raised cosine hands one to the other (the weights sum to 1).
fn loop_with_crossfade(x: &[f64], total: usize, crossfade: usize) -> Vec<f64> {
    let n = x.len();
    if n == 0 || total <= n {
        return x.to_vec();
    }
    let xf = crossfade.min(n / 2);
    let hop = n - xf;
    (0..total)
        .map(|m| {
            let (k, j) = (m / hop, m % hop);
            if k > 0 && j < xf {
                let w = 0.5 - 0.5 * (std::f64::consts::PI * (j as f64 + 0.5) / xf as f64).cos();
                w * x[j] + (1.0 - w) * x[hop + j]
            } else {
                x[j]
            }
        })
        .collect()
}

/// Raised-cosine fade in over the first `len` samples and out over the last `len`.
fn fade_ends(x: &mut [f64], len: usize) {
    let n = x.len();
    if len == 0 || n < 2 * len {
        return;
    }
    for j in 0..len {
        let w = 0.5 - 0.5 * (std::f64::consts::PI * (j as f64 + 0.5) / len as f64).cos();
        x[j] *= w;
        x[n - 1 - j] *= w;
    }
}

fn rms_of(x: &[f64]) -> f64 {
    if x.is_empty() {
        return 0.0;
    }
    (x.iter().map(|e| e * e).sum::<f64>() / x.len() as f64).sqrt()
}

fn peak(x: &[f64]) -> f64 {
    x.iter().fold(0.0, |m, v| m.max(v.abs()))
}

/// The smallest of 1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8 times a power of ten that is >= v (v > 0).
fn tidy_up(v: f64) -> f64 {
    const STEPS: [f64; 11] = [1.0, 1.2, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0];
    let decade = 10f64.powf(v.log10().floor());
    let mantissa = v / decade;
    let step = STEPS
        .iter()
        .copied()
        .find(|s| *s >= mantissa * (1.0 - 1e-12))
        .unwrap_or(10.0);
    (step * decade).max(v)
}

#[cfg(test)]
mod tests {
    use super::resample::{HALF_LENGTH_LOW_RATE_SAMPLES, sinc};
    use super::*;
    use rand::{RngExt, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use std::f64::consts::PI;

    #[test]
    fn mono_files_carry_the_front_centre_channel_mask() {
        // WAVE_FORMAT_EXTENSIBLE's dwChannelMask at byte 40 (RIFF 12 + chunk header 8 + 20 bytes into the fmt
        // chunk); 0x4 = SPEAKER_FRONT_CENTER (Microsoft's WAVEFORMATEXTENSIBLE documentation; from memory).
        for format in [WavFormat::Float32, WavFormat::Int24] {
            let b = encode(&[0.0, 0.5, -0.5], 1.0, 48_000, format).unwrap();
            assert_eq!(
                &b[20..22],
                &0xfffe_u16.to_le_bytes(),
                "{format:?} is extensible"
            );
            assert_eq!(
                u32::from_le_bytes([b[40], b[41], b[42], b[43]]),
                0x4,
                "{format:?}"
            );
            let (spec, x) = decode(&b);
            assert_eq!(spec.channels, 1);
            assert_eq!(x.len(), 3);
        }
    }

    /// Decode a WAV file with hound into (spec, samples in full-scale units).
    fn decode(bytes: &[u8]) -> (hound::WavSpec, Vec<f64>) {
        let mut reader = hound::WavReader::new(Cursor::new(bytes)).unwrap();
        let spec = reader.spec();
        let samples = match spec.sample_format {
            hound::SampleFormat::Int => {
                let full = 2f64.powi(i32::from(spec.bits_per_sample) - 1);
                reader
                    .samples::<i32>()
                    .map(|s| f64::from(s.unwrap()) / full)
                    .collect()
            }
            hound::SampleFormat::Float => reader
                .samples::<f32>()
                .map(|s| f64::from(s.unwrap()))
                .collect(),
        };
        (spec, samples)
    }

    /// Three-parameter sine fit at a known frequency (linear least squares on A cos + B sin + C):
    /// returns (amplitude, phase of A sin(w t + phase)).
    #[allow(clippy::needless_range_loop)]
    fn sine_fit(y: &[f64], t0_s: f64, rate_hz: f64, f_hz: f64) -> (f64, f64) {
        let mut m = [[0.0f64; 3]; 3];
        let mut r = [0.0f64; 3];
        for (i, &v) in y.iter().enumerate() {
            let w = 2.0 * PI * f_hz * (t0_s + i as f64 / rate_hz);
            let b = [w.sin(), w.cos(), 1.0];
            for a in 0..3 {
                r[a] += b[a] * v;
                for c in 0..3 {
                    m[a][c] += b[a] * b[c];
                }
            }
        }
        // Gaussian elimination, 3x3.
        for p in 0..3 {
            for q in p + 1..3 {
                let f = m[q][p] / m[p][p];
                for c in 0..3 {
                    m[q][c] -= f * m[p][c];
                }
                r[q] -= f * r[p];
            }
        }
        let mut s = [0.0f64; 3];
        for p in (0..3).rev() {
            let mut acc = r[p];
            for c in p + 1..3 {
                acc -= m[p][c] * s[c];
            }
            s[p] = acc / m[p][p];
        }
        // s[0] sin + s[1] cos = A sin(w t + phase), A cos(phase) = s[0], A sin(phase) = s[1].
        (s[0].hypot(s[1]), s[1].atan2(s[0]))
    }

    fn rms(x: &[f64]) -> f64 {
        (x.iter().map(|v| v * v).sum::<f64>() / x.len() as f64).sqrt()
    }

    fn mean(x: &[f64]) -> f64 {
        x.iter().sum::<f64>() / x.len() as f64
    }

    fn sine(n: usize, rate_hz: f64, f_hz: f64, amp: f64, phase: f64) -> Vec<f64> {
        (0..n)
            .map(|i| amp * (2.0 * PI * f_hz * i as f64 / rate_hz + phase).sin())
            .collect()
    }

    #[test]
    fn wav_round_trip_keeps_rate_format_length_and_values_within_one_lsb() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let full_scale_v = 2.5;
        let mut v: Vec<f64> = (0..5000)
            .map(|_| (rng.random::<f64>() * 2.0 - 1.0) * full_scale_v)
            .collect();
        v.extend([0.0, full_scale_v, -full_scale_v, 3.0 * full_scale_v, -4.0]);
        for (format, bits, sf) in [
            (WavFormat::Int24, 24, hound::SampleFormat::Int),
            (WavFormat::Float32, 32, hound::SampleFormat::Float),
        ] {
            let bytes = encode(&v, full_scale_v, 44_100, format).unwrap();
            let (spec, got) = decode(&bytes);
            assert_eq!(spec.sample_rate, 44_100);
            assert_eq!(spec.channels, 1);
            assert_eq!(spec.bits_per_sample, bits);
            assert_eq!(spec.sample_format, sf);
            assert_eq!(got.len(), v.len());
            let lsb = match format {
                WavFormat::Int24 => 2f64.powi(-23),
                WavFormat::Float32 => 2f64.powi(-24), // f32 spacing just below 1.0
            };
            for (g, x) in got.iter().zip(&v) {
                let want = (x / full_scale_v).clamp(-1.0, 1.0);
                assert!((g - want).abs() <= lsb, "{format:?}: {g} vs {want}");
            }
        }
    }

    #[test]
    fn encode_refuses_a_bad_full_scale_and_non_finite_samples() {
        assert!(encode(&[0.1], 0.0, 48_000, WavFormat::Int24).is_err());
        assert!(encode(&[f64::NAN], 1.0, 48_000, WavFormat::Int24).is_err());
        assert!(encode(&[0.1], 1.0, 0, WavFormat::Float32).is_err());
    }

    /// Amplitude within 0.01 dB and timing within 1 % of the finer sample period, away from the edges.
    fn check_passband_tone(in_rate_hz: f64, out_rate_hz: f64, f_hz: f64) {
        let n_in = ((0.1 * in_rate_hz) as usize).max(1000);
        let amp = 0.8;
        let phase = 0.4;
        let x = sine(n_in, in_rate_hz, f_hz, amp, phase);
        let y = resample(&x, in_rate_hz, out_rate_hz);
        let expect_len = ((n_in - 1) as f64 * out_rate_hz / in_rate_hz + 1e-9).floor() as usize + 1;
        assert_eq!(y.len(), expect_len);
        // Leave out the edges, where the kernel reaches past the record.
        let skip =
            (HALF_LENGTH_LOW_RATE_SAMPLES * (out_rate_hz / in_rate_hz).max(1.0)) as usize + 8;
        let inner = &y[skip..y.len() - skip];
        let (a, p) = sine_fit(inner, skip as f64 / out_rate_hz, out_rate_hz, f_hz);
        let amp_err_db = 20.0 * (a / amp).log10();
        let mut dp = p - phase;
        dp = (dp + PI).rem_euclid(2.0 * PI) - PI;
        let timing_err_s = dp / (2.0 * PI * f_hz);
        let finer_period_s = 1.0 / in_rate_hz.max(out_rate_hz);
        // Spec of this module (0.01 dB, 1 % of a sample): common practice, no source.
        assert!(
            amp_err_db.abs() < 0.01,
            "{in_rate_hz}->{out_rate_hz} at {f_hz} Hz: amplitude off by {amp_err_db} dB"
        );
        assert!(
            timing_err_s.abs() < 0.01 * finer_period_s,
            "{in_rate_hz}->{out_rate_hz} at {f_hz} Hz: timing off by {} samples",
            timing_err_s / finer_period_s
        );
    }

    #[test]
    fn resampling_keeps_amplitude_and_timing_of_in_band_sines() {
        check_passband_tone(192_000.0, 48_000.0, 1234.5);
        check_passband_tone(192_000.0, 48_000.0, 15_003.0);
        check_passband_tone(333_333.33, 48_000.0, 3000.7);
        check_passband_tone(333_333.33, 48_000.0, 19_500.0);
        check_passband_tone(4_000.0, 48_000.0, 997.0);
        check_passband_tone(4_000.0, 48_000.0, 1_700.0);
    }

    #[test]
    fn decimation_rejects_tones_above_the_output_nyquist_by_80_db() {
        for (in_rate_hz, f_hz) in [
            (192_000.0, 24_700.0),
            (192_000.0, 40_000.0),
            (192_000.0, 71_234.0),
            (333_333.33, 30_000.0),
            (333_333.33, 150_001.0),
        ] {
            let out_rate_hz = 48_000.0;
            let x = sine((0.05 * in_rate_hz) as usize, in_rate_hz, f_hz, 1.0, 0.3);
            let y = resample(&x, in_rate_hz, out_rate_hz);
            let inner = &y[80..y.len() - 80];
            let level_db = 20.0 * (rms(inner) * 2f64.sqrt()).log10();
            // Requirement of this module (>= 80 dB anti-alias rejection): common practice, no source.
            assert!(
                level_db < -80.0,
                "{f_hz} Hz at {in_rate_hz} Hz -> 48 kHz leaks at {level_db} dB"
            );
        }
    }

    /// Gain (dB) of `resample` from `in_rate_hz` to 48 kHz for a tone at `f_hz`: the output's amplitude by a
    /// sine fit at `f_hz` when it lies below 24 kHz, else the output's peak level (where an alias lands).
    fn tone_gain_db(in_rate_hz: f64, f_hz: f64) -> f64 {
        let out_rate_hz = 48_000.0;
        let n_in = (0.06 * in_rate_hz) as usize;
        let x = sine(n_in, in_rate_hz, f_hz, 1.0, 0.3);
        let y = resample(&x, in_rate_hz, out_rate_hz);
        let skip = 200;
        let inner = &y[skip..y.len() - skip];
        if f_hz < 0.5 * out_rate_hz {
            let (a, _) = sine_fit(inner, skip as f64 / out_rate_hz, out_rate_hz, f_hz);
            20.0 * a.log10()
        } else {
            20.0 * peak(inner).log10()
        }
    }

    /// The rates each path of the resampler serves: an exact polyphase bank (400 kHz and 10 MHz: whole-Hz
    /// ratios 25/3 and 625/3, the latter after a first integer decimation), a blended bank (333333.33 Hz)
    /// and a first stage with a blended bank (2e8 / 3 Hz).
    const PATH_RATES_HZ: [f64; 4] = [400_000.0, 10_000_000.0, 333_333.33, 2e8 / 3.0];

    #[test]
    fn the_pass_band_is_flat_to_0_0002_db_up_to_0_45_of_the_output_rate() {
        for in_rate_hz in PATH_RATES_HZ {
            for f_hz in [
                101.3, 997.0, 5_003.0, 12_345.0, 18_000.5, 20_500.0, 21_600.0,
            ] {
                let g = tone_gain_db(in_rate_hz, f_hz);
                // This module's specification (+-0.0002 dB to 0.45 fs; measured within 6e-5 dB): common
                // practice, no source.
                assert!(
                    g.abs() < 0.0002,
                    "{in_rate_hz} Hz -> 48 kHz: {f_hz} Hz at {g} dB"
                );
            }
        }
    }

    #[test]
    fn the_stop_band_rejects_by_100_db_from_the_output_nyquist_frequency() {
        for in_rate_hz in PATH_RATES_HZ {
            let nyquist_in_hz = 0.5 * in_rate_hz;
            // Tones that the first stage's decimation would fold to 1 kHz and to 23 kHz.
            let mid_rate_hz = Resampler::new(in_rate_hz, 48_000.0, None)
                .first_stage_rate_hz(in_rate_hz)
                .unwrap_or(f64::INFINITY);
            for f_hz in [
                24_000.0,
                24_100.0,
                26_000.0,
                47_900.0,
                71_999.0,
                96_000.5,
                0.5 * nyquist_in_hz + 17.0,
                0.97 * nyquist_in_hz,
                mid_rate_hz - 1_000.0,
                mid_rate_hz + 23_000.0,
                2.0 * mid_rate_hz - 1_000.0,
            ] {
                if f_hz >= nyquist_in_hz {
                    continue;
                }
                let g = tone_gain_db(in_rate_hz, f_hz);
                // This module's specification (>= 100 dB from 0.5 fs; measured 107 dB at worst, 24.1 kHz):
                // common practice, no source.
                assert!(
                    g < -100.0,
                    "{in_rate_hz} Hz -> 48 kHz: {f_hz} Hz leaks at {g} dB"
                );
            }
        }
    }

    #[test]
    fn equal_rates_and_empty_records_resample_trivially() {
        let x = [1.0, -2.0, 3.5];
        assert_eq!(resample(&x, 48_000.0, 48_000.0), x.to_vec());
        assert!(resample(&[], 192_000.0, 48_000.0).is_empty());
        assert_eq!(resample(&[0.25], 192_000.0, 48_000.0).len(), 1);
    }

    #[test]
    fn identical_records_give_a_silent_error_file_and_dc_is_removed() {
        let rate_hz = 192_000.0;
        let n = 19_200;
        let x: Vec<f64> = (0..n)
            .map(|i| {
                let t = i as f64 / rate_hz;
                2.5 + (2.0 * PI * 1000.0 * t).sin() + 0.1 * (2.0 * PI * 5100.0 * t).sin()
            })
            .collect();
        let set = listening_set(&x, &x, rate_hz, 0.0, 1.0, 0.0, &WavOptions::default()).unwrap();
        assert_eq!(set.rate_hz, 48_000);
        // 0.1 s at 48 kHz less the kernel's half-length (64 samples at 48 kHz) at each end.
        assert_eq!(set.length, 4800 - 2 * 64);
        assert_eq!(set.error_rms_v, 0.0);
        let (spec, e) = decode(&set.error);
        assert_eq!((spec.sample_rate, spec.bits_per_sample), (48_000, 24));
        assert_eq!(e.len(), set.length);
        assert!(e.iter().all(|v| v.abs() <= 2f64.powi(-23)));
        assert_eq!(set.input, set.output);
        // Peak about 1.09 V once the 2.5 V mean is gone; 1.05 x that rounds up to 1.2 V.
        assert_eq!(set.full_scale_v, 1.2);
        let (_, input) = decode(&set.input);
        assert!(mean(&input).abs() < 1e-3, "mean {}", mean(&input));
        assert!(input.iter().all(|v| v.abs() < 1.0 / 1.05));
    }

    #[test]
    fn a_delayed_scaled_offset_copy_gives_a_near_silent_error_and_a_wrong_delay_does_not() {
        let rate_hz = 333_333.33;
        let n = 40_000;
        let delay_s = 12.37 / rate_hz;
        let signal =
            |t: f64| (2.0 * PI * 1000.0 * t).sin() + 0.3 * (2.0 * PI * 7010.0 * t + 1.0).sin();
        let input: Vec<f64> = (0..n).map(|i| signal(i as f64 / rate_hz)).collect();
        let output: Vec<f64> = (0..n)
            .map(|i| 0.5 + 2.0 * signal(i as f64 / rate_hz - delay_s))
            .collect();
        let opts = WavOptions {
            format: WavFormat::Float32,
            ..WavOptions::default()
        };
        let set = listening_set(&input, &output, rate_hz, delay_s, 2.0, 0.5, &opts).unwrap();
        let (_, out_wav) = decode(&set.output);
        let out_rms_v = rms(&out_wav) * set.full_scale_v;
        assert!(
            set.error_rms_v < 1e-5 * out_rms_v,
            "error {} V vs output {} V",
            set.error_rms_v,
            out_rms_v
        );
        // The input file is shifted to line up with the output: input x gain = output after DC removal.
        let (_, in_wav) = decode(&set.input);
        let mismatch = in_wav
            .iter()
            .zip(&out_wav)
            .fold(0.0f64, |m, (i, o)| m.max((2.0 * i - o).abs()));
        assert!(mismatch < 1e-5, "{mismatch}");
        // One input sample of delay error leaves a clearly audible error.
        let wrong = listening_set(
            &input,
            &output,
            rate_hz,
            delay_s + 1.0 / rate_hz,
            2.0,
            0.5,
            &opts,
        )
        .unwrap();
        assert!(wrong.error_rms_v > 1e-3 * out_rms_v);
    }

    #[test]
    fn the_gain_cap_prevents_clipping_and_reports_the_lowered_gain() {
        let rate_hz = 96_000.0;
        let n = 20_000;
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let input = sine(n, rate_hz, 440.0, 1.0, 0.0);
        let output: Vec<f64> = input
            .iter()
            .map(|x| x + 1e-4 * (rng.random::<f64>() - 0.5))
            .collect();
        for listen_gain in [1e6, 10.0] {
            let opts = WavOptions {
                listen_gain,
                ..WavOptions::default()
            };
            let set = listening_set(&input, &output, rate_hz, 0.0, 1.0, 0.0, &opts).unwrap();
            let (_, e) = decode(&set.error);
            let peak_fs = e.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            assert!(peak_fs <= 1.0 / 1.05 + 2f64.powi(-23), "peak {peak_fs}");
            // Decoded error, back in volts, matches the reported rms.
            let e_rms_v = rms(&e) * set.full_scale_v / set.error_gain_used;
            assert!((e_rms_v / set.error_rms_v - 1.0).abs() < 1e-3);
            if listen_gain == 1e6 {
                assert!(set.error_gain_used < 1e6);
                // The cap is reached exactly: the error's peak sits at 1/1.05 of full scale.
                assert!(peak_fs > 1.0 / 1.05 - 2f64.powi(-22), "peak {peak_fs}");
            } else {
                // Noise peak about 5e-5 V x 10 is far below 1.2 V full scale: the requested gain stands.
                assert_eq!(set.error_gain_used, 10.0);
            }
        }
    }

    #[test]
    fn listening_set_refuses_records_too_short_and_bad_parameters() {
        let x = vec![0.0; 100];
        let opts = WavOptions::default();
        assert!(listening_set(&x, &x, 192_000.0, 0.0, 1.0, 0.0, &opts).is_err());
        let y = vec![0.0; 10_000];
        assert!(listening_set(&y, &y, 192_000.0, f64::NAN, 1.0, 0.0, &opts).is_err());
        assert!(listening_set(&y, &y, -1.0, 0.0, 1.0, 0.0, &opts).is_err());
        let bad = WavOptions {
            listen_gain: 0.0,
            ..WavOptions::default()
        };
        assert!(listening_set(&y, &y, 192_000.0, 0.0, 1.0, 0.0, &bad).is_err());
        assert!(listening_set(&y, &y, 192_000.0, 0.0, 1.0, 0.0, &opts).is_ok());
    }

    fn records(
        input_v: &'static [f64],
        output_v: &'static [f64],
        rate_hz: f64,
        periodic: bool,
    ) -> ListeningRecords<'static> {
        ListeningRecords {
            input_v,
            output_v,
            rate_hz,
            delay_s: 0.0,
            gain: 1.0,
            offset_v: 0.0,
            periodic,
            full_scale_floor_v: 0.0,
            min_seconds: LISTEN_MIN_S,
            fade_s: LISTEN_FADE_S,
        }
    }

    #[test]
    fn a_coherent_record_loops_without_a_seam_to_two_seconds_with_fades_at_the_ends() {
        // 23 ms at 192 kHz holding 17 whole cycles: read as one period, the files last 2 s and follow the
        // endless sine everywhere, across every pass through the record.
        let rate_hz = 192_000.0;
        let n = 4416;
        let f_hz = 17.0 * rate_hz / n as f64;
        let delay_s = 3.3 / rate_hz;
        let input: &'static [f64] = Vec::leak(sine(n, rate_hz, f_hz, 1.0, 0.0));
        let output: &'static [f64] = Vec::leak(
            (0..n)
                .map(|i| 0.8 * (2.0 * PI * f_hz * (i as f64 / rate_hz - delay_s)).sin())
                .collect(),
        );
        let rec = ListeningRecords {
            delay_s,
            gain: 0.8,
            ..records(input, output, rate_hz, true)
        };
        let opts = WavOptions {
            format: WavFormat::Float32,
            ..WavOptions::default()
        };
        let set = listening_files(&rec, &opts).unwrap();
        assert_eq!(set.looped, Looped::Seamless);
        assert_eq!(set.length, 96_000);
        assert!((set.record_s - n as f64 / rate_hz).abs() < 1.0 / 48_000.0);
        let (_, out) = decode(&set.output);
        let (_, inp) = decode(&set.input);
        let (_, err) = decode(&set.error);
        assert_eq!(out.len(), 96_000);
        let fade = (LISTEN_FADE_S * 48_000.0) as usize;
        let mut worst = 0.0f64;
        for (m, v) in out.iter().enumerate().take(out.len() - fade).skip(fade) {
            let want = 0.8 * (2.0 * PI * f_hz * (m as f64 / 48_000.0 - delay_s)).sin();
            worst = worst.max((v * set.full_scale_v - want).abs());
        }
        // The resampler's own accuracy (about -100 dB of its kernel), not a seam of any size.
        assert!(worst < 1e-4, "largest departure from the sine {worst} V");
        // The input file is shifted by the delay: scaled by the gain, it is the output; the error is silent.
        let mismatch = inp
            .iter()
            .zip(&out)
            .fold(0.0f64, |m, (i, o)| m.max((0.8 * i - o).abs()));
        assert!(mismatch < 1e-4, "{mismatch}");
        assert!(err.iter().all(|e| e.abs() < 1e-4));
        assert!(set.error_rms_v < 1e-5);
        // Faded: silent at both ends, half way up half way through the fade.
        assert!(out[0].abs() < 1e-3 && out[out.len() - 1].abs() < 1e-3);
        let m = fade / 2;
        let half = 0.8 * (2.0 * PI * f_hz * (m as f64 / 48_000.0 - delay_s)).sin();
        assert!((out[m] * set.full_scale_v - 0.5 * half).abs() < 0.02 * 0.8);
    }

    #[test]
    fn a_short_record_that_is_not_periodic_is_repeated_with_crossfades() {
        let rate_hz = 96_000.0;
        let n = 9_600; // 0.1 s of a 1234.5 Hz sine: not a whole number of cycles
        let input: &'static [f64] = Vec::leak(sine(n, rate_hz, 1234.5, 1.0, 0.3));
        let set = listening_files(
            &records(input, input, rate_hz, false),
            &WavOptions::default(),
        )
        .unwrap();
        assert_eq!(set.looped, Looped::Crossfaded);
        assert_eq!(set.length, 96_000);
        let (_, out) = decode(&set.output);
        assert_eq!(out.len(), 96_000);
        assert!(out[0].abs() < 1e-3 && out[out.len() - 1].abs() < 1e-3);
        // No click at the joins: no step between samples larger than the sine's own largest step
        // (2 pi f A / rate, in full-scale units) plus what the 10 ms crossfade adds (pi / (2 x 480) x 2A).
        let a = 1.0 / set.full_scale_v;
        let own = 2.0 * PI * 1234.5 * a / 48_000.0;
        let crossfade = PI / 960.0 * 2.0 * a;
        let largest = out
            .windows(2)
            .fold(0.0f64, |m, w| m.max((w[1] - w[0]).abs()));
        assert!(
            largest < own + crossfade,
            "{largest} vs {own} + {crossfade}"
        );
        // The error is that of the records once: silent for identical records.
        assert_eq!(set.error_rms_v, 0.0);
        // Records already long enough are neither looped nor cut.
        let long: &'static [f64] = Vec::leak(sine(3 * 96_000, rate_hz, 1234.5, 1.0, 0.3));
        let set =
            listening_files(&records(long, long, rate_hz, false), &WavOptions::default()).unwrap();
        assert_eq!(set.looped, Looped::No);
        assert_eq!(set.length, 3 * 48_000 - 2 * 64);
    }

    #[test]
    fn a_full_scale_floor_gives_two_runs_of_one_chain_one_mapping_and_never_clips() {
        // Two outputs of one chain, one with more noise: their peaks round to different tidy full scales
        // (1.2 V and 1.5 V), the converter's floor maps both alike.
        let rate_hz = 48_000.0;
        let input: &'static [f64] = Vec::leak(sine(48_000, rate_hz, 441.0, 1.0, 0.0));
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let noisy: &'static [f64] = Vec::leak(
            input
                .iter()
                .map(|x| x + 0.3 * (rng.random::<f64>() - 0.5))
                .collect(),
        );
        let plain = listening_files(
            &records(input, input, rate_hz, false),
            &WavOptions::default(),
        )
        .unwrap();
        let louder = listening_files(
            &records(input, noisy, rate_hz, false),
            &WavOptions::default(),
        )
        .unwrap();
        assert_ne!(plain.full_scale_v, louder.full_scale_v);
        let floor = |r: ListeningRecords<'static>| ListeningRecords {
            full_scale_floor_v: 1.25,
            ..r
        };
        let a = listening_files(
            &floor(records(input, input, rate_hz, false)),
            &WavOptions::default(),
        )
        .unwrap();
        let b = listening_files(
            &floor(records(input, noisy, rate_hz, false)),
            &WavOptions::default(),
        )
        .unwrap();
        assert_eq!((a.full_scale_v, b.full_scale_v), (1.5, 1.5));
        assert_eq!(a.input, b.input);
        // A signal above the floor still sets the mapping: nothing clips.
        let low_floor = ListeningRecords {
            full_scale_floor_v: 0.1,
            ..records(input, noisy, rate_hz, false)
        };
        let c = listening_files(&low_floor, &WavOptions::default()).unwrap();
        assert_eq!(c.full_scale_v, louder.full_scale_v);
        let (_, out) = decode(&c.output);
        assert!(out.iter().all(|v| v.abs() < 1.0 / 1.05 + 1e-6));
    }

    #[test]
    fn tidy_full_scales_round_up() {
        assert_eq!(tidy_up(1.0), 1.0);
        assert_eq!(tidy_up(1.01), 1.2);
        assert_eq!(tidy_up(0.0031), 0.004);
        assert_eq!(tidy_up(8.5), 10.0);
        assert!((tidy_up(2.6e-5) - 3e-5).abs() < 1e-18);
    }

    /// Ideal N-bit floor quantizer over +-1 V: q = 2 / 2^N.
    fn floor_quantize(x: f64, q: f64) -> f64 {
        ((x / q).floor() * q).clamp(-1.0, 1.0 - q)
    }

    #[test]
    fn sampled_quantization_error_file_has_bennett_rms() {
        // A slow sine quantized at 48 kHz, compared on its own 48 kHz grid (no hold): the error file holds
        // exactly the sampled quantization error (equal rates: no filtering), mean removed.
        let fs = 48_000.0;
        for bits in [4, 8] {
            let q = 2.0 / 2f64.powi(bits);
            let input = sine(24_000, fs, 997.0, 0.9, 0.0);
            let output: Vec<f64> = input.iter().map(|&x| floor_quantize(x, q)).collect();
            let set =
                listening_set(&input, &output, fs, 0.0, 1.0, 0.0, &WavOptions::default()).unwrap();
            let (_, e) = decode(&set.error);
            let e_rms_v = rms(&e) * set.full_scale_v / set.error_gain_used;
            let bennett_v = q / 12f64.sqrt();
            // Ideal quantization noise q/sqrt(12): W. R. Bennett, "Spectra of quantized signals", BSTJ 1948.
            assert!(
                (e_rms_v / bennett_v - 1.0).abs() < 0.10,
                "N={bits}: error rms {e_rms_v} V vs q/sqrt(12) = {bennett_v} V"
            );
        }
    }

    #[test]
    fn held_quantization_error_file_matches_bennett_through_the_zoh_response() {
        // The quantizer samples a slow sine at 48 kHz; its output is a zero-order hold drawn on a grid 16x
        // finer. Passing the input and the held output with delay T/2 (the ZOH delay) gives the error as
        // heard. The sampled error has Bennett's power q^2/12 (W. R. Bennett, BSTJ 1948), but the hold
        // shapes its spectrum by |sinc(f/fs)|^2 (ZOH response, e.g. Oppenheim and Schafer, "Discrete-Time
        // Signal Processing", section 4.8), and the 48 kHz file keeps only the band below ~0.475 fs (the
        // resampler's cut-off), so the file's expected rms is q/sqrt(12) x g with g^2 the share of the
        // sampled error's power that passes |sinc|^2 in band. For white error g^2 = 0.75 (the file sits
        // 12 % under q/sqrt(12)); at 4 bits and a slow sine the error is not white, so g is taken from the
        // sampled error's own spectrum.
        use rustfft::{FftPlanner, num_complex::Complex};
        let fs = 48_000.0;
        let os = 16usize;
        let n = 8_000usize;
        let fine_rate = fs * os as f64;
        let amp = 0.9;
        for bits in [4, 8] {
            for f_hz in [97.0, 997.0] {
                let q = 2.0 / 2f64.powi(bits);
                let input = sine(n * os, fine_rate, f_hz, amp, 0.0);
                let samples: Vec<f64> = (0..n)
                    .map(|k| amp * (2.0 * PI * f_hz * k as f64 / fs).sin())
                    .collect();
                let codes: Vec<f64> = samples.iter().map(|&x| floor_quantize(x, q)).collect();
                let mut held = vec![0.0; n * os];
                for k in 0..n {
                    held[k * os..(k + 1) * os].fill(codes[k]);
                    // The fine sample on a hold boundary takes the mean of the two held values (where a
                    // band-limited step passes), so the fine-grid hold has exactly the ZOH's delay T/2.
                    if k > 0 {
                        held[k * os] = 0.5 * (codes[k - 1] + codes[k]);
                    }
                }
                let set = listening_set(
                    &input,
                    &held,
                    fine_rate,
                    0.5 / fs,
                    1.0,
                    0.0,
                    &WavOptions::default(),
                )
                .unwrap();
                let (_, e) = decode(&set.error);
                let e_rms_v = rms(&e) * set.full_scale_v / set.error_gain_used;

                // g^2 from the sampled error's spectrum (mean removed).
                let err: Vec<f64> = codes.iter().zip(&samples).map(|(c, x)| c - x).collect();
                let m = mean(&err);
                let mut buf: Vec<Complex<f64>> =
                    err.iter().map(|v| Complex::new(v - m, 0.0)).collect();
                FftPlanner::new().plan_fft_forward(n).process(&mut buf);
                let (mut total, mut passed) = (0.0, 0.0);
                for (k, c) in buf.iter().enumerate() {
                    let f = k.min(n - k) as f64 / n as f64; // |frequency| / fs
                    let p = c.norm_sqr();
                    total += p;
                    if f < 0.475 {
                        passed += p * sinc(f).powi(2);
                    }
                }
                let g = (passed / total).sqrt();
                let expected_v = q / 12f64.sqrt() * g;
                let ratio = e_rms_v / expected_v;
                assert!(
                    (ratio - 1.0).abs() < 0.10,
                    "N={bits}, {f_hz} Hz: error file rms {e_rms_v} V, expected {expected_v} V (g = {g})"
                );
                // Tighter, and independent of how well Bennett's model fits a 4-bit quantizer: the file
                // carries the sampled error's own in-band, hold-shaped power (measured 0.4 % to 1.5 % off).
                let sampled_std_v = (rms(&err).powi(2) - m * m).sqrt();
                let shaped_v = sampled_std_v * g;
                assert!(
                    (e_rms_v / shaped_v - 1.0).abs() < 0.03,
                    "N={bits}, {f_hz} Hz: error file rms {e_rms_v} V, hold-shaped sampled error {shaped_v} V"
                );
            }
        }
    }

    /// Ideal mid-tread rounding quantizer with step q (no range limit).
    fn round_quantize(x: f64, q: f64) -> f64 {
        (x / q).round() * q
    }

    /// Error power (V^2) of `output` against `input` as carried by error.wav (equal rates, no delay),
    /// decoded from the file.
    fn error_file_power(input: &[f64], output: &[f64], fs: f64) -> f64 {
        let opts = WavOptions {
            format: WavFormat::Float32,
            ..WavOptions::default()
        };
        let set = listening_set(input, output, fs, 0.0, 1.0, 0.0, &opts).unwrap();
        let (_, e) = decode(&set.error);
        (rms(&e) * set.full_scale_v / set.error_gain_used).powi(2)
    }

    /// Test signals of very different levels, in LSB units (q = 1 mV), 1 s at 48 kHz.
    fn dither_test_signals(q: f64, fs: f64) -> Vec<(&'static str, Vec<f64>)> {
        let n = 48_000;
        let two_tone: Vec<f64> = sine(n, fs, 300.0, 50.0 * q, 0.0)
            .iter()
            .zip(sine(n, fs, 5000.0, 0.4 * q, 1.0))
            .map(|(a, b)| a + b)
            .collect();
        vec![
            ("0.3 LSB sine", sine(n, fs, 441.0, 0.3 * q, 0.2)),
            ("3.7 LSB sine", sine(n, fs, 997.0, 3.7 * q, 0.0)),
            ("200.3 LSB sine", sine(n, fs, 1499.0, 200.3 * q, 0.5)),
            ("two tones", two_tone),
        ]
    }

    #[test]
    fn tpdf_dither_makes_error_power_three_times_bennett_for_any_signal_and_undithered_does_not() {
        let fs = 48_000.0;
        let q = 1e-3;
        let mut rng = ChaCha8Rng::seed_from_u64(1992);
        let mut undithered = Vec::new();
        for (name, x) in dither_test_signals(q, fs) {
            // TPDF dither, 2 LSB peak to peak: the sum of two independent uniform variables of 1 LSB each.
            let y: Vec<f64> = x
                .iter()
                .map(|&v| {
                    let d = (rng.random::<f64>() + rng.random::<f64>() - 1.0) * q;
                    round_quantize(v + d, q)
                })
                .collect();
            let p = error_file_power(&x, &y, fs);
            // Total error power with 2 LSB p-p TPDF dither is q^2/12 (quantization) + q^2/6 (dither)
            // = 3 q^2/12 (+4.77 dB) whatever the signal: S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy,
            // "Quantization and dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 1992 (from memory
            // for the exact figures). Tolerance: the estimate over 47 872 samples has ~0.7 % spread.
            let ratio = p / (3.0 * q * q / 12.0);
            assert!(
                (ratio - 1.0).abs() < 0.04,
                "TPDF, {name}: power {ratio} x 3q^2/12"
            );

            let y0: Vec<f64> = x.iter().map(|&v| round_quantize(v, q)).collect();
            undithered.push((name, error_file_power(&x, &y0, fs), x));
        }
        // Without dither a signal below 1/2 LSB quantizes to zero: the error is the signal itself
        // (same source, and plain arithmetic).
        let (_, p_small, x_small) = &undithered[0];
        let signal_power = x_small.iter().map(|v| v * v).sum::<f64>() / x_small.len() as f64;
        assert!((p_small / signal_power - 1.0).abs() < 0.01);
        // ... while a large sine gives about Bennett's q^2/12 (W. R. Bennett, BSTJ 1948): the undithered
        // error power follows the signal.
        let (_, p_large, _) = &undithered[2];
        assert!((p_large / (q * q / 12.0) - 1.0).abs() < 0.05, "{p_large}");
        let powers: Vec<f64> = undithered.iter().map(|u| u.1).collect();
        let spread = powers.iter().cloned().fold(0.0, f64::max)
            / powers.iter().cloned().fold(f64::MAX, f64::min);
        assert!(spread > 1.5, "undithered powers {powers:?}");
    }

    #[test]
    fn rpdf_dither_makes_the_error_mean_independent_of_the_signal_but_not_its_power() {
        // Lipshitz, Wannamaker and Vanderkooy, "Quantization and dither: a theoretical survey", J. Audio
        // Eng. Soc. 40(5), 1992 (from memory for the exact figures): with RPDF dither of 1 LSB p-p the
        // error's conditional mean is zero for every input value, but its conditional power is
        // |x'| (q - |x'|) (x' = distance to the nearest level; from 0 on a level to q^2/4 midway), so the
        // noise is modulated by the signal; TPDF of 2 LSB p-p also fixes the power at q^2/4.
        let q = 1.0;
        let n = 200_000;
        let mut rng = ChaCha8Rng::seed_from_u64(40);
        for x in [0.0, 0.1, 0.25, 0.5, 0.73, 3.4] {
            let (mut s1, mut s2, mut t1, mut t2) = (0.0, 0.0, 0.0, 0.0);
            for _ in 0..n {
                let d = (rng.random::<f64>() - 0.5) * q;
                let e = round_quantize(x + d, q) - x;
                s1 += e;
                s2 += e * e;
                let dt = (rng.random::<f64>() + rng.random::<f64>() - 1.0) * q;
                let et = round_quantize(x + dt, q) - x;
                t1 += et;
                t2 += et * et;
            }
            let (mean_r, pow_r) = (s1 / n as f64, s2 / n as f64);
            let (mean_t, pow_t) = (t1 / n as f64, t2 / n as f64);
            // Standard error of a mean of n draws with power <= q^2/4: 0.5 q / sqrt(n) ~ 0.0011 q.
            assert!(mean_r.abs() < 0.006 * q, "RPDF mean at x = {x}: {mean_r}");
            assert!(mean_t.abs() < 0.006 * q, "TPDF mean at x = {x}: {mean_t}");
            let xf = x - x.round();
            let rpdf_power = xf.abs() * (q - xf.abs());
            assert!(
                (pow_r - rpdf_power).abs() < 0.01 * q * q,
                "RPDF power at x = {x}: {pow_r}"
            );
            assert!(
                (pow_t / (q * q / 4.0) - 1.0).abs() < 0.02,
                "TPDF power at x = {x}: {pow_t}"
            );
            // Undithered, the error is the fixed offset to the nearest level: its mean follows the signal.
            let e0 = round_quantize(x, q) - x;
            assert!((e0 + xf).abs() < 1e-12);
        }

        // The same through error.wav: RPDF error power depends on the signal (a sine of 0.1 LSB around a
        // level barely moves the quantizer, a large sine averages to q^2/6, i.e. +3 dB over q^2/12).
        let fs = 48_000.0;
        let qv = 1e-3;
        let mut powers = Vec::new();
        for (amp_lsb, f_hz) in [(0.1, 441.0), (200.3, 1499.0)] {
            let x = sine(48_000, fs, f_hz, amp_lsb * qv, 0.3);
            let y: Vec<f64> = x
                .iter()
                .map(|&v| round_quantize(v + (rng.random::<f64>() - 0.5) * qv, qv))
                .collect();
            powers.push(error_file_power(&x, &y, fs) / (qv * qv / 6.0));
        }
        assert!(
            (powers[1] - 1.0).abs() < 0.04,
            "large sine, RPDF: {} x q^2/6",
            powers[1]
        );
        assert!(powers[0] < 0.5, "0.1 LSB sine, RPDF: {} x q^2/6", powers[0]);
    }
}
