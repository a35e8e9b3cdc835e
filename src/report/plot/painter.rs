//! Drawing primitives on a plotters backend: the palette, the embedded font, text measurement and the
//! `Painter` that draws lines, markers, bars, text and legends and counts what it drew.

use std::sync::OnceLock;

use ab_glyph::{Font, FontRef, PxScale, ScaleFont};
use plotters::backend::DrawingBackend;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use plotters::style::{
    Color, FontStyle, FontTransform, IntoFont, RGBAColor, RGBColor, ShapeStyle, TextStyle,
};

use crate::Error;

use super::PlotSummary;

// ---------------------------------------------------------------------------------------------------------

/// The Okabe-Ito colours.
pub(super) mod palette {
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

pub(super) const WHITE: RGBColor = RGBColor(255, 255, 255);
pub(super) const GRID: RGBColor = RGBColor(0xDD, 0xDD, 0xDD);
pub(super) const FRAME: RGBColor = RGBColor(0x55, 0x55, 0x55);
pub(super) const TEXT: RGBColor = RGBColor(0x22, 0x22, 0x22);
pub(super) const FONT_FAMILY: &str = "sans-serif";

pub(super) static FONT_READY: OnceLock<bool> = OnceLock::new();

/// Register the embedded font once per process.
pub(super) fn ensure_font() -> Result<(), Error> {
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
pub(super) fn embedded_font() -> &'static FontRef<'static> {
    static FONT: OnceLock<FontRef<'static>> = OnceLock::new();
    FONT.get_or_init(|| {
        // The bytes are a fixed font compiled into the binary; `ensure_font` has already parsed them.
        FontRef::try_from_slice(ttf_noto_sans::REGULAR).expect("embedded Noto Sans parses")
    })
}

/// Advance width of a line of text, px (with kerning).
pub(super) fn text_advance<F: Font, S: ScaleFont<F>>(scaled: &S, s: &str) -> f32 {
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

pub(super) fn draw_err<E: std::fmt::Display>(e: E) -> Error {
    Error::Run(format!("plot: drawing failed: {e}"))
}

pub(super) fn rgba(c: RGBColor, alpha: f64) -> RGBAColor {
    c.mix(alpha)
}

/// Key drawn in front of a legend entry.
#[derive(Clone, Copy)]
pub(super) enum Key {
    Line(RGBColor, u32),
    Circle(RGBColor),
    Cross(RGBColor),
    Shade(RGBColor),
    /// A short vertical tick (marks along an axis).
    Tick(RGBColor),
    /// No key: the entry is a note.
    None,
}

/// Thin wrapper over a backend: pixel-space primitives plus the running summary.
pub(super) struct Painter<'b, DB: DrawingBackend> {
    pub(super) db: &'b mut DB,
    pub(super) w: i32,
    pub(super) h: i32,
    /// Base font size, px.
    pub(super) font_px: f64,
    /// Rasterise text here (bitmaps) rather than emitting text elements (SVG).
    pub(super) raster_text: bool,
    /// Scratch for glyph coverage: (x, y, coverage) in text-box pixels.
    pub(super) glyph_pixels: Vec<(f32, f32, f32)>,
    pub(super) summary: PlotSummary,
}

impl<'b, DB: DrawingBackend> Painter<'b, DB> {
    /// `raster_text`: draw text as pixels with the embedded font (bitmaps) instead of text elements (SVG).
    pub(super) fn new(db: &'b mut DB, raster_text: bool) -> Self {
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

    pub(super) fn style(color: RGBAColor, width: u32, filled: bool) -> ShapeStyle {
        ShapeStyle {
            color,
            filled,
            stroke_width: width,
        }
    }

    pub(super) fn line(
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
    pub(super) fn series_path(
        &mut self,
        pts: &[(i32, i32)],
        color: RGBColor,
        width: u32,
    ) -> Result<(), Error> {
        self.summary.series += 1;
        if pts.is_empty() {
            return Ok(());
        }
        if self.raster_text && width > 1 {
            // The bitmap backend joins thick segments with unlimited miters, so a dense zigzag (a noisy
            // trace) throws spikes far outside the frame; `width` one-pixel paths stacked vertically draw the
            // same thick line with no joins.
            for k in 0..width as i32 {
                let dy = k - (width as i32 - 1) / 2;
                self.db
                    .draw_path(
                        pts.iter().map(|&(x, y)| (x, y + dy)),
                        &Self::style(color.to_rgba(), 1, false),
                    )
                    .map_err(draw_err)?;
            }
            return Ok(());
        }
        self.db
            .draw_path(
                pts.iter().copied(),
                &Self::style(color.to_rgba(), width, false),
            )
            .map_err(draw_err)
    }

    pub(super) fn rect(
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

    pub(super) fn circle(
        &mut self,
        c: (i32, i32),
        r: u32,
        color: RGBColor,
        fill: bool,
    ) -> Result<(), Error> {
        self.db
            .draw_circle(c, r, &Self::style(color.to_rgba(), 1, fill), fill)
            .map_err(draw_err)
    }

    pub(super) fn cross(&mut self, c: (i32, i32), r: i32, color: RGBColor) -> Result<(), Error> {
        let s = color.to_rgba();
        self.line((c.0 - r, c.1 - r), (c.0 + r, c.1 + r), s, 1)?;
        self.line((c.0 - r, c.1 + r), (c.0 + r, c.1 - r), s, 1)
    }

    pub(super) fn text_style(
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
    pub(super) fn text(
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
    pub(super) fn label(
        &mut self,
        s: &str,
        at: (i32, i32),
        rel: f64,
        color: RGBColor,
        h: HPos,
        v: VPos,
    ) -> Result<(), Error> {
        self.summary.labels.push(s.to_string());
        let b = self.text_box(s, at, rel, h, v);
        self.summary.label_boxes.push(b);
        self.text(s, at, rel, color, h, v, false)
    }

    /// Pixel box (left, top, right, bottom) of a line of text anchored at `at` by (h, v).
    pub(super) fn text_box(
        &self,
        s: &str,
        at: (i32, i32),
        rel: f64,
        h: HPos,
        v: VPos,
    ) -> (i32, i32, i32, i32) {
        let w = self.text_width(s, rel);
        let ht = self.text_height(rel);
        let x0 = match h {
            HPos::Left => at.0,
            HPos::Center => at.0 - w / 2,
            HPos::Right => at.0 - w,
        };
        let y0 = match v {
            VPos::Top => at.1,
            VPos::Center => at.1 - ht / 2,
            VPos::Bottom => at.1 - ht,
        };
        (x0, y0, x0 + w, y0 + ht)
    }

    /// Height of a line of text (ascent to descent), px.
    pub(super) fn text_height(&self, rel: f64) -> i32 {
        let scaled = embedded_font().as_scaled(PxScale::from((self.font_px * rel) as f32));
        (scaled.ascent() - scaled.descent()).ceil() as i32
    }

    pub(super) fn text_width(&self, s: &str, rel: f64) -> i32 {
        let scaled = embedded_font().as_scaled(PxScale::from((self.font_px * rel) as f32));
        text_advance(&scaled, s).ceil() as i32
    }

    /// Rasterise text with the embedded font, glyph by glyph with their bearings and kerning, blending
    /// coverage into the backend's pixels. (The bitmap text path of plotters 0.3.7 drops each glyph's
    /// left bearing, which squeezes spaces; vector output keeps `<text>` elements.)
    #[allow(clippy::too_many_arguments)]
    pub(super) fn raster_text(
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
    pub(super) fn label_above(
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

    pub(super) fn fpx(&self, rel: f64) -> i32 {
        (self.font_px * rel).round() as i32
    }

    pub(super) fn background(&mut self) -> Result<(), Error> {
        let (w, h) = (self.w, self.h);
        self.rect((0, 0), (w, h), WHITE.to_rgba(), true)
    }

    /// Title centred at the top; returns the y below it.
    pub(super) fn title(&mut self, s: &str) -> Result<i32, Error> {
        let y = self.fpx(0.6);
        let x = self.w / 2;
        self.label(s, (x, y), 1.2, TEXT, HPos::Center, VPos::Top)?;
        Ok(y + self.fpx(1.2 * 1.35))
    }

    /// Legend laid out in rows from (x0, y) within width `w`; returns the y below it.
    pub(super) fn legend(
        &mut self,
        entries: &[(String, Key)],
        x0: i32,
        y: i32,
        w: i32,
    ) -> Result<i32, Error> {
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
            let key_w = if matches!(key, Key::None) {
                -gap
            } else {
                key_w
            };
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
                Key::Tick(c) => {
                    let r = self.fpx(0.45);
                    self.line((mid.0, yy - r), (mid.0, yy + r), c.to_rgba(), 2)?;
                }
                Key::Shade(c) => {
                    let r = self.fpx(0.4);
                    self.rect((x, yy - r), (x + key_w, yy + r), rgba(c, 0.25), true)?;
                }
                Key::None => {}
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
