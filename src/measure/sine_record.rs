//! Measuring one recorded sine whose frequency is not known beforehand (a capture made outside convchain):
//! the fundamental by a four-parameter sine fit (IEEE Std 1241, started from the FFT-peak estimate), then the
//! same meters `run` applies to its records: the windowed power spectrum ([`SpectrumAnalyzer`]) read by
//! [`metrics::tone_metrics`] at the fitted frequency, and the fit-residual ENOB
//! ([`sinefit::enob_from_residual`]) when the converter's resolution and full scale are known.

use crate::error::{Error, Result};
use crate::measure::metrics::{self, MetricsConfig, ToneMetrics};
use crate::measure::sinefit::{self, SineFit};
use crate::measure::spectrum::{Spectrum, SpectrumAnalyzer};
use crate::scenario::WindowKind;

/// Shortest record measured (samples): a few cycles of a tone and room for the window's lobes.
pub const MIN_SAMPLES: usize = 64;

/// How to measure a recorded sine.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SineRecordConfig {
    pub window: WindowKind,
    /// Highest harmonic order counted in THD and removed for SNR.
    pub harmonics: u32,
    /// Upper edge of the measurement band (Hz); None = the Nyquist frequency.
    pub band_hz: Option<f64>,
    /// Peak of a full-scale sine in the record's unit; None = the fitted amplitude (ENOB and dBFS are then
    /// relative to the signal itself).
    pub full_scale_peak: Option<f64>,
    /// The converter's resolution, for the fit-residual ENOB (which also needs `full_scale_peak`).
    pub bits: Option<u32>,
}

/// A recorded sine, measured.
#[derive(Debug, Clone)]
pub struct SineRecord {
    /// The four-parameter fit: frequency, amplitude, phase, offset and residual rms.
    pub fit: SineFit,
    pub spectrum: Spectrum,
    /// The spectral metrics at the fitted frequency.
    pub tones: ToneMetrics,
    /// The full scale the metrics are referred to (given, or the fitted amplitude).
    pub full_scale_peak: f64,
    /// IEEE Std 1241 fit-residual ENOB: N - log2(residual rms / (q / sqrt 12)), q = 2 full scale / 2^N; None
    /// without `bits` and `full_scale_peak`.
    pub enob_sinefit_bits: Option<f64>,
}

