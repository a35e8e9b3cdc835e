//! The spectrum figure: the power spectrum with harmonics, spurs and the measured figures.

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::axis::{Axis, Frame, finite_range, titled_frame};
use super::painter::{GRID, Key, Painter, TEXT, WHITE, palette, rgba};
use super::reduce::{Reduce, to_pixels};
use super::{SpectrumPlot, format_si};

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
pub(super) fn notes_box<DB: DrawingBackend>(
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
