//! `convchain delay`: arguments in, the library's readers and delay measurement called, the summary printed.

use std::io::Write;
use std::path::PathBuf;

use convchain::capture::{self, Pick, delay};
use convchain::error::Error;
use convchain::measure::delay::Method;

/// The delay of a capture behind its reference (two recordings, or two columns or channels of one file), its
/// drift and the gain between them.
#[derive(clap::Args, Debug)]
pub struct DelayArgs {
    /// The reference recording (WAV or CSV); with no CAPTURE, the one file holding both signals.
    reference: PathBuf,
    /// The capture recording, when it is a file of its own.
    capture: Option<PathBuf>,
    /// The reference's column (CSV: name or number from 1) or channel (WAV, from 1).
    #[arg(long = "reference", value_name = "COL")]
    reference_pick: Option<String>,
    /// The capture's column (CSV: name or number from 1) or channel (WAV, from 1).
    #[arg(long = "capture", value_name = "COL")]
    capture_pick: Option<String>,
    /// Correlation weighting: plain, or phat (phase transform, for coloured or reverberant signals).
    #[arg(long, value_enum, default_value_t = MethodArg::Plain)]
    method: MethodArg,
    /// Output folder (default out/<the capture's file name without extension>/).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Do not write the figure.
    #[arg(long)]
    no_plots: bool,
    /// Print delay.json on standard output instead of the summary.
    #[arg(long)]
    json: bool,
    /// Write into a folder that holds a study, replacing the files convchain wrote there.
    #[arg(long)]
    force: bool,
}

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
enum MethodArg {
    Plain,
    Phat,
}

pub fn run(a: DelayArgs) -> anyhow::Result<()> {
    let ref_path = a.reference.clone();
    let cap_path = a.capture.clone().unwrap_or_else(|| a.reference.clone());
    if a.capture.is_none() && (a.reference_pick.is_none() || a.capture_pick.is_none()) {
        return Err(Error::BadInput(format!(
            "{}: one file holds both signals only with --reference COL and --capture COL (columns of a CSV, or \
             channels of a WAV from 1); or give two files, REFERENCE CAPTURE",
            ref_path.display()
        ))
        .into());
    }
    let pick = |path: &PathBuf, option: &str, text: &Option<String>| -> Result<Pick, Error> {
        match text {
            None => Ok(Pick::Only),
            Some(t) => delay::pick_in(capture::kind_of(path), option, t),
        }
    };
    let ref_pick = pick(&ref_path, "--reference", &a.reference_pick)?;
    let cap_pick = pick(&cap_path, "--capture", &a.capture_pick)?;
    let dir = a
        .out
        .unwrap_or_else(|| capture::analyze::default_out_dir(&cap_path));
    delay::check_out_dir(&dir, a.force)?;
    let reference = capture::open(&ref_path, &ref_pick)?;
    let cap = capture::open(&cap_path, &cap_pick)?;
    let opts = delay::DelayOptions {
        method: match a.method {
            MethodArg::Plain => Method::Plain,
            MethodArg::Phat => Method::Phat,
        },
        figures: !a.no_plots,
        force: a.force,
    };
    let report = delay::delay_to_dir(&reference, &cap, &opts, &dir)?;
    let stdout = std::io::stdout();
    let mut o = stdout.lock();
    if a.json {
        writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
    } else {
        write!(o, "{}", delay::summary(&report.delay))?;
        writeln!(o, "wrote {}", dir.display())?;
    }
    Ok(())
}
