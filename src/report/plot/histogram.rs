//! The histogram figure (Monte-Carlo): one bar per bin, and labelled marker lines (percentiles, requirements)
//! whose labels sit in rows above the frame, clear of the bars and of each other.

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::axis::{Axis, Frame, bottom_margin, left_margin};
use super::painter::{Key, Painter, TEXT, palette, rgba};
use super::{HistogramPlot, split_label_unit};

/// Rows of marker labels above the frame.
const LABEL_ROWS: usize = 3;

pub(super) fn draw_histogram<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    h: &HistogramPlot,
) -> Result<(), Error> {
    let bins = h.counts.len();
    if bins == 0 || h.edges.len() != bins + 1 {
        return Err(Error::Run(format!(
            "plot: a histogram of {bins} bins needs {} edges, got {}",
            bins + 1,
            h.edges.len()
        )));
    }
    if !h.edges.iter().all(|e| e.is_finite()) || h.edges.windows(2).any(|w| w[1] <= w[0]) {
        return Err(Error::Run(
            "plot: histogram edges must be finite and increasing".to_string(),
        ));
    }
    let (lo, hi) = (h.edges[0], h.edges[bins]);
    let pad = 0.04 * (hi - lo);
    let (xq, xu) = split_label_unit(&h.x_label);
    let x = Axis::linear(xq, xu, lo - pad, hi + pad, 8);
    let top_count = h.counts.iter().copied().fold(0.0, f64::max).max(1.0);
    let mut y = Axis::linear("runs", "", 0.0, top_count * 1.08, 6);
    // Counts are whole: only whole ticks, written without decimals.
    y.ticks.retain(|(v, _)| (v - v.round()).abs() < 1e-9);
    for t in &mut y.ticks {
        t.1 = format!("{}", t.0.round() as i64);
    }

    let entries = vec![("runs per bin".to_string(), Key::Shade(palette::BLUE))];
    let top = p.title(&h.title)?;
    let left = left_margin(p, &y);
    let right = p.w - p.fpx(1.2);
    let top = p.legend(&entries, left, top, right - left)?;

    // Marker labels: each in the first row where it overlaps no other.
    let gap = p.fpx(0.3);
    let row_h = p.fpx(1.15);
    let mut rows: Vec<Vec<(i32, i32)>> = vec![Vec::new(); LABEL_ROWS];
    let placed: Vec<Option<(usize, i32)>> = h
        .markers
        .iter()
        .map(|(v, label)| {
            if !v.is_finite() {
                return None;
            }
            let px = (left as f64 + x.frac(*v) * (right - left) as f64).round() as i32;
            let w = p.text_width(label, 0.8);
            let cx = px.clamp(left + w / 2, right - w / 2);
            let span = (cx - w / 2 - gap, cx + w / 2 + gap);
            let r = rows
                .iter()
                .position(|row| row.iter().all(|&(a, b)| span.1 <= a || span.0 >= b))?;
            rows[r].push(span);
            Some((r, cx))
        })
        .collect();
    let rows_used = rows.iter().filter(|r| !r.is_empty()).count() as i32;
    let y0 = top + rows_used * row_h + p.fpx(0.3);
    let f = Frame {
        x0: left,
        y0,
        x1: right,
        y1: p.h - bottom_margin(p),
        x,
        y,
        below: 0,
    };
    f.draw(p, true)?;
    for (k, &c) in h.counts.iter().enumerate() {
        if c <= 0.0 {
            continue;
        }
        let a = f.pt(h.edges[k], c);
        let b = f.pt(h.edges[k + 1], 0.0);
        p.rect(a, b, rgba(palette::BLUE, 0.55), true)?;
        p.rect(a, b, palette::BLUE.to_rgba(), false)?;
        p.summary.series += 1;
    }
    for ((v, label), at) in h.markers.iter().zip(&placed) {
        if !(v.is_finite() && *v >= f.x.lo && *v <= f.x.hi) {
            continue;
        }
        let px = f.pt(*v, 0.0).0;
        p.line((px, f.y0), (px, f.y1), palette::BLACK.to_rgba(), 1)?;
        p.summary.markers += 1;
        if let Some((r, cx)) = *at {
            let ty = top + r as i32 * row_h;
            p.line(
                (px, ty + row_h - p.fpx(0.2)),
                (px, f.y0),
                palette::BLACK.to_rgba(),
                1,
            )?;
            p.label(label, (cx, ty), 0.8, TEXT, HPos::Center, VPos::Top)?;
        }
    }
    Ok(())
}
