//! report.json: the scenario, every resolved parameter of the chain (units in the key names), and the metrics.

use serde::Serialize;
use serde_json::{Value, json};

use crate::engine::plan::Plan;
use crate::measure::chain::{AdcMetrics, ChainMetrics, LatencyMetrics, OutputMetrics};
use crate::measure::imd::ImdMetrics;
use crate::measure::step::StepMetrics;
use crate::scenario::{ChirpLaw, Scenario, Waveform, WindowKind};

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
    /// Two-tone intermodulation of the output, for a source of two tones.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub imd: Option<ImdMetrics>,
    /// Step metrics of the output, for a step source.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub step: Option<StepMetrics>,
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
            imd: None,
            step: None,
        }
    }
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
            let mut v = st.kind.echo();
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
