//! The clock-crossing FIFOs' fill over the run (`fifo_fill`): one trace per FIFO (one per hop whose DAC reads
//! through one), each FIFO's slips marked on its own trace where they happen (a dropped code at the FIFO's
//! depth, a repeated one at zero), numbered in lanes above and below the traces so no two labels meet.

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::FifoPlot;
use super::axis::{Axis, Frame, left_margin, titled_frame};
use super::painter::{FRAME, Key, Painter, WHITE, palette};
use super::reduce::{Reduce, to_pixels};

/// Colours of the FIFOs' traces, in hop order: the palette's colours that read well as text on white
/// (the slip labels are written in their FIFO's colour).
const COLOURS: [plotters::style::RGBColor; 6] = [
    palette::BLUE,
    palette::VERMILLION,
    palette::BLUISH_GREEN,
    palette::REDDISH_PURPLE,
    palette::BLACK,
    palette::ORANGE,
];

/// Rows of labels in each lane (above the traces for drops, below them for repeats).
const LANE_ROWS: usize = 2;

/// A run of slips labelled together: one FIFO's, of one kind, consecutive in its numbering and close on the
/// time axis.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct SlipGroup {
    /// Index of the FIFO in the plot.
    pub(super) fifo: usize,
    /// The FIFO was full (a code dropped) rather than empty (a code repeated).
    pub(super) dropped: bool,
    /// First and last slip number (from 1, in the FIFO's own order).
    pub(super) first: usize,
    pub(super) last: usize,
    /// Pixel column of the first slip.
    pub(super) x: i32,
}

/// Group each FIFO's slips for labelling: a group starts at a slip and takes the following slips of the same
/// FIFO and kind that lie less than `span_px` to its right. `px` maps a time to its pixel column.
pub(super) fn group_slips(
    fifos: &[(&[f64], &[bool])],
    px: impl Fn(f64) -> i32,
    span_px: i32,
) -> Vec<SlipGroup> {
    let mut out = Vec::new();
    for (k, (times, dropped)) in fifos.iter().enumerate() {
        let mut i = 0;
        while i < times.len() {
            let x = px(times[i]);
            let kind = dropped.get(i).copied().unwrap_or(false);
            let mut j = i;
            while j + 1 < times.len()
                && dropped.get(j + 1).copied().unwrap_or(false) == kind
                && px(times[j + 1]) - x < span_px
            {
                j += 1;
            }
            out.push(SlipGroup {
                fifo: k,
                dropped: kind,
                first: i + 1,
                last: j + 1,
                x,
            });
            i = j + 1;
        }
    }
    out
}

fn group_label(g: &SlipGroup, prefix: &str) -> String {
    if g.first == g.last {
        format!("{prefix}slip {}", g.first)
    } else {
        format!("{prefix}slips {}-{}", g.first, g.last)
    }
}

