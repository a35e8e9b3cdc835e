//! Pictures of a run for an engineer: waveforms, spectra, static transfer with DNL/INL, latency budget and
//! generic x-y sweeps, rendered to SVG (text, for inline HTML) or PNG (encoded bytes; the caller writes files).
//!
//! Style: white background, one colour-blind-safe palette (the Okabe-Ito colours), a thin grid and axes
//! labelled with SI prefixes chosen from the axis span ("time (ms)", "frequency (kHz)", "voltage (mV)").
//! Text is drawn with a font compiled into the binary (Noto Sans), so no system font library is used.
//!
//! Axes, ticks and annotations are drawn here directly on a plotters backend, so that the SVG contains
//! exactly one `<polyline>` per line series (data traces, staircases) and nothing else as a polyline:
//! grid lines, arrows and legend keys are `<line>`, bars are filled `<rect>`, markers `<circle>`/`<polygon>`.
//!
//! Long traces are reduced for drawing per pixel column (minimum and maximum for waveforms, maximum for
//! spectra), so no spike is lost and a trace of a million points draws in a few milliseconds.
//!
//! Files: this one holds the public data types, the SI labels and `render`; `painter.rs` the palette, font
//! and drawing primitives; `axis.rs` axes, ticks and the frame; `reduce.rs` the per-column reduction; one file
//! per figure (`waveform.rs`, `spectrum.rs`, `static_transfer.rs`, `budget.rs`, `xy.rs`, `histogram.rs`, `panels.rs`,
//! `fifo.rs`).

mod axis;
mod budget;
mod fifo;
mod histogram;
mod painter;
mod panels;
mod reduce;
mod spectrum;
mod static_transfer;
#[cfg(test)]
mod tests;
mod waveform;
mod xy;

use plotters::backend::{BitMapBackend, DrawingBackend, SVGBackend};

use crate::Error;
use crate::format::units::{self, SiPrefix, SiStyle, si_prefix_for_span, unit_takes_prefix};

use budget::{draw_budget, draw_path_budgets};
use fifo::draw_fifo;
use histogram::draw_histogram;
use painter::{Painter, draw_err, ensure_font};
use panels::draw_panels;
use spectrum::draw_spectrum;
use static_transfer::draw_static;
use waveform::draw_waveform;
use xy::draw_xy;

// ---------------------------------------------------------------------------------------------------------
// Public data types
// ---------------------------------------------------------------------------------------------------------

/// Output format of a rendered plot.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PlotFormat {
    /// Encoded PNG bytes.
    Png,
    /// SVG document text (UTF-8).
    Svg,
}

impl PlotFormat {
    /// File name extension without the dot ("png", "svg").
    pub fn extension(self) -> &'static str {
        match self {
            PlotFormat::Png => "png",
            PlotFormat::Svg => "svg",
        }
    }
}

/// Input against output over a time window.
#[derive(Debug, Clone)]
pub struct WaveformPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    /// Time of the first sample of every trace, s.
    pub t0_s: f64,
    /// Spacing of the uniform grid shared by all traces, s (> 0).
    pub dt_s: f64,
    /// Named traces in volts on the grid: first = input (source), last = output, others = intermediate
    /// stages (drawn thin).
    pub traces: Vec<(&'a str, &'a [f64])>,
    /// Index in `traces` of the signal the ADC samples (the last analog stage before it, or the source):
    /// the sampling instants are drawn on it.
    pub sampled_trace: usize,
    /// ADC sampling instants inside the window, s (drawn as small circles on the sampled trace; every one
    /// when few enough to read, every k-th otherwise, as the legend says).
    pub sample_instants_s: &'a [f64],
    /// The value each sample was converted to (volts of the code), drawn as crosses; same length as
    /// `sample_instants_s`.
    pub sample_values_v: &'a [f64],
    /// DAC zero-order-hold levels: (update instants in s, levels in V), drawn as a step line.
    pub staircase: Option<(&'a [f64], &'a [f64])>,
    /// Whose samples and hold levels these are, for the legend when the chain has several hops: (the ADC's
    /// name, the DAC's name), e.g. ("hop 1's ADC (studio SAR)", "hop 1's DAC (repeater DAC)"); `None`: "the
    /// ADC" and "DAC".
    pub converters: Option<(String, String)>,
    /// Measured input-to-output delay, s: shown as a note and as an arrow between a rising crossing of the
    /// input and the same level one delay later.
    pub measured_delay_s: Option<f64>,
    /// Time window shown, s (start < end).
    pub window_s: (f64, f64),
    /// The output one measured delay later, on the traces' grid (NaN where it was not captured): drawn
    /// over the input in a panel below, with gain and offset fitted by least squares, and the error between
    /// them in a panel under that.
    pub aligned_output: Option<&'a [f64]>,
}

