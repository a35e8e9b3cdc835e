//! Axes (ranges, ticks with SI-prefixed titles) and the plot frame that maps data to pixels.

use plotters::backend::DrawingBackend;
use plotters::style::Color;
use plotters::style::text_anchor::{HPos, VPos};

use crate::Error;

use super::axis_title;
use super::painter::{FRAME, GRID, Key, Painter, TEXT};
use crate::format::units::{si_prefix_for_value, unit_takes_prefix};

/// A linear axis whose values are more than this many spans away from zero counts its ticks from an offset.
pub(super) const OFFSET_RATIO: f64 = 50.0;

/// One axis: data range, mapping and ticks.
#[derive(Debug, Clone)]
pub(super) struct Axis {
    pub(super) lo: f64,
    pub(super) hi: f64,
    pub(super) log: bool,
    /// (position in data units, label).
    pub(super) ticks: Vec<(f64, String)>,
    pub(super) title: String,
}

impl Axis {
    /// Linear axis over [lo, hi] in `unit`, ticks on 1-2-5 steps with labels scaled by the span's prefix.
    /// When the labels would need many digits to tell the ticks apart (a 160 µs window 4 s into a run, a
    /// histogram of latencies 9 µs wide around 153 ms), the ticks count from an offset named in the title:
    /// "time (µs from 3.99984 s)", labels 0, 20, 40...
    pub(super) fn linear(
        quantity: &str,
        unit: &str,
        lo: f64,
        hi: f64,
        target_ticks: usize,
    ) -> Axis {
        let (lo, hi) = widen(lo, hi);
        let step = nice_step((hi - lo) / target_ticks.max(2) as f64);
        let offset = if lo.abs().max(hi.abs()) > OFFSET_RATIO * (hi - lo) {
            (lo / step + 1e-9).floor() * step
        } else {
            0.0
        };
        let (mut title, prefix) = axis_title(quantity, unit, hi - lo);
        if offset != 0.0 {
            // Digits enough to write the offset to the tick step.
            let digits = ((offset.abs() / step).log10().floor() as usize + 1).clamp(1, 15);
            let at = trim_zeros(&super::format_si(offset, unit, digits));
            let inner = match title.rfind('(') {
                Some(open) if title.ends_with(')') => {
                    let u = title[open + 1..title.len() - 1].to_string();
                    title.truncate(open);
                    format!("{u} from {at}")
                }
                _ => format!("from {at}"),
            };
            title = format!("{} ({inner})", title.trim_end());
        }
        let scale = prefix.scale();
        let decimals = (-((step * scale).log10() + 1e-9).floor()).max(0.0) as usize;
        let mut ticks = Vec::new();
        let first = ((lo - offset) / step - 1e-9).ceil() as i64;
        let last = ((hi - offset) / step + 1e-9).floor() as i64;
        for k in first..=last {
            let v = offset + k as f64 * step;
            // Labels count from the offset (zero without one); k = 0 is written "0", never "-0".
            let shown = if k == 0 { 0.0 } else { k as f64 * step * scale };
            ticks.push((v, format!("{shown:.decimals$}")));
        }
        Axis {
            lo,
            hi,
            log: false,
            ticks,
            title,
        }
    }

    /// Logarithmic axis over [lo, hi] (both > 0): ticks at decades (and 2, 5 when few decades), each
    /// labelled with its own prefix ("100", "1k", "10k"); the title carries the bare unit.
    pub(super) fn logarithmic(quantity: &str, unit: &str, lo: f64, hi: f64) -> Axis {
        let lo = lo.max(f64::MIN_POSITIVE);
        let hi = if hi > lo { hi } else { lo * 10.0 };
        if let Some((natural, scale)) = natural_unit(unit, hi) {
            let mut a = Axis::logarithmic(quantity, "", lo * scale, hi * scale);
            a.title = format!("{quantity} ({natural})");
            a.lo = lo;
            a.hi = hi;
            for t in &mut a.ticks {
                t.0 /= scale;
            }
            return a;
        }
        let title = if unit.is_empty() {
            quantity.to_string()
        } else {
            format!("{quantity} ({unit})")
        };
        let d0 = (lo.log10() - 1e-9).floor() as i32;
        let d1 = (hi.log10() + 1e-9).ceil() as i32;
        let mantissas: &[f64] = if d1 - d0 <= 3 {
            &[1.0, 2.0, 5.0]
        } else {
            &[1.0]
        };
        let mut ticks = Vec::new();
        for d in d0..=d1 {
            for &m in mantissas {
                let v = m * 10f64.powi(d);
                if v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9) {
                    let label = if unit_takes_prefix(unit) {
                        let p = si_prefix_for_value(v);
                        format!("{}{}", compact_number(v * p.scale()), p.symbol)
                    } else {
                        compact_number(v)
                    };
                    ticks.push((v, label));
                }
            }
        }
        Axis {
            lo,
            hi,
            log: true,
            ticks,
            title,
        }
    }

    /// Position of `v` along the axis, 0 at lo and 1 at hi (not clamped).
    pub(super) fn frac(&self, v: f64) -> f64 {
        if self.log {
            (v.max(f64::MIN_POSITIVE).ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln())
        } else {
            (v - self.lo) / (self.hi - self.lo)
        }
    }
}

