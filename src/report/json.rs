//! report.json: the scenario, every resolved parameter of the chain (units in the key names), and the metrics.

use serde::Serialize;
use serde_json::{Value, json};

use crate::capture::compare::CompareReport;
use crate::engine::audio::AudioReport;
use crate::engine::pipeline::si;
use crate::engine::plan::{BandRule, Plan, TonePlacement};
use crate::measure::audio::AudioFigures;
use crate::measure::chain::{AdcMetrics, ChainMetrics, LatencyMetrics, OutputMetrics};
use crate::measure::imd::ImdMetrics;
use crate::measure::step::StepMetrics;
use crate::scenario::{ChirpLaw, Scenario, Slip, Waveform};

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
    /// Values that are legal but almost surely slips, found in the scenario or after the run (a measured
    /// latency far from its budget): `{location, key, message, suggestion}`.
    pub warnings: Vec<Slip>,
    /// Two-tone intermodulation of the output, for a source of two tones.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub imd: Option<ImdMetrics>,
    /// Step metrics of the output, for a step source.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub step: Option<StepMetrics>,
    /// Audio figures (AES17 methods), with `run --audio`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub audio: Option<AudioReport>,
    /// A capture of the built chain measured beside the simulated output, with `run --compare`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub compare: Option<CompareReport>,
    /// Each `[[path]]` by name, in the scenario's order (the figures above are the first path's).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub paths: Option<PathsReport>,
    /// The delay between every two paths (first listed against each later one).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub path_delays: Option<Vec<PathDelay>>,
    /// One summary per hop (its ADC, DAC, budget subtotal and clipped codes), for a chain with more than one
    /// hop in series.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub hops: Option<Vec<crate::engine::pipeline::HopSummary>>,
}

/// One path of a scenario with `[[path]]` tables: its chain, meters and latency with its budget.
#[derive(Debug, Clone, Serialize)]
pub struct PathReport {
    pub description: String,
    pub chain: Value,
    pub adc: Option<AdcMetrics>,
    pub output: OutputMetrics,
    pub latency: LatencyMetrics,
    pub output_analysis_rate_hz: f64,
    /// `coherent`, `as_asked` or `non_coherent`: the first path places the tone; the others run the same tone
    /// and are analysed with the window.
    pub tone_placement: TonePlacement,
}

impl PathReport {
    /// The figures of a path's own report.
    pub fn from_report(description: &str, r: &Report) -> PathReport {
        PathReport {
            description: description.to_string(),
            chain: r.chain.clone(),
            adc: r.adc.as_ref().map(|a| a.metrics.clone()),
            output: r.output.clone(),
            latency: r.latency.clone(),
            output_analysis_rate_hz: r.run.output_analysis_rate_hz,
            tone_placement: r.run.tone_placement,
        }
    }
}

/// Paths by name, written as a JSON object in the scenario's order.
#[derive(Debug, Clone)]
pub struct PathsReport(pub Vec<(String, PathReport)>);

impl Serialize for PathsReport {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_map(self.0.iter().map(|(k, v)| (k, v)))
    }
}

/// What a listener switching from path `from` to path `to` hears: the programme moved by this much (positive:
/// `to` is later).
#[derive(Debug, Clone, Serialize)]
pub struct PathDelay {
    pub from: String,
    pub to: String,
    /// `to`'s measured latency minus `from`'s.
    pub latency_difference_s: f64,
    /// Measured directly: `to`'s output record cross-correlated against `from`'s (searched around the budget
    /// difference).
    pub cross_correlated_s: f64,
    /// `to`'s latency budget minus `from`'s.
    pub budget_difference_s: f64,
    /// cross_correlated - latency_difference: how far the two measurements agree.
    pub agreement_s: f64,
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
    /// Length of each file (s).
    pub seconds: f64,
    /// Length of the records' span the files were made from (s).
    pub record_s: f64,
    /// How the files were made longer than the records: "no", "seamless" (a coherent record read as one
    /// period of an endless signal) or "crossfaded" (repeated with a short crossfade at each join).
    pub looped: String,
    /// Raised-cosine fade at both ends of each file (s).
    pub fade_s: f64,
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
    /// `coherent` (moved by at most 0.1 %), `as_asked` (not a sine, or coherence off) or `non_coherent`
    /// (coherence asked for but impossible within the run: analysed with the window).
    pub tone_placement: TonePlacement,
    /// The scenario's own duration when the run was lengthened to hold the tone coherently.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub lengthened_from_s: Option<f64>,
    pub output_analysis_rate_hz: f64,
    /// Where the output metrics' band comes from: `written` (analysis.band), `converter_nyquist` or
    /// `record_passband`.
    pub output_band_rule: BandRule,
    pub capture_start_s: f64,
    pub capture_length: usize,
}

