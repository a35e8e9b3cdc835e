//! `convchain delay`: the delay of a capture behind its reference (two recordings, or two columns or channels
//! of one), its drift along the recording and the gain between them ([`crate::measure::delay`]), written as
//! `delay.json` (the object `delay`) and a plot of the delay against time.

use std::path::Path;

use serde::Serialize;

use super::{CaptureFile, Kind, Pick};
use crate::error::{Error, Result};
use crate::measure::delay::{Method, WindowDelay, track};
use crate::report::figures::{Figure, PNG_SIZE};
use crate::report::plot::{Plot, XyPlot, render_png, render_svg};
use crate::report::{OutputDir, Producer};

/// Lowest normalised correlation accepted: below it the recordings are taken not to hold the same signal, and
/// no delay is given (uncorrelated noise of a few thousand samples peaks near 0.05).
pub const CONFIDENCE_MIN: f64 = 0.2;

/// Largest relative difference between the two sample rates taken as one rate (CSV rates come from rounded
/// times).
const RATE_TOLERANCE: f64 = 1e-6;

/// The name of the report file.
pub const REPORT_FILE: &str = "delay.json";

/// How to measure and write.
#[derive(Debug, Clone)]
pub struct DelayOptions {
    pub method: Method,
    /// Write the figure.
    pub figures: bool,
    /// Replace what convchain wrote into the folder, a study included.
    pub force: bool,
}

/// `delay.json`.
#[derive(Debug, Clone, Serialize)]
pub struct DelayReport {
    pub delay: DelayResult,
}

/// The delay of the capture behind the reference. Times are the capture's (0 at its first sample); a positive
/// delay means the capture lags.
#[derive(Debug, Clone, Serialize)]
pub struct DelayResult {
    /// The two signals, in words (file and channel or column).
    pub reference: String,
    pub capture: String,
    pub sample_rate_hz: f64,
    pub method: Method,
    /// The fitted line at the capture's first and last samples (s); the whole-record delay when the
    /// recording is too short for windows.
    pub start_s: f64,
    pub end_s: f64,
    /// Clock drift: minus the line's slope in parts per million, positive when the delay shrinks; null
    /// without at least three confident windows.
    pub drift_ppm: Option<f64>,
    /// Capture against reference, least squares after alignment (dB): the median of the confident windows'.
    pub gain_db: Option<f64>,
    /// The capture is the reference upside down (a negative gain).
    pub inverted: bool,
    /// Normalised correlation at the delay (0..1): the median of the windows', or the whole records' when
    /// too short for windows.
    pub confidence: f64,
    pub windows: Vec<WindowDelay>,
}

/// The pick `text` names in a file of `kind`: a channel number (from 1) for WAV, a column for CSV.
pub fn pick_in(kind: Kind, option: &str, text: &str) -> Result<Pick> {
    match kind {
        Kind::Csv => Ok(Pick::Column(text.to_string())),
        Kind::Wav => text.trim().parse::<u16>().map(Pick::Channel).map_err(|_| {
            Error::BadInput(format!(
                "{option} {}: a WAV file's signals are its channels, numbered from 1",
                crate::text::clip(text)
            ))
        }),
    }
}

fn describe(c: &CaptureFile) -> String {
    format!("{} ({})", c.file.display(), c.origin.describe())
}

/// Measure the delay of `capture` behind `reference`.
pub fn measure(
    reference: &CaptureFile,
    capture: &CaptureFile,
    opts: &DelayOptions,
) -> Result<DelayReport> {
    let (fr, fc) = (reference.sample_rate_hz, capture.sample_rate_hz);
    if (fr - fc).abs() > RATE_TOLERANCE * fr.max(fc) {
        return Err(Error::BadInput(format!(
            "{} is sampled at {fr} Hz and {} at {fc} Hz; delay compares two records at one rate: resample one \
             of them to the other's rate first",
            reference.file.display(),
            capture.file.display()
        )));
    }
    let t = track(reference, capture, fr, opts.method, CONFIDENCE_MIN).map_err(|e| match e {
        Error::BadInput(m) => Error::BadInput(format!(
            "{} against {}: {m}",
            capture.file.display(),
            reference.file.display()
        )),
        other => other,
    })?;
    if t.confidence.is_nan() || t.confidence < CONFIDENCE_MIN {
        return Err(Error::Run(format!(
            "{} and {} do not correlate: the normalised correlation peaks at {:.3}, below {CONFIDENCE_MIN}; no \
             delay is given (are both recordings of the same signal?)",
            describe(reference),
            describe(capture),
            t.confidence
        )));
    }
    // Delays in absolute time: a CSV's first sample need not be at 0 s.
    let offset_s = capture.t0_s - reference.t0_s;
    let windows: Vec<WindowDelay> = t
        .windows
        .iter()
        .map(|w| WindowDelay {
            delay_s: w.delay_s + offset_s,
            ..*w
        })
        .collect();
    let last_s = (capture.len.saturating_sub(1)) as f64 / fr;
    let (start_s, end_s, drift_ppm) = match t.line {
        Some((d0, slope)) => (
            d0 + offset_s,
            d0 + slope * last_s + offset_s,
            Some(-slope * 1e6),
        ),
        None => {
            let d = t.whole.delay_samples / fr + offset_s;
            (d, d, None)
        }
    };
    let gain_db = (t.gain.is_finite() && t.gain != 0.0).then(|| 20.0 * t.gain.abs().log10());
    Ok(DelayReport {
        delay: DelayResult {
            reference: describe(reference),
            capture: describe(capture),
            sample_rate_hz: fr,
            method: opts.method,
            start_s,
            end_s,
            drift_ppm,
            gain_db,
            inverted: t.gain < 0.0,
            confidence: t.confidence,
            windows,
        },
    })
}