/// Spectrum in dBFS.
#[derive(Debug, Clone)]
pub struct SpectrumPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    /// Bin spacing, Hz (> 0); bin k is at k * bin_hz.
    pub bin_hz: f64,
    /// Level of each bin, dBFS (non-finite values are drawn at the bottom of the axis).
    pub level_dbfs: &'a [f64],
    /// Fundamental frequency to mark ("f0" under the frequency axis), Hz.
    pub fundamental_hz: Option<f64>,
    /// Harmonics to mark under the frequency axis: (order, where it lands in Hz, folded?). Folded ones are
    /// labelled "3*".
    pub harmonics: Vec<(u32, f64, bool)>,
    /// Zero-order-hold images to mark, Hz.
    pub images_hz: Vec<f64>,
    /// Upper edge of the analysis band, Hz (shaded and marked when it is below the top of the plot).
    pub band_hz: Option<f64>,
    /// Figures written in a strip under the plot ("SINAD 72.1 dB", ...), or what the spectrum is when the
    /// source is not a sine.
    pub notes: Vec<String>,
    /// Logarithmic frequency axis (bin 0 is then not drawn).
    pub log_frequency: bool,
    /// A second spectrum drawn over the first (a capture beside its simulation), with the two traces' names.
    pub overlay: Option<SpectrumOverlay<'a>>,
}

/// A second trace for a [`SpectrumPlot`]: its own bins, drawn over the first in another colour.
#[derive(Debug, Clone)]
pub struct SpectrumOverlay<'a> {
    /// Legend name of the plot's own trace ("simulated output").
    pub first_label: String,
    /// Legend name of this trace ("capture").
    pub label: String,
    /// Bin spacing of this trace, Hz (> 0).
    pub bin_hz: f64,
    /// Level of each bin, dBFS.
    pub level_dbfs: &'a [f64],
}

/// Static transfer with DNL and INL panels (empty slices leave their panel out).
#[derive(Debug, Clone)]
pub struct StaticPlot<'a> {
    /// Title drawn above the panels.
    pub title: String,
    /// Level or transition voltage per code, V.
    pub transfer_v: &'a [f64],
    /// What `transfer_v` is, the transfer panel's axis title without its unit ("output above the zero-code
    /// output").
    pub transfer_label: String,
    /// Differential non-linearity per code, LSB.
    pub dnl_lsb: &'a [f64],
    /// Integral non-linearity per code, LSB.
    pub inl_lsb: &'a [f64],
}

/// Latency budget: one horizontal bar per stage (laid end to end), plus the budget total and the measured
/// total as two further bars.
#[derive(Debug, Clone)]
pub struct BudgetPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    /// (stage name, latency in s) in chain order.
    pub lines: &'a [(String, f64)],
    /// Measured end-to-end latency, s.
    pub measured_s: f64,
}

/// The latency budgets of several paths on one time axis: for each path, its stages' bars laid end to end
/// and its measured total under them, one colour per path.
#[derive(Debug, Clone)]
pub struct PathBudgetsPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    pub paths: Vec<PathBudget<'a>>,
}

