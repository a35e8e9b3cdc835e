//! Measuring a whole run: the ADC record, the analog output, fidelity and latency, with the definitions of
//! IEEE Std 1241 (ADC) and IEEE Std 1658 (DAC) applied through the meters of this module.

use serde::Serialize;

use crate::error::Result;
use crate::measure::latency::{self, BudgetLine};
use crate::measure::metrics::{self, MetricsConfig, ToneMetrics};
use crate::measure::spectrum::{Spectrum, SpectrumAnalyzer};
use crate::measure::{fidelity, sinefit};
use crate::scenario::{Analysis, Waveform};
use crate::signal::stream::CodeRecord;
use crate::stages::source::SourceGen;

/// A finished run as the meters read it: the records, the figures of the run's plan, and what the chain's
/// models state about themselves (the latency budget, the gain before the converter) as data.
pub struct RunRecords<'a> {
    pub analysis: &'a Analysis,
    /// The source's waveform as run (a sine moved to its coherent frequency).
    pub waveform: &'a Waveform,
    /// The fundamental of single-tone periodic sources (Hz).
    pub frequency_hz: Option<f64>,
    pub adc: Option<AdcRecord<'a>>,
    pub codes_clipped: u64,
    /// Overloads of a noise-shaping loop (`None` without one).
    pub modulator_overloads: Option<u64>,
    /// Overloads of the DAC's noise-shaping loop (`None` without one).
    pub dac_modulator_overloads: Option<u64>,
    pub bits_flipped: u64,
    /// The clock-crossing FIFO's record, when the DAC reads through one.
    pub slips: Option<&'a crate::engine::clock::SlipRecord>,
    /// The slips that reach the output inside its analysis record.
    pub record_slips: Option<crate::engine::pipeline::RecordSlips>,
    /// Packets lost by networks, and the instants they should have played (s).
    pub packets_lost: u64,
    pub packet_loss_times_s: &'a [f64],
    /// Rate and band of the output analysis record (Hz).
    pub out_rate_hz: f64,
    pub out_band_hz: f64,
    /// The output record's flat passband: the wideband figures are taken over it when it is wider than
    /// `out_band_hz`.
    pub out_wide_band_hz: f64,
    /// Band-limited, decimated source and output over the output analysis record (same instants, V).
    pub source_record: &'a [f64],
    pub output_record: &'a [f64],
    pub capture: GridRecord<'a>,
    /// Each stage's own delay at the fundamental (or group delay for broadband sources).
    pub budget: &'a [BudgetLine],
    /// Gain of the analog stages before the converter at the fundamental (V/V).
    pub pre_gain: f64,
    /// The source, evaluated exactly at delayed instants when it is closed-form.
    pub source: &'a SourceGen,
}

/// The ADC's record with its converter's figures.
pub struct AdcRecord<'a> {
    pub sample_rate_hz: f64,
    pub conversion_time_s: f64,
    pub bits: u32,
    pub range_v: (f64, f64),
    pub codes: &'a CodeRecord,
}

/// The full-rate grid capture: the source (when captured) and the output.
pub struct GridRecord<'a> {
    pub rate_hz: f64,
    /// Time of the first sample (s).
    pub t0_s: f64,
    pub source: Option<&'a [f64]>,
    pub output: &'a [f64],
}

/// Metrics of the ADC's code record.
#[derive(Debug, Clone, Serialize)]
pub struct AdcMetrics {
    pub bits: u32,
    pub sample_rate_hz: f64,
    pub conversion_time_s: f64,
    pub codes_clipped: u64,
    /// Overloads of the converter's noise-shaping loop (delta-sigma converters only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub modulator_overloads: Option<u64>,
    pub record_length: usize,
    pub fundamental_hz: Option<f64>,
    pub amplitude_v: Option<f64>,
    pub snr_db: Option<f64>,
    pub sinad_db: Option<f64>,
    /// (SINAD - 1.76)/6.02 after adding 20 log10(full scale / amplitude) to SINAD.
    pub enob_bits: Option<f64>,
    /// IEEE Std 1241 form: N - log2(rms residual of a three-parameter sine fit / (q / sqrt 12)).
    pub enob_sinefit_bits: Option<f64>,
    pub thd_db: Option<f64>,
    pub sfdr_dbc: Option<f64>,
    pub noise_floor_dbfs: Option<f64>,
    pub harmonics_counted: u32,
}

