//! Demo audio generated in code (no recorded audio is ever shipped): a major chord and a voice-like
//! formant sweep, both peaking at -6 dBFS (0.5 of digital full scale), and a WAV writer for them.
//!
//! Samples are in digital full-scale units: +-1.0 is full scale.

use std::f64::consts::PI;
use std::io::BufWriter;
use std::path::Path;

use crate::Error;

/// Peak of the demo signals in full-scale units: 0.5 = -6.02 dBFS.
pub const DEMO_PEAK_FS: f64 = 0.5;

/// A major chord (A3 220 Hz, C#4 and E4 in equal temperament: three sines with a slow attack/decay
/// envelope), `seconds` long at `rate_hz`, peak -6 dBFS. Empty if `seconds` is not positive or the rate is 0.
pub fn chord(rate_hz: u32, seconds: f64) -> Vec<f64> {
    let n = sample_count(rate_hz, seconds);
    if n == 0 {
        return Vec::new();
    }
    let fs = f64::from(rate_hz);
    let root_hz = 220.0;
    // Root, major third (4 semitones) and fifth (7 semitones); slightly different levels and phases.
    let notes = [
        (root_hz, 1.0, 0.0),
        (root_hz * 2f64.powf(4.0 / 12.0), 0.8, 1.1),
        (root_hz * 2f64.powf(7.0 / 12.0), 0.7, 2.3),
    ];
    let attack_s = (0.35f64).min(seconds / 4.0);
    let release_s = (0.8f64).min(seconds / 3.0);
    let mut x: Vec<f64> = (0..n)
        .map(|i| {
            let t = i as f64 / fs;
            let tone: f64 = notes
                .iter()
                .map(|&(f, a, p)| a * (2.0 * PI * f * t + p).sin())
                .sum();
            // Slow exponential decay under a raised-cosine attack and release.
            let decay = (-0.7 * t / seconds).exp();
            tone * decay * fade(t, seconds, attack_s, release_s)
        })
        .collect();
    normalise_peak(&mut x, DEMO_PEAK_FS);
    x
}

/// A voice-like sound, `seconds` long at `rate_hz`, peak -6 dBFS: a glottal-pulse-like source (a
/// band-limited sawtooth at ~120 Hz with 1 % vibrato at 5.5 Hz, built from its harmonics below 0.45 of the
/// rate) through three parallel formant resonators (two-pole band-pass sections with zeros at DC and
/// Nyquist) whose centre frequencies glide smoothly /a/ -> /i/ -> /u/ -> /a/. Formant positions are rough
/// adult-male averages (from memory: G. E. Peterson and H. L. Barney, JASA 1952), kept below 0.45 of the rate.
/// Empty if `seconds` is not positive or the rate is 0.
pub fn formant_sweep(rate_hz: u32, seconds: f64) -> Vec<f64> {
    let n = sample_count(rate_hz, seconds);
    if n == 0 {
        return Vec::new();
    }
    let fs = f64::from(rate_hz);
    let f0_hz = 120.0;
    let vibrato_depth = 0.01;
    let vibrato_hz = 5.5;
    let harmonics = ((0.45 * fs / (f0_hz * (1.0 + vibrato_depth))).floor() as usize).max(1);
    // Vowel formants F1, F2, F3 (Hz).
    const VOWELS: [[f64; 3]; 4] = [
        [730.0, 1090.0, 2440.0], // a
        [270.0, 2290.0, 3010.0], // i
        [300.0, 870.0, 2240.0],  // u
        [730.0, 1090.0, 2440.0], // a
    ];
    const BANDWIDTHS_HZ: [f64; 3] = [80.0, 90.0, 120.0];
    const LEVELS: [f64; 3] = [1.0, 1.0, 0.8];
    let mut state = [[0.0f64; 2]; 3]; // y[n-1], y[n-2] per resonator
    let (mut x1, mut x2) = (0.0f64, 0.0f64); // source x[n-1], x[n-2]
    let mut phase = 0.0f64;
    let segments = (VOWELS.len() - 1) as f64;
    let edge_s = (0.04f64).min(seconds / 4.0);
    let mut out = Vec::with_capacity(n);
    for i in 0..n {
        let t = i as f64 / fs;
        // Band-limited sawtooth: sum of sin(k phase) / k, sin(k phase) by the Chebyshev recurrence.
        let (s1, c1) = phase.sin_cos();
        let (mut s_prev, mut s_k) = (0.0, s1);
        let mut source = 0.0;
        for k in 1..=harmonics {
            source += s_k / k as f64;
            let s_next = 2.0 * c1 * s_k - s_prev;
            s_prev = s_k;
            s_k = s_next;
        }
        let f0 = f0_hz * (1.0 + vibrato_depth * (2.0 * PI * vibrato_hz * t).sin());
        phase = (phase + 2.0 * PI * f0 / fs) % (2.0 * PI);

        // Formant positions: smooth glide between successive vowels.
        let pos = (t / seconds * segments).min(segments - 1e-12);
        let seg = pos.floor() as usize;
        let s = 0.5 - 0.5 * (PI * (pos - seg as f64)).cos();
        let mut y = 0.0;
        for (j, st) in state.iter_mut().enumerate() {
            let f = ((1.0 - s) * VOWELS[seg][j] + s * VOWELS[seg + 1][j]).min(0.45 * fs);
            let r = (-PI * BANDWIDTHS_HZ[j] / fs).exp();
            let a1 = 2.0 * r * (2.0 * PI * f / fs).cos();
            let a2 = -r * r;
            let g = 0.5 * (1.0 - r * r);
            let v = g * (source - x2) + a1 * st[0] + a2 * st[1];
            st[1] = st[0];
            st[0] = v;
            y += LEVELS[j] * v;
        }
        x2 = x1;
        x1 = source;
        out.push(y * fade(t, seconds, edge_s, edge_s));
    }
    normalise_peak(&mut out, DEMO_PEAK_FS);
    out
}

