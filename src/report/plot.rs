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

use std::sync::OnceLock;

use ab_glyph::{Font, FontRef, PxScale, ScaleFont};

use plotters::backend::{BitMapBackend, DrawingBackend, SVGBackend};
use plotters::style::text_anchor::{HPos, Pos, VPos};
use plotters::style::{
    Color, FontStyle, FontTransform, IntoFont, RGBAColor, RGBColor, ShapeStyle, TextStyle,
};

use crate::Error;
use crate::format::units;

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
    /// ADC sampling instants inside the window, s (drawn as small circles on the input trace).
    pub sample_instants_s: &'a [f64],
    /// The value each sample was converted to (volts of the code), drawn as crosses; same length as
    /// `sample_instants_s`.
    pub sample_values_v: &'a [f64],
    /// DAC zero-order-hold levels: (update instants in s, levels in V), drawn as a step line.
    pub staircase: Option<(&'a [f64], &'a [f64])>,
    /// Measured input-to-output delay, s: shown as a note and as an arrow between a rising crossing of the
    /// input and the same level one delay later.
    pub measured_delay_s: Option<f64>,
    /// Time window shown, s (start < end).
    pub window_s: (f64, f64),
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
    /// Fundamental frequency to mark, Hz.
    pub fundamental_hz: Option<f64>,
    /// Harmonics to mark: (order, where it lands in Hz, folded?). Folded ones are labelled "3f (folded)".
    pub harmonics: Vec<(u32, f64, bool)>,
    /// Zero-order-hold images to mark, Hz.
    pub images_hz: Vec<f64>,
    /// Upper edge of the analysis band, Hz (shaded).
    pub band_hz: Option<f64>,
    /// Headline metrics written in a box ("SINAD 72.1 dB", ...).
    pub notes: Vec<String>,
    /// Logarithmic frequency axis (bin 0 is then not drawn).
    pub log_frequency: bool,
}

/// Static transfer with DNL and INL panels (empty slices leave their panel out).
#[derive(Debug, Clone)]
pub struct StaticPlot<'a> {
    /// Title drawn above the panels.
    pub title: String,
    /// Level or transition voltage per code, V.
    pub transfer_v: &'a [f64],
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
    /// Generic x-y chart.
    Xy(XyPlot<'a>),
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
// SI prefixes
// ---------------------------------------------------------------------------------------------------------

/// An SI prefix: its symbol and its power of ten (chosen by [`units::si_prefix`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SiPrefix {
    /// "µ", "m", "", "k", ...
    pub symbol: &'static str,
    /// Power of ten of the prefix (-6 for µ).
    pub exponent: i32,
}

impl SiPrefix {
    /// No prefix.
    pub const NONE: SiPrefix = SiPrefix {
        symbol: "",
        exponent: 0,
    };

    /// Multiply a value in the base unit by this to express it with the prefix (1e3 for "m").
    pub fn scale(self) -> f64 {
        10f64.powi(-self.exponent)
    }
}

/// The prefix whose range holds `magnitude` (1 <= magnitude / 10^exponent < 1000), from p to G as
/// [`units::si_prefix`] picks it (micro written µ); no prefix for zero or non-finite input.
pub fn si_prefix_for_value(magnitude: f64) -> SiPrefix {
    // A nudge of 1e-9 decades keeps exact powers of ten that rounding left just below themselves (a span
    // of 1e-3 computed as 0.000999...) in their own decade.
    let m = magnitude.abs() * 10f64.powf(1e-9);
    SiPrefix {
        symbol: units::si_prefix(m, "µ").1,
        exponent: units::si_prefix_exponent(m),
    }
}

/// The prefix for an axis spanning `span` base units: the span then reads between 1 and 1000
/// (2 ms span -> "m", 500 µs span -> "µ", 20 kHz span -> "k").
pub fn si_prefix_for_span(span: f64) -> SiPrefix {
    si_prefix_for_value(span)
}

/// Whether a unit takes SI prefixes (s, Hz, V, A, W, F, H, Ω, V/s, ...) or not (dB, dBFS, LSB, %, none).
pub fn unit_takes_prefix(unit: &str) -> bool {
    let base = unit.split('/').next().unwrap_or("");
    matches!(
        base,
        "s" | "Hz" | "V" | "A" | "W" | "F" | "H" | "Ω" | "ohm" | "S" | "C" | "J" | "m" | "g"
    )
}

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
    let prefix = si_prefix_for_span(span);
    (format!("{quantity} ({}{unit})", prefix.symbol), prefix)
}

/// A value with a prefixed unit and `significant` significant digits: `format_si(12.34e-6, "s", 3)` gives
/// "12.3 µs". Units that take no prefix are written as given.
pub fn format_si(value: f64, unit: &str, significant: usize) -> String {
    let prefix = if unit_takes_prefix(unit) {
        si_prefix_for_value(value)
    } else {
        SiPrefix::NONE
    };
    let scaled = value * prefix.scale();
    let digits = significant.max(1) as i32;
    let decimals = if scaled == 0.0 || !scaled.is_finite() {
        0
    } else {
        (digits - 1 - (scaled.abs().log10() + 1e-9).floor() as i32).max(0) as usize
    };
    let sep = if unit.is_empty() { "" } else { " " };
    format!("{scaled:.decimals$}{sep}{}{unit}", prefix.symbol)
}

/// Split "input frequency (Hz)" into ("input frequency", "Hz"); no trailing parentheses gives no unit.
fn split_label_unit(label: &str) -> (&str, &str) {
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
// Palette and drawing helpers
// ---------------------------------------------------------------------------------------------------------

/// The Okabe-Ito colours.
mod palette {
    use plotters::style::RGBColor;
    pub const BLACK: RGBColor = RGBColor(0x00, 0x00, 0x00);
    pub const ORANGE: RGBColor = RGBColor(0xE6, 0x9F, 0x00);
    pub const SKY_BLUE: RGBColor = RGBColor(0x56, 0xB4, 0xE9);
    pub const BLUISH_GREEN: RGBColor = RGBColor(0x00, 0x9E, 0x73);
    pub const YELLOW: RGBColor = RGBColor(0xF0, 0xE4, 0x42);
    pub const BLUE: RGBColor = RGBColor(0x00, 0x72, 0xB2);
    pub const VERMILLION: RGBColor = RGBColor(0xD5, 0x5E, 0x00);
    pub const REDDISH_PURPLE: RGBColor = RGBColor(0xCC, 0x79, 0xA7);
    /// Order for generic series.
    pub const SERIES: [RGBColor; 8] = [
        BLUE,
        VERMILLION,
        BLUISH_GREEN,
        ORANGE,
        SKY_BLUE,
        REDDISH_PURPLE,
        BLACK,
        YELLOW,
    ];
    /// Order for intermediate waveform stages (input is blue, output vermillion, staircase orange).
    pub const STAGES: [RGBColor; 5] = [BLUISH_GREEN, SKY_BLUE, REDDISH_PURPLE, BLACK, YELLOW];
}

const WHITE: RGBColor = RGBColor(255, 255, 255);
const GRID: RGBColor = RGBColor(0xDD, 0xDD, 0xDD);
const FRAME: RGBColor = RGBColor(0x55, 0x55, 0x55);
const TEXT: RGBColor = RGBColor(0x22, 0x22, 0x22);
const FONT_FAMILY: &str = "sans-serif";

static FONT_READY: OnceLock<bool> = OnceLock::new();

/// Register the embedded font once per process.
fn ensure_font() -> Result<(), Error> {
    let ok = *FONT_READY.get_or_init(|| {
        FontRef::try_from_slice(ttf_noto_sans::REGULAR).is_ok()
            && plotters::style::register_font(
                FONT_FAMILY,
                FontStyle::Normal,
                ttf_noto_sans::REGULAR,
            )
            .is_ok()
    });
    if ok {
        Ok(())
    } else {
        Err(Error::Run(
            "plot: the embedded font could not be loaded".to_string(),
        ))
    }
}

/// The embedded font, parsed once.
fn embedded_font() -> &'static FontRef<'static> {
    static FONT: OnceLock<FontRef<'static>> = OnceLock::new();
    FONT.get_or_init(|| {
        // The bytes are a fixed font compiled into the binary; `ensure_font` has already parsed them.
        FontRef::try_from_slice(ttf_noto_sans::REGULAR).expect("embedded Noto Sans parses")
    })
}

/// Advance width of a line of text, px (with kerning).
fn text_advance<F: Font, S: ScaleFont<F>>(scaled: &S, s: &str) -> f32 {
    let mut w = 0.0;
    let mut prev = None;
    for c in s.chars() {
        let id = scaled.glyph_id(c);
        if let Some(p) = prev {
            w += scaled.kern(p, id);
        }
        w += scaled.h_advance(id);
        prev = Some(id);
    }
    w
}

fn draw_err<E: std::fmt::Display>(e: E) -> Error {
    Error::Run(format!("plot: drawing failed: {e}"))
}

fn rgba(c: RGBColor, alpha: f64) -> RGBAColor {
    c.mix(alpha)
}

/// Key drawn in front of a legend entry.
#[derive(Clone, Copy)]
enum Key {
    Line(RGBColor, u32),
    Circle(RGBColor),
    Cross(RGBColor),
    Shade(RGBColor),
}

/// Thin wrapper over a backend: pixel-space primitives plus the running summary.
struct Painter<'b, DB: DrawingBackend> {
    db: &'b mut DB,
    w: i32,
    h: i32,
    /// Base font size, px.
    font_px: f64,
    /// Rasterise text here (bitmaps) rather than emitting text elements (SVG).
    raster_text: bool,
    /// Scratch for glyph coverage: (x, y, coverage) in text-box pixels.
    glyph_pixels: Vec<(f32, f32, f32)>,
    summary: PlotSummary,
}

impl<'b, DB: DrawingBackend> Painter<'b, DB> {
    /// `raster_text`: draw text as pixels with the embedded font (bitmaps) instead of text elements (SVG).
    fn new(db: &'b mut DB, raster_text: bool) -> Self {
        let (w, h) = db.get_size();
        let font_px = ((w as f64).min(1.6 * h as f64) / 60.0).clamp(10.0, 28.0);
        Painter {
            db,
            w: w as i32,
            h: h as i32,
            font_px,
            raster_text,
            glyph_pixels: Vec::new(),
            summary: PlotSummary::default(),
        }
    }

    fn style(color: RGBAColor, width: u32, filled: bool) -> ShapeStyle {
        ShapeStyle {
            color,
            filled,
            stroke_width: width,
        }
    }

    fn line(
        &mut self,
        a: (i32, i32),
        b: (i32, i32),
        color: RGBAColor,
        width: u32,
    ) -> Result<(), Error> {
        self.db
            .draw_line(a, b, &Self::style(color, width, false))
            .map_err(draw_err)
    }

