//! Latency: delay between two records on the same grid by cross-correlation, phase delay and group delay from
//! sine fits, and the line type of a latency budget.
//!
//! Sign convention everywhere: a positive delay means the output is later than the input.

use std::f64::consts::{PI, TAU};

use num_complex::Complex64;
use realfft::RealFftPlanner;

use super::sinefit::{fit3, fit_multitone};

/// One line of a latency budget.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct BudgetLine {
    /// What the line stands for (a stage name, "transport", "jitter buffer", ...).
    pub stage: String,
    /// Its contribution (s).
    pub seconds: f64,
}

/// Sum of a budget's lines (s).
pub fn budget_total_s(lines: &[BudgetLine]) -> f64 {
    lines.iter().map(|l| l.seconds).sum()
}

/// Smallest length `>= n` of the form `2^a 3^b` with `a >= 1` (even, and fast for the FFT).
fn fft_len(n: usize) -> usize {
    let mut best = n.max(2).next_power_of_two();
    let mut p3 = 1usize;
    while p3 < best {
        let mut m = p3 * 2;
        while m < n {
            m *= 2;
        }
        best = best.min(m);
        p3 *= 3;
    }
    best
}

/// Cross-correlation of two mean-removed records through a zero-padded real FFT, kept in the frequency domain
/// so it can be evaluated between lags by exact trigonometric (band-limited) interpolation.
pub(crate) struct CrossCorrelation {
    /// Padded length (even).
    len: usize,
    /// Cross-spectrum `conj(IN_k) OUT_k`, k = 0..=len/2.
    spectrum: Vec<Complex64>,
    /// `r[l] = sum_n out[n + l] in[n]` at integer lags, stored circularly (index `l mod len`).
    lags: Vec<f64>,
}

impl CrossCorrelation {
    /// Prepares the correlation for lags up to `max_lag` samples either way, without wrap-around.
    pub(crate) fn new(input: &[f64], output: &[f64], max_lag: usize) -> Self {
        let len = fft_len(input.len().max(output.len()) + max_lag + 1);
        let mut planner = RealFftPlanner::<f64>::new();
        let fwd = planner.plan_fft_forward(len);
        let inv = planner.plan_fft_inverse(len);
        let mut buf = vec![0.0; len];
        let mut spec_in = fwd.make_output_vec();
        let mut spec_out = fwd.make_output_vec();
        for (src, spec) in [(input, &mut spec_in), (output, &mut spec_out)] {
            let mean = src.iter().sum::<f64>() / src.len().max(1) as f64;
            buf.fill(0.0);
            for (p, v) in buf.iter_mut().zip(src) {
                *p = v - mean;
            }
            fwd.process(&mut buf, spec).expect("length matches the plan");
        }
        let spectrum: Vec<Complex64> = spec_in.iter().zip(&spec_out).map(|(a, b)| a.conj() * b).collect();
        let mut tmp = spectrum.clone();
        tmp[0].im = 0.0;
        let last = tmp.len() - 1;
        tmp[last].im = 0.0;
        inv.process(&mut tmp, &mut buf).expect("length matches the plan");
        let scale = 1.0 / len as f64;
        for v in &mut buf {
            *v *= scale;
        }
        CrossCorrelation { len, spectrum, lags: buf }
    }

    /// Correlation at integer lag `l` (|l| < len).
    pub(crate) fn at_lag(&self, l: i64) -> f64 {
        self.lags[l.rem_euclid(self.len as i64) as usize]
    }

    /// Integer lag in `[-max_lag, max_lag]` with the largest |r|.
    pub(crate) fn peak_lag(&self, max_lag: usize) -> i64 {
        let m = max_lag as i64;
        let mut best = 0i64;
        let mut best_v = -1.0;
        for l in -m..=m {
            let v = self.at_lag(l).abs();
            if v > best_v {
                best_v = v;
                best = l;
            }
        }
        best
    }

    /// Band-limited correlation and its first two derivatives at a real lag `tau` (samples).
    pub(crate) fn eval(&self, tau: f64) -> (f64, f64, f64) {
        let len = self.len as f64;
        let half = self.len / 2;
        let step = TAU * tau / len;
        let (sd, cd) = step.sin_cos();
        let (mut r, mut r1, mut r2) = (self.spectrum[0].re, 0.0, 0.0);
        let mut e = Complex64::new(cd, sd);
        for k in 1..half {
            if k % 1024 == 0 {
                let (s, c) = (step * k as f64).sin_cos();
                e = Complex64::new(c, s);
            }
            let w = TAU * k as f64 / len;
            let z = self.spectrum[k] * e;
            r += 2.0 * z.re;
            r1 += -2.0 * w * z.im;
            r2 += -2.0 * w * w * z.re;
            e = Complex64::new(e.re * cd - e.im * sd, e.re * sd + e.im * cd);
        }
        let ny = self.spectrum[half].re;
        let (s, c) = (PI * tau).sin_cos();
        r += ny * c;
        r1 -= ny * PI * s;
        r2 -= ny * PI * PI * c;
        (r / len, r1 / len, r2 / len)
    }

