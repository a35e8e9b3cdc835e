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

#[cfg(test)]
mod tests {
    use super::*;

    // ---- decimation ----

    /// Slow oracle: the extreme values of every column.
    fn column_extremes(points: &[(f64, f64)]) -> Vec<(i64, f64, f64)> {
        let mut out: Vec<(i64, f64, f64)> = Vec::new();
        for &(x, y) in points {
            let c = x.floor() as i64;
            match out.last_mut() {
                Some(last) if last.0 == c => {
                    last.1 = last.1.min(y);
                    last.2 = last.2.max(y);
                }
                _ => out.push((c, y, y)),
            }
        }
        out
    }

    #[test]
    fn min_max_reduction_keeps_a_single_sample_spike() {
        // 100 000 points over 500 columns, flat except one sample up and one sample down.
        let n = 100_000;
        let mut pts: Vec<(f64, f64)> = (0..n)
            .map(|i| (i as f64 * 500.0 / n as f64, 300.0))
            .collect();
        pts[31_337].1 = 10.0;
        pts[77_777].1 = 590.0;
        let mut out = Vec::new();
        reduce_columns(pts.iter().copied(), Reduce::MinMax, &mut out);
        assert!(out.len() <= 2 * 500);
        assert!(out.iter().any(|p| p.1 == 10.0), "upward spike lost");
        assert!(out.iter().any(|p| p.1 == 590.0), "downward spike lost");
        // Every column keeps exactly its extremes (against the slow oracle).
        let oracle = column_extremes(&pts);
        let kept = column_extremes(&out);
        assert_eq!(oracle, kept);
        // Order of occurrence is kept: x never decreases.
        assert!(out.windows(2).all(|w| w[1].0 >= w[0].0));
    }

    #[test]
    fn max_reduction_keeps_spectral_peaks_and_short_series_pass_unchanged() {
        let mut pts: Vec<(f64, f64)> = (0..10_000).map(|i| (i as f64 / 100.0, 500.0)).collect();
        pts[4321].1 = 20.0; // a peak is a small pixel y
        let mut out = Vec::new();
        reduce_columns(pts.iter().copied(), Reduce::Max, &mut out);
        assert_eq!(out.len(), 100);
        assert!(out.contains(&pts[4321]));
        let short: Vec<(f64, f64)> = (0..50).map(|i| (i as f64 * 3.0, (i * i) as f64)).collect();
        let mut out = Vec::new();
        reduce_columns(short.iter().copied(), Reduce::MinMax, &mut out);
        assert_eq!(out, short);
    }
}
