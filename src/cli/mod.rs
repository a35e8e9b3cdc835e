//! Argument parsing and printing only; the work is in the library.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod analyze;
mod delay;
mod interrupt;
mod montecarlo;
mod need;

use convchain::error::Error;
use convchain::report::{OutputDir, Producer};
use convchain::scenario::{self, Scenario};

mod study_cli;

/// Simulate an analog -> ADC -> digital -> DAC -> analog chain and measure it like a bench.
#[derive(Parser, Debug)]
#[command(name = "convchain", version, about, long_about = None)]
struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Run a scenario (or the embedded demo): report.json, waveforms.csv and .npy, plots, WAV files, report.md/.html.
    Run {
        /// Scenario file (TOML). Without it, the embedded demo scenario runs.
        scenario: Option<PathBuf>,
        /// Output folder (default out/<name>/).
        #[arg(long)]
        out: Option<PathBuf>,
        /// Write every grid sample to waveforms.csv instead of the default rows: 10 per period of the fastest
        /// ADC's output codes, at most 1e6 rows (a chain without an ADC: as many as fit in 1e6 rows).
        #[arg(long)]
        full: bool,
        /// Write every analog grid step to waveforms.npy instead of waveforms.csv's rows. Large: 8 bytes per
        /// analog stream plus 8 for the time and 4 per code column, per step (the reference chain, 5 columns,
        /// 1 s on a 10 MHz grid: about 400 MB).
        #[arg(long)]
        npy_full_rate: bool,
        /// Print nothing but errors.
        #[arg(long, short)]
        quiet: bool,
        /// Print the report as JSON on standard output instead of the table.
        #[arg(long)]
        json: bool,
        /// Time window of the waveform plot, e.g. "10 ms..12 ms" (default: the last few cycles).
        #[arg(long, value_name = "START..END")]
        window: Option<String>,
        /// Sample rate of the WAV files (Hz).
        #[arg(long, default_value_t = 48000)]
        wav_rate: u32,
        /// Sample format of the WAV files.
        #[arg(long, value_enum, default_value_t = WavFormatArg::Int24)]
        wav_format: WavFormatArg,
        /// Gain applied to error.wav (lowered automatically if it would clip).
        #[arg(long, default_value_t = 1.0)]
        listen_gain: f64,
        /// Do not write the WAV files.
        #[arg(long)]
        no_wav: bool,
        /// Do not write the plots and the Markdown/HTML reports.
        #[arg(long)]
        no_plots: bool,
        /// Write into a folder that holds a study, replacing the files convchain wrote there.
        #[arg(long)]
        force: bool,
        /// Add the audio figures (AES17 methods: THD+N, A-weighted dynamic range and idle noise, frequency
        /// response), with three more runs of the chain.
        #[arg(long)]
        audio: bool,
        /// Band of the audio figures, e.g. "20 Hz..20 kHz" (the default; implies --audio; its top is clipped to
        /// the converter's Nyquist frequency).
        #[arg(long, value_name = "LOW..HIGH")]
        audio_band: Option<String>,
        /// A recording of the built chain's output (WAV, or CSV with a time column) to measure beside the
        /// simulated output with the same meter; report.json gets a `compare` object.
        #[arg(long, value_name = "CAPTURE")]
        compare: Option<PathBuf>,
        /// CSV capture: the value column, by header name or number (from 1; the time is column 1).
        #[arg(long, requires = "compare", conflicts_with = "compare_channel")]
        compare_column: Option<String>,
        /// WAV capture: the channel, from 1.
        #[arg(long, requires = "compare")]
        compare_channel: Option<u16>,
        /// The volts that the capture's sample value 1.0 stands for (a WAV file's full scale), e.g. "2.5 V";
        /// default 1 V (a CSV export's values are volts as written).
        #[arg(long, value_name = "V", requires = "compare")]
        compare_full_scale: Option<String>,
    },
    /// Write generated demo audio (no recording is shipped) to listen to a chain with.
    Audio {
        /// What to generate.
        #[arg(value_enum)]
        kind: AudioKind,
        /// Folder to write into (default: the current folder).
        #[arg(long)]
        out: Option<PathBuf>,
        /// Length in seconds.
        #[arg(long, default_value_t = 4.0)]
        seconds: f64,
        /// Sample rate (Hz).
        #[arg(long, default_value_t = 48000)]
        rate: u32,
        /// Bits per sample: 16 or 24 (integer), or 32 for float.
        #[arg(long, default_value_t = 16)]
        bits: u16,
        /// Write two channels (the second is the first inverted).
        #[arg(long)]
        stereo: bool,
    },
    /// Check a scenario file without running it.
    Check {
        /// Scenario file (TOML).
        scenario: PathBuf,
    },
    /// Write a commented starter scenario.
    Init {
        /// File name to write (default scenario.toml), inside --out.
        file: Option<PathBuf>,
        /// Folder to write into (default: the current folder).
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// Static tests: the ADC (slow ramp and code-density test) and the DAC (every code stepped); delta-sigma
    /// converters by their DC transfer (DC levels averaged after the filters settle).
    Static {
        /// Scenario file (TOML). Without it, the embedded demo scenario.
        scenario: Option<PathBuf>,
        /// Output folder (default out/<name>/).
        #[arg(long)]
        out: Option<PathBuf>,
        /// Print static.json on standard output instead of the table.
        #[arg(long)]
        json: bool,
        /// Print nothing but errors.
        #[arg(long, short)]
        quiet: bool,
        /// Write into a folder that holds a study, replacing the files convchain wrote there.
        #[arg(long)]
        force: bool,
    },
    /// Sweep numeric keys over ranges (several --vary make a grid) and tabulate every metric.
    Sweep(study_cli::SweepArgs),
    /// Find the lowest sine frequency at which the chain starts to struggle, and why.
    Limit(study_cli::LimitArgs),
    /// What must change, and by how much: the value of each key that makes the chain meet a requirement.
    Need(need::NeedArgs),
    /// Monte-Carlo study: run the scenario many times with fresh draws; percentiles and yield.
    Montecarlo(montecarlo::McArgs),
    /// Join the folders of shards (--shard K/N) of one study into what a single machine would have written.
    Merge(montecarlo::MergeArgs),
    /// Measure a recorded sine (WAV or CSV capture): analysis.json and plots.
    Analyze(analyze::AnalyzeArgs),
    /// The delay of a capture behind its reference, the drift between their clocks, and the gain.
    Delay(delay::DelayArgs),
}

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
enum WavFormatArg {
    Int24,
    Float32,
}

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
enum AudioKind {
    /// A major chord with a slow attack and decay.
    Chord,
    /// A voice-like sound whose formants glide between vowels.
    Formant,
}

