//! `[source]`: the waveform and its keys, read and checked (a WAV file's header is read to check its channel).

use std::path::{Path, PathBuf};

use super::*;
use crate::format::reader::{ScenarioError, SourceMap, Table, TableReader, Value};
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
const SOURCE_KEYS: [&str; 19] = [
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
        WaveKind::Chord => Waveform::Chord {
            amplitude_v: amplitude(&mut r)?,
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
