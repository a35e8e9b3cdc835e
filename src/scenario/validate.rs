//! From a spanned TOML table to a checked [`Scenario`]: schema, defaults, ranges, stage order and
//! cross-stage resolution. Every error names the offending value's position and key path.

use std::path::{Path, PathBuf};

use super::reader::{
    At, Node, ScenarioError, SourceMap, Span, Table, TableReader, Value, show, unknown_choice,
};
use super::units::{Dimension, format_si};
use super::*;

/// Stage kinds as written in a file.
const STAGE_KINDS: [&str; 6] = [
    "sample_hold",
    "sar_adc",
    "link",
    "dac",
    "filter",
    "amplifier",
];

const WAVEFORMS: [(&str, WaveKind); 10] = [
    ("sine", WaveKind::Sine),
    ("square", WaveKind::Square),
    ("triangle", WaveKind::Triangle),
    ("sawtooth", WaveKind::Sawtooth),
    ("multitone", WaveKind::Multitone),
    ("chirp", WaveKind::Chirp),
    ("step", WaveKind::Step),
    ("dc", WaveKind::Dc),
    ("noise", WaveKind::Noise),
    ("wav", WaveKind::Wav),
];

/// Every key a `[source]` table may hold, for any waveform.
const SOURCE_KEYS: [&str; 18] = [
    "waveform",
    "frequency",
    "amplitude",
    "offset",
    "phase",
    "duty",
    "tones",
    "start",
    "stop",
    "sweep_time",
    "law",
    "at",
    "rms",
    "bandwidth",
    "file",
    "channel",
    "full_scale",
    "repeat",
];

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum WaveKind {
    Sine,
    Square,
    Triangle,
    Sawtooth,
    Multitone,
    Chirp,
    Step,
    Dc,
    Noise,
    Wav,
}

/// The analog-rate margin below which a warning is given (x the highest source frequency).
const RECOMMENDED_OVERSAMPLING: f64 = 20.0;

/// Build a checked scenario from a parsed document.
pub fn build(
    map: &SourceMap<'_>,
    root: &Table,
    base_dir: &Path,
) -> Result<Scenario, ScenarioError> {
    let mut r = TableReader::new(map, root, "");
    let name = r.string("name")?;
    let description = r.string("description")?;
    let sim_t = r.table("simulation")?;
    let src_t = r.table("source")?;
    let stage_nodes = r.array("stage")?;
    let analysis_t = r.table("analysis")?;
    let spread_t = r.table("spread")?;
    // Report an unknown top-level key (e.g. `[stages]`) before complaining about missing ones.
    let missing_name = r.missing("name", "\"my-bench\"");
    let missing_sim = r.missing("simulation", "a [simulation] table");
    let missing_src = r.missing("source", "a [source] table");
    r.finish(&[], "the top level")?;

    let name = name.ok_or(missing_name)?;
    check_name(map, &name)?;
    let description = description.map(|d| d.value.to_string()).unwrap_or_default();
    let sim_t = sim_t.ok_or_else(|| {
        missing_sim.with_hint("add a [simulation] table with analog_rate and duration")
    })?;
    let src_t =
        src_t.ok_or_else(|| missing_src.with_hint("add a [source] table with a waveform"))?;

    let mut warnings = Vec::new();
    let (simulation, rate_span) = simulation(map, sim_t)?;
    let source = source(map, src_t, base_dir, &simulation, &mut warnings)?;

    // Source frequency against the analog grid.
    if let Some(f_hz) = source.waveform.highest_frequency_hz() {
        let ratio = simulation.analog_rate_hz / f_hz;
        if ratio < 2.0 {
            return Err(map
                .error(
                    &rate_span,
                    "simulation.analog_rate",
                    format!(
                        "analog_rate {} is below twice the highest source frequency ({})",
                        format_si(simulation.analog_rate_hz, "Hz"),
                        format_si(f_hz, "Hz")
                    ),
                )
                .with_hint(format!(
                    "raise analog_rate to at least {} ({} or more is recommended)",
                    format_si(2.0 * f_hz, "Hz"),
                    format_si(RECOMMENDED_OVERSAMPLING * f_hz, "Hz")
                )));
        }
        if ratio < RECOMMENDED_OVERSAMPLING {
            warnings.push(format!(
                "{}: analog_rate {} is only {:.1}x the highest source frequency ({}); {} (20x) or more keeps the \
                 analog grid accurate",
                map.locate(&rate_span, "simulation.analog_rate"),
                format_si(simulation.analog_rate_hz, "Hz"),
                ratio,
                format_si(f_hz, "Hz"),
                format_si(RECOMMENDED_OVERSAMPLING * f_hz, "Hz")
            ));
        }
    }

    let stages = match stage_nodes {
        None => Vec::new(),
        Some(nodes) => stages(map, &nodes, &simulation)?,
    };
    let analysis = match analysis_t {
        None => Analysis {
            band_hz: None,
            window: WindowKind::BlackmanHarris,
            coherent: true,
            harmonics: 9,
        },
        Some(t) => analysis(map, t)?,
    };
    let spread = match spread_t {
        None => Vec::new(),
        Some(t) => spread(map, t, root)?,
    };
    Ok(Scenario {
        name: name.value.to_string(),
        description,
        origin: map.origin().to_string(),
        base_dir: base_dir.to_path_buf(),
        simulation,
        source,
        stages,
        analysis,
        spread,
        warnings,
    })
}

fn check_name(map: &SourceMap<'_>, name: &At<&str>) -> Result<(), ScenarioError> {
    let bad = name
        .value
        .chars()
        .find(|c| !(c.is_ascii_alphanumeric() || *c == '-' || *c == '_'));
    if name.value.is_empty() {
        return Err(map
            .error(&name.span, "name", "must not be empty")
            .with_hint("it names the output folder, e.g. name = \"my-bench\""));
    }
    if let Some(c) = bad {
        let fixed: String = name
            .value
            .chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                    c
                } else {
                    '-'
                }
            })
            .collect();
        return Err(map
            .error(
                &name.span,
                "name",
                format!("`{c}` is not allowed: the name is a folder name (letters, digits, - and _ only)"),
            )
            .with_hint(format!("for example name = \"{fixed}\"")));
    }
    Ok(())
}

fn simulation(map: &SourceMap<'_>, t: &Table) -> Result<(Simulation, Span), ScenarioError> {
    let mut r = TableReader::new(map, t, "simulation");
    let rate = r.req_positive("analog_rate", Dimension::Frequency, "\"10 MHz\"")?;
    let duration = r.req_positive("duration", Dimension::Time, "\"20 ms\"")?;
    let settle = r.quantity("settle", Dimension::Time)?;
    let seed = r.integer("seed", 0, u64::MAX as i128)?;
    r.finish(&[], "[simulation]")?;
    let settle_s = match settle {
        None => duration.value / 10.0,
        Some(s) => {
            if s.value < 0.0 {
                return Err(map.error(
                    &s.span,
                    "simulation.settle",
                    format!(
                        "must not be negative, found {}",
                        show(s.value, Dimension::Time)
                    ),
                ));
            }
            if s.value >= duration.value {
                return Err(map
                    .error(
                        &s.span,
                        "simulation.settle",
                        format!(
                            "settle ({}) must be shorter than duration ({})",
                            format_si(s.value, "s"),
                            format_si(duration.value, "s")
                        ),
                    )
                    .with_hint(
                        "analysis uses the time after settle: shorten settle or lengthen duration",
                    ));
            }
            s.value
        }
    };
    Ok((
        Simulation {
            analog_rate_hz: rate.value,
            duration_s: duration.value,
            settle_s,
            seed: seed.map(|s| s.value as u64).unwrap_or(1),
        },
        rate.span,
    ))
}

