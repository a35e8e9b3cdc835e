//! The plan of a run, made before anything is simulated: the grid, the converter's record, the decimation to the
//! output analysis stream, the coherent frequency, the capture, and the memory all that needs.

use crate::engine::decimate::PASSBAND_FRACTION;
use crate::engine::pipeline::si;
use crate::error::{Error, Result};
use crate::measure::coherent::{Placement, is_smooth, place_tone};
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
    /// How the test tone and the record were fitted to each other.
    pub tone: TonePlacement,
    /// The scenario's own duration, when the run was lengthened to place the tone coherently.
    pub lengthened_from_s: Option<f64>,
    /// Decimation from the grid to the output analysis stream.
    pub out_factor: usize,
    pub out_rate_hz: f64,
    /// Samples of the output analysis record (end-aligned in the run).
    pub out_record_len: usize,
    /// Highest frequency the output meters use: `analysis.band` when written, else the converter's Nyquist
    /// frequency (a chain with a converter) or the output record's flat passband; never above that passband.
    pub out_band_hz: f64,
    /// Where `out_band_hz` comes from.
    pub out_band_rule: BandRule,
    /// The output record's flat passband (Hz): the widest band the output meters can use (the wideband figures).
    pub out_wide_band_hz: f64,
    /// Grid capture: first index and length.
    pub capture_n0: u64,
    pub capture_len: usize,
    pub memory_estimate_bytes: u64,
}

/// How a sine source and the analysis record were fitted to each other (report.json: `run.tone_placement`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum TonePlacement {
    /// Not a sine source, or `analysis.coherent = false`: the tone is analysed as asked, with the window.
    AsAsked,
    /// Moved to a whole, odd number of cycles coprime with the record length, by at most
    /// [`PLACEMENT_TOLERANCE`](crate::measure::coherent::PLACEMENT_TOLERANCE) (see [`place_tone`](crate::measure::coherent::place_tone)).
    Coherent,
    /// Coherence was asked for but no record within the run holds the tone to within the tolerance (too few
    /// cycles even after lengthening, or the tone at or above half the record's rate): analysed as asked,
    /// non-coherently, with the window.
    NonCoherent,
}

/// Where the output metrics' band comes from (report.json: `run.output_band_rule`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum BandRule {
    /// `analysis.band` as written.
    Written,
    /// The converter's Nyquist frequency (the default for a chain with a converter): the output metrics then
    /// count what the converter can carry, not the hold's images above it.
    ConverterNyquist,
    /// The output record's flat passband (the default without a converter, or when the band asked for is wider).
    RecordPassband,
}

impl BandRule {
    /// Words for tables and reports.
    pub fn describe(self) -> &'static str {
        match self {
            BandRule::Written => "analysis.band",
            BandRule::ConverterNyquist => "the converter's Nyquist band",
            BandRule::RecordPassband => "the output record's passband",
        }
    }
}

/// Room for the analysis record: its rate, the longest record the run allows, and whether that length was cut
/// to [`RECORD_MAX`] (then lengthening the run does not lengthen the record).
struct RecordRoom {
    rate_hz: f64,
    n_max: usize,
    capped: bool,
}

