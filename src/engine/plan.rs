//! The plan of a run, made before anything is simulated: the grid, the converter's record, the decimation to the
//! output analysis stream, the coherent frequency, the capture, and the memory all that needs.

use crate::engine::decimate::PASSBAND_FRACTION;
use crate::engine::pipeline::si;
use crate::error::{Error, Result};
use crate::scenario::{Scenario, Waveform};
use crate::signal::stream::Timebase;
use crate::stages::kind::Role;

/// Grid samples per block.
pub const BLOCK: usize = 4096;
/// Longest grid capture kept for full-bandwidth measurements (fidelity, cross-correlation) and plots.
pub const CAPTURE_MAX: usize = 1 << 20;
/// Longest output analysis record (samples); the ADC record is shortened to match. 2^20 points give bins of
/// a millionth of the analysis rate, far finer than any metric needs.
pub const RECORD_MAX: usize = 1 << 20;
/// Runs whose analysis record would need more memory than this are refused.
pub const MEMORY_LIMIT_BYTES: u64 = 4 << 30;

/// What the engine decided before running: rates, record lengths, the coherent frequency.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    pub timebase: Timebase,
    /// Grid samples simulated.
    pub n_total: u64,
    /// First grid sample of the analysis window.
    pub n_settle: u64,
    /// The converter, when the chain has one.
    pub adc: Option<AdcPlan>,
    /// Source frequency asked for, and the one used (moved for coherent sampling), for sine sources.
    pub requested_frequency_hz: Option<f64>,
    pub frequency_hz: Option<f64>,
    /// Whole cycles of the source in the analysis record, when moved for coherence.
    pub coherent_cycles: Option<u64>,
    /// Decimation from the grid to the output analysis stream.
    pub out_factor: usize,
    pub out_rate_hz: f64,
    /// Samples of the output analysis record (end-aligned in the run).
    pub out_record_len: usize,
    /// Highest frequency the output meters use: the analysis band, capped by the decimator's flat passband.
    pub out_band_hz: f64,
    /// Grid capture: first index and length.
    pub capture_n0: u64,
    pub capture_len: usize,
    pub memory_estimate_bytes: u64,
}

/// The converter's part of the plan.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AdcPlan {
    pub sample_rate_hz: f64,
    pub conversion_time_s: f64,
    pub bits: u32,
    pub range_v: (f64, f64),
    /// First conversion in the ADC record, and the record's length.
    pub k0: u64,
    pub record_len: usize,
}

