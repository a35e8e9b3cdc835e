//! Audio figures of a run, the way AES17 describes them: THD+N of the scenario's tone over a band, the dynamic
//! range from a -60 dBFS tone A-weighted, the idle-channel noise, and the frequency response over the band.
//!
//! The main run gives THD+N. Three more runs of the same chain are made here, in parallel, with the engine's
//! lean run ([`pipeline::run_lean`]), each the scenario as run with only its source changed:
//! - the tone at -60 dBFS (the converter's full scale referred back to the source through the gain of the
//!   stages before it at the tone's frequency);
//! - the source silent (a sine of amplitude 0: the chain's idle channel);
//! - a multitone of [`RESPONSE_TONES`] tones spaced evenly on a log axis over the band (one of them moved to
//!   1 kHz when it lies within 10 % of it, else a tone at 1 kHz added), with Schroeder's phases, their
//!   amplitudes summing to half of full scale, the run lengthened so its record holds [`RESPONSE_CYCLES`]
//!   cycles of the lowest tone.
//!
//! Every figure is taken on the analog output (full scale: the converter's full scale carried to the output by
//! the chain's measured gain at the tone) and on the ADC's codes (full scale: half the converter's range).

use crate::engine::pipeline::{self, RunOutput};
use crate::engine::plan::Plan;
use crate::error::{Error, Result};
use crate::measure::audio::{
    self, AudioFigures, BandPower, ResponsePoint, Timed, Weighting, band_power,
};
use crate::measure::chain::ChainMetrics;
use crate::measure::spectrum::{Spectrum, SpectrumAnalyzer};
use crate::scenario::{Scenario, Tone, Waveform, WindowKind};
use crate::signal::stream::CodeRecord;

/// The level of the dynamic range's tone (dBFS), AES17's.
pub const DYNAMIC_RANGE_LEVEL_DBFS: f64 = -60.0;
/// Tones of the response run spaced evenly on a log axis over the band.
pub const RESPONSE_TONES: usize = 11;
/// Cycles of the lowest tone the response run's record holds at least.
pub const RESPONSE_CYCLES: f64 = 10.0;
/// The response is stated relative to the tone nearest this frequency (Hz).
pub const RESPONSE_REFERENCE_HZ: f64 = 1000.0;
/// Idle noise under this level (dBFS) is reported as silence (absent): 2^-50 of full scale, far below the
/// floor of any converter (24 bits reach about -146 dBFS), only the rounding of a constant record is there.
pub const SILENCE_DBFS: f64 = -300.0;
/// The default band (Hz): the audio band of AES17's measurements.
pub const DEFAULT_BAND_HZ: (f64, f64) = (20.0, 20_000.0);

/// The `audio` object of report.json.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct AudioReport {
    /// The band used (Hz): as asked, its top clipped to the converter's Nyquist frequency and the output
    /// record's passband.
    pub band_hz: [f64; 2],
    /// Level of the dynamic range's tone (dBFS).
    pub dynamic_range_level_dbfs: f64,
    /// Figures of the analog output.
    pub output: AudioFigures,
    /// Figures of the ADC's codes.
    pub adc: AudioFigures,
}

fn as_timed(r: &(Vec<f64>, f64, f64)) -> Timed<'_> {
    Timed {
        volts: &r.0,
        rate_hz: r.1,
        t0_s: r.2,
    }
}

/// A record of one of the extra runs, as plain data (the run itself stays on its thread).
struct Records {
    source: (Vec<f64>, f64, f64),
    output: (Vec<f64>, f64, f64),
    adc: (Vec<f64>, f64, f64),
}

/// The ADC's codes as volts (each code at its level's centre), its rate and the first code's sampling instant.
fn code_volts(codes: &CodeRecord, range_v: (f64, f64)) -> (Vec<f64>, f64, f64) {
    let q = (range_v.1 - range_v.0) / f64::powi(2.0, codes.bits as i32);
    let v = codes
        .codes
        .iter()
        .map(|c| range_v.0 + (f64::from(c.code) + 0.5) * q)
        .collect();
    let t0 = codes.codes.first().map_or(0.0, |c| c.t_sample_s);
    (v, codes.sample_rate_hz, t0)
}