/// The unit engineers read a quantity in, where it is not the base unit with an SI prefix: slew rates in
/// V/µs (an amplifier's data sheet figure) or V/ms, rather than MV/s or kV/s. (written unit, factor from
/// the base unit) for an axis reaching `magnitude`; None for units written with SI prefixes as usual.
pub(super) fn natural_unit(unit: &str, magnitude: f64) -> Option<(&'static str, f64)> {
    match unit {
        "V/s" if magnitude.abs() >= 1e4 => Some(("V/µs", 1e-6)),
        "V/s" if magnitude.abs() >= 10.0 => Some(("V/ms", 1e-3)),
        "V/s" => Some(("V/s", 1.0)),
        _ => None,
    }
}

/// "3.79100 s" -> "3.791 s": trailing zeros of the number dropped, the unit kept.
fn trim_zeros(s: &str) -> String {
    let (num, rest) = s.split_once(' ').unwrap_or((s, ""));
    let num = if num.contains('.') {
        num.trim_end_matches('0').trim_end_matches('.')
    } else {
        num
    };
    if rest.is_empty() {
        num.to_string()
    } else {
        format!("{num} {rest}")
    }
}

/// A number without trailing zeros, up to 3 significant digits (for log-axis ticks).
pub(super) fn compact_number(v: f64) -> String {
    let s = format!("{:.2}", v);
    let s = s.trim_end_matches('0').trim_end_matches('.');
    s.to_string()
}

pub(super) fn widen(lo: f64, hi: f64) -> (f64, f64) {
    if !(lo.is_finite() && hi.is_finite()) {
        return (0.0, 1.0);
    }
    if hi > lo {
        return (lo, hi);
    }
    let d = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
    (lo - d, lo + d)
}

/// Step of 1, 2 or 5 times a power of ten nearest to `raw` (by ratio).
pub(super) fn nice_step(raw: f64) -> f64 {
    if !(raw > 0.0 && raw.is_finite()) {
        return 1.0;
    }
    let mag = 10f64.powf((raw.log10() + 1e-12).floor());
    let n = raw / mag;
    // Nearest of 1, 2, 5, 10 by ratio (the thresholds are the geometric means).
    let m = if n < 2f64.sqrt() {
        1.0
    } else if n < 10f64.sqrt() {
        2.0
    } else if n < 50f64.sqrt() {
        5.0
    } else {
        10.0
    };
    m * mag
}

/// Range of data padded by `pad` of its span on both sides.
pub(super) fn padded(lo: f64, hi: f64, pad: f64) -> (f64, f64) {
    let (lo, hi) = widen(lo, hi);
    let d = (hi - lo) * pad;
    (lo - d, hi + d)
}

/// Finite min and max of a slice.
pub(super) fn finite_range(v: &[f64]) -> Option<(f64, f64)> {
    v.iter()
        .filter(|x| x.is_finite())
        .fold(None, |acc, &x| match acc {
            None => Some((x, x)),
            Some((lo, hi)) => Some((lo.min(x), hi.max(x))),
        })
}

pub(super) fn merge(a: Option<(f64, f64)>, b: Option<(f64, f64)>) -> Option<(f64, f64)> {
    match (a, b) {
        (Some((a0, a1)), Some((b0, b1))) => Some((a0.min(b0), a1.max(b1))),
        (x, None) | (None, x) => x,
    }
}

/// A plotting frame: pixel rectangle and the two axes.
pub(super) struct Frame {
    pub(super) x0: i32,
    pub(super) y0: i32,
    pub(super) x1: i32,
    pub(super) y1: i32,
    pub(super) x: Axis,
    pub(super) y: Axis,
    /// Room left free between the frame's bottom and the x tick labels, px (marks along the axis).
    pub(super) below: i32,
}

impl Frame {
    pub(super) fn px(&self, v: f64) -> f64 {
        self.x0 as f64 + self.x.frac(v) * (self.x1 - self.x0) as f64
    }
    pub(super) fn py(&self, v: f64) -> f64 {
        self.y1 as f64 - self.y.frac(v) * (self.y1 - self.y0) as f64
    }
    /// Pixel point, clamped into the frame.
    pub(super) fn pt(&self, x: f64, y: f64) -> (i32, i32) {
        clamp_pt(self, (self.px(x), self.py(y)))
    }

