//! The waveform figure: the source, intermediate stages, the output and the ADC staircase over time.

use plotters::backend::DrawingBackend;
use plotters::style::text_anchor::{HPos, VPos};
use plotters::style::{Color, RGBColor};

use crate::Error;

use super::axis::{Axis, finite_range, merge, padded, titled_frame};
use super::painter::{Key, Painter, TEXT, palette};
use super::reduce::{Reduce, to_pixels};
use super::{WaveformPlot, format_si};

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

pub(super) fn draw_waveform<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    w: &WaveformPlot,
) -> Result<(), Error> {
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