    /// Sub-sample lag of the extremum next to integer lag `l0`: parabolic start, then Newton on the
    /// band-limited correlation's derivative, kept within one sample of `l0`.
    pub(crate) fn refine(&self, l0: i64) -> f64 {
        let (ym, y0, yp) = (self.at_lag(l0 - 1), self.at_lag(l0), self.at_lag(l0 + 1));
        let sign = if y0 < 0.0 { -1.0 } else { 1.0 };
        let den = ym - 2.0 * y0 + yp;
        let mut tau = l0 as f64;
        if den * sign < 0.0 {
            tau += (0.5 * (ym - yp) / den).clamp(-0.5, 0.5);
        }
        let (lo, hi) = (l0 as f64 - 1.0, l0 as f64 + 1.0);
        for _ in 0..30 {
            let (_, d1, d2) = self.eval(tau);
            if d2 * sign >= 0.0 || d2 == 0.0 {
                break; // not concave around a maximum of |r|: keep what we have
            }
            let next = (tau - d1 / d2).clamp(lo, hi);
            let moved = (next - tau).abs();
            tau = next;
            if moved < 1e-10 {
                break;
            }
        }
        tau
    }
}

/// Delay of `output` relative to `input` (s; positive = output later), both on the same grid at
/// `sample_rate_hz`. Means are removed; the cross-correlation is computed by a real FFT of padded length (no
/// wrap-around within the search range), the absolute peak is taken over lags up to `max_delay_s` either way
/// (so a polarity flip is still found), and refined between samples by Newton's method on the exact
/// band-limited (trigonometric) interpolation of the correlation, which has no parabolic-fit bias.
/// NaN when a record has fewer than 2 samples or the rate is not positive.
pub fn xcorr_delay_s(input: &[f64], output: &[f64], sample_rate_hz: f64, max_delay_s: f64) -> f64 {
    if input.len() < 2 || output.len() < 2 || !(sample_rate_hz > 0.0) || !(max_delay_s >= 0.0) {
        return f64::NAN;
    }
    let longest = input.len().max(output.len());
    let max_lag = ((max_delay_s * sample_rate_hz).ceil() as usize).min(longest - 1);
    let cc = CrossCorrelation::new(input, output, max_lag + 1);
    let l0 = cc.peak_lag(max_lag);
    cc.refine(l0) / sample_rate_hz
}

/// Phase delay (s) of `output` against `input` at `f_hz`: three-parameter fits of both (same time origin), delay
/// `(phi_in - phi_out) / (2 pi f)` modulo one period, the period count chosen to land nearest `coarse_delay_s`
/// (e.g. from [`xcorr_delay_s`]). A polarity flip cannot be told from half a period here.
pub fn phase_delay_s(input: &[f64], output: &[f64], sample_rate_hz: f64, f_hz: f64, coarse_delay_s: f64) -> f64 {
    let fi = fit3(input, sample_rate_hz, f_hz, 0.0);
    let fo = fit3(output, sample_rate_hz, f_hz, 0.0);
    let period = 1.0 / f_hz;
    let base = (fi.phase_rad - fo.phase_rad).rem_euclid(TAU) / (TAU * f_hz);
    base + ((coarse_delay_s - base) / period).round() * period
}

/// Group delay `-d(phase)/d(omega)` (s) between adjacent tones of a multitone, from joint three-parameter fits of
/// both records at `tones_hz` (sorted here). Returns `(f_mid_hz, delay_s)` for each adjacent pair, at the pair's
/// mid frequency: `len - 1` entries. The phase step between adjacent tones is wrapped into (-pi, pi], so the
/// delay must stay below `1 / (2 df)` for a tone spacing `df`.
pub fn group_delay_s(input: &[f64], output: &[f64], sample_rate_hz: f64, tones_hz: &[f64]) -> Vec<(f64, f64)> {
    let mut tones = tones_hz.to_vec();
    tones.sort_by(f64::total_cmp);
    let fi = fit_multitone(input, sample_rate_hz, &tones, 0.0);
    let fo = fit_multitone(output, sample_rate_hz, &tones, 0.0);
    let dphi: Vec<f64> = fi.tones.iter().zip(&fo.tones).map(|(i, o)| o.phase_rad - i.phase_rad).collect();
    (1..tones.len())
        .map(|i| {
            let mut d = (dphi[i] - dphi[i - 1]).rem_euclid(TAU);
            if d > PI {
                d -= TAU;
            }
            let dw = TAU * (tones[i] - tones[i - 1]);
            (0.5 * (tones[i] + tones[i - 1]), -d / dw)
        })
        .collect()
}