    /// Grid, frame, tick labels and axis titles; `x_labels` false leaves the x tick labels and title out
    /// (upper panels sharing the x axis of the lowest).
    pub(super) fn draw<DB: DrawingBackend>(
        &self,
        p: &mut Painter<DB>,
        x_labels: bool,
    ) -> Result<(), Error> {
        let grid = GRID.to_rgba();
        for (v, _) in &self.x.ticks {
            let x = self.px(*v).round() as i32;
            p.line((x, self.y0), (x, self.y1), grid, 1)?;
        }
        for (v, _) in &self.y.ticks {
            let y = self.py(*v).round() as i32;
            p.line((self.x0, y), (self.x1, y), grid, 1)?;
        }
        p.rect(
            (self.x0, self.y0),
            (self.x1, self.y1),
            FRAME.to_rgba(),
            false,
        )?;
        let tick_gap = p.fpx(0.35);
        if x_labels {
            for (v, s) in &self.x.ticks {
                let x = self.px(*v).round() as i32;
                p.text(
                    s,
                    (x, self.y1 + self.below + tick_gap),
                    0.85,
                    TEXT,
                    HPos::Center,
                    VPos::Top,
                    false,
                )?;
            }
            let xt = self.x.title.clone();
            p.summary.labels.push(xt.clone());
            let y = self.y1 + self.below + tick_gap + p.fpx(1.25);
            p.text(
                &xt,
                ((self.x0 + self.x1) / 2, y),
                1.0,
                TEXT,
                HPos::Center,
                VPos::Top,
                false,
            )?;
        }
        let mut widest = 0;
        for (v, s) in &self.y.ticks {
            let y = self.py(*v).round() as i32;
            widest = widest.max(p.text_width(s, 0.85));
            p.text(
                s,
                (self.x0 - tick_gap, y),
                0.85,
                TEXT,
                HPos::Right,
                VPos::Center,
                false,
            )?;
        }
        if !self.y.title.is_empty() {
            let yt = self.y.title.clone();
            p.summary.labels.push(yt.clone());
            let x = self.x0 - tick_gap - widest - p.fpx(0.8);
            p.text(
                &yt,
                (x, (self.y0 + self.y1) / 2),
                1.0,
                TEXT,
                HPos::Center,
                VPos::Center,
                true,
            )?;
        }
        Ok(())
    }
}

pub(super) fn clamp_pt(f: &Frame, (x, y): (f64, f64)) -> (i32, i32) {
    (
        x.clamp(f.x0 as f64, f.x1 as f64).round() as i32,
        y.clamp(f.y0 as f64, f.y1 as f64).round() as i32,
    )
}

/// Widest tick label of an axis at 0.85 of the base font.
pub(super) fn widest_tick<DB: DrawingBackend>(p: &Painter<DB>, axis: &Axis) -> i32 {
    axis.ticks
        .iter()
        .map(|(_, s)| p.text_width(s, 0.85))
        .max()
        .unwrap_or(0)
}

/// Left margin that fits the y tick labels and the rotated y title.
pub(super) fn left_margin<DB: DrawingBackend>(p: &Painter<DB>, y: &Axis) -> i32 {
    widest_tick(p, y) + p.fpx(0.35) + p.fpx(if y.title.is_empty() { 0.6 } else { 2.2 })
}

/// Height below a frame taken by x tick labels and the x title.
/// The common layout of a one-frame plot: the title, the legend under it, and the frame below them with room
/// for the y axis' tick labels at the left and the x axis' at the bottom.
pub(super) fn titled_frame<DB: DrawingBackend>(
    p: &mut Painter<DB>,
    title: &str,
    entries: &[(String, Key)],
    x: Axis,
    y: Axis,
) -> Result<Frame, Error> {
    let top = p.title(title)?;
    let left = left_margin(p, &y);
    let right = p.w - p.fpx(1.2);
    let top = p.legend(entries, left, top, right - left)?;
    Ok(Frame {
        x0: left,
        y0: top + p.fpx(0.3),
        x1: right,
        y1: p.h - bottom_margin(p),
        x,
        y,
        below: 0,
    })
}

pub(super) fn bottom_margin<DB: DrawingBackend>(p: &Painter<DB>) -> i32 {
    p.fpx(0.35) + p.fpx(1.25) + p.fpx(1.6)
}

#[cfg(test)]
mod tests {
    use super::super::split_label_unit;
    use super::*;

    // ---- SI formatter ----

    #[test]
    fn axis_titles_carry_the_prefixed_unit() {
        assert_eq!(axis_title("time", "s", 2e-3).0, "time (ms)");
        assert_eq!(axis_title("time", "s", 300e-6).0, "time (µs)");
        assert_eq!(axis_title("frequency", "Hz", 24e3).0, "frequency (kHz)");
        assert_eq!(axis_title("voltage", "V", 0.05).0, "voltage (mV)");
        assert_eq!(axis_title("level", "dBFS", 120.0).0, "level (dBFS)");
        assert_eq!(axis_title("code", "", 4095.0).0, "code");
        let (_, p) = axis_title("time", "s", 2e-3);
        assert!((1.5e-3 * p.scale() - 1.5).abs() < 1e-12);
    }

