//! report.json: the scenario, every resolved parameter of the chain (units in the key names), and the metrics.

use serde::Serialize;
use serde_json::{Value, json};

use crate::engine::pipeline::Plan;
use crate::measure::chain::{AdcMetrics, ChainMetrics, LatencyMetrics, OutputMetrics};
use crate::scenario::{
    AdcInput, ChirpLaw, DitherKind, FilterFamily, FilterResponse, Ladder, OutputAmpCfg, Scenario,
    StageKind, ToleranceDistribution, Waveform, WindowKind,
};

/// The whole report of a run. Field names are part of the interface: later tools rely on them.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    pub scenario: ScenarioInfo,
    pub chain: Value,
    pub adc: Option<AdcReport>,
    pub output: OutputMetrics,
    pub latency: LatencyMetrics,
    pub run: RunInfo,
    /// The listening files, when written.
    pub listening: Option<ListeningInfo>,
}

/// What the WAV files hold.
#[derive(Debug, Clone, Serialize)]
pub struct ListeningInfo {
    pub rate_hz: u32,
    pub format: String,
    pub length_samples: usize,
    /// Volts that map to digital full scale in input.wav and output.wav.
    pub full_scale_v: f64,
    /// Gain applied to error.wav (the asked gain, lowered if it would clip).
    pub error_gain_used: f64,
    pub error_rms_v: f64,
}

/// Where the run came from.
#[derive(Debug, Clone, Serialize)]
pub struct ScenarioInfo {
    pub name: String,
    pub description: String,
    pub origin: String,
    pub seed: u64,
    pub warnings: Vec<String>,
    pub convchain_version: String,
}

/// ADC metrics plus the fields the engine knows.
#[derive(Debug, Clone, Serialize)]
pub struct AdcReport {
    #[serde(flatten)]
    pub metrics: AdcMetrics,
}

/// What the engine decided.
#[derive(Debug, Clone, Serialize)]
pub struct RunInfo {
    pub analog_rate_hz: f64,
    pub grid_steps: u64,
    pub requested_frequency_hz: Option<f64>,
    pub frequency_hz: Option<f64>,
    pub coherent_cycles: Option<u64>,
    pub output_analysis_rate_hz: f64,
    pub capture_start_s: f64,
    pub capture_length: usize,
}

impl Report {
    pub fn new(sc: &Scenario, plan: &Plan, m: ChainMetrics) -> Report {
        Report {
            scenario: ScenarioInfo {
                name: sc.name.clone(),
                description: sc.description.clone(),
                origin: sc.origin.clone(),
                seed: sc.simulation.seed,
                warnings: sc.warnings.clone(),
                convchain_version: env!("CARGO_PKG_VERSION").to_string(),
            },
            chain: chain_json(sc),
            adc: m.adc.map(|metrics| AdcReport { metrics }),
            output: m.output,
            latency: m.latency,
            run: RunInfo {
                analog_rate_hz: plan.timebase.rate_hz,
                grid_steps: plan.n_total,
                requested_frequency_hz: plan.requested_frequency_hz,
                frequency_hz: plan.frequency_hz,
                coherent_cycles: plan.coherent_cycles,
                output_analysis_rate_hz: plan.out_rate_hz,
                capture_start_s: plan.timebase.time_s(plan.capture_n0),
                capture_length: plan.capture_len,
            },
            listening: None,
        }
    }
}

fn amp_json(o: &OutputAmpCfg) -> Value {
    json!({
        "slew_rate_v_per_s": o.slew_rate_v_per_s,
        "tau_s": o.tau_s,
        "rails_v": o.rails_v.map(|(a, b)| [a, b]),
    })
}

