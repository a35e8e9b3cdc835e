//! Checks across the whole scenario that would otherwise only fail once a run has started (with no location)
//! or make a run cost far more than it should. They run after [`super::validate::build`], in `check` as in
//! `run`, and locate their message at the key to change.

use super::{Scenario, StageKind, Waveform};
use crate::format::reader::{ScenarioError, SourceMap, Span, Table, Value};
use crate::format::units::format_si;

/// Conversions the ADC record needs at least (as [`crate::engine::pipeline::Plan::new`] asks).
const MIN_CONVERSIONS: f64 = 16.0;
/// Grid steps a chirp's sweep must span at least: below this it is not a sweep on the grid.
const MIN_SWEEP_STEPS: f64 = 16.0;
/// Largest ratio of the analog rate to a WAV file's rate: the resampler's start-up delay (in grid steps)
/// grows with the ratio, so a file far slower than the grid costs seconds of work for nothing audible.
const MAX_WAV_UPSAMPLING: f64 = 1e5;

/// The span of the value at `path` (`analysis.band`, `stage.3.delay`), or of the nearest table written.
fn span_of(root: &Table, path: &str) -> Span {
    let mut parts = path.split('.');
    let Some(first) = parts.next() else {
        return root.span.clone();
    };
    let mut table = root;
    let mut key = first;
    loop {
        let Some(entry) = table.entries.iter().find(|e| e.key == key) else {
            return table.span.clone();
        };
        let next_table = match &entry.node.value {
            Value::Table(t) => Some(t),
            Value::Array(items) => {
                // `stage.N`: the N-th `[[stage]]` (from 1).
                let Some(n) = parts.next().and_then(|n| n.parse::<usize>().ok()) else {
                    return entry.node.span.clone();
                };
                match items.get(n.wrapping_sub(1)).map(|i| &i.value) {
                    Some(Value::Table(t)) => Some(t),
                    _ => return entry.node.span.clone(),
                }
            }
            _ => None,
        };
        match (next_table, parts.next()) {
            (Some(t), Some(k)) => {
                table = t;
                key = k;
            }
            _ => return entry.node.span.clone(),
        }
    }
}

/// Run every check; the first failure is returned, located.
pub fn check(map: &SourceMap<'_>, root: &Table, sc: &Scenario) -> Result<(), ScenarioError> {
    tone_inside_band(map, root, sc)?;
    links_leave_a_record(map, root, sc)?;
    chirp_spans_the_grid(map, root, sc)?;
    wav_rate_near_the_grid(map, root, sc)?;
    Ok(())
}

/// The output metrics measure the fundamental inside `analysis.band`: a tone at or above the band cannot be
/// measured.
fn tone_inside_band(map: &SourceMap<'_>, root: &Table, sc: &Scenario) -> Result<(), ScenarioError> {
    let (Some(f), Some(band)) = (sc.source.waveform.fundamental_hz(), sc.analysis.band_hz) else {
        return Ok(());
    };
    if f >= band {
        return Err(map
            .error(
                &span_of(root, "analysis.band"),
                "analysis.band",
                format!(
                    "the band ({}) does not contain the source's fundamental ({}); the output metrics measure \
                     the tone inside the band",
                    format_si(band, "Hz"),
                    format_si(f, "Hz")
                ),
            )
            .with_hint(format!(
                "raise analysis.band above {} (or remove it), or lower source.frequency",
                format_si(f, "Hz")
            )));
    }
    Ok(())
}

