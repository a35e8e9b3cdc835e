//! Audio figures as the audio trade quotes them (the methods of AES17): THD+N over a band, weighted noise in
//! dBFS, and the gain and phase of a chain at several tones at once.
//!
//! - Weighting: A-weighting of IEC 61672-1 in its analytic form, `R_A(f) = f4^2 f^4 / ((f^2 + f1^2)
//!   sqrt((f^2 + f2^2)(f^2 + f3^2)) (f^2 + f4^2))` with poles at f1 = 20.598997 Hz (double), f2 = 107.65265 Hz,
//!   f3 = 737.86223 Hz and f4 = 12194.217 Hz (double), normalised to 0 dB at 1 kHz (divided by `R_A(1 kHz)`
//!   rather than adding the standard's rounded +2.00 dB).
//! - Band powers from a windowed power spectrum ([`crate::measure::spectrum`]): bin powers (each times the
//!   weighting's power gain at the bin's frequency) summed over the bins whose frequency lies within the band,
//!   divided by the window's equivalent noise bandwidth. The DC lobe (bins 0..=L) and the fundamental's lobe
//!   (its peak +- L bins, L the window's main-lobe half-width) are left out of the residual, as
//!   [`crate::measure::metrics`] leaves them out of the NAD, and the band's share of them is filled in with the
//!   residual's mean density (times the weighting there), so white noise reads its whole band's power.
//! - The fundamental's power (its lobe over ENBW) is never weighted: THD+N is the weighted residual over the
//!   total (fundamental + weighted residual), so a tone away from 1 kHz is not scaled by the weighting.

use std::f64::consts::TAU;

use serde::Serialize;

use crate::error::{Error, Result};
use crate::measure::sinefit;
use crate::measure::spectrum::Spectrum;

/// The poles of IEC 61672-1's A-weighting (Hz): f1 (double), f2, f3, f4 (double).
pub const A_WEIGHTING_POLES_HZ: [f64; 4] = [20.598997, 107.65265, 737.86223, 12194.217];

/// A frequency weighting applied to noise before it is summed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Weighting {
    /// No weighting (unity at every frequency).
    Flat,
    /// A-weighting, IEC 61672-1, 0 dB at 1 kHz.
    A,
}

fn a_unnormalised(f_hz: f64) -> f64 {
    let [f1, f2, f3, f4] = A_WEIGHTING_POLES_HZ;
    let f2_ = f_hz * f_hz;
    f4 * f4 * f2_ * f2_
        / ((f2_ + f1 * f1) * ((f2_ + f2 * f2) * (f2_ + f3 * f3)).sqrt() * (f2_ + f4 * f4))
}

impl Weighting {
    /// The weighting's magnitude at `f_hz` (V/V; 1 at 1 kHz for A).
    pub fn gain(self, f_hz: f64) -> f64 {
        match self {
            Weighting::Flat => 1.0,
            Weighting::A => a_unnormalised(f_hz) / a_unnormalised(1000.0),
        }
    }

    /// The weighting at `f_hz` in dB.
    pub fn gain_db(self, f_hz: f64) -> f64 {
        20.0 * self.gain(f_hz).log10()
    }

    /// The weighting's power gain at `f_hz` (the square of [`Self::gain`]).
    pub fn power_gain(self, f_hz: f64) -> f64 {
        let g = self.gain(f_hz);
        g * g
    }
}

/// Powers in a band of a spectrum (V^2), see the module doc.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BandPower {
    /// Fundamental + residual.
    pub total_v2: f64,
    /// Everything in the band but DC and the fundamental, weighted (the lobes left out filled in).
    pub residual_v2: f64,
    /// The fundamental's lobe over ENBW, unweighted (0 without a fundamental).
    pub fundamental_v2: f64,
}