pub(super) fn draw_fifo<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    fp: &FifoPlot,
) -> Result<(), Error> {
    if fp.fifos.is_empty() {
        return Err(Error::Run("plot: FIFO fill with no FIFO".to_string()));
    }
    for f in &fp.fifos {
        if f.slip_dropped.len() != f.slip_times_s.len() {
            return Err(Error::Run(format!(
                "plot: FIFO '{}' has {} slip instants but {} kinds",
                f.name,
                f.slip_times_s.len(),
                f.slip_dropped.len()
            )));
        }
    }
    let several = fp.fifos.len() > 1;
    let depth_max = fp.fifos.iter().map(|f| f.depth).max().unwrap_or(1).max(1) as f64;
    let (mut t_lo, mut t_hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for f in &fp.fifos {
        for &(t, _, _) in f.fill {
            t_lo = t_lo.min(t);
            t_hi = t_hi.max(t);
        }
        for &t in f.slip_times_s {
            t_lo = t_lo.min(t);
            t_hi = t_hi.max(t);
        }
    }
    if !(t_lo.is_finite() && t_hi.is_finite()) {
        (t_lo, t_hi) = (0.0, 1.0);
    }
    let x = Axis::linear("time", "s", t_lo, t_hi, 8);
    let y_axis = |lo: f64, hi: f64| {
        let mut a = Axis::linear("codes in the FIFO", "", lo, hi, 6);
        // Whole codes from empty to the deepest FIFO only: the lanes outside hold labels, not fill.
        a.ticks
            .retain(|(v, _)| *v >= -1e-9 && *v <= depth_max + 1e-9 && v.fract().abs() < 1e-9);
        a
    };
    let mut entries: Vec<(String, Key)> = fp
        .fifos
        .iter()
        .enumerate()
        .map(|(k, f)| {
            let s = if f.slips == 1 { "" } else { "s" };
            (
                format!("{} (depth {}, {} slip{s})", f.name, f.depth, f.slips),
                Key::Line(COLOURS[k % COLOURS.len()], 3),
            )
        })
        .collect();
    let any_slip = fp.fifos.iter().any(|f| !f.slip_times_s.is_empty());
    if any_slip {
        entries.push((
            "dot: a slip of that hop's FIFO (at its depth: a code dropped; at 0: a code repeated)"
                .to_string(),
            Key::Circle(palette::BLACK),
        ));
    }
    // The labels' groups are made once the frame's width is known; the notes on unlabelled slips go in the
    // legend, so the frame is laid out with room for them first.
    let unrecorded: u64 = fp
        .fifos
        .iter()
        .map(|f| f.slips.saturating_sub(f.slip_times_s.len() as u64))
        .sum();
    let note_at = entries.len();
    entries.push((String::new(), Key::None));
    // Group and place the labels on the frame's x mapping: titled_frame puts the frame's left edge at
    // left_margin of the y axis given to it, and its right edge fpx(1.2) from the right.
    let probe = Frame {
        x0: left_margin(p, &y_axis(0.0, depth_max)),
        y0: 0,
        x1: p.w - p.fpx(1.2),
        y1: 1,
        x: x.clone(),
        y: y_axis(0.0, depth_max),
        below: 0,
    };
    let lane_gap = p.fpx(0.3);
    let row_h = p.text_height(0.8) + p.fpx(0.2);
    let marker_r = (p.font_px * 0.25).max(2.0) as i32;
    let prefix = |k: usize| {
        if several {
            format!("{}: ", fp.fifos[k].short)
        } else {
            String::new()
        }
    };
    let widest_prefix = (0..fp.fifos.len())
        .map(&prefix)
        .max_by_key(|s| s.len())
        .unwrap_or_default();
    let span_px = p.text_width(&format!("{widest_prefix}slips 888-888"), 0.8) + p.fpx(0.5);
    let kinds: Vec<(&[f64], &[bool])> = fp
        .fifos
        .iter()
        .map(|f| (f.slip_times_s, f.slip_dropped))
        .collect();
    let groups = group_slips(&kinds, |t| probe.px(t).round() as i32, span_px);
    // Place each group in the first row of its lane where it clears the labels already there.
    let gap = p.fpx(0.5);
    let mut rows: Vec<Vec<(i32, i32)>> = vec![Vec::new(); 2 * LANE_ROWS];
    let mut placed: Vec<(SlipGroup, String, i32, usize)> = Vec::new();
    let mut unlabelled = 0usize;
    let mut order: Vec<&SlipGroup> = groups.iter().collect();
    order.sort_by_key(|g| (g.x, g.fifo));
    for g in order {
        let text = group_label(g, &prefix(g.fifo));
        let w = p.text_width(&text, 0.8);
        let mut lx = g.x - marker_r;
        if lx + w > probe.x1 {
            lx = probe.x1 - w;
        }
        lx = lx.max(probe.x0);
        let lane = if g.dropped { 0 } else { LANE_ROWS };
        let spot = (0..LANE_ROWS).find(|r| {
            rows[lane + r]
                .iter()
                .all(|&(a, b)| lx + w + gap <= a || lx >= b + gap)
        });
        match spot {
            Some(r) => {
                rows[lane + r].push((lx, lx + w));
                placed.push((g.clone(), text, lx, r));
            }
            None => unlabelled += g.last + 1 - g.first,
        }
    }
    let mut notes = Vec::new();
    if unlabelled > 0 {
        notes.push(format!(
            "+{unlabelled} more slips marked but not labelled (their instants are in report.json)"
        ));
    }
    if unrecorded > 0 {
        notes.push(format!(
            "+{unrecorded} slips after the first {} of a FIFO not marked",
            crate::engine::clock::SLIP_TIMES_MAX
        ));
    }
    if notes.is_empty() {
        entries.remove(note_at);
    } else {
        entries[note_at].0 = notes.join("; ");
    }
    // The real frame: the lanes above and below the traces take the label rows they need.
    let lane_rows = |dropped: bool| {
        placed
            .iter()
            .filter(|(g, ..)| g.dropped == dropped)
            .map(|(.., r)| r + 1)
            .max()
            .unwrap_or(0) as i32
    };
    let band = |n: i32| {
        if n > 0 {
            marker_r + lane_gap + n * row_h
        } else {
            marker_r + lane_gap
        }
    };
    let (band_top, band_bottom) = (band(lane_rows(true)), band(lane_rows(false)));
    let mut f = titled_frame(p, &fp.title, &entries, x, y_axis(0.0, depth_max))?;
    debug_assert_eq!((f.x0, f.x1), (probe.x0, probe.x1));
    let data_px = ((f.y1 - f.y0) - band_top - band_bottom).max(20) as f64;
    let per_px = depth_max / data_px;
    f.y = y_axis(
        -(band_bottom as f64) * per_px,
        depth_max + band_top as f64 * per_px,
    );
    f.draw(p, true)?;
    // Empty and the deepest FIFO's depth, the limits the slips happen at.
    for v in [0.0, depth_max] {
        let y = f.py(v).round() as i32;
        p.line((f.x0, y), (f.x1, y), FRAME.mix(0.6), 1)?;
    }
    let n = fp.fifos.len();
    for (k, fifo) in fp.fifos.iter().enumerate() {
        // Lowest and highest fill of each stretch as two points at its instant; per pixel column the
        // reduction keeps the extremes, so the trace covers the fill's whole range. Earlier FIFOs are drawn
        // wider so a later one on the same fill leaves them showing at its edges.
        let pts = fifo.fill.iter().flat_map(|&(t, lo, hi)| {
            [
                (f.px(t), f.py(f64::from(lo))),
                (f.px(t), f.py(f64::from(hi))),
            ]
        });
        let drawn = to_pixels(&f, pts, Reduce::MinMax);
        p.series_path(
            &drawn,
            COLOURS[k % COLOURS.len()],
            2 + 2 * (n - 1 - k) as u32,
        )?;
    }
    // Every recorded slip on its FIFO's trace; where several fall within a dot's width, one dot stands for
    // them (stacked rings would hide the trace).
    let apart = 2 * marker_r + 2;
    for (k, fifo) in fp.fifos.iter().enumerate() {
        let c = COLOURS[k % COLOURS.len()];
        let mut last: [Option<i32>; 2] = [None, None];
        for (&t, &dropped) in fifo.slip_times_s.iter().zip(fifo.slip_dropped) {
            let y = if dropped { f64::from(fifo.depth) } else { 0.0 };
            let at = f.pt(t, y);
            let slot = &mut last[usize::from(dropped)];
            if slot.is_some_and(|x| (at.0 - x).abs() < apart) {
                continue;
            }
            *slot = Some(at.0);
            // A white ring keeps the dot apart from its own trace.
            p.circle(at, marker_r as u32 + 2, WHITE, true)?;
            p.circle(at, marker_r as u32, c, true)?;
            p.summary.markers += 1;
        }
    }
    for (g, text, lx, r) in &placed {
        let c = COLOURS[g.fifo % COLOURS.len()];
        let r = *r as i32;
        if g.dropped {
            let y = f.py(depth_max).round() as i32 - marker_r - lane_gap - r * row_h;
            p.label(text, (*lx, y), 0.8, c, HPos::Left, VPos::Bottom)?;
        } else {
            let y = f.py(0.0).round() as i32 + marker_r + lane_gap + r * row_h;
            p.label(text, (*lx, y), 0.8, c, HPos::Left, VPos::Top)?;
        }
    }
    Ok(())
}