fn source(
    map: &SourceMap<'_>,
    t: &Table,
    base_dir: &Path,
    sim: &Simulation,
    warnings: &mut Vec<String>,
) -> Result<Source, ScenarioError> {
    use Dimension as D;
    let mut r = TableReader::new(map, t, "source");
    let kind = r
        .choice("waveform", &WAVEFORMS)?
        .ok_or_else(|| r.missing("waveform", "\"sine\""))?
        .value;
    let offset_v = r.quantity("offset", D::Voltage)?.map_or(0.0, |q| q.value);
    let waveform = match kind {
        WaveKind::Sine => Waveform::Sine {
            frequency_hz: r
                .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                .value,
            amplitude_v: amplitude(&mut r)?,
            phase_rad: r.quantity("phase", D::Angle)?.map_or(0.0, |q| q.value),
        },
        WaveKind::Square => {
            let frequency_hz = r
                .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                .value;
            let amplitude_v = amplitude(&mut r)?;
            let duty = match r.quantity("duty", D::Ratio)? {
                None => 0.5,
                Some(q) if q.value <= 0.0 || q.value >= 1.0 => {
                    return Err(r
                        .error(
                            &q.span,
                            "duty",
                            format!("must be between 0 and 1 (exclusive), found {}", q.value),
                        )
                        .with_hint("write a fraction or a percentage, e.g. duty = \"25%\""));
                }
                Some(q) => q.value,
            };
            Waveform::Square {
                frequency_hz,
                amplitude_v,
                duty,
            }
        }
        WaveKind::Triangle => Waveform::Triangle {
            frequency_hz: r
                .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                .value,
            amplitude_v: amplitude(&mut r)?,
        },
        WaveKind::Sawtooth => Waveform::Sawtooth {
            frequency_hz: r
                .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                .value,
            amplitude_v: amplitude(&mut r)?,
        },
        WaveKind::Multitone => {
            let example = "[{ frequency = \"1 kHz\", amplitude = \"0.5 V\" }]";
            let nodes = r
                .array("tones")?
                .ok_or_else(|| r.missing("tones", example))?;
            if nodes.value.is_empty() {
                return Err(r
                    .error(&nodes.span, "tones", "needs at least one tone")
                    .with_hint(format!("tones = {example}")));
            }
            let mut tones = Vec::with_capacity(nodes.value.len());
            for (i, node) in nodes.value.iter().enumerate() {
                let path = format!("source.tones.{}", i + 1);
                let Value::Table(tt) = &node.value else {
                    return Err(map
                        .error(
                            &node.span,
                            &path,
                            format!("expected a table such as {{ frequency = \"1 kHz\", amplitude = \"0.5 V\" }}, found {}", node.value.type_name()),
                        ));
                };
                let mut tr = TableReader::new(map, tt, path);
                let tone = Tone {
                    frequency_hz: tr
                        .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                        .value,
                    amplitude_v: amplitude(&mut tr)?,
                    phase_rad: tr.quantity("phase", D::Angle)?.map_or(0.0, |q| q.value),
                };
                tr.finish(&[], "a tone")?;
                tones.push(tone);
            }
            Waveform::Multitone { tones }
        }
        WaveKind::Chirp => {
            let start_hz = r.req_positive("start", D::Frequency, "\"20 Hz\"")?.value;
            let stop_hz = r.req_positive("stop", D::Frequency, "\"20 kHz\"")?.value;
            let sweep_s = r
                .positive("sweep_time", D::Time)?
                .map_or(sim.duration_s, |q| q.value);
            let law = r
                .choice(
                    "law",
                    &[("linear", ChirpLaw::Linear), ("log", ChirpLaw::Logarithmic)],
                )?
                .map_or(ChirpLaw::Linear, |q| q.value);
            Waveform::Chirp {
                start_hz,
                stop_hz,
                sweep_s,
                law,
                amplitude_v: amplitude(&mut r)?,
            }
        }
        WaveKind::Step => {
            let at_s = r.non_negative("at", D::Time)?;
            if at_s >= sim.duration_s {
                warnings.push(format!(
                    "{}: the step at {} comes after the end of the simulation ({})",
                    map.locate(&r.span(), "source.at"),
                    format_si(at_s, "s"),
                    format_si(sim.duration_s, "s")
                ));
            }
            let amplitude_v = r.req_quantity("amplitude", D::Voltage, "\"1 V\"")?.value;
            Waveform::Step { at_s, amplitude_v }
        }
        WaveKind::Dc => Waveform::Dc,
        WaveKind::Noise => {
            let rms = r.req_quantity("rms", D::Voltage, "\"10 mV\"")?;
            if rms.value < 0.0 {
                return Err(r.error(&rms.span, "rms", "must not be negative"));
            }
            Waveform::Noise {
                rms_v: rms.value,
                bandwidth_hz: r.positive("bandwidth", D::Frequency)?.map(|q| q.value),
            }
        }
        WaveKind::Wav => wav(&mut r, base_dir)?,
    };
    let wave_name = WAVEFORMS
        .iter()
        .find(|(_, k)| *k == kind)
        .map_or("?", |(n, _)| *n);
    r.finish(&SOURCE_KEYS, &format!("waveform \"{wave_name}\""))?;
    Ok(Source { waveform, offset_v })
}

/// Peak amplitude, required, >= 0.
fn amplitude(r: &mut TableReader<'_, '_>) -> Result<f64, ScenarioError> {
    let a = r.req_quantity("amplitude", Dimension::Voltage, "\"1 V\"")?;
    if a.value < 0.0 {
        return Err(r
            .error(
                &a.span,
                "amplitude",
                "must not be negative (it is the peak value)",
            )
            .with_hint("use phase (or offset) to move the waveform instead"));
    }
    Ok(a.value)
}

fn wav(r: &mut TableReader<'_, '_>, base_dir: &Path) -> Result<Waveform, ScenarioError> {
    let file = r
        .string("file")?
        .ok_or_else(|| r.missing("file", "\"take1.wav\""))?;
    let channel = r.integer("channel", 0, u16::MAX as i128)?;
    let full_scale_v = r
        .positive("full_scale", Dimension::Voltage)?
        .map_or(1.0, |q| q.value);
    let repeat = r.boolean("repeat")?.is_none_or(|q| q.value);
    let given = PathBuf::from(file.value);
    let path = if given.is_absolute() {
        given.clone()
    } else {
        base_dir.join(&given)
    };
    let channels = crate::stages::wav_file::read_channel(&path, 0)
        .map_err(|e| {
            r.error(&file.span, "file", crate::stages::wav_file::describe(&e))
                .with_hint(format!(
                    "relative paths are taken from the scenario's folder ({})",
                    base_dir.display()
                ))
        })?
        .channels;
    let channel_index = channel.as_ref().map_or(0, |c| c.value as usize);
    if let Some(c) = &channel
        && c.value >= i128::from(channels)
    {
        return Err(r
            .error(
                &c.span,
                "channel",
                format!(
                    "channel {} does not exist: {} has {} channel{}",
                    c.value,
                    path.display(),
                    channels,
                    if channels == 1 { "" } else { "s" }
                ),
            )
            .with_hint(format!(
                "channels count from 0; use 0..={}",
                channels.saturating_sub(1)
            )));
    }
    Ok(Waveform::Wav {
        path: given,
        channel: channel_index,
        full_scale_v,
        repeat,
    })
}

/// A stage as read, before cross-stage defaults are filled in.
struct ReadStage {
    label: String,
    kind_span: Span,
    kind: StageKind,
    /// Link or DAC `bits` when given.
    bits_given: bool,
    /// DAC `range` when given.
    range_given: bool,
}

fn stages(
    map: &SourceMap<'_>,
    nodes: &At<&[Node]>,
    sim: &Simulation,
) -> Result<Vec<Stage>, ScenarioError> {
    let mut read = Vec::with_capacity(nodes.value.len());
    for (i, node) in nodes.value.iter().enumerate() {
        let path = format!("stage.{}", i + 1);
        let Value::Table(t) = &node.value else {
            return Err(map
                .error(
                    &node.span,
                    &path,
                    format!("expected a table, found {}", node.value.type_name()),
                )
                .with_hint("write each stage as a [[stage]] section"));
        };
        read.push(stage(map, t, path, i + 1, sim)?);
    }
    check_order(map, &read)?;
    Ok(resolve(read))
}

fn stage(
    map: &SourceMap<'_>,
    t: &Table,
    path: String,
    index: usize,
    sim: &Simulation,
) -> Result<ReadStage, ScenarioError> {
    let mut r = TableReader::new(map, t, path);
    let label = r.string("name")?;
    let kind_at = r.string("kind")?.ok_or_else(|| {
        r.missing("kind", "\"filter\"")
            .with_hint(format!("add `kind = ...`, one of {}", quoted(&STAGE_KINDS)))
    })?;
    let kind_name = kind_at.value;
    if !STAGE_KINDS.contains(&kind_name) {
        return Err(unknown_choice(
            map,
            &kind_at.span,
            &r.path_of("kind"),
            "stage kind",
            kind_name,
            &STAGE_KINDS,
        ));
    }
    let mut bits_given = false;
    let mut range_given = false;
    let kind = match kind_name {
        "sample_hold" => StageKind::SampleHold(sample_hold(&mut r)?),
        "sar_adc" => StageKind::SarAdc(sar_adc(&mut r)?),
        "link" => {
            let (cfg, given) = link(&mut r)?;
            bits_given = given;
            StageKind::Link(cfg)
        }
        "dac" => {
            let (cfg, b, rg) = dac(&mut r)?;
            bits_given = b;
            range_given = rg;
            StageKind::Dac(cfg)
        }
        "filter" => StageKind::Filter(filter(&mut r, sim)?),
        _ => StageKind::Amplifier(amplifier(&mut r)?),
    };
    r.finish(&[], &format!("a {kind_name} stage"))?;
    let label = match label {
        Some(l) if !l.value.trim().is_empty() => l.value.to_string(),
        _ => format!("stage.{index} {kind_name}"),
    };
    Ok(ReadStage {
        label,
        kind_span: kind_at.span,
        kind,
        bits_given,
        range_given,
    })
}

fn quoted(names: &[&str]) -> String {
    names
        .iter()
        .map(|n| format!("\"{n}\""))
        .collect::<Vec<_>>()
        .join(", ")
}

fn sample_hold(r: &mut TableReader<'_, '_>) -> Result<SampleHoldCfg, ScenarioError> {
    use Dimension as D;
    Ok(SampleHoldCfg {
        acquisition_s: r.non_negative("acquisition", D::Time)?,
        aperture_delay_s: r.non_negative("aperture_delay", D::Time)?,
        aperture_jitter_s: r.non_negative("aperture_jitter", D::Time)?,
        droop_v_per_s: r.quantity("droop", D::SlewRate)?.map_or(0.0, |q| q.value),
        hold_step_v: r
            .quantity("hold_step", D::Voltage)?
            .map_or(0.0, |q| q.value),
    })
}

/// Bits of a converter, link or DAC word.
const MAX_BITS: i128 = 24;