    #[test]
    fn linear_ticks_use_one_two_five_steps_and_scaled_labels() {
        let a = Axis::linear("time", "s", 0.0, 2e-3, 8);
        let labels: Vec<&str> = a.ticks.iter().map(|(_, s)| s.as_str()).collect();
        // 2 ms / 8 = 0.25 ms; the nearest 1-2-5 step (in ratio) is 0.2 ms.
        let want = [
            "0.0", "0.2", "0.4", "0.6", "0.8", "1.0", "1.2", "1.4", "1.6", "1.8", "2.0",
        ];
        assert_eq!(labels, want);
        assert_eq!(a.title, "time (ms)");
        let v = Axis::linear("voltage", "V", -0.9, 0.9, 6);
        let labels: Vec<&str> = v.ticks.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(
            labels,
            [
                "-0.8", "-0.6", "-0.4", "-0.2", "0.0", "0.2", "0.4", "0.6", "0.8"
            ]
        );
        assert_eq!(v.title, "voltage (V)");
        let m = Axis::linear("voltage", "V", -0.03, 0.05, 4);
        let labels: Vec<&str> = m.ticks.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(labels, ["-20", "0", "20", "40"]);
        assert_eq!(m.title, "voltage (mV)");
    }

    #[test]
    fn ticks_count_from_an_offset_when_the_span_is_small_against_the_values() {
        // 160 µs of a run 4 s long: labels count µs from the window's start, not "3999840".
        let a = Axis::linear("time", "s", 3.99984, 4.0, 8);
        assert_eq!(a.title, "time (µs from 3.99984 s)");
        assert_eq!(a.ticks[0].1, "0");
        assert!(a.ticks.iter().all(|(_, l)| l.len() <= 3), "{:?}", a.ticks);
        assert_eq!(a.ticks.last().unwrap().1, "160");
        // The ticks still sit at their times.
        assert!((a.ticks[1].0 - 3.99986).abs() < 1e-12);
        // A 4 s window from zero reads in seconds; a 4 s window 100 s into a run needs no offset either.
        let b = Axis::linear("time", "s", 0.0, 4.0, 8);
        assert_eq!(b.title, "time (s)");
        assert_eq!(b.ticks[1].1, "0.5");
        let c = Axis::linear("time", "s", 100.0, 104.0, 8);
        assert_eq!(c.title, "time (s)");
        assert_eq!(c.ticks[0].1, "100.0");
        // Latencies 9 µs apart around 153 ms (a Monte-Carlo histogram).
        let d = Axis::linear("measured latency", "s", 153.2077e-3, 153.2166e-3, 8);
        assert_eq!(d.title, "measured latency (µs from 153.207 ms)");
        assert_eq!(d.ticks[0].1, "1");
    }

    #[test]
    fn slew_rates_read_in_volts_per_microsecond() {
        assert_eq!(axis_title("slew rate", "V/s", 49e6).0, "slew rate (V/µs)");
        assert_eq!(axis_title("slew rate", "V/s", 5e3).0, "slew rate (V/ms)");
        let a = Axis::linear("buffer slew rate", "V/s", 1e6, 50e6, 5);
        assert_eq!(a.title, "buffer slew rate (V/µs)");
        assert!(
            a.ticks.iter().any(|(v, l)| *v == 10e6 && l == "10"),
            "{:?}",
            a.ticks
        );
        let l = Axis::logarithmic("buffer slew rate", "V/s", 1e6, 100e6);
        assert_eq!(l.title, "buffer slew rate (V/µs)");
        assert!(
            l.ticks
                .iter()
                .any(|(v, t)| (*v - 10e6).abs() < 1.0 && t == "10"),
            "{:?}",
            l.ticks
        );
    }

    #[test]
    fn log_ticks_sit_on_decades_with_their_own_prefix() {
        let a = Axis::logarithmic("frequency", "Hz", 10.0, 1e6);
        let labels: Vec<&str> = a.ticks.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(labels, ["10", "100", "1k", "10k", "100k", "1M"]);
        assert_eq!(a.title, "frequency (Hz)");
    }

    #[test]
    fn label_units_are_split_from_the_quantity() {
        assert_eq!(
            split_label_unit("input frequency (Hz)"),
            ("input frequency", "Hz")
        );
        assert_eq!(split_label_unit("SINAD (dB)"), ("SINAD", "dB"));
        assert_eq!(split_label_unit("gain"), ("gain", ""));
    }
}
