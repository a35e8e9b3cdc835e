//! The waveform figure: the source, intermediate stages, the output and the DAC's staircase over time, the
//! ADC's samples on the signal it samples; below, the output shifted back by the measured delay over the input
//! and the error between them.

use plotters::backend::DrawingBackend;
use plotters::style::{Color, RGBColor};

use crate::Error;

use super::axis::{Axis, Frame, bottom_margin, finite_range, left_margin, merge, padded};
use super::painter::{FRAME, Key, Painter, TEXT, palette};
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

    if w.sampled_trace >= w.traces.len() {
        return Err(Error::Run(format!(
            "plot: sampled trace {} but only {} traces",
            w.sampled_trace,
            w.traces.len()
        )));
    }
    let idx = |y: &[f64]| window_indices(w.t0_s, w.dt_s, y.len(), w.window_s);

    // Vertical range over everything inside the window.
    let mut range = None;
    for (_, y) in &w.traces {
        range = merge(range, finite_range(&y[idx(y)]));
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
    let y = Axis::linear("voltage", "V", ylo, yhi, 6);

    // The aligned output and the error, where both it and the input are known inside the window.
    let aligned = w.aligned_output.and_then(|a| align(w, a));

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
        let dac = w.converters.as_ref().map_or("DAC", |c| c.1.as_str());
        entries.push((format!("{dac} hold levels"), Key::Line(palette::ORANGE, 1)));
    }
    // Markers are drawn only while they can be told apart: every sample when few, else every k-th.
    let stride = samples.len().div_ceil(MAX_MARKERS).max(1);
    if !samples.is_empty() {
        let every = if stride == 1 {
            String::new()
        } else {
            format!(", every {}", ordinal(stride))
        };
        entries.push((
            format!(
                "sampled by {}{every}",
                w.converters.as_ref().map_or("the ADC", |c| c.0.as_str())
            ),
            Key::Circle(palette::BLACK),
        ));
        entries.push((
            format!("converted value{every}"),
            Key::Cross(palette::BLACK),
        ));
    }
    if aligned.is_some() {
        let delay = w.measured_delay_s.unwrap_or(0.0);
        entries.push((
            format!(
                "output {} earlier, gain and offset fitted (lower panels)",
                format_si(delay, "s", 4)
            ),
            Key::Line(ALIGNED, 1),
        ));
    }

    let top = p.title(&w.title)?;
    let left0 = p.fpx(1.2);
    let right = p.w - p.fpx(1.2);
    let top = p.legend(&entries, left0, top, right - left0)? + p.fpx(0.3);
    let bottom = p.h - bottom_margin(p);
    let x_axis = Axis::linear("time", "s", w0, w1, 8);
    let (y_al, y_err) = match &aligned {
        Some(al) => {
            let (alo, ahi) =
                merge(finite_range(&al.input), finite_range(&al.output)).unwrap_or((-1.0, 1.0));
            let (alo, ahi) = padded(alo, ahi, 0.06);
            let (elo, ehi) = finite_range(&al.error).unwrap_or((-1.0, 1.0));
            // At least a millionth of the input's swing, so rounding noise is not blown up to fill the panel.
            let (ilo, ihi) = finite_range(&al.input).unwrap_or((-1.0, 1.0));
            let m = elo.abs().max(ehi.abs()).max(1e-6 * (ihi - ilo));
            let (elo, ehi) = padded(-m, m, 0.08);
            (
                Some(Axis::linear("aligned", "V", alo, ahi, 4)),
                Some(Axis::linear("error", "V", elo, ehi, 4)),
            )
        }
        None => (None, None),
    };
    let left = [Some(&y), y_al.as_ref(), y_err.as_ref()]
        .into_iter()
        .flatten()
        .map(|a| left_margin(p, a))
        .max()
        .unwrap_or(0);
    let gap = p.fpx(0.6);
    let span = bottom - top;
    let (main_h, al_h) = if aligned.is_some() {
        let al_h = (span - 2 * gap) * 24 / 100;
        (span - 2 * gap - 2 * al_h, al_h)
    } else {
        (span, 0)
    };
    let f = Frame {
        x0: left,
        y0: top,
        x1: right,
        y1: top + main_h,
        x: x_axis.clone(),
        y,
        below: 0,
    };
    f.draw(p, aligned.is_none())?;

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
        let pts = to_pixels(
            &f,
            idx(ys).map(|i| (f.px(w.t0_s + i as f64 * w.dt_s), f.py(ys[i]))),
            Reduce::MinMax,
        );
        let (c, width) = colour_of(k);
        p.series_path(&pts, c, width)?;
    }

    // Sample markers: a circle on the sampled trace at each instant, a cross at the converted value.
    let sampled = w.traces[w.sampled_trace].1;
    let r = (p.font_px * 0.25).max(2.0);
    for &(t, v) in samples.iter().step_by(stride) {
        if let Some(u) = interp(w.t0_s, w.dt_s, sampled, t) {
            p.circle(f.pt(t, u), r as u32, palette::BLACK, false)?;
            p.summary.markers += 1;
        }
        p.cross(f.pt(t, v), r as i32, palette::BLACK)?;
        p.summary.markers += 1;
    }

    if let Some(d) = w.measured_delay_s
        && let Some((tc, level)) = rising_crossing(w, d)
    {
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
        let label = format!("delay {}", format_si(d, "s", 4));
        p.label_above(
            &label,
            ((a.0 + b.0) / 2, a.1 - tick),
            0.8,
            TEXT,
            (f.x0, f.x1),
        )?;
        p.summary.markers += 1;
    }

    // The lower panels: input with the aligned output over it, then the error.
    if let (Some(al), Some(ya), Some(ye)) = (&aligned, y_al, y_err) {
        let fa = Frame {
            x0: left,
            y0: f.y1 + gap,
            x1: right,
            y1: f.y1 + gap + al_h,
            x: x_axis.clone(),
            y: ya,
            below: 0,
        };
        fa.draw(p, false)?;
        let t_at = |i: usize| al.t0_s + i as f64 * w.dt_s;
        let path = |fr: &Frame, v: &[f64]| {
            to_pixels(
                fr,
                v.iter()
                    .enumerate()
                    .filter(|(_, y)| y.is_finite())
                    .map(|(i, &y)| (fr.px(t_at(i)), fr.py(y))),
                Reduce::MinMax,
            )
        };
        let pts = path(&fa, &al.input);
        p.series_path(&pts, palette::BLUE, 2)?;
        let pts = path(&fa, &al.output);
        p.series_path(&pts, ALIGNED, 1)?;
        let fe = Frame {
            x0: left,
            y0: fa.y1 + gap,
            x1: right,
            y1: fa.y1 + gap + al_h,
            x: x_axis,
            y: ye,
            below: 0,
        };
        fe.draw(p, true)?;
        let zy = fe.pt(0.0, 0.0).1;
        p.line((fe.x0, zy), (fe.x1, zy), FRAME.to_rgba(), 1)?;
        let pts = path(&fe, &al.error);
        p.series_path(&pts, palette::BLACK, 1)?;
    }
    Ok(())
}