fn sar_adc(r: &mut TableReader<'_, '_>) -> Result<SarAdcCfg, ScenarioError> {
    use Dimension as D;
    let bits = r
        .integer("bits", 1, MAX_BITS)?
        .ok_or_else(|| r.missing("bits", "12"))?
        .value as u32;
    let range_v = r
        .pair("range", D::Voltage)?
        .ok_or_else(|| r.missing("range", "[\"0 V\", \"5 V\"]"))?
        .value;
    let cycles_at = r.integer("cycles", 1, 10_000)?;
    let cycles = cycles_at.as_ref().map_or(bits + 1, |c| c.value as u32);
    if let Some(c) = &cycles_at
        && c.value < i128::from(bits)
    {
        return Err(r
            .error(
                &c.span,
                "cycles",
                format!(
                    "a {bits}-bit SAR needs at least {bits} cycles (one per bit), found {}",
                    c.value
                ),
            )
            .with_hint(format!(
                "use cycles = {} (one per bit plus one to sample)",
                bits + 1
            )));
    }
    let clock = r.positive("clock", D::Frequency)?;
    let conv = r.positive("conversion_time", D::Time)?;
    let (clock_hz, conversion_time_s) = match (&clock, &conv) {
        (Some(_), Some(ct)) => {
            return Err(r
                .error(
                    &ct.span,
                    "conversion_time",
                    "give clock or conversion_time, not both",
                )
                .with_hint("remove one: conversion_time = cycles / clock"));
        }
        (Some(c), None) => (c.value, f64::from(cycles) / c.value),
        (None, Some(ct)) => (f64::from(cycles) / ct.value, ct.value),
        (None, None) => {
            return Err(r
                .missing("clock", "\"1 MHz\"")
                .with_hint("give the bit-trial clock (clock = \"1 MHz\") or the conversion time (conversion_time = \"10 us\")"));
        }
    };
    let sample_rate = r.positive("sample_rate", D::Frequency)?;
    if let Some(sr) = &sample_rate {
        let max_rate = 1.0 / conversion_time_s;
        // A relative tolerance so that e.g. 100 kSPS with a 10 us conversion is accepted despite rounding.
        if sr.value > max_rate * (1.0 + 1e-9) {
            let faster = if clock.is_some() {
                format!(
                    "raise clock to at least {}",
                    format_si(f64::from(cycles) * sr.value, "Hz")
                )
            } else {
                format!(
                    "shorten conversion_time to at most {}",
                    format_si(1.0 / sr.value, "s")
                )
            };
            return Err(r
                .error(
                    &sr.span,
                    "sample_rate",
                    format!(
                        "sample_rate {} is faster than the converter allows: one conversion takes {} ({} cycles at {}), so \
                         at most {}",
                        format_si(sr.value, "Hz"),
                        format_si(conversion_time_s, "s"),
                        cycles,
                        format_si(clock_hz, "Hz"),
                        format_si(max_rate, "Hz")
                    ),
                )
                .with_hint(format!("lower sample_rate to at most {}, or {faster}", format_si(max_rate, "Hz"))));
        }
    }
    let input = r
        .choice(
            "input",
            &[("held", AdcInput::Held), ("live", AdcInput::Live)],
        )?
        .map_or(AdcInput::Held, |q| q.value);
    let comparator_offset_v = r
        .quantity("comparator_offset", D::Voltage)?
        .map_or(0.0, |q| q.value);
    let comparator_noise_v = r.non_negative("comparator_noise", D::Voltage)?;
    let capacitor_mismatch = r.non_negative("capacitor_mismatch", D::Ratio)?;
    let dither = r
        .choice(
            "dither",
            &[
                ("none", DitherKind::None),
                ("rpdf", DitherKind::Rpdf),
                ("tpdf", DitherKind::Tpdf),
            ],
        )?
        .map_or(DitherKind::None, |q| q.value);
    let dither_lsb = match (r.number("dither_lsb")?, dither) {
        (Some(d), DitherKind::None) => {
            return Err(r
                .error(&d.span, "dither_lsb", "has no effect without dither")
                .with_hint("set dither = \"rpdf\" or \"tpdf\", or remove dither_lsb"));
        }
        (Some(d), _) if d.value < 0.0 => {
            return Err(r.error(&d.span, "dither_lsb", "must not be negative"));
        }
        (Some(d), _) => d.value,
        (None, DitherKind::None) => 0.0,
        (None, DitherKind::Rpdf) => 1.0,
        (None, DitherKind::Tpdf) => 2.0,
    };
    Ok(SarAdcCfg {
        bits,
        range_v,
        clock_hz,
        cycles,
        conversion_time_s,
        sample_rate_hz: sample_rate.map(|q| q.value),
        input,
        comparator_offset_v,
        comparator_noise_v,
        capacitor_mismatch,
        dither,
        dither_lsb,
    })
}

fn link(r: &mut TableReader<'_, '_>) -> Result<(LinkCfg, bool), ScenarioError> {
    let delay_s = r.non_negative("delay", Dimension::Time)?;
    let frame = r
        .integer("frame", 1, 1 << 24)?
        .map_or(1, |q| q.value as u32);
    let bit_error_rate = r.non_negative("bit_error_rate", Dimension::Ratio)?;
    if bit_error_rate > 0.5 {
        let span = r
            .take("bit_error_rate")
            .map(|n| n.span.clone())
            .unwrap_or_default();
        return Err(r
            .error(
                &span,
                "bit_error_rate",
                format!("must be at most 0.5, found {bit_error_rate}"),
            )
            .with_hint("it is the probability that one bit is flipped, e.g. \"1 ppm\""));
    }
    let bits = r.integer("bits", 1, MAX_BITS)?;
    Ok((
        LinkCfg {
            delay_s,
            frame,
            bit_error_rate,
            bits: bits.as_ref().map_or(0, |b| b.value as u32),
        },
        bits.is_some(),
    ))
}

fn dac(r: &mut TableReader<'_, '_>) -> Result<(DacCfg, bool, bool), ScenarioError> {
    use Dimension as D;
    let bits = r.integer("bits", 1, MAX_BITS)?;
    let range = r.pair("range", D::Voltage)?;
    let ladder = r
        .choice(
            "ladder",
            &[
                ("ideal", Ladder::Ideal),
                ("r2r", Ladder::R2r),
                ("binary", Ladder::Binary),
            ],
        )?
        .map_or(Ladder::Ideal, |q| q.value);
    let tolerance = r.non_negative("tolerance", D::Ratio)?;
    if tolerance >= 1.0 {
        let span = r
            .take("tolerance")
            .map(|n| n.span.clone())
            .unwrap_or_default();
        return Err(r
            .error(
                &span,
                "tolerance",
                format!("must be below 1 (100 %), found {tolerance}"),
            )
            .with_hint("write a relative tolerance such as \"1%\" or 0.001"));
    }
    let tolerance_distribution = r
        .choice(
            "tolerance_distribution",
            &[
                ("uniform", ToleranceDistribution::Uniform),
                ("gaussian", ToleranceDistribution::Gaussian),
            ],
        )?
        .map_or(ToleranceDistribution::Uniform, |q| q.value);
    let offset_v = r.quantity("offset", D::Voltage)?.map_or(0.0, |q| q.value);
    let gain_error = match r.quantity("gain_error", D::Ratio)? {
        Some(g) if g.value <= -1.0 => {
            return Err(r.error(
                &g.span,
                "gain_error",
                format!("must be above -1 (-100 %), found {}", g.value),
            ));
        }
        g => g.map_or(0.0, |q| q.value),
    };
    let output = output_amp(r)?;
    Ok((
        DacCfg {
            bits: bits.as_ref().map_or(0, |b| b.value as u32),
            range_v: range.as_ref().map_or((0.0, 0.0), |q| q.value),
            ladder,
            tolerance,
            tolerance_distribution,
            offset_v,
            gain_error,
            output,
        },
        bits.is_some(),
        range.is_some(),
    ))
}

/// `slew_rate`, `settling` | `bandwidth`, `rails`, shared by dac and amplifier.
fn output_amp(r: &mut TableReader<'_, '_>) -> Result<OutputAmpCfg, ScenarioError> {
    use Dimension as D;
    let slew = r.positive("slew_rate", D::SlewRate)?;
    let settling = r.positive("settling", D::Time)?;
    let bandwidth = r.positive("bandwidth", D::Frequency)?;
    let tau_s = match (&settling, &bandwidth) {
        (Some(_), Some(b)) => {
            return Err(r
                .error(&b.span, "bandwidth", "give settling or bandwidth, not both")
                .with_hint("settling is the time constant tau; bandwidth f gives tau = 1/(2 pi f); remove one"));
        }
        (Some(s), None) => Some(s.value),
        (None, Some(b)) => Some(1.0 / (2.0 * std::f64::consts::PI * b.value)),
        (None, None) => None,
    };
    Ok(OutputAmpCfg {
        slew_rate_v_per_s: slew.map(|q| q.value),
        tau_s,
        rails_v: r.pair("rails", D::Voltage)?.map(|q| q.value),
    })
}

fn filter(r: &mut TableReader<'_, '_>, sim: &Simulation) -> Result<FilterCfg, ScenarioError> {
    use Dimension as D;
    #[derive(Clone, Copy, PartialEq)]
    enum Fam {
        Butterworth,
        Bessel,
        Chebyshev,
        Rc,
    }
    let response = r
        .choice(
            "response",
            &[
                ("lowpass", FilterResponse::Lowpass),
                ("highpass", FilterResponse::Highpass),
            ],
        )?
        .map_or(FilterResponse::Lowpass, |q| q.value);
    let fam = r
        .choice(
            "family",
            &[
                ("butterworth", Fam::Butterworth),
                ("bessel", Fam::Bessel),
                ("chebyshev", Fam::Chebyshev),
                ("rc", Fam::Rc),
            ],
        )?
        .map_or(Fam::Butterworth, |q| q.value);
    let order = r
        .integer("order", 1, 8)?
        .ok_or_else(|| r.missing("order", "4"))?
        .value as u32;
    let cutoff = r.req_positive("cutoff", D::Frequency, "\"20 kHz\"")?;
    let nyquist = sim.analog_rate_hz / 2.0;
    if cutoff.value >= nyquist {
        return Err(r
            .error(
                &cutoff.span,
                "cutoff",
                format!(
                    "cutoff {} must be below half the analog rate ({})",
                    format_si(cutoff.value, "Hz"),
                    format_si(nyquist, "Hz")
                ),
            )
            .with_hint(format!(
                "lower cutoff, or raise simulation.analog_rate above {} (10x or more is better)",
                format_si(2.0 * cutoff.value, "Hz")
            )));
    }
    let ripple = r.quantity("ripple", D::Decibels)?;
    let family = match (fam, ripple) {
        (Fam::Chebyshev, None) => {
            return Err(r.missing("ripple", "\"0.5 dB\"").with_hint(
                "a chebyshev filter needs its passband ripple: add ripple = \"0.5 dB\"",
            ));
        }
        (Fam::Chebyshev, Some(q)) if q.value <= 0.0 => {
            return Err(r
                .error(
                    &q.span,
                    "ripple",
                    format!("must be greater than 0 dB, found {} dB", q.value),
                )
                .with_hint("write the ripple as a positive number of decibels, e.g. \"0.5 dB\""));
        }
        (Fam::Chebyshev, Some(q)) => FilterFamily::Chebyshev { ripple_db: q.value },
        (_, Some(q)) => {
            return Err(r
                .error(
                    &q.span,
                    "ripple",
                    "ripple is only used by family = \"chebyshev\"",
                )
                .with_hint("remove ripple, or set family = \"chebyshev\""));
        }
        (Fam::Butterworth, None) => FilterFamily::Butterworth,
        (Fam::Bessel, None) => FilterFamily::Bessel,
        (Fam::Rc, None) => FilterFamily::Rc,
    };
    Ok(FilterCfg {
        response,
        family,
        order,
        cutoff_hz: cutoff.value,
    })
}

