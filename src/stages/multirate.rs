//! Multirate building blocks of the oversampling converters: the cascaded integrator-comb (CIC, sinc^K)
//! decimator, a linear-phase FIR designed by the window method with a compensated passband, its minimum-phase
//! counterpart, and a streaming FIR decimator.
//!
//! Sources: E. B. Hogenauer, "An economical class of digital filters for decimation and interpolation", IEEE
//! Trans. ASSP 29(2), 1981 (the CIC: integer integrators at the high rate, combs at the low rate, response
//! (sin(pi f R / f_in) / (R sin(pi f / f_in)))^K, group delay K (R - 1) / 2 input samples); J. F. Kaiser,
//! "Nonrecursive digital filter design using the I0-sinh window function", Proc. IEEE ISCAS 1974 (the window's
//! beta and length formulas); A. V. Oppenheim and R. W. Schafer, "Discrete-Time Signal Processing", 3rd ed.,
//! 2010, section 7.5 (the window method) and section 13.8 (minimum phase from the real cepstrum).

use std::f64::consts::PI;

use num_complex::Complex64;
use rustfft::FftPlanner;

use crate::measure::window::bessel_i0;

/// A CIC decimator of order `order` by `factor`, on integer inputs (exact: the registers wrap, which Hogenauer
/// shows is harmless when the output fits). `push` takes one input; every `factor` inputs it returns the comb
/// output divided by the DC gain `factor^order`.
#[derive(Debug, Clone)]
pub struct CicDecimator {
    factor: usize,
    integ: Vec<i64>,
    comb: Vec<i64>,
    phase: usize,
    gain: f64,
}

impl CicDecimator {
    pub fn new(order: usize, factor: usize) -> CicDecimator {
        CicDecimator {
            factor: factor.max(1),
            integ: vec![0; order],
            comb: vec![0; order],
            phase: 0,
            gain: (factor.max(1) as f64).powi(order as i32),
        }
    }

    /// Take one input; `Some(output)` on every `factor`-th input (the first on the `factor`-th push).
    #[inline]
    pub fn push(&mut self, x: i64) -> Option<f64> {
        let mut acc = x;
        for s in &mut self.integ {
            *s = s.wrapping_add(acc);
            acc = *s;
        }
        self.phase += 1;
        if self.phase < self.factor {
            return None;
        }
        self.phase = 0;
        for c in &mut self.comb {
            let prev = *c;
            *c = acc;
            acc = acc.wrapping_sub(prev);
        }
        Some(acc as f64 / self.gain)
    }

    pub fn reset(&mut self) {
        self.integ.iter_mut().for_each(|s| *s = 0);
        self.comb.iter_mut().for_each(|s| *s = 0);
        self.phase = 0;
    }
}

/// The CIC's magnitude response at `f` (a fraction of its input rate), normalised to 1 at DC.
pub fn cic_magnitude(order: usize, factor: usize, f: f64) -> f64 {
    if factor <= 1 || f == 0.0 {
        return 1.0;
    }
    let r = factor as f64;
    let num = (PI * f * r).sin();
    let den = r * (PI * f).sin();
    if den.abs() < 1e-300 {
        return 1.0;
    }
    (num / den).abs().powi(order as i32)
}

/// Kaiser's window shape parameter for a stop-band attenuation of `atten_db` (Kaiser 1974).
pub fn kaiser_beta(atten_db: f64) -> f64 {
    if atten_db > 50.0 {
        0.1102 * (atten_db - 8.7)
    } else if atten_db >= 21.0 {
        0.5842 * (atten_db - 21.0).powf(0.4) + 0.07886 * (atten_db - 21.0)
    } else {
        0.0
    }
}

/// What a lowpass FIR must do; frequencies are fractions of the filter's input rate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LowpassSpec {
    /// Passband edge.
    pub pass: f64,
    /// Stop-band edge.
    pub stop: f64,
    /// Largest peak-to-peak passband ripple (dB), after compensation.
    pub ripple_db: f64,
    /// Least stop-band attenuation (dB).
    pub atten_db: f64,
}

impl LowpassSpec {
    /// The window method gives the same deviation in both bands: the smaller of the two asked for.
    fn delta(&self) -> f64 {
        let r = 10f64.powf(self.ripple_db / 20.0);
        let dp = (r - 1.0) / (r + 1.0);
        dp.min(10f64.powf(-self.atten_db / 20.0))
    }
}

/// A designed FIR with what it achieves, measured on a dense grid.
#[derive(Debug, Clone, PartialEq)]
pub struct DesignedFir {
    pub taps: Vec<f64>,
    /// Peak-to-peak passband ripple after compensation (dB).
    pub ripple_db: f64,
    /// Least stop-band attenuation (dB).
    pub atten_db: f64,
}