/// Most sample markers drawn in one window; beyond it every k-th is drawn.
const MAX_MARKERS: usize = 48;

/// Colour of the aligned output (dark grey, so the blue input shows beneath it).
const ALIGNED: RGBColor = RGBColor(0x33, 0x33, 0x33);

/// "2nd", "3rd", "5th"...
fn ordinal(k: usize) -> String {
    let suffix = match (k % 10, k % 100) {
        (_, 11..=13) => "th",
        (1, _) => "st",
        (2, _) => "nd",
        (3, _) => "rd",
        _ => "th",
    };
    format!("{k}{suffix}")
}

/// The input and the output one delay later over the window, the output fitted to the input by gain and
/// offset (least squares), and their difference.
pub(super) struct Aligned {
    /// Time of the first value, s.
    pub(super) t0_s: f64,
    pub(super) input: Vec<f64>,
    /// Fitted output (NaN where it was not captured).
    pub(super) output: Vec<f64>,
    /// Fitted output minus input (NaN where not known).
    pub(super) error: Vec<f64>,
}

/// Fit `gain * aligned + offset` to the input over the window; None when fewer than two points overlap or
/// the aligned output does not move.
pub(super) fn align(w: &WaveformPlot, aligned: &[f64]) -> Option<Aligned> {
    let input = w.traces[0].1;
    let r = window_indices(w.t0_s, w.dt_s, input.len().min(aligned.len()), w.window_s);
    let pairs = || {
        r.clone()
            .map(|i| (aligned[i], input[i]))
            .filter(|(a, b)| a.is_finite() && b.is_finite())
    };
    let (mut n, mut sa, mut sb) = (0.0, 0.0, 0.0);
    for (a, b) in pairs() {
        n += 1.0;
        sa += a;
        sb += b;
    }
    if n < 2.0 {
        return None;
    }
    let (ma, mb) = (sa / n, sb / n);
    let (mut sab, mut saa) = (0.0, 0.0);
    for (a, b) in pairs() {
        sab += (a - ma) * (b - mb);
        saa += (a - ma) * (a - ma);
    }
    // A still output (to rounding: under 0.1 nV rms about its mean) has nothing to fit.
    if saa.is_nan() || saa <= 1e-20 * n * (1.0 + ma * ma) {
        return None;
    }
    let gain = sab / saa;
    let offset = mb - gain * ma;
    let output: Vec<f64> = r.clone().map(|i| gain * aligned[i] + offset).collect();
    let inp: Vec<f64> = r.clone().map(|i| input[i]).collect();
    let error = output.iter().zip(&inp).map(|(o, i)| o - i).collect();
    Some(Aligned {
        t0_s: w.t0_s + r.start as f64 * w.dt_s,
        input: inp,
        output,
        error,
    })
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
