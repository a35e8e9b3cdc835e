//! The latency budget figure: one bar per stage.

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::axis::{Axis, Frame, bottom_margin};
use super::painter::{Painter, TEXT, palette};
use super::{BudgetPlot, PathBudgetsPlot, format_si};

pub(super) fn draw_budget<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    b: &BudgetPlot,
) -> Result<(), Error> {
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
    // Two significant digits, so a small difference does not print as "+0.0 %".
    let decimals = if pct.abs() >= 10.0 || pct == 0.0 {
        0
    } else {
        ((1.0 - pct.abs().log10().floor()) as usize).min(4)
    };
    let summary_note = format!(
        "budget {}, measured {} ({}{}, {pct:+.decimals$} %)",
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
        below: 0,
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

/// Several paths' budgets on one time axis: per path, a row per stage (bars laid end to end from zero, in the
/// path's colour) and a row for its measured total (hatched darker: drawn in vermillion outline).
pub(super) fn draw_path_budgets<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    b: &PathBudgetsPlot,
) -> Result<(), Error> {
    let finite = b
        .paths
        .iter()
        .all(|(_, lines, m)| m.is_finite() && lines.iter().all(|(_, v)| v.is_finite()));
    if !finite || b.paths.is_empty() {
        return Err(Error::Run(
            "plot: path budgets hold a non-finite value or no path".to_string(),
        ));
    }
    // Rows from the top: for each path its stages, then "<path>: measured".
    let mut rows: Vec<(String, f64, f64, usize, bool)> = Vec::new();
    let mut x_hi = 0.0f64;
    let mut x_lo = 0.0f64;
    for (k, (name, lines, measured)) in b.paths.iter().enumerate() {
        let mut start = 0.0;
        for (stage, v) in lines.iter() {
            rows.push((format!("{name}: {stage}"), start, *v, k, false));
            start += v;
            x_hi = x_hi.max(start);
            x_lo = x_lo.min(start);
        }
        rows.push((format!("{name}: measured"), 0.0, *measured, k, true));
        x_hi = x_hi.max(*measured);
        x_lo = x_lo.min(*measured);
    }
    let x_hi = if x_hi > 0.0 { x_hi * 1.18 } else { 1e-6 };
    let x = Axis::linear("time", "s", x_lo, x_hi, 8);
    let y = Axis {
        lo: 0.0,
        hi: rows.len() as f64,
        log: false,
        ticks: Vec::new(),
        title: String::new(),
    };
    let top = p.title(&b.title)?;
    let label_w = rows
        .iter()
        .map(|r| p.text_width(&r.0, 0.85))
        .max()
        .unwrap_or(0);
    let f = Frame {
        x0: label_w + p.fpx(1.2),
        y0: top + p.fpx(0.3),
        x1: p.w - p.fpx(1.2),
        y1: p.h - bottom_margin(p),
        x,
        y,
        below: 0,
    };
    f.draw(p, true)?;
    let row_h = (f.y1 - f.y0) as f64 / rows.len() as f64;
    let bar_h = (row_h * 0.3).max(2.0) as i32;
    for (i, (label, from, len, k, measured)) in rows.iter().enumerate() {
        let colour = palette::SERIES[k % palette::SERIES.len()];
        let cy = (f.y0 as f64 + (i as f64 + 0.5) * row_h).round() as i32;
        p.label(
            label,
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
        if *measured {
            // The measured total: an outline in black around the path's colour.
            p.rect(
                (xa, cy - bar_h),
                (xc, cy + bar_h),
                palette::BLACK.to_rgba(),
                false,
            )?;
        }
        p.summary.series += 1;
        p.text(
            &format_si(*len, "s", 3),
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