/// Powers of `spec` within `band_hz` = (low, high) (high clamped to the spectrum's Nyquist frequency), the
/// fundamental given by its frequency (searched within +-L bins of it) or absent (an idle channel), the
/// residual weighted with `weighting`. Errors on a band that is empty, inverted, or lies within the DC lobe.
pub fn band_power(
    spec: &Spectrum,
    band_hz: (f64, f64),
    fundamental_hz: Option<f64>,
    weighting: Weighting,
) -> Result<BandPower> {
    let p = &spec.power_v2;
    let nb = p.len();
    let l = spec.lobe_half_width_bins;
    if nb < 2 * l + 3 || spec.bin_hz.is_nan() || spec.bin_hz <= 0.0 {
        return Err(Error::Run("spectrum too short for band powers".into()));
    }
    let (lo_hz, hi_hz) = band_hz;
    let hi_hz = hi_hz.min(spec.nyquist_hz());
    if !(lo_hz.is_finite() && hi_hz.is_finite() && lo_hz >= 0.0 && hi_hz > lo_hz) {
        return Err(Error::Run(format!(
            "audio band {lo_hz} Hz .. {hi_hz} Hz is empty or inverted"
        )));
    }
    let k_lo = (lo_hz / spec.bin_hz - 1e-9).ceil().max(0.0) as usize;
    let k_hi = ((hi_hz / spec.bin_hz + 1e-9).floor() as usize).min(nb - 1);
    if k_hi <= l || k_hi < k_lo {
        return Err(Error::Run(format!(
            "audio band {lo_hz} Hz .. {hi_hz} Hz lies within the DC lobe of a record with {} Hz bins",
            spec.bin_hz
        )));
    }
    // The fundamental's lobe, as metrics.rs finds it: the largest bin within +-L of the given frequency.
    let fund = match fundamental_hz {
        Some(f) => {
            let kg = (f / spec.bin_hz).round();
            if !(kg.is_finite() && kg > l as f64 && kg < (nb - 1) as f64) {
                return Err(Error::Run(format!(
                    "fundamental {f} Hz lies outside the spectrum clear of its DC lobe"
                )));
            }
            let kg = kg as usize;
            let (a, b) = (kg.saturating_sub(l).max(l + 1), (kg + l).min(nb - 1));
            let mut kf = a;
            for k in a..=b {
                if p[k] > p[kf] {
                    kf = k;
                }
            }
            Some((kf.saturating_sub(l), (kf + l).min(nb - 1)))
        }
        None => None,
    };
    let in_fund = |k: usize| fund.is_some_and(|(a, b)| k >= a && k <= b);
    let in_dc = |k: usize| k <= l && fund.is_none_or(|(a, _)| a != 0);
    let fundamental_v2 = fund.map_or(0.0, |(a, b)| p[a..=b].iter().sum::<f64>() / spec.enbw_bins);
    // Residual bins: their weighted sum, and their unweighted sum and bandwidth for the mean density.
    let (mut weighted, mut raw, mut width) = (0.0, 0.0, 0.0);
    // The band's excluded bins: their weighted bandwidth, filled with the mean density.
    let mut excluded_weighted_width = 0.0;
    for (k, &pk) in p.iter().enumerate().take(k_hi + 1).skip(k_lo) {
        let w2 = weighting.power_gain(spec.bin_frequency_hz(k));
        let bw = spec.bin_weight(k);
        if in_fund(k) || in_dc(k) {
            excluded_weighted_width += w2 * bw;
        } else {
            weighted += w2 * pk;
            raw += pk;
            width += bw;
        }
    }
    let density = if width > 0.0 { raw / width } else { 0.0 };
    let residual_v2 = (weighted + density * excluded_weighted_width) / spec.enbw_bins;
    Ok(BandPower {
        total_v2: fundamental_v2 + residual_v2,
        residual_v2,
        fundamental_v2,
    })
}

/// THD+N of band powers: the residual over the total, in dB and in per cent (of amplitude: 100 sqrt(ratio)).
/// `None` when the total is zero.
pub fn thd_n(bp: &BandPower) -> Option<(f64, f64)> {
    (bp.total_v2 > 0.0).then(|| {
        let r = bp.residual_v2 / bp.total_v2;
        (10.0 * r.log10(), 100.0 * r.sqrt())
    })
}

/// A power (V^2) relative to a full-scale sine of peak `full_scale_peak_v` (dBFS: a full-scale sine is 0).
pub fn dbfs(power_v2: f64, full_scale_peak_v: f64) -> f64 {
    10.0 * (power_v2 / (0.5 * full_scale_peak_v * full_scale_peak_v)).log10()
}