fn amplifier(r: &mut TableReader<'_, '_>) -> Result<AmplifierCfg, ScenarioError> {
    Ok(AmplifierCfg {
        gain: r
            .quantity("gain", Dimension::Gain)?
            .map_or(1.0, |q| q.value),
        offset_v: r
            .quantity("offset", Dimension::Voltage)?
            .map_or(0.0, |q| q.value),
        output: output_amp(r)?,
    })
}

/// Where a stage sits relative to the converter group `[sample_hold] sar_adc link* dac`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Place {
    /// Before the group (or an analog-only chain).
    Before,
    /// Just after a sample_hold; only a sar_adc may follow.
    AfterHold,
    /// After the sar_adc or a link: codes are digital; only links or the dac may follow.
    Digital,
    /// After the dac.
    After,
}

fn check_order(map: &SourceMap<'_>, stages: &[ReadStage]) -> Result<(), ScenarioError> {
    let mut place = Place::Before;
    let mut adc_index = None;
    for (i, s) in stages.iter().enumerate() {
        let path = format!("stage.{}.kind", i + 1);
        let err = |msg: String, hint: &str| {
            map.error(&s.kind_span, &path, msg)
                .with_hint(hint.to_string())
        };
        let kind = s.kind.kind_name();
        place = match (&s.kind, place) {
            (StageKind::Filter(_) | StageKind::Amplifier(_), Place::Before | Place::After) => place,
            (StageKind::Filter(_) | StageKind::Amplifier(_), Place::AfterHold) => {
                return Err(err(
                    format!("a {kind} cannot sit between sample_hold and sar_adc"),
                    "sample_hold must come directly before the sar_adc; move the analog stage before the sample_hold",
                ));
            }
            (StageKind::Filter(_) | StageKind::Amplifier(_), Place::Digital) => {
                return Err(err(
                    format!(
                        "a {kind} cannot sit between sar_adc and dac: the signal there is digital codes"
                    ),
                    "move it before the sar_adc (e.g. an anti-alias filter) or after the dac (e.g. a reconstruction filter)",
                ));
            }
            (StageKind::SampleHold(_), Place::Before) => Place::AfterHold,
            (StageKind::SampleHold(_), _) => {
                return Err(err(
                    "a sample_hold must come directly before a sar_adc".into(),
                    "a chain has one converter group: [sample_hold] sar_adc link* dac",
                ));
            }
            (StageKind::SarAdc(_), Place::Before | Place::AfterHold) => {
                adc_index = Some(i);
                Place::Digital
            }
            (StageKind::SarAdc(_), _) => {
                return Err(err(
                    "only one sar_adc is allowed in a chain".into(),
                    "a chain has one converter group: [sample_hold] sar_adc link* dac",
                ));
            }
            (StageKind::Link(_), Place::Digital) => Place::Digital,
            (StageKind::Link(_), _) => {
                return Err(err(
                    "a link carries codes: it must sit between the sar_adc and the dac".into(),
                    "move it after the sar_adc and before the dac",
                ));
            }
            (StageKind::Dac(_), Place::Digital) => Place::After,
            (StageKind::Dac(_), Place::After) => {
                return Err(err(
                    "only one dac is allowed in a chain".into(),
                    "a chain has one converter group: [sample_hold] sar_adc link* dac",
                ));
            }
            (StageKind::Dac(_), _) => {
                return Err(err(
                    "a dac needs codes: put a sar_adc before it".into(),
                    "a chain has one converter group: [sample_hold] sar_adc link* dac",
                ));
            }
        };
    }
    match place {
        Place::AfterHold => {
            let s = stages.last().map_or(0..0, |s| s.kind_span.clone());
            Err(map
                .error(
                    &s,
                    &format!("stage.{}.kind", stages.len()),
                    "a sample_hold must come directly before a sar_adc",
                )
                .with_hint("add a sar_adc stage after it, or remove it"))
        }
        Place::Digital => {
            let i = adc_index.unwrap_or(0);
            let s = stages.get(i).map_or(0..0, |s| s.kind_span.clone());
            Err(map
                .error(
                    &s,
                    &format!("stage.{}.kind", i + 1),
                    "a sar_adc needs a dac after it (links may sit between)",
                )
                .with_hint("add a [[stage]] with kind = \"dac\" after the sar_adc (and any links)"))
        }
        Place::Before | Place::After => Ok(()),
    }
}

/// Fill in cross-stage defaults: link bits from upstream, DAC bits from the width arriving, DAC range
/// from the ADC. Assumes the order has been checked.
fn resolve(read: Vec<ReadStage>) -> Vec<Stage> {
    let mut width = 0u32;
    let mut adc_range = (0.0, 0.0);
    read.into_iter()
        .map(|mut s| {
            match &mut s.kind {
                StageKind::SarAdc(c) => {
                    width = c.bits;
                    adc_range = c.range_v;
                }
                StageKind::Link(c) => {
                    if !s.bits_given {
                        c.bits = width;
                    }
                    width = c.bits;
                }
                StageKind::Dac(c) => {
                    if !s.bits_given {
                        c.bits = width;
                    }
                    if !s.range_given {
                        c.range_v = adc_range;
                    }
                }
                _ => {}
            }
            Stage {
                label: s.label,
                kind: s.kind,
            }
        })
        .collect()
}

fn analysis(map: &SourceMap<'_>, t: &Table) -> Result<Analysis, ScenarioError> {
    let mut r = TableReader::new(map, t, "analysis");
    let band_hz = r.positive("band", Dimension::Frequency)?.map(|q| q.value);
    let window = r
        .choice(
            "window",
            &[
                ("rectangular", WindowKind::Rectangular),
                ("hann", WindowKind::Hann),
                ("hamming", WindowKind::Hamming),
                ("blackman-harris", WindowKind::BlackmanHarris),
                ("flat-top", WindowKind::FlatTop),
            ],
        )?
        .map_or(WindowKind::BlackmanHarris, |q| q.value);
    let coherent = r.boolean("coherent")?.is_none_or(|q| q.value);
    let harmonics = r.integer("harmonics", 2, 50)?.map_or(9, |q| q.value as u32);
    r.finish(&[], "[analysis]")?;
    Ok(Analysis {
        band_hz,
        window,
        coherent,
        harmonics,
    })
}

/// Keys a `[spread]` entry may name: (table or stage kind, key, dimension of the value).
const SPREAD_KEYS: &[(&str, &str, Dimension)] = {
    use Dimension as D;
    &[
        ("simulation", "analog_rate", D::Frequency),
        ("simulation", "duration", D::Time),
        ("simulation", "settle", D::Time),
        ("source", "frequency", D::Frequency),
        ("source", "amplitude", D::Voltage),
        ("source", "offset", D::Voltage),
        ("source", "duty", D::Ratio),
        ("source", "start", D::Frequency),
        ("source", "stop", D::Frequency),
        ("source", "sweep_time", D::Time),
        ("source", "at", D::Time),
        ("source", "rms", D::Voltage),
        ("source", "bandwidth", D::Frequency),
        ("source", "full_scale", D::Voltage),
        ("sample_hold", "acquisition", D::Time),
        ("sample_hold", "aperture_delay", D::Time),
        ("sample_hold", "aperture_jitter", D::Time),
        ("sample_hold", "droop", D::SlewRate),
        ("sample_hold", "hold_step", D::Voltage),
        ("sar_adc", "clock", D::Frequency),
        ("sar_adc", "conversion_time", D::Time),
        ("sar_adc", "sample_rate", D::Frequency),
        ("sar_adc", "comparator_offset", D::Voltage),
        ("sar_adc", "comparator_noise", D::Voltage),
        ("sar_adc", "capacitor_mismatch", D::Ratio),
        ("sar_adc", "dither_lsb", D::Ratio),
        ("link", "delay", D::Time),
        ("link", "bit_error_rate", D::Ratio),
        ("dac", "tolerance", D::Ratio),
        ("dac", "offset", D::Voltage),
        ("dac", "gain_error", D::Ratio),
        ("dac", "slew_rate", D::SlewRate),
        ("dac", "settling", D::Time),
        ("dac", "bandwidth", D::Frequency),
        ("filter", "cutoff", D::Frequency),
        ("filter", "ripple", D::Decibels),
        ("amplifier", "gain", D::Gain),
        ("amplifier", "offset", D::Voltage),
        ("amplifier", "slew_rate", D::SlewRate),
        ("amplifier", "settling", D::Time),
        ("amplifier", "bandwidth", D::Frequency),
        ("analysis", "band", D::Frequency),
    ]
};

/// One `[spread]` entry before checking: its key path, where the key is written, its value.
struct SpreadEntry<'a> {
    path: String,
    key_span: Span,
    node: &'a Node,
}