/// Lowest and highest sample rate of the listening files (Hz): 8 kHz is the telephone band's rate, 384 kHz
/// the highest rate common audio interfaces offer (common practice, no source); beyond it files grow with no
/// gain for listening.
const WAV_RATE_MIN_HZ: u32 = 8000;
const WAV_RATE_MAX_HZ: u32 = 384_000;
/// Largest gain for error.wav (+80 dB); it is lowered automatically anyway when it would clip.
const LISTEN_GAIN_MAX: f64 = 1e4;

/// Parse `FROM..TO` of one dimension for `option` (its message shows `example`): two quantities with units,
/// the second larger.
fn parse_range(
    option: &str,
    text: &str,
    dimension: convchain::format::units::Dimension,
    what: &str,
    example: &str,
) -> Result<(f64, f64), Error> {
    use convchain::format::units::parse_quantity;
    let bad = |why: String| {
        Error::BadInput(format!(
            "{option} \"{}\": {why}; write it as {what}, e.g. \"{example}\"",
            convchain::text::clip(text)
        ))
    };
    let (a, b) = text.split_once("..").ok_or_else(|| bad("no `..`".into()))?;
    if b.starts_with('.') || b.contains("..") {
        return Err(bad("more than two dots between the two ends".into()));
    }
    let a = parse_quantity(a.trim(), dimension).map_err(|e| bad(e.message))?;
    let b = parse_quantity(b.trim(), dimension).map_err(|e| bad(e.message))?;
    if b <= a {
        return Err(bad("the end must come after the start".into()));
    }
    Ok((a, b))
}

/// Parse `START..END` with time units.
fn parse_window(text: &str) -> Result<(f64, f64), Error> {
    parse_range(
        "--window",
        text,
        convchain::format::units::Dimension::Time,
        "START..END with times",
        "10 ms..12 ms",
    )
}

/// Parse `LOW..HIGH` with frequency units; LOW must not be negative.
fn parse_audio_band(text: &str) -> Result<(f64, f64), Error> {
    let (a, b) = parse_range(
        "--audio-band",
        text,
        convchain::format::units::Dimension::Frequency,
        "LOW..HIGH with frequencies",
        "20 Hz..20 kHz",
    )?;
    if a < 0.0 {
        return Err(Error::BadInput(format!(
            "--audio-band \"{}\": the low end must not be negative",
            convchain::text::clip(text)
        )));
    }
    Ok((a, b))
}

