//! The delay of one recording behind another: FFT cross-correlation (or the generalised cross-correlation with
//! phase transform, GCC-PHAT: C. H. Knapp and G. C. Carter, "The generalized correlation method for
//! estimation of time delay", IEEE Trans. ASSP 24(4), 1976), refined between samples by maximising the
//! band-limited interpolation of the correlation (its Fourier series evaluated at fractional lags); over a
//! long recording, the delay in windows and a straight line through them (the drift between two clocks).
//!
//! Conventions: the capture `y` is the reference `x` delayed by `d` samples, `y[n] ~ g x[n - d]`; a positive
//! delay means the capture lags. The confidence is the normalised correlation `sum x[n] y[n + d] /
//! sqrt(sum x^2 sum y^2)` (means removed) at the delay found, in magnitude (0..1): a capture of inverted
//! polarity correlates as well as an upright one, with a negative gain.

use std::f64::consts::PI;

use num_complex::Complex;

use crate::error::{Error, Result};
use crate::measure::spectrum::{plan_forward, plan_inverse};

/// How the correlation is weighted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// Plain cross-correlation: best for white signals in white noise.
    Plain,
    /// Phase transform: every frequency weighted alike, so a coloured signal's broad correlation peak
    /// becomes a sharp one per path (direct sound and echoes apart).
    Phat,
}

impl Method {
    /// The name the command line and delay.json use.
    pub fn name(self) -> &'static str {
        match self {
            Method::Plain => "plain",
            Method::Phat => "phat",
        }
    }
}

/// One delay estimate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Estimate {
    /// Delay of the capture behind the reference (samples).
    pub delay_samples: f64,
    /// Normalised correlation at that delay (0..1).
    pub confidence: f64,
    /// Least-squares gain of the capture against the aligned reference (V/V); negative for a capture of
    /// inverted polarity.
    pub gain: f64,
}

/// Delay of `y` behind `x`. Both need at least 16 samples and must move.
pub fn estimate(x: &[f64], y: &[f64], method: Method) -> Result<Estimate> {
    if x.len() < 16 || y.len() < 16 {
        return Err(Error::BadInput(format!(
            "a delay needs at least 16 samples in each record (got {} and {})",
            x.len(),
            y.len()
        )));
    }
    let n = x.len().max(y.len());
    let nfft = (2 * n).next_power_of_two();
    let mx = x.iter().sum::<f64>() / x.len() as f64;
    let my = y.iter().sum::<f64>() / y.len() as f64;
    let ex: f64 = x.iter().map(|v| (v - mx) * (v - mx)).sum();
    let ey: f64 = y.iter().map(|v| (v - my) * (v - my)).sum();
    if !(ex > 0.0 && ey > 0.0 && ex.is_finite() && ey.is_finite()) {
        return Err(Error::BadInput(
            "a record does not move (every sample the same): there is nothing to correlate".into(),
        ));
    }
    let fwd = plan_forward(nfft);
    let spectrum = |v: &[f64], m: f64| -> Result<Vec<Complex<f64>>> {
        let mut buf = vec![0.0; nfft];
        for (b, s) in buf.iter_mut().zip(v) {
            *b = s - m;
        }
        let mut out = fwd.make_output_vec();
        fwd.process(&mut buf, &mut out)
            .map_err(|e| Error::Run(format!("FFT failed: {e}")))?;
        Ok(out)
    };
    let xs = spectrum(x, mx)?;
    let ys = spectrum(y, my)?;
    // Cross-spectrum conj(X) Y: its inverse is r[k] = sum x[n] y[n + k].
    let plain: Vec<Complex<f64>> = xs.iter().zip(&ys).map(|(a, b)| a.conj() * b).collect();
    drop((xs, ys));
    let weighted: Vec<Complex<f64>> = match method {
        Method::Plain => plain.clone(),
        Method::Phat => {
            let top = plain.iter().map(|c| c.norm()).fold(0.0, f64::max);
            let floor = top * 1e-12;
            plain
                .iter()
                .map(|c| {
                    let m = c.norm();
                    if m > floor {
                        c / m
                    } else {
                        Complex::new(0.0, 0.0)
                    }
                })
                .collect()
        }
    };
    let inv = plan_inverse(nfft);
    let mut spec = weighted.clone();
    spec[0].im = 0.0;
    if let Some(last) = spec.last_mut() {
        last.im = 0.0;
    }
    let mut r = inv.make_output_vec();
    inv.process(&mut spec, &mut r)
        .map_err(|e| Error::Run(format!("FFT failed: {e}")))?;
    // The largest value over the lags the records allow: -(len x - 1) ..= len y - 1.
    let lag_of = |i: usize| -> i64 {
        if i < nfft / 2 {
            i as i64
        } else {
            i as i64 - nfft as i64
        }
    };
    let (mut best_i, mut best) = (0usize, f64::NEG_INFINITY);
    for (i, &v) in r.iter().enumerate() {
        let lag = lag_of(i);
        if lag > -(x.len() as i64) && lag < y.len() as i64 && v.abs() > best {
            best = v.abs();
            best_i = i;
        }
    }
    let coarse = lag_of(best_i) as f64;
    // A capture of inverted polarity peaks negative: the search maximises the correlation times its sign.
    let sign = if r[best_i] < 0.0 { -1.0 } else { 1.0 };
    // Golden-section search of the interpolated correlation around the coarse peak.
    let at = |tau: f64| sign * interpolate(&weighted, nfft, tau);
    let (mut a, mut b) = (coarse - 0.75, coarse + 0.75);
    let g = (5f64.sqrt() - 1.0) / 2.0;
    let (mut c, mut d) = (b - g * (b - a), a + g * (b - a));
    let (mut fc, mut fd) = (at(c), at(d));
    for _ in 0..48 {
        if fc > fd {
            b = d;
            d = c;
            fd = fc;
            c = b - g * (b - a);
            fc = at(c);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + g * (b - a);
            fd = at(d);
        }
    }
    let tau = 0.5 * (a + b);
    let r_tau = interpolate(&plain, nfft, tau) / nfft as f64;
    let confidence = (r_tau.abs() / (ex * ey).sqrt()).clamp(0.0, 1.0);
    // Least-squares gain over the overlap: sum x y / sum x^2, x the reference samples the capture overlaps.
    let shift = tau.round() as i64;
    let overlap_ex: f64 = x
        .iter()
        .enumerate()
        .filter(|(i, _)| {
            let j = *i as i64 + shift;
            j >= 0 && (j as usize) < y.len()
        })
        .map(|(_, v)| (v - mx) * (v - mx))
        .sum();
    let gain = if overlap_ex > 0.0 {
        r_tau / overlap_ex
    } else {
        f64::NAN
    };
    Ok(Estimate {
        delay_samples: tau,
        confidence,
        gain,
    })
}

