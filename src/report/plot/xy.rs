//! The generic x-y figure (sweeps, limit finder, Monte-Carlo).

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::axis::{Axis, clamp_pt, merge, padded, titled_frame};
use super::painter::{Key, Painter, TEXT, palette};
use super::reduce::{Reduce, to_pixels};
use super::{XyPlot, split_label_unit};

pub(super) fn draw_xy<DB: DrawingBackend>(p: &mut Painter<DB>, xy: &XyPlot) -> Result<(), Error> {
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
    // Each marker's line is drawn; its label only where it clears the label before it (close markers would
    // otherwise print over each other).
    let mut label_end = i32::MIN;
    for (x, label) in &xy.markers {
        if !usable(*x) {
            continue;
        }
        let px = f.pt(*x, f.y.lo).0;
        p.line((px, f.y0), (px, f.y1), palette::BLACK.to_rgba(), 1)?;
        p.summary.markers += 1;
        let w = p.text_width(label, 0.8);
        // Right of the line, or left of it where the frame ends first.
        let mut lx = px + p.fpx(0.3);
        if lx + w > f.x1 {
            lx = px - p.fpx(0.3) - w;
        }
        if label.is_empty() || lx < label_end || lx < f.x0 {
            continue;
        }
        p.label(
            label,
            (lx, f.y0 + p.fpx(0.3)),
            0.8,
            TEXT,
            HPos::Left,
            VPos::Top,
        )?;
        label_end = lx + w + p.fpx(0.6);
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