    /// A data series: one polyline.
    fn series_path(
        &mut self,
        pts: &[(i32, i32)],
        color: RGBColor,
        width: u32,
    ) -> Result<(), Error> {
        self.summary.series += 1;
        if pts.is_empty() {
            return Ok(());
        }
        self.db
            .draw_path(
                pts.iter().copied(),
                &Self::style(color.to_rgba(), width, false),
            )
            .map_err(draw_err)
    }

    fn rect(
        &mut self,
        a: (i32, i32),
        b: (i32, i32),
        color: RGBAColor,
        fill: bool,
    ) -> Result<(), Error> {
        self.db
            .draw_rect(a, b, &Self::style(color, 1, fill), fill)
            .map_err(draw_err)
    }

    fn circle(&mut self, c: (i32, i32), r: u32, color: RGBColor, fill: bool) -> Result<(), Error> {
        self.db
            .draw_circle(c, r, &Self::style(color.to_rgba(), 1, fill), fill)
            .map_err(draw_err)
    }

    fn cross(&mut self, c: (i32, i32), r: i32, color: RGBColor) -> Result<(), Error> {
        let s = color.to_rgba();
        self.line((c.0 - r, c.1 - r), (c.0 + r, c.1 + r), s, 1)?;
        self.line((c.0 - r, c.1 + r), (c.0 + r, c.1 - r), s, 1)
    }

    fn triangle_down(&mut self, tip: (i32, i32), r: i32, color: RGBColor) -> Result<(), Error> {
        let pts = [(tip.0 - r, tip.1 - 2 * r), (tip.0 + r, tip.1 - 2 * r), tip];
        self.db
            .fill_polygon(pts.iter().copied(), &Self::style(color.to_rgba(), 1, true))
            .map_err(draw_err)
    }

    fn text_style(
        &self,
        rel: f64,
        color: RGBColor,
        h: HPos,
        v: VPos,
        vertical: bool,
    ) -> TextStyle<'static> {
        let mut font = (FONT_FAMILY, (self.font_px * rel * 10.0).round() / 10.0).into_font();
        if vertical {
            font = font.transform(FontTransform::Rotate270);
        }
        TextStyle {
            font,
            color: color.to_backend_color(),
            pos: Pos::new(h, v),
        }
    }

    /// Text at `at`, anchored by (h, v); `rel` scales the base font size.
    #[allow(clippy::too_many_arguments)]
    fn text(
        &mut self,
        s: &str,
        at: (i32, i32),
        rel: f64,
        color: RGBColor,
        h: HPos,
        v: VPos,
        vertical: bool,
    ) -> Result<(), Error> {
        if self.raster_text {
            return self.raster_text(s, at, self.font_px * rel, color, h, v, vertical);
        }
        let style = self.text_style(rel, color, h, v, vertical);
        self.db.draw_text(s, &style, at).map_err(draw_err)
    }

    /// Text that the summary records as a label.
    fn label(
        &mut self,
        s: &str,
        at: (i32, i32),
        rel: f64,
        color: RGBColor,
        h: HPos,
        v: VPos,
    ) -> Result<(), Error> {
        self.summary.labels.push(s.to_string());
        self.text(s, at, rel, color, h, v, false)
    }

    fn text_width(&self, s: &str, rel: f64) -> i32 {
        let scaled = embedded_font().as_scaled(PxScale::from((self.font_px * rel) as f32));
        text_advance(&scaled, s).ceil() as i32
    }

    /// Rasterise text with the embedded font, glyph by glyph with their bearings and kerning, blending
    /// coverage into the backend's pixels. (The bitmap text path of plotters 0.3.7 drops each glyph's
    /// left bearing, which squeezes spaces; vector output keeps `<text>` elements.)
    #[allow(clippy::too_many_arguments)]
    fn raster_text(
        &mut self,
        s: &str,
        at: (i32, i32),
        size_px: f64,
        color: RGBColor,
        h: HPos,
        v: VPos,
        vertical: bool,
    ) -> Result<(), Error> {
        let font = embedded_font();
        let scaled = font.as_scaled(PxScale::from(size_px as f32));
        let ascent = scaled.ascent();
        let width = text_advance(&scaled, s);
        let height = ascent - scaled.descent();
        let du = match h {
            HPos::Left => 0.0,
            HPos::Center => width / 2.0,
            HPos::Right => width,
        };
        let dv = match v {
            VPos::Top => 0.0,
            VPos::Center => height / 2.0,
            VPos::Bottom => height,
        };
        self.glyph_pixels.clear();
        let mut pen = 0.0f32;
        let mut prev = None;
        for c in s.chars() {
            let id = scaled.glyph_id(c);
            if let Some(p) = prev {
                pen += scaled.kern(p, id);
            }
            let glyph = id.with_scale_and_position(scaled.scale(), ab_glyph::point(pen, ascent));
            if let Some(outlined) = font.outline_glyph(glyph) {
                let b = outlined.px_bounds();
                let out = &mut self.glyph_pixels;
                outlined
                    .draw(|gx, gy, cov| out.push((b.min.x + gx as f32, b.min.y + gy as f32, cov)));
            }
            pen += scaled.h_advance(id);
            prev = Some(id);
        }
        for k in 0..self.glyph_pixels.len() {
            let (u, w, cov) = self.glyph_pixels[k];
            if cov <= 0.0 {
                continue;
            }
            // One shift for the whole text (floor of a constant offset), so no pixel row or column is skipped.
            let (u, w) = ((u - du).floor() as i32, (w - dv).floor() as i32);
            let at = if vertical {
                (at.0 + w, at.1 - u)
            } else {
                (at.0 + u, at.1 + w)
            };
            let c = color.mix(cov.min(1.0) as f64).to_backend_color();
            self.db.draw_pixel(at, c).map_err(draw_err)?;
        }
        Ok(())
    }

    /// A label centred above `at` (bottom-anchored), shifted sideways to stay within `[lo_x, hi_x]`.
    fn label_above(
        &mut self,
        s: &str,
        at: (i32, i32),
        rel: f64,
        color: RGBColor,
        (lo_x, hi_x): (i32, i32),
    ) -> Result<(), Error> {
        let half = self.text_width(s, rel) / 2 + 2;
        let x = if hi_x - lo_x > 2 * half {
            at.0.clamp(lo_x + half, hi_x - half)
        } else {
            at.0
        };
        self.label(s, (x, at.1), rel, color, HPos::Center, VPos::Bottom)
    }

    fn fpx(&self, rel: f64) -> i32 {
        (self.font_px * rel).round() as i32
    }

    fn background(&mut self) -> Result<(), Error> {
        let (w, h) = (self.w, self.h);
        self.rect((0, 0), (w, h), WHITE.to_rgba(), true)
    }

    /// Title centred at the top; returns the y below it.
    fn title(&mut self, s: &str) -> Result<i32, Error> {
        let y = self.fpx(0.6);
        let x = self.w / 2;
        self.label(s, (x, y), 1.2, TEXT, HPos::Center, VPos::Top)?;
        Ok(y + self.fpx(1.2 * 1.35))
    }

    /// Legend laid out in rows from (x0, y) within width `w`; returns the y below it.
    fn legend(&mut self, entries: &[(String, Key)], x0: i32, y: i32, w: i32) -> Result<i32, Error> {
        if entries.is_empty() {
            return Ok(y);
        }
        let row_h = self.fpx(1.5);
        let key_w = self.fpx(1.8);
        let gap = self.fpx(0.4);
        let spacing = self.fpx(1.4);
        let (mut x, mut yy) = (x0, y + row_h / 2);
        for (name, key) in entries {
            let tw = self.text_width(name, 0.9);
            let need = key_w + gap + tw;
            if x > x0 && x + need > x0 + w {
                x = x0;
                yy += row_h;
            }
            let mid = (x + key_w / 2, yy);
            match *key {
                Key::Line(c, width) => {
                    self.line((x, yy), (x + key_w, yy), c.to_rgba(), width.max(2))?
                }
                Key::Circle(c) => self.circle(mid, (self.font_px * 0.25) as u32, c, false)?,
                Key::Cross(c) => self.cross(mid, (self.font_px * 0.25) as i32, c)?,
                Key::Shade(c) => {
                    let r = self.fpx(0.4);
                    self.rect((x, yy - r), (x + key_w, yy + r), rgba(c, 0.25), true)?;
                }
            }
            self.label(
                name,
                (x + key_w + gap, yy),
                0.9,
                TEXT,
                HPos::Left,
                VPos::Center,
            )?;
            x += need + spacing;
        }
        Ok(yy + row_h / 2 + self.fpx(0.3))
    }
}

// ---------------------------------------------------------------------------------------------------------
// Axes
// ---------------------------------------------------------------------------------------------------------

/// One axis: data range, mapping and ticks.
#[derive(Debug, Clone)]
struct Axis {
    lo: f64,
    hi: f64,
    log: bool,
    /// (position in data units, label).
    ticks: Vec<(f64, String)>,
    title: String,
}

impl Axis {
    /// Linear axis over [lo, hi] in `unit`, ticks on 1-2-5 steps with labels scaled by the span's prefix.
    fn linear(quantity: &str, unit: &str, lo: f64, hi: f64, target_ticks: usize) -> Axis {
        let (lo, hi) = widen(lo, hi);
        let (title, prefix) = axis_title(quantity, unit, hi - lo);
        let step = nice_step((hi - lo) / target_ticks.max(2) as f64);
        let scale = prefix.scale();
        let decimals = (-((step * scale).log10() + 1e-9).floor()).max(0.0) as usize;
        let mut ticks = Vec::new();
        let first = (lo / step - 1e-9).ceil() as i64;
        let last = (hi / step + 1e-9).floor() as i64;
        for k in first..=last {
            let v = k as f64 * step;
            let shown = if k == 0 { 0.0 } else { v * scale };
            ticks.push((v, format!("{shown:.decimals$}")));
        }
        Axis {
            lo,
            hi,
            log: false,
            ticks,
            title,
        }
    }