/// The correlation whose one-sided spectrum is `s` (length nfft/2 + 1) at the fractional lag `tau`, times
/// nfft: `s0 + 2 sum Re(s_k e^(j 2 pi k tau / nfft)) + s_(nfft/2) cos(pi tau)` (band-limited interpolation).
fn interpolate(s: &[Complex<f64>], nfft: usize, tau: f64) -> f64 {
    let step = Complex::from_polar(1.0, 2.0 * PI * tau / nfft as f64);
    let last = s.len() - 1;
    let mut acc = s[0].re;
    let mut z = Complex::new(1.0, 0.0);
    for (k, v) in s.iter().enumerate().take(last).skip(1) {
        if k % 1024 == 0 {
            z = Complex::from_polar(1.0, 2.0 * PI * tau * k as f64 / nfft as f64);
        } else {
            z *= step;
        }
        acc += 2.0 * (v * z).re;
    }
    acc + s[last].re * (PI * tau).cos()
}

/// The delay of one window of a long recording.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct WindowDelay {
    /// Centre of the window in the capture's time (s, 0 at its first sample).
    pub time_s: f64,
    pub delay_s: f64,
    pub confidence: f64,
}

/// The delay along a recording.
#[derive(Debug, Clone, PartialEq)]
pub struct DelayTrack {
    /// Over the whole records (with drift, the correlation of a long broadband record smears: the windows'
    /// figures below are the ones to trust).
    pub whole: Estimate,
    /// The median of the windows' confidences (the whole records' without windows).
    pub confidence: f64,
    /// The median gain of the windows whose confidence reaches the threshold (the whole records' without
    /// them), V/V.
    pub gain: f64,
    pub windows: Vec<WindowDelay>,
    /// The line through the windows' delays: (delay at t = 0 in s, slope in s/s); None with fewer than three
    /// windows above the confidence threshold.
    pub line: Option<(f64, f64)>,
}

/// Samples per window of a long recording.
pub const WINDOW_SAMPLES: usize = 1 << 14;
/// Most windows measured.
pub const MAX_WINDOWS: usize = 64;
/// Most samples of each record the whole-record estimate correlates (2^21, 44 s at 48 kHz): it only places
/// the windows, so a longer recording is never read whole.
pub const HEAD_SAMPLES: usize = 1 << 21;

/// A record a delay track reads a stretch at a time (a slice in memory, or a recording on disk).
pub trait Records {
    /// Samples in the record.
    fn samples(&self) -> usize;
    /// Samples `start .. start + len` (inside the record).
    fn stretch(&self, start: usize, len: usize) -> Result<std::borrow::Cow<'_, [f64]>>;
}