fn producer(force: bool) -> Producer {
    Producer {
        by: "delay".into(),
        study: None,
        force,
    }
}

/// Check that `dir` may be written by `delay` (before reading large recordings).
pub fn check_out_dir(dir: &Path, force: bool) -> Result<()> {
    OutputDir::check(dir, &producer(force))
}

/// Measure and write `delay.json` and the figure `delay` (PNG and SVG) into `dir`, atomically; a folder of
/// files convchain did not write is refused.
pub fn delay_to_dir(
    reference: &CaptureFile,
    capture: &CaptureFile,
    opts: &DelayOptions,
    dir: &Path,
) -> Result<DelayReport> {
    let report = measure(reference, capture, opts)?;
    let fig = if opts.figures {
        Some(figure(&report.delay, capture)?)
    } else {
        None
    };
    let mut json = serde_json::to_vec_pretty(&report).map_err(|e| Error::Run(e.to_string()))?;
    json.push(b'\n');
    let out = OutputDir::create(dir, &producer(opts.force))?;
    let written = (|| {
        if let Some(f) = &fig {
            out.write(&format!("{}.png", f.name), &f.png)?;
            out.write(&format!("{}.svg", f.name), f.svg.as_bytes())?;
        }
        out.write(REPORT_FILE, &json)
    })();
    if let Err(e) = written {
        out.abandon();
        return Err(e);
    }
    out.finish()?;
    Ok(report)
}

/// The delay of each window against time, with the fitted line.
fn figure(d: &DelayResult, capture: &CaptureFile) -> Result<Figure> {
    let t: Vec<f64> = d.windows.iter().map(|w| w.time_s).collect();
    let v: Vec<f64> = d.windows.iter().map(|w| w.delay_s).collect();
    let last_s = (capture.len.saturating_sub(1)) as f64 / d.sample_rate_hz;
    let line_t = [0.0, last_s];
    let line_v = [d.start_s, d.end_s];
    let mut series: Vec<(&str, &[f64], &[f64])> = vec![("fitted line", &line_t, &line_v)];
    if !t.is_empty() {
        series.insert(0, ("delay per window", &t, &v));
    }
    let drift = d.drift_ppm.map_or_else(
        || "no drift measured".to_string(),
        |p| format!("drift {p:+.2} ppm"),
    );
    let plot = Plot::Xy(XyPlot {
        title: format!("delay of the capture behind the reference ({drift})"),
        x_label: "capture time (s)".into(),
        y_label: "delay (s)".into(),
        series,
        log_x: false,
        markers: Vec::new(),
    });
    let (svg, summary) = render_svg(&plot)?;
    let (png, _) = render_png(&plot, PNG_SIZE.0, PNG_SIZE.1)?;
    Ok(Figure {
        name: "delay".into(),
        caption: "The delay measured in windows along the capture, and the straight line through them (its \
                  slope is the drift between the two clocks)"
            .into(),
        svg,
        png,
        summary,
    })
}

/// The delay as the terminal prints it.
pub fn summary(d: &DelayResult) -> String {
    use crate::format::units::format_si_table;
    let mut s = format!("capture   {}\nreference {}\n", d.capture, d.reference);
    s.push_str(&format!(
        "  delay {} at the start, {} at the end   confidence {:.3}\n",
        format_si_table(d.start_s, "s"),
        format_si_table(d.end_s, "s"),
        d.confidence
    ));
    s.push_str(&format!(
        "  drift {}   gain {}{}   ({} windows, {})\n",
        d.drift_ppm
            .map_or_else(|| "-".to_string(), |p| format!("{p:+.3} ppm")),
        d.gain_db
            .map_or_else(|| "-".to_string(), |g| format!("{g:+.3} dB")),
        if d.inverted { ", inverted" } else { "" },
        d.windows.len(),
        d.method.name()
    ));
    s
}
