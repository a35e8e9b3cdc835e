//! Input probes: the value of the signal entering the converter at an arbitrary instant.
//!
//! When the converter is fed straight from a closed-form source, the probe evaluates the source exactly.
//! Otherwise it keeps a bounded history of the grid stream and interpolates between grid points with a
//! 4-point cubic (third-order Lagrange) interpolator.

use crate::stages::Probe;
use crate::stages::source::SourceGen;

/// Exact probe over a closed-form source.
pub struct ExactProbe<'a> {
    pub source: &'a SourceGen,
}

impl Probe for ExactProbe<'_> {
    fn value_at(&self, t_s: f64) -> f64 {
        self.source.value_at(t_s)
    }
}

/// A ring buffer of the most recent grid samples of a stream, with cubic interpolation.
pub struct GridHistory {
    rate_hz: f64,
    /// Samples kept: the logical capacity (what is held and clamped to).
    cap: usize,
    /// Storage of `cap` rounded up to a power of two, indexed by `n & mask` (no division per read).
    ring: Vec<f64>,
    mask: u64,
    /// Grid index of the next sample to be pushed (all indices below it, down to `next - ring.len()`, are kept).
    next: u64,
}

impl GridHistory {
    /// Keep at least `capacity` samples.
    pub fn new(rate_hz: f64, capacity: usize) -> Self {
        let cap = capacity.max(8);
        let size = cap.next_power_of_two();
        GridHistory {
            rate_hz,
            cap,
            ring: vec![0.0; size],
            mask: size as u64 - 1,
            next: 0,
        }
    }

    /// Append the grid samples starting at index `n0` (must equal the next expected index).
    pub fn push_block(&mut self, n0: u64, block: &[f64]) {
        debug_assert_eq!(n0, self.next, "grid history must be fed consecutively");
        for (i, &v) in block.iter().enumerate() {
            let n = n0 + i as u64;
            self.ring[(n & self.mask) as usize] = v;
        }
        self.next = n0 + block.len() as u64;
    }

    /// The latest instant that can be interpolated with full accuracy (two samples of look-ahead are needed).
    pub fn latest_time_s(&self) -> f64 {
        if self.next < 3 {
            return f64::NEG_INFINITY;
        }
        (self.next - 3) as f64 / self.rate_hz
    }

    /// The earliest instant still held.
    pub fn earliest_time_s(&self) -> f64 {
        let first = self.next.saturating_sub(self.cap as u64) + 1;
        first as f64 / self.rate_hz
    }

    fn sample(&self, n: i64) -> f64 {
        // Clamp to what is held: before the first sample the stream is taken as its first value.
        let oldest = self.next.saturating_sub(self.cap as u64) as i64;
        let newest = self.next as i64 - 1;
        let n = n.clamp(oldest, newest.max(oldest));
        self.ring[(n as u64 & self.mask) as usize]
    }
}

impl Probe for GridHistory {
    fn value_at(&self, t_s: f64) -> f64 {
        let x = t_s * self.rate_hz;
        // floor(x) without a library call (exact for |x| < 2^63: the conversion truncates toward zero).
        let t = x as i64;
        let i = if (t as f64) > x { t - 1 } else { t };
        let u = x - i as f64;
        let (p0, p1, p2, p3) = (
            self.sample(i - 1),
            self.sample(i),
            self.sample(i + 1),
            self.sample(i + 2),
        );
        lagrange4(p0, p1, p2, p3, u)
    }
}

/// Third-order Lagrange interpolation through points at -1, 0, 1, 2, evaluated at `u` in [0, 1).
#[inline]
pub fn lagrange4(p0: f64, p1: f64, p2: f64, p3: f64, u: f64) -> f64 {
    let um1 = u - 1.0;
    let um2 = u - 2.0;
    let up1 = u + 1.0;
    -p0 * u * um1 * um2 / 6.0 + p1 * up1 * um1 * um2 / 2.0 - p2 * up1 * u * um2 / 2.0
        + p3 * up1 * u * um1 / 6.0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cubic_interpolation_is_exact_for_cubics() {
        let rate = 1000.0;
        let mut h = GridHistory::new(rate, 64);
        let f = |t: f64| 2.0 + 3.0 * t - 40.0 * t * t + 5000.0 * t * t * t;
        let block: Vec<f64> = (0..40).map(|n| f(n as f64 / rate)).collect();
        h.push_block(0, &block);
        for k in 0..200 {
            let t = 0.002 + k as f64 * 0.00017;
            assert!((h.value_at(t) - f(t)).abs() < 1e-12, "t = {t}");
        }
    }

    #[test]
    fn interpolated_sine_error_is_small_at_twenty_points_per_cycle() {
        // Lagrange-4 interpolation error bound ~ (w h)^4 / 24 for a unit sine (common practice, no source).
        let rate = 20.0;
        let mut h = GridHistory::new(rate, 256);
        let block: Vec<f64> = (0..200)
            .map(|n| (2.0 * std::f64::consts::PI * n as f64 / rate).sin())
            .collect();
        h.push_block(0, &block);
        let bound = (2.0 * std::f64::consts::PI / rate).powi(4) / 24.0;
        for k in 0..500 {
            let t = 1.0 + k as f64 * 0.0137;
            let err = (h.value_at(t) - (2.0 * std::f64::consts::PI * t).sin()).abs();
            assert!(err < bound, "err {err} bound {bound}");
        }
    }

    #[test]
    fn ring_keeps_only_the_latest_samples() {
        let mut h = GridHistory::new(1.0, 16);
        for b in 0..10u64 {
            let block: Vec<f64> = (0..10).map(|i| (b * 10 + i) as f64).collect();
            h.push_block(b * 10, &block);
        }
        assert_eq!(h.value_at(95.0), 95.0);
        assert_eq!(h.value_at(90.5), 90.5);
        assert!(h.earliest_time_s() <= 85.0);
    }
}
