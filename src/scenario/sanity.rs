//! Checks across the whole scenario that would otherwise only fail once a run has started (with no location)
//! or make a run cost far more than it should. They run after [`super::validate::build`], in `check` as in
//! `run`, and locate their message at the key to change.

use super::{AdcInput, Scenario, Slip, StageKind, Waveform};
use crate::format::reader::{ScenarioError, SourceMap, Span, Table, Value};
use crate::format::units::format_si;
use crate::stages::kind::Role;

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
    network_packets_hold_a_code(map, root, sc)?;
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

/// The nominal rate of the codes at each stage (Hz): the last converter's sample rate before it, or the last
/// `resample`'s output rate; None before the first converter. With hops in series each hop's code stages run at
/// their own converter's rate.
fn code_rates(sc: &Scenario) -> Vec<Option<f64>> {
    let mut fs = None;
    sc.stages
        .iter()
        .map(|s| {
            if let Some(t) = s.kind.quantizer_timing() {
                fs = Some(t.sample_rate_hz);
            } else if let StageKind::Resample(r) = &s.kind {
                fs = Some(r.rate_hz);
            }
            fs
        })
        .collect()
}

/// The code stages' delays (a link's delay and frame wait, a buffer's blocks, a codec's frame, a network's packet,
/// delay and jitter buffer) come off the ADC record (the output must have received every recorded
/// code): when they leave fewer than [`MIN_CONVERSIONS`] of conversions that fit in the analysis window,
/// name the stage rather than the window.
fn links_leave_a_record(
    map: &SourceMap<'_>,
    root: &Table,
    sc: &Scenario,
) -> Result<(), ScenarioError> {
    let Some(adc) = sc.stages.iter().find_map(|s| s.kind.quantizer_timing()) else {
        return Ok(());
    };
    let fs = adc.sample_rate_hz;
    let window_s = sc.simulation.duration_s - sc.simulation.settle_s;
    let without_links = ((window_s - adc.conversion_time_s - 1.0 / fs) * fs).floor();
    if without_links < MIN_CONVERSIONS {
        return Ok(()); // the window itself is too short: the pipeline's own message says so
    }
    let mut transport_s = 0.0;
    // (stage number, seconds, the key that holds most of them)
    let mut worst: Option<(usize, f64, &'static str)> = None;
    for ((i, s), fs_here) in sc.stages.iter().enumerate().zip(code_rates(sc)) {
        if s.kind.role() != Role::Code {
            continue;
        }
        let fs_here = fs_here.unwrap_or(fs);
        let t = s.kind.transport_s(fs_here);
        transport_s += t;
        let key = match &s.kind {
            StageKind::Link(l) if l.delay_s >= f64::from(l.frame) / fs_here => "delay",
            StageKind::Link(_) => "frame",
            StageKind::Network(n) if n.delay_s >= n.jitter_buffer_s && n.delay_s >= n.packet_s => {
                "delay"
            }
            StageKind::Network(n) if n.jitter_buffer_s >= n.packet_s => "jitter_buffer",
            StageKind::Network(_) => "packet",
            StageKind::Buffer(_) => "block",
            StageKind::Codec(_) => "frame",
            _ => "kind",
        };
        if worst.is_none_or(|(_, w, _)| t > w) {
            worst = Some((i + 1, t, key));
        }
    }
    let with_links = ((window_s - adc.conversion_time_s - transport_s - 1.0 / fs) * fs).floor();
    let Some((n, _, key)) = worst else {
        return Ok(());
    };
    if with_links >= MIN_CONVERSIONS {
        return Ok(());
    }
    let path = format!("stage.{n}.{key}");
    Err(map
        .error(
            &span_of(root, &path),
            &path,
            format!(
                "the code stages' delays (links, buffers, codecs, networks: {}) leave {} of the {} conversions that fit in the analysis \
                 window (duration - settle = {}); at least {MIN_CONVERSIONS} must reach the output",
                format_si(transport_s, "s"),
                with_links.max(0.0),
                without_links,
                format_si(window_s, "s")
            ),
        )
        .with_hint(format!(
            "shorten this stage's {key}, or lengthen simulation.duration by at least {}",
            format_si(transport_s, "s")
        )))
}

/// A network's packet holds round(packet x fs) codes at the rate of the codes it carries (its hop's converter,
/// or the `resample` before it): at least one.
fn network_packets_hold_a_code(
    map: &SourceMap<'_>,
    root: &Table,
    sc: &Scenario,
) -> Result<(), ScenarioError> {
    for ((i, s), fs) in sc.stages.iter().enumerate().zip(code_rates(sc)) {
        if let (StageKind::Network(n), Some(fs)) = (&s.kind, fs)
            && n.codes_per_packet(fs) == 0
        {
            let path = format!("stage.{}.packet", i + 1);
            return Err(map
                .error(
                    &span_of(root, &path),
                    &path,
                    format!(
                        "the packet ({}) is shorter than one sample of the codes it carries ({}, {}); a packet carries \
                         round(packet x sample rate) codes, at least one",
                        format_si(n.packet_s, "s"),
                        format_si(fs, "Hz"),
                        format_si(1.0 / fs, "s")
                    ),
                )
                .with_hint(format!(
                    "make the packet at least one sample period ({})",
                    format_si(1.0 / fs, "s")
                )));
        }
    }
    Ok(())
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

/// Slowest slew rate taken as a real amplifier's (V/s): 1 V/ms. The slowest micropower op-amps slew at a few
/// V/ms (from memory); a value below this is almost surely a unit slip ("0.5 V/s" for "0.5 V/us").
pub const SLEW_RATE_FLOOR_V_PER_S: f64 = 1e3;
/// Fewest grid steps per conversion for the output analysis stream (as the engine's plan asks).
const MIN_STEPS_PER_CONVERSION: f64 = 4.0;

/// The `n`-th `[[stage]]` table (from 1).
fn stage_table(root: &Table, n: usize) -> Option<&Table> {
    let entry = root.entries.iter().find(|e| e.key == "stage")?;
    let Value::Array(items) = &entry.node.value else {
        return None;
    };
    match items.get(n.wrapping_sub(1)).map(|i| &i.value) {
        Some(Value::Table(t)) => Some(t),
        _ => None,
    }
}

/// True when stage `n` writes `key`.
fn stage_writes(root: &Table, n: usize, key: &str) -> bool {
    stage_table(root, n).is_some_and(|t| t.entries.iter().any(|e| e.key == key))
}

fn location(map: &SourceMap<'_>, span: &Span) -> String {
    let (line, column) = map.position(span.start);
    format!("{}:{line}:{column}", map.origin())
}

/// A plain decimal for a suggested value ("0.5", "13", "0.001").
fn plain(v: f64) -> String {
    let s = format!("{:.6}", v);
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s.is_empty() || s == "-" {
        "0".into()
    } else {
        s.into()
    }
}

/// Find the values that are legal but almost surely slips, add them to `sc.slips` and their text to
/// `sc.warnings`, and note where each stage and each stage's `slew_rate` is written (`sc.locations`) for the
/// warnings made after a run. Never fails: every check here has passed [`check`] already.
///
/// - A `slew_rate` under [`SLEW_RATE_FLOOR_V_PER_S`]: slower than any amplifier; probably V/us was meant.
/// - An analog grid that is not a whole multiple, at least 4, of the converter's sample rate: conversions and
///   the DAC's updates fall at varying places between grid samples, the output analysis stream cannot be a
///   multiple of the conversion rate (its rate, and with no `analysis.band` its band, follow the grid), and
///   the output metrics can read far worse than the chain is.
/// - An amplifier or DAC output whose bandwidth lies at or above the grid's rate: it settles within one grid
///   step, so the grid shows none of it.
/// - A converter with a live input whose bit-trial clock is faster than the grid: each trial reads the input
///   interpolated between grid samples.
pub fn note_slips(map: &SourceMap<'_>, root: &Table, sc: &mut Scenario) {
    let mut slips = Vec::new();
    let rate = sc.simulation.analog_rate_hz;
    for (i, st) in sc.stages.iter().enumerate() {
        let n = i + 1;
        if let Some(t) = stage_table(root, n) {
            sc.locations
                .push((format!("stage.{n}"), location(map, &t.span)));
        }
        let output = match &st.kind {
            StageKind::Amplifier(a) => Some(&a.output),
            StageKind::Dac(d) => Some(&d.output),
            _ => None,
        };
        if let Some(out) = output {
            if let Some(sr) = out.slew_rate_v_per_s {
                let key = format!("stage.{n}.slew_rate");
                let at = location(map, &span_of(root, &key));
                sc.locations.push((key.clone(), at.clone()));
                if sr < SLEW_RATE_FLOOR_V_PER_S {
                    slips.push(Slip {
                        location: at,
                        key,
                        message: format!(
                            "a slew rate of {} is slower than any amplifier (the slowest micropower op-amps \
                             slew at a few V/ms): a 1 V step would take {}, and the stage can follow a 1 V \
                             peak sine only below {}",
                            format_si(sr, "V/s"),
                            format_si(1.0 / sr, "s"),
                            format_si(sr / (2.0 * std::f64::consts::PI), "Hz")
                        ),
                        suggestion: format!(
                            "probably slew_rate = \"{} V/us\" ({}) was meant",
                            plain(sr),
                            format_si(sr * 1e6, "V/s")
                        ),
                    });
                }
            }
            if let Some(tau) = out.tau_s
                && tau > 0.0
            {
                let f_c = 1.0 / (2.0 * std::f64::consts::PI * tau);
                if f_c >= rate {
                    let key = ["bandwidth", "settling"]
                        .into_iter()
                        .find(|k| stage_writes(root, n, k))
                        .map_or_else(|| format!("stage.{n}"), |k| format!("stage.{n}.{k}"));
                    slips.push(Slip {
                        location: location(map, &span_of(root, &key)),
                        key,
                        message: format!(
                            "the output's bandwidth ({}, time constant {}) is at or above the analog grid's \
                             rate ({}): it settles within one grid step, so on this grid the stage acts as \
                             if its bandwidth were unlimited",
                            format_si(f_c, "Hz"),
                            format_si(tau, "s"),
                            format_si(rate, "Hz")
                        ),
                        suggestion: format!(
                            "raise simulation.analog_rate to at least {} if the bandwidth matters, or leave \
                             the key out",
                            format_si(4.0 * f_c, "Hz")
                        ),
                    });
                }
            }
        }
        if let Some(t) = st.kind.quantizer_timing() {
            // Judged at the nominal rate: a clock written off by some ppm is meant to drift against the grid.
            let fs = t.sample_rate_hz / crate::engine::clock::clock_scale(t.clock_ppm);
            let steps = rate / fs;
            let whole = (steps - steps.round()).abs() < 1e-6 * steps;
            if steps < MIN_STEPS_PER_CONVERSION || !whole {
                let k = steps.ceil().max(MIN_STEPS_PER_CONVERSION);
                let why = if steps < MIN_STEPS_PER_CONVERSION {
                    format!(
                        "the analog grid ({}) has {:.3} steps per conversion of the ADC ({}), fewer than \
                         the {MIN_STEPS_PER_CONVERSION} the output analysis stream needs: it falls back to \
                         the grid's own rate, so the output record's passband (the wideband figures) and \
                         the output metrics change with the grid",
                        format_si(rate, "Hz"),
                        steps,
                        format_si(fs, "Hz")
                    )
                } else {
                    format!(
                        "the analog grid ({}) is {:.3} times the ADC's sample rate ({}), not a whole \
                         multiple: conversions and the DAC's updates fall at varying places between grid \
                         samples, the output analysis stream cannot be a multiple of the conversion rate, \
                         and the output metrics can read far worse than the chain is",
                        format_si(rate, "Hz"),
                        steps,
                        format_si(fs, "Hz")
                    )
                };
                slips.push(Slip {
                    location: location(map, &span_of(root, "simulation.analog_rate")),
                    key: "simulation.analog_rate".into(),
                    message: why,
                    suggestion: format!(
                        "probably analog_rate = \"{}\" ({k:.0} steps per conversion) was meant",
                        format_si(k * fs, "Hz")
                    ),
                });
            }
            if let StageKind::SarAdc(a) = &st.kind
                && a.input == AdcInput::Live
                && a.clock_given
                && a.clock_hz > rate
            {
                let key = format!("stage.{n}.clock");
                slips.push(Slip {
                    location: location(map, &span_of(root, &key)),
                    key,
                    message: format!(
                        "the bit-trial clock ({}) is faster than the analog grid ({}): with a live input \
                         each trial reads the input interpolated between grid samples, so the conversion sees \
                         the input only as finely as the grid resolves it",
                        format_si(a.clock_hz, "Hz"),
                        format_si(rate, "Hz")
                    ),
                    suggestion: format!(
                        "raise simulation.analog_rate to at least {} (the clock's rate)",
                        format_si(a.clock_hz, "Hz")
                    ),
                });
            }
        }
    }
    for slip in &slips {
        sc.warnings.push(slip.text());
    }
    sc.slips.extend(slips);
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    /// A 12-bit chain at 48 kSPS: `{grid}` analog rate, `{amp}` extra keys of a buffer amplifier, `{adc}`
    /// extra keys of the converter, `{dac}` extra keys of the DAC.
    fn chain(grid: &str, amp: &str, adc: &str, dac: &str) -> String {
        format!(
            "name = \"t\"\n[simulation]\nanalog_rate = \"{grid}\"\nduration = \"60 ms\"\nsettle = \"10 ms\"\n\
             [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"\n\
             [[stage]]\nkind = \"amplifier\"\n{amp}\n\
             [[stage]]\nkind = \"sar_adc\"\nbits = 12\nrange = [\"-2 V\", \"2 V\"]\n{adc}\n\
             [[stage]]\nkind = \"dac\"\n{dac}\n"
        )
    }

    const HELD: &str = "conversion_time = \"10 us\"\nsample_rate = \"48 kHz\"";

    fn slips(text: &str) -> Vec<Slip> {
        let sc = crate::scenario::parse_str(text, "t.toml", Path::new(".")).unwrap();
        for s in &sc.slips {
            assert!(
                sc.warnings.contains(&s.text()),
                "printed with the other warnings"
            );
        }
        sc.slips
    }

    /// "t.toml:LINE:COLUMN" of the first line holding `needle`, at the value after `= `.
    fn at(text: &str, needle: &str) -> String {
        let (i, line) = text
            .lines()
            .enumerate()
            .find(|(_, l)| l.contains(needle))
            .unwrap();
        format!("t.toml:{}:{}", i + 1, line.find("= ").unwrap() + 3)
    }

    #[test]
    fn a_slew_rate_in_volts_per_second_is_a_located_slip_that_suggests_volts_per_microsecond() {
        let text = chain("4.8 MHz", "", HELD, "slew_rate = \"0.5 V/s\"");
        let s = slips(&text);
        assert_eq!(s.len(), 1, "{s:?}");
        assert_eq!(s[0].key, "stage.3.slew_rate");
        assert_eq!(s[0].location, at(&text, "slew_rate"));
        assert!(s[0].message.contains("500 mV/s"), "{}", s[0].message);
        assert!(
            s[0].suggestion.contains("slew_rate = \"0.5 V/us\""),
            "{}",
            s[0].suggestion
        );
        // The slowest real amplifiers (a few V/ms) and anything faster pass; so does the same value in V/us.
        for ok in ["0.5 V/us", "5 V/ms", "13 V/us"] {
            let text = chain("4.8 MHz", &format!("slew_rate = \"{ok}\""), HELD, "");
            assert!(slips(&text).is_empty(), "{ok}");
        }
    }

    #[test]
    fn a_grid_that_is_not_a_whole_multiple_of_at_least_4_conversions_is_a_located_slip() {
        // 150 kHz: 3.125 steps per conversion; the output stream falls back to the grid's rate.
        let text = chain("150 kHz", "", HELD, "");
        let s = slips(&text);
        assert_eq!(s.len(), 1, "{s:?}");
        assert_eq!(s[0].key, "simulation.analog_rate");
        assert_eq!(s[0].location, "t.toml:3:15");
        assert!(s[0].message.contains("3.125 steps"), "{}", s[0].message);
        assert!(
            s[0].suggestion.contains("\"192 kHz\""),
            "{}",
            s[0].suggestion
        );
        // 1.01 MHz: 21.04 steps, not whole; the next whole number of steps is 22 (1.056 MHz).
        let s = slips(&chain("1.01 MHz", "", HELD, ""));
        assert_eq!(s.len(), 1, "{s:?}");
        assert!(s[0].message.contains("not a whole"), "{}", s[0].message);
        assert!(
            s[0].suggestion.contains("\"1.056 MHz\""),
            "{}",
            s[0].suggestion
        );
        for ok in ["192 kHz", "480 kHz", "4.8 MHz"] {
            assert!(slips(&chain(ok, "", HELD, "")).is_empty(), "{ok}");
        }
        // A converter clock written 30 ppm off is meant to drift against the grid: judged at its nominal rate.
        let adc = format!("{HELD}\nclock_ppm = 30");
        assert!(slips(&chain("4.8 MHz", "", &adc, "")).is_empty());
        let s = slips(&chain("1.01 MHz", "", &adc, ""));
        assert_eq!(s.len(), 1, "{s:?}");
        assert!(
            s[0].suggestion.contains("\"1.056 MHz\""),
            "{}",
            s[0].suggestion
        );
    }

    #[test]
    fn a_bandwidth_at_or_above_the_grid_rate_is_a_located_slip() {
        let text = chain("480 kHz", "bandwidth = \"1 MHz\"", HELD, "");
        let s = slips(&text);
        assert_eq!(s.len(), 1, "{s:?}");
        assert_eq!(s[0].key, "stage.1.bandwidth");
        assert_eq!(s[0].location, at(&text, "bandwidth"));
        assert!(s[0].suggestion.contains("4 MHz"), "{}", s[0].suggestion);
        // Given as a settling time on the DAC: 100 ns is 1.59 MHz.
        let text = chain("480 kHz", "", HELD, "settling = \"100 ns\"");
        let s = slips(&text);
        assert_eq!(s.len(), 1, "{s:?}");
        assert_eq!(s[0].key, "stage.3.settling");
        // Below the grid's rate it is shown by the grid: no warning.
        assert!(slips(&chain("480 kHz", "bandwidth = \"200 kHz\"", HELD, "")).is_empty());
        assert!(slips(&chain("4.8 MHz", "bandwidth = \"3 MHz\"", HELD, "")).is_empty());
    }

    #[test]
    fn a_live_converter_clocked_faster_than_the_grid_is_a_located_slip() {
        let live = |clock: &str| {
            format!("clock = \"{clock}\"\ncycles = 14\nsample_rate = \"48 kHz\"\ninput = \"live\"")
        };
        let text = chain("480 kHz", "", &live("1 MHz"), "");
        let s = slips(&text);
        assert_eq!(s.len(), 1, "{s:?}");
        assert_eq!(s[0].key, "stage.2.clock");
        assert_eq!(s[0].location, at(&text, "clock"));
        assert!(slips(&chain("4.8 MHz", "", &live("1 MHz"), "")).is_empty());
        // A held input is read once, at the sampling instant: the clock does not matter to the grid.
        let held = "clock = \"1 MHz\"\ncycles = 14\nsample_rate = \"48 kHz\"";
        assert!(slips(&chain("480 kHz", "", held, "")).is_empty());
    }

    /// Two hops: a first ADC at `fs1`, a second at `fs2`, a network of `packet` in the second hop.
    fn two_hops_with_a_network(fs1: &str, fs2: &str, packet: &str) -> String {
        format!(
            "name = \"t\"\n[simulation]\nanalog_rate = \"4 MHz\"\nduration = \"60 ms\"\nsettle = \"10 ms\"\n\
             [source]\nwaveform = \"sine\"\nfrequency = \"100 Hz\"\namplitude = \"1 V\"\n\
             [[stage]]\nkind = \"sar_adc\"\nbits = 12\nrange = [\"-2 V\", \"2 V\"]\nsample_rate = \"{fs1}\"\nconversion_time = \"500 ns\"\n\
             [[stage]]\nkind = \"dac\"\n\
             [[stage]]\nkind = \"sar_adc\"\nbits = 12\nrange = [\"-2 V\", \"2 V\"]\nsample_rate = \"{fs2}\"\nconversion_time = \"500 ns\"\n\
             [[stage]]\nkind = \"network\"\npacket = \"{packet}\"\ndelay = \"1 ms\"\n\
             [[stage]]\nkind = \"dac\"\n"
        )
    }

    #[test]
    fn a_network_packet_is_judged_at_the_rate_of_its_own_hops_codes() {
        let parse = |t: &str| crate::scenario::parse_str(t, "t.toml", Path::new("."));
        // 50 us holds 50 codes at the first hop's 1 MHz but none at the second hop's 8 kHz, which it carries.
        let text = two_hops_with_a_network("1 MHz", "8 kHz", "50 us");
        let e = parse(&text).unwrap_err().to_string();
        assert!(e.contains("stage.4.packet"), "{e}");
        assert!(e.contains("8 kHz"), "{e}");
        // The other way round, 5 us holds 5 codes at the second hop's 1 MHz: no error (the first hop's 8 kHz
        // would have refused it).
        let text = two_hops_with_a_network("8 kHz", "1 MHz", "5 us");
        parse(&text).unwrap();
    }
}