/// Entry point: run, print errors with their causes, map them to exit codes.
pub fn main() -> ExitCode {
    let args = match Args::try_parse() {
        Ok(a) => a,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    match run(args) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) if e.downcast_ref::<interrupt::Interrupted>().is_some() => {
            eprintln!("{e}");
            ExitCode::from(interrupt::INTERRUPTED_EXIT)
        }
        Err(e) => {
            if let Some(io) = e.downcast_ref::<std::io::Error>()
                && io.kind() == std::io::ErrorKind::BrokenPipe
            {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {}", error_text(&e));
            let bad_input = e
                .downcast_ref::<Error>()
                .map(Error::is_bad_input)
                .unwrap_or(false);
            ExitCode::from(if bad_input { 2 } else { 1 })
        }
    }
}

/// The error and its causes joined by ": ", each said once: a cause whose text the message already holds (the
/// OS error inside "cannot write X: Permission denied (os error 13)") is not repeated.
fn error_text(e: &anyhow::Error) -> String {
    let mut s = String::new();
    for cause in e.chain() {
        let t = cause.to_string();
        if t.is_empty() || s.contains(&t) {
            continue;
        }
        if !s.is_empty() {
            s.push_str(": ");
        }
        s.push_str(&t);
    }
    s
}

/// The starter scenario named after the file it is written to (`init my-chain.toml` names it "my-chain"):
/// the file's stem with every character other than letters, digits, `-` and `_` made a `-`; the starter's own
/// name when nothing is left.
fn starter_named(file: &Path) -> String {
    const STARTER_NAME: &str = "name = \"bench-demo\"";
    let stem = file
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_default();
    let name: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '-'
            }
        })
        .collect();
    let name = name.trim_matches('-');
    if name.is_empty() {
        return scenario::STARTER.to_string();
    }
    scenario::STARTER.replacen(STARTER_NAME, &format!("name = \"{name}\""), 1)
}

fn load(path: Option<&Path>) -> Result<Scenario, Error> {
    match path {
        Some(p) => scenario::load(p),
        None => scenario::parse_str(
            convchain::DEFAULT_SCENARIO,
            "<embedded default>",
            Path::new("."),
        )
        .map_err(Error::from),
    }
}

fn print_warnings(sc: &Scenario, quiet: bool) {
    if !quiet {
        for w in &sc.warnings {
            eprintln!("warning: {w}");
        }
    }
}

fn out_dir(out: Option<PathBuf>, sc: &Scenario) -> PathBuf {
    out.unwrap_or_else(|| Path::new("out").join(&sc.name))
}