/// True while a dotted path is still short of a whole key path (`stage.4` needs its key).
fn path_is_partial(path: &str) -> bool {
    let parts = path.split('.').count();
    parts
        < if path.split('.').next() == Some("stage") {
            3
        } else {
            2
        }
}

/// Entries of `[spread]`, with dotted keys (`stage.4.offset = ...` unquoted) joined back into paths.
fn flatten_spread<'a>(t: &'a Table, prefix: &str, out: &mut Vec<SpreadEntry<'a>>) {
    for e in &t.entries {
        let path = if prefix.is_empty() {
            e.key.clone()
        } else {
            format!("{prefix}.{}", e.key)
        };
        match &e.node.value {
            Value::Table(sub) if path_is_partial(&path) => flatten_spread(sub, &path, out),
            _ => out.push(SpreadEntry {
                path,
                key_span: e.key_span.clone(),
                node: &e.node,
            }),
        }
    }
}

fn table_entry<'a>(t: &'a Table, key: &str) -> Option<&'a Node> {
    t.entries.iter().find(|e| e.key == key).map(|e| &e.node)
}

/// The node a spread path points at in the scenario, and the dimension of its value.
fn spread_target<'a>(
    map: &SourceMap<'_>,
    root: &'a Table,
    e: &SpreadEntry<'_>,
    at: &str,
) -> Result<(&'a Node, Dimension), ScenarioError> {
    let err = |m: String| map.error(&e.key_span, at, m);
    let parts: Vec<&str> = e.path.split('.').collect();
    let (table, kind, key) = match parts.as_slice() {
        [section @ ("simulation" | "source" | "analysis"), key] => {
            let t = match table_entry(root, section).map(|n| &n.value) {
                Some(Value::Table(t)) => t,
                _ => {
                    return Err(err(format!("the scenario has no [{section}] table"))
                        .with_hint(format!("write the key in [{section}] first")));
                }
            };
            (t, *section, *key)
        }
        ["stage", n, key] => {
            let stages = match table_entry(root, "stage").map(|n| &n.value) {
                Some(Value::Array(a)) => a.as_slice(),
                _ => {
                    return Err(err("the scenario has no [[stage]]".into())
                        .with_hint("spread keys of stages that exist"));
                }
            };
            let idx: usize = n.parse().map_err(|_| {
                err(format!("`{n}` is not a stage number")).with_hint(
                    "stages are numbered from 1 in file order, as in \"stage.3.slew_rate\"",
                )
            })?;
            let Some(Value::Table(t)) = idx
                .checked_sub(1)
                .and_then(|i| stages.get(i))
                .map(|n| &n.value)
            else {
                return Err(err(format!(
                    "there is no stage {idx} (stages are numbered 1 to {})",
                    stages.len()
                ))
                .with_hint("count the [[stage]] sections from 1 in file order"));
            };
            let kind = match table_entry(t, "kind").map(|n| &n.value) {
                Some(Value::Str(k)) => STAGE_KINDS
                    .iter()
                    .find(|s| **s == k.as_str())
                    .copied()
                    .unwrap_or("stage"),
                _ => "stage",
            };
            (t, kind, *key)
        }
        _ => {
            return Err(err(format!("`{}` is not a key path", e.path)).with_hint(
                "write \"simulation.KEY\", \"source.KEY\", \"analysis.KEY\" or \"stage.N.KEY\" (N from 1), \
                 e.g. \"stage.4.offset\" = \"2 mV\"",
            ));
        }
    };
    let what = if matches!(kind, "simulation" | "source" | "analysis") {
        format!("[{kind}]")
    } else {
        format!("a {kind} stage")
    };
    let dim = SPREAD_KEYS
        .iter()
        .find(|(k, name, _)| *k == kind && *name == key)
        .map(|(_, _, d)| *d);
    let Some(dim) = dim else {
        if crate::scenario::overrides::is_integer_key(key) {
            return Err(
                err(format!("`{key}` takes a whole number and cannot be spread")).with_hint(
                    "spread continuous values; each Monte-Carlo run already draws its own seed",
                ),
            );
        }
        let keys: Vec<&str> = SPREAD_KEYS
            .iter()
            .filter(|(k, _, _)| *k == kind)
            .map(|(_, n, _)| *n)
            .collect();
        let mut er = err(format!(
            "`{key}` is not a numeric key of {what} that can be spread"
        ));
        er = match super::reader::did_you_mean(key, &keys) {
            Some(m) => er.with_hint(format!(
                "did you mean `{m}`? keys of {what}: {}",
                keys.join(", ")
            )),
            None => er.with_hint(format!(
                "keys of {what} that can be spread: {}",
                keys.join(", ")
            )),
        };
        return Err(er);
    };
    let Some(node) = table_entry(table, key) else {
        return Err(err(format!(
            "`{}` is not written in the scenario, so it has no nominal value to spread around",
            e.path
        ))
        .with_hint(format!("write `{key} = ...` in {what} (0 is allowed)")));
    };
    Ok((node, dim))
}

/// A spread amount: (value, relative). `%` and `ppm` are fractions of the nominal; anything else is in the
/// key's own unit.
fn spread_amount(
    map: &SourceMap<'_>,
    node: &Node,
    at: &str,
    dim: Dimension,
) -> Result<(f64, bool), ScenarioError> {
    let (v, relative) = match &node.value {
        Value::Str(s) if s.trim_end().ends_with('%') || s.trim_end().ends_with("ppm") => (
            super::reader::node_quantity(map, node, at, Dimension::Ratio)?,
            true,
        ),
        Value::Str(s) if dim == Dimension::Gain && s.contains("dB") => {
            return Err(map
                .error(&node.span, at, "a gain's spread cannot be given in dB")
                .with_hint("give it relative (\"1%\") or in V/V (0.01)"));
        }
        Value::Str(_) | Value::Int(_) | Value::Float(_) => (
            super::reader::node_quantity(map, node, at, dim).map_err(|e| {
                let h = format!(
                    "a spread is given like the key itself ({}), or relative to it (\"1%\")",
                    dim.expectation()
                );
                let joined = match &e.hint {
                    Some(old) => format!("{old}; {h}"),
                    None => h,
                };
                e.with_hint(joined)
            })?,
            false,
        ),
        other => {
            return Err(map
                .error(
                    &node.span,
                    at,
                    format!("expected a spread, found {}", other.type_name()),
                )
                .with_hint(SPREAD_FORMS));
        }
    };
    if !(v.is_finite() && v >= 0.0) {
        return Err(map
            .error(
                &node.span,
                at,
                format!("a spread must be zero or positive, found {v}"),
            )
            .with_hint(SPREAD_FORMS));
    }
    Ok((v, relative))
}

const SPREAD_FORMS: &str = "write \"2 mV\" (Gaussian sigma), \"1%\" (sigma relative to the nominal), \
                            { sigma = \"2 mV\" } or { uniform = \"5%\" } (uniform within +-5 %)";