/// Measure the sine in `x` (sampled at `sample_rate_hz`, first sample at `t0_s`). Errors (as bad input, since
/// the record is the user's) on a record too short, one that does not move, or a band that leaves the
/// fundamental out.
pub fn measure_sine_record(
    x: &[f64],
    sample_rate_hz: f64,
    t0_s: f64,
    cfg: &SineRecordConfig,
) -> Result<SineRecord> {
    let n = x.len();
    if n < MIN_SAMPLES {
        return Err(Error::BadInput(format!(
            "the record has {n} samples; measuring a sine needs at least {MIN_SAMPLES} (several cycles)"
        )));
    }
    if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
        return Err(Error::BadInput(format!(
            "the sample rate {sample_rate_hz} Hz is not usable"
        )));
    }
    let mean = x.iter().sum::<f64>() / n as f64;
    if x.iter().all(|v| *v == x[0]) || !mean.is_finite() {
        return Err(Error::BadInput(
            "the record does not move (every sample is the same): there is no sine to measure"
                .into(),
        ));
    }
    let f_start = sinefit::estimate_frequency_hz(x, sample_rate_hz);
    let fit = sinefit::fit4(x, sample_rate_hz, f_start, t0_s);
    if !(fit.amplitude_v.is_finite() && fit.amplitude_v > 0.0 && fit.frequency_hz.is_finite()) {
        return Err(Error::Run(format!(
            "no sine could be fitted to the record (the strongest tone was near {f_start:.6} Hz); analyse a \
             record that holds one sine"
        )));
    }
    let mut an = SpectrumAnalyzer::new(n, cfg.window)?;
    let spectrum = an.power_spectrum(x, sample_rate_hz)?;
    let full_scale_peak = cfg.full_scale_peak.unwrap_or(fit.amplitude_v);
    if let Some(b) = cfg.band_hz
        && b < fit.frequency_hz
    {
        return Err(Error::BadInput(format!(
            "--band {b} Hz lies below the fundamental at {:.6} Hz; give a band that holds it",
            fit.frequency_hz
        )));
    }
    let tones = metrics::tone_metrics(
        &spectrum,
        &MetricsConfig {
            harmonics: cfg.harmonics,
            band_hz: cfg.band_hz,
            full_scale_peak_v: full_scale_peak,
            fundamental_hz: Some(fit.frequency_hz),
        },
    )
    .map_err(|e| match e {
        Error::Run(m) => Error::BadInput(format!("the record cannot be measured: {m}")),
        other => other,
    })?;
    let enob_sinefit_bits = match (cfg.bits, cfg.full_scale_peak) {
        (Some(bits), Some(fs)) => {
            let q = 2.0 * fs / f64::powi(2.0, bits as i32);
            Some(sinefit::enob_from_residual(bits, q, fit.residual_rms_v)).filter(|v| v.is_finite())
        }
        _ => None,
    };
    Ok(SineRecord {
        fit,
        spectrum,
        tones,
        full_scale_peak,
        enob_sinefit_bits,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};
    use std::f64::consts::TAU;

    fn cfg() -> SineRecordConfig {
        SineRecordConfig {
            window: WindowKind::BlackmanHarris,
            harmonics: 9,
            band_hz: None,
            full_scale_peak: Some(1.0),
            bits: None,
        }
    }

    #[test]
    fn a_non_coherent_sine_in_noise_gives_back_its_frequency_amplitude_and_snr() {
        // Oracle: SNR = (A^2/2) / sigma^2 for white Gaussian noise of variance sigma^2 over the Nyquist band
        // (IEEE Std 1241 definition of SNR). With 2^16 samples and Blackman-Harris the noise estimate's
        // relative standard deviation is about 0.8 %, 0.03 dB; 0.2 dB is six of those. The fit's frequency
        // and amplitude errors are bounded by the Cramer-Rao bounds (S. M. Kay, 1993, Fundamentals of
        // Statistical Signal Processing: Estimation Theory, ch. 3): sd(A) = sigma sqrt(2/N),
        // sd(f) = fs sqrt(12 / ((2 pi)^2 N^3 SNR)); we allow ten of each.
        let n = 1 << 16;
        let fs = 48_000.0;
        let (a, f, sigma) = (0.5, 997.3, 5e-4);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        let noise = Normal::new(0.0, sigma).unwrap();
        let x: Vec<f64> = (0..n)
            .map(|i| a * (TAU * f * i as f64 / fs + 0.3).sin() + 0.01 + noise.sample(&mut rng))
            .collect();
        let r = measure_sine_record(&x, fs, 0.0, &cfg()).unwrap();
        let snr: f64 = (a * a / 2.0) / (sigma * sigma);
        assert!(
            (r.tones.snr_db - 10.0 * snr.log10()).abs() < 0.2,
            "{}",
            r.tones.snr_db
        );
        let sd_a = sigma * (2.0 / n as f64).sqrt();
        assert!(
            (r.fit.amplitude_v - a).abs() < 10.0 * sd_a,
            "{}",
            r.fit.amplitude_v
        );
        let sd_f = fs * (12.0 / (TAU * TAU * (n as f64).powi(3) * snr)).sqrt();
        assert!(
            (r.fit.frequency_hz - f).abs() < 10.0 * sd_f,
            "{}",
            r.fit.frequency_hz
        );
        assert!((r.fit.c - 0.01).abs() < 10.0 * sd_a);
    }

    #[test]
    fn the_spectral_figures_are_the_run_meters_at_the_fitted_frequency() {
        // One code path: the same analyser and tone_metrics call gives the same numbers, bit for bit.
        let n = 4096;
        let x: Vec<f64> = (0..n)
            .map(|i| {
                let th = TAU * 0.0713 * i as f64;
                th.sin() + 0.01 * (2.0 * th).sin()
            })
            .collect();
        let r = measure_sine_record(&x, 1.0, 0.0, &cfg()).unwrap();
        let mut an = SpectrumAnalyzer::new(n, WindowKind::BlackmanHarris).unwrap();
        let s = an.power_spectrum(&x, 1.0).unwrap();
        let direct = metrics::tone_metrics(
            &s,
            &MetricsConfig {
                harmonics: 9,
                band_hz: None,
                full_scale_peak_v: 1.0,
                fundamental_hz: Some(r.fit.frequency_hz),
            },
        )
        .unwrap();
        assert_eq!(r.tones, direct);
        // THD of a -40 dBc second harmonic (definition, IEEE Std 1241).
        assert!((r.tones.thd_db + 40.0).abs() < 0.05, "{}", r.tones.thd_db);
    }

    #[test]
    fn the_fit_enob_of_an_ideal_quantizer_is_its_resolution() {
        // An ideal N-bit quantizer driven near full scale leaves a residual of q/sqrt(12) (W. R. Bennett, BSTJ
        // 1948), so the IEEE Std 1241 fit ENOB is N; 0.1 bit allows for the finite record.
        let n = 1 << 14;
        let bits = 10;
        let q = 2.0 / f64::powi(2.0, bits);
        let x: Vec<f64> = (0..n)
            .map(|i| {
                let v = 0.99 * (TAU * 0.01234567 * i as f64).sin();
                ((v / q).floor() + 0.5) * q
            })
            .collect();
        let mut c = cfg();
        c.bits = Some(bits as u32);
        let r = measure_sine_record(&x, 1.0, 0.0, &c).unwrap();
        let e = r.enob_sinefit_bits.unwrap();
        assert!((e - bits as f64).abs() < 0.1, "{e}");
        // Without a full scale there is no fit ENOB, and the SINAD ENOB is referred to the signal.
        c.full_scale_peak = None;
        let r = measure_sine_record(&x, 1.0, 0.0, &c).unwrap();
        assert!(r.enob_sinefit_bits.is_none());
        assert!((r.full_scale_peak - 0.99).abs() < 1e-3);
    }

    #[test]
    fn silence_a_short_record_and_a_band_below_the_tone_are_refused() {
        let e = measure_sine_record(&[0.25; 1000], 1.0, 0.0, &cfg()).unwrap_err();
        assert!(
            e.is_bad_input() && e.to_string().contains("does not move"),
            "{e}"
        );
        let e = measure_sine_record(&[0.0, 1.0, 0.0], 1.0, 0.0, &cfg()).unwrap_err();
        assert!(e.to_string().contains("at least 64"), "{e}");
        let x: Vec<f64> = (0..1000).map(|i| (TAU * 0.1 * i as f64).sin()).collect();
        let mut c = cfg();
        c.band_hz = Some(0.05);
        let e = measure_sine_record(&x, 1.0, 0.0, &c).unwrap_err();
        assert!(
            e.is_bad_input() && e.to_string().contains("below the fundamental"),
            "{e}"
        );
    }
}