/// A record on a uniform grid: samples, rate and the time of the first sample.
#[derive(Debug, Clone, Copy)]
pub struct Timed<'a> {
    pub volts: &'a [f64],
    pub rate_hz: f64,
    pub t0_s: f64,
}

/// The gain and phase of a chain at one tone.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ResponsePoint {
    pub frequency_hz: f64,
    /// Output tone amplitude over input tone amplitude (dB).
    pub gain_db: f64,
    /// Output phase less input phase (degrees), wrapped to (-180, 180] unless unwrapped by the caller.
    pub phase_deg: f64,
}

/// The response at each of `tones_hz` from a joint multitone fit of the input and of the output record
/// ([`sinefit::fit_multitone`]; the records need not be coherent, nor share a rate). Each phase is taken at
/// t = 0 in both fits, so the difference is the chain's phase including its delay, wrapped to (-180, 180].
pub fn tone_response(input: Timed<'_>, output: Timed<'_>, tones_hz: &[f64]) -> Vec<ResponsePoint> {
    let fin = sinefit::fit_multitone(input.volts, input.rate_hz, tones_hz, input.t0_s);
    let fout = sinefit::fit_multitone(output.volts, output.rate_hz, tones_hz, output.t0_s);
    fin.tones
        .iter()
        .zip(&fout.tones)
        .map(|(i, o)| ResponsePoint {
            frequency_hz: i.frequency_hz,
            gain_db: 20.0 * (o.amplitude_v / i.amplitude_v).log10(),
            phase_deg: wrap_deg((o.phase_rad - i.phase_rad).to_degrees()),
        })
        .collect()
}

/// An angle in degrees wrapped to (-180, 180].
pub fn wrap_deg(x: f64) -> f64 {
    let y = x.rem_euclid(360.0);
    if y > 180.0 { y - 360.0 } else { y }
}

/// Unwrap phases against a known delay `tau_s`: each phase is taken on the branch nearest -360 f tau, so a pure
/// delay reads its whole phase, however many turns.
pub fn unwrap_with_delay(points: &mut [ResponsePoint], tau_s: f64) {
    for pt in points {
        let lag = 360.0 * pt.frequency_hz * tau_s;
        pt.phase_deg = wrap_deg(pt.phase_deg + lag) - lag;
    }
}

/// `count` tone frequencies spaced evenly on a log axis from `low_hz` to `high_hz`, both included (count >= 2).
pub fn log_tones_hz(low_hz: f64, high_hz: f64, count: usize) -> Vec<f64> {
    let n = count.max(2);
    let r = (high_hz / low_hz).ln();
    (0..n)
        .map(|i| low_hz * (r * i as f64 / (n - 1) as f64).exp())
        .collect()
}

/// Schroeder's low-crest-factor phases for `count` tones of equal amplitude, phi_k = -pi k^2 / K for
/// k = 1..K (M. R. Schroeder, "Synthesis of low-peak-factor signals and binary sequences with low
/// autocorrelation", IEEE Trans. Information Theory 16(1), 1970; the formula from memory).
pub fn schroeder_phases_rad(count: usize) -> Vec<f64> {
    let k_total = count.max(1) as f64;
    (1..=count)
        .map(|k| (-std::f64::consts::PI * (k * k) as f64 / k_total).rem_euclid(TAU))
        .collect()
}

/// Deviation of a response from its gain at `reference_hz` (the point nearest it).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ResponseSummary {
    /// Smallest and largest gain relative to the reference point (dB).
    pub min: f64,
    pub max: f64,
    /// Frequency of the reference point (Hz).
    pub reference_hz: f64,
    /// Every point, gains relative to the reference (dB), phases as measured (degrees).
    pub points: Vec<ResponsePoint>,
}

