//! The delay between two paths fed by the same source, measured directly: one path's output record against
//! the other's, by cross-correlation ([`crate::measure::latency::xcorr_delay_s`]).

/// A uniformly sampled record: first sample at `t0_s`, `rate_hz`, volts.
#[derive(Debug, Clone, Copy)]
pub struct TimedRecord<'a> {
    pub t0_s: f64,
    pub rate_hz: f64,
    pub volts: &'a [f64],
}

impl TimedRecord<'_> {
    /// The record at time `t_s` by four-point (cubic) Lagrange interpolation; exact at the samples, NaN
    /// outside the record (or closer than one sample to an end, where the four points do not exist).
    fn at(&self, t_s: f64) -> f64 {
        let u = (t_s - self.t0_s) * self.rate_hz;
        let k = u.floor();
        let n = self.volts.len();
        if !(k >= 1.0 && (k as usize) + 2 < n) {
            // At the first or the last sample exactly, the sample itself.
            let r = u.round();
            if (u - r).abs() < 1e-9 && r >= 0.0 && (r as usize) < n {
                return self.volts[r as usize];
            }
            return f64::NAN;
        }
        let i = k as usize;
        let x = u - k;
        let (y0, y1, y2, y3) = (
            self.volts[i - 1],
            self.volts[i],
            self.volts[i + 1],
            self.volts[i + 2],
        );
        // Lagrange weights on the nodes -1, 0, 1, 2.
        let w0 = -x * (x - 1.0) * (x - 2.0) / 6.0;
        let w1 = (x + 1.0) * (x - 1.0) * (x - 2.0) / 2.0;
        let w2 = -(x + 1.0) * x * (x - 2.0) / 2.0;
        let w3 = (x + 1.0) * x * (x - 1.0) / 6.0;
        w0 * y0 + w1 * y1 + w2 * y2 + w3 * y3
    }
}

/// Delay (s) of record `b` behind record `a` (positive: `b` later), both the same source through two paths.
///
/// Both are put on the grid of the slower record (the faster one interpolated at its instants, which is exact
/// when the grids share those instants), `b` taken `centre_s` (whole samples) after `a`, and the remainder
/// found by cross-correlation over the instants both cover, searched a quarter period either side for a
/// periodic source of `period_s` (a sine's correlation repeats every period) and otherwise over an eighth of
/// the overlap. NaN when the records overlap over fewer than 64 samples.
pub fn delay_between_s(
    a: TimedRecord<'_>,
    b: TimedRecord<'_>,
    centre_s: f64,
    period_s: Option<f64>,
) -> f64 {
    if !(a.rate_hz > 0.0 && b.rate_hz > 0.0 && centre_s.is_finite()) {
        return f64::NAN;
    }
    // The grid: the slower record's instants.
    let grid = if a.rate_hz <= b.rate_hz { a } else { b };
    let rate = grid.rate_hz;
    let shift = (centre_s * rate).round();
    // Instants n of the grid where a is read at t_n and b at t_n + shift / rate.
    let t_of = |n: usize| grid.t0_s + n as f64 / rate;
    let n_grid = grid.volts.len();
    let mut xa = Vec::with_capacity(n_grid);
    let mut xb = Vec::with_capacity(n_grid);
    for n in 0..n_grid {
        let t = t_of(n);
        let va = a.at(t);
        let vb = b.at(t + shift / rate);
        if va.is_finite() && vb.is_finite() {
            xa.push(va);
            xb.push(vb);
        } else if !xa.is_empty() {
            // The overlap is one stretch: past its end nothing more overlaps.
            break;
        }
    }
    if xa.len() < 64 {
        return f64::NAN;
    }
    let half_window_s = match period_s {
        Some(p) if p.is_finite() && p > 0.0 => 0.25 * p,
        _ => xa.len() as f64 / 8.0 / rate,
    }
    .max(2.0 / rate)
    .min(xa.len() as f64 / 4.0 / rate);
    shift / rate + super::latency::xcorr_delay_s(&xa, &xb, rate, half_window_s)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::TAU;

    /// Two tones (not harmonically related), so the delay is unambiguous over many samples.
    fn signal(t: f64) -> f64 {
        (TAU * 1000.0 * t).sin() + 0.5 * (TAU * 1370.0 * t + 0.3).sin()
    }

    fn record(t0_s: f64, rate_hz: f64, n: usize, delay_s: f64) -> Vec<f64> {
        (0..n)
            .map(|i| signal(t0_s + i as f64 / rate_hz - delay_s))
            .collect()
    }

    #[test]
    fn the_delay_between_records_on_one_grid_is_found_to_a_hundredth_of_a_sample() {
        // By construction: b is the signal 100.3 us later than a, on the same 48 kHz grid.
        let fs = 48_000.0;
        let a = record(0.01, fs, 20_000, 10e-6);
        let b = record(0.01, fs, 20_000, 110.3e-6);
        let d = delay_between_s(
            TimedRecord {
                t0_s: 0.01,
                rate_hz: fs,
                volts: &a,
            },
            TimedRecord {
                t0_s: 0.01,
                rate_hz: fs,
                volts: &b,
            },
            100e-6,
            None,
        );
        assert!((d - 100.3e-6).abs() * fs < 0.01, "{d}");
    }

    #[test]
    fn records_at_two_rates_and_starts_meet_on_the_slower_grid_either_way_round() {
        // By construction: a at 22.2 kHz from 5 ms, b at 96 kHz from 7 ms and 0.1 s later; the search is
        // centred 0.15 ms off the truth (within a quarter period) and must still land on it; swapping the records negates the delay.
        let (fa, fb) = (22_222.0, 96_000.0);
        let a = record(0.005, fa, 20_000, 0.0);
        let b = record(0.007, fb, 100_000, 0.1);
        let ra = TimedRecord {
            t0_s: 0.005,
            rate_hz: fa,
            volts: &a,
        };
        let rb = TimedRecord {
            t0_s: 0.007,
            rate_hz: fb,
            volts: &b,
        };
        let d = delay_between_s(ra, rb, 0.10015, Some(1e-3));
        assert!((d - 0.1).abs() < 1e-6, "{d}");
        let back = delay_between_s(rb, ra, -0.10015, Some(1e-3));
        assert!((back + 0.1).abs() < 1e-6, "{back}");
    }

    #[test]
    fn records_that_do_not_overlap_give_nan() {
        let a = record(0.0, 1000.0, 100, 0.0);
        let r = TimedRecord {
            t0_s: 0.0,
            rate_hz: 1000.0,
            volts: &a,
        };
        assert!(delay_between_s(r, r, 1.0, None).is_nan());
    }
}