impl Records for [f64] {
    fn samples(&self) -> usize {
        self.len()
    }
    fn stretch(&self, start: usize, len: usize) -> Result<std::borrow::Cow<'_, [f64]>> {
        Ok(std::borrow::Cow::Borrowed(&self[start..start + len]))
    }
}

/// The delay of `y` behind `x` (both at `rate_hz`) over the records' first [`HEAD_SAMPLES`], then in windows of
/// [`WINDOW_SAMPLES`] placed along the capture, each against the reference window one delay earlier (the delay
/// carried from window to window, so a drift of many samples over a long recording keeps every pair aligned),
/// and the least-squares line through the windows whose confidence reaches `threshold` (weighted alike). Only
/// the head and the windows are read.
pub fn track<X: Records + ?Sized, Y: Records + ?Sized>(
    x: &X,
    y: &Y,
    rate_hz: f64,
    method: Method,
    threshold: f64,
) -> Result<DelayTrack> {
    let (nx, ny) = (x.samples(), y.samples());
    let whole = estimate(
        &x.stretch(0, nx.min(HEAD_SAMPLES))?,
        &y.stretch(0, ny.min(HEAD_SAMPLES))?,
        method,
    )?;
    let d0 = whole.delay_samples.round() as i64;
    let w = WINDOW_SAMPLES as i64;
    // Capture windows [c, c + w) with reference windows [c - d, c - d + w) inside both records.
    let c_lo = d0.max(0);
    let c_hi = (ny as i64).min(nx as i64 + d0) - w;
    let mut windows = Vec::new();
    let mut gains = Vec::new();
    let mut d = d0;
    if c_hi >= c_lo + w {
        let count = (((c_hi - c_lo) / (w / 2)) as usize + 1).clamp(2, MAX_WINDOWS);
        for j in 0..count {
            let c = c_lo + (c_hi - c_lo) * j as i64 / (count as i64 - 1);
            let r = c - d;
            if r < 0 || r + w > nx as i64 {
                continue;
            }
            let (c, r) = (c as usize, r as usize);
            let xw = x.stretch(r, WINDOW_SAMPLES)?;
            let yw = y.stretch(c, WINDOW_SAMPLES)?;
            let Ok(e) = estimate(&xw, &yw, method) else {
                continue;
            };
            // Gain and confidence from the window's central quarter: a drift smears the alignment across a
            // whole window (50 ppm moves the delay by 0.8 sample over 16384 samples, which costs a broadband
            // signal some 7 % of its correlation), four times less across the quarter.
            let (q0, q) = (3 * WINDOW_SAMPLES / 8, WINDOW_SAMPLES / 4);
            let centre = estimate(&xw[q0..q0 + q], &yw[q0..q0 + q], method).unwrap_or(e);
            if centre.confidence >= threshold && centre.gain.is_finite() {
                gains.push(centre.gain);
            }
            windows.push(WindowDelay {
                time_s: (c as f64 + 0.5 * (WINDOW_SAMPLES - 1) as f64) / rate_hz,
                delay_s: (d as f64 + e.delay_samples) / rate_hz,
                confidence: centre.confidence,
            });
            // Follow the delay: the next window pair is placed at this one's delay.
            if centre.confidence >= threshold && e.delay_samples.is_finite() {
                d += e.delay_samples.round() as i64;
            }
        }
    }
    let good: Vec<&WindowDelay> = windows
        .iter()
        .filter(|w| w.confidence >= threshold)
        .collect();
    let line = (good.len() >= 3).then(|| {
        let m = good.len() as f64;
        let mt = good.iter().map(|w| w.time_s).sum::<f64>() / m;
        let md = good.iter().map(|w| w.delay_s).sum::<f64>() / m;
        let stt: f64 = good.iter().map(|w| (w.time_s - mt).powi(2)).sum();
        let std: f64 = good
            .iter()
            .map(|w| (w.time_s - mt) * (w.delay_s - md))
            .sum();
        let slope = if stt > 0.0 { std / stt } else { 0.0 };
        (md - slope * mt, slope)
    });
    let median = |mut v: Vec<f64>| -> Option<f64> {
        if v.is_empty() {
            return None;
        }
        let mid = v.len() / 2;
        Some(*v.select_nth_unstable_by(mid, f64::total_cmp).1)
    };
    let confidence =
        median(windows.iter().map(|w| w.confidence).collect()).unwrap_or(whole.confidence);
    let gain = median(gains).unwrap_or(whole.gain);
    Ok(DelayTrack {
        whole,
        confidence,
        gain,
        windows,
        line,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};
    use std::f64::consts::TAU;

    /// A broadband signal in closed form: 300 tones of random frequencies (up to 0.45 fs) and phases.
    fn broadband(seed: u64) -> impl Fn(f64) -> f64 {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let tones: Vec<(f64, f64)> = (0..300)
            .map(|_| (rng.random::<f64>() * 0.45, rng.random::<f64>() * TAU))
            .collect();
        move |t: f64| {
            tones
                .iter()
                .map(|(f, p)| (TAU * f * t + p).sin())
                .sum::<f64>()
                / 12.0
        }
    }

    #[test]
    fn a_fractional_delay_in_broadband_noise_is_found_within_a_tenth_of_a_sample() {
        // By construction: the capture is the same band-limited signal evaluated 37.3 samples later.
        let s = broadband(1);
        let n = 8192;
        let x: Vec<f64> = (0..n).map(|i| s(i as f64)).collect();
        for d in [37.3, -5.75, 0.5] {
            let y: Vec<f64> = (0..n).map(|i| 0.5 * s(i as f64 - d)).collect();
            for m in [Method::Plain, Method::Phat] {
                let e = estimate(&x, &y, m).unwrap();
                assert!(
                    (e.delay_samples - d).abs() < 0.1,
                    "{m:?} {d}: {}",
                    e.delay_samples
                );
                assert!(e.confidence > 0.9, "{}", e.confidence);
                assert!((e.gain - 0.5).abs() < 0.03, "{}", e.gain);
            }
        }
    }

    #[test]
    fn phat_finds_the_direct_path_where_plain_correlation_is_pulled_by_an_echo() {
        // Knapp and Carter (IEEE Trans. ASSP 1976): with a coloured source, plain correlation's broad peak
        // merges the direct path and a close echo; the phase transform separates them. Here the source is
        // white noise through two one-pole low-passes (poles 0.9, a rounded autocorrelation peak some 20
        // samples wide) and the echo, 0.8 of the direct sound, follows 4 samples later: plain correlation
        // peaks about 2 samples late (the sum of the two rounded peaks, worked out by hand from the
        // autocorrelation 0.9^k (1 + 0.105 k)), PHAT at the direct path; the echo's phase response leaves PHAT
        // a small bias there, hence 0.2 sample.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let n = 16384;
        let (mut s1, mut s2) = (0.0, 0.0);
        let x: Vec<f64> = (0..n)
            .map(|_| {
                s1 = 0.9 * s1 + (rng.random::<f64>() - 0.5);
                s2 = 0.9 * s2 + s1;
                s2 + 0.01 * (rng.random::<f64>() - 0.5)
            })
            .collect();
        let (d, echo) = (40usize, 4usize);
        let y: Vec<f64> = (0..n)
            .map(|i| {
                let a = if i >= d { x[i - d] } else { 0.0 };
                let b = if i >= d + echo { x[i - d - echo] } else { 0.0 };
                a + 0.8 * b
            })
            .collect();
        let plain = estimate(&x, &y, Method::Plain).unwrap();
        let phat = estimate(&x, &y, Method::Phat).unwrap();
        assert!(
            (phat.delay_samples - d as f64).abs() < 0.2,
            "PHAT {} plain {}",
            phat.delay_samples,
            plain.delay_samples
        );
        assert!(
            (plain.delay_samples - d as f64).abs() > 1.0,
            "plain correlation was not pulled: {}",
            plain.delay_samples
        );
    }

    #[test]
    fn a_fifty_ppm_drift_is_recovered_within_two_ppm() {
        // By construction: the capture's delay shrinks by 50 us per second (50 ppm) from 2.5 ms.
        let s = broadband(2);
        let fs = 48_000.0;
        let n = (4.0 * fs) as usize;
        let x: Vec<f64> = (0..n).map(|i| s(i as f64)).collect();
        let y: Vec<f64> = (0..n)
            .map(|i| {
                let t = i as f64 / fs;
                let delay_s = 2.5e-3 - 50e-6 * t;
                s(i as f64 - delay_s * fs)
            })
            .collect();
        let tr = track(&x[..], &y[..], fs, Method::Plain, 0.2).unwrap();
        let (d0, slope) = tr.line.unwrap();
        assert!(
            (-slope * 1e6 - 50.0).abs() < 2.0,
            "drift {} ppm",
            -slope * 1e6
        );
        assert!((d0 - 2.5e-3).abs() < 0.1 / fs, "{d0}");
        assert!(tr.windows.len() >= 10);
        // The windows keep their confidence and the unit gain where the whole record's correlation smears.
        assert!(tr.confidence > 0.98, "{}", tr.confidence);
        assert!((tr.gain - 1.0).abs() < 0.01, "{}", tr.gain);
    }

    #[test]
    fn unrelated_records_have_a_low_confidence() {
        let a = broadband(5);
        let b = broadband(6);
        let x: Vec<f64> = (0..8192).map(|i| a(i as f64)).collect();
        let y: Vec<f64> = (0..8192).map(|i| b(i as f64)).collect();
        let e = estimate(&x, &y, Method::Plain).unwrap();
        assert!(e.confidence < 0.1, "{}", e.confidence);
    }
}
