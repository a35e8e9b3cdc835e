//! Argument parsing and printing only; the work is in the library.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod montecarlo;

use convchain::error::Error;
use convchain::report::OutputDir;
use convchain::scenario::{self, Scenario};

/// Simulate an analog -> ADC -> digital -> DAC -> analog chain and measure it like a bench.
#[derive(Parser, Debug)]
#[command(name = "convchain", version, about, long_about = None)]
struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Run a scenario (or the embedded demo) and write report.json and waveforms.csv.
    Run {
        /// Scenario file (TOML). Without it, the embedded demo scenario runs.
        scenario: Option<PathBuf>,
        /// Output folder (default out/<name>/).
        #[arg(long)]
        out: Option<PathBuf>,
        /// Write every grid sample to waveforms.csv instead of at most 1e6 rows.
        #[arg(long)]
        full: bool,
        /// Print nothing but errors.
        #[arg(long, short)]
        quiet: bool,
        /// Print the report as JSON on standard output instead of the table.
        #[arg(long)]
        json: bool,
    },
    /// Check a scenario file without running it.
    Check { scenario: PathBuf },
    /// Write a commented starter scenario.
    Init {
        /// File name to write (default scenario.toml), inside --out.
        file: Option<PathBuf>,
        /// Folder to write into (default: the current folder).
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// Static tests: the ADC (slow ramp and code-density test) and the DAC (every code stepped).
    Static {
        /// Scenario file (TOML). Without it, the embedded demo scenario.
        scenario: Option<PathBuf>,
        /// Output folder (default out/<name>/).
        #[arg(long)]
        out: Option<PathBuf>,
        #[arg(long)]
        json: bool,
        #[arg(long, short)]
        quiet: bool,
    },
    /// Monte-Carlo study: run the scenario many times with fresh draws; percentiles and yield.
    Montecarlo(montecarlo::McArgs),
    /// Join the folders of shards (--shard K/N) of one study into what a single machine would have written.
    Merge(montecarlo::MergeArgs),
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
        Err(e) if e.downcast_ref::<montecarlo::Interrupted>().is_some() => {
            eprintln!("{e}");
            ExitCode::from(montecarlo::INTERRUPTED_EXIT)
        }
        Err(e) => {
            if let Some(io) = e.downcast_ref::<std::io::Error>()
                && io.kind() == std::io::ErrorKind::BrokenPipe
            {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {e:#}");
            let bad_input = e
                .downcast_ref::<Error>()
                .map(Error::is_bad_input)
                .unwrap_or(false);
            ExitCode::from(if bad_input { 2 } else { 1 })
        }
    }
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
        Command::Check { scenario } => {
            let sc = scenario::load(&scenario)?;
            print_warnings(&sc, false);
            let (plan, _) = convchain::engine::pipeline::Plan::new(&sc)?;
            let mut o = stdout.lock();
            writeln!(
                o,
                "{}: ok ({} stages, {} grid steps, about {:.0} MB for the analysis record)",
                scenario.display(),
                sc.stages.len(),
                plan.n_total,
                plan.memory_estimate_bytes as f64 / 1e6
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
            let tmp = path.with_extension("toml.tmp");
            std::fs::write(&tmp, scenario::STARTER).map_err(|e| Error::Write {
                path: tmp.clone(),
                source: e,
            })?;
            std::fs::rename(&tmp, &path).map_err(|e| Error::Write {
                path: path.clone(),
                source: e,
            })?;
            writeln!(stdout.lock(), "wrote {}", path.display())?;
        }
        Command::Run {
            scenario,
            out,
            full,
            quiet,
            json,
        } => {
            let sc = load(scenario.as_deref())?;
            print_warnings(&sc, quiet);
            let dir = out_dir(out, &sc);
            OutputDir::check(&dir)?;
            let opts = convchain::RunOptions {
                full_waveforms: full,
                progress: !quiet && !json,
            };
            let report = convchain::run_to_dir(&sc, &dir, &opts)?;
            let mut o = stdout.lock();
            if json {
                writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
            } else if !quiet {
                write!(o, "{}", convchain::report::table::summary(&report))?;
                writeln!(o, "wrote {}", dir.display())?;
            }
        }
        Command::Static {
            scenario,
            out,
            json,
            quiet,
        } => {
            let sc = load(scenario.as_deref())?;
            print_warnings(&sc, quiet);
            let dir = out_dir(out, &sc);
            OutputDir::check(&dir)?;
            let report = convchain::static_to_dir(&sc, &dir)?;
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
    }
    Ok(())
}