/// A run is lengthened for coherent placement only up to this many grid steps (or its own length if larger):
/// about half a second of engine time.
const LENGTHEN_MAX_STEPS: f64 = 5e7;

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
    /// Work out rates and records for a scenario. Returns the scenario as it will run: a sine source moved to the
    /// coherent frequency when asked, and the duration lengthened when the record is too short to hold the tone
    /// coherently within [`PLACEMENT_TOLERANCE`](crate::measure::coherent::PLACEMENT_TOLERANCE) (bounded by [`LENGTHEN_MAX_STEPS`]; otherwise the tone is
    /// analysed non-coherently, see [`TonePlacement`]).
    pub fn new(scenario: &Scenario) -> Result<(Plan, Scenario)> {
        let (plan, sc, room) = Plan::build(scenario)?;
        if plan.tone != TonePlacement::NonCoherent || room.capped {
            return Ok((plan, sc));
        }
        let Some(f_hz) = scenario.source.waveform.fundamental_hz() else {
            return Ok((plan, sc));
        };
        let sim = &scenario.simulation;
        let max_steps = LENGTHEN_MAX_STEPS.max(plan.n_total as f64);
        let mut n = room.n_max;
        loop {
            n = (n + n / 4).max(n + 1);
            let extra_s = (n - room.n_max) as f64 / room.rate_hz;
            if (sim.duration_s + extra_s) * sim.analog_rate_hz > max_steps {
                return Ok((plan, sc));
            }
            if place_tone(f_hz, room.rate_hz, n, 16, min_cycles(scenario)).is_some() {
                let mut longer = scenario.clone();
                // One record sample more than needed, so rounding to the grid cannot cut the record short.
                longer.simulation.duration_s = sim.duration_s + extra_s + 1.0 / room.rate_hz;
                let (mut p2, sc2, _) = Plan::build(&longer)?;
                if p2.tone == TonePlacement::Coherent {
                    p2.lengthened_from_s = Some(sim.duration_s);
                    return Ok((p2, sc2));
                }
                return Ok((plan, sc));
            }
        }
    }

    fn build(scenario: &Scenario) -> Result<(Plan, Scenario, RecordRoom)> {
        let mut sc = scenario.clone();
        let sim = &sc.simulation;
        let timebase = Timebase::new(sim.analog_rate_hz);
        let n_total = (sim.duration_s * sim.analog_rate_hz).round() as u64;
        let n_settle = (sim.settle_s * sim.analog_rate_hz).round() as u64;
        let window_s = sim.duration_s - sim.settle_s;

        let adc_cfg = sc.stages.iter().find_map(|s| s.kind.quantizer_timing());
        // The rate the DAC updates at: the quantizer's, or the last `resample`'s (nominal).
        let resampled_hz = {
            let mut up = crate::stages::kind::Upstream::default();
            let mut resampled = false;
            for s in &sc.stages {
                s.kind.pass_on(&mut up);
                resampled |= s.kind.kind_name() == "resample";
            }
            if resampled { up.sample_rate_hz } else { None }
        };
        // Time from a sample to its arrival at the DAC, plus one sample period: the output record must not start
        // before the first recorded code has reached the output.
        // With hops in series, every later hop's conversion time and one of its sample periods count too, and
        // each hop's links at that hop's own rate.
        let mut transport_s = 0.0;
        let mut hop_adc = None;
        for s in &sc.stages {
            if let Some(a) = s.kind.quantizer_timing() {
                if hop_adc.is_some() {
                    transport_s += a.conversion_time_s + 1.0 / a.sample_rate_hz;
                }
                hop_adc = Some(a);
            }
            if s.kind.role() == Role::Code {
                let fs = hop_adc.map(|a| a.sample_rate_hz).unwrap_or(1.0);
                transport_s += s.kind.transport_s(fs);
            }
        }
        // With hops in series, the band is at most the slowest ADC's Nyquist frequency.
        let slowest_adc_hz = sc
            .stages
            .iter()
            .filter_map(|s| s.kind.quantizer_timing())
            .map(|a| a.sample_rate_hz)
            .fold(f64::INFINITY, f64::min);
        let band = sc.analysis.band_hz;
        let f_src = sc.source.waveform.highest_frequency_hz();
        // The tone to place coherently, when asked.
        let tone_hz = match &sc.source.waveform {
            Waveform::Sine { frequency_hz, .. } if sc.analysis.coherent => Some(*frequency_hz),
            _ => None,
        };
        let min_cycles = min_cycles(&sc);
        // The record length for a room of `n_max` samples at `fs`: placed with the tone, or the longest smooth
        // length (fast FFTs) when there is no tone to place or it cannot be placed.
        let record = |n_max: usize, fs: f64| -> (usize, Option<Placement>) {
            match tone_hz.and_then(|f| place_tone(f, fs, n_max, 16, min_cycles)) {
                Some(p) => (p.record_len, Some(p)),
                None => (smooth_at_most(n_max), None),
            }
        };

        let mut room = RecordRoom {
            rate_hz: 1.0,
            n_max: 0,
            capped: false,
        };
        let mut placement = None;
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
                let cap = (RECORD_MAX as f64 / per_code).floor();
                let n_max = m.min(cap) as usize;
                room = RecordRoom {
                    rate_hz: fs,
                    n_max,
                    capped: cap < m,
                };
                let (m_keep, placed) = record(n_max, fs);
                placement = placed;
                let k0 = (sim.settle_s * fs).ceil() as u64 + (m as usize - m_keep) as u64;
                let m = m_keep as f64;
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
            None => {
                let room_n = (window_s * out_rate_hz).floor().max(0.0) as usize;
                room = RecordRoom {
                    rate_hz: out_rate_hz,
                    n_max: room_n.min(RECORD_MAX),
                    capped: room_n > RECORD_MAX,
                };
                let (n, placed) = record(room.n_max, out_rate_hz);
                placement = placed;
                n
            }
        };
        if out_record_len < 16 {
            return Err(Error::BadInput(format!(
                "{}: the analysis window is too short for the output record; lengthen simulation.duration",
                sc.origin
            )));
        }
        let out_wide_band_hz = PASSBAND_FRACTION * out_rate_hz;
        let (asked_band_hz, rule) = match (band, &adc) {
            (Some(b), _) => (b, BandRule::Written),
            (None, Some(a)) => (
                resampled_hz
                    .unwrap_or(a.sample_rate_hz)
                    .min(a.sample_rate_hz)
                    .min(slowest_adc_hz)
                    / 2.0,
                BandRule::ConverterNyquist,
            ),
            (None, None) => (f64::INFINITY, BandRule::RecordPassband),
        };
        let (out_band_hz, out_band_rule) = if asked_band_hz <= out_wide_band_hz {
            (asked_band_hz, rule)
        } else {
            (out_wide_band_hz, BandRule::RecordPassband)
        };

        // Coherent sampling: move a sine to J cycles in the record (J odd, coprime with the record length).
        let requested_frequency_hz = sc.source.waveform.fundamental_hz();
        let mut coherent_cycles = None;
        let mut tone = TonePlacement::AsAsked;
        if let Waveform::Sine { frequency_hz, .. } = &mut sc.source.waveform
            && tone_hz.is_some()
        {
            match placement {
                Some(p) => {
                    *frequency_hz = p.frequency_hz;
                    coherent_cycles = Some(p.cycles);
                    tone = TonePlacement::Coherent;
                }
                None => tone = TonePlacement::NonCoherent,
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
            tone,
            lengthened_from_s: None,
            out_factor,
            out_rate_hz,
            out_record_len,
            out_band_hz,
            out_band_rule,
            out_wide_band_hz,
            capture_n0,
            capture_len,
            memory_estimate_bytes,
        };
        Ok((plan, sc, room))
    }
}

/// Fewest whole cycles a coherent tone may have: more than the analysis window's DC lobe (its main-lobe half-width
/// in bins), so the meters can tell the tone from DC (`src/measure/metrics.rs`).
fn min_cycles(sc: &Scenario) -> u64 {
    crate::measure::window::lobe_half_width_bins(sc.analysis.window) as u64 + 1
}

/// The largest length `<= n` whose prime factors are all 2, 3, 5 or 7 (`n` itself when `n < 1`).
pub fn smooth_at_most(n: usize) -> usize {
    (1..=n).rev().find(|&m| is_smooth(m)).unwrap_or(n)
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