fn records(run: &RunOutput) -> Result<Records> {
    let (Some(plan), Some(codes)) = (&run.plan.adc, &run.adc_codes) else {
        return Err(Error::Run("the audio run made no ADC record".into()));
    };
    Ok(Records {
        source: (
            run.source_record.volts.clone(),
            run.source_record.timebase.rate_hz,
            run.source_record.t0_s(),
        ),
        output: (
            run.output_record.volts.clone(),
            run.output_record.timebase.rate_hz,
            run.output_record.t0_s(),
        ),
        adc: code_volts(codes, plan.range_v),
    })
}

fn lean_records(sc: &Scenario) -> Result<Records> {
    let run = pipeline::run_lean(sc)?;
    let r = records(&run);
    run.recycle();
    r
}

fn spectrum(x: &[f64], rate_hz: f64, window: WindowKind) -> Result<Spectrum> {
    SpectrumAnalyzer::new(x.len(), window)?.power_spectrum(x, rate_hz)
}

/// The scenario as run with its source's waveform replaced.
fn with_waveform(sc: &Scenario, waveform: Waveform) -> Scenario {
    let mut s = sc.clone();
    s.source.waveform = waveform;
    s
}

/// The response run's tones over `band_hz` (the lowest at least a thousandth of the highest, the highest under
/// 0.45 of the converter's rate), with one at exactly 1 kHz (when the band holds it): the tone within 10 % of
/// it is moved there, or one is added.
pub fn response_tones_hz(band_hz: (f64, f64), adc_rate_hz: f64) -> Vec<f64> {
    let high = band_hz.1.min(0.45 * adc_rate_hz);
    let low = band_hz.0.max(high / 1000.0);
    let mut tones = audio::log_tones_hz(low, high, RESPONSE_TONES);
    let r = RESPONSE_REFERENCE_HZ;
    if r > low && r < high {
        match tones.iter().position(|f| (f / r - 1.0).abs() < 0.1) {
            Some(i) => tones[i] = r,
            None => {
                tones.push(r);
                tones.sort_by(f64::total_cmp);
            }
        }
    }
    tones
}

/// The band asked for made the band used: its top clipped to the converter's Nyquist frequency and the output
/// record's flat passband. Bad input when nothing is left.
pub fn band_used(
    asked_hz: (f64, f64),
    adc_rate_hz: f64,
    out_passband_hz: f64,
) -> Result<(f64, f64)> {
    let high = asked_hz.1.min(0.5 * adc_rate_hz).min(out_passband_hz);
    if !(asked_hz.0 >= 0.0 && high > asked_hz.0) {
        return Err(Error::BadInput(format!(
            "--audio-band {} Hz..{} Hz: nothing of it lies under the converter's Nyquist frequency ({} Hz) and \
             the output record's passband ({} Hz); give a band below them",
            asked_hz.0,
            asked_hz.1,
            0.5 * adc_rate_hz,
            out_passband_hz
        )));
    }
    Ok((asked_hz.0, high))
}

/// Figures of one record from the four runs' spectra and the response points.
struct Inputs<'a> {
    band_hz: (f64, f64),
    f0_hz: f64,
    full_scale_v: f64,
    main: &'a Spectrum,
    low_level: &'a Spectrum,
    idle: &'a Spectrum,
    response: Vec<ResponsePoint>,
}

fn figures(i: &Inputs<'_>) -> Result<AudioFigures> {
    let finite = |x: f64| x.is_finite().then_some(x);
    let main = band_power(i.main, i.band_hz, Some(i.f0_hz), Weighting::Flat)?;
    let thd_n = audio::thd_n(&main);
    let low: BandPower = band_power(i.low_level, i.band_hz, Some(i.f0_hz), Weighting::A)?;
    let dynamic_range_db =
        audio::thd_n(&low).and_then(|(db, _)| finite(-DYNAMIC_RANGE_LEVEL_DBFS - db));
    let idle_a = band_power(i.idle, i.band_hz, None, Weighting::A)?;
    let idle = band_power(i.idle, i.band_hz, None, Weighting::Flat)?;
    // An idle channel with no noise source reads digital silence (rounding dust far under any converter's
    // floor): no figure.
    let noise = |p: f64| {
        let d = audio::dbfs(p, i.full_scale_v);
        (d > SILENCE_DBFS).then_some(d)
    };
    Ok(AudioFigures {
        full_scale_v: i.full_scale_v,
        thd_n_db: thd_n.and_then(|t| finite(t.0)),
        thd_n_pct: thd_n.and_then(|t| finite(t.1)),
        dynamic_range_db,
        noise_a_dbfs: noise(idle_a.residual_v2),
        noise_dbfs: noise(idle.residual_v2),
        response_db: audio::summarise_response(&i.response, RESPONSE_REFERENCE_HZ),
    })
}

