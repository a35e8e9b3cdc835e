//! `convchain sweep` and `convchain limit`: arguments and printing; the work is in `convchain::study`.

use std::io::Write;
use std::path::{Path, PathBuf};

use convchain::error::Error;
use convchain::format::units::{Dimension, parse_quantity};
use convchain::report::OutputDir;
use convchain::scenario::Scenario;
use convchain::scenario::overrides::ScenarioText;
use convchain::study::shard::Shard;
use convchain::study::{limit, sweep};

use super::interrupt::{self, CANCEL, INTERRUPTED_EXIT, Interrupted};

fn frequency(s: &str) -> Result<f64, String> {
    let f = parse_quantity(s, Dimension::Frequency).map_err(|e| e.message)?;
    if f > 0.0 {
        Ok(f)
    } else {
        Err(format!("must be above 0 Hz, found {s}"))
    }
}

/// The scenario a study reads (parsed and checked) and the study's name (its default folder's stem, the name
/// its files record). A `[[path]]` scenario is studied one path at a time, as a plain chain whose `stage.N`
/// keys address that path's stages: the path `--path NAME` names (study name `<scenario>-<path>`), or the
/// first (the scenario's name, and a note on standard error unless `quiet`).
pub(crate) fn study_scenario(
    text: ScenarioText,
    path: Option<&str>,
    quiet: bool,
) -> Result<(ScenarioText, Scenario, String), Error> {
    match text.path_only(path)? {
        Some((one, name)) => {
            let sc = one.scenario()?;
            let stem = match path {
                Some(_) => format!("{}-{name}", sc.name),
                None => {
                    if !quiet {
                        eprintln!(
                            "note: {} has [[path]] tables: this study reads its first path, \"{name}\" \
                             (--path NAME for another)",
                            text.origin
                        );
                    }
                    sc.name.clone()
                }
            };
            Ok((one, sc, stem))
        }
        None => match path {
            Some(want) => Err(Error::BadInput(format!(
                "--path {want}: {} has no [[path]] tables (it is one chain: leave --path out)",
                text.origin
            ))),
            None => {
                let sc = text.scenario()?;
                let stem = sc.name.clone();
                Ok((text, sc, stem))
            }
        },
    }
}

#[derive(clap::Args, Debug)]
pub struct SweepArgs {
    /// Scenario file (TOML).
    scenario: PathBuf,
    /// Study only this path of a scenario with [[path]] tables (default: the first); stage.N keys then
    /// address its stages.
    #[arg(long, value_name = "NAME")]
    path: Option<String>,
    /// KEY=FROM..TO, e.g. "source.frequency=1 kHz..20 kHz" or stage.3.slew_rate=1e6..2e7 (units as in the
    /// scenario). Repeat for a grid of all combinations.
    #[arg(long, required = true)]
    vary: Vec<String>,
    /// Values per key.
    #[arg(long, default_value_t = 11)]
    points: usize,
    /// Space the values logarithmically.
    #[arg(long)]
    log: bool,
    /// Output folder (default out/<name>-sweep/, or out/<name>-sweep-shard-K-of-N/ for a shard).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Write into a folder that holds another study (other --vary, another shard...), replacing the files
    /// convchain wrote there.
    #[arg(long)]
    force: bool,
    /// Worker threads (default: all cores).
    #[arg(long)]
    threads: Option<usize>,
    /// Run only the points with index % N == K-1 (K from 1; index in grid order), to split a sweep over
    /// machines; join the folders with `convchain merge`. `auto` (or `auto/N`) takes K and N from a batch
    /// scheduler's array-job task variables (Slurm, Grid Engine, LSF, PBS, AWS Batch, Kubernetes indexed jobs).
    #[arg(long, value_name = "K/N")]
    shard: Option<String>,
    /// Print nothing but errors.
    #[arg(long, short)]
    quiet: bool,
    /// Add the audio figures of every point (as `run --audio`: three more runs per point).
    #[arg(long)]
    audio: bool,
    /// Band of the audio figures, e.g. "20 Hz..20 kHz" (the default; implies --audio).
    #[arg(long, value_name = "LOW..HIGH")]
    audio_band: Option<String>,
}