    /// Logarithmic axis over [lo, hi] (both > 0): ticks at decades (and 2, 5 when few decades), each
    /// labelled with its own prefix ("100", "1k", "10k"); the title carries the bare unit.
    fn logarithmic(quantity: &str, unit: &str, lo: f64, hi: f64) -> Axis {
        let lo = lo.max(f64::MIN_POSITIVE);
        let hi = if hi > lo { hi } else { lo * 10.0 };
        let title = if unit.is_empty() {
            quantity.to_string()
        } else {
            format!("{quantity} ({unit})")
        };
        let d0 = (lo.log10() - 1e-9).floor() as i32;
        let d1 = (hi.log10() + 1e-9).ceil() as i32;
        let mantissas: &[f64] = if d1 - d0 <= 3 {
            &[1.0, 2.0, 5.0]
        } else {
            &[1.0]
        };
        let mut ticks = Vec::new();
        for d in d0..=d1 {
            for &m in mantissas {
                let v = m * 10f64.powi(d);
                if v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9) {
                    let label = if unit_takes_prefix(unit) {
                        let p = si_prefix_for_value(v);
                        format!("{}{}", compact_number(v * p.scale()), p.symbol)
                    } else {
                        compact_number(v)
                    };
                    ticks.push((v, label));
                }
            }
        }
        Axis {
            lo,
            hi,
            log: true,
            ticks,
            title,
        }
    }

    /// Position of `v` along the axis, 0 at lo and 1 at hi (not clamped).
    fn frac(&self, v: f64) -> f64 {
        if self.log {
            (v.max(f64::MIN_POSITIVE).ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln())
        } else {
            (v - self.lo) / (self.hi - self.lo)
        }
    }
}

/// A number without trailing zeros, up to 3 significant digits (for log-axis ticks).
fn compact_number(v: f64) -> String {
    let s = format!("{:.2}", v);
    let s = s.trim_end_matches('0').trim_end_matches('.');
    s.to_string()
}

fn widen(lo: f64, hi: f64) -> (f64, f64) {
    if !(lo.is_finite() && hi.is_finite()) {
        return (0.0, 1.0);
    }
    if hi > lo {
        return (lo, hi);
    }
    let d = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
    (lo - d, lo + d)
}

/// Step of 1, 2 or 5 times a power of ten nearest to `raw` (by ratio).
fn nice_step(raw: f64) -> f64 {
    if !(raw > 0.0 && raw.is_finite()) {
        return 1.0;
    }
    let mag = 10f64.powf((raw.log10() + 1e-12).floor());
    let n = raw / mag;
    // Nearest of 1, 2, 5, 10 by ratio (the thresholds are the geometric means).
    let m = if n < 2f64.sqrt() {
        1.0
    } else if n < 10f64.sqrt() {
        2.0
    } else if n < 50f64.sqrt() {
        5.0
    } else {
        10.0
    };
    m * mag
}

/// Range of data padded by `pad` of its span on both sides.
fn padded(lo: f64, hi: f64, pad: f64) -> (f64, f64) {
    let (lo, hi) = widen(lo, hi);
    let d = (hi - lo) * pad;
    (lo - d, hi + d)
}

/// A plotting frame: pixel rectangle and the two axes.
struct Frame {
    x0: i32,
    y0: i32,
    x1: i32,
    y1: i32,
    x: Axis,
    y: Axis,
}

impl Frame {
    fn px(&self, v: f64) -> f64 {
        self.x0 as f64 + self.x.frac(v) * (self.x1 - self.x0) as f64
    }
    fn py(&self, v: f64) -> f64 {
        self.y1 as f64 - self.y.frac(v) * (self.y1 - self.y0) as f64
    }
    /// Pixel point, clamped into the frame.
    fn pt(&self, x: f64, y: f64) -> (i32, i32) {
        clamp_pt(self, (self.px(x), self.py(y)))
    }

    /// Grid, frame, tick labels and axis titles; `x_labels` false leaves the x tick labels and title out
    /// (upper panels sharing the x axis of the lowest).
    fn draw<DB: DrawingBackend>(&self, p: &mut Painter<DB>, x_labels: bool) -> Result<(), Error> {
        let grid = GRID.to_rgba();
        for (v, _) in &self.x.ticks {
            let x = self.px(*v).round() as i32;
            p.line((x, self.y0), (x, self.y1), grid, 1)?;
        }
        for (v, _) in &self.y.ticks {
            let y = self.py(*v).round() as i32;
            p.line((self.x0, y), (self.x1, y), grid, 1)?;
        }
        p.rect(
            (self.x0, self.y0),
            (self.x1, self.y1),
            FRAME.to_rgba(),
            false,
        )?;
        let tick_gap = p.fpx(0.35);
        if x_labels {
            for (v, s) in &self.x.ticks {
                let x = self.px(*v).round() as i32;
                p.text(
                    s,
                    (x, self.y1 + tick_gap),
                    0.85,
                    TEXT,
                    HPos::Center,
                    VPos::Top,
                    false,
                )?;
            }
            let xt = self.x.title.clone();
            p.summary.labels.push(xt.clone());
            let y = self.y1 + tick_gap + p.fpx(1.25);
            p.text(
                &xt,
                ((self.x0 + self.x1) / 2, y),
                1.0,
                TEXT,
                HPos::Center,
                VPos::Top,
                false,
            )?;
        }
        let mut widest = 0;
        for (v, s) in &self.y.ticks {
            let y = self.py(*v).round() as i32;
            widest = widest.max(p.text_width(s, 0.85));
            p.text(
                s,
                (self.x0 - tick_gap, y),
                0.85,
                TEXT,
                HPos::Right,
                VPos::Center,
                false,
            )?;
        }
        if !self.y.title.is_empty() {
            let yt = self.y.title.clone();
            p.summary.labels.push(yt.clone());
            let x = self.x0 - tick_gap - widest - p.fpx(0.8);
            p.text(
                &yt,
                (x, (self.y0 + self.y1) / 2),
                1.0,
                TEXT,
                HPos::Center,
                VPos::Center,
                true,
            )?;
        }
        Ok(())
    }
}

fn clamp_pt(f: &Frame, (x, y): (f64, f64)) -> (i32, i32) {
    (
        x.clamp(f.x0 as f64, f.x1 as f64).round() as i32,
        y.clamp(f.y0 as f64, f.y1 as f64).round() as i32,
    )
}

/// Widest tick label of an axis at 0.85 of the base font.
fn widest_tick<DB: DrawingBackend>(p: &Painter<DB>, axis: &Axis) -> i32 {
    axis.ticks
        .iter()
        .map(|(_, s)| p.text_width(s, 0.85))
        .max()
        .unwrap_or(0)
}

/// Left margin that fits the y tick labels and the rotated y title.
fn left_margin<DB: DrawingBackend>(p: &Painter<DB>, y: &Axis) -> i32 {
    widest_tick(p, y) + p.fpx(0.35) + p.fpx(if y.title.is_empty() { 0.6 } else { 2.2 })
}

/// Height below a frame taken by x tick labels and the x title.
/// The common layout of a one-frame plot: the title, the legend under it, and the frame below them with room
/// for the y axis' tick labels at the left and the x axis' at the bottom.
fn titled_frame<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    title: &str,
    entries: &[(String, Key)],
    x: Axis,
    y: Axis,
) -> Result<Frame, Error> {
    let top = p.title(title)?;
    let left = left_margin(p, &y);
    let right = p.w - p.fpx(1.2);
    let top = p.legend(entries, left, top, right - left)?;
    Ok(Frame {
        x0: left,
        y0: top + p.fpx(0.3),
        x1: right,
        y1: p.h - bottom_margin(p),
        x,
        y,
    })
}

fn bottom_margin<DB: DrawingBackend>(p: &Painter<DB>) -> i32 {
    p.fpx(0.35) + p.fpx(1.25) + p.fpx(1.6)
}

// ---------------------------------------------------------------------------------------------------------
// Reduction per pixel column
// ---------------------------------------------------------------------------------------------------------

/// How points falling in one pixel column are reduced.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Reduce {
    /// Keep the lowest and highest value, in order of occurrence (waveforms: no spike is lost).
    MinMax,
    /// Keep the highest value only (spectra: peaks are kept).
    Max,
}

/// Reduce pixel-space points (x non-decreasing; y grows downward) to at most two per pixel column
/// (`MinMax`) or one (`Max`), appending to `out`. Columns with a single point keep it exactly, so short
/// series are drawn unchanged. Non-finite points are skipped.
fn reduce_columns<I: Iterator<Item = (f64, f64)>>(
    points: I,
    mode: Reduce,
    out: &mut Vec<(f64, f64)>,
) {
    // State of the current column: first point, and (index, point) of the top-most and bottom-most.
    let mut col = i64::MIN;
    let mut count = 0usize;
    let mut first = (0.0, 0.0);
    let mut top = (0usize, (0.0, 0.0)); // smallest pixel y = largest value
    let mut bottom = (0usize, (0.0, 0.0));
    let flush = |count: usize,
                 first: (f64, f64),
                 top: (usize, (f64, f64)),
                 bottom: (usize, (f64, f64)),
                 out: &mut Vec<(f64, f64)>| {
        match (count, mode) {
            (0, _) => {}
            (1, _) => out.push(first),
            (_, Reduce::Max) => out.push(top.1),
            (_, Reduce::MinMax) => {
                if top.0 <= bottom.0 {
                    out.push(top.1);
                    if bottom.0 != top.0 {
                        out.push(bottom.1);
                    }
                } else {
                    out.push(bottom.1);
                    out.push(top.1);
                }
            }
        }
    };
    for (i, (x, y)) in points.enumerate() {
        if !(x.is_finite() && y.is_finite()) {
            continue;
        }
        let c = x.floor() as i64;
        if c != col {
            flush(count, first, top, bottom, out);
            col = c;
            count = 0;
        }
        if count == 0 {
            first = (x, y);
            top = (i, (x, y));
            bottom = (i, (x, y));
        } else {
            if y < top.1.1 {
                top = (i, (x, y));
            }
            if y > bottom.1.1 {
                bottom = (i, (x, y));
            }
        }
        count += 1;
    }
    flush(count, first, top, bottom, out);
}

/// Reduce, clamp into the frame and round.
fn to_pixels<I: Iterator<Item = (f64, f64)>>(
    f: &Frame,
    points: I,
    mode: Reduce,
) -> Vec<(i32, i32)> {
    let mut reduced = Vec::new();
    reduce_columns(points, mode, &mut reduced);
    let mut out: Vec<(i32, i32)> = Vec::with_capacity(reduced.len());
    for p in reduced {
        let q = clamp_pt(f, p);
        if out.last() != Some(&q) {
            out.push(q);
        }
    }
    out
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
        Plot::Xy(x) => draw_xy(&mut p, x)?,
    }
    Ok(p.summary)
}

// ---------------------------------------------------------------------------------------------------------
// Waveform
// ---------------------------------------------------------------------------------------------------------

/// Index range of a uniform grid inside [w0, w1].
fn window_indices(
    t0_s: f64,
    dt_s: f64,
    len: usize,
    (w0, w1): (f64, f64),
) -> std::ops::Range<usize> {
    if len == 0 {
        return 0..0;
    }
    let i0 = ((w0 - t0_s) / dt_s - 1e-9).ceil().max(0.0);
    let i1 = ((w1 - t0_s) / dt_s + 1e-9).floor();
    if i1 < 0.0 || i0 > (len - 1) as f64 || i1 < i0 {
        return 0..0;
    }
    i0 as usize..(i1 as usize).min(len - 1) + 1
}

