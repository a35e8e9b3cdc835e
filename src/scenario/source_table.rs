//! `[source]`: the waveform and its keys, read and checked (a WAV file's header is read to check its channel).

use std::path::{Path, PathBuf};

use super::*;
use crate::format::reader::{At, ScenarioError, SourceMap, Span, Table, TableReader, Value};
use crate::format::units::{Dimension, format_si};

const WAVEFORMS: [(&str, WaveKind); 11] = [
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
    ("chord", WaveKind::Chord),
];

/// Every key a `[source]` table may hold, for any waveform.
const SOURCE_KEYS: [&str; 20] = [
    "waveform",
    "frequency",
    "amplitude",
    "level",
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
    "beat",
];

/// The built-in chord's beat when `beat` is not given: two chords a second.
const CHORD_BEAT_DEFAULT_S: f64 = 0.5;

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
    Chord,
}

pub(super) fn source(
    map: &SourceMap<'_>,
    t: &Table,
    base_dir: &Path,
    sim: &Simulation,
    full_scale: Option<FullScale>,
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
            amplitude_v: amplitude(&mut r, Shape::Sine, full_scale)?,
            phase_rad: r.quantity("phase", D::Angle)?.map_or(0.0, |q| q.value),
        },
        WaveKind::Square => {
            let frequency_hz = r
                .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                .value;
            let amplitude_v = amplitude(&mut r, Shape::Square, full_scale)?;
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
            amplitude_v: amplitude(&mut r, Shape::Ramp, full_scale)?,
        },
        WaveKind::Sawtooth => Waveform::Sawtooth {
            frequency_hz: r
                .req_positive("frequency", D::Frequency, "\"1 kHz\"")?
                .value,
            amplitude_v: amplitude(&mut r, Shape::Ramp, full_scale)?,
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
                    amplitude_v: amplitude(&mut tr, Shape::Sine, full_scale)?,
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
                amplitude_v: amplitude(&mut r, Shape::Sine, full_scale)?,
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
            let amplitude_v = step_height(&mut r, full_scale)?;
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
        WaveKind::Chord => Waveform::Chord {
            // The chord's crest factor has no closed form: its size is its peak, `amplitude`, only.
            amplitude_v: {
                if let Some(node) = r.take("level") {
                    return Err(r.error(
                        &node.span,
                        "level",
                        "the built-in chord takes its peak as `amplitude` (e.g. \"1 V\"), not a level",
                    ));
                }
                let a = r.req_quantity("amplitude", D::Voltage, "\"1 V\"")?;
                if a.value < 0.0 {
                    return Err(r.error(&a.span, "amplitude", "must not be negative"));
                }
                a.value
            },
            beat_s: r
                .positive("beat", D::Time)?
                .map_or(CHORD_BEAT_DEFAULT_S, |q| q.value),
        },
    };
    let wave_name = WAVEFORMS
        .iter()
        .find(|(_, k)| *k == kind)
        .map_or("?", |(n, _)| *n);
    r.finish(&SOURCE_KEYS, &format!("waveform \"{wave_name}\""))?;
    Ok(Source { waveform, offset_v })
}

/// The first converter's input range, which a level in dBFS refers to.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct FullScale {
    /// `[low, high]` (V).
    pub range_v: (f64, f64),
}

impl FullScale {
    /// The peak of a full-scale sine: half the span.
    fn sine_peak_v(self) -> f64 {
        (self.range_v.1 - self.range_v.0) / 2.0
    }
}

/// A waveform's shape, for turning a level into its peak amplitude.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Shape {
    /// Sine, chirp and each tone of a multitone: rms = peak / sqrt 2.
    Sine,
    /// A square wave swinging +-peak: rms = peak whatever the duty.
    Square,
    /// Triangle and sawtooth (linear between +-peak): rms = peak / sqrt 3.
    Ramp,
}

impl Shape {
    /// Peak over rms (the crest factor).
    fn crest(self) -> f64 {
        match self {
            Shape::Sine => std::f64::consts::SQRT_2,
            Shape::Square => 1.0,
            Shape::Ramp => 3f64.sqrt(),
        }
    }
}

/// A level as written: `"-6 dBFS"`, `"2 Vpp"` or `"0.707 Vrms"`.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Level {
    Dbfs(f64),
    PeakToPeak(f64),
    Rms(f64),
}

const LEVEL_EXAMPLES: &str = "\"-6 dBFS\", \"2 Vpp\" or \"0.707 Vrms\"";

/// Read a level string; `Err` holds the message.
fn parse_level(text: &str) -> Result<Level, String> {
    let s = text.trim();
    let bad = || format!("expected a level such as {LEVEL_EXAMPLES}, found \"{text}\"");
    if let Some(head) = s.strip_suffix("dBFS") {
        let x: f64 = head.trim().parse().map_err(|_| bad())?;
        return if x.is_finite() {
            Ok(Level::Dbfs(x))
        } else {
            Err(bad())
        };
    }
    for (suffix, make) in [
        ("pp", Level::PeakToPeak as fn(f64) -> Level),
        ("rms", Level::Rms as fn(f64) -> Level),
    ] {
        if let Some(head) = s.strip_suffix(suffix)
            && head.ends_with('V')
        {
            let v = crate::format::units::parse_quantity(head, Dimension::Voltage)
                .map_err(|_| bad())?;
            if v < 0.0 {
                return Err(format!("must not be negative, found \"{text}\""));
            }
            return Ok(make(v));
        }
    }
    Err(bad())
}