/// Frequency response of `taps` at `f` (a fraction of the rate).
pub fn fir_response(taps: &[f64], f: f64) -> Complex64 {
    let w = -2.0 * PI * f;
    let rot = Complex64::from_polar(1.0, w);
    let mut z = Complex64::new(1.0, 0.0);
    let mut acc = Complex64::new(0.0, 0.0);
    for &t in taps {
        acc += z * t;
        z *= rot;
    }
    acc
}

/// Ripple (dB, peak to peak, of `|H| / target`) over the passband and the least attenuation (dB) over the stop
/// band, on a grid of `points` frequencies per band.
pub fn measure_lowpass(
    taps: &[f64],
    spec: &LowpassSpec,
    target: &dyn Fn(f64) -> f64,
    points: usize,
) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, 0.0f64);
    for i in 0..=points {
        let f = spec.pass * i as f64 / points as f64;
        let g = fir_response(taps, f).norm() / target(f);
        lo = lo.min(g);
        hi = hi.max(g);
    }
    let mut worst = 0.0f64;
    for i in 0..=points {
        let f = spec.stop + (0.5 - spec.stop) * i as f64 / points as f64;
        worst = worst.max(fir_response(taps, f).norm());
    }
    (20.0 * (hi / lo).log10(), -20.0 * worst.max(1e-300).log10())
}

/// A linear-phase (odd length, symmetric) lowpass by the window method whose passband follows `target(f)` (1 for
/// a plain lowpass; 1 / the droop of an earlier stage to compensate it), meeting `spec` as measured on a dense
/// grid: the Kaiser length is the start, lengthened by a tenth until the measurement passes (at most `max_taps`;
/// what is achieved is returned either way). The DC gain is `target(0)`.
pub fn design_lowpass(
    spec: &LowpassSpec,
    target: &dyn Fn(f64) -> f64,
    max_taps: usize,
) -> DesignedFir {
    let delta = spec.delta();
    let atten = -20.0 * delta.log10();
    let beta = kaiser_beta(atten);
    let dw = 2.0 * PI * (spec.stop - spec.pass);
    let mut n = (((atten - 7.95) / (2.285 * dw)).ceil() as usize + 1).max(5) | 1;
    let fc = 0.5 * (spec.pass + spec.stop);
    let mut best: Option<DesignedFir> = None;
    for _ in 0..12 {
        let taps = windowed(n, fc, beta, target);
        let (ripple_db, atten_db) = measure_lowpass(&taps, spec, target, 512);
        let ok = ripple_db <= spec.ripple_db && atten_db >= spec.atten_db;
        best = Some(DesignedFir {
            taps,
            ripple_db,
            atten_db,
        });
        if ok || n >= max_taps {
            break;
        }
        n = ((n + n / 10 + 2) | 1).min(max_taps | 1);
    }
    best.expect("at least one design")
}

/// `n` taps (odd) of the ideal response `target(f)` for `f < fc`, 0 above, times a Kaiser window of `beta`,
/// scaled so the DC gain equals `target(0)`.
fn windowed(n: usize, fc: f64, beta: f64, target: &dyn Fn(f64) -> f64) -> Vec<f64> {
    let c = (n - 1) / 2;
    // The ideal impulse response: 2 fc sinc(2 fc m) for the flat part, plus the cosine transform of
    // target(f) - target(0) over [0, fc] by Simpson's rule.
    let t0 = target(0.0);
    const K: usize = 1024;
    let df = fc / K as f64;
    let corr: Vec<f64> = (0..=K).map(|i| target(i as f64 * df) - t0).collect();
    let i0b = bessel_i0(beta);
    let mut taps = Vec::with_capacity(n);
    for i in 0..n {
        let m = i as f64 - c as f64;
        let flat = if m == 0.0 {
            2.0 * fc
        } else {
            (2.0 * PI * fc * m).sin() / (PI * m)
        };
        let mut s = 0.0;
        for (k, &v) in corr.iter().enumerate() {
            let w = if k == 0 || k == K {
                1.0
            } else if k % 2 == 1 {
                4.0
            } else {
                2.0
            };
            s += w * v * (2.0 * PI * k as f64 * df * m).cos();
        }
        let ideal = t0 * flat + 2.0 * s * df / 3.0;
        let r = m / c.max(1) as f64;
        let win = bessel_i0(beta * (1.0 - r * r).max(0.0).sqrt()) / i0b;
        taps.push(ideal * win);
    }
    let dc: f64 = taps.iter().sum();
    let scale = t0 / dc;
    taps.iter_mut().for_each(|t| *t *= scale);
    taps
}