impl Report {
    pub fn new(sc: &Scenario, plan: &Plan, m: ChainMetrics) -> Report {
        // The figures that restate the configuration (the converter's rate and conversion time, the budget's
        // delays) are echoed at the configuration's precision, as the chain is ([`round_echo`]); measured
        // figures keep every digit.
        let echo =
            |x: f64| crate::format::units::round_significant(x, crate::format::units::ECHO_DIGITS);
        let mut m = m;
        if let Some(a) = &mut m.adc {
            a.sample_rate_hz = echo(a.sample_rate_hz);
            a.conversion_time_s = echo(a.conversion_time_s);
        }
        m.latency.budget_s = echo(m.latency.budget_s);
        for b in &mut m.latency.budget {
            b.seconds = echo(b.seconds);
        }
        Report {
            scenario: ScenarioInfo {
                name: sc.name.clone(),
                description: sc.description.clone(),
                origin: sc.origin.clone(),
                seed: sc.simulation.seed,
                warnings: sc.warnings.clone(),
                convchain_version: env!("CARGO_PKG_VERSION").to_string(),
            },
            chain: round_echo(chain_json(sc)),
            adc: m.adc.map(|metrics| AdcReport { metrics }),
            output: m.output,
            latency: m.latency,
            run: RunInfo {
                analog_rate_hz: plan.timebase.rate_hz,
                grid_steps: plan.n_total,
                requested_frequency_hz: plan.requested_frequency_hz,
                frequency_hz: plan.frequency_hz,
                coherent_cycles: plan.coherent_cycles,
                tone_placement: plan.tone,
                lengthened_from_s: plan.lengthened_from_s,
                output_analysis_rate_hz: plan.out_rate_hz,
                output_band_rule: plan.out_band_rule,
                capture_start_s: plan.timebase.time_s(plan.capture_n0),
                capture_length: plan.capture_len,
            },
            listening: None,
            warnings: sc.slips.clone(),
            imd: None,
            step: None,
            audio: None,
            compare: None,
            paths: None,
            path_delays: None,
            hops: None,
        }
    }
}

impl Report {
    /// The audio figures as rows (name, ADC codes, analog output), for the table and the reports; empty without
    /// `--audio`.
    pub fn audio_rows(&self) -> Vec<(&'static str, String, String)> {
        let Some(a) = &self.audio else {
            return Vec::new();
        };
        let db = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{v:.2} dB"));
        let thd_n = |f: &AudioFigures| match (f.thd_n_db, f.thd_n_pct) {
            (Some(d), Some(p)) => format!("{d:.2} dB ({p:.4} %)"),
            _ => "-".into(),
        };
        let noise = |x: Option<f64>| x.map_or("silent".to_string(), |v| format!("{v:.2} dBFS"));
        let response = |f: &AudioFigures| {
            f.response_db
                .as_ref()
                .map_or("-".into(), |r| format!("{:+.2} .. {:+.2} dB", r.min, r.max))
        };
        vec![
            ("THD+N (unweighted)", thd_n(&a.adc), thd_n(&a.output)),
            (
                "dynamic range (A-weighted)",
                db(a.adc.dynamic_range_db),
                db(a.output.dynamic_range_db),
            ),
            (
                "idle noise (A-weighted)",
                noise(a.adc.noise_a_dbfs),
                noise(a.output.noise_a_dbfs),
            ),
            (
                "idle noise (unweighted)",
                noise(a.adc.noise_dbfs),
                noise(a.output.noise_dbfs),
            ),
            ("response", response(&a.adc), response(&a.output)),
        ]
    }