/// Finite min and max of a slice.
fn finite_range(v: &[f64]) -> Option<(f64, f64)> {
    v.iter()
        .filter(|x| x.is_finite())
        .fold(None, |acc, &x| match acc {
            None => Some((x, x)),
            Some((lo, hi)) => Some((lo.min(x), hi.max(x))),
        })
}

fn merge(a: Option<(f64, f64)>, b: Option<(f64, f64)>) -> Option<(f64, f64)> {
    match (a, b) {
        (Some((a0, a1)), Some((b0, b1))) => Some((a0.min(b0), a1.max(b1))),
        (x, None) | (None, x) => x,
    }
}

/// Linear interpolation of a uniform trace at time t (None outside the trace).
fn interp(t0_s: f64, dt_s: f64, y: &[f64], t: f64) -> Option<f64> {
    let u = (t - t0_s) / dt_s;
    if u.is_nan() || u < 0.0 || y.is_empty() || u > (y.len() - 1) as f64 {
        return None;
    }
    let i = (u.floor() as usize).min(y.len() - 1);
    if i + 1 >= y.len() {
        return Some(y[i]);
    }
    let f = u - i as f64;
    Some(y[i] + f * (y[i + 1] - y[i]))
}

fn draw_waveform<DB: DrawingBackend>(p: &mut Painter<DB>, w: &WaveformPlot) -> Result<(), Error> {
    let (w0, w1) = w.window_s;
    if !(w.dt_s > 0.0 && w.dt_s.is_finite()) {
        return Err(Error::Run(format!(
            "plot: waveform grid step {} s must be positive",
            w.dt_s
        )));
    }
    if !(w0 < w1 && w0.is_finite() && w1.is_finite()) {
        return Err(Error::Run(format!(
            "plot: waveform window ({w0}, {w1}) s is empty"
        )));
    }
    if w.traces.is_empty() {
        return Err(Error::Run("plot: waveform has no traces".to_string()));
    }
    if w.sample_instants_s.len() != w.sample_values_v.len() {
        return Err(Error::Run(format!(
            "plot: {} sample instants but {} sample values",
            w.sample_instants_s.len(),
            w.sample_values_v.len()
        )));
    }
    if let Some((t, l)) = w.staircase
        && t.len() != l.len()
    {
        return Err(Error::Run(format!(
            "plot: staircase has {} instants but {} levels",
            t.len(),
            l.len()
        )));
    }

    // Vertical range over everything inside the window.
    let mut range = None;
    for (_, y) in &w.traces {
        range = merge(
            range,
            finite_range(&y[window_indices(w.t0_s, w.dt_s, y.len(), w.window_s)]),
        );
    }
    let in_window = |t: f64| t >= w0 && t <= w1;
    let samples: Vec<(f64, f64)> = w
        .sample_instants_s
        .iter()
        .zip(w.sample_values_v)
        .filter(|(t, v)| in_window(**t) && v.is_finite())
        .map(|(t, v)| (*t, *v))
        .collect();
    range = merge(
        range,
        finite_range(&samples.iter().map(|s| s.1).collect::<Vec<_>>()),
    );
    let stair_pts = w.staircase.map(|(t, l)| staircase_points(t, l, w.window_s));
    if let Some(sp) = &stair_pts {
        range = merge(
            range,
            finite_range(&sp.iter().map(|s| s.1).collect::<Vec<_>>()),
        );
    }
    let (lo, hi) = range.unwrap_or((-1.0, 1.0));
    let (ylo, yhi) = padded(lo, hi, 0.06);
    let x = Axis::linear("time", "s", w0, w1, 8);
    let y = Axis::linear("voltage", "V", ylo, yhi, 6);

    // Legend.
    let n = w.traces.len();
    let mut entries = Vec::new();
    let colour_of = |k: usize| -> (RGBColor, u32) {
        if k == 0 {
            (palette::BLUE, 2)
        } else if k == n - 1 {
            (palette::VERMILLION, 2)
        } else {
            (palette::STAGES[(k - 1) % palette::STAGES.len()], 1)
        }
    };
    for (k, (name, _)) in w.traces.iter().enumerate() {
        let (c, width) = colour_of(k);
        entries.push((name.to_string(), Key::Line(c, width)));
    }
    if stair_pts.is_some() {
        entries.push(("DAC hold levels".to_string(), Key::Line(palette::ORANGE, 1)));
    }
    let max_markers = ((p.w as usize) / 6).max(1);
    let show_samples = !samples.is_empty() && samples.len() <= max_markers;
    if show_samples {
        entries.push(("sampling instants".to_string(), Key::Circle(palette::BLACK)));
        entries.push(("converted values".to_string(), Key::Cross(palette::BLACK)));
    }

    let f = titled_frame(p, &w.title, &entries, x, y)?;
    f.draw(p, true)?;

    // Staircase below the traces.
    if let Some(sp) = &stair_pts {
        let pts = to_pixels(
            &f,
            sp.iter().map(|&(t, v)| (f.px(t), f.py(v))),
            Reduce::MinMax,
        );
        p.series_path(&pts, palette::ORANGE, 1)?;
    }
    // Intermediate stages first (thin), then input, then output on top.
    let mut order: Vec<usize> = (1..n.saturating_sub(1)).collect();
    order.push(0);
    if n > 1 {
        order.push(n - 1);
    }
    for k in order {
        let (_, ys) = w.traces[k];
        let r = window_indices(w.t0_s, w.dt_s, ys.len(), w.window_s);
        let pts = to_pixels(
            &f,
            r.map(|i| (f.px(w.t0_s + i as f64 * w.dt_s), f.py(ys[i]))),
            Reduce::MinMax,
        );
        let (c, width) = colour_of(k);
        p.series_path(&pts, c, width)?;
    }

    // Sample markers: circle on the input trace at each instant, cross at the converted value.
    let input = w.traces[0].1;
    let r = (p.font_px * 0.25).max(2.0);
    if show_samples {
        for &(t, v) in &samples {
            if let Some(u) = interp(w.t0_s, w.dt_s, input, t) {
                p.circle(f.pt(t, u), r as u32, palette::BLACK, false)?;
                p.summary.markers += 1;
            }
            p.cross(f.pt(t, v), r as i32, palette::BLACK)?;
            p.summary.markers += 1;
        }
    } else if !samples.is_empty() {
        let note = format!("{} samples in window (markers not drawn)", samples.len());
        p.label(
            &note,
            (f.x1 - p.fpx(0.5), f.y1 - p.fpx(0.5)),
            0.8,
            TEXT,
            HPos::Right,
            VPos::Bottom,
        )?;
    }

    if let Some(d) = w.measured_delay_s {
        let note = format!("measured delay {}", format_si(d, "s", 4));
        p.label(
            &note,
            (f.x0 + p.fpx(0.5), f.y0 + p.fpx(0.4)),
            0.9,
            TEXT,
            HPos::Left,
            VPos::Top,
        )?;
        if let Some((tc, level)) = rising_crossing(w, d) {
            let a = f.pt(tc, level);
            let b = f.pt(tc + d, level);
            let c = palette::BLACK.to_rgba();
            let tick = p.fpx(0.5);
            p.line((a.0, a.1 - tick), (a.0, a.1 + tick), c, 1)?;
            p.line((b.0, b.1 - tick), (b.0, b.1 + tick), c, 1)?;
            p.line(a, b, c, 1)?;
            let head = p.fpx(0.4).min(((b.0 - a.0) / 2).max(1));
            p.line(b, (b.0 - head, b.1 - head / 2), c, 1)?;
            p.line(b, (b.0 - head, b.1 + head / 2), c, 1)?;
            let label = format!("delay {}", format_si(d, "s", 3));
            p.label_above(
                &label,
                ((a.0 + b.0) / 2, a.1 - tick),
                0.8,
                TEXT,
                (f.x0, f.x1),
            )?;
            p.summary.markers += 1;
        }
    }
    Ok(())
}

/// Points of a zero-order-hold step line within the window: each level holds until the next instant, the
/// last one until the window end.
fn staircase_points(t: &[f64], l: &[f64], (w0, w1): (f64, f64)) -> Vec<(f64, f64)> {
    let mut out = Vec::new();
    for i in 0..t.len() {
        let start = t[i].max(w0);
        let end = if i + 1 < t.len() {
            t[i + 1].min(w1)
        } else {
            w1
        };
        if end < start || start > w1 {
            continue;
        }
        out.push((start, l[i]));
        out.push((end, l[i]));
    }
    out
}

/// First rising crossing of the input's mid level inside the window such that one delay later is still
/// inside: (time in s, level in V).
fn rising_crossing(w: &WaveformPlot, delay_s: f64) -> Option<(f64, f64)> {
    let y = w.traces[0].1;
    let r = window_indices(w.t0_s, w.dt_s, y.len(), w.window_s);
    let (lo, hi) = finite_range(&y[r.clone()])?;
    if hi <= lo || !(delay_s.is_finite()) || delay_s <= 0.0 {
        return None;
    }
    let mid = 0.5 * (lo + hi);
    for i in r.start + 1..r.end {
        if y[i - 1] < mid && y[i] >= mid {
            let frac = (mid - y[i - 1]) / (y[i] - y[i - 1]);
            let t = w.t0_s + (i as f64 - 1.0 + frac) * w.dt_s;
            if t + delay_s <= w.window_s.1 {
                return Some((t, mid));
            }
            return None;
        }
    }
    None
}

// ---------------------------------------------------------------------------------------------------------
// Spectrum
// ---------------------------------------------------------------------------------------------------------