/// The response relative to its point nearest `reference_hz` (on a log axis). `None` without points or with a
/// non-finite gain.
pub fn summarise_response(points: &[ResponsePoint], reference_hz: f64) -> Option<ResponseSummary> {
    let r = points.iter().min_by(|a, b| {
        let d = |p: &ResponsePoint| (p.frequency_hz / reference_hz).ln().abs();
        d(a).total_cmp(&d(b))
    })?;
    if points.iter().any(|p| !p.gain_db.is_finite()) {
        return None;
    }
    let rel: Vec<ResponsePoint> = points
        .iter()
        .map(|p| ResponsePoint {
            gain_db: p.gain_db - r.gain_db,
            ..*p
        })
        .collect();
    let min = rel.iter().map(|p| p.gain_db).fold(f64::INFINITY, f64::min);
    let max = rel
        .iter()
        .map(|p| p.gain_db)
        .fold(f64::NEG_INFINITY, f64::max);
    Some(ResponseSummary {
        min,
        max,
        reference_hz: r.frequency_hz,
        points: rel,
    })
}

/// The audio figures of one record (the ADC's codes or the analog output); see the README's "Audio figures".
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AudioFigures {
    /// Peak of the full-scale sine this record's dBFS refer to (V).
    pub full_scale_v: f64,
    /// THD+N of the scenario's tone over the band, unweighted (dB, negative) and in per cent.
    pub thd_n_db: Option<f64>,
    pub thd_n_pct: Option<f64>,
    /// AES17 dynamic range: 60 dB less the A-weighted THD+N of the -60 dBFS tone (dB).
    pub dynamic_range_db: Option<f64>,
    /// Idle-channel noise over the band, A-weighted and unweighted (dBFS).
    pub noise_a_dbfs: Option<f64>,
    pub noise_dbfs: Option<f64>,
    /// Frequency response over the band, relative to the point nearest 1 kHz.
    pub response_db: Option<ResponseSummary>,
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::spectrum::SpectrumAnalyzer;
    use crate::scenario::WindowKind;

    #[test]
    fn a_weighting_matches_the_iec_61672_1_table_at_third_octave_centres() {
        // IEC 61672-1:2013, its table of frequency weightings (A column, dB, at the nominal third-octave centres; values as listed
        // there, rounded to 0.1 dB). The table is computed at the exact base-ten frequencies 1 kHz x 10^(n/10)
        // that the nominal ones name (31.62 Hz for "31.5 Hz"); the analytic form there must round to the
        // table: within 0.1 dB. The class 1 tolerances at these frequencies are all wider than that (from memory:
        // about +-1 dB in mid band, growing to several dB at the ends), so a weighting within 0.1 dB of the
        // table is within class 1 everywhere checked.
        let table: [(f64, f64); 13] = [
            (31.5, -39.4),
            (63.0, -26.2),
            (100.0, -19.1),
            (125.0, -16.1),
            (250.0, -8.6),
            (500.0, -3.2),
            (1000.0, 0.0),
            (2000.0, 1.2),
            (4000.0, 1.0),
            (8000.0, -1.1),
            (10000.0, -2.5),
            (16000.0, -6.6),
            (20000.0, -9.3),
        ];
        for (nominal, want) in table {
            let f = 1000.0 * 10f64.powf((10.0 * (nominal / 1000.0).log10()).round() / 10.0);
            assert!((f / nominal - 1.0).abs() < 0.03);
            let got = Weighting::A.gain_db(f);
            assert!((got - want).abs() <= 0.1, "{f} Hz: {got:.3} dB vs {want}");
        }
        assert_eq!(Weighting::A.gain_db(1000.0), 0.0);
        assert_eq!(Weighting::Flat.gain(123.0), 1.0);
        // The normalisation the standard writes as +2.00 dB (IEC 61672-1, A_1000): 20 log10 R_A(1 kHz) = -2.00.
        assert!((20.0 * a_unnormalised(1000.0).log10() + 2.0).abs() < 0.005);
    }

    /// A windowed spectrum of `x` at `fs`.
    fn spectrum(x: &[f64], fs: f64) -> Spectrum {
        SpectrumAnalyzer::new(x.len(), WindowKind::BlackmanHarris)
            .unwrap()
            .power_spectrum(x, fs)
            .unwrap()
    }

    /// Simpson's rule of `f` over [a, b] with `n` (even) intervals.
    fn simpson(f: impl Fn(f64) -> f64, a: f64, b: f64, n: usize) -> f64 {
        let h = (b - a) / n as f64;
        let mut s = f(a) + f(b);
        for i in 1..n {
            s += f(a + i as f64 * h) * if i % 2 == 1 { 4.0 } else { 2.0 };
        }
        s * h / 3.0
    }

    #[test]
    fn white_noise_band_power_is_its_density_times_the_weighted_band() {
        // White noise of variance s^2 sampled at fs has a one-sided density s^2 / (fs/2) (definition); in a
        // band, weighted, its power is that density times the integral of |W(f)|^2 over the band, taken here by
        // Simpson's rule on a fine grid. Tolerance 0.1 dB: the estimate's relative standard deviation is about
        // sqrt(2 sum w^4) / sum w^2 times the square root of the share of bins that carry the weighted power
        // (about 0.004 here, 0.02 dB), so this allows about five of them.
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let fs = 48_000.0;
        let n = 1 << 18;
        let sigma = 1e-3;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(17);
        let normal = Normal::new(0.0, sigma).unwrap();
        let x: Vec<f64> = (0..n).map(|_| normal.sample(&mut rng)).collect();
        let spec = spectrum(&x, fs);
        let density = sigma * sigma / (fs / 2.0);
        for (weighting, band) in [
            (Weighting::A, (20.0, 20_000.0)),
            (Weighting::Flat, (20.0, 20_000.0)),
            (Weighting::A, (400.0, 4_000.0)),
            (Weighting::Flat, (0.0, 24_000.0)),
        ] {
            let want = density * simpson(|f| weighting.power_gain(f), band.0, band.1, 200_000);
            let got = band_power(&spec, band, None, weighting).unwrap();
            assert_eq!(got.fundamental_v2, 0.0);
            let err_db = 10.0 * (got.residual_v2 / want).log10();
            assert!(err_db.abs() < 0.1, "{weighting:?} {band:?}: {err_db} dB");
        }
        // With a tone on top, the tone's lobe is filled in: the residual is still the noise's.
        let f0 = 997.0;
        let y: Vec<f64> = x
            .iter()
            .enumerate()
            .map(|(i, v)| v + 0.5 * (TAU * f0 * i as f64 / fs).sin())
            .collect();
        let spec = spectrum(&y, fs);
        let got = band_power(&spec, (20.0, 20_000.0), Some(f0), Weighting::A).unwrap();
        let want = density * simpson(|f| Weighting::A.power_gain(f), 20.0, 20_000.0, 200_000);
        assert!((10.0 * (got.residual_v2 / want).log10()).abs() < 0.1);
        assert!((got.fundamental_v2 / (0.125) - 1.0).abs() < 1e-3);
    }

    #[test]
    fn thd_n_of_a_cubic_nonlinearity_matches_its_closed_form() {
        // y = a x + b x^3 with x = A sin(w t): sin^3 = (3 sin - sin 3)/4, so the fundamental is a A + 3 b A^3 / 4
        // and the third harmonic b A^3 / 4 (trigonometric identity; the THD+N form from memory). Noise-free
        // and coherent: THD+N = h3^2 / (f1^2 + h3^2), to 0.01 dB.
        let fs = 48_000.0;
        let n = 1 << 14;
        let f0 = 37.0 * fs / n as f64 * 11.0; // 11 x 37 = 407 cycles: coherent
        for (a, b, amp) in [(1.0, 0.01, 1.0), (0.8, -0.05, 0.9), (2.0, 0.001, 0.3)] {
            let x: Vec<f64> = (0..n)
                .map(|i| {
                    let s = amp * (TAU * f0 * i as f64 / fs + 0.3).sin();
                    a * s + b * s * s * s
                })
                .collect();
            let spec = spectrum(&x, fs);
            let bp = band_power(&spec, (20.0, 20_000.0), Some(f0), Weighting::Flat).unwrap();
            let f1 = a * amp + 0.75 * b * amp.powi(3);
            let h3 = 0.25 * b * amp.powi(3);
            let want = 10.0 * (h3 * h3 / (f1 * f1 + h3 * h3)).log10();
            let (got_db, got_pct) = thd_n(&bp).unwrap();
            assert!((got_db - want).abs() < 0.01, "{got_db} vs {want}");
            let pct = 100.0 * (h3 * h3 / (f1 * f1 + h3 * h3)).sqrt();
            assert!((got_pct / pct - 1.0).abs() < 2e-3);
            // The third harmonic above the band: nothing left.
            let bp = band_power(&spec, (20.0, 2.5 * f0), Some(f0), Weighting::Flat).unwrap();
            assert!(thd_n(&bp).unwrap().0 < -200.0);
        }
    }

    #[test]
    fn tone_response_reads_back_a_known_gain_and_delay() {
        // Definition: a tone of amplitude g A delayed by tau has gain 20 log10 g and phase -360 f tau. The input
        // is sampled at 96 kHz, the output at 48 kHz from another instant, as the chain's records are.
        let tones = log_tones_hz(20.0, 20_000.0, 11);
        let phases = schroeder_phases_rad(tones.len());
        let gains: Vec<f64> = (0..tones.len()).map(|k| 1.0 - 0.03 * k as f64).collect();
        let tau = 67e-6;
        let wave = |t: f64, g: &dyn Fn(usize) -> f64, d: f64| -> f64 {
            tones
                .iter()
                .zip(&phases)
                .enumerate()
                .map(|(k, (f, p))| 0.1 * g(k) * (TAU * f * (t - d) + p).cos())
                .sum()
        };
        let (fi, fo) = (96_000.0, 48_000.0);
        let (ti, to) = (0.01, 0.0123);
        let input: Vec<f64> = (0..96_000)
            .map(|i| wave(ti + i as f64 / fi, &|_| 1.0, 0.0))
            .collect();
        let output: Vec<f64> = (0..24_000)
            .map(|i| wave(to + i as f64 / fo, &|k| gains[k], tau))
            .collect();
        let mut r = tone_response(
            Timed {
                volts: &input,
                rate_hz: fi,
                t0_s: ti,
            },
            Timed {
                volts: &output,
                rate_hz: fo,
                t0_s: to,
            },
            &tones,
        );
        unwrap_with_delay(&mut r, 60e-6);
        for (k, p) in r.iter().enumerate() {
            assert!((p.gain_db - 20.0 * gains[k].log10()).abs() < 1e-6, "{p:?}");
            let want = -360.0 * p.frequency_hz * tau;
            assert!((p.phase_deg - want).abs() < 1e-4, "{p:?} vs {want}");
        }
        let s = summarise_response(&r, 1000.0).unwrap();
        // 1 kHz lies between 632 Hz (k = 5) and 1262 Hz (k = 6); 1262 is the nearer on a log axis.
        assert!((s.reference_hz - tones[6]).abs() < 1e-9);
        assert!((s.max - 20.0 * (gains[0] / gains[6]).log10()).abs() < 1e-6);
        assert!((s.min - 20.0 * (gains[10] / gains[6]).log10()).abs() < 1e-6);
    }

    #[test]
    fn bad_bands_are_errors_and_dbfs_is_relative_to_a_full_scale_sine() {
        let x: Vec<f64> = (0..4096).map(|i| (i as f64 * 0.3).sin()).collect();
        let spec = spectrum(&x, 48_000.0);
        assert!(band_power(&spec, (5000.0, 100.0), None, Weighting::A).is_err());
        assert!(band_power(&spec, (0.0, 10.0), None, Weighting::A).is_err());
        assert!(band_power(&spec, (0.0, 1e5), Some(1e6), Weighting::A).is_err());
        // A full-scale sine of peak 2 V has power 2 V^2: 0 dBFS.
        assert!(dbfs(2.0, 2.0).abs() < 1e-12);
        assert!((dbfs(2e-6, 2.0) + 60.0).abs() < 1e-9);
        assert!((wrap_deg(190.0) + 170.0).abs() < 1e-12);
        assert_eq!(wrap_deg(180.0), 180.0);
        assert_eq!(wrap_deg(-180.0), 180.0);
    }
}