/// Metrics of the chain's analog output.
#[derive(Debug, Clone, Serialize)]
pub struct OutputMetrics {
    pub analysis_rate_hz: f64,
    pub band_hz: f64,
    pub record_length: usize,
    pub fundamental_hz: Option<f64>,
    pub amplitude_v: Option<f64>,
    pub snr_db: Option<f64>,
    pub sinad_db: Option<f64>,
    /// Input-referred: SINAD corrected by 20 log10(ADC full scale / signal amplitude at the ADC), then
    /// (SINAD - 1.76)/6.02, so it says how many of the converter's bits survive to the output.
    pub enob_bits: Option<f64>,
    pub thd_db: Option<f64>,
    pub sfdr_dbc: Option<f64>,
    /// Overloads of a delta-sigma DAC's noise-shaping loop (absent for other DACs).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dac_modulator_overloads: Option<u64>,
    /// Output fundamental over source fundamental.
    pub gain_db: Option<f64>,
    /// The same tone figures over the output record's whole flat passband, when it is wider than `band_hz`
    /// (images and out-of-band noise count there).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub wideband: Option<WidebandMetrics>,
    /// Full-bandwidth signal-to-error ratio after the best delay, gain and offset alignment (dB).
    pub fidelity_db: f64,
    pub bits_flipped: u64,
}

/// Tone figures of the analog output over a wider band than the headline's.
#[derive(Debug, Clone, Serialize)]
pub struct WidebandMetrics {
    pub band_hz: f64,
    pub snr_db: Option<f64>,
    pub sinad_db: Option<f64>,
    pub enob_bits: Option<f64>,
    pub thd_db: Option<f64>,
    pub sfdr_dbc: Option<f64>,
}

/// Delay through the chain.
#[derive(Debug, Clone, Serialize)]
pub struct LatencyMetrics {
    /// Cross-correlation delay of the band-limited output record against the source record (the analysis
    /// band, same instants), refined between samples.
    pub measured_s: f64,
    /// Phase delay at the fundamental (sine sources), ambiguity resolved with the correlation estimate.
    pub phase_delay_s: Option<f64>,
    /// Group delay at the tones of a multitone source, or along the sweep of a chirp source
    /// ([`CHIRP_GROUP_DELAY_POINTS`] points per sweep): (frequency, seconds).
    pub group_delay_s: Vec<(f64, f64)>,
    pub budget_s: f64,
    pub budget: Vec<BudgetLine>,
    /// measured - budget.
    pub difference_s: f64,
    /// True when the difference is large (more than 5 % of the budget and more than a tenth of a sample period).
    pub flagged: bool,
    /// Slips of the FIFO between the codes' clock and the DAC's own (repeated plus dropped codes), when the DAC
    /// reads through one ([`crate::engine::clock`]).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub slips: Option<u64>,
    /// Their instants (s), the first [`crate::engine::clock::SLIP_TIMES_MAX`].
    #[serde(skip_serializing_if = "Option::is_none")]
    pub slip_times_s: Option<Vec<f64>>,
    /// The slips that reach the output inside the analysis record (each a one-sample phase step that the
    /// record's SINAD, THD and SNR include), and whether that count is a lower bound (more slips than
    /// instants kept).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub slips_in_record: Option<u64>,
    #[serde(skip_serializing_if = "std::ops::Not::not")]
    pub slips_in_record_at_least: bool,
    /// Packets lost by the chain's networks (arrived after their playout instant; concealed).
    pub packets_lost: u64,
    /// The instants the lost packets should have started playing (run time, s; the first
    /// [`LOSS_TIMES_MAX`](crate::stages::network::LOSS_TIMES_MAX)).
    pub packet_loss_times_s: Vec<f64>,
    /// The measured delay tracked block by block over the output record (`analysis.latency_blocks`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub over_time: Option<latency::LatencyOverTime>,
}

impl LatencyMetrics {
    /// Slips counted, 0 where the chain needs no clock-crossing FIFO (nothing to slip): the studies' column.
    pub fn slip_count(&self) -> u64 {
        self.slips.unwrap_or(0)
    }
}

/// A spectrum kept for plots, with its tone analysis and the full-scale reference of its dBFS.
#[derive(Debug, Clone)]
pub struct SpectrumDetail {
    pub spectrum: Spectrum,
    pub tones: Option<ToneMetrics>,
    pub full_scale_peak_v: f64,
}