    /// The sentence that heads the audio figures: the band, the levels and the reference of the response.
    pub fn audio_note(&self) -> Option<String> {
        let a = self.audio.as_ref()?;
        let reference = a.output.response_db.as_ref().map_or(String::new(), |r| {
            format!(", response relative to {}", si(r.reference_hz, "Hz"))
        });
        Some(format!(
            "audio figures over {} .. {} (AES17): dynamic range from a {} dBFS tone, A-weighted; idle noise \
             with the source silent{reference}",
            si(a.band_hz[0], "Hz"),
            si(a.band_hz[1], "Hz"),
            a.dynamic_range_level_dbfs,
        ))
    }

    /// The band the output figures use and where it comes from, with the wideband figures when there are any.
    pub fn band_note(&self) -> String {
        let o = &self.output;
        let why = self.run.output_band_rule.describe();
        let mut s = format!("output figures over 0 .. {} ({why})", si(o.band_hz, "Hz"));
        if let Some(w) = &o.wideband {
            let f = |x: Option<f64>, unit: &str| {
                x.map_or("-".to_string(), |v| format!("{v:.2} {unit}"))
            };
            s += &format!(
                "; over 0 .. {}: SINAD {}, ENOB {}",
                si(w.band_hz, "Hz"),
                f(w.sinad_db, "dB"),
                f(w.enob_bits, "bits")
            );
        }
        s
    }

    /// Lines that say how the test tone was placed and the run's length changed for it (terminal and reports).
    pub fn tone_notes(&self) -> Vec<String> {
        use crate::format::units::{SiStyle, format_si_as};
        let r = &self.run;
        let mut v = Vec::new();
        let (Some(req), Some(used)) = (r.requested_frequency_hz, r.frequency_hz) else {
            return v;
        };
        match r.tone_placement {
            TonePlacement::Coherent if req != used => v.push(format!(
                "source at {} (asked {}, {:+.3} %): {} whole cycles in the record, for coherent sampling",
                format_si_as(used, "Hz", SiStyle::Significant(7)),
                si(req, "Hz"),
                100.0 * (used - req) / req,
                r.coherent_cycles.unwrap_or(0)
            )),
            TonePlacement::NonCoherent => v.push(format!(
                "source at {} analysed non-coherently with the {} window: no record in this run holds it \
                 coherently within 0.1 % (lengthen simulation.duration for a coherent record)",
                si(req, "Hz"),
                self.chain["analysis"]["window"].as_str().unwrap_or("analysis")
            )),
            _ => {}
        }
        if let Some(from) = r.lengthened_from_s {
            let to = self.chain["simulation"]["duration_s"]
                .as_f64()
                .unwrap_or(from);
            v.push(format!(
                "run lengthened from {} to {} so that the record holds the tone coherently",
                si(from, "s"),
                si(to, "s")
            ));
        }
        v
    }
}

/// `v` with every number that is not a whole number rounded to
/// [`crate::format::units::ECHO_DIGITS`] significant digits: the configuration echoed as the user wrote it
/// ("10 us" reads `1e-05`, not the `9.999999999999999e-06` of 10 x 1e-6).
pub fn round_echo(mut v: Value) -> Value {
    fn walk(v: &mut Value) {
        match v {
            Value::Number(n) if n.is_f64() => {
                if let Some(x) = n.as_f64() {
                    let r = crate::format::units::round_significant(
                        x,
                        crate::format::units::ECHO_DIGITS,
                    );
                    if let Some(m) = serde_json::Number::from_f64(r) {
                        *n = m;
                    }
                }
            }
            Value::Array(a) => a.iter_mut().for_each(walk),
            Value::Object(o) => o.values_mut().for_each(walk),
            _ => {}
        }
    }
    walk(&mut v);
    v
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
        Waveform::Chord {
            amplitude_v,
            beat_s,
        } => json!({"waveform": "chord", "amplitude_v": amplitude_v, "beat_s": beat_s}),
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
            "window": a.window.name(),
            "coherent": a.coherent,
            "harmonics": a.harmonics,
        },
    })
}