/// `[spread]`: key paths that exist in the scenario and hold continuous values, with their amounts.
fn spread(map: &SourceMap<'_>, t: &Table, root: &Table) -> Result<Vec<Spread>, ScenarioError> {
    let mut entries = Vec::new();
    flatten_spread(t, "", &mut entries);
    let mut out: Vec<Spread> = Vec::with_capacity(entries.len());
    for e in &entries {
        let at = format!("spread.\"{}\"", e.path);
        if out.iter().any(|s| s.path == e.path) {
            return Err(map
                .error(&e.key_span, &at, format!("`{}` is spread twice", e.path))
                .with_hint("keep one entry per key"));
        }
        let (target, dim) = spread_target(map, root, e, &at)?;
        let nominal = super::reader::node_quantity(map, target, &e.path, dim)?;
        let (law, amount_node) = match &e.node.value {
            Value::Table(spec) => {
                let mut r = TableReader::new(map, spec, at.clone());
                let sigma = r.take("sigma");
                let uniform = r.take("uniform");
                r.finish(&[], "a spread")?;
                match (sigma, uniform) {
                    (Some(n), None) => (SpreadLaw::Gaussian, n),
                    (None, Some(n)) => (SpreadLaw::Uniform, n),
                    _ => {
                        return Err(map
                            .error(&e.node.span, &at, "give either `sigma` or `uniform`")
                            .with_hint(SPREAD_FORMS));
                    }
                }
            }
            _ => (SpreadLaw::Gaussian, e.node),
        };
        let (amount, relative) = spread_amount(map, amount_node, &at, dim)?;
        if relative && nominal == 0.0 && amount > 0.0 {
            return Err(map
                .error(
                    &amount_node.span,
                    &at,
                    format!(
                        "a relative spread of `{}`, whose nominal is 0, is always 0",
                        e.path
                    ),
                )
                .with_hint(
                    "give the spread in the key's unit, e.g. \"2 mV\" (a bare number for ratios)",
                ));
        }
        out.push(Spread {
            path: e.path.clone(),
            law,
            amount,
            relative,
            nominal,
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::{STARTER, load, parse_str};
    use proptest::prelude::*;

    const HEAD: &str = r#"name = "t"
[simulation]
analog_rate = "10 MHz"
duration = "20 ms"
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
"#;

    const ADC: &str = r#"
[[stage]]
kind = "sar_adc"
bits = 12
range = ["0 V", "5 V"]
clock = "2 MHz"
"#;

    const DAC: &str = "\n[[stage]]\nkind = \"dac\"\n";

    fn ok(text: &str) -> Scenario {
        parse_str(text, "t.toml", Path::new(".")).unwrap_or_else(|e| panic!("{e}"))
    }

    fn err(text: &str) -> ScenarioError {
        match parse_str(text, "t.toml", Path::new(".")) {
            Ok(s) => panic!("accepted: {s:?}"),
            Err(e) => e,
        }
    }

    /// 1-based line of the first line containing `needle`.
    fn line_of(text: &str, needle: &str) -> usize {
        text.lines()
            .position(|l| l.contains(needle))
            .expect("needle")
            + 1
    }

    /// HEAD + ADC + a DAC with an offset written, then the given `[spread]` body.
    fn with_spread(body: &str) -> String {
        format!(
            "{HEAD}{ADC}comparator_offset = \"0.2 mV\"\n{DAC}offset = \"1 mV\"\ntolerance = \"1%\"\n[[stage]]\nkind = \"filter\"\norder = 2\ncutoff = \"20 kHz\"\n\
             [spread]\n{body}"
        )
    }

    #[test]
    fn spreads_read_in_every_form_with_their_nominals() {
        let s = ok(&with_spread(
            "\"stage.2.offset\" = \"2 mV\"\n\"stage.3.cutoff\" = { uniform = \"5%\" }\n\
             \"stage.1.comparator_offset\" = { sigma = \"0.5 mV\" }\n\"source.amplitude\" = \"1%\"\n\
             stage.2.tolerance = 0.001\n",
        ));
        let got: Vec<(&str, SpreadLaw, f64, bool, f64)> = s
            .spread
            .iter()
            .map(|p| (p.path.as_str(), p.law, p.amount, p.relative, p.nominal))
            .collect();
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-9);
        let want = [
            ("stage.2.offset", SpreadLaw::Gaussian, 2e-3, false, 1e-3),
            ("stage.3.cutoff", SpreadLaw::Uniform, 0.05, true, 20e3),
            (
                "stage.1.comparator_offset",
                SpreadLaw::Gaussian,
                0.5e-3,
                false,
                0.2e-3,
            ),
            ("source.amplitude", SpreadLaw::Gaussian, 0.01, true, 1.0),
            ("stage.2.tolerance", SpreadLaw::Gaussian, 0.001, false, 0.01),
        ];
        assert_eq!(got.len(), 5, "{got:?}");
        for (g, w) in got.iter().zip(want.iter()) {
            assert_eq!((g.0, g.1, g.3), (w.0, w.1, w.3));
            assert!(close(g.2, w.2) && close(g.4, w.4), "{g:?} vs {w:?}");
        }
        assert!(close(s.spread[2].absolute_amount(), 0.5e-3));
        assert!(close(s.spread[1].absolute_amount(), 1000.0));
    }

    #[test]
    fn bad_spreads_are_located_errors_with_hints() {
        let cases: [(&str, &str, &str); 9] = [
            (
                "\"stage.9.offset\" = \"1 mV\"\n",
                "\"stage.9.offset\"",
                "no stage 9",
            ),
            ("\"stage.2.bits\" = 1\n", "\"stage.2.bits\"", "whole number"),
            (
                "\"stage.2.ofset\" = \"1 mV\"\n",
                "\"stage.2.ofset\"",
                "not a numeric key",
            ),
            ("\"stage.2.offset\" = \"2 kHz\"\n", "\"2 kHz\"", "voltage"),
            (
                "\"stage.2.offset\" = \"-1 mV\"\n",
                "\"-1 mV\"",
                "zero or positive",
            ),
            (
                "\"stage.2.slew_rate\" = \"1%\"\n",
                "\"stage.2.slew_rate\"",
                "not written",
            ),
            (
                "\"stage.2.offset\" = { sigma = \"1 mV\", uniform = \"1 mV\" }\n",
                "{ sigma",
                "either",
            ),
            (
                "\"stage.2.offset\" = { sgma = \"1 mV\" }\n",
                "sgma",
                "unknown key",
            ),
            (
                "\"frequency\" = \"1%\"\n",
                "\"frequency\"",
                "not a key path",
            ),
        ];
        for (body, needle, msg) in cases {
            let text = with_spread(body);
            let e = err(&text);
            assert_eq!(e.line, line_of(&text, needle), "{body}: {e}");
            let col = text.lines().nth(e.line - 1).unwrap().find(needle).unwrap() + 1;
            assert_eq!(e.column, col, "{body}: {e}");
            assert!(e.message.contains(msg), "{body}: {e}");
            assert!(e.hint.is_some() || msg.is_empty(), "{body}: {e}");
            assert!(
                e.to_string()
                    .starts_with(&format!("t.toml:{}:{}:", e.line, e.column))
            );
        }
    }

    #[test]
    fn a_relative_spread_of_a_zero_nominal_is_refused_and_a_spread_key_must_be_written() {
        let text = format!(
            "{HEAD}{ADC}comparator_offset = 0\n{DAC}[spread]\n\"stage.1.comparator_offset\" = \"1%\"\n"
        );
        let e = err(&text);
        assert!(e.message.contains("nominal is 0"), "{e}");
        let text = format!("{HEAD}{ADC}{DAC}[spread]\n\"stage.1.comparator_offset\" = \"1 mV\"\n");
        let e = err(&text);
        assert!(e.message.contains("not written"), "{e}");
        let text = format!(
            "{HEAD}{ADC}comparator_offset = 0\n{DAC}[spread]\n\"stage.1.comparator_offset\" = \"1 mV\"\n"
        );
        assert_eq!(ok(&text).spread[0].nominal, 0.0);
    }

    #[test]
    fn starter_scenario_parses_with_resolved_defaults() {
        let s = ok(STARTER);
        assert!(s.warnings.is_empty(), "{:?}", s.warnings);
        assert_eq!(s.name, "bench-demo");
        assert_eq!(s.simulation.analog_rate_hz, 10e6);
        assert_eq!(s.stages.len(), 5);
        let StageKind::SarAdc(adc) = &s.stages[1].kind else {
            panic!()
        };
        assert_eq!(adc.bits, 12);
        assert_eq!(adc.cycles, 13);
        assert!((adc.conversion_time_s - 6.5e-6).abs() < 1e-18);
        assert_eq!(adc.sample_rate_hz, Some(100e3));
        let StageKind::Link(link) = &s.stages[2].kind else {
            panic!()
        };
        assert_eq!(link.bits, 12);
        let StageKind::Dac(dac) = &s.stages[3].kind else {
            panic!()
        };
        assert_eq!(
            (dac.bits, dac.range_v, dac.ladder),
            (12, (0.0, 5.0), Ladder::R2r)
        );
        assert_eq!(dac.output.slew_rate_v_per_s, Some(13e6));
        assert_eq!(s.stages[2].label, "stage.3 link");
        assert_eq!(s.stages[1].label, "adc");
        let StageKind::Filter(f) = &s.stages[4].kind else {
            panic!()
        };
        assert_eq!(
            (f.order, f.cutoff_hz, f.family),
            (4, 20e3, FilterFamily::Butterworth)
        );
    }

    #[test]
    fn defaults_fill_an_analog_only_chain() {
        let s = ok(&format!(
            "{HEAD}\n[[stage]]\nkind = \"amplifier\"\ngain = \"20 dB\"\nbandwidth = \"1 MHz\"\n"
        ));
        assert_eq!(s.simulation.settle_s, 2e-3);
        assert_eq!(s.simulation.seed, 1);
        assert_eq!(s.source.offset_v, 0.0);
        assert_eq!(
            s.analysis,
            Analysis {
                band_hz: None,
                window: WindowKind::BlackmanHarris,
                coherent: true,
                harmonics: 9
            }
        );
        let StageKind::Amplifier(a) = &s.stages[0].kind else {
            panic!()
        };
        assert!((a.gain - 10.0).abs() < 1e-12);
        // tau = 1/(2 pi f): the first-order relation between -3 dB bandwidth and time constant (common practice, no source).
        assert!((a.output.tau_s.unwrap() - 1.0 / (2.0 * std::f64::consts::PI * 1e6)).abs() < 1e-20);
        assert_eq!(s.stages[0].label, "stage.1 amplifier");
    }

    #[test]
    fn every_waveform_reads() {
        let body = |src: &str| {
            format!(
                "name = \"t\"\n[simulation]\nanalog_rate = \"10 MHz\"\nduration = \"20 ms\"\n[source]\n{src}\n"
            )
        };
        let s = ok(&body(
            "waveform = \"square\"\nfrequency = 100\namplitude = 1\nduty = \"25%\"",
        ));
        assert_eq!(
            s.source.waveform,
            Waveform::Square {
                frequency_hz: 100.0,
                amplitude_v: 1.0,
                duty: 0.25
            }
        );
        let s = ok(&body(
            "waveform = \"multitone\"\ntones = [{ frequency = \"1 kHz\", amplitude = \"0.5 V\", phase = \"90 deg\" }, \
             { frequency = \"3 kHz\", amplitude = \"0.1 V\" }]",
        ));
        let Waveform::Multitone { tones } = &s.source.waveform else {
            panic!()
        };
        assert_eq!(tones.len(), 2);
        assert!((tones[0].phase_rad - std::f64::consts::FRAC_PI_2).abs() < 1e-15);
        let s = ok(&body(
            "waveform = \"chirp\"\nstart = \"20 Hz\"\nstop = \"20 kHz\"\nlaw = \"log\"\namplitude = \"1 V\"",
        ));
        assert_eq!(
            s.source.waveform,
            Waveform::Chirp {
                start_hz: 20.0,
                stop_hz: 20e3,
                sweep_s: 20e-3,
                law: ChirpLaw::Logarithmic,
                amplitude_v: 1.0
            }
        );
        let s = ok(&body(
            "waveform = \"step\"\nat = \"1 ms\"\namplitude = \"-1 V\"\noffset = \"1 V\"",
        ));
        assert_eq!(
            s.source.waveform,
            Waveform::Step {
                at_s: 1e-3,
                amplitude_v: -1.0
            }
        );
        assert_eq!(s.source.offset_v, 1.0);
        let s = ok(&body(
            "waveform = \"noise\"\nrms = \"10 mV\"\nbandwidth = \"20 kHz\"",
        ));
        assert_eq!(
            s.source.waveform,
            Waveform::Noise {
                rms_v: 0.01,
                bandwidth_hz: Some(20e3)
            }
        );
        let s = ok(&body("waveform = \"dc\"\noffset = \"2.5 V\""));
        assert_eq!(s.source.waveform, Waveform::Dc);
        ok(&body(
            "waveform = \"triangle\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"",
        ));
        ok(&body(
            "waveform = \"sawtooth\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"",
        ));
    }

    #[test]
    fn malformed_toml_gives_the_parser_position() {
        let e = err("name = \"t\"\n[simulation\nanalog_rate = 1\n");
        assert_eq!(e.line, 2);
        assert!(e.message.starts_with("malformed TOML"), "{e}");
        assert!(e.to_string().starts_with("t.toml:2:"), "{e}");
    }

    #[test]
    fn unknown_key_suggests_the_nearest_allowed_one() {
        let text = format!("{HEAD}\n[[stage]]\nkind = \"amplifier\"\nslewrate = \"13 V/us\"\n");
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.slewrate");
        assert_eq!((e.line, e.column), (line_of(&text, "slewrate"), 1));
        assert_eq!(e.message, "unknown key `slewrate`");
        assert_eq!(e.hint.as_deref(), Some("did you mean `slew_rate`?"));
        let e = err(&format!("{HEAD}\n[stages]\nkind = \"dac\"\n"));
        assert_eq!(e.hint.as_deref(), Some("did you mean `stage`?"));
    }

    #[test]
    fn a_misspelt_required_key_is_named_rather_than_reported_missing() {
        let text = format!(
            "{HEAD}\n[[stage]]\nkind = \"sar_adc\"\nbitz = 12\nrange = [\"0 V\", \"5 V\"]\nclock = \"1 MHz\"\n\n[[stage]]\nkind = \"dac\"\n"
        );
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.bitz");
        assert_eq!((e.line, e.column), (line_of(&text, "bitz"), 1));
        assert_eq!(e.message, "unknown key `bitz`");
        assert!(
            e.hint
                .as_deref()
                .unwrap_or("")
                .contains("did you mean `bits`")
        );
    }

    #[test]
    fn a_key_of_another_waveform_is_named_as_not_applying() {
        let text = format!("{HEAD}duty = 0.3\n");
        let e = err(&text);
        assert_eq!(e.key_path, "source.duty");
        assert_eq!(e.message, "`duty` does not apply to waveform \"sine\"");
    }

    #[test]
    fn unknown_stage_kind_and_enum_values_suggest_a_fix() {
        let text = format!("{HEAD}\n[[stage]]\nkind = \"filtr\"\n");
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.kind");
        assert_eq!((e.line, e.column), (line_of(&text, "filtr"), 8));
        assert_eq!(e.message, "unknown stage kind \"filtr\"");
        assert!(
            e.hint
                .as_deref()
                .unwrap()
                .starts_with("did you mean \"filter\"?"),
            "{e}"
        );
        let text = format!(
            "{HEAD}\n[[stage]]\nkind = \"filter\"\nfamily = \"buterworth\"\norder = 2\ncutoff = \"1 kHz\"\n"
        );
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.family");
        assert!(
            e.hint
                .as_deref()
                .unwrap()
                .starts_with("did you mean \"butterworth\"?"),
            "{e}"
        );
    }

    #[test]
    fn a_unit_of_the_wrong_dimension_is_an_error() {
        let text = HEAD.replace("frequency = \"1 kHz\"", "frequency = \"1 kV\"");
        let e = err(&text);
        assert_eq!(e.key_path, "source.frequency");
        assert_eq!((e.line, e.column), (line_of(&text, "1 kV"), 13));
        assert_eq!(
            e.message,
            "expected a frequency such as \"1 kHz\", found volts"
        );
        assert_eq!(
            e.to_string(),
            format!(
                "t.toml:{}:13: source.frequency: expected a frequency such as \"1 kHz\", found volts",
                e.line
            )
        );
    }

    #[test]
    fn zero_or_negative_rates_frequencies_and_durations_are_errors() {
        for (from, to, path) in [
            (
                "analog_rate = \"10 MHz\"",
                "analog_rate = 0",
                "simulation.analog_rate",
            ),
            (
                "duration = \"20 ms\"",
                "duration = \"-1 ms\"",
                "simulation.duration",
            ),
            (
                "frequency = \"1 kHz\"",
                "frequency = \"0 Hz\"",
                "source.frequency",
            ),
        ] {
            let e = err(&HEAD.replace(from, to));
            assert_eq!(e.key_path, path);
            assert!(e.message.contains("greater than zero"), "{e}");
        }
        let e = err(&format!(
            "{HEAD}\n[[stage]]\nkind = \"sample_hold\"\naperture_jitter = \"-1 ps\"\n{ADC}{DAC}"
        ));
        assert_eq!(e.key_path, "stage.1.aperture_jitter");
        assert!(e.message.contains("must not be negative"), "{e}");
        let e = err(&format!("{HEAD}{ADC}sample_rate = \"-5 kHz\"\n{DAC}"));
        assert_eq!(e.key_path, "stage.1.sample_rate");
    }

    #[test]
    fn bits_out_of_range_are_errors() {
        for bad in ["0", "25", "-3"] {
            let e = err(&format!(
                "{HEAD}{}{DAC}",
                ADC.replace("bits = 12", &format!("bits = {bad}"))
            ));
            assert_eq!(e.key_path, "stage.1.bits");
            assert!(e.message.contains("must be from 1 to 24"), "{e}");
        }
        let e = err(&format!("{HEAD}{ADC}{DAC}bits = 40\n"));
        assert_eq!(e.key_path, "stage.2.bits");
        let e = err(&format!(
            "{HEAD}{}{DAC}",
            ADC.replace("bits = 12", "bits = \"12\"")
        ));
        assert_eq!(
            e.hint.as_deref(),
            Some("write it without quotes: bits = 12")
        );
    }

    #[test]
    fn a_range_must_have_low_below_high() {
        let text = format!(
            "{HEAD}{}{DAC}",
            ADC.replace("[\"0 V\", \"5 V\"]", "[\"5 V\", \"5 V\"]")
        );
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.range");
        assert_eq!((e.line, e.column), (line_of(&text, "range"), 9));
        assert!(e.message.contains("must be below the high end"), "{e}");
        let e = err(&format!("{HEAD}{ADC}{DAC}rails = [\"12 V\", \"-12 V\"]\n"));
        assert_eq!(e.key_path, "stage.2.rails");
        let e = err(&format!(
            "{HEAD}{}{DAC}",
            ADC.replace("[\"0 V\", \"5 V\"]", "[\"0 V\"]")
        ));
        assert!(e.message.contains("expected two values"), "{e}");
    }

    #[test]
    fn settle_must_be_shorter_than_duration() {
        let text = HEAD.replace(
            "duration = \"20 ms\"",
            "duration = \"20 ms\"\nsettle = \"20 ms\"",
        );
        let e = err(&text);
        assert_eq!(e.key_path, "simulation.settle");
        assert_eq!(e.line, line_of(&text, "settle"));
        assert!(e.message.contains("must be shorter than duration"), "{e}");
    }

    #[test]
    fn analog_rate_below_twice_the_source_frequency_is_an_error_and_below_20x_a_warning() {
        let text = HEAD.replace("analog_rate = \"10 MHz\"", "analog_rate = \"1.5 kHz\"");
        let e = err(&text);
        assert_eq!(e.key_path, "simulation.analog_rate");
        assert_eq!(e.line, line_of(&text, "analog_rate"));
        assert!(e.hint.as_deref().unwrap().contains("at least 2 kHz"), "{e}");
        let s = ok(&HEAD.replace("analog_rate = \"10 MHz\"", "analog_rate = \"10 kHz\""));
        assert_eq!(s.warnings.len(), 1);
        assert!(
            s.warnings[0].starts_with("t.toml:3:15: simulation.analog_rate:"),
            "{}",
            s.warnings[0]
        );
        assert!(
            ok(&HEAD.replace("analog_rate = \"10 MHz\"", "analog_rate = \"20 kHz\""))
                .warnings
                .is_empty()
        );
    }

    #[test]
    fn a_filter_cutoff_at_or_above_half_the_analog_rate_is_an_error() {
        let text = format!("{HEAD}\n[[stage]]\nkind = \"filter\"\norder = 2\ncutoff = \"5 MHz\"\n");
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.cutoff");
        assert_eq!((e.line, e.column), (line_of(&text, "cutoff"), 10));
        ok(&text.replace("5 MHz", "4.9 MHz"));
    }

    #[test]
    fn an_adc_faster_than_its_conversion_says_what_would_fit() {
        // 12 bits, 13 cycles at 2 MHz: 6.5 us per conversion, at most 153.8 kHz.
        let e = err(&format!("{HEAD}{ADC}sample_rate = \"200 kHz\"\n{DAC}"));
        assert_eq!(e.key_path, "stage.1.sample_rate");
        assert!(e.message.contains("at most 153.8 kHz"), "{e}");
        assert!(
            e.hint
                .as_deref()
                .unwrap()
                .contains("raise clock to at least 2.6 MHz"),
            "{e}"
        );
        let adc = ADC.replace("clock = \"2 MHz\"", "conversion_time = \"8 us\"");
        let e = err(&format!("{HEAD}{adc}sample_rate = \"200 kHz\"\n{DAC}"));
        assert!(e.message.contains("at most 125 kHz"), "{e}");
        assert!(
            e.hint
                .as_deref()
                .unwrap()
                .contains("shorten conversion_time to at most 5 us"),
            "{e}"
        );
        // Exactly at the limit is fine: 8 us -> 125 kHz.
        ok(&format!("{HEAD}{adc}sample_rate = \"125 kHz\"\n{DAC}"));
    }

    #[test]
    fn clock_and_conversion_time_together_are_an_error() {
        let text = format!("{HEAD}{ADC}conversion_time = \"10 us\"\n{DAC}");
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.conversion_time");
        assert_eq!(e.line, line_of(&text, "conversion_time"));
        let e = err(&format!(
            "{HEAD}{}{DAC}",
            ADC.replace("clock = \"2 MHz\"", "")
        ));
        assert_eq!(e.key_path, "stage.1.clock");
        assert!(e.message.starts_with("missing key `clock`"), "{e}");
    }

    #[test]
    fn settling_and_bandwidth_together_are_an_error() {
        let e = err(&format!(
            "{HEAD}{ADC}{DAC}settling = \"1 us\"\nbandwidth = \"1 MHz\"\n"
        ));
        assert_eq!(e.key_path, "stage.2.bandwidth");
        assert!(e.message.contains("not both"), "{e}");
    }

    #[test]
    fn chebyshev_needs_ripple_and_only_chebyshev_takes_it() {
        let f = "\n[[stage]]\nkind = \"filter\"\norder = 4\ncutoff = \"20 kHz\"\n";
        let text = format!("{HEAD}{f}family = \"chebyshev\"\n");
        let e = err(&text);
        assert_eq!(e.key_path, "stage.1.ripple");
        assert_eq!((e.line, e.column), (line_of(&text, "[[stage]]"), 1));
        let s = ok(&format!(
            "{HEAD}{f}family = \"chebyshev\"\nripple = \"0.5 dB\"\n"
        ));
        let StageKind::Filter(c) = &s.stages[0].kind else {
            panic!()
        };
        assert_eq!(c.family, FilterFamily::Chebyshev { ripple_db: 0.5 });
        let e = err(&format!("{HEAD}{f}ripple = \"0.5 dB\"\n"));
        assert!(
            e.message.contains("only used by family = \"chebyshev\""),
            "{e}"
        );
    }

    #[test]
    fn stage_order_violations_are_errors_with_a_hint() {
        let sh = "\n[[stage]]\nkind = \"sample_hold\"\n";
        let flt = "\n[[stage]]\nkind = \"filter\"\norder = 2\ncutoff = \"20 kHz\"\n";
        let link = "\n[[stage]]\nkind = \"link\"\n";
        let cases = [
            (
                format!("{HEAD}{sh}{flt}{ADC}{DAC}"),
                "stage.2.kind",
                "between sample_hold and sar_adc",
            ),
            (
                format!("{HEAD}{sh}"),
                "stage.1.kind",
                "directly before a sar_adc",
            ),
            (
                format!("{HEAD}{ADC}{flt}{DAC}"),
                "stage.2.kind",
                "digital codes",
            ),
            (
                format!("{HEAD}{ADC}"),
                "stage.1.kind",
                "needs a dac after it",
            ),
            (
                format!("{HEAD}{ADC}{link}"),
                "stage.1.kind",
                "needs a dac after it",
            ),
            (
                format!("{HEAD}{DAC}"),
                "stage.1.kind",
                "put a sar_adc before it",
            ),
            (
                format!("{HEAD}{link}{ADC}{DAC}"),
                "stage.1.kind",
                "between the sar_adc and the dac",
            ),
            (
                format!("{HEAD}{ADC}{DAC}{ADC}{DAC}"),
                "stage.3.kind",
                "only one sar_adc",
            ),
            (
                format!("{HEAD}{ADC}{DAC}{DAC}"),
                "stage.3.kind",
                "only one dac",
            ),
            (
                format!("{HEAD}{ADC}{DAC}{sh}"),
                "stage.3.kind",
                "directly before a sar_adc",
            ),
        ];
        for (text, path, msg) in cases {
            let e = err(&text);
            assert_eq!(e.key_path, path, "{e}");
            assert!(e.message.contains(msg), "{e}");
            assert!(e.hint.is_some(), "{e}");
        }
        // Allowed: analog stages around the group, and links between ADC and DAC.
        let s = ok(&format!("{HEAD}{flt}{sh}{ADC}{link}{link}{DAC}{flt}"));
        assert_eq!(s.stages.len(), 7);
    }

    #[test]
    fn link_and_dac_widths_follow_the_stream() {
        let link = "\n[[stage]]\nkind = \"link\"\nbits = 8\n";
        let s = ok(&format!(
            "{HEAD}{ADC}{link}{DAC}range = [\"-1 V\", \"1 V\"]\n"
        ));
        let StageKind::Dac(d) = &s.stages[2].kind else {
            panic!()
        };
        assert_eq!((d.bits, d.range_v), (8, (-1.0, 1.0)));
        let s = ok(&format!("{HEAD}{ADC}{DAC}bits = 16\n"));
        let StageKind::Dac(d) = &s.stages[1].kind else {
            panic!()
        };
        assert_eq!((d.bits, d.range_v), (16, (0.0, 5.0)));
    }

    #[test]
    fn a_missing_key_points_at_its_table() {
        let text = HEAD.replace("duration = \"20 ms\"\n", "");
        let e = err(&text);
        assert_eq!(e.key_path, "simulation.duration");
        assert_eq!((e.line, e.column), (line_of(&text, "[simulation]"), 1));
        let e = err("[simulation]\nanalog_rate = 1\nduration = 1\n[source]\nwaveform = \"dc\"\n");
        assert_eq!((e.line, e.column, e.key_path.as_str()), (1, 1, "name"));
        let e = err(&HEAD.replace("name = \"t\"", "name = \"my bench\""));
        assert_eq!(e.hint.as_deref(), Some("for example name = \"my-bench\""));
    }

    fn write_wav(path: &Path, channels: u16) {
        let spec = hound::WavSpec {
            channels,
            sample_rate: 8000,
            bits_per_sample: 16,
            sample_format: hound::SampleFormat::Int,
        };
        let mut w = hound::WavWriter::create(path, spec).unwrap();
        for i in 0..16 * i32::from(channels) {
            w.write_sample(i as i16).unwrap();
        }
        w.finalize().unwrap();
    }

    #[test]
    fn wav_sources_are_opened_relative_to_the_scenario() {
        let dir = tempfile::tempdir().unwrap();
        write_wav(&dir.path().join("take1.wav"), 2);
        let head = HEAD.replace(
            "waveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"",
            "waveform = \"wav\"\nfile = \"take1.wav\"",
        );
        let s = parse_str(&format!("{head}channel = 1\n"), "t.toml", dir.path()).unwrap();
        assert_eq!(
            s.source.waveform,
            Waveform::Wav {
                path: PathBuf::from("take1.wav"),
                channel: 1,
                full_scale_v: 1.0,
                repeat: true
            }
        );
        assert_eq!(s.base_dir, dir.path());
        let text = format!("{head}channel = 2\n");
        let e = parse_str(&text, "t.toml", dir.path()).unwrap_err();
        assert_eq!(e.key_path, "source.channel");
        assert_eq!(e.line, line_of(&text, "channel"));
        assert!(e.message.contains("has 2 channels"), "{e}");
        let text = head.replace("take1.wav", "missing.wav");
        let e = parse_str(&text, "t.toml", dir.path()).unwrap_err();
        assert_eq!(e.key_path, "source.file");
        assert_eq!((e.line, e.column), (line_of(&text, "missing.wav"), 8));
        std::fs::write(dir.path().join("junk.wav"), b"not a wav file at all").unwrap();
        let e =
            parse_str(&head.replace("take1.wav", "junk.wav"), "t.toml", dir.path()).unwrap_err();
        assert!(e.message.starts_with("cannot read WAV file"), "{e}");
    }

    #[test]
    fn load_maps_failures_to_crate_errors() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("nope.toml");
        assert!(matches!(load(&missing), Err(crate::Error::Read { .. })));
        let bad = dir.path().join("bad.toml");
        std::fs::write(&bad, HEAD.replace("1 kHz", "1 kV")).unwrap();
        match load(&bad) {
            Err(crate::Error::BadInput(msg)) => {
                assert!(
                    msg.starts_with(&format!("{}:7:13: source.frequency:", bad.display())),
                    "{msg}"
                )
            }
            other => panic!("{other:?}"),
        }
        let good = dir.path().join("good.toml");
        std::fs::write(&good, STARTER).unwrap();
        let s = load(&good).unwrap();
        assert_eq!(s.base_dir, dir.path());
        assert_eq!(s.origin, good.display().to_string());
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(256))]
        #[test]
        fn arbitrary_text_never_panics(text in any::<String>()) {
            let _ = parse_str(&text, "p.toml", Path::new("."));
        }

        #[test]
        fn edited_starter_never_panics(cut in 0usize..4000, len in 0usize..40, insert in "[ -~\n]{0,12}") {
            // Cut a piece out of the starter and put random printable text there.
            let mut t = STARTER.to_string();
            let mut a = cut.min(t.len());
            while !t.is_char_boundary(a) { a -= 1; }
            let mut b = (a + len).min(t.len());
            while !t.is_char_boundary(b) { b -= 1; }
            t.replace_range(a..b, &insert);
            let _ = parse_str(&t, "p.toml", Path::new("."));
        }

        #[test]
        fn random_values_in_a_stage_never_panic(
            key in prop::sample::select(vec!["bits", "range", "clock", "cycles", "sample_rate", "dither_lsb", "order", "cutoff", "ripple", "frame", "rails"]),
            value in prop_oneof![
                "-?[0-9]{1,22}",
                "-?[0-9]{0,3}\\.[0-9]{0,3}(e-?[0-9]{1,3})?",
                "\"[-0-9. a-zA-Zµ%/]{0,10}\"",
                Just("[1, 2, 3]".to_string()),
                Just("inf".to_string()),
                Just("nan".to_string()),
                Just("true".to_string()),
            ],
        ) {
            let text = format!("{HEAD}{ADC}{key} = {value}\n{DAC}\n[[stage]]\nkind = \"filter\"\norder = 2\ncutoff = 1000\n{key} = {value}\n");
            let _ = parse_str(&text, "p.toml", Path::new("."));
        }
    }
}