/// What `--audio` needs of a scenario, checked before it runs: a sine source and a converter, and a band
/// that something of is left under the converter's Nyquist frequency. Returns the band used.
pub fn check(sc: &Scenario, plan: &Plan, band_hz: (f64, f64)) -> Result<(f64, f64)> {
    if !matches!(sc.source.waveform, Waveform::Sine { .. }) {
        return Err(Error::BadInput(format!(
            "{}: --audio needs a sine source ([source] waveform = \"sine\"): its figures are taken with the \
             scenario's tone",
            sc.origin
        )));
    }
    let Some(adc) = &plan.adc else {
        return Err(Error::BadInput(format!(
            "{}: --audio needs a converter in the chain: its figures are in dBFS, relative to the converter's \
             full scale",
            sc.origin
        )));
    };
    let band = band_used(band_hz, adc.sample_rate_hz, plan.out_wide_band_hz)?;
    if let Some(f0) = sc.source.waveform.fundamental_hz()
        && (f0 <= band.0 || f0 >= band.1)
    {
        return Err(Error::BadInput(format!(
            "{}: the audio band {} Hz..{} Hz does not hold the source's tone ({f0} Hz): THD+N is measured \
             around it; give a band that holds it",
            sc.origin, band.0, band.1
        )));
    }
    Ok(band)
}