fn draw_spectrum<DB: DrawingBackend>(p: &mut Painter<DB>, s: &SpectrumPlot) -> Result<(), Error> {
    if !(s.bin_hz > 0.0 && s.bin_hz.is_finite()) {
        return Err(Error::Run(format!(
            "plot: spectrum bin spacing {} Hz must be positive",
            s.bin_hz
        )));
    }
    let n = s.level_dbfs.len();
    if n < 2 {
        return Err(Error::Run(
            "plot: spectrum needs at least two bins".to_string(),
        ));
    }
    let f_top = (n - 1) as f64 * s.bin_hz;
    let first_bin = if s.log_frequency { 1 } else { 0 };
    let (lmin, lmax) = finite_range(&s.level_dbfs[first_bin..]).unwrap_or((-120.0, 0.0));
    let y_hi = ((lmax + 8.0) / 10.0).ceil() * 10.0;
    let y_lo = ((lmin / 10.0).floor() * 10.0)
        .max(y_hi - 200.0)
        .min(y_hi - 20.0);
    let x = if s.log_frequency {
        Axis::logarithmic("frequency", "Hz", s.bin_hz, f_top)
    } else {
        Axis::linear("frequency", "Hz", 0.0, f_top, 8)
    };
    let y = Axis::linear("level", "dBFS", y_lo, y_hi, 8);

    let mut entries = vec![("spectrum".to_string(), Key::Line(palette::BLUE, 1))];
    if s.band_hz.is_some() {
        entries.push(("analysis band".to_string(), Key::Shade(palette::SKY_BLUE)));
    }
    let f = titled_frame(p, &s.title, &entries, x, y)?;

    if let Some(band) = s.band_hz {
        let a = f.pt(f.x.lo, f.y.hi);
        let b = f.pt(band.min(f.x.hi), f.y.lo);
        p.rect(a, b, rgba(palette::SKY_BLUE, 0.15), true)?;
    }
    f.draw(p, true)?;
    if let Some(band) = s.band_hz {
        let bx = f.pt(band.min(f.x.hi), f.y.lo).0;
        p.line((bx, f.y0), (bx, f.y1), palette::SKY_BLUE.to_rgba(), 1)?;
        p.summary.markers += 1;
    }

    let floor = f.y.lo;
    let pts = to_pixels(
        &f,
        (first_bin..n).map(|k| {
            let l = s.level_dbfs[k];
            let l = if l.is_finite() { l.max(floor) } else { floor };
            (f.px(k as f64 * s.bin_hz), f.py(l))
        }),
        Reduce::Max,
    );
    p.series_path(&pts, palette::BLUE, 1)?;

    // Level at a marked frequency: the highest bin within one bin of it.
    let level_at = |hz: f64| -> f64 {
        let k = (hz / s.bin_hz).round().max(0.0) as usize;
        let lo = k.saturating_sub(1).max(first_bin);
        let hi = (k + 1).min(n - 1);
        if lo > hi {
            return floor;
        }
        s.level_dbfs[lo..=hi]
            .iter()
            .copied()
            .filter(|v| v.is_finite())
            .fold(floor, f64::max)
    };
    let visible =
        |hz: f64| hz.is_finite() && hz >= f.x.lo && hz <= f.x.hi && (!f.x.log || hz > 0.0);
    let r = (p.font_px * 0.3).max(3.0);
    let gap = p.fpx(0.4);
    if let Some(f0) = s.fundamental_hz.filter(|&h| visible(h)) {
        let at = f.pt(f0, level_at(f0));
        p.circle(at, r as u32, palette::VERMILLION, true)?;
        p.summary.markers += 1;
        let label = format!("f0 {}", format_si(f0, "Hz", 4));
        p.label_above(
            &label,
            (at.0, at.1 - gap),
            0.8,
            palette::VERMILLION,
            (f.x0, f.x1),
        )?;
    }
    for &(order, hz, folded) in &s.harmonics {
        if !visible(hz) {
            continue;
        }
        let at = f.pt(hz, level_at(hz));
        p.circle(at, r as u32, palette::ORANGE, false)?;
        p.summary.markers += 1;
        let label = if folded {
            format!("{order}f (folded)")
        } else {
            format!("{order}f")
        };
        p.label_above(&label, (at.0, at.1 - gap), 0.75, TEXT, (f.x0, f.x1))?;
    }
    for &hz in &s.images_hz {
        if !visible(hz) {
            continue;
        }
        let at = f.pt(hz, level_at(hz));
        let tip = (at.0, (at.1 - gap).max(f.y0 + 2 * r as i32));
        p.triangle_down(tip, r as i32, palette::REDDISH_PURPLE)?;
        p.summary.markers += 1;
        let at = (tip.0, tip.1 - 2 * r as i32 - 2);
        p.label_above("image", at, 0.75, palette::REDDISH_PURPLE, (f.x0, f.x1))?;
    }
    notes_box(p, &f, &s.notes)?;
    Ok(())
}