/// Every resolved parameter, SI units in the key names.
pub fn chain_json(sc: &Scenario) -> Value {
    let s = &sc.simulation;
    let src = match &sc.source.waveform {
        Waveform::Sine {
            frequency_hz,
            amplitude_v,
            phase_rad,
        } => {
            json!({"waveform": "sine", "frequency_hz": frequency_hz, "amplitude_v": amplitude_v, "phase_rad": phase_rad})
        }
        Waveform::Square {
            frequency_hz,
            amplitude_v,
            duty,
        } => {
            json!({"waveform": "square", "frequency_hz": frequency_hz, "amplitude_v": amplitude_v, "duty": duty})
        }
        Waveform::Triangle {
            frequency_hz,
            amplitude_v,
        } => {
            json!({"waveform": "triangle", "frequency_hz": frequency_hz, "amplitude_v": amplitude_v})
        }
        Waveform::Sawtooth {
            frequency_hz,
            amplitude_v,
        } => {
            json!({"waveform": "sawtooth", "frequency_hz": frequency_hz, "amplitude_v": amplitude_v})
        }
        Waveform::Multitone { tones } => {
            json!({"waveform": "multitone", "tones": tones.iter().map(|t| json!({
            "frequency_hz": t.frequency_hz, "amplitude_v": t.amplitude_v, "phase_rad": t.phase_rad})).collect::<Vec<_>>()})
        }
        Waveform::Chirp {
            start_hz,
            stop_hz,
            sweep_s,
            law,
            amplitude_v,
        } => {
            json!({"waveform": "chirp", "start_hz": start_hz, "stop_hz": stop_hz, "sweep_s": sweep_s,
            "law": match law { ChirpLaw::Linear => "linear", ChirpLaw::Logarithmic => "log" }, "amplitude_v": amplitude_v})
        }
        Waveform::Step { at_s, amplitude_v } => {
            json!({"waveform": "step", "at_s": at_s, "amplitude_v": amplitude_v})
        }
        Waveform::Dc => json!({"waveform": "dc"}),
        Waveform::Noise {
            rms_v,
            bandwidth_hz,
        } => json!({"waveform": "noise", "rms_v": rms_v, "bandwidth_hz": bandwidth_hz}),
        Waveform::Wav {
            path,
            channel,
            full_scale_v,
            repeat,
        } => json!({"waveform": "wav", "file": path.display().to_string(), "channel": channel,
            "full_scale_v": full_scale_v, "repeat": repeat}),
    };
    let mut src = src;
    src["offset_v"] = json!(sc.source.offset_v);
    let stages: Vec<Value> = sc
        .stages
        .iter()
        .map(|st| {
            let mut v = match &st.kind {
                StageKind::SampleHold(c) => json!({
                    "acquisition_s": c.acquisition_s, "aperture_delay_s": c.aperture_delay_s,
                    "aperture_jitter_s": c.aperture_jitter_s, "droop_v_per_s": c.droop_v_per_s, "hold_step_v": c.hold_step_v}),
                StageKind::SarAdc(c) => json!({
                    "bits": c.bits, "range_v": [c.range_v.0, c.range_v.1], "lsb_v": c.lsb_v(), "clock_hz": c.clock_hz,
                    "cycles": c.cycles, "conversion_time_s": c.conversion_time_s,
                    "sample_rate_hz": c.effective_sample_rate_hz(), "free_running": c.sample_rate_hz.is_none(),
                    "input": match c.input { AdcInput::Held => "held", AdcInput::Live => "live" },
                    "comparator_offset_v": c.comparator_offset_v, "comparator_noise_v": c.comparator_noise_v,
                    "capacitor_mismatch": c.capacitor_mismatch,
                    "dither": match c.dither { DitherKind::None => "none", DitherKind::Rpdf => "rpdf", DitherKind::Tpdf => "tpdf" },
                    "dither_lsb": c.dither_lsb}),
                StageKind::Link(c) => json!({
                    "delay_s": c.delay_s, "frame": c.frame, "bit_error_rate": c.bit_error_rate, "bits": c.bits}),
                StageKind::Dac(c) => json!({
                    "bits": c.bits, "range_v": [c.range_v.0, c.range_v.1],
                    "ladder": match c.ladder { Ladder::Ideal => "ideal", Ladder::R2r => "r2r", Ladder::Binary => "binary" },
                    "tolerance": c.tolerance,
                    "tolerance_distribution": match c.tolerance_distribution { ToleranceDistribution::Uniform => "uniform", ToleranceDistribution::Gaussian => "gaussian" },
                    "offset_v": c.offset_v, "gain_error": c.gain_error, "output": amp_json(&c.output)}),
                StageKind::Filter(c) => {
                    let (family, ripple) = match c.family {
                        FilterFamily::Butterworth => ("butterworth", None),
                        FilterFamily::Bessel => ("bessel", None),
                        FilterFamily::Chebyshev { ripple_db } => ("chebyshev", Some(ripple_db)),
                        FilterFamily::Rc => ("rc", None),
                    };
                    json!({"response": match c.response { FilterResponse::Lowpass => "lowpass", FilterResponse::Highpass => "highpass" },
                        "family": family, "ripple_db": ripple, "order": c.order, "cutoff_hz": c.cutoff_hz})
                }
                StageKind::Amplifier(c) => json!({"gain": c.gain, "offset_v": c.offset_v, "output": amp_json(&c.output)}),
            };
            v["label"] = json!(st.label);
            v["kind"] = json!(st.kind.kind_name());
            v
        })
        .collect();
    let a = &sc.analysis;
    json!({
        "simulation": {"analog_rate_hz": s.analog_rate_hz, "duration_s": s.duration_s, "settle_s": s.settle_s, "seed": s.seed},
        "source": src,
        "stages": stages,
        "analysis": {
            "band_hz": a.band_hz,
            "window": match a.window { WindowKind::Rectangular => "rectangular", WindowKind::Hann => "hann",
                WindowKind::Hamming => "hamming", WindowKind::BlackmanHarris => "blackman-harris", WindowKind::FlatTop => "flat-top" },
            "coherent": a.coherent,
            "harmonics": a.harmonics,
        },
    })
}