#[derive(clap::Args, Debug)]
pub struct LimitArgs {
    /// Scenario file (TOML) with a sine source.
    scenario: PathBuf,
    /// Study only this path of a scenario with [[path]] tables (default: the first); stage.N keys then
    /// address its stages.
    #[arg(long, value_name = "NAME")]
    path: Option<String>,
    /// Low end of the search, e.g. "100 Hz" (default: 1/50 of the lowest rate of interest of the chain).
    #[arg(long, value_parser = frequency)]
    from: Option<f64>,
    /// High end, e.g. "50 kHz" (default: min(analog_rate/20, 10 x ADC sample rate), within what the meters see).
    #[arg(long, value_parser = frequency)]
    to: Option<f64>,
    /// Accuracy: ENOB drop from its value at --from (bits).
    #[arg(long, default_value_t = 1.0)]
    enob_drop: f64,
    /// Level: gain drop from its value at --from (dB).
    #[arg(long, default_value_t = 3.0)]
    gain_drop: f64,
    /// Shape: waveform fidelity below this (dB).
    #[arg(long, default_value_t = 6.0)]
    fidelity_min: f64,
    /// Output folder (default out/<name>-limit/).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Write into a folder that holds another study (other options), replacing the files convchain wrote
    /// there.
    #[arg(long)]
    force: bool,
    /// Worker threads (default: all cores).
    #[arg(long)]
    threads: Option<usize>,
    /// Print nothing but errors.
    #[arg(long, short)]
    quiet: bool,
    /// Print limit.json on standard output instead of the table.
    #[arg(long)]
    json: bool,
}

fn threads(t: Option<usize>) -> Result<Option<usize>, Error> {
    match t {
        Some(0) => Err(Error::BadInput("--threads must be at least 1".into())),
        t => Ok(t),
    }
}

pub fn sweep(a: SweepArgs) -> anyhow::Result<()> {
    let vary = a
        .vary
        .iter()
        .map(|v| sweep::parse_vary(v))
        .collect::<Result<Vec<_>, _>>()?;
    sweep::check_distinct(&vary)?;
    let shard = match &a.shard {
        Some(s) => Shard::parse(s)?,
        None => Shard::WHOLE,
    };
    let (text, _, stem) =
        study_scenario(ScenarioText::load(&a.scenario)?, a.path.as_deref(), a.quiet)?;
    // A shard's folder sits beside the whole sweep's, never inside it.
    let dir = a.out.unwrap_or_else(|| {
        Path::new("out").join(if shard == Shard::WHOLE {
            format!("{stem}-sweep")
        } else {
            format!("{stem}-sweep-shard-{}-of-{}", shard.k, shard.n)
        })
    });
    let audio_band_hz = match a.audio_band.as_deref() {
        Some(t) => Some(super::parse_audio_band(t)?),
        None => a.audio.then_some(convchain::engine::audio::DEFAULT_BAND_HZ),
    };
    let spec = sweep::SweepSpec {
        vary,
        points: a.points,
        log: a.log,
        audio_band_hz,
    };
    OutputDir::check(&dir, &sweep::folder_producer(&spec, &stem, shard, a.force)?)?;
    let opts = sweep::SweepOptions {
        threads: threads(a.threads)?,
        progress: !a.quiet,
        shard,
    };
    interrupt::install_handler("points");
    let result = sweep::run_sweep_until(&text, &spec, &opts, &CANCEL)?;
    sweep::write_sweep(&result, &dir, a.force)?;
    if !a.quiet {
        write!(std::io::stdout().lock(), "{}", sweep_line(&result, &dir))?;
    }
    if let Some(note) = &result.interrupted {
        return Err(Interrupted(format!(
            "{note}; wrote the finished rows to {} (exit code {INTERRUPTED_EXIT})",
            dir.display()
        ))
        .into());
    }
    Ok(())
}

/// The line printed after a sweep (or a merge of sweep shards).
pub fn sweep_line(result: &sweep::SweepResult, dir: &Path) -> String {
    let failed = result.rows.iter().filter(|r| r.error.is_some()).count();
    let shard = if result.shard == Shard::WHOLE {
        String::new()
    } else {
        format!(" of {} (shard {})", result.total_points(), result.shard)
    };
    let failed = if failed > 0 {
        format!(" ({failed} failed: see the error column)")
    } else {
        String::new()
    };
    format!(
        "{} points{shard}{failed}; wrote {}\n",
        result.rows.len(),
        dir.display()
    )
}

pub fn limit(a: LimitArgs) -> anyhow::Result<()> {
    let (text, _, stem) =
        study_scenario(ScenarioText::load(&a.scenario)?, a.path.as_deref(), a.quiet)?;
    let dir = a
        .out
        .unwrap_or_else(|| Path::new("out").join(format!("{stem}-limit")));
    let opts = limit::LimitOptions {
        from_hz: a.from,
        to_hz: a.to,
        enob_drop_bits: a.enob_drop,
        gain_drop_db: a.gain_drop,
        fidelity_min_db: a.fidelity_min,
        threads: threads(a.threads)?,
        progress: !a.quiet && !a.json,
        ..Default::default()
    };
    let producer = limit::folder_producer(&stem, &opts, a.force);
    OutputDir::check(&dir, &producer)?;
    interrupt::install_stop_handler("limit");
    let report = limit::find_limits(&text, &opts)?;
    limit::write_limit(&report, &dir, &producer)?;
    let mut o = std::io::stdout().lock();
    if a.json {
        writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
    } else if !a.quiet {
        write!(o, "{}", limit::table(&report))?;
        writeln!(o, "wrote {}", dir.display())?;
    }
    Ok(())
}