/// The minimum-phase filter with the magnitude of `taps` (same length), by folding the real cepstrum of
/// log |H| on a grid 64 times longer (Oppenheim and Schafer 2010, section 13.8). Magnitudes below `floor` (of the
/// peak) are raised to it so the logarithm stays finite: set it under the stop band.
pub fn minimum_phase(taps: &[f64], floor: f64) -> Vec<f64> {
    let n = taps.len();
    let m = (n * 64).next_power_of_two();
    let mut planner = FftPlanner::<f64>::new();
    let fwd = planner.plan_fft_forward(m);
    let inv = planner.plan_fft_inverse(m);
    let mut buf: Vec<Complex64> = (0..m)
        .map(|i| Complex64::new(taps.get(i).copied().unwrap_or(0.0), 0.0))
        .collect();
    fwd.process(&mut buf);
    let peak = buf.iter().map(|h| h.norm()).fold(0.0f64, f64::max);
    for h in &mut buf {
        *h = Complex64::new(h.norm().max(floor * peak).ln(), 0.0);
    }
    inv.process(&mut buf);
    let scale = 1.0 / m as f64;
    // Fold: keep c[0] and c[m/2], double the causal part, drop the anti-causal part.
    for (i, c) in buf.iter_mut().enumerate() {
        let k = if i == 0 || i == m / 2 {
            1.0
        } else if i < m / 2 {
            2.0
        } else {
            0.0
        };
        *c = Complex64::new(c.re * scale * k, 0.0);
    }
    fwd.process(&mut buf);
    for h in &mut buf {
        *h = h.exp();
    }
    inv.process(&mut buf);
    let mut out: Vec<f64> = buf[..n].iter().map(|c| c.re * scale).collect();
    // Keep the DC gain of the original.
    let dc_in: f64 = taps.iter().sum();
    let dc_out: f64 = out.iter().sum();
    if dc_out != 0.0 {
        out.iter_mut().for_each(|t| *t *= dc_in / dc_out);
    }
    out
}

/// Phase delay of `taps` at `f` (a fraction of the rate), in samples: -arg(H) / (2 pi f), the phase unwrapped
/// from DC in small steps.
pub fn fir_phase_delay_samples(taps: &[f64], f: f64) -> f64 {
    if f <= 0.0 {
        return fir_group_delay_at_dc(taps);
    }
    const STEPS: usize = 256;
    let mut prev = fir_response(taps, f * 1e-4);
    let mut phase = prev.arg();
    for i in 1..=STEPS {
        let cur = fir_response(taps, f * i as f64 / STEPS as f64);
        phase += (cur / prev).arg();
        prev = cur;
    }
    -phase / (2.0 * PI * f)
}

/// Group delay at DC (samples): sum n h[n] / sum h[n].
pub fn fir_group_delay_at_dc(taps: &[f64]) -> f64 {
    let s: f64 = taps.iter().sum();
    let m: f64 = taps.iter().enumerate().map(|(i, t)| i as f64 * t).sum();
    m / s
}

/// A streaming FIR decimator by `factor`: every input is stored, one output is computed every `factor` inputs
/// (a dot product over a contiguous window: the history is kept twice over, so no index wraps).
#[derive(Debug, Clone)]
pub struct FirDecimator {
    /// Taps reversed, so the window oldest-first meets them in order.
    rev: Vec<f64>,
    factor: usize,
    hist: Vec<f64>,
    pos: usize,
    phase: usize,
}

impl FirDecimator {
    pub fn new(taps: &[f64], factor: usize) -> FirDecimator {
        let n = taps.len();
        FirDecimator {
            rev: taps.iter().rev().copied().collect(),
            factor: factor.max(1),
            hist: vec![0.0; 2 * n],
            pos: 0,
            phase: 0,
        }
    }

    /// Take one input; `Some(output)` on every `factor`-th.
    #[inline]
    pub fn push(&mut self, x: f64) -> Option<f64> {
        let n = self.rev.len();
        self.hist[self.pos] = x;
        self.hist[self.pos + n] = x;
        self.pos += 1;
        if self.pos == n {
            self.pos = 0;
        }
        self.phase += 1;
        if self.phase < self.factor {
            return None;
        }
        self.phase = 0;
        // Oldest first: hist[pos .. pos + n].
        let window = &self.hist[self.pos..self.pos + n];
        Some(window.iter().zip(&self.rev).map(|(a, b)| a * b).sum())
    }