/// The audio figures of a finished run (its metrics measured) over `band_hz` (see the module doc). Bad input
/// when the source is not a sine or the chain has no converter.
pub fn audio_figures(
    run: &RunOutput,
    metrics: &ChainMetrics,
    band_hz: (f64, f64),
) -> Result<AudioReport> {
    let sc = &run.scenario;
    let band = check(sc, &run.plan, band_hz)?;
    let Waveform::Sine {
        frequency_hz: f0,
        phase_rad,
        ..
    } = sc.source.waveform
    else {
        return Err(Error::Run("the audio figures need a sine source".into()));
    };
    let (Some(adc_plan), Some(adc_detail)) = (&run.plan.adc, &metrics.detail.adc) else {
        return Err(Error::Run("the run made no ADC record".into()));
    };
    let adc_full_scale_v = 0.5 * (adc_plan.range_v.1 - adc_plan.range_v.0);
    if !(run.pre_gain.is_finite() && run.pre_gain > 0.0) {
        return Err(Error::Run(
            "the stages before the converter pass nothing at the tone: no full scale at the source"
                .into(),
        ));
    }
    let source_full_scale_v = adc_full_scale_v / run.pre_gain;
    let gain_db = metrics
        .output
        .gain_db
        .ok_or_else(|| Error::Run("the chain's gain at the tone could not be measured".into()))?;
    let output_full_scale_v = source_full_scale_v * 10f64.powf(gain_db / 20.0);

    // The extra runs.
    let low_level = with_waveform(
        sc,
        Waveform::Sine {
            frequency_hz: f0,
            amplitude_v: source_full_scale_v * 10f64.powf(DYNAMIC_RANGE_LEVEL_DBFS / 20.0),
            phase_rad,
        },
    );
    let idle = with_waveform(
        sc,
        Waveform::Sine {
            frequency_hz: f0,
            amplitude_v: 0.0,
            phase_rad,
        },
    );
    let tones_hz = response_tones_hz(band, adc_plan.sample_rate_hz);
    let amplitude_v = 0.5 * source_full_scale_v / tones_hz.len() as f64;
    let mut response = with_waveform(
        sc,
        Waveform::Multitone {
            tones: tones_hz
                .iter()
                .zip(audio::schroeder_phases_rad(tones_hz.len()))
                .map(|(&frequency_hz, phase_rad)| Tone {
                    frequency_hz,
                    amplitude_v,
                    phase_rad,
                })
                .collect(),
        },
    );
    let record_s = RESPONSE_CYCLES / tones_hz[0];
    response.simulation.duration_s = response
        .simulation
        .duration_s
        .max(response.simulation.settle_s + record_s);
    let (low_run, (idle_run, resp_run)) = rayon::join(
        || lean_records(&low_level),
        || rayon::join(|| lean_records(&idle), || lean_records(&response)),
    );
    let (low_run, idle_run, resp_run) = (low_run?, idle_run?, resp_run?);

    let window = sc.analysis.window;
    // Output: phases unwrapped by the main run's measured latency.
    let mut out_points = audio::tone_response(
        as_timed(&resp_run.source),
        as_timed(&resp_run.output),
        &tones_hz,
    );
    audio::unwrap_with_delay(&mut out_points, metrics.latency.measured_s);
    // ADC codes: phases unwrapped by the phase delay at the lowest tone (unambiguous up to half its period).
    let mut adc_points = audio::tone_response(
        as_timed(&resp_run.source),
        as_timed(&resp_run.adc),
        &tones_hz,
    );
    if let Some(first) = adc_points.first() {
        let tau_s = -first.phase_deg / (360.0 * first.frequency_hz);
        audio::unwrap_with_delay(&mut adc_points, tau_s);
    }

    let out_low = spectrum(&low_run.output.0, low_run.output.1, window)?;
    let out_idle = spectrum(&idle_run.output.0, idle_run.output.1, window)?;
    let output = figures(&Inputs {
        band_hz: band,
        f0_hz: f0,
        full_scale_v: output_full_scale_v,
        main: &metrics.detail.output.spectrum,
        low_level: &out_low,
        idle: &out_idle,
        response: out_points,
    })?;
    let adc_low = spectrum(&low_run.adc.0, low_run.adc.1, window)?;
    let adc_idle = spectrum(&idle_run.adc.0, idle_run.adc.1, window)?;
    let adc = figures(&Inputs {
        band_hz: band,
        f0_hz: f0,
        full_scale_v: adc_full_scale_v,
        main: &adc_detail.spectrum,
        low_level: &adc_low,
        idle: &adc_idle,
        response: adc_points,
    })?;
    Ok(AudioReport {
        band_hz: [band.0, band.1],
        dynamic_range_level_dbfs: DYNAMIC_RANGE_LEVEL_DBFS,
        output,
        adc,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_response_tones_span_the_band_and_include_the_reference() {
        let t = response_tones_hz((20.0, 20_000.0), 48_000.0);
        assert_eq!(t.len(), RESPONSE_TONES + 1);
        assert!((t[0] - 20.0).abs() < 1e-9 && (t[t.len() - 1] - 20_000.0).abs() < 1e-6);
        assert!(t.contains(&1000.0));
        assert!(t.windows(2).all(|w| w[1] > w[0]));
        // A tone near 1 kHz is moved onto it.
        // (105 Hz .. 10.5 kHz in 11 tones: the 6th at 1050 Hz.)
        let t = response_tones_hz((105.0, 10_500.0), 48_000.0);
        assert_eq!(t.len(), RESPONSE_TONES);
        assert!(t.contains(&1000.0) && (t[0] - 105.0).abs() < 1e-9);
        // Clipped under the converter's Nyquist frequency, and the lowest never 0 on a log axis.
        let t = response_tones_hz((0.0, 20_000.0), 8_000.0);
        assert!((t[t.len() - 1] - 3600.0).abs() < 1e-6 && (t[0] - 3.6).abs() < 1e-9);
        assert!(band_used((20.0, 20_000.0), 48_000.0, 1e5).unwrap() == (20.0, 20_000.0));
        assert!(band_used((20.0, 20_000.0), 16_000.0, 1e5).unwrap() == (20.0, 8_000.0));
        assert!(band_used((9_000.0, 20_000.0), 16_000.0, 1e5).is_err());
    }
}