/// Write `samples` (full-scale units, clamped to +-1.0) as a WAV file: `bits` 16 or 24 with `float` false,
/// or 32 with `float` true; `channels` 1 or 2. In a stereo file channel 0 carries `samples` and channel 1
/// carries them inverted in polarity, so a reader that takes the wrong channel is caught. Integer
/// full scale is 2^(bits-1), clamped to 2^(bits-1) - 1.
pub fn write_file(
    path: &Path,
    samples: &[f64],
    rate_hz: u32,
    bits: u16,
    float: bool,
    channels: u16,
) -> Result<(), Error> {
    let format_ok = if float {
        bits == 32
    } else {
        bits == 16 || bits == 24
    };
    if !format_ok {
        return Err(Error::BadInput(format!(
            "WAV format not supported: {bits}-bit {} (use 16- or 24-bit integer or 32-bit float)",
            if float { "float" } else { "integer" }
        )));
    }
    if !(channels == 1 || channels == 2) {
        return Err(Error::BadInput(format!(
            "WAV files are written mono or stereo, not with {channels} channels"
        )));
    }
    if rate_hz == 0 {
        return Err(Error::BadInput("WAV sample rate must be above 0 Hz".into()));
    }
    if let Some(i) = samples.iter().position(|v| !v.is_finite()) {
        return Err(Error::Run(format!(
            "cannot write {}: sample {i} is not a finite number",
            path.display()
        )));
    }
    let spec = hound::WavSpec {
        channels,
        sample_rate: rate_hz,
        bits_per_sample: bits,
        sample_format: if float {
            hound::SampleFormat::Float
        } else {
            hound::SampleFormat::Int
        },
    };
    let write_err = |e: hound::Error| match e {
        hound::Error::IoError(source) => Error::Write {
            path: path.to_path_buf(),
            source,
        },
        other => Error::Run(format!("cannot write {}: {other}", path.display())),
    };
    let file = crate::report::outdir::create_new_file(path)?;
    let mut writer = hound::WavWriter::new(BufWriter::new(file), spec).map_err(write_err)?;
    let full = 2f64.powi(i32::from(bits) - 1);
    for &v in samples {
        let s = v.clamp(-1.0, 1.0);
        for c in 0..channels {
            let s = if c == 0 { s } else { -s };
            if float {
                writer.write_sample(s as f32).map_err(write_err)?;
            } else {
                let i = (s * full).round().clamp(-full, full - 1.0) as i32;
                writer.write_sample(i).map_err(write_err)?;
            }
        }
    }
    writer.finalize().map_err(write_err)?;
    // A mono file of the extensible format: the front-centre channel mask (see `wav::MONO_CHANNEL_MASK`).
    if channels == 1 {
        use std::io::{Read, Seek, SeekFrom, Write};
        use std::os::unix::fs::OpenOptionsExt;
        let io = |source| Error::Write {
            path: path.to_path_buf(),
            source,
        };
        let mut f = std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .custom_flags(libc::O_NOFOLLOW)
            .open(path)
            .map_err(io)?;
        let mut head = [0u8; 44];
        if f.read_exact(&mut head).is_ok()
            && let Some(i) = crate::report::wav::mono_channel_mask_offset(&head)
        {
            f.seek(SeekFrom::Start(i as u64)).map_err(io)?;
            f.write_all(&crate::report::wav::MONO_CHANNEL_MASK.to_le_bytes())
                .map_err(io)?;
        }
    }
    Ok(())
}

fn sample_count(rate_hz: u32, seconds: f64) -> usize {
    if seconds.is_finite() && seconds > 0.0 {
        (seconds * f64::from(rate_hz)).round() as usize
    } else {
        0
    }
}