    pub fn reset(&mut self) {
        self.hist.iter_mut().for_each(|v| *v = 0.0);
        self.pos = 0;
        self.phase = 0;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cic_matches_its_closed_form_response() {
        // Hogenauer 1981: a sinc^K of R taps each; feed a cosine at f and compare the settled output amplitude.
        let (k, r) = (4usize, 8usize);
        for &f in &[0.003, 0.02, 0.051] {
            let mut cic = CicDecimator::new(k, r);
            let scale = 1e6;
            let mut outs = Vec::new();
            for n in 0..200_000usize {
                let x = (scale * (2.0 * PI * f * n as f64).cos()).round() as i64;
                if let Some(y) = cic.push(x) {
                    outs.push(y / scale);
                }
            }
            let tail = &outs[outs.len() / 2..];
            let peak = tail.iter().fold(0.0f64, |a, v| a.max(v.abs()));
            let expect = cic_magnitude(k, r, f);
            assert!(
                (peak - expect).abs() < 2e-3 * expect.max(0.01),
                "{f}: {peak} vs {expect}"
            );
        }
    }

    #[test]
    fn kaiser_design_meets_its_specification() {
        // The specification is checked on a dense grid; the Kaiser length formula (Kaiser 1974) is only a start.
        let spec = LowpassSpec {
            pass: 0.45 / 4.0,
            stop: 0.55 / 4.0,
            ripple_db: 0.01,
            atten_db: 100.0,
        };
        let d = design_lowpass(&spec, &|_| 1.0, 4001);
        assert!(d.ripple_db <= 0.01 && d.atten_db >= 100.0, "{d:?}");
        let (r, a) = measure_lowpass(&d.taps, &spec, &|_| 1.0, 4000);
        assert!(
            r <= 0.0101 && a >= 99.5,
            "dense grid: {r} dB ripple, {a} dB"
        );
        // Linear phase: symmetric taps.
        let n = d.taps.len();
        for i in 0..n / 2 {
            assert!((d.taps[i] - d.taps[n - 1 - i]).abs() < 1e-15);
        }
        // Kaiser's estimate for 100 dB over a 0.1/4 transition is about 257 taps (Kaiser 1974).
        assert!((240..=340).contains(&n), "{n} taps");
    }

    #[test]
    fn compensated_design_flattens_a_cic_droop() {
        let (k, r) = (5usize, 16usize);
        // CIC to 4 x the output rate; the FIR runs at that rate and decimates by 4.
        let droop = move |f: f64| cic_magnitude(k, r, f / r as f64);
        let spec = LowpassSpec {
            pass: 0.45 / 4.0,
            stop: 0.55 / 4.0,
            ripple_db: 0.02,
            atten_db: 90.0,
        };
        let d = design_lowpass(&spec, &|f| 1.0 / droop(f), 4001);
        // The cascade's passband: within the ripple asked for.
        let (mut lo, mut hi) = (f64::INFINITY, 0.0f64);
        for i in 0..=400 {
            let f = spec.pass * i as f64 / 400.0;
            let g = fir_response(&d.taps, f).norm() * droop(f);
            lo = lo.min(g);
            hi = hi.max(g);
        }
        let rip = 20.0 * (hi / lo).log10();
        assert!(rip <= 0.02, "cascade ripple {rip} dB");
        // Uncompensated, the droop at the band edge is far larger than that (closed form above).
        assert!(-20.0 * droop(spec.pass).log10() > 0.1);
    }

    #[test]
    fn minimum_phase_keeps_the_magnitude_and_cuts_the_delay() {
        let spec = LowpassSpec {
            pass: 0.45 / 4.0,
            stop: 0.55 / 4.0,
            ripple_db: 0.01,
            atten_db: 100.0,
        };
        let d = design_lowpass(&spec, &|_| 1.0, 4001);
        let mp = minimum_phase(&d.taps, 1e-7);
        let (r, a) = measure_lowpass(&mp, &spec, &|_| 1.0, 2000);
        assert!(r < 0.02 && a > 90.0, "minimum phase: {r} dB ripple, {a} dB");
        let lin = (d.taps.len() - 1) as f64 / 2.0;
        assert!((fir_group_delay_at_dc(&d.taps) - lin).abs() < 1e-9);
        let mpd = fir_phase_delay_samples(&mp, 0.01);
        assert!(mpd < lin / 4.0, "minimum-phase delay {mpd} vs linear {lin}");
    }

    #[test]
    fn fir_decimator_equals_a_direct_convolution() {
        let taps: Vec<f64> = (0..37).map(|i| ((i * 7 + 3) % 11) as f64 - 5.0).collect();
        let x: Vec<f64> = (0..500).map(|i| ((i * 13) % 17) as f64 - 8.0).collect();
        let mut d = FirDecimator::new(&taps, 4);
        let mut got = Vec::new();
        for &v in &x {
            if let Some(y) = d.push(v) {
                got.push(y);
            }
        }
        for (j, g) in got.iter().enumerate() {
            let n = 4 * j + 3;
            let direct: f64 = (0..taps.len())
                .filter(|&i| i <= n)
                .map(|i| taps[i] * x[n - i])
                .sum();
            assert!((g - direct).abs() < 1e-9, "{j}: {g} vs {direct}");
        }
    }
}