/// A link's delay and frame wait come off the ADC record (the output must have received every recorded
/// code): when they leave fewer than [`MIN_CONVERSIONS`] of conversions that fit in the analysis window,
/// name the link rather than the window.
fn links_leave_a_record(
    map: &SourceMap<'_>,
    root: &Table,
    sc: &Scenario,
) -> Result<(), ScenarioError> {
    let Some(adc) = sc.stages.iter().find_map(|s| match &s.kind {
        StageKind::SarAdc(a) => Some(*a),
        _ => None,
    }) else {
        return Ok(());
    };
    let fs = adc.effective_sample_rate_hz();
    let window_s = sc.simulation.duration_s - sc.simulation.settle_s;
    let without_links = ((window_s - adc.conversion_time_s - 1.0 / fs) * fs).floor();
    if without_links < MIN_CONVERSIONS {
        return Ok(()); // the window itself is too short: the pipeline's own message says so
    }
    let mut transport_s = 0.0;
    let mut worst: Option<(usize, f64, bool)> = None; // (stage number, seconds, delay rather than frame)
    for (i, s) in sc.stages.iter().enumerate() {
        if let StageKind::Link(l) = &s.kind {
            let frame_s = f64::from(l.frame) / fs;
            transport_s += l.delay_s + frame_s;
            let (t, is_delay) = if l.delay_s >= frame_s {
                (l.delay_s, true)
            } else {
                (frame_s, false)
            };
            if worst.is_none_or(|(_, w, _)| t > w) {
                worst = Some((i + 1, t, is_delay));
            }
        }
    }
    let with_links = ((window_s - adc.conversion_time_s - transport_s - 1.0 / fs) * fs).floor();
    let Some((n, _, is_delay)) = worst else {
        return Ok(());
    };
    if with_links >= MIN_CONVERSIONS {
        return Ok(());
    }
    let key = if is_delay { "delay" } else { "frame" };
    let path = format!("stage.{n}.{key}");
    Err(map
        .error(
            &span_of(root, &path),
            &path,
            format!(
                "the links' delay and frame wait ({}) leave {} of the {} conversions that fit in the analysis \
                 window (duration - settle = {}); at least {MIN_CONVERSIONS} must reach the output",
                format_si(transport_s, "s"),
                with_links.max(0.0),
                without_links,
                format_si(window_s, "s")
            ),
        )
        .with_hint(format!(
            "shorten this link's {key}, or lengthen simulation.duration by at least {}",
            format_si(transport_s, "s")
        )))
}

/// A chirp whose sweep is shorter than a few grid steps is no sweep, and its group-delay meter would visit
/// one window per sweep over the whole record.
fn chirp_spans_the_grid(
    map: &SourceMap<'_>,
    root: &Table,
    sc: &Scenario,
) -> Result<(), ScenarioError> {
    let Waveform::Chirp { sweep_s, .. } = sc.source.waveform else {
        return Ok(());
    };
    let steps = sweep_s * sc.simulation.analog_rate_hz;
    if steps < MIN_SWEEP_STEPS {
        return Err(map
            .error(
                &span_of(root, "source.sweep_time"),
                "source.sweep_time",
                format!(
                    "a sweep of {} spans {steps:.3} steps of the analog grid; a chirp needs at least \
                     {MIN_SWEEP_STEPS} to sweep at all",
                    format_si(sweep_s, "s")
                ),
            )
            .with_hint(format!(
                "lengthen sweep_time to at least {} (or raise simulation.analog_rate)",
                format_si(MIN_SWEEP_STEPS / sc.simulation.analog_rate_hz, "s")
            )));
    }
    Ok(())
}

/// A WAV file far slower than the analog grid (a 1 Hz file on a 1 MHz grid) is refused: see
/// [`MAX_WAV_UPSAMPLING`].
fn wav_rate_near_the_grid(
    map: &SourceMap<'_>,
    root: &Table,
    sc: &Scenario,
) -> Result<(), ScenarioError> {
    let Waveform::Wav { path, .. } = &sc.source.waveform else {
        return Ok(());
    };
    let full = if path.is_absolute() {
        path.clone()
    } else {
        sc.base_dir.join(path)
    };
    // The file was read and checked while the source was built; read its header again for the rate.
    let Ok(h) = crate::stages::wav_file::read_header(&full) else {
        return Ok(());
    };
    let ratio = sc.simulation.analog_rate_hz / f64::from(h.rate_hz);
    if ratio > MAX_WAV_UPSAMPLING {
        return Err(map
            .error(
                &span_of(root, "source.file"),
                "source.file",
                format!(
                    "the file's sample rate ({}) is {ratio:.0} times below the analog rate ({}); at most \
                     {MAX_WAV_UPSAMPLING:.0} is accepted",
                    format_si(f64::from(h.rate_hz), "Hz"),
                    format_si(sc.simulation.analog_rate_hz, "Hz")
                ),
            )
            .with_hint("give a file recorded at an audio rate, or lower simulation.analog_rate"));
    }
    Ok(())
}