/// One path of a [`PathBudgetsPlot`]: (path name, its budget lines (stage name, latency in s) in chain order,
/// its measured latency in s).
pub type PathBudget<'a> = (&'a str, &'a [(String, f64)], f64);

/// A generic x-y chart (sweeps): several named series.
#[derive(Debug, Clone)]
pub struct XyPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    /// X axis label; a trailing unit in parentheses, e.g. "input frequency (Hz)", gets an SI prefix.
    pub x_label: String,
    /// Y axis label, same convention as `x_label`.
    pub y_label: String,
    /// (name, x values, y values); x and y of a series have the same length.
    pub series: Vec<(&'a str, &'a [f64], &'a [f64])>,
    /// Logarithmic x axis (points with x <= 0 are skipped).
    pub log_x: bool,
    /// Vertical lines with labels, at x values in the x unit.
    pub markers: Vec<(f64, String)>,
}

/// The fill of every clock-crossing FIFO over the run: one trace per FIFO, each FIFO's slips marked on its own
/// trace (a dropped code at its depth, a repeated one at zero) and numbered in lanes above and below the traces;
/// slips too close to label apart are labelled together ("slips 3-7"), and those with no room left are
/// counted in a note.
#[derive(Debug, Clone)]
pub struct FifoPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    pub fifos: Vec<FifoTrace<'a>>,
}

/// One FIFO of a [`FifoPlot`].
#[derive(Debug, Clone)]
pub struct FifoTrace<'a> {
    /// Legend name ("hop 2: transmitter DAC").
    pub name: String,
    /// Prefix of its slip labels when several FIFOs share the plot ("hop 2").
    pub short: String,
    /// Depth (codes).
    pub depth: u32,
    /// (instant in s, lowest fill, highest fill) over each stretch of ticks.
    pub fill: &'a [(f64, u32, u32)],
    /// Instants of the recorded slips, s, in time order.
    pub slip_times_s: &'a [f64],
    /// For each recorded slip: a code dropped (the FIFO full) rather than repeated (empty).
    pub slip_dropped: &'a [bool],
    /// Slips counted (may exceed the recorded instants).
    pub slips: u64,
}

/// A histogram: one bar per bin.
#[derive(Debug, Clone)]
pub struct HistogramPlot<'a> {
    /// Title drawn above the plot.
    pub title: String,
    /// X axis label, same convention as [`XyPlot::x_label`].
    pub x_label: String,
    /// Bin edges in the x unit, increasing; one more than `counts`.
    pub edges: &'a [f64],
    /// Values per bin.
    pub counts: &'a [f64],
    /// Vertical lines with labels (percentiles, requirements), at x values in the x unit.
    pub markers: Vec<(f64, String)>,
}

/// One panel of a [`PanelsPlot`]: a metric against the shared x, its threshold and where it is met.
#[derive(Debug, Clone)]
pub struct Panel<'a> {
    /// The line above the panel ("accuracy: output ENOB falls below 7.43 bits at 38.73 Hz").
    pub heading: String,
    /// Y axis label with its unit in parentheses ("ENOB (bits)").
    pub y_label: String,
    pub x: &'a [f64],
    pub y: &'a [f64],
    /// Threshold in the y unit (a dashed line).
    pub threshold: Option<f64>,
    /// Where the criterion is met, in the x unit (a vertical line in the threshold's colour).
    pub met_at: Option<f64>,
}

/// Panels over a shared x axis, one per criterion, with a table under them (the limit finder).
#[derive(Debug, Clone)]
pub struct PanelsPlot<'a> {
    /// Title drawn above the panels.
    pub title: String,
    /// X axis label, same convention as [`XyPlot::x_label`].
    pub x_label: String,
    /// Logarithmic x axis.
    pub log_x: bool,
    pub panels: Vec<Panel<'a>>,
    /// The overall limit, in the x unit (a black vertical line across every panel).
    pub limit: Option<f64>,
    /// The line above the table.
    pub table_title: String,
    /// Table rows, the first one the header; the first column is cut to fit.
    pub table: Vec<Vec<String>>,
}