impl Plan {
    /// Work out rates and records for a scenario. Returns the scenario as it will run (a sine source moved to the
    /// coherent frequency when asked).
    pub fn new(scenario: &Scenario) -> Result<(Plan, Scenario)> {
        let mut sc = scenario.clone();
        let sim = &sc.simulation;
        let timebase = Timebase::new(sim.analog_rate_hz);
        let n_total = (sim.duration_s * sim.analog_rate_hz).round() as u64;
        let n_settle = (sim.settle_s * sim.analog_rate_hz).round() as u64;
        let window_s = sim.duration_s - sim.settle_s;

        let adc_cfg = sc.stages.iter().find_map(|s| s.kind.quantizer_timing());
        // Time from a sample to its arrival at the DAC, plus one sample period: the output record must not start
        // before the first recorded code has reached the output.
        let mut transport_s = 0.0;
        for s in &sc.stages {
            if s.kind.role() == Role::Code {
                let fs = adc_cfg.map(|a| a.sample_rate_hz).unwrap_or(1.0);
                transport_s += s.kind.transport_s(fs);
            }
        }
        let band = sc.analysis.band_hz;
        let f_src = sc.source.waveform.highest_frequency_hz();

        let (adc, out_factor, ratio_integer) = match adc_cfg {
            Some(a) => {
                let fs = a.sample_rate_hz;
                let margin_s = a.conversion_time_s + transport_s + 1.0 / fs;
                let m = ((window_s - margin_s) * fs).floor();
                if m < 16.0 {
                    return Err(Error::BadInput(format!(
                        "{}: the analysis window (duration - settle = {}) holds fewer than 16 conversions at {}; \
                         lengthen simulation.duration or shorten simulation.settle",
                        sc.origin,
                        si(window_s, "s"),
                        si(fs, "Hz")
                    )));
                }
                let (factor, integer) = choose_factor_with_adc(sim.analog_rate_hz, fs, band);
                // Records longer than RECORD_MAX output samples add nothing to the meters but memory: keep the
                // last part of the window.
                let per_code = sim.analog_rate_hz / factor as f64 / fs;
                // A length with only small prime factors keeps every FFT of the record fast (no chirp-z
                // fallback for a large prime factor); it gives up at most a few per cent of the window.
                let m_keep =
                    smooth_at_most(m.min((RECORD_MAX as f64 / per_code).floor()) as usize) as f64;
                let k0 = (sim.settle_s * fs).ceil() as u64 + (m - m_keep) as u64;
                let m = m_keep;
                (
                    Some(AdcPlan {
                        sample_rate_hz: fs,
                        conversion_time_s: a.conversion_time_s,
                        bits: a.bits,
                        range_v: a.range_v,
                        k0,
                        record_len: m as usize,
                    }),
                    factor,
                    integer,
                )
            }
            None => {
                let want = band.unwrap_or(0.0).max(10.0 * f_src.unwrap_or(0.0)) / PASSBAND_FRACTION;
                let factor = if want > 0.0 {
                    ((sim.analog_rate_hz / want).floor() as usize).max(1)
                } else {
                    1
                };
                (None, factor, false)
            }
        };
        let out_rate_hz = sim.analog_rate_hz / out_factor as f64;
        // Start the analysis on the output analysis grid.
        let n_settle = n_settle.div_ceil(out_factor as u64) * out_factor as u64;
        let out_record_len = match &adc {
            Some(a) if ratio_integer => {
                a.record_len * (out_rate_hz / a.sample_rate_hz).round() as usize
            }
            Some(a) => (a.record_len as f64 / a.sample_rate_hz * out_rate_hz).floor() as usize,
            None => smooth_at_most(((window_s * out_rate_hz).floor() as usize).min(RECORD_MAX)),
        };
        if out_record_len < 16 {
            return Err(Error::BadInput(format!(
                "{}: the analysis window is too short for the output record; lengthen simulation.duration",
                sc.origin
            )));
        }
        let out_band_hz = band
            .unwrap_or(f64::INFINITY)
            .min(PASSBAND_FRACTION * out_rate_hz);

        // Coherent sampling: move a sine to J cycles in the record (J odd, coprime with the record length).
        let requested_frequency_hz = sc.source.waveform.fundamental_hz();
        let mut coherent_cycles = None;
        if sc.analysis.coherent
            && let Waveform::Sine { frequency_hz, .. } = &mut sc.source.waveform
        {
            let (fs, n) = match &adc {
                Some(a) => (a.sample_rate_hz, a.record_len),
                None => (out_rate_hz, out_record_len),
            };
            if let Some((f, j)) = crate::measure::coherent::coherent_frequency(*frequency_hz, fs, n)
            {
                *frequency_hz = f;
                coherent_cycles = Some(j);
            }
        }
        let frequency_hz = sc.source.waveform.fundamental_hz();

        let n_window = n_total.saturating_sub(n_settle);
        let capture_len = (n_window as usize).min(CAPTURE_MAX);
        let capture_n0 = n_total - capture_len as u64;
        let analog_streams = 2 + sc
            .stages
            .iter()
            .filter(|s| matches!(s.kind.role(), Role::Analog | Role::Reconstructor))
            .count() as u64;
        let decimated = 2 * (n_window / out_factor as u64 + 1);
        let codes = adc.map(|a| a.record_len as u64).unwrap_or(0);
        let history = adc
            .map(|a| (a.conversion_time_s * 4.0 * sim.analog_rate_hz) as u64)
            .unwrap_or(0);
        let memory_estimate_bytes = 8 * (decimated + analog_streams * capture_len as u64 + history)
            + 24 * codes
            + 8 * analog_streams * BLOCK as u64 * 2;
        if memory_estimate_bytes > MEMORY_LIMIT_BYTES {
            return Err(Error::BadInput(format!(
                "{}: this run would need about {:.1} GiB for its analysis record (limit 4 GiB); lower \
                 simulation.duration, raise simulation.settle, or lower simulation.analog_rate",
                sc.origin,
                memory_estimate_bytes as f64 / (1u64 << 30) as f64
            )));
        }
        let plan = Plan {
            timebase,
            n_total,
            n_settle,
            adc,
            requested_frequency_hz,
            frequency_hz,
            coherent_cycles,
            out_factor,
            out_rate_hz,
            out_record_len,
            out_band_hz,
            capture_n0,
            capture_len,
            memory_estimate_bytes,
        };
        Ok((plan, sc))
    }
}

/// The largest length `<= n` whose prime factors are all 2, 3, 5 or 7 (`n` itself when `n < 1`).
pub fn smooth_at_most(n: usize) -> usize {
    let smooth = |mut m: usize| {
        for p in [2, 3, 5, 7] {
            while m.is_multiple_of(p) {
                m /= p;
            }
        }
        m == 1
    };
    (1..=n).rev().find(|&m| smooth(m)).unwrap_or(n)
}

/// Pick the decimation factor for the output analysis stream of a chain with a converter: the output rate is
/// an integer multiple L >= 4 of the conversion rate when the grid allows it (so a coherent ADC record is coherent
/// at the output too), and its flat passband covers the analysis band.
fn choose_factor_with_adc(rate_hz: f64, fs_hz: f64, band_hz: Option<f64>) -> (usize, bool) {
    let need_hz = band_hz.unwrap_or(0.0) / PASSBAND_FRACTION;
    for l in 4..=256u32 {
        let out = l as f64 * fs_hz;
        if out < need_hz {
            continue;
        }
        let d = rate_hz / out;
        if d < 1.0 {
            break;
        }
        if (d - d.round()).abs() < 1e-9 * d {
            return (d.round() as usize, true);
        }
    }
    let out = (4.0 * fs_hz).max(need_hz);
    (((rate_hz / out).floor() as usize).max(1), false)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn smooth_lengths_have_small_prime_factors_and_stay_close() {
        assert_eq!(smooth_at_most(1798), 1792); // 2^8 x 7
        assert_eq!(smooth_at_most(7192), 7168); // 2^10 x 7
        assert_eq!(smooth_at_most(1024), 1024);
        assert_eq!(smooth_at_most(0), 0);
        for n in [16usize, 97, 1000, 65_537, 999_983, 1 << 20] {
            let m = smooth_at_most(n);
            assert!(m <= n && m as f64 >= 0.95 * n as f64, "{n} -> {m}");
            let mut r = m;
            for p in [2, 3, 5, 7] {
                while r.is_multiple_of(p) {
                    r /= p;
                }
            }
            assert_eq!(r, 1, "{m}");
        }
    }
}
