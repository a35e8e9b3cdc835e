//! `convchain need`: arguments and printing; the solver is `convchain::study::need`.

use std::io::Write;
use std::path::{Path, PathBuf};

use convchain::error::Error;
use convchain::format::units::{Dimension, parse_quantity};
use convchain::report::OutputDir;
use convchain::scenario::overrides::ScenarioText;
use convchain::study::limit::{Criterion, LimitOptions, UpToCheck};
use convchain::study::montecarlo::Requirement;
use convchain::study::{need, sweep};

use super::interrupt;

fn frequency(s: &str) -> Result<f64, String> {
    let f = parse_quantity(s, Dimension::Frequency).map_err(|e| e.message)?;
    if f > 0.0 {
        Ok(f)
    } else {
        Err(format!("must be above 0 Hz, found {s}"))
    }
}

/// "1", "1%" or "1 %": a percentage as a fraction.
fn percent(s: &str) -> Result<f64, String> {
    let t = s.trim().trim_end_matches('%').trim();
    t.parse::<f64>()
        .ok()
        .filter(|v| v.is_finite() && *v > 0.0 && *v < 50.0)
        .map(|v| v / 100.0)
        .ok_or_else(|| {
            format!("expected a percentage above 0 and below 50, e.g. 1 or \"1 %\", found {s:?}")
        })
}

#[derive(clap::Args, Debug)]
pub struct NeedArgs {
    /// Scenario file (TOML).
    scenario: PathBuf,
    /// Study only this path of a scenario with [[path]] tables (default: the first); stage.N keys then
    /// address its stages.
    #[arg(long, value_name = "NAME")]
    path: Option<String>,
    /// KEY=FROM..TO, e.g. "stage.3.slew_rate=1 V/us..100 V/us"; each key is solved on its own (the others as
    /// written). None: the non-idealities the limit finder's diagnosis ablates, over ranges around their
    /// written values.
    #[arg(long)]
    vary: Vec<String>,
    /// The chain must not struggle below this frequency by --criterion, e.g. "10 kHz".
    #[arg(long, value_parser = frequency)]
    up_to: Option<f64>,
    /// The limit finder's criterion for --up-to: accuracy, level or shape.
    #[arg(long, default_value = "accuracy")]
    criterion: String,
    /// Accuracy: largest ENOB drop from the low end (bits).
    #[arg(long, default_value_t = 1.0)]
    enob_drop: f64,
    /// Level: largest gain drop from the low end (dB).
    #[arg(long, default_value_t = 3.0)]
    gain_drop: f64,
    /// Shape: lowest waveform fidelity (dB).
    #[arg(long, default_value_t = 6.0)]
    fidelity_min: f64,
    /// METRIC>=X (or <=, >, <) as for montecarlo, e.g. "output.snr_db>=60"; repeat for several.
    #[arg(long)]
    require: Vec<String>,
    /// Frequency of the source for --require (default: the scenario's).
    #[arg(long, value_parser = frequency)]
    at: Option<f64>,
    /// Scan and bisect on a logarithmic scale.
    #[arg(long)]
    log: bool,
    /// Width of the final bracket, percent of the answer.
    #[arg(long, default_value = "1", value_parser = percent)]
    tolerance: f64,
    /// Points of the coarse scan per key.
    #[arg(long, default_value_t = 11)]
    points: usize,
    /// Output folder (default out/<name>-need/).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Write into a folder that holds another study, replacing the files convchain wrote there.
    #[arg(long)]
    force: bool,
    /// Worker threads (default: all cores).
    #[arg(long)]
    threads: Option<usize>,
    /// Print nothing but errors.
    #[arg(long, short)]
    quiet: bool,
    /// Print need.json on standard output instead of the table.
    #[arg(long)]
    json: bool,
}

pub fn need(a: NeedArgs) -> anyhow::Result<()> {
    if a.threads == Some(0) {
        return Err(Error::BadInput("--threads must be at least 1".into()).into());
    }
    if a.points < 3 {
        return Err(Error::BadInput(format!(
            "--points must be at least 3 (found {}): the scan needs both ends and a middle",
            a.points
        ))
        .into());
    }
    let criterion = match a.criterion.as_str() {
        "accuracy" => Criterion::Accuracy,
        "level" => Criterion::Level,
        "shape" => Criterion::Shape,
        c => {
            return Err(Error::BadInput(format!(
                "--criterion {c:?}: expected accuracy, level or shape"
            ))
            .into());
        }
    };
    match (a.up_to, a.require.is_empty()) {
        (Some(_), false) => {
            return Err(Error::BadInput(
                "give either --up-to FREQ or --require METRIC>=X, not both".into(),
            )
            .into());
        }
        (None, true) => {
            return Err(Error::BadInput(
                "say what the chain must meet: --up-to FREQ (e.g. --up-to \"10 kHz\") or --require METRIC>=X \
                 (e.g. --require \"output.snr_db>=60\")"
                    .into(),
            )
            .into());
        }
        _ => {}
    }
    if a.at.is_some() && a.up_to.is_some() {
        return Err(Error::BadInput(
            "--at goes with --require; --up-to checks its own frequencies".into(),
        )
        .into());
    }
    let vary = a
        .vary
        .iter()
        .map(|v| sweep::parse_vary(v))
        .collect::<Result<Vec<_>, _>>()?;
    sweep::check_distinct(&vary)?;
    let reqs = a
        .require
        .iter()
        .map(|r| Requirement::parse(r))
        .collect::<Result<Vec<_>, _>>()?;
    need::check_requirements(&reqs)?;
    let (text, _, stem) = super::study_cli::study_scenario(
        ScenarioText::load(&a.scenario)?,
        a.path.as_deref(),
        a.quiet,
    )?;
    let dir = a
        .out
        .clone()
        .unwrap_or_else(|| Path::new("out").join(format!("{stem}-need")));
    let definition = serde_json::json!({
        "scenario": stem,
        "vary": a.vary,
        "up_to_hz": a.up_to,
        "criterion": a.criterion,
        "require": a.require,
        "at_hz": a.at,
        "log": a.log,
        "tolerance": a.tolerance,
    });
    let producer = need::folder_producer(&stem, definition, a.force);
    OutputDir::check(&dir, &producer)?;
    let lopts = LimitOptions {
        enob_drop_bits: a.enob_drop,
        gain_drop_db: a.gain_drop,
        fidelity_min_db: a.fidelity_min,
        ..Default::default()
    };
    let up_to = a.up_to;
    let at = a.at;
    let goal_of = move |t: &ScenarioText| -> convchain::error::Result<need::Goal> {
        Ok(match up_to {
            Some(f) => need::Goal::UpTo(Box::new(UpToCheck::new(t, criterion, f, &lopts)?)),
            None => need::Goal::Require {
                reqs: reqs.clone(),
                at_hz: at,
            },
        })
    };
    let spec = need::NeedSpec {
        vary,
        log: a.log,
        tolerance: a.tolerance,
        points: a.points,
        threads: a.threads,
        progress: !a.quiet && !a.json,
    };
    interrupt::install_stop_handler("need");
    let report = need::solve(&text, &goal_of, &spec)?;
    need::write_need(&report, &dir, &producer)?;
    let mut o = std::io::stdout().lock();
    if a.json {
        writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
    } else if !a.quiet {
        write!(o, "{}", need::table(&report))?;
        writeln!(o, "wrote {}", dir.display())?;
    }
    Ok(())
}