/// The `level` key, if written, read into a [`Level`] with its span.
fn level(r: &mut TableReader<'_, '_>) -> Result<Option<At<Level>>, ScenarioError> {
    let Some(node) = r.take("level") else {
        return Ok(None);
    };
    let Value::Str(text) = &node.value else {
        return Err(r
            .error(
                &node.span,
                "level",
                format!(
                    "expected a level such as {LEVEL_EXAMPLES}, found {}",
                    node.value.type_name()
                ),
            )
            .with_hint(
                "write the level as a string with its unit, or give `amplitude` (peak volts)",
            ));
    };
    let value = parse_level(text).map_err(|m| {
        r.error(&node.span, "level", m).with_hint(
            "dBFS is relative to a full-scale sine of the first converter; Vpp and Vrms are volts",
        )
    })?;
    Ok(Some(At {
        value,
        span: node.span.clone(),
    }))
}

/// `amplitude` and `level` are alternatives: an error at the second one when both are written.
fn both_given(r: &TableReader<'_, '_>, level: &At<Level>) -> ScenarioError {
    r.error(
        &level.span,
        "level",
        "`amplitude` and `level` are both given; they say the same thing",
    )
    .with_hint(
        "keep one: `amplitude` (peak volts) or `level` (\"-6 dBFS\", \"2 Vpp\", \"0.707 Vrms\")",
    )
}

/// The full scale a dBFS level refers to, or an error at the level when the chain has no converter.
fn dbfs_reference(
    r: &TableReader<'_, '_>,
    span: &Span,
    full_scale: Option<FullScale>,
) -> Result<FullScale, ScenarioError> {
    full_scale.ok_or_else(|| {
        r.error(
            span,
            "level",
            "a level in dBFS needs a converter, and this chain has none (no full scale to refer to)",
        )
        .with_hint("write the level in volts instead (\"2 Vpp\", \"0.707 Vrms\") or give `amplitude`")
    })
}

/// Peak amplitude, required, >= 0: `amplitude` (peak volts) or `level` (dBFS, Vpp, Vrms for the shape).
fn amplitude(
    r: &mut TableReader<'_, '_>,
    shape: Shape,
    full_scale: Option<FullScale>,
) -> Result<f64, ScenarioError> {
    let a = r.quantity("amplitude", Dimension::Voltage)?;
    let lv = level(r)?;
    match (a, lv) {
        (Some(_), Some(lv)) => Err(both_given(r, &lv)),
        (None, Some(lv)) => Ok(match lv.value {
            // 0 dBFS is the sine that spans the converter's range; other shapes take the same peak.
            Level::Dbfs(x) => {
                dbfs_reference(r, &lv.span, full_scale)?.sine_peak_v() * 10f64.powf(x / 20.0)
            }
            Level::PeakToPeak(v) => v / 2.0,
            Level::Rms(v) => v * shape.crest(),
        }),
        (None, None) => Err(r.missing("amplitude", "\"1 V\" (peak), or `level = \"-6 dBFS\"`")),
        (Some(a), None) if a.value < 0.0 => Err(r
            .error(
                &a.span,
                "amplitude",
                "must not be negative (it is the peak value)",
            )
            .with_hint("use phase (or offset) to move the waveform instead")),
        (Some(a), None) => Ok(a.value),
    }
}

/// A step's height, required: `amplitude` (volts, signed) or `level` (`"2 Vpp"`: the height; `"-6 dBFS"`:
/// relative to the first converter's whole span, 0 dBFS being a step from one end of the range to the other).
fn step_height(
    r: &mut TableReader<'_, '_>,
    full_scale: Option<FullScale>,
) -> Result<f64, ScenarioError> {
    let a = r.quantity("amplitude", Dimension::Voltage)?;
    let lv = level(r)?;
    match (a, lv) {
        (Some(_), Some(lv)) => Err(both_given(r, &lv)),
        (Some(a), None) => Ok(a.value),
        (None, None) => Err(r.missing("amplitude", "\"1 V\" (the step's height), or `level = \"1 Vpp\"`")),
        (None, Some(lv)) => match lv.value {
            Level::Dbfs(x) => {
                let fs = dbfs_reference(r, &lv.span, full_scale)?;
                Ok((fs.range_v.1 - fs.range_v.0) * 10f64.powf(x / 20.0))
            }
            Level::PeakToPeak(v) => Ok(v),
            Level::Rms(_) => Err(r
                .error(&lv.span, "level", "a step has no rms level")
                .with_hint("write its height as \"1 Vpp\", in dBFS of the converter's span, or as `amplitude`")),
        },
    }
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
