//! Measuring one recorded sine whose frequency is not known beforehand (a capture made outside convchain):
//! the fundamental by a four-parameter sine fit (IEEE Std 1241, started from the FFT-peak estimate), then the
//! same meters `run` applies to its records: the windowed power spectrum ([`SpectrumAnalyzer`]) read by
//! [`metrics::tone_metrics`] at the fitted frequency, and the fit-residual ENOB
//! ([`sinefit::enob_from_residual`]) when the converter's resolution and full scale are known.
//!
//! A capture's tone is not coherent with its record, so the window's side lobes spread it over the whole
//! spectrum: a non-coherent tone alone reads about 88 dB of SNR through the default Blackman-Harris window
//! (its side lobes are at -92 dB), which would cap what a 16- or 24-bit recording can show. So the noise,
//! harmonics and spurs are read from the spectrum of the record with the fitted sine subtracted (the tone left
//! there is the fit's error, far below the noise), by the same [`metrics::tone_metrics`] bookkeeping of lobes,
//! bands and folding; the fundamental's power is the fit's `A^2 / 2`. For a coherent record both ways give
//! the same figures (a test below checks it).

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
            "the measurement band ends at {b} Hz, below the fundamental at {:.6} Hz; give a band that holds it",
            fit.frequency_hz
        )));
    }
    // The record less the fitted sine (x ~ a cos(w t) + b sin(w t) + c, t = t0 + i / fs; see sinefit).
    let w = std::f64::consts::TAU * fit.frequency_hz;
    let residual: Vec<f64> = x
        .iter()
        .enumerate()
        .map(|(i, v)| {
            let (s, c) = (w * (t0_s + i as f64 / sample_rate_hz)).sin_cos();
            v - (fit.a * c + fit.b * s)
        })
        .collect();
    let residual_spectrum = an.power_spectrum(&residual, sample_rate_hz)?;
    drop(residual);
    let mcfg = MetricsConfig {
        harmonics: cfg.harmonics,
        band_hz: cfg.band_hz,
        full_scale_peak_v: full_scale_peak,
        fundamental_hz: Some(fit.frequency_hz),
    };
    let as_bad_input = |e: Error| match e {
        Error::Run(m) => Error::BadInput(format!("the record cannot be measured: {m}")),
        other => other,
    };
    let rest = metrics::tone_metrics(&residual_spectrum, &mcfg).map_err(as_bad_input)?;
    let tones = with_fundamental(rest, &fit, fit.frequency_hz, full_scale_peak);
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

/// The figures of `rest` (read from the record less the fitted sine) referred to the fitted fundamental
/// `fit` (power A^2 / 2): SNR, SINAD, THD, SFDR, ENOB and each harmonic's dBc as [`metrics`] defines them.
fn with_fundamental(
    rest: ToneMetrics,
    fit: &SineFit,
    fundamental_hz: f64,
    full_scale_peak: f64,
) -> ToneMetrics {
    let a = fit.amplitude_v;
    let p_fund = 0.5 * a * a;
    let db10 = |r: f64| 10.0 * r.log10();
    let sinad_db = db10(p_fund / rest.nad_power_v2);
    // ENOB = (SINAD - 10 log10(3/2) + 20 log10(A_fs / A)) / 20 log10(2), as metrics.rs writes it.
    let enob_bits =
        (sinad_db - db10(1.5) + 20.0 * (full_scale_peak / a).log10()) / (20.0 * 2f64.log10());
    let harmonics = rest
        .harmonics
        .into_iter()
        .map(|mut h| {
            h.dbc = db10(h.power_v2 / p_fund);
            h
        })
        .collect();
    ToneMetrics {
        fundamental_hz,
        fundamental_amplitude_v: a,
        fundamental_power_v2: p_fund,
        snr_db: db10(p_fund / rest.noise_power_v2),
        sinad_db,
        // -inf when no harmonic is counted, +inf when there is no spur, as in metrics.rs.
        thd_db: db10(rest.harmonic_power_v2 / p_fund),
        sfdr_dbc: db10(p_fund / rest.largest_spur_power_v2),
        enob_bits,
        harmonics,
        ..rest
    }
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
    fn a_coherent_record_reads_as_the_run_meters_read_it() {
        // One bookkeeping: on a coherent record (no leakage) the figures read with the fitted sine removed
        // equal tone_metrics on the record itself, as `run` calls it, to within the fit's error (0.01 dB).
        use crate::measure::coherent::coherent_frequency;
        let n = 1 << 14;
        let (f, _) = coherent_frequency(0.0713, 1.0, n).unwrap();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let noise = Normal::new(0.0, 1e-4).unwrap();
        let x: Vec<f64> = (0..n)
            .map(|i| {
                let th = TAU * f * i as f64;
                0.8 * th.sin()
                    + 0.008 * (2.0 * th).sin()
                    + 0.002 * (3.0 * th + 1.0).sin()
                    + noise.sample(&mut rng)
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
                fundamental_hz: Some(f),
            },
        )
        .unwrap();
        let t = &r.tones;
        for (what, a, b) in [
            ("SNR", t.snr_db, direct.snr_db),
            ("SINAD", t.sinad_db, direct.sinad_db),
            ("THD", t.thd_db, direct.thd_db),
            ("SFDR", t.sfdr_dbc, direct.sfdr_dbc),
            ("ENOB", t.enob_bits, direct.enob_bits),
            ("floor", t.noise_floor_dbfs, direct.noise_floor_dbfs),
        ] {
            assert!((a - b).abs() < 0.01, "{what}: {a} vs {b}");
        }
        // And both read the harmonics added: THD = 10 log10((a2^2 + a3^2) / a1^2) (IEEE Std 1241).
        let thd = 10.0 * ((0.008f64.powi(2) + 0.002f64.powi(2)) / 0.64).log10();
        assert!((t.thd_db - thd).abs() < 0.05, "{} vs {thd}", t.thd_db);
    }

    #[test]
    fn a_non_coherent_tone_is_not_limited_by_the_windows_leakage() {
        // A tone between bins leaks through Blackman-Harris's -92 dB side lobes: read directly, a pure
        // non-coherent tone shows about 88 dB of SNR. With the fitted sine removed first, a 110 dB SNR (by
        // the IEEE Std 1241 definition, (A^2/2)/sigma^2) reads back within 0.2 dB, the noise estimate's spread
        // being about 0.03 dB here.
        let n = 1 << 16;
        let (a, f) = (0.9, 0.021_234_567);
        let sigma = (a * a / 2.0 / 1e11_f64).sqrt();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let noise = Normal::new(0.0, sigma).unwrap();
        let x: Vec<f64> = (0..n)
            .map(|i| a * (TAU * f * i as f64 + 0.5).sin() + noise.sample(&mut rng))
            .collect();
        let r = measure_sine_record(&x, 1.0, 0.0, &cfg()).unwrap();
        assert!((r.tones.snr_db - 110.0).abs() < 0.2, "{}", r.tones.snr_db);
        let mut an = SpectrumAnalyzer::new(n, WindowKind::BlackmanHarris).unwrap();
        let s = an.power_spectrum(&x, 1.0).unwrap();
        let mut c = MetricsConfig {
            harmonics: 9,
            band_hz: None,
            full_scale_peak_v: 1.0,
            fundamental_hz: Some(f),
        };
        c.fundamental_hz = Some(r.fit.frequency_hz);
        let direct = metrics::tone_metrics(&s, &c).unwrap();
        assert!(
            direct.snr_db < 100.0,
            "the direct reading is leakage-limited: {}",
            direct.snr_db
        );
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
