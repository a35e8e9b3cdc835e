//! The spectrum figure: the power spectrum under a 0 dBFS top, the fundamental, harmonics, hold images and
//! the analysis band's edge marked along the frequency axis (ticks and short labels, so no mark covers the
//! trace), and the measured figures in a strip under the plot.

use plotters::backend::DrawingBackend;
use plotters::style::text_anchor::{HPos, VPos};
use plotters::style::{Color, RGBColor};

use crate::Error;
use crate::format::units::format_si_table;

use super::SpectrumPlot;
use super::axis::{Axis, Frame, bottom_margin, finite_range, left_margin};
use super::painter::{Key, Painter, TEXT, palette, rgba};
use super::reduce::{Reduce, to_pixels};

pub(super) fn draw_spectrum<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    s: &SpectrumPlot,
) -> Result<(), Error> {
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
    // The overlay's bins up to the plot's top frequency (its own may reach higher: a faster capture).
    let overlay = match &s.overlay {
        Some(o) if o.bin_hz > 0.0 && o.bin_hz.is_finite() => {
            let top = ((f_top / o.bin_hz).floor() as usize + 1).min(o.level_dbfs.len());
            Some((o, &o.level_dbfs[..top]))
        }
        Some(o) => {
            return Err(Error::Run(format!(
                "plot: overlay bin spacing {} Hz must be positive",
                o.bin_hz
            )));
        }
        None => None,
    };
    let (y_lo, y_hi) = match overlay {
        Some((_, lv)) if lv.len() > first_bin => {
            let (a_lo, a_hi) = level_range(&s.level_dbfs[first_bin..]);
            let (b_lo, b_hi) = level_range(&lv[first_bin..]);
            (a_lo.min(b_lo).max(a_hi.max(b_hi) - 200.0), a_hi.max(b_hi))
        }
        _ => level_range(&s.level_dbfs[first_bin..]),
    };
    let x = if s.log_frequency {
        Axis::logarithmic("frequency", "Hz", s.bin_hz, f_top)
    } else {
        Axis::linear("frequency", "Hz", 0.0, f_top, 8)
    };
    let y = Axis::linear("level", "dBFS", y_lo, y_hi, 8);
    // The band is shown only where it cuts the plot short.
    let band = s.band_hz.filter(|&b| b.is_finite() && b > 0.0 && b < f_top);
    let visible_on =
        |a: &Axis, hz: f64| hz.is_finite() && hz >= a.lo && hz <= a.hi && (!a.log || hz > 0.0);

    // Marks along the frequency axis, in order of importance (a label that finds no room is left out,
    // its tick stays).
    let mut marks: Vec<Mark> = Vec::new();
    if let Some(f0) = s.fundamental_hz.filter(|&h| visible_on(&x, h)) {
        marks.push(Mark {
            hz: f0,
            text: "f0".into(),
            colour: palette::VERMILLION,
        });
    }
    if let Some(b) = band {
        marks.push(Mark {
            hz: b,
            text: format!("band {}", format_si_table(b, "Hz")),
            colour: palette::BLUE,
        });
    }
    for &(order, hz, folded) in &s.harmonics {
        if visible_on(&x, hz) {
            marks.push(Mark {
                hz,
                text: if folded {
                    format!("{order}*")
                } else {
                    order.to_string()
                },
                colour: HARMONIC,
            });
        }
    }
    for &hz in &s.images_hz {
        if visible_on(&x, hz) {
            marks.push(Mark {
                hz,
                text: "img".into(),
                colour: palette::REDDISH_PURPLE,
            });
        }
    }

    let mut entries = match overlay {
        Some((o, _)) => vec![
            (o.first_label.clone(), Key::Line(palette::BLUE, 1)),
            (o.label.clone(), Key::Line(OVERLAY, 1)),
        ],
        None => vec![("spectrum".to_string(), Key::Line(palette::BLUE, 1))],
    };
    if band.is_some() {
        entries.push(("analysis band".to_string(), Key::Shade(palette::SKY_BLUE)));
    }
    if marks.iter().any(|m| m.colour == palette::VERMILLION) {
        entries.push((
            "f0: fundamental".to_string(),
            Key::Tick(palette::VERMILLION),
        ));
    }
    if marks.iter().any(|m| m.colour == HARMONIC) {
        let name = if s.harmonics.iter().any(|h| h.2) {
            "harmonic order (* folded)"
        } else {
            "harmonic order"
        };
        entries.push((name.to_string(), Key::Tick(HARMONIC)));
    }
    if marks.iter().any(|m| m.colour == palette::REDDISH_PURPLE) {
        entries.push((
            "img: hold image".to_string(),
            Key::Tick(palette::REDDISH_PURPLE),
        ));
    }

    // Layout: title, legend, frame, the marks' rows under it, tick labels, x title, then the strip.
    let top = p.title(&s.title)?;
    let left = left_margin(p, &y);
    let right = p.w - p.fpx(1.2);
    let top = p.legend(&entries, left, top, right - left)?;
    let strip = strip_lines(p, &s.notes, right - left - 2 * p.fpx(0.6));
    let line_h = p.fpx(1.35);
    let strip_h = if strip.is_empty() {
        0
    } else {
        line_h * strip.len() as i32 + p.fpx(0.6)
    };
    let tick_len = p.fpx(0.45);
    let mark_row = p.fpx(1.05);
    // Each mark's label goes in the first row where it overlaps no other (None: no room, tick only).
    let pad = p.fpx(0.25);
    let mut rows: Vec<Vec<(i32, i32)>> = vec![Vec::new(); MARK_ROWS];
    let placed: Vec<Option<(usize, i32)>> = marks
        .iter()
        .map(|m| {
            let px = (left as f64 + x.frac(m.hz) * (right - left) as f64).round() as i32;
            let w = p.text_width(&m.text, 0.75);
            let cx = px.clamp(left + w / 2, right - w / 2);
            let span = (cx - w / 2 - pad, cx + w / 2 + pad);
            let r = rows
                .iter()
                .position(|row| row.iter().all(|&(a, b)| span.1 <= a || span.0 >= b))?;
            rows[r].push(span);
            Some((r, cx))
        })
        .collect();
    let rows_used = rows.iter().filter(|r| !r.is_empty()).count() as i32;
    let below = if marks.is_empty() {
        0
    } else {
        tick_len + rows_used.max(1) * mark_row
    };
    let y1 = p.h - bottom_margin(p) - below - strip_h;
    let f = Frame {
        x0: left,
        y0: top + p.fpx(0.3),
        x1: right,
        y1,
        x,
        y,
        below,
    };

    if let Some(b) = band {
        let a = f.pt(f.x.lo, f.y.hi);
        let c = f.pt(b, f.y.lo);
        p.rect(a, c, rgba(palette::SKY_BLUE, 0.15), true)?;
    }
    f.draw(p, true)?;
    if let Some(b) = band {
        let bx = f.pt(b, f.y.lo).0;
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
    if let Some((o, lv)) = overlay {
        let pts = to_pixels(
            &f,
            (first_bin..lv.len()).map(|k| {
                let l = lv[k];
                let l = if l.is_finite() {
                    l.clamp(floor, f.y.hi)
                } else {
                    floor
                };
                (f.px(k as f64 * o.bin_hz), f.py(l))
            }),
            Reduce::Max,
        );
        p.series_path(&pts, OVERLAY, 1)?;
    }

    // Ticks from the frame's bottom edge down, labels in their rows under them.
    for (m, at) in marks.iter().zip(&placed) {
        let px = f.pt(m.hz, f.y.lo).0;
        p.line((px, f.y1), (px, f.y1 + tick_len), m.colour.to_rgba(), 2)?;
        p.summary.markers += 1;
        if let Some((r, cx)) = *at {
            let ty = f.y1 + tick_len + r as i32 * mark_row;
            p.label(&m.text, (cx, ty), 0.75, m.colour, HPos::Center, VPos::Top)?;
        }
    }

    // The strip of figures under the x title.
    if !strip.is_empty() {
        let y0 = p.h - strip_h;
        p.rect((f.x0, y0), (f.x1, p.h - 1), STRIP.to_rgba(), true)?;
        let gap = p.fpx(1.6);
        for (i, line) in strip.iter().enumerate() {
            let mut x = f.x0 + p.fpx(0.6);
            let y = y0 + p.fpx(0.3) + i as i32 * line_h;
            for item in line {
                p.label(item, (x, y), 0.9, TEXT, HPos::Left, VPos::Top)?;
                x += p.text_width(item, 0.9) + gap;
            }
        }
    }
    Ok(())
}

/// The level axis' range, dBFS: topped at 0 dBFS, the full scale (only a line over full scale lifts the top to
/// the next 10 dB so its peak shows), down to the lowest level (at most 200 dB, at least 20 dB below).
pub(super) fn level_range(levels: &[f64]) -> (f64, f64) {
    let (lmin, mut lmax) = finite_range(levels).unwrap_or((-120.0, 0.0));
    // The DC lobe (the first three bins, as the meters leave it out) does not lift the top: a unipolar
    // signal's mean may stand above a full-scale sine's peak. Its trace is then clipped at the top.
    if levels.len() > 6 {
        lmax = finite_range(&levels[3..]).map_or(lmax, |r| r.1);
    }
    let y_hi = if lmax <= 0.0 {
        0.0
    } else {
        (lmax / 10.0).ceil() * 10.0
    };
    let y_lo = ((lmin / 10.0).floor() * 10.0)
        .max(y_hi - 200.0)
        .min(y_hi - 20.0);
    (y_lo, y_hi)
}

/// Rows of the marks' labels under the frequency axis.
const MARK_ROWS: usize = 2;

/// Colour of the harmonics' marks: the Okabe-Ito orange darkened so small digits read on white.
const HARMONIC: RGBColor = RGBColor(0xB0, 0x70, 0x00);

/// Colour of an overlaid second trace: the Okabe-Ito vermillion, against the first trace's blue.
const OVERLAY: RGBColor = palette::VERMILLION;

/// Background of the strip of figures.
const STRIP: RGBColor = RGBColor(0xF2, 0xF2, 0xF2);

/// A mark along the frequency axis.
struct Mark {
    hz: f64,
    text: String,
    colour: RGBColor,
}

/// The strip's items laid out in lines no wider than `width` px.
fn strip_lines<DB: DrawingBackend>(
    p: &Painter<DB>,
    notes: &[String],
    width: i32,
) -> Vec<Vec<String>> {
    let gap = p.fpx(1.6);
    let mut lines: Vec<Vec<String>> = Vec::new();
    let mut used = 0;
    for n in notes {
        let w = p.text_width(n, 0.9);
        match lines.last_mut() {
            Some(line) if used + gap + w <= width => {
                line.push(n.clone());
                used += gap + w;
            }
            _ => {
                lines.push(vec![n.clone()]);
                used = w;
            }
        }
    }
    lines
}
