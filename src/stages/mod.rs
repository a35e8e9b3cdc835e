//! Stage models, one file per stage kind.
//!
//! Every kind describes itself through [`kind::KindSpec`] and is listed once in [`registry`]. At run time a
//! stage plays one role: continuous-time stages ([`AnalogStage`]) run on the uniform analog grid; converter-side
//! stages work with events at exact instants through the roles of [`roles`] (hold, quantizer, code stage,
//! reconstructor).

use num_complex::Complex64;

/// A continuous-time stage realised on the analog grid (dt fixed at construction).
///
/// `tick` is the per-sample path; `process` the block path. The two must agree to rounding (a block path may
/// sum in another order, e.g. the filter's block state-space form), and `process` must not depend on how a
/// stream is cut into calls beyond rounding (a unit test per implementor checks both).
pub trait AnalogStage: Send {
    /// Advance one grid step with input `x_v`; return the output at the same instant.
    fn tick(&mut self, x_v: f64) -> f64;

    /// Process a block. `input.len() == output.len()`.
    fn process(&mut self, input: &[f64], output: &mut [f64]) {
        for (x, y) in input.iter().zip(output.iter_mut()) {
            *y = self.tick(*x);
        }
    }

    /// The analytic small-signal response of the continuous-time model at `f_hz`, where the model is linear.
    fn response(&self, f_hz: f64) -> Option<Complex64>;

    /// Phase delay at `f_hz` (s): -arg(H)/(2 pi f), with the analytic response, for the latency budget.
    fn phase_delay_s(&self, f_hz: f64) -> f64 {
        match self.response(f_hz) {
            Some(h) if f_hz > 0.0 => {
                -unwrapped_phase(self, f_hz, h) / (2.0 * std::f64::consts::PI * f_hz)
            }
            _ => 0.0,
        }
    }

    /// Group delay at `f_hz` (s): -d arg(H)/d omega, by a central difference of the analytic response.
    fn group_delay_s(&self, f_hz: f64) -> f64 {
        let df = (f_hz.abs() * 1e-4).max(1e-3);
        let lo = (f_hz - df).max(0.0);
        let hi = f_hz + df;
        match (self.response(lo), self.response(hi)) {
            (Some(a), Some(b)) => {
                let mut dphi = (b / a).arg();
                if !dphi.is_finite() {
                    dphi = 0.0;
                }
                -dphi / (2.0 * std::f64::consts::PI * (hi - lo))
            }
            _ => 0.0,
        }
    }
}

/// Phase of `h` at `f_hz`, unwrapped by integrating the phase along frequency from near DC.
fn unwrapped_phase<S: AnalogStage + ?Sized>(stage: &S, f_hz: f64, h: Complex64) -> f64 {
    const STEPS: usize = 256;
    let mut prev = match stage.response(f_hz * 1e-6) {
        Some(h0) => h0,
        None => return h.arg(),
    };
    let mut phase = prev.arg();
    for i in 1..=STEPS {
        let f = f_hz * (i as f64 / STEPS as f64);
        let cur = if i == STEPS {
            h
        } else {
            stage.response(f).unwrap_or(h)
        };
        phase += (cur / prev).arg();
        prev = cur;
    }
    phase
}

/// Something that can tell the value of the signal entering a stage at an arbitrary instant (within
/// what it has seen).
pub trait Probe {
    /// Value (V) at time `t_s`.
    fn value_at(&self, t_s: f64) -> f64;
}

#[cfg(test)]
pub mod conformance;
pub mod delta_sigma;
pub mod kind;
pub mod multirate;
#[macro_use]
pub mod registry;
pub mod roles;
pub mod slew;
pub mod source;
pub mod wav_file;

// The stage kinds, each in its own file (`module => Variant(ConfigType)`), listed once. The list declares the
// modules and generates `StageKind`, `KIND_NAMES`, `KIND_PARAMS`, `KIND_EXAMPLES` and the dispatch
// (`registry.rs`).
registry::stage_kinds! {
    sample_hold => SampleHold(SampleHoldCfg),
    sar_adc => SarAdc(SarAdcCfg),
    flash_adc => FlashAdc(FlashAdcCfg),
    pipeline_adc => PipelineAdc(PipelineAdcCfg),
    delta_sigma_adc => DeltaSigmaAdc(DeltaSigmaAdcCfg),
    link => Link(LinkCfg),
    resample => Resample(ResampleCfg),
    buffer => Buffer(BufferCfg),
    codec => Codec(CodecCfg),
    network => Network(NetworkCfg),
    dac => Dac(DacCfg),
    delta_sigma_dac => DeltaSigmaDac(DeltaSigmaDacCfg),
    filter => Filter(FilterCfg),
    amplifier => Amplifier(AmplifierCfg),
    clip => Clip(ClipCfg),
}

/// A probe that evaluates a function of time, for the converter stages' unit tests.
#[cfg(test)]
pub(crate) struct FnProbe<F: Fn(f64) -> f64>(pub F);

#[cfg(test)]
impl<F: Fn(f64) -> f64> Probe for FnProbe<F> {
    fn value_at(&self, t_s: f64) -> f64 {
        (self.0)(t_s)
    }
}
