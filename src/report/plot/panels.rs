//! The panels figure (the limit finder): one panel per criterion over a shared x axis, each with its metric,
//! its threshold line and where it is met, and a table under the panels (the ablation at the limit).
//! Every text has a row of its own (panel headings above their panels, the table below), so none can
//! cover a trace or another text.

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::axis::{Axis, Frame, bottom_margin, finite_range, left_margin, merge, padded};
use super::painter::{FRAME, GRID, Painter, TEXT, palette};
use super::reduce::{Reduce, to_pixels};
use super::{PanelsPlot, split_label_unit};

pub(super) fn draw_panels<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    s: &PanelsPlot,
) -> Result<(), Error> {
    if s.panels.is_empty() {
        return Err(Error::Run(
            "plot: a panels figure needs a panel".to_string(),
        ));
    }
    for q in &s.panels {
        if q.x.len() != q.y.len() {
            return Err(Error::Run(format!(
                "plot: panel '{}' has {} x values but {} y values",
                q.heading,
                q.x.len(),
                q.y.len()
            )));
        }
    }
    let usable = |x: f64| x.is_finite() && (!s.log_x || x > 0.0);
    let mut xr = None;
    for q in &s.panels {
        for &x in q.x.iter().filter(|x| usable(**x)) {
            xr = merge(xr, Some((x, x)));
        }
    }
    let (xq, xu) = split_label_unit(&s.x_label);
    let (lo, hi) = xr.unwrap_or((1.0, 10.0));
    let x_axis = if s.log_x {
        Axis::logarithmic(xq, xu, lo, if hi > lo { hi } else { lo * 10.0 })
    } else {
        Axis::linear(xq, xu, lo, hi, 8)
    };
    let in_x = |v: f64| usable(v) && v >= x_axis.lo && v <= x_axis.hi;

    let y_axes: Vec<Axis> = s
        .panels
        .iter()
        .map(|q| {
            let mut r = finite_range(q.y);
            if let Some(t) = q.threshold.filter(|t| t.is_finite()) {
                r = merge(r, Some((t, t)));
            }
            let (a, b) = r.unwrap_or((0.0, 1.0));
            let (a, b) = padded(a, b, 0.08);
            let (yq, yu) = split_label_unit(&q.y_label);
            Axis::linear(yq, yu, a, b, 4)
        })
        .collect();

    let top = p.title(&s.title)?;
    let left = y_axes.iter().map(|a| left_margin(p, a)).max().unwrap_or(0);
    let right = p.w - p.fpx(1.2);
    // The table's height: a title line, a header and one line per row.
    let line_h = p.fpx(1.3);
    let table_h = if s.table.is_empty() {
        0
    } else {
        line_h * (s.table.len() as i32 + 1) + p.fpx(0.8)
    };
    let bottom = p.h - bottom_margin(p) - table_h;
    let head_h = p.fpx(1.3);
    let gap = p.fpx(0.5);
    let np = s.panels.len() as i32;
    let ph = ((bottom - top - np * head_h - (np - 1) * gap) / np).max(p.fpx(3.0));
    let mut y0 = top;
    for (i, (q, y)) in s.panels.iter().zip(y_axes).enumerate() {
        p.label(
            &q.heading,
            (left, y0 + head_h / 2),
            0.9,
            TEXT,
            HPos::Left,
            VPos::Center,
        )?;
        let f = Frame {
            x0: left,
            y0: y0 + head_h,
            x1: right,
            y1: y0 + head_h + ph,
            x: x_axis.clone(),
            y,
            below: 0,
        };
        let last = i as i32 == np - 1;
        f.draw(p, last)?;
        if let Some(t) = q.threshold.filter(|t| t.is_finite()) {
            let ty = f.pt(f.x.lo, t).1;
            // A dashed threshold line.
            let dash = p.fpx(0.6);
            let mut x = f.x0;
            while x < f.x1 {
                let e = (x + dash).min(f.x1);
                p.line((x, ty), (e, ty), palette::VERMILLION.to_rgba(), 2)?;
                x += 2 * dash;
            }
            p.summary.markers += 1;
        }
        for (v, strong) in [(q.met_at, true), (s.limit, false)] {
            if let Some(v) = v.filter(|v| in_x(*v)) {
                let px = f.pt(v, f.y.lo).0;
                let c = if strong {
                    palette::VERMILLION
                } else {
                    palette::BLACK
                };
                p.line((px, f.y0), (px, f.y1), c.to_rgba(), 1)?;
                p.summary.markers += 1;
            }
        }
        let pts: Vec<(f64, f64)> =
            q.x.iter()
                .zip(q.y)
                .filter(|(x, y)| usable(**x) && y.is_finite())
                .map(|(&x, &y)| (f.px(x), f.py(y)))
                .collect();
        let drawn = to_pixels(&f, pts.iter().copied(), Reduce::MinMax);
        p.series_path(&drawn, palette::BLUE, 2)?;
        if pts.len() <= 60 {
            for &(x, y) in &pts {
                let c = super::axis::clamp_pt(&f, (x, y));
                p.circle(c, (p.font_px * 0.2).max(2.0) as u32, palette::BLUE, true)?;
                p.summary.markers += 1;
            }
        }
        y0 = f.y1 + gap;
    }

    // The table under the panels: columns sized to their widest cell, the first one (the change, long)
    // cut to what is left.
    if !s.table.is_empty() {
        let ty = p.h - table_h + p.fpx(0.3);
        p.label(&s.table_title, (left, ty), 0.9, TEXT, HPos::Left, VPos::Top)?;
        let ncol = s.table.iter().map(|r| r.len()).max().unwrap_or(0);
        let pad = p.fpx(1.0);
        let mut widths: Vec<i32> = (0..ncol)
            .map(|c| {
                s.table
                    .iter()
                    .filter_map(|r| r.get(c))
                    .map(|t| p.text_width(t, 0.8))
                    .max()
                    .unwrap_or(0)
            })
            .collect();
        let rest: i32 = widths.iter().skip(1).map(|w| w + pad).sum();
        if let Some(w0) = widths.first_mut() {
            *w0 = (*w0).min(right - left - rest).max(p.fpx(4.0));
        }
        for (r, row) in s.table.iter().enumerate() {
            let y = ty + line_h * (r as i32 + 1);
            if r == 0 {
                p.line(
                    (left, y + line_h - p.fpx(0.1)),
                    (right, y + line_h - p.fpx(0.1)),
                    FRAME.to_rgba(),
                    1,
                )?;
            } else if r % 2 == 0 {
                p.rect(
                    (left, y - p.fpx(0.1)),
                    (right, y + line_h - p.fpx(0.15)),
                    GRID.mix(0.5),
                    true,
                )?;
            }
            let mut x = left;
            for (c, cell) in row.iter().enumerate() {
                let text = fit(p, cell, widths[c], 0.8);
                if c == 0 {
                    p.label(&text, (x, y), 0.8, TEXT, HPos::Left, VPos::Top)?;
                } else {
                    p.label(&text, (x + widths[c], y), 0.8, TEXT, HPos::Right, VPos::Top)?;
                }
                x += widths[c] + pad;
            }
        }
    }
    Ok(())
}

/// `text` cut with "..." to fit `width` px.
fn fit<DB: DrawingBackend>(p: &Painter<DB>, text: &str, width: i32, rel: f64) -> String {
    if p.text_width(text, rel) <= width {
        return text.to_string();
    }
    let chars: Vec<char> = text.chars().collect();
    let mut n = chars.len();
    while n > 0 {
        n -= 1;
        let t: String = chars[..n].iter().collect::<String>() + "...";
        if p.text_width(&t, rel) <= width {
            return t;
        }
    }
    String::new()
}