/// One plot of any kind.
#[derive(Debug, Clone)]
pub enum Plot<'a> {
    /// Input against output over a time window.
    Waveform(WaveformPlot<'a>),
    /// Spectrum in dBFS.
    Spectrum(SpectrumPlot<'a>),
    /// Static transfer with DNL and INL.
    Static(StaticPlot<'a>),
    /// Latency budget bars.
    Budget(BudgetPlot<'a>),
    /// Several paths' latency budgets side by side.
    PathBudgets(PathBudgetsPlot<'a>),
    /// Generic x-y chart.
    Xy(XyPlot<'a>),
    /// Clock-crossing FIFOs' fill with their slips.
    Fifo(FifoPlot<'a>),
    /// Histogram bars.
    Histogram(HistogramPlot<'a>),
    /// Stacked panels with a table.
    Panels(PanelsPlot<'a>),
}

/// What was drawn, so tests and callers can check a plot without looking at pixels.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct PlotSummary {
    /// Data series drawn: one per line (each is one `<polyline>` in SVG), or one per bar in a budget plot
    /// (each is one filled `<rect>` in a palette colour).
    pub series: usize,
    /// Point markers and annotation marks drawn (sample circles and crosses, spectral marks, delay arrow,
    /// vertical marker lines).
    pub markers: usize,
    /// Texts drawn apart from numeric tick labels and bar values: title, axis titles, legend names,
    /// budget row names, notes and annotations.
    pub labels: Vec<String>,
    /// Pixel box (left, top, right, bottom) of every horizontal label in `labels` drawn with a box (axis
    /// titles and tick labels have their own rows and are not listed), so tests can check that no two
    /// labels collide.
    pub label_boxes: Vec<(i32, i32, i32, i32)>,
}

/// Size of an SVG rendering, pixels.
pub const SVG_SIZE: (u32, u32) = (1000, 620);

/// Render a plot as an SVG document of [`SVG_SIZE`].
pub fn render_svg(plot: &Plot) -> Result<(String, PlotSummary), Error> {
    ensure_font()?;
    let mut text = String::new();
    let summary = {
        let mut backend = SVGBackend::with_string(&mut text, SVG_SIZE);
        let summary = draw_plot(&mut backend, plot, false)?;
        backend.present().map_err(draw_err)?;
        summary
    };
    Ok((text, summary))
}

/// Render a plot as encoded PNG bytes of `width` x `height` pixels (each at least 200 x 150).
pub fn render_png(plot: &Plot, width: u32, height: u32) -> Result<(Vec<u8>, PlotSummary), Error> {
    if !(200..=16384).contains(&width) || !(150..=16384).contains(&height) {
        return Err(Error::BadInput(format!(
            "plot size {width} x {height} pixels is out of range: give between 200 x 150 and 16384 x 16384"
        )));
    }
    ensure_font()?;
    let mut rgb = vec![255u8; width as usize * height as usize * 3];
    let summary = {
        let mut backend = BitMapBackend::with_buffer(&mut rgb, (width, height));
        let summary = draw_plot(&mut backend, plot, true)?;
        backend.present().map_err(draw_err)?;
        summary
    };
    let mut png_bytes = Vec::new();
    {
        let mut encoder = png::Encoder::new(&mut png_bytes, width, height);
        encoder.set_color(png::ColorType::Rgb);
        encoder.set_depth(png::BitDepth::Eight);
        let mut writer = encoder
            .write_header()
            .map_err(|e| Error::Run(format!("plot: PNG encoding failed: {e}")))?;
        writer
            .write_image_data(&rgb)
            .map_err(|e| Error::Run(format!("plot: PNG encoding failed: {e}")))?;
        writer
            .finish()
            .map_err(|e| Error::Run(format!("plot: PNG encoding failed: {e}")))?;
    }
    Ok((png_bytes, summary))
}

/// Render in the given format: PNG bytes of `width` x `height`, or SVG text bytes (of [`SVG_SIZE`]; the
/// size arguments are then unused).
pub fn render(
    plot: &Plot,
    format: PlotFormat,
    width: u32,
    height: u32,
) -> Result<(Vec<u8>, PlotSummary), Error> {
    match format {
        PlotFormat::Png => render_png(plot, width, height),
        PlotFormat::Svg => render_svg(plot).map(|(s, m)| (s.into_bytes(), m)),
    }
}

// ---------------------------------------------------------------------------------------------------------
// SI labels (the formatter itself is format::units::format_si_as)
// ---------------------------------------------------------------------------------------------------------

/// Axis title with the prefix chosen from the axis span: `axis_title("time", "s", 2e-3)` gives
/// ("time (ms)", milli). Units that take no prefix are written as given; an empty unit gives the bare
/// quantity.
pub fn axis_title(quantity: &str, unit: &str, span: f64) -> (String, SiPrefix) {
    if unit.is_empty() {
        return (quantity.to_string(), SiPrefix::NONE);
    }
    if !unit_takes_prefix(unit) {
        return (format!("{quantity} ({unit})"), SiPrefix::NONE);
    }
    if let Some((natural, scale)) = axis::natural_unit(unit, span) {
        let exponent = -(scale.log10().round() as i32);
        return (
            format!("{quantity} ({natural})"),
            SiPrefix {
                symbol: "",
                exponent,
            },
        );
    }
    let prefix = si_prefix_for_span(span);
    (format!("{quantity} ({}{unit})", prefix.symbol), prefix)
}

/// A value with a prefixed unit and `significant` significant digits: `format_si(12.34e-6, "s", 3)` gives
/// "12.3 µs". Units that take no prefix are written as given. The plots' style of the one SI formatter
/// ([`units::format_si_as`] with [`SiStyle::Significant`]).
pub fn format_si(value: f64, unit: &str, significant: usize) -> String {
    units::format_si_as(value, unit, SiStyle::Significant(significant))
}

/// Split "input frequency (Hz)" into ("input frequency", "Hz"); no trailing parentheses gives no unit.
pub fn split_label_unit(label: &str) -> (&str, &str) {
    let trimmed = label.trim_end();
    if trimmed.ends_with(')')
        && let Some(open) = trimmed.rfind('(')
    {
        return (
            trimmed[..open].trim_end(),
            &trimmed[open + 1..trimmed.len() - 1],
        );
    }
    (trimmed, "")
}

// ---------------------------------------------------------------------------------------------------------
// Dispatch
// ---------------------------------------------------------------------------------------------------------

fn draw_plot<DB: DrawingBackend>(
    db: &mut DB,
    plot: &Plot,
    raster_text: bool,
) -> Result<PlotSummary, Error> {
    let mut p = Painter::new(db, raster_text);
    p.background()?;
    match plot {
        Plot::Waveform(w) => draw_waveform(&mut p, w)?,
        Plot::Spectrum(s) => draw_spectrum(&mut p, s)?,
        Plot::Static(s) => draw_static(&mut p, s)?,
        Plot::Budget(b) => draw_budget(&mut p, b)?,
        Plot::PathBudgets(b) => draw_path_budgets(&mut p, b)?,
        Plot::Xy(x) => draw_xy(&mut p, x)?,
        Plot::Fifo(f) => draw_fifo(&mut p, f)?,
        Plot::Histogram(h) => draw_histogram(&mut p, h)?,
        Plot::Panels(s) => draw_panels(&mut p, s)?,
    }
    Ok(p.summary)
}
