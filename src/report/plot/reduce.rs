//! Reduction of long traces per pixel column (minimum and maximum, or maximum only), so no spike is lost.

use super::axis::{Frame, clamp_pt};

/// How points falling in one pixel column are reduced.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Reduce {
    /// Keep the lowest and highest value, in order of occurrence (waveforms: no spike is lost).
    MinMax,
    /// Keep the highest value only (spectra: peaks are kept).
    Max,
}

/// Reduce pixel-space points (x non-decreasing; y grows downward) to at most two per pixel column
/// (`MinMax`) or one (`Max`), appending to `out`. Columns with a single point keep it exactly, so short
/// series are drawn unchanged. Non-finite points are skipped.
pub(super) fn reduce_columns<I: Iterator<Item = (f64, f64)>>(
    points: I,
    mode: Reduce,
    out: &mut Vec<(f64, f64)>,
) {
    // State of the current column: first point, and (index, point) of the top-most and bottom-most.
    let mut col = i64::MIN;
    let mut count = 0usize;
    let mut first = (0.0, 0.0);
    let mut top = (0usize, (0.0, 0.0)); // smallest pixel y = largest value
    let mut bottom = (0usize, (0.0, 0.0));
    let flush = |count: usize,
                 first: (f64, f64),
                 top: (usize, (f64, f64)),
                 bottom: (usize, (f64, f64)),
                 out: &mut Vec<(f64, f64)>| {
        match (count, mode) {
            (0, _) => {}
            (1, _) => out.push(first),
            (_, Reduce::Max) => out.push(top.1),
            (_, Reduce::MinMax) => {
                if top.0 <= bottom.0 {
                    out.push(top.1);
                    if bottom.0 != top.0 {
                        out.push(bottom.1);
                    }
                } else {
                    out.push(bottom.1);
                    out.push(top.1);
                }
            }
        }
    };
    for (i, (x, y)) in points.enumerate() {
        if !(x.is_finite() && y.is_finite()) {
            continue;
        }
        let c = x.floor() as i64;
        if c != col {
            flush(count, first, top, bottom, out);
            col = c;
            count = 0;
        }
        if count == 0 {
            first = (x, y);
            top = (i, (x, y));
            bottom = (i, (x, y));
        } else {
            if y < top.1.1 {
                top = (i, (x, y));
            }
            if y > bottom.1.1 {
                bottom = (i, (x, y));
            }
        }
        count += 1;
    }
    flush(count, first, top, bottom, out);
}

/// Reduce, clamp into the frame and round.
pub(super) fn to_pixels<I: Iterator<Item = (f64, f64)>>(
    f: &Frame,
    points: I,
    mode: Reduce,
) -> Vec<(i32, i32)> {
    let mut reduced = Vec::new();
    reduce_columns(points, mode, &mut reduced);
    let mut out: Vec<(i32, i32)> = Vec::with_capacity(reduced.len());
    for p in reduced {
        let q = clamp_pt(f, p);
        if out.last() != Some(&q) {
            out.push(q);
        }
    }
    out
}
