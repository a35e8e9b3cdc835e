//! From a spanned TOML table to a checked [`Scenario`]: schema, defaults, ranges, stage order and
//! cross-stage resolution. Every error names the offending value's position and key path.

use std::path::{Path, PathBuf};

use super::path_list::paths;
use super::source_table::{FullScale, source};
use super::spread::spread;
use super::stage_list::stages;
use super::*;
use crate::format::reader::{At, ScenarioError, SourceMap, Span, Table, TableReader, show};
use crate::format::units::{Dimension, format_si};

/// The analog-rate margin below which a warning is given (x the highest source frequency).
const RECOMMENDED_OVERSAMPLING: f64 = 20.0;

/// The band a step's output settles into when `analysis.settling_band` is not given (1 % of the step).
const DEFAULT_SETTLING_BAND: f64 = 0.01;

/// Most blocks the latency is tracked over (`analysis.latency_blocks`).
pub const MAX_LATENCY_BLOCKS: u32 = 64;

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
    let path_nodes = r.array("path")?;
    let analysis_t = r.table("analysis")?;
    let spread_t = r.table("spread")?;
    let compare_t = r.table("compare")?;
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
    // The stages are read first: a level in dBFS refers to the first converter's range.
    let stages = match &stage_nodes {
        None => Vec::new(),
        Some(nodes) => stages(map, nodes, &simulation, "stage")?,
    };
    let paths = match (&path_nodes, &stage_nodes) {
        (None, _) => Vec::new(),
        (Some(p), Some(_)) => {
            return Err(map
                .error(
                    &p.span,
                    "path",
                    "a scenario is either one chain ([[stage]]) or several paths ([[path]]), not both",
                )
                .with_hint(
                    "move the [[stage]] tables into a [[path]] as [[path.stage]] tables, or remove the paths",
                ));
        }
        (Some(p), None) => paths(map, p, &simulation)?,
    };
    // With paths, the first path is the scenario's chain: what reads one chain (the plan, the meters, the
    // stage echo) reads it, and the other paths are run beside it.
    let stages = match paths.first() {
        Some(p) => p.stages.clone(),
        None => stages,
    };
    // A level in dBFS refers to the first converter's range, in any path.
    let full_scale = stages
        .iter()
        .chain(paths.iter().flat_map(|p| p.stages.iter()))
        .find_map(|st| st.kind.quantizer_timing())
        .map(|q| FullScale { range_v: q.range_v });
    let source = source(map, src_t, base_dir, &simulation, full_scale, &mut warnings)?;

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

    let analysis = match analysis_t {
        None => Analysis {
            band_hz: None,
            window: WindowKind::BlackmanHarris,
            coherent: true,
            harmonics: 9,
            settling_band: DEFAULT_SETTLING_BAND,
            latency_blocks: 0,
        },
        Some(t) => analysis(map, t)?,
    };
    let spread = match spread_t {
        None => Vec::new(),
        Some(t) => spread(map, t, root)?,
    };
    let compare = compare_t.map(|t| compare(map, t, base_dir)).transpose()?;
    Ok(Scenario {
        name: name.value.to_string(),
        description,
        origin: map.origin().to_string(),
        base_dir: base_dir.to_path_buf(),
        simulation,
        source,
        stages,
        paths,
        analysis,
        spread,
        compare,
        warnings,
        slips: Vec::new(),
        locations: Vec::new(),
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

/// `[compare]`: a recording of the built chain for `run` to measure beside the simulated output. `file` is
/// taken from the scenario's folder when relative; `channel` counts from 0 and `full_scale` is the volts sample
/// value 1.0 stands for, as in the source's `wav` waveform; `column` is a CSV column's header name or its number
/// in the file (from 1, the time being column 1), written as a string.
fn compare(
    map: &SourceMap<'_>,
    t: &Table,
    base_dir: &Path,
) -> Result<crate::capture::compare::CompareSpec, ScenarioError> {
    use crate::capture::Pick;
    let mut r = TableReader::new(map, t, "compare");
    let file = r.string("file")?.ok_or_else(|| {
        r.missing("file", "\"bench-take.csv\"")
            .with_hint("name the recording to compare with")
    })?;
    let column = r.string("column")?;
    let channel = r.integer("channel", 0, i128::from(u16::MAX) - 1)?;
    let full_scale = r.positive("full_scale", Dimension::Voltage)?;
    if let (Some(c), Some(_)) = (&column, &channel) {
        return Err(r
            .error(
                &c.span,
                "column",
                "give column (a CSV file) or channel (a WAV file), not both",
            )
            .with_hint("remove the one that does not match the file"));
    }
    let given = PathBuf::from(file.value);
    let path = if given.is_absolute() {
        given
    } else {
        base_dir.join(&given)
    };
    if !path.is_file() {
        return Err(r
            .error(
                &file.span,
                "file",
                format!("{} is not a file that can be read", path.display()),
            )
            .with_hint(format!(
                "relative paths are taken from the scenario's folder ({})",
                base_dir.display()
            )));
    }
    r.finish(&[], "[compare]")?;
    Ok(crate::capture::compare::CompareSpec {
        file: path,
        pick: match (column, channel) {
            (Some(c), _) => Pick::Column(c.value.to_string()),
            (None, Some(n)) => Pick::Channel(n.value as u16 + 1),
            (None, None) => Pick::Only,
        },
        volts_per_unit: full_scale.map(|q| q.value),
    })
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
    let settling_band = match r.quantity("settling_band", Dimension::Ratio)? {
        None => DEFAULT_SETTLING_BAND,
        Some(q) if q.value <= 0.0 || q.value >= 1.0 => {
            return Err(r
                .error(
                    &q.span,
                    "settling_band",
                    format!(
                        "must be a fraction of the step between 0 and 1 (exclusive), found {}",
                        q.value
                    ),
                )
                .with_hint("write e.g. settling_band = \"1%\" (or 0.001 for 0.1 %)"));
        }
        Some(q) => q.value,
    };
    let latency_blocks = match r.integer("latency_blocks", 0, MAX_LATENCY_BLOCKS as i128)? {
        None => 0,
        Some(q) if q.value == 1 => {
            return Err(r
                .error(
                    &q.span,
                    "latency_blocks",
                    "one block tracks nothing: give 0 (not tracked) or 2 or more",
                )
                .with_hint("write e.g. latency_blocks = 12"));
        }
        Some(q) => q.value as u32,
    };
    r.finish(&[], "[analysis]")?;
    Ok(Analysis {
        band_hz,
        window,
        coherent,
        harmonics,
        settling_band,
        latency_blocks,
    })
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
    fn paths_read_with_the_first_as_the_chain_and_latency_blocks_refuse_one() {
        let text = format!(
            "{HEAD}[[path]]\nname = \"direct\"\n[[path.stage]]\nkind = \"filter\"\norder = 2\ncutoff = \"20 kHz\"\n\
             [[path]]\nname = \"converted\"\ndescription = \"through a converter\"\n\
             [[path.stage]]{}[[path.stage]]{}[analysis]\nlatency_blocks = 12\n",
            ADC.trim_start_matches("\n[[stage]]"),
            DAC.trim_start_matches("\n[[stage]]")
        );
        let s = ok(&text);
        let names: Vec<&str> = s.paths.iter().map(|p| p.name.as_str()).collect();
        assert_eq!(names, ["direct", "converted"]);
        assert_eq!(s.stages, s.paths[0].stages);
        assert_eq!(s.paths[1].stages.len(), 2);
        assert_eq!(s.paths[1].description, "through a converter");
        assert_eq!(s.analysis.latency_blocks, 12);
        let one = for_path_check(&s);
        assert_eq!(one, (2, 0));
        let text = text.replace("latency_blocks = 12", "latency_blocks = 1");
        let e = err(&text);
        assert_eq!(e.line, line_of(&text, "latency_blocks"), "{e}");
        assert!(e.message.contains("one block"), "{e}");
    }

    /// The stage count and path count of the scenario made for the second path.
    fn for_path_check(s: &Scenario) -> (usize, usize) {
        let p = s.for_path(&s.paths[1]);
        (p.stages.len(), p.paths.len())
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
                harmonics: 9,
                settling_band: 0.01,
                latency_blocks: 0
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

    /// The source's peak amplitude read from `[source]` lines written after HEAD's first three source lines.
    fn peak_of(src: &str, stages: &str) -> f64 {
        let text = format!(
            "name = \"t\"\n[simulation]\nanalog_rate = \"10 MHz\"\nduration = \"20 ms\"\n[source]\n{src}\n{stages}"
        );
        match ok(&text).source.waveform {
            Waveform::Sine { amplitude_v, .. }
            | Waveform::Square { amplitude_v, .. }
            | Waveform::Triangle { amplitude_v, .. }
            | Waveform::Sawtooth { amplitude_v, .. }
            | Waveform::Chirp { amplitude_v, .. }
            | Waveform::Step { amplitude_v, .. } => amplitude_v,
            Waveform::Multitone { tones } => tones[0].amplitude_v,
            w => panic!("no amplitude: {w:?}"),
        }
    }

    #[test]
    fn levels_in_dbfs_vpp_and_vrms_give_the_peak_amplitude() {
        let sine = "waveform = \"sine\"\nfrequency = \"1 kHz\"";
        let adc_dac = format!("{ADC}{DAC}");
        // 0 dBFS: the sine spanning the 0..5 V range, peak 2.5 V; -6.0206 dBFS halves it (20 log10 2).
        let p = peak_of(&format!("{sine}\nlevel = \"0 dBFS\""), &adc_dac);
        assert!((p - 2.5).abs() < 1e-12, "{p}");
        let p = peak_of(&format!("{sine}\nlevel = \"-6.0206 dBFS\""), &adc_dac);
        assert!((p - 1.25).abs() < 1e-4, "{p}");
        // Crest factors (common practice, no source): sine sqrt 2, square 1, triangle and sawtooth sqrt 3.
        let p = peak_of(&format!("{sine}\nlevel = \"2 Vpp\""), "");
        assert!((p - 1.0).abs() < 1e-12, "{p}");
        let p = peak_of(&format!("{sine}\nlevel = \"707.1068 mVrms\""), "");
        assert!((p - 1.0).abs() < 1e-6, "{p}");
        let p = peak_of(
            "waveform = \"square\"\nfrequency = 100\nlevel = \"0.5 Vrms\"",
            "",
        );
        assert!((p - 0.5).abs() < 1e-12, "{p}");
        let p = peak_of(
            "waveform = \"triangle\"\nfrequency = 100\nlevel = \"1 Vrms\"",
            "",
        );
        assert!((p - 3f64.sqrt()).abs() < 1e-12, "{p}");
        let p = peak_of(
            "waveform = \"sawtooth\"\nfrequency = 100\nlevel = \"4 Vpp\"",
            "",
        );
        assert!((p - 2.0).abs() < 1e-12, "{p}");
        let p = peak_of(
            "waveform = \"multitone\"\ntones = [{ frequency = \"1 kHz\", level = \"-20 dBFS\" }]",
            &adc_dac,
        );
        assert!((p - 0.25).abs() < 1e-12, "{p}");
        let p = peak_of(
            "waveform = \"chirp\"\nstart = 100\nstop = 1000\nlevel = \"1 Vrms\"",
            "",
        );
        assert!((p - 2f64.sqrt()).abs() < 1e-12, "{p}");
        // A step's level is its height; 0 dBFS crosses the whole 5 V span.
        let p = peak_of(
            "waveform = \"step\"\nat = \"1 ms\"\nlevel = \"-6.0206 dBFS\"",
            &adc_dac,
        );
        assert!((p - 2.5).abs() < 1e-4, "{p}");
        let p = peak_of("waveform = \"step\"\nat = \"1 ms\"\nlevel = \"3 Vpp\"", "");
        assert!((p - 3.0).abs() < 1e-12, "{p}");
    }

    #[test]
    fn bad_levels_are_located_errors() {
        let sine = "waveform = \"sine\"\nfrequency = \"1 kHz\"";
        let text = |src: &str, stages: &str| {
            format!(
                "name = \"t\"\n[simulation]\nanalog_rate = \"10 MHz\"\nduration = \"20 ms\"\n[source]\n{sine}\n{src}\n{stages}"
            )
        };
        // Both written: the error sits at the level.
        let t = text("amplitude = \"1 V\"\nlevel = \"2 Vpp\"", "");
        let e = err(&t);
        assert_eq!(e.key_path, "source.level");
        assert_eq!((e.line, e.column), (line_of(&t, "level"), 9));
        assert!(e.message.contains("both given"), "{}", e.message);
        // dBFS without a converter.
        let t = text("level = \"-6 dBFS\"", "");
        let e = err(&t);
        assert_eq!(e.key_path, "source.level");
        assert!(e.message.contains("needs a converter"), "{}", e.message);
        assert!(e.hint.as_deref().unwrap_or("").contains("Vpp"));
        // Unknown unit, negative volts, not a string, missing both.
        for bad in ["\"2 V\"", "\"-1 Vpp\"", "3", "\"abc dBFS\"", "\"1 kVrmsx\""] {
            let t = text(&format!("level = {bad}"), "");
            let e = err(&t);
            assert_eq!(e.key_path, "source.level", "{bad}");
            assert_eq!(e.line, line_of(&t, "level"), "{bad}");
        }
        let e = err(&text("", ""));
        assert_eq!(e.key_path, "source.amplitude");
        assert!(e.hint.as_deref().unwrap_or("").contains("level"));
        // A step has no rms level.
        let t = "name = \"t\"\n[simulation]\nanalog_rate = \"10 MHz\"\nduration = \"20 ms\"\n[source]\nwaveform = \"step\"\nlevel = \"1 Vrms\"\n";
        assert_eq!(err(t).key_path, "source.level");
    }

    #[test]
    fn settling_band_reads_as_a_fraction_and_refuses_one_or_more() {
        let s = ok(&format!("{HEAD}[analysis]\nsettling_band = \"0.1%\"\n"));
        assert!((s.analysis.settling_band - 1e-3).abs() < 1e-15);
        for bad in ["0", "1.5", "\"100%\"", "\"-1%\""] {
            let t = format!("{HEAD}[analysis]\nsettling_band = {bad}\n");
            let e = err(&t);
            assert_eq!(e.key_path, "analysis.settling_band", "{bad}");
            assert_eq!(e.line, line_of(&t, "settling_band"), "{bad}");
        }
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
                "between a hold and the ADC it feeds",
            ),
            (
                format!("{HEAD}{sh}"),
                "stage.1.kind",
                "sample_hold must come directly before an ADC",
            ),
            (
                format!("{HEAD}{ADC}{flt}{DAC}"),
                "stage.2.kind",
                "digital codes",
            ),
            (
                format!("{HEAD}{ADC}"),
                "stage.1.kind",
                "sar_adc needs a DAC after it",
            ),
            (
                format!("{HEAD}{ADC}{link}"),
                "stage.1.kind",
                "sar_adc needs a DAC after it",
            ),
            (
                format!("{HEAD}{DAC}"),
                "stage.1.kind",
                "a dac needs codes: put an ADC",
            ),
            (
                format!("{HEAD}{link}{ADC}{DAC}"),
                "stage.1.kind",
                "a link carries codes: it must sit between an ADC and its DAC",
            ),
            (
                format!("{HEAD}{ADC}{ADC}{DAC}"),
                "stage.2.kind",
                "sar_adc cannot sit between an ADC and its DAC",
            ),
            (
                format!("{HEAD}{ADC}{DAC}{DAC}"),
                "stage.3.kind",
                "this dac follows a DAC without an ADC of its own",
            ),
            (
                format!("{HEAD}{ADC}{DAC}{ADC}{DAC}{link}"),
                "stage.5.kind",
                "a link carries codes: it must sit between an ADC and its DAC",
            ),
            (
                format!("{HEAD}{ADC}{DAC}{sh}"),
                "stage.3.kind",
                "sample_hold must come directly before an ADC",
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
        // Hops in series: analog stages and a hold may sit between one hop's DAC and the next ADC.
        let s = ok(&format!("{HEAD}{ADC}{link}{DAC}{flt}{sh}{ADC}{DAC}{flt}"));
        assert_eq!(s.stages.len(), 8);
    }

    #[test]
    fn the_grammar_reads_up_to_max_hops_and_refuses_one_more() {
        use crate::scenario::stage_list::MAX_HOPS;
        let hop = format!("{ADC}{DAC}");
        let s = ok(&format!("{HEAD}{}", hop.repeat(MAX_HOPS)));
        assert_eq!(s.stages.len(), 2 * MAX_HOPS);
        let text = format!("{HEAD}{}", hop.repeat(MAX_HOPS + 1));
        let e = err(&text);
        assert_eq!(
            e.key_path,
            format!("stage.{}.kind", 2 * MAX_HOPS + 1),
            "{e}"
        );
        assert!(
            e.message.contains(&format!(
                "at most {MAX_HOPS} hops (ADC ... DAC groups) in series"
            )),
            "{e}"
        );
        assert!(e.hint.is_some(), "{e}");
        // Located at the offending stage's `kind`: the (MAX_HOPS + 1)-th ADC's line.
        let nth_kind_line = text
            .lines()
            .enumerate()
            .filter(|(_, l)| l.contains("kind = \"sar_adc\""))
            .nth(MAX_HOPS)
            .map(|(i, _)| i + 1)
            .unwrap();
        assert_eq!(e.line, nth_kind_line, "{e}");
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