/// Raised-cosine fade in over `attack_s` and out over `release_s` at the ends of a `total_s` signal.
fn fade(t: f64, total_s: f64, attack_s: f64, release_s: f64) -> f64 {
    let ramp = |u: f64| 0.5 - 0.5 * (PI * u.clamp(0.0, 1.0)).cos();
    let a = if attack_s > 0.0 {
        ramp(t / attack_s)
    } else {
        1.0
    };
    let r = if release_s > 0.0 {
        ramp((total_s - t) / release_s)
    } else {
        1.0
    };
    a * r
}

fn normalise_peak(x: &mut [f64], target: f64) {
    let p = x.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    if p > 0.0 {
        let g = target / p;
        for v in x {
            *v *= g;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rustfft::{FftPlanner, num_complex::Complex};

    fn peak_dbfs(x: &[f64]) -> f64 {
        20.0 * x.iter().fold(0.0f64, |m, v| m.max(v.abs())).log10()
    }

    /// Power spectrum (|X_k|^2, k = 0..n/2) of a Hann-windowed slice.
    fn power_spectrum(x: &[f64]) -> Vec<f64> {
        let n = x.len();
        let mut buf: Vec<Complex<f64>> = x
            .iter()
            .enumerate()
            .map(|(i, v)| {
                let w = 0.5 - 0.5 * (2.0 * PI * i as f64 / n as f64).cos();
                Complex::new(v * w, 0.0)
            })
            .collect();
        FftPlanner::new().plan_fft_forward(n).process(&mut buf);
        buf[..=n / 2].iter().map(|c| c.norm_sqr()).collect()
    }

    fn band_power(spec: &[f64], bin_hz: f64, lo_hz: f64, hi_hz: f64) -> f64 {
        spec.iter()
            .enumerate()
            .filter(|(k, _)| (lo_hz..hi_hz).contains(&(*k as f64 * bin_hz)))
            .map(|(_, p)| p)
            .sum()
    }

    #[test]
    fn chord_has_the_right_length_peak_and_notes() {
        let x = chord(48_000, 2.0);
        assert_eq!(x.len(), 96_000);
        // -6 dBFS target: a demo level that leaves headroom, common practice, no source.
        assert!((peak_dbfs(&x) + 6.02).abs() < 0.05, "{}", peak_dbfs(&x));
        // Slow attack and release: silent at the ends.
        assert!(x[0].abs() < 1e-3 && x[x.len() - 1].abs() < 1e-3);
        // Spectrum: A3, C#4 and E4 (equal temperament, A4 = 440 Hz) stand out; B3 (246.9 Hz) does not.
        let seg = &x[24_000..24_000 + 32_768];
        let spec = power_spectrum(seg);
        let bin_hz = 48_000.0 / 32_768.0;
        let total = band_power(&spec, bin_hz, 0.0, 24_000.0);
        for f in [220.0, 277.18, 329.63] {
            let p = band_power(&spec, bin_hz, f - 4.0, f + 4.0);
            assert!(p > 0.15 * total, "{f} Hz holds {} of the power", p / total);
        }
        assert!(band_power(&spec, bin_hz, 242.0, 252.0) < 1e-4 * total);
        assert!(chord(48_000, 0.0).is_empty());
    }

    #[test]
    fn formant_sweep_is_band_limited_voiced_at_120_hz_and_glides_between_vowels() {
        let fs = 16_000.0;
        let seconds = 3.0;
        let x = formant_sweep(16_000, seconds);
        assert_eq!(x.len(), 48_000);
        assert!((peak_dbfs(&x) + 6.02).abs() < 0.05, "{}", peak_dbfs(&x));
        let n = 4096;
        let bin_hz = fs / n as f64;
        // /i/ at one third (F2 ~ 2.3 kHz), /u/ at two thirds (F2 ~ 0.87 kHz).
        let at = |t: f64| {
            let c = (t * fs) as usize - n / 2;
            power_spectrum(&x[c..c + n])
        };
        let (spec_i, spec_u) = (at(seconds / 3.0), at(2.0 * seconds / 3.0));
        let spec_a = at(0.15);
        let share = |s: &[f64], lo: f64, hi: f64| {
            band_power(s, bin_hz, lo, hi) / band_power(s, bin_hz, 0.0, 8000.0)
        };
        // F1: /a/ ~730 Hz, /i/ ~270 Hz.
        assert!(
            share(&spec_a, 600.0, 850.0) > 10.0 * share(&spec_i, 600.0, 850.0),
            "F1 band: /a/ {} vs /i/ {}",
            share(&spec_a, 600.0, 850.0),
            share(&spec_i, 600.0, 850.0)
        );
        // F2: /u/ ~870 Hz, /i/ ~2290 Hz.
        assert!(
            share(&spec_u, 800.0, 1000.0) > 10.0 * share(&spec_i, 800.0, 1000.0),
            "F2 band: /u/ {} vs /i/ {}",
            share(&spec_u, 800.0, 1000.0),
            share(&spec_i, 800.0, 1000.0)
        );
        assert!(share(&spec_i, 2150.0, 2450.0) > 3.0 * share(&spec_i, 1200.0, 2000.0));
        // Voiced at ~120 Hz: most of the power below 1.2 kHz sits on its harmonics.
        for spec in [&spec_i, &spec_u] {
            let on_harmonics: f64 = (1..10)
                .map(|k| {
                    band_power(
                        spec,
                        bin_hz,
                        120.0 * k as f64 - 12.0,
                        120.0 * k as f64 + 12.0,
                    )
                })
                .sum();
            assert!(on_harmonics > 0.9 * band_power(spec, bin_hz, 0.0, 1150.0));
        }
        // Band-limited source: nothing near Nyquist (harmonics stop below 0.45 fs).
        let whole = power_spectrum(&x[..32_768]);
        let wb = fs / 32_768.0;
        assert!(
            band_power(&whole, wb, 0.47 * fs, 0.5 * fs)
                < 1e-8 * band_power(&whole, wb, 0.0, 0.5 * fs)
        );
    }

    #[test]
    fn mono_files_of_24_and_32_bits_carry_the_front_centre_channel_mask() {
        // 0x4 = SPEAKER_FRONT_CENTER (Microsoft's WAVEFORMATEXTENSIBLE documentation; from memory); stereo keeps
        // front left and right (0x3).
        let d = tempfile::tempdir().unwrap();
        for (bits, float, channels, mask) in
            [(24, false, 1, 4u32), (32, true, 1, 4), (24, false, 2, 3)]
        {
            let path = d.path().join(format!("m_{bits}_{channels}.wav"));
            write_file(&path, &[0.0, 0.25, -0.25], 48_000, bits, float, channels).unwrap();
            let b = std::fs::read(&path).unwrap();
            assert_eq!(
                u32::from_le_bytes([b[40], b[41], b[42], b[43]]),
                mask,
                "{bits} bits, {channels} ch"
            );
            assert!(hound::WavReader::open(&path).is_ok());
        }
    }

    #[test]
    fn written_files_read_back_with_the_right_format_channels_and_values() {
        let dir = tempfile::tempdir().unwrap();
        let x = chord(44_100, 0.25);
        for (bits, float, channels) in [
            (16, false, 1),
            (24, false, 2),
            (32, true, 2),
            (16, false, 2),
        ] {
            let path = dir
                .path()
                .join(format!("demo_{bits}_{float}_{channels}.wav"));
            write_file(&path, &x, 44_100, bits, float, channels).unwrap();
            let mut reader = hound::WavReader::open(&path).unwrap();
            let spec = reader.spec();
            assert_eq!(spec.sample_rate, 44_100);
            assert_eq!(spec.bits_per_sample, bits);
            assert_eq!(spec.channels, channels);
            assert_eq!(
                spec.sample_format,
                if float {
                    hound::SampleFormat::Float
                } else {
                    hound::SampleFormat::Int
                }
            );
            assert_eq!(reader.duration() as usize, x.len());
            let values: Vec<f64> = if float {
                reader
                    .samples::<f32>()
                    .map(|s| f64::from(s.unwrap()))
                    .collect()
            } else {
                let full = 2f64.powi(i32::from(bits) - 1);
                reader
                    .samples::<i32>()
                    .map(|s| f64::from(s.unwrap()) / full)
                    .collect()
            };
            assert_eq!(values.len(), x.len() * channels as usize);
            let lsb = if float {
                1e-7
            } else {
                2f64.powi(1 - i32::from(bits))
            };
            for (i, frame) in values.chunks(channels as usize).enumerate() {
                assert!((frame[0] - x[i]).abs() <= lsb);
                if channels == 2 {
                    assert!(
                        (frame[1] + x[i]).abs() <= lsb,
                        "channel 1 is the inverted signal"
                    );
                }
            }
        }
    }

    #[test]
    fn write_file_refuses_unsupported_formats_and_reports_unwritable_paths() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("x.wav");
        assert!(write_file(&p, &[0.0], 48_000, 20, false, 1).is_err());
        assert!(write_file(&p, &[0.0], 48_000, 24, true, 1).is_err());
        assert!(write_file(&p, &[0.0], 48_000, 16, false, 3).is_err());
        assert!(write_file(&p, &[f64::NAN], 48_000, 16, false, 1).is_err());
        let missing = dir.path().join("no_such_dir").join("x.wav");
        assert!(matches!(
            write_file(&missing, &[0.0], 48_000, 16, false, 1),
            Err(Error::Write { .. })
        ));
    }
}
