//! Runtime roles beside [`crate::stages::AnalogStage`]: what the engine and the static bench drive, without
//! naming a concrete kind. A chain reads `analog* [hold? quantizer code* reconstructor] analog*`.

use serde::Serialize;

use crate::signal::stream::{CodeEvent, Timebase};
use crate::stages::Probe;

/// One line of the latency budget: a stage (or a part of one) and the delay it contributes.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BudgetLine {
    /// What the line stands for (a stage name, "transport", "jitter buffer", ...).
    pub stage: String,
    /// Its contribution (s).
    pub seconds: f64,
}

/// What the static bench needs of an oversampling (delta-sigma) converter, which has no per-code transitions to
/// find: its DC transfer is measured instead, level by level, after its filters settle.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DcStaticInfo {
    /// Largest input (ADC) or output (DAC) swing about mid-range the loop takes without overloading (V): the
    /// ADC's reported largest stable amplitude; the DAC's full scale (it scales its words into the stable range).
    pub stable_half_span_v: f64,
    /// Words the filters take to settle after a step (twice their impulse responses' length, and a margin).
    pub settle_words: usize,
    /// The modulator clock (Hz).
    pub clock_hz: f64,
    /// The converter's word rate (Hz).
    pub word_rate_hz: f64,
}

/// A sample-and-hold owned by the quantizer after it.
pub trait Hold: Send {
    /// Acquire the input for nominal instant `t_nominal_s` and return the held value.
    fn acquire(&mut self, t_nominal_s: f64, probe: &dyn Probe) -> crate::stages::sample_hold::Held;
    /// The conversion ended at `t_s`: tracking resumes.
    fn release(&mut self, t_s: f64);
    /// History the probe must keep before a nominal instant, given the track time (s).
    fn history_needed_s(&self, track_time_s: f64) -> f64;
    /// Latest input instant an acquisition may ask for, relative to its nominal instant (s).
    fn lookahead_s(&self) -> f64;
    /// Budget lines of the hold itself (its aperture delay).
    fn budget(&self) -> Vec<BudgetLine>;
}

/// An ADC: samples its input at exact instants and turns it into codes.
pub trait Quantizer: Send {
    /// Nominal sampling instant of conversion `k` (s).
    fn sample_time_s(&self, k: u64) -> f64;
    /// Latest input instant conversion `k` needs (s), its hold's look-ahead included.
    fn latest_input_needed_s(&self, k: u64) -> f64;
    /// Input history needed before a sampling instant (s).
    fn history_needed_s(&self) -> f64;
    /// Convert sample `k`, reading the input through `probe`.
    fn convert(&mut self, k: u64, probe: &dyn Probe) -> CodeEvent;
    /// Codes clipped so far (input beyond the range).
    fn codes_clipped(&self) -> u64;
    /// Word width (bits).
    fn bits(&self) -> u32;
    /// Input range `[low, high]` (V).
    fn range_v(&self) -> (f64, f64);
    /// Rate at which conversions start (Hz).
    fn sample_rate_hz(&self) -> f64;
    /// Where the ideal transfer's first transition sits above the range's low end (LSB): 1/2 for IEEE Std
    /// 1241's centred transfer, 1 for a truncating one. Static tests measure offsets against it.
    fn ideal_first_transition_lsb(&self) -> f64;
    /// The highest sine frequency a static code-density test may use (Hz): a converter that sees its input
    /// move during a conversion needs a slower one. Infinite when any will do.
    fn static_sine_limit_hz(&self) -> f64 {
        f64::INFINITY
    }
    /// Budget lines: the hold's, then the conversion's.
    fn budget(&self) -> Vec<BudgetLine>;
    /// Budget lines at `f_hz`, for converters whose delay depends on frequency (a minimum-phase decimation
    /// filter); the same as [`Quantizer::budget`] otherwise.
    fn budget_at(&self, _f_hz: f64) -> Vec<BudgetLine> {
        self.budget()
    }
    /// Times a noise-shaping loop overloaded (`None` for converters without one).
    fn overloads(&self) -> Option<u64> {
        None
    }
    /// For an oversampling converter, what its DC-transfer static test needs (`None`: a converter with code
    /// transitions, tested by its code density and a slow ramp).
    fn dc_static(&self) -> Option<DcStaticInfo> {
        None
    }
    /// The last stretch of a noise-shaping loop's output at its clock: (clock in Hz, levels with full scale
    /// +-1), oldest first (`None` for converters without one).
    fn modulator_stream(&self) -> Option<(f64, Vec<f64>)> {
        None
    }
}

/// A digital stage between the quantizer and the reconstructor.
pub trait CodeStage: Send {
    /// Take one code; push the codes that leave (with their availability times) to `out`.
    fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>);
    /// Bits flipped by transport errors so far.
    fn bits_flipped(&self) -> u64 {
        0
    }
    /// Packets lost (arrived too late to play) so far.
    fn packets_lost(&self) -> u64 {
        0
    }
    /// The instants (s) the lost packets should have started playing, oldest first (at most the first
    /// [`LOSS_TIMES_MAX`](crate::stages::network::LOSS_TIMES_MAX)).
    fn packet_loss_times_s(&self) -> &[f64] {
        &[]
    }
    /// Budget lines for codes arriving at `sample_rate_hz`.
    fn budget(&self, sample_rate_hz: f64) -> Vec<BudgetLine>;
    /// The rate of the codes leaving, for codes arriving at `input_rate_hz` (a rate converter changes it).
    fn output_rate_hz(&self, input_rate_hz: f64) -> f64 {
        input_rate_hz
    }
    /// The DAC after the chain runs on a clock of this offset (ppm): a stage that paces its output by the DAC's
    /// clock (an asynchronous rate converter) takes it here, before the run.
    fn lock_output_clock(&mut self, _dac_clock_ppm: f64) {}
}

/// A DAC: renders codes on the analog grid.
pub trait Reconstructor: Send {
    /// Render grid samples `n0 .. n0 + out.len()` from the pending `events`; return how many were consumed.
    fn render(
        &mut self,
        timebase: Timebase,
        n0: u64,
        events: &[CodeEvent],
        out: &mut [f64],
    ) -> usize;
    /// Static output (V) for `code`, before any output dynamics.
    fn level_v(&self, code: u32) -> f64;
    fn bits(&self) -> u32;
    /// Output range `[low, high]` (V) of an ideal converter.
    fn range_v(&self) -> (f64, f64);
    /// Budget lines for codes updated at `update_rate_hz`, at `f_hz` (phase delays).
    fn budget(&self, update_rate_hz: f64, f_hz: f64) -> Vec<BudgetLine>;
    /// The FIFO the DAC reads its codes through when they come paced by another clock (`None`: it takes each
    /// code at its own instant, as on a shared clock).
    fn fifo(&self) -> Option<crate::engine::clock::FifoTiming> {
        None
    }
    /// Offset of the DAC's clock (ppm).
    fn clock_ppm(&self) -> f64 {
        0.0
    }
    /// Times a noise-shaping loop overloaded (`None` for DACs without one).
    fn overloads(&self) -> Option<u64> {
        None
    }
    /// For an oversampling DAC, what its DC-transfer static test needs (`None`: a DAC whose every code has a
    /// settled level, [`Reconstructor::level_v`]).
    fn dc_static(&self) -> Option<DcStaticInfo> {
        None
    }
}