/// What plots and listening files need beyond the report's numbers.
#[derive(Debug, Clone)]
pub struct Detail {
    pub adc: Option<SpectrumDetail>,
    pub output: SpectrumDetail,
    /// Best delay, gain and offset of the output against the source (full bandwidth).
    pub alignment: fidelity::Fidelity,
}

/// Everything measured on one run.
#[derive(Debug, Clone, Serialize)]
pub struct ChainMetrics {
    pub adc: Option<AdcMetrics>,
    pub output: OutputMetrics,
    pub latency: LatencyMetrics,
    #[serde(skip)]
    pub detail: Detail,
}

/// How many frequencies of a chirp's sweep the group delay is measured at.
pub const CHIRP_GROUP_DELAY_POINTS: usize = 12;

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// Measure a finished run.
pub fn measure_run(run: &RunRecords<'_>) -> Result<ChainMetrics> {
    let harmonics = run.analysis.harmonics;
    let f0 = run.frequency_hz;
    let sine_like = f0.is_some();

    // The amplitude reaching the converter (source amplitude through the analog stages before it).
    let src_amp = match run.waveform {
        Waveform::Sine { amplitude_v, .. }
        | Waveform::Square { amplitude_v, .. }
        | Waveform::Triangle { amplitude_v, .. }
        | Waveform::Sawtooth { amplitude_v, .. } => Some(*amplitude_v),
        _ => None,
    };
    let pre_gain = run.pre_gain;

    // ---- ADC record
    let mut adc_detail = None;
    let adc = match &run.adc {
        Some(p) => {
            let rec = p.codes;
            let q = (p.range_v.1 - p.range_v.0) / f64::powi(2.0, p.bits as i32);
            let volts: Vec<f64> = rec
                .codes
                .iter()
                .map(|c| p.range_v.0 + (c.code as f64 + 0.5) * q)
                .collect();
            let fs_peak = (p.range_v.1 - p.range_v.0) / 2.0;
            let mut an = SpectrumAnalyzer::new(volts.len(), run.analysis.window)?;
            let spec = an.power_spectrum(&volts, p.sample_rate_hz)?;
            let tm = if sine_like {
                Some(metrics::tone_metrics(
                    &spec,
                    &MetricsConfig {
                        harmonics,
                        band_hz: None,
                        full_scale_peak_v: fs_peak,
                        fundamental_hz: f0,
                    },
                )?)
            } else {
                None
            };
            let enob_fit = f0.map(|f| {
                let t0 = rec.codes.first().map(|c| c.t_sample_s).unwrap_or(0.0);
                let fit = sinefit::fit3(&volts, p.sample_rate_hz, f, t0);
                sinefit::enob_from_residual(p.bits, q, fit.residual_rms_v)
            });
            adc_detail = Some(SpectrumDetail {
                spectrum: spec,
                tones: tm.clone(),
                full_scale_peak_v: fs_peak,
            });
            Some(AdcMetrics {
                bits: p.bits,
                sample_rate_hz: p.sample_rate_hz,
                conversion_time_s: p.conversion_time_s,
                codes_clipped: run.codes_clipped,
                modulator_overloads: run.modulator_overloads,
                record_length: volts.len(),
                fundamental_hz: f0,
                amplitude_v: tm.as_ref().map(|t| t.fundamental_amplitude_v),
                snr_db: tm.as_ref().and_then(|t| finite(t.snr_db)),
                sinad_db: tm.as_ref().and_then(|t| finite(t.sinad_db)),
                enob_bits: tm.as_ref().and_then(|t| finite(t.enob_bits)),
                enob_sinefit_bits: enob_fit.and_then(finite),
                thd_db: tm.as_ref().and_then(|t| finite(t.thd_db)),
                sfdr_dbc: tm.as_ref().and_then(|t| finite(t.sfdr_dbc)),
                noise_floor_dbfs: tm.as_ref().and_then(|t| finite(t.noise_floor_dbfs)),
                harmonics_counted: harmonics,
            })
        }
        _ => None,
    };

    // ---- analog output (band-limited, decimated record)
    let out = run.output_record;
    let src = run.source_record;
    let rate = run.out_rate_hz;
    let mut an = SpectrumAnalyzer::new(out.len(), run.analysis.window)?;
    let src_tm: Option<ToneMetrics>;
    let out_tm: Option<ToneMetrics>;
    let mut wideband = None;
    // The delay of what the chain carries: the source and output records hold the analysis band at the same
    // instants, free of the images and steps above it, in a few thousand samples rather than the capture's
    // hundreds of thousands; the correlation is interpolated exactly between their samples. It needs only the
    // records and the budget, so it runs beside the output's spectrum.
    let budget = run.budget.to_vec();
    let budget_s: f64 = budget.iter().map(|b| b.seconds).sum();
    let period_s = f0.map(|f| 1.0 / f);
    let record_s = src.len() as f64 / rate;
    let (measured_s, spec_out) = rayon::join(
        || measure_delay(src, out, rate, budget_s, period_s, record_s),
        || an.power_spectrum(out, rate),
    );
    let spec_out = spec_out?;
    let mut out_full_scale = run
        .adc
        .as_ref()
        .map(|a| (a.range_v.1 - a.range_v.0) / 2.0)
        .unwrap_or_else(|| src_amp.unwrap_or(1.0).abs().max(1e-30));
    if sine_like {
        let spec_src = an.power_spectrum(src, rate)?;
        src_tm = Some(metrics::tone_metrics(
            &spec_src,
            &MetricsConfig {
                harmonics,
                band_hz: Some(run.out_band_hz),
                full_scale_peak_v: src_amp.unwrap_or(1.0).abs().max(1e-30),
                fundamental_hz: f0,
            },
        )?);
        // Input-referred full scale: the output amplitude that a full-scale signal at the ADC would give.
        let a_in = src_amp.unwrap_or(1.0).abs() * pre_gain;
        let fs_in = run
            .adc
            .as_ref()
            .map(|a| (a.range_v.1 - a.range_v.0) / 2.0)
            .unwrap_or(a_in);
        let first = metrics::tone_metrics(
            &spec_out,
            &MetricsConfig {
                harmonics,
                band_hz: Some(run.out_band_hz),
                full_scale_peak_v: 1.0,
                fundamental_hz: f0,
            },
        )?;
        let a_out = first.fundamental_amplitude_v;
        let full_scale = if a_in > 0.0 {
            a_out * fs_in / a_in
        } else {
            1.0
        };
        out_full_scale = full_scale.max(1e-30);
        let at_band = |band_hz: f64| {
            metrics::tone_metrics(
                &spec_out,
                &MetricsConfig {
                    harmonics,
                    band_hz: Some(band_hz),
                    full_scale_peak_v: full_scale.max(1e-30),
                    fundamental_hz: f0,
                },
            )
        };
        out_tm = Some(at_band(run.out_band_hz)?);
        if run.out_wide_band_hz > run.out_band_hz * (1.0 + 1e-9) {
            let w = at_band(run.out_wide_band_hz)?;
            wideband = Some(WidebandMetrics {
                band_hz: run.out_wide_band_hz,
                snr_db: finite(w.snr_db),
                sinad_db: finite(w.sinad_db),
                enob_bits: finite(w.enob_bits),
                thd_db: finite(w.thd_db),
                sfdr_dbc: finite(w.sfdr_dbc),
            });
        }
    } else {
        src_tm = None;
        out_tm = None;
    }
    let gain_db = match (&src_tm, &out_tm) {
        (Some(s), Some(o)) if s.fundamental_amplitude_v > 0.0 => {
            finite(20.0 * (o.fundamental_amplitude_v / s.fundamental_amplitude_v).log10())
        }
        _ => None,
    };

    // ---- latency on the band-limited analysis records, fidelity on the full-bandwidth grid capture
    let cap = &run.capture;
    let grid_rate = cap.rate_hz;
    let capture_s = cap.output.len() as f64 / grid_rate;
    // The phase delay needs only the fundamental, from the same records.
    let phase_delay_s = f0
        .map(|f| latency::phase_delay_s(src, out, rate, f, measured_s))
        .and_then(finite);
    let group_delay_s = match (run.waveform, cap.source) {
        (Waveform::Multitone { tones }, Some(cap_src)) => {
            let f: Vec<f64> = tones.iter().map(|t| t.frequency_hz).collect();
            latency::group_delay_s(cap_src, cap.output, grid_rate, &f)
        }
        (w @ Waveform::Chirp { .. }, Some(cap_src)) => {
            match latency::ChirpSweep::from_waveform(w) {
                Some(sweep) => latency::chirp_group_delay_s(
                    cap_src,
                    cap.output,
                    grid_rate,
                    cap.t0_s,
                    &sweep,
                    CHIRP_GROUP_DELAY_POINTS,
                ),
                None => Vec::new(),
            }
        }
        _ => Vec::new(),
    };
    // The alignment starts at the measured delay. A closed-form source is evaluated exactly at the delayed
    // instants; a sampled one (noise, WAV) is interpolated from its capture.
    let source = run.source;
    let delay_ok = measured_s.is_finite() && measured_s.abs() < capture_s / 4.0;
    let fid = match cap.source {
        Some(cap_src) if !delay_ok => {
            let max_delay_s = (4.0 * budget_s.abs() + 20.0 / grid_rate).min(capture_s / 4.0);
            fidelity::fidelity(cap_src, cap.output, grid_rate, max_delay_s)
        }
        Some(cap_src) if !source.is_exact() => {
            fidelity::fidelity_at(cap_src, cap.output, grid_rate, measured_s)
        }
        // A closed-form source is evaluated exactly at the delayed instants (at the budget's delay when the
        // correlation found none).
        _ => fidelity::fidelity_exact_at(
            |t0, dt, y| {
                source.fill_at(t0, dt, y);
            },
            cap.output,
            cap.t0_s,
            grid_rate,
            if delay_ok { measured_s } else { budget_s },
        ),
    };
    let difference_s = measured_s - budget_s;
    let sample_period = run
        .adc
        .as_ref()
        .map(|a| 1.0 / a.sample_rate_hz)
        .unwrap_or(1.0 / grid_rate);
    let flagged =
        difference_s.abs() > 0.05 * budget_s.abs() && difference_s.abs() > 0.1 * sample_period;

    let detail = Detail {
        adc: adc_detail,
        output: SpectrumDetail {
            spectrum: spec_out,
            tones: out_tm.clone(),
            full_scale_peak_v: out_full_scale,
        },
        alignment: fid,
    };
    Ok(ChainMetrics {
        detail,
        adc,
        output: OutputMetrics {
            analysis_rate_hz: rate,
            band_hz: run.out_band_hz,
            record_length: out.len(),
            fundamental_hz: f0,
            amplitude_v: out_tm.as_ref().map(|t| t.fundamental_amplitude_v),
            snr_db: out_tm.as_ref().and_then(|t| finite(t.snr_db)),
            sinad_db: out_tm.as_ref().and_then(|t| finite(t.sinad_db)),
            enob_bits: out_tm.as_ref().and_then(|t| finite(t.enob_bits)),
            thd_db: out_tm.as_ref().and_then(|t| finite(t.thd_db)),
            sfdr_dbc: out_tm.as_ref().and_then(|t| finite(t.sfdr_dbc)),
            dac_modulator_overloads: run.dac_modulator_overloads,
            gain_db,
            wideband,
            fidelity_db: fid.fidelity_db,
            bits_flipped: run.bits_flipped,
        },
        latency: LatencyMetrics {
            measured_s,
            phase_delay_s,
            group_delay_s,
            budget_s,
            budget,
            difference_s,
            flagged,
            slips: run.slips.map(|s| s.slips),
            slip_times_s: run.slips.map(|s| s.slip_times_s.clone()),
            slips_in_record: run.record_slips.map(|r| r.count),
            slips_in_record_at_least: run.record_slips.is_some_and(|r| r.at_least),
            packets_lost: run.packets_lost,
            packet_loss_times_s: run.packet_loss_times_s.to_vec(),
            over_time: None,
        },
    })
}

/// Cross-correlation delay searched around the budget estimate.
///
/// For a periodic source the correlation repeats every period and its magnitude peaks every half period (a
/// polarity flip looks like half a period of delay), so the search spans a quarter period either side of the
/// budget: a mis-modelled delay of more than a quarter period cannot be told from a sine alone (use a
/// multitone, chirp or noise source for that).
fn measure_delay(
    src: &[f64],
    out: &[f64],
    rate_hz: f64,
    budget_s: f64,
    period_s: Option<f64>,
    capture_s: f64,
) -> f64 {
    // Shift the output back by the budget's whole samples, then search +- half a period (or a wide window).
    let shift = (budget_s * rate_hz).round().max(0.0) as usize;
    let shift = shift.min(src.len() / 2);
    let half_window_s = match period_s {
        Some(p) => 0.25 * p,
        None => (budget_s.abs() + 20.0 / rate_hz).max(capture_s / 8.0),
    }
    .min((src.len() - shift) as f64 / rate_hz / 4.0);
    let a = &src[..src.len() - shift];
    let b = &out[shift..];
    shift as f64 / rate_hz + latency::xcorr_delay_s(a, b, rate_hz, half_window_s)
}
