//! `convchain analyze`: arguments in, the library's capture reader and analysis called, the summary printed.

use std::io::Write;
use std::path::PathBuf;

use convchain::capture::{self, Pick, analyze};
use convchain::error::Error;
use convchain::format::units::{Dimension, parse_quantity};
use convchain::scenario::WindowKind;

/// Measure a recorded sine (a WAV recording or a scope's CSV export): SNR, SINAD, ENOB, THD, SFDR.
#[derive(clap::Args, Debug)]
pub struct AnalyzeArgs {
    /// The capture: a WAV file, or a CSV file with a header row (time in seconds first, then value columns).
    capture: PathBuf,
    /// CSV: the value column, by its header name or by its number in the file (from 1; the time is column 1).
    #[arg(long, conflicts_with = "channel")]
    column: Option<String>,
    /// WAV: the channel to analyse, from 1.
    #[arg(long)]
    channel: Option<u16>,
    /// The converter's full scale: a peak voltage for CSV ("1.65 V"), a level in dBFS for WAV ("-3 dBFS";
    /// 0 dBFS, the default, is the format's full scale).
    #[arg(long, value_name = "V|dBFS", allow_hyphen_values = true)]
    full_scale: Option<String>,
    /// The converter's resolution, for the sine-fit ENOB (default: a WAV integer format's bits).
    #[arg(long)]
    bits: Option<u32>,
    /// Upper edge of the measurement band, e.g. "20 kHz" (default: the Nyquist frequency).
    #[arg(long, value_name = "HZ")]
    band: Option<String>,
    /// Spectral window.
    #[arg(long, value_enum, default_value_t = WindowArg::BlackmanHarris)]
    window: WindowArg,
    /// Measure from this time on (seconds from the recording's first sample, e.g. "90 s"; default 0).
    #[arg(long, value_name = "TIME")]
    start: Option<String>,
    /// Measure this long (default: to the end; at most 2^23 samples are measured at once).
    #[arg(long, value_name = "TIME")]
    length: Option<String>,
    /// Output folder (default out/<the capture's file name without extension>/).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Do not write the figures.
    #[arg(long)]
    no_plots: bool,
    /// Print analysis.json on standard output instead of the summary.
    #[arg(long)]
    json: bool,
    /// Write into a folder that holds a study, replacing the files convchain wrote there.
    #[arg(long)]
    force: bool,
}

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
enum WindowArg {
    Rectangular,
    Hann,
    Hamming,
    BlackmanHarris,
    FlatTop,
}

impl From<WindowArg> for WindowKind {
    fn from(w: WindowArg) -> Self {
        match w {
            WindowArg::Rectangular => WindowKind::Rectangular,
            WindowArg::Hann => WindowKind::Hann,
            WindowArg::Hamming => WindowKind::Hamming,
            WindowArg::BlackmanHarris => WindowKind::BlackmanHarris,
            WindowArg::FlatTop => WindowKind::FlatTop,
        }
    }
}

pub fn run(a: AnalyzeArgs) -> anyhow::Result<()> {
    let band_hz = a
        .band
        .as_deref()
        .map(|t| {
            parse_quantity(t, Dimension::Frequency).map_err(|e| {
                Error::BadInput(format!(
                    "--band \"{}\": {}; give the band's upper edge, e.g. \"20 kHz\"",
                    convchain::text::clip(t),
                    e.message
                ))
            })
        })
        .transpose()?;
    let pick = match (a.channel, a.column) {
        (Some(c), _) => Pick::Channel(c),
        (None, Some(c)) => Pick::Column(c),
        (None, None) => Pick::Only,
    };
    let dir = a
        .out
        .unwrap_or_else(|| analyze::default_out_dir(&a.capture));
    analyze::check_out_dir(&dir, a.force)?;
    let time = |opt: &str, t: &Option<String>| {
        t.as_deref()
            .map(|t| {
                parse_quantity(t, Dimension::Time).map_err(|e| {
                    Error::BadInput(format!(
                        "{opt} \"{}\": {}; give a time, e.g. \"90 s\"",
                        convchain::text::clip(t),
                        e.message
                    ))
                })
            })
            .transpose()
    };
    let (start_s, length_s) = (time("--start", &a.start)?, time("--length", &a.length)?);
    let file = capture::open(&a.capture, &pick)?;
    let (cap, note) = file.record(start_s, length_s)?;
    let opts = analyze::AnalyzeOptions {
        full_scale: a.full_scale,
        bits: a.bits,
        band_hz,
        window: a.window.into(),
        figures: !a.no_plots,
        force: a.force,
        samples_in_file: Some(file.len),
        note,
    };
    let report = analyze::analyze_to_dir(&cap, &opts, &dir)?;
    let stdout = std::io::stdout();
    let mut o = stdout.lock();
    if a.json {
        writeln!(o, "{}", serde_json::to_string_pretty(&report)?)?;
    } else {
        write!(o, "{}", analyze::summary(&report.capture))?;
        writeln!(o, "wrote {}", dir.display())?;
    }
    Ok(())
}