fn run(args: Args) -> anyhow::Result<()> {
    let stdout = std::io::stdout();
    match args.command {
        Command::Sweep(a) => study_cli::sweep(a)?,
        Command::Limit(a) => study_cli::limit(a)?,
        Command::Need(a) => need::need(a)?,
        Command::Check { scenario } => {
            let sc = scenario::load(&scenario)?;
            print_warnings(&sc, false);
            let (plan, _) = convchain::engine::plan::Plan::new(&sc)?;
            convchain::runner::check_paths(&sc)?;
            let stages = if sc.paths.is_empty() {
                format!("{} stages", sc.stages.len())
            } else {
                format!(
                    "{} paths: {}",
                    sc.paths.len(),
                    sc.paths
                        .iter()
                        .map(|p| format!("{} {} stages", p.name, p.stages.len()))
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            };
            let mut o = stdout.lock();
            writeln!(
                o,
                "{}: ok ({stages}, {} grid steps, about {:.0} MB for the analysis record{})",
                scenario.display(),
                plan.n_total,
                plan.memory_estimate_bytes as f64 / 1e6,
                if sc.paths.len() > 1 {
                    " of the first path"
                } else {
                    ""
                }
            )?;
        }
        Command::Init { file, out } => {
            let dir = out.unwrap_or_else(|| PathBuf::from("."));
            let name = file.unwrap_or_else(|| PathBuf::from("scenario.toml"));
            let path = dir.join(&name);
            if path.exists() {
                return Err(Error::BadInput(format!(
                    "{} already exists; convchain does not overwrite files (choose another name)",
                    path.display()
                ))
                .into());
            }
            std::fs::create_dir_all(path.parent().unwrap_or(&dir)).map_err(|e| Error::Write {
                path: dir.clone(),
                source: e,
            })?;
            convchain::report::outdir::write_new_file(&path, |tmp| {
                let mut f = convchain::report::outdir::create_new_file(tmp)?;
                f.write_all(starter_named(&name).as_bytes())
                    .map_err(|e| Error::Write {
                        path: tmp.to_path_buf(),
                        source: e,
                    })
            })?;
            writeln!(stdout.lock(), "wrote {}", path.display())?;
        }
        Command::Run {
            scenario,
            out,
            full,
            npy_full_rate,
            quiet,
            json,
            window,
            wav_rate,
            wav_format,
            listen_gain,
            no_wav,
            no_plots,
            force,
            audio,
            audio_band,
            compare,
            compare_column,
            compare_channel,
            compare_full_scale,
        } => {
            let compare = match compare {
                Some(file) => Some(convchain::capture::compare::CompareSpec {
                    file,
                    pick: match (compare_column, compare_channel) {
                        (Some(c), _) => convchain::capture::Pick::Column(c),
                        (None, Some(n)) => convchain::capture::Pick::Channel(n),
                        (None, None) => convchain::capture::Pick::Only,
                    },
                    volts_per_unit: compare_full_scale
                        .as_deref()
                        .map(|t| {
                            convchain::format::units::parse_quantity(
                                t,
                                convchain::format::units::Dimension::Voltage,
                            )
                            .map_err(|e| {
                                Error::BadInput(format!(
                                    "--compare-full-scale \"{t}\": {}; give the volts that sample value 1.0 \
                                     stands for, e.g. \"2.5 V\"",
                                    e.message
                                ))
                            })
                        })
                        .transpose()?,
                }),
                None => None,
            };
            let window_s = window.as_deref().map(parse_window).transpose()?;
            let audio_band_hz = match audio_band.as_deref() {
                Some(t) => Some(parse_audio_band(t)?),
                None => audio.then_some(convchain::engine::audio::DEFAULT_BAND_HZ),
            };
            if !(WAV_RATE_MIN_HZ..=WAV_RATE_MAX_HZ).contains(&wav_rate) {
                return Err(Error::BadInput(format!(
                    "--wav-rate {wav_rate}: the listening files' rate must lie in \
                     {WAV_RATE_MIN_HZ}..={WAV_RATE_MAX_HZ} Hz (48000 is the default)"
                ))
                .into());
            }
            if !(listen_gain.is_finite() && listen_gain > 0.0 && listen_gain <= LISTEN_GAIN_MAX) {
                return Err(Error::BadInput(format!(
                    "--listen-gain {listen_gain}: give a positive number up to {LISTEN_GAIN_MAX} \
                     (the gain applied to error.wav)"
                ))
                .into());
            }
            let sc = load(scenario.as_deref())?;
            print_warnings(&sc, quiet);
            if let Some((w0, w1)) = window_s {
                let end = sc.simulation.duration_s;
                if w0 < 0.0 || w1 > end {
                    return Err(Error::BadInput(format!(
                        "--window {w0} s..{w1} s: the window must lie within the run, 0 s..{end} s \
                         (simulation.duration); choose START and END inside it"
                    ))
                    .into());
                }
            }
            let dir = out_dir(out, &sc);
            OutputDir::check(&dir, &Producer::run(force))?;
            let opts = convchain::RunOptions {
                full_waveforms: full,
                npy_full_rate,
                progress: !quiet && !json,
                window_s,
                figures: !no_plots,
                wav: (!no_wav).then_some(convchain::report::wav::WavOptions {
                    rate_hz: wav_rate,
                    format: match wav_format {
                        WavFormatArg::Int24 => convchain::report::wav::WavFormat::Int24,
                        WavFormatArg::Float32 => convchain::report::wav::WavFormat::Float32,
                    },
                    listen_gain,
                }),
                force,
                audio_band_hz,
                compare,
            };
            interrupt::install_stop_handler("run");
            let report = convchain::run_to_dir(&sc, &dir, &opts)?;
            if let Some(l) = &report.listening
                && !quiet
                && opts.wav.is_some()
                && l.error_gain_used < listen_gain * (1.0 - 1e-9)
            {
                eprintln!(
                    "note: --listen-gain {listen_gain} lowered to {:.4} so error.wav does not clip",
                    l.error_gain_used
                );
            }
            let mut o = stdout.lock();
            if json {
                writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
            } else if !quiet {
                write!(o, "{}", convchain::report::table::summary(&report))?;
                writeln!(o, "wrote {}", dir.display())?;
            }
        }
        Command::Audio {
            kind,
            out,
            seconds,
            rate,
            bits,
            stereo,
        } => {
            use convchain::report::demo_audio;
            if !(seconds > 0.0 && seconds <= 600.0) || rate < 8000 || ![16, 24, 32].contains(&bits)
            {
                return Err(Error::BadInput(
                    "--seconds must be in (0, 600], --rate at least 8000, --bits 16, 24 or 32"
                        .into(),
                )
                .into());
            }
            let dir = out.unwrap_or_else(|| PathBuf::from("."));
            let (name, samples) = match kind {
                AudioKind::Chord => ("chord.wav", demo_audio::chord(rate, seconds)),
                AudioKind::Formant => ("formant.wav", demo_audio::formant_sweep(rate, seconds)),
            };
            let path = dir.join(name);
            if path.exists() {
                return Err(Error::BadInput(format!(
                    "{} already exists; convchain does not overwrite files (remove it or choose another --out)",
                    path.display()
                ))
                .into());
            }
            std::fs::create_dir_all(&dir).map_err(|e| Error::Write {
                path: dir.clone(),
                source: e,
            })?;
            convchain::report::outdir::write_new_file(&path, |tmp| {
                demo_audio::write_file(
                    tmp,
                    &samples,
                    rate,
                    bits,
                    bits == 32,
                    if stereo { 2 } else { 1 },
                )
            })?;
            writeln!(stdout.lock(), "wrote {}", path.display())?;
        }
        Command::Static {
            scenario,
            out,
            json,
            quiet,
            force,
        } => {
            let text =
                convchain::scenario::overrides::ScenarioText::load_or_default(scenario.as_deref())?;
            let sc = text.scenario()?;
            print_warnings(&sc, quiet);
            let dir = out_dir(out, &sc);
            OutputDir::check(&dir, &Producer::static_tests(force))?;
            interrupt::install_stop_handler("static");
            let report = convchain::static_to_dir(&text, &dir, force)?;
            let mut o = stdout.lock();
            if json {
                writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
            } else if !quiet {
                write!(o, "{}", convchain::report::table::static_summary(&report))?;
                writeln!(o, "wrote {}", dir.display())?;
            }
        }
        Command::Montecarlo(a) => montecarlo::run(a)?,
        Command::Merge(a) => montecarlo::merge(a)?,
        Command::Analyze(a) => analyze::run(a)?,
        Command::Delay(a) => delay::run(a)?,
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    /// Every option and argument of `cmd` and its subcommands that has no help text, as "command --option".
    fn without_help(cmd: &clap::Command, path: &str, out: &mut Vec<String>) {
        for a in cmd.get_arguments() {
            let id = a.get_id().as_str();
            if id == "help" || id == "version" {
                continue;
            }
            if a.get_help().is_none() && a.get_long_help().is_none() {
                out.push(format!("{path} {id}"));
            }
        }
        for sub in cmd.get_subcommands() {
            without_help(sub, &format!("{path} {}", sub.get_name()), out);
        }
    }

    #[test]
    fn every_option_of_every_command_has_help_text() {
        let mut cmd = Args::command();
        cmd.build();
        let mut missing = Vec::new();
        without_help(&cmd, "convchain", &mut missing);
        assert!(missing.is_empty(), "options without help text: {missing:?}");
        // The walk reaches every command and its options (a walk that saw nothing would pass anything).
        let run = cmd.find_subcommand("run").expect("run");
        assert!(run.get_arguments().any(|a| a.get_id() == "listen_gain"));
        assert!(cmd.get_subcommands().count() >= 9);
    }

    #[test]
    fn an_error_says_its_os_cause_once() {
        let io = std::io::Error::from_raw_os_error(13);
        let e = anyhow::Error::from(Error::Write {
            path: "out/x".into(),
            source: io,
        });
        let t = error_text(&e);
        assert_eq!(t.matches("os error 13").count(), 1, "{t}");
        assert!(t.starts_with("cannot write out/x: "), "{t}");
        let chained = anyhow::anyhow!("inner").context("outer");
        assert_eq!(error_text(&chained), "outer: inner");
    }

    #[test]
    fn init_names_the_starter_after_its_file() {
        let t = starter_named(Path::new("my-chain.toml"));
        assert!(t.contains("name = \"my-chain\""), "{}", &t[..400]);
        assert!(!t.contains("bench-demo"));
        let t = starter_named(Path::new("dir/bench v2.toml"));
        assert!(t.contains("name = \"bench-v2\""));
        // The renamed starter still reads.
        let sc = scenario::parse_str(
            &starter_named(Path::new("a_b.toml")),
            "a_b.toml",
            Path::new("."),
        )
        .unwrap();
        assert_eq!(sc.name, "a_b");
    }
}
