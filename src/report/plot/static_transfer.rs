//! The static figure: transfer curve, DNL and INL of a converter.

use plotters::backend::DrawingBackend;
use plotters::style::text_anchor::{HPos, VPos};
use plotters::style::{Color, RGBColor};

use crate::Error;

use super::axis::{Axis, Frame, bottom_margin, finite_range, left_margin, padded};
use super::painter::{FRAME, Painter, TEXT, palette};
use super::reduce::{Reduce, to_pixels};
use super::{StaticPlot, format_si};

pub(super) fn draw_static<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    s: &StaticPlot,
) -> Result<(), Error> {
    let panels: Vec<(&str, &str, &[f64], RGBColor)> = [
        (s.transfer_label.as_str(), "V", s.transfer_v, palette::BLUE),
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
            below: 0,
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