/// Headline notes in a white box at the top right of a frame.
fn notes_box<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    f: &Frame,
    notes: &[String],
) -> Result<(), Error> {
    if notes.is_empty() {
        return Ok(());
    }
    let line_h = p.fpx(1.25);
    let pad = p.fpx(0.4);
    let w = notes
        .iter()
        .map(|s| p.text_width(s, 0.9))
        .max()
        .unwrap_or(0)
        + 2 * pad;
    let h = line_h * notes.len() as i32 + 2 * pad;
    let (x1, y0) = (f.x1 - p.fpx(0.5), f.y0 + p.fpx(0.5));
    let x0 = x1 - w;
    p.rect((x0, y0), (x1, y0 + h), WHITE.to_rgba(), true)?;
    p.rect((x0, y0), (x1, y0 + h), GRID.to_rgba(), false)?;
    for (i, s) in notes.iter().enumerate() {
        p.label(
            s,
            (x0 + pad, y0 + pad + i as i32 * line_h),
            0.9,
            TEXT,
            HPos::Left,
            VPos::Top,
        )?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------------------
// Static transfer, DNL, INL
// ---------------------------------------------------------------------------------------------------------

fn draw_static<DB: DrawingBackend>(p: &mut Painter<DB>, s: &StaticPlot) -> Result<(), Error> {
    let panels: Vec<(&str, &str, &[f64], RGBColor)> = [
        ("level", "V", s.transfer_v, palette::BLUE),
        ("DNL", "LSB", s.dnl_lsb, palette::VERMILLION),
        ("INL", "LSB", s.inl_lsb, palette::BLUISH_GREEN),
    ]
    .into_iter()
    .filter(|(_, _, v, _)| !v.is_empty())
    .collect();
    if panels.is_empty() {
        return Err(Error::Run("plot: static plot has no data".to_string()));
    }
    let codes = panels.iter().map(|(_, _, v, _)| v.len()).max().unwrap_or(1);
    let x_hi = (codes.max(2) - 1) as f64;

    let top = p.title(&s.title)?;
    let axes: Vec<Axis> = panels
        .iter()
        .map(|(q, unit, v, _)| {
            let (lo, hi) = finite_range(v).unwrap_or((-1.0, 1.0));
            let (lo, hi) = if *unit == "LSB" {
                // Keep zero in view and at least +-0.5 LSB so a perfect converter does not look noisy.
                padded(lo.min(-0.5), hi.max(0.5), 0.08)
            } else {
                padded(lo, hi, 0.05)
            };
            Axis::linear(q, unit, lo, hi, 4)
        })
        .collect();
    let left = axes.iter().map(|a| left_margin(p, a)).max().unwrap_or(0);
    let right = p.w - p.fpx(1.2);
    let bottom = p.h - bottom_margin(p);
    let gap = p.fpx(0.8);
    let np = panels.len() as i32;
    let ph = (bottom - top - gap * (np - 1)) / np;
    for (i, ((q, unit, v, colour), y)) in panels.iter().zip(axes).enumerate() {
        let y0 = top + i as i32 * (ph + gap);
        let f = Frame {
            x0: left,
            y0,
            x1: right,
            y1: y0 + ph,
            x: Axis::linear("code", "", 0.0, x_hi, 8),
            y,
        };
        let last = i as i32 == np - 1;
        f.draw(p, last)?;
        if *unit == "LSB" {
            let zy = f.pt(0.0, 0.0).1;
            p.line((f.x0, zy), (f.x1, zy), FRAME.to_rgba(), 1)?;
        }
        let pts = to_pixels(
            &f,
            v.iter()
                .enumerate()
                .map(|(k, &l)| (f.px(k as f64), f.py(l))),
            Reduce::MinMax,
        );
        p.series_path(&pts, *colour, 1)?;
        if let Some((lo, hi)) = finite_range(v) {
            let note = if *unit == "LSB" {
                format!("{q} max {hi:+.3} LSB, min {lo:+.3} LSB")
            } else {
                format!(
                    "{} codes, {} to {}",
                    v.len(),
                    format_si(lo, unit, 4),
                    format_si(hi, unit, 4)
                )
            };
            p.label(
                &note,
                (f.x0 + p.fpx(0.5), f.y0 + p.fpx(0.3)),
                0.8,
                TEXT,
                HPos::Left,
                VPos::Top,
            )?;
        }
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------------------
// Latency budget
// ---------------------------------------------------------------------------------------------------------

fn draw_budget<DB: DrawingBackend>(p: &mut Painter<DB>, b: &BudgetPlot) -> Result<(), Error> {
    if b.lines.iter().any(|(_, v)| !v.is_finite()) || !b.measured_s.is_finite() {
        return Err(Error::Run(
            "plot: latency budget has a non-finite value".to_string(),
        ));
    }
    let total: f64 = b.lines.iter().map(|(_, v)| v).sum();
    let rows = b.lines.len() + 2;
    let x_hi = total.max(b.measured_s).max(0.0) * 1.18;
    let x_hi = if x_hi > 0.0 { x_hi } else { 1e-6 };
    let x_lo = b
        .lines
        .iter()
        .map(|(_, v)| *v)
        .fold(0.0f64, f64::min)
        .min(b.measured_s.min(0.0));
    let x = Axis::linear("time", "s", x_lo, x_hi, 8);
    // Rows from the top: stages in chain order, then budget total and measured.
    let mut names: Vec<String> = b.lines.iter().map(|(n, _)| n.clone()).collect();
    names.push("budget total".to_string());
    names.push("measured".to_string());
    let y = Axis {
        lo: 0.0,
        hi: rows as f64,
        log: false,
        ticks: Vec::new(),
        title: String::new(),
    };
    let top = p.title(&b.title)?;
    let label_w = names
        .iter()
        .map(|n| p.text_width(n, 0.85))
        .max()
        .unwrap_or(0);
    let left = label_w + p.fpx(1.2);
    let right = p.w - p.fpx(1.2);
    let diff = b.measured_s - total;
    let pct = if total != 0.0 {
        100.0 * diff / total
    } else {
        0.0
    };
    let summary_note = format!(
        "budget {}, measured {} ({}{}, {pct:+.1} %)",
        format_si(total, "s", 4),
        format_si(b.measured_s, "s", 4),
        if diff >= 0.0 { "+" } else { "" },
        format_si(diff, "s", 3)
    );
    let note_y = top;
    let top = top + p.fpx(1.5);
    let f = Frame {
        x0: left,
        y0: top + p.fpx(0.3),
        x1: right,
        y1: p.h - bottom_margin(p),
        x,
        y,
    };
    p.label(
        &summary_note,
        (f.x0, note_y),
        0.9,
        TEXT,
        HPos::Left,
        VPos::Top,
    )?;
    f.draw(p, true)?;

    let row_h = (f.y1 - f.y0) as f64 / rows as f64;
    let bar_h = (row_h * 0.3).max(2.0) as i32;
    let mut start = 0.0;
    for (i, name) in names.iter().enumerate() {
        let (from, len, colour) = if i < b.lines.len() {
            let v = b.lines[i].1;
            let r = (start, v, palette::BLUE);
            start += v;
            r
        } else if i == b.lines.len() {
            (0.0, total, palette::SKY_BLUE)
        } else {
            (0.0, b.measured_s, palette::VERMILLION)
        };
        let cy = (f.y0 as f64 + (i as f64 + 0.5) * row_h).round() as i32;
        p.label(
            name,
            (f.x0 - p.fpx(0.4), cy),
            0.85,
            TEXT,
            HPos::Right,
            VPos::Center,
        )?;
        let (a, c) = (from.min(from + len), from.max(from + len));
        let xa = f.pt(a, 0.0).0;
        let xc = f.pt(c, 0.0).0.max(xa + 1);
        p.rect((xa, cy - bar_h), (xc, cy + bar_h), colour.to_rgba(), true)?;
        p.summary.series += 1;
        p.text(
            &format_si(len, "s", 3),
            (xc + p.fpx(0.3), cy),
            0.8,
            TEXT,
            HPos::Left,
            VPos::Center,
            false,
        )?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------------------
// Generic x-y
// ---------------------------------------------------------------------------------------------------------

fn draw_xy<DB: DrawingBackend>(p: &mut Painter<DB>, xy: &XyPlot) -> Result<(), Error> {
    for (name, xs, ys) in &xy.series {
        if xs.len() != ys.len() {
            return Err(Error::Run(format!(
                "plot: series '{name}' has {} x values but {} y values",
                xs.len(),
                ys.len()
            )));
        }
    }
    let usable = |x: f64| x.is_finite() && (!xy.log_x || x > 0.0);
    let mut xr = None;
    let mut yr = None;
    for (_, xs, ys) in &xy.series {
        for (&x, &y) in xs.iter().zip(ys.iter()) {
            if usable(x) && y.is_finite() {
                xr = merge(xr, Some((x, x)));
                yr = merge(yr, Some((y, y)));
            }
        }
    }
    for (x, _) in &xy.markers {
        if usable(*x) {
            xr = merge(xr, Some((*x, *x)));
        }
    }
    let (xu_q, xu) = split_label_unit(&xy.x_label);
    let (yu_q, yu) = split_label_unit(&xy.y_label);
    let x = if xy.log_x {
        let (lo, hi) = xr.unwrap_or((1.0, 10.0));
        Axis::logarithmic(xu_q, xu, lo, if hi > lo { hi } else { lo * 10.0 })
    } else {
        let (lo, hi) = xr.unwrap_or((0.0, 1.0));
        Axis::linear(xu_q, xu, lo, hi, 8)
    };
    let (ylo, yhi) = yr.unwrap_or((0.0, 1.0));
    let (ylo, yhi) = padded(ylo, yhi, 0.06);
    let y = Axis::linear(yu_q, yu, ylo, yhi, 6);

    let entries: Vec<(String, Key)> = xy
        .series
        .iter()
        .enumerate()
        .map(|(k, (name, _, _))| (name.to_string(), Key::Line(palette::SERIES[k % 8], 2)))
        .collect();
    let f = titled_frame(p, &xy.title, &entries, x, y)?;
    f.draw(p, true)?;
    for (x, label) in &xy.markers {
        if !usable(*x) {
            continue;
        }
        let px = f.pt(*x, f.y.lo).0;
        p.line((px, f.y0), (px, f.y1), palette::BLACK.to_rgba(), 1)?;
        p.summary.markers += 1;
        p.label(
            label,
            (px + p.fpx(0.3), f.y0 + p.fpx(0.3)),
            0.8,
            TEXT,
            HPos::Left,
            VPos::Top,
        )?;
    }
    for (k, (_, xs, ys)) in xy.series.iter().enumerate() {
        let c = palette::SERIES[k % 8];
        let pts: Vec<(f64, f64)> = xs
            .iter()
            .zip(ys.iter())
            .filter(|(x, y)| usable(**x) && y.is_finite())
            .map(|(&x, &y)| (f.px(x), f.py(y)))
            .collect();
        let monotonic = pts.windows(2).all(|w| w[1].0 >= w[0].0);
        let drawn: Vec<(i32, i32)> = if monotonic {
            to_pixels(&f, pts.iter().copied(), Reduce::MinMax)
        } else {
            pts.iter().map(|&q| clamp_pt(&f, q)).collect()
        };
        p.series_path(&drawn, c, 2)?;
        if pts.len() <= 60 {
            for &q in &pts {
                p.circle(clamp_pt(&f, q), (p.font_px * 0.22).max(2.0) as u32, c, true)?;
                p.summary.markers += 1;
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;
    use std::time::Instant;

    /// Minimal XML well-formedness check for what plotters emits: starts with `<svg`, every opened
    /// element is closed in order, attribute values are quoted, nothing after the root closes.
    fn assert_balanced_svg(svg: &str) {
        assert!(svg.starts_with("<svg"), "SVG must start with <svg");
        let mut stack: Vec<&str> = Vec::new();
        let mut rest = svg;
        let mut root_closed = false;
        while let Some(open) = rest.find('<') {
            assert!(
                !root_closed || rest[..open].trim().is_empty(),
                "content after </svg>"
            );
            let close = rest[open..].find('>').expect("unterminated tag") + open;
            let tag = &rest[open + 1..close];
            assert_eq!(
                tag.matches('"').count() % 2,
                0,
                "unbalanced quotes in <{tag}>"
            );
            if let Some(name) = tag.strip_prefix('/') {
                assert_eq!(stack.pop(), Some(name.trim()), "mismatched </{name}>");
                root_closed = stack.is_empty();
            } else if !tag.ends_with('/') {
                stack.push(tag.split_whitespace().next().unwrap());
            }
            rest = &rest[close + 1..];
        }
        assert!(stack.is_empty(), "unclosed elements: {stack:?}");
        assert!(root_closed, "no closing </svg>");
    }

    fn count(svg: &str, pat: &str) -> usize {
        svg.matches(pat).count()
    }

    /// Points of every `<polyline>` in document order.
    fn polylines(svg: &str) -> Vec<Vec<(i32, i32)>> {
        svg.split("<polyline")
            .skip(1)
            .map(|s| {
                let start = s.find("points=\"").unwrap() + 8;
                let end = start + s[start..].find('"').unwrap();
                s[start..end]
                    .split_whitespace()
                    .map(|p| {
                        let (x, y) = p.split_once(',').unwrap();
                        (x.parse().unwrap(), y.parse().unwrap())
                    })
                    .collect()
            })
            .collect()
    }

    /// Decode a PNG with the png crate; returns (width, height, RGB or RGBA bytes, channels).
    fn decode_png(bytes: &[u8]) -> (u32, u32, Vec<u8>, usize) {
        let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
        let mut reader = decoder.read_info().expect("PNG header decodes");
        let mut buf = vec![0; reader.output_buffer_size()];
        let info = reader.next_frame(&mut buf).expect("PNG frame decodes");
        buf.truncate(info.buffer_size());
        (info.width, info.height, buf, info.color_type.samples())
    }

    fn has_colour(rgb: &[u8], channels: usize, c: RGBColor) -> usize {
        rgb.chunks_exact(channels)
            .filter(|p| p[0] == c.0 && p[1] == c.1 && p[2] == c.2)
            .count()
    }

    struct WaveData {
        input: Vec<f64>,
        stage: Vec<f64>,
        output: Vec<f64>,
        instants: Vec<f64>,
        values: Vec<f64>,
        stair_t: Vec<f64>,
        stair_l: Vec<f64>,
    }

    /// A 1 kHz sine on a 1 MHz grid for 4 ms, a filtered copy, an output delayed by 50 µs, 48 kHz samples
    /// quantized to 10 mV and their hold levels.
    fn wave_data() -> WaveData {
        let dt = 1e-6;
        let n = 4000;
        let delay = 50e-6;
        let sine = |t: f64| 0.8 * (2.0 * PI * 1e3 * t).sin();
        let input: Vec<f64> = (0..n).map(|i| sine(i as f64 * dt)).collect();
        let stage: Vec<f64> = (0..n).map(|i| 0.95 * sine(i as f64 * dt - 10e-6)).collect();
        let output: Vec<f64> = (0..n).map(|i| sine(i as f64 * dt - delay)).collect();
        let instants: Vec<f64> = (0..192).map(|k| k as f64 / 48e3).collect();
        let values: Vec<f64> = instants
            .iter()
            .map(|&t| (sine(t) / 0.01).round() * 0.01)
            .collect();
        let stair_t: Vec<f64> = instants.iter().map(|t| t + 30e-6).collect();
        let stair_l = values.clone();
        WaveData {
            input,
            stage,
            output,
            instants,
            values,
            stair_t,
            stair_l,
        }
    }

    fn waveform(d: &WaveData) -> Plot<'_> {
        Plot::Waveform(WaveformPlot {
            title: "input against output".to_string(),
            t0_s: 0.0,
            dt_s: 1e-6,
            traces: vec![
                ("source", &d.input),
                ("anti-alias filter", &d.stage),
                ("output", &d.output),
            ],
            sample_instants_s: &d.instants[..96],
            sample_values_v: &d.values[..96],
            staircase: Some((&d.stair_t, &d.stair_l)),
            measured_delay_s: Some(50e-6),
            window_s: (0.0, 2e-3),
        })
    }

    fn spectrum_levels(n: usize) -> Vec<f64> {
        // A floor near -110 dBFS with a deterministic ripple, a full-scale line at bin 100 and small lines.
        let mut v: Vec<f64> = (0..n)
            .map(|k| -110.0 + 5.0 * ((k as f64) * 0.7).sin())
            .collect();
        v[100] = -0.5;
        v[200] = -80.0;
        v[n - 50] = -85.0;
        v
    }

    fn spectrum(levels: &[f64], log: bool) -> Plot<'_> {
        let bin = 10.0;
        Plot::Spectrum(SpectrumPlot {
            title: "output spectrum".to_string(),
            bin_hz: bin,
            level_dbfs: levels,
            fundamental_hz: Some(100.0 * bin),
            harmonics: vec![
                (2, 200.0 * bin, false),
                (3, (levels.len() - 50) as f64 * bin, true),
            ],
            images_hz: vec![(levels.len() - 200) as f64 * bin],
            band_hz: Some(2000.0),
            notes: vec!["SINAD 72.1 dB".to_string(), "ENOB 11.7 bit".to_string()],
            log_frequency: log,
        })
    }

    fn static_data() -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        let codes = 256;
        let dnl: Vec<f64> = (0..codes).map(|k| 0.3 * ((k as f64) * 1.3).sin()).collect();
        let mut inl = Vec::with_capacity(codes);
        let mut acc = 0.0;
        for d in &dnl {
            acc += d;
            inl.push(acc);
        }
        let transfer: Vec<f64> = (0..codes)
            .map(|k| (k as f64 + inl[k]) * 3.3 / 256.0)
            .collect();
        (transfer, dnl, inl)
    }

    fn budget_lines() -> Vec<(String, f64)> {
        vec![
            ("anti-alias filter".to_string(), 12e-6),
            ("sample and hold".to_string(), 0.5e-6),
            ("conversion".to_string(), 20.8e-6),
            ("link".to_string(), 8e-6),
            ("reconstruction".to_string(), 10e-6),
        ]
    }

    fn xy_data() -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        let x: Vec<f64> = (0..30).map(|k| 100.0 * 1.3f64.powi(k)).collect();
        let a: Vec<f64> = x.iter().map(|f| 74.0 - (f / 2e4).powi(2)).collect();
        let b: Vec<f64> = x.iter().map(|f| 70.0 - (f / 1e4).powi(2)).collect();
        (x, a, b)
    }

    fn xy<'a>(d: &'a (Vec<f64>, Vec<f64>, Vec<f64>)) -> Plot<'a> {
        Plot::Xy(XyPlot {
            title: "SINAD against input frequency".to_string(),
            x_label: "input frequency (Hz)".to_string(),
            y_label: "SINAD (dB)".to_string(),
            series: vec![("12-bit", &d.0, &d.1), ("10-bit", &d.0, &d.2)],
            log_x: true,
            markers: vec![(24e3, "Nyquist".to_string())],
        })
    }

    // ---- SI formatter ----

    #[test]
    fn si_prefix_follows_the_axis_span() {
        // Prefix powers are those of the SI (BIPM SI Brochure, 9th ed., table of SI prefixes; from memory);
        // choosing the prefix so the span reads 1..1000 is common practice, no source.
        assert_eq!(si_prefix_for_span(2e-3).symbol, "m");
        assert_eq!(si_prefix_for_span(1e-3).symbol, "m");
        assert_eq!(si_prefix_for_span(999e-6).symbol, "µ");
        assert_eq!(si_prefix_for_span(500e-6).symbol, "µ");
        assert_eq!(si_prefix_for_span(20e3).symbol, "k");
        assert_eq!(si_prefix_for_span(0.2).symbol, "m");
        assert_eq!(si_prefix_for_span(3.3).symbol, "");
        assert_eq!(si_prefix_for_span(2.5e6).symbol, "M");
        assert_eq!(si_prefix_for_span(40e-9).symbol, "n");
        assert_eq!(si_prefix_for_span(0.0), SiPrefix::NONE);
        assert_eq!(si_prefix_for_span(f64::NAN), SiPrefix::NONE);
    }

    #[test]
    fn plot_prefixes_are_those_of_the_scenario_units() {
        // Away from the decade edges the plot's prefix is exactly units::si_prefix's, from p to G.
        for e in -13..11 {
            for m in [1.5, 4.0, 30.0, 700.0] {
                let v = m * 10f64.powi(e);
                let p = si_prefix_for_value(v);
                let (factor, symbol) = units::si_prefix(v, "µ");
                assert_eq!(p.symbol, symbol, "{v}");
                assert_eq!(10f64.powi(p.exponent), factor, "{v}");
            }
        }
        // Out of range: clamped to p and G.
        assert_eq!(si_prefix_for_value(3e-15).symbol, "p");
        assert_eq!(si_prefix_for_value(3e13).symbol, "G");
        // A span that rounding left just below a power of ten keeps that decade's prefix.
        let one = 1.0 - f64::EPSILON / 2.0;
        assert_eq!(si_prefix_for_span(one), SiPrefix::NONE);
    }

    #[test]
    fn axis_titles_carry_the_prefixed_unit() {
        assert_eq!(axis_title("time", "s", 2e-3).0, "time (ms)");
        assert_eq!(axis_title("time", "s", 300e-6).0, "time (µs)");
        assert_eq!(axis_title("frequency", "Hz", 24e3).0, "frequency (kHz)");
        assert_eq!(axis_title("voltage", "V", 0.05).0, "voltage (mV)");
        assert_eq!(axis_title("level", "dBFS", 120.0).0, "level (dBFS)");
        assert_eq!(axis_title("code", "", 4095.0).0, "code");
        let (_, p) = axis_title("time", "s", 2e-3);
        assert!((1.5e-3 * p.scale() - 1.5).abs() < 1e-12);
    }

    #[test]
    fn values_are_written_with_prefix_and_significant_digits() {
        assert_eq!(format_si(12.34e-6, "s", 3), "12.3 µs");
        assert_eq!(format_si(1e3, "Hz", 4), "1.000 kHz");
        assert_eq!(format_si(-2.5e-3, "V", 2), "-2.5 mV");
        assert_eq!(format_si(72.14, "dB", 3), "72.1 dB");
        assert_eq!(format_si(0.0, "s", 3), "0 s");
    }

    #[test]
    fn linear_ticks_use_one_two_five_steps_and_scaled_labels() {
        let a = Axis::linear("time", "s", 0.0, 2e-3, 8);
        let labels: Vec<&str> = a.ticks.iter().map(|(_, s)| s.as_str()).collect();
        // 2 ms / 8 = 0.25 ms; the nearest 1-2-5 step (in ratio) is 0.2 ms.
        let want = [
            "0.0", "0.2", "0.4", "0.6", "0.8", "1.0", "1.2", "1.4", "1.6", "1.8", "2.0",
        ];
        assert_eq!(labels, want);
        assert_eq!(a.title, "time (ms)");
        let v = Axis::linear("voltage", "V", -0.9, 0.9, 6);
        let labels: Vec<&str> = v.ticks.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(
            labels,
            [
                "-0.8", "-0.6", "-0.4", "-0.2", "0.0", "0.2", "0.4", "0.6", "0.8"
            ]
        );
        assert_eq!(v.title, "voltage (V)");
        let m = Axis::linear("voltage", "V", -0.03, 0.05, 4);
        let labels: Vec<&str> = m.ticks.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(labels, ["-20", "0", "20", "40"]);
        assert_eq!(m.title, "voltage (mV)");
    }

    #[test]
    fn log_ticks_sit_on_decades_with_their_own_prefix() {
        let a = Axis::logarithmic("frequency", "Hz", 10.0, 1e6);
        let labels: Vec<&str> = a.ticks.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(labels, ["10", "100", "1k", "10k", "100k", "1M"]);
        assert_eq!(a.title, "frequency (Hz)");
    }

    #[test]
    fn label_units_are_split_from_the_quantity() {
        assert_eq!(
            split_label_unit("input frequency (Hz)"),
            ("input frequency", "Hz")
        );
        assert_eq!(split_label_unit("SINAD (dB)"), ("SINAD", "dB"));
        assert_eq!(split_label_unit("gain"), ("gain", ""));
    }

    // ---- decimation ----

    /// Slow oracle: the extreme values of every column.
    fn column_extremes(points: &[(f64, f64)]) -> Vec<(i64, f64, f64)> {
        let mut out: Vec<(i64, f64, f64)> = Vec::new();
        for &(x, y) in points {
            let c = x.floor() as i64;
            match out.last_mut() {
                Some(last) if last.0 == c => {
                    last.1 = last.1.min(y);
                    last.2 = last.2.max(y);
                }
                _ => out.push((c, y, y)),
            }
        }
        out
    }

    #[test]
    fn min_max_reduction_keeps_a_single_sample_spike() {
        // 100 000 points over 500 columns, flat except one sample up and one sample down.
        let n = 100_000;
        let mut pts: Vec<(f64, f64)> = (0..n)
            .map(|i| (i as f64 * 500.0 / n as f64, 300.0))
            .collect();
        pts[31_337].1 = 10.0;
        pts[77_777].1 = 590.0;
        let mut out = Vec::new();
        reduce_columns(pts.iter().copied(), Reduce::MinMax, &mut out);
        assert!(out.len() <= 2 * 500);
        assert!(out.iter().any(|p| p.1 == 10.0), "upward spike lost");
        assert!(out.iter().any(|p| p.1 == 590.0), "downward spike lost");
        // Every column keeps exactly its extremes (against the slow oracle).
        let oracle = column_extremes(&pts);
        let kept = column_extremes(&out);
        assert_eq!(oracle, kept);
        // Order of occurrence is kept: x never decreases.
        assert!(out.windows(2).all(|w| w[1].0 >= w[0].0));
    }

    #[test]
    fn max_reduction_keeps_spectral_peaks_and_short_series_pass_unchanged() {
        let mut pts: Vec<(f64, f64)> = (0..10_000).map(|i| (i as f64 / 100.0, 500.0)).collect();
        pts[4321].1 = 20.0; // a peak is a small pixel y
        let mut out = Vec::new();
        reduce_columns(pts.iter().copied(), Reduce::Max, &mut out);
        assert_eq!(out.len(), 100);
        assert!(out.contains(&pts[4321]));
        let short: Vec<(f64, f64)> = (0..50).map(|i| (i as f64 * 3.0, (i * i) as f64)).collect();
        let mut out = Vec::new();
        reduce_columns(short.iter().copied(), Reduce::MinMax, &mut out);
        assert_eq!(out, short);
    }

    #[test]
    fn long_waveform_keeps_its_spike_in_the_drawing() {
        let n = 1_000_000;
        let mut y = vec![0.0; n];
        y[500_001] = 1.0;
        let plot = Plot::Waveform(WaveformPlot {
            title: "spike".to_string(),
            t0_s: 0.0,
            dt_s: 1e-6,
            traces: vec![("only", &y)],
            sample_instants_s: &[],
            sample_values_v: &[],
            staircase: None,
            measured_delay_s: None,
            window_s: (0.0, 1.0),
        });
        let (svg, summary) = render_svg(&plot).unwrap();
        assert_eq!(summary.series, 1);
        let lines = polylines(&svg);
        assert_eq!(lines.len(), 1);
        let ys: Vec<i32> = lines[0].iter().map(|p| p.1).collect();
        let (top, bottom) = (*ys.iter().min().unwrap(), *ys.iter().max().unwrap());
        // Data range 0..1 padded by 6 % each side: the spike spans 1/1.12 of the frame height (>= 300 px).
        assert!(
            bottom - top > 300,
            "spike lost: pixel span {}",
            bottom - top
        );
        assert!(lines[0].len() <= 2 * SVG_SIZE.0 as usize);
    }

    // ---- rendering each kind ----

    fn check_svg(plot: &Plot, expect_series: usize) -> (String, PlotSummary) {
        let (svg, summary) = render_svg(plot).unwrap();
        assert_balanced_svg(&svg);
        assert_eq!(summary.series, expect_series);
        (svg, summary)
    }

    fn check_png(plot: &Plot, colour: RGBColor) {
        let (bytes, summary) = render_png(plot, 900, 560).unwrap();
        assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
        let (w, h, px, ch) = decode_png(&bytes);
        assert_eq!((w, h), (900, 560));
        // White background in the corner, and the main series colour present.
        assert_eq!(&px[..3], &[255, 255, 255]);
        assert!(has_colour(&px, ch, colour) > 50, "series colour not drawn");
        // Text was rasterised: dark pixels near the top centre (the title).
        let title_dark = (5..40)
            .flat_map(|y| (300..600).map(move |x| (y * w as usize + x) * ch))
            .filter(|&i| px[i] < 128 && px[i + 1] < 128 && px[i + 2] < 128)
            .count();
        assert!(title_dark > 30, "no title text in PNG");
        assert!(summary.series > 0);
    }

    #[test]
    fn waveform_renders_to_svg_and_png_with_its_series_and_markers() {
        let d = wave_data();
        let plot = waveform(&d);
        // Three traces and the staircase.
        let (svg, summary) = check_svg(&plot, 4);
        assert_eq!(count(&svg, "<polyline"), summary.series);
        // 96 sampling circles + 96 converted-value crosses + the delay arrow.
        assert_eq!(summary.markers, 2 * 96 + 1);
        assert_eq!(count(&svg, "<circle"), 96 + 1); // plus the legend key
        for l in [
            "time (ms)",
            "voltage (V)",
            "measured delay 50.00 µs",
            "delay 50.0 µs",
            "source",
            "output",
        ] {
            assert!(
                summary.labels.iter().any(|s| s == l),
                "missing label {l}: {:?}",
                summary.labels
            );
        }
        assert!(svg.contains("font-family=\"sans-serif\""));
        check_png(&plot, palette::VERMILLION);
    }

    #[test]
    fn spectrum_renders_with_marks_notes_and_folded_harmonics() {
        let levels = spectrum_levels(2401);
        for log in [false, true] {
            let plot = spectrum(&levels, log);
            let (svg, summary) = check_svg(&plot, 1);
            assert_eq!(count(&svg, "<polyline"), 1);
            // fundamental, two harmonics, one image, band edge.
            assert_eq!(summary.markers, 5);
            assert_eq!(count(&svg, "<polygon"), 1);
            let want = [
                "2f",
                "3f (folded)",
                "image",
                "SINAD 72.1 dB",
                "f0 1.000 kHz",
                "level (dBFS)",
            ];
            for l in want {
                assert!(
                    summary.labels.iter().any(|s| s == l),
                    "missing {l}: {:?}",
                    summary.labels
                );
            }
            let x_title = if log {
                "frequency (Hz)"
            } else {
                "frequency (kHz)"
            };
            assert!(summary.labels.iter().any(|s| s == x_title));
            check_png(&plot, palette::BLUE);
        }
    }

    #[test]
    fn static_plot_renders_three_panels() {
        let (t, d, i) = static_data();
        let plot = Plot::Static(StaticPlot {
            title: "static transfer".to_string(),
            transfer_v: &t,
            dnl_lsb: &d,
            inl_lsb: &i,
        });
        let (svg, summary) = check_svg(&plot, 3);
        assert_eq!(count(&svg, "<polyline"), 3);
        assert!(summary.labels.iter().any(|s| s == "DNL (LSB)"));
        assert!(summary.labels.iter().any(|s| s == "INL (LSB)"));
        assert!(summary.labels.iter().any(|s| s == "level (V)"));
        assert!(summary.labels.iter().any(|s| s == "code"));
        check_png(&plot, palette::BLUE);
        // Without INL only two panels are drawn.
        let plot = Plot::Static(StaticPlot {
            title: "static transfer".to_string(),
            transfer_v: &t,
            dnl_lsb: &d,
            inl_lsb: &[],
        });
        check_svg(&plot, 2);
    }

    #[test]
    fn budget_renders_one_bar_per_stage_plus_two_totals() {
        let lines = budget_lines();
        let plot = Plot::Budget(BudgetPlot {
            title: "latency budget".to_string(),
            lines: &lines,
            measured_s: 53.1e-6,
        });
        let (svg, summary) = check_svg(&plot, lines.len() + 2);
        assert_eq!(count(&svg, "<polyline"), 0);
        let palette_bars = svg
            .split("<rect")
            .skip(1)
            .filter(|r| !r.contains("fill=\"none\"") && !r.contains("fill=\"#FFFFFF\""))
            .count();
        assert_eq!(palette_bars, summary.series);
        assert!(
            summary.labels.iter().any(|s| s == "time (µs)"),
            "{:?}",
            summary.labels
        );
        assert!(
            summary
                .labels
                .iter()
                .any(|s| s.starts_with("budget 51.30 µs, measured 53.10 µs"))
        );
        check_png(&plot, palette::BLUE);
    }

    #[test]
    fn xy_renders_series_points_and_marker_lines() {
        let d = xy_data();
        let plot = xy(&d);
        let (svg, summary) = check_svg(&plot, 2);
        assert_eq!(count(&svg, "<polyline"), 2);
        // 30 points per series drawn as dots, plus one vertical marker line.
        assert_eq!(summary.markers, 2 * 30 + 1);
        for l in [
            "input frequency (Hz)",
            "SINAD (dB)",
            "Nyquist",
            "12-bit",
            "10-bit",
        ] {
            assert!(summary.labels.iter().any(|s| s == l), "missing {l}");
        }
        check_png(&plot, palette::VERMILLION);
    }

    #[test]
    fn text_with_markup_characters_is_escaped() {
        let d = xy_data();
        let mut plot = xy(&d);
        if let Plot::Xy(x) = &mut plot {
            x.title = "gain < 1 & phase > 0".to_string();
        }
        let (svg, _) = render_svg(&plot).unwrap();
        assert_balanced_svg(&svg);
        assert!(svg.contains("gain &lt; 1 &amp; phase &gt; 0"));
    }

    #[test]
    fn bad_inputs_are_refused() {
        let y = [0.0; 10];
        let mk = |dt: f64, window: (f64, f64), vals: &'static [f64]| {
            Plot::Waveform(WaveformPlot {
                title: String::new(),
                t0_s: 0.0,
                dt_s: dt,
                traces: vec![("a", &y)],
                sample_instants_s: &[0.0],
                sample_values_v: vals,
                staircase: None,
                measured_delay_s: None,
                window_s: window,
            })
        };
        assert!(render_svg(&mk(0.0, (0.0, 1.0), &[0.0])).is_err());
        assert!(render_svg(&mk(1.0, (1.0, 1.0), &[0.0])).is_err());
        assert!(render_svg(&mk(1.0, (0.0, 1.0), &[])).is_err());
        assert!(render_svg(&mk(1.0, (0.0, 1.0), &[0.0])).is_ok());
        assert!(
            render_png(&mk(1.0, (0.0, 1.0), &[0.0]), 10, 10)
                .unwrap_err()
                .is_bad_input()
        );
    }

    // ---- speed ----

    /// Seconds this thread has run on a CPU (Linux: /proc/thread-self/schedstat), so a speed bound is not
    /// broken by other work sharing the machine; wall-clock seconds elsewhere.
    fn busy_s(wall: Instant) -> f64 {
        std::fs::read_to_string("/proc/thread-self/schedstat")
            .ok()
            .and_then(|s| s.split_whitespace().next()?.parse::<f64>().ok())
            .map(|ns| ns * 1e-9)
            .unwrap_or_else(|| wall.elapsed().as_secs_f64())
    }

    #[test]
    fn million_point_waveform_and_spectrum_render_quickly() {
        let n = 1_000_000;
        let input: Vec<f64> = (0..n)
            .map(|i| {
                (2.0 * PI * 997.0 * i as f64 * 1e-6).sin()
                    + 0.01 * ((i * 7919 % 1000) as f64 / 1000.0)
            })
            .collect();
        let output: Vec<f64> = input.iter().map(|v| 0.9 * v).collect();
        let plot = Plot::Waveform(WaveformPlot {
            title: "one million points".to_string(),
            t0_s: 0.0,
            dt_s: 1e-6,
            traces: vec![("in", &input), ("out", &output)],
            sample_instants_s: &[],
            sample_values_v: &[],
            staircase: None,
            measured_delay_s: Some(1e-5),
            window_s: (0.0, 1.0),
        });
        let levels = spectrum_levels(n);
        let spec = spectrum(&levels, true);
        let wall = Instant::now();
        let start = busy_s(wall);
        render_png(&plot, 1200, 700).unwrap();
        render_svg(&plot).unwrap();
        let wave_s = busy_s(wall) - start;
        let start = busy_s(wall);
        let (svg, _) = render_svg(&spec).unwrap();
        render_png(&spec, 1200, 700).unwrap();
        let spec_s = busy_s(wall) - start;
        assert!(polylines(&svg)[0].len() <= SVG_SIZE.0 as usize + 1);
        // The 1 s bound is the task's requirement for release builds; debug builds only get a loose bound.
        let bound = if cfg!(debug_assertions) { 20.0 } else { 1.0 };
        assert!(wave_s < bound, "waveform took {wave_s:.3} s");
        assert!(spec_s < bound, "spectrum took {spec_s:.3} s");
    }

    /// Writes one PNG and one SVG of each kind to $TMPDIR/convchain-plots for a visual check:
    /// `cargo test --release --lib report::plot -- --ignored`.
    #[test]
    #[ignore]
    fn gallery_is_written_for_a_visual_check() {
        let dir = std::env::temp_dir().join("convchain-plots");
        std::fs::create_dir_all(&dir).unwrap();
        let d = wave_data();
        let levels = spectrum_levels(2401);
        let (t, dn, i) = static_data();
        let lines = budget_lines();
        let xyd = xy_data();
        let plots = [
            ("waveform", waveform(&d)),
            ("spectrum", spectrum(&levels, false)),
            ("spectrum_log", spectrum(&levels, true)),
            (
                "static",
                Plot::Static(StaticPlot {
                    title: "static transfer".to_string(),
                    transfer_v: &t,
                    dnl_lsb: &dn,
                    inl_lsb: &i,
                }),
            ),
            (
                "budget",
                Plot::Budget(BudgetPlot {
                    title: "latency budget".to_string(),
                    lines: &lines,
                    measured_s: 53.1e-6,
                }),
            ),
            ("xy", xy(&xyd)),
        ];
        for (name, plot) in &plots {
            let (png_bytes, _) = render_png(plot, 1200, 750).unwrap();
            std::fs::write(dir.join(format!("{name}.png")), png_bytes).unwrap();
            let (svg, _) = render_svg(plot).unwrap();
            std::fs::write(dir.join(format!("{name}.svg")), svg).unwrap();
        }
    }
}
