//! Latency: delay between two records on the same grid by cross-correlation, phase delay and group delay from
//! sine fits, and the line type of a latency budget.
//!
//! Sign convention everywhere: a positive delay means the output is later than the input.

use std::f64::consts::{PI, TAU};

use num_complex::Complex64;
use realfft::RealFftPlanner;

use super::sinefit::{fit_multitone, fit3};

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
    ///
    /// When the input is long enough (over 16 `max_lag`), only its interior `[max_lag, len - max_lag)` takes part,
    /// tapered by a Hann window, so every lag within the search range sums over the same products. Without the
    /// trim, the overlap shrinks linearly with the lag and that taper pulls the peak of a periodic signal toward
    /// zero lag (by about (P/2 pi)^2 / N samples for a sine of period P in N samples); without the window, a
    /// segment holding a fractional number of cycles adds an edge term that moves the peak by samples.
    pub(crate) fn new(input: &[f64], output: &[f64], max_lag: usize) -> Self {
        let trim = if input.len() > 16 * max_lag {
            max_lag
        } else {
            0
        };
        let len = fft_len(input.len().max(output.len()) + max_lag + 1);
        let mut planner = RealFftPlanner::<f64>::new();
        let fwd = planner.plan_fft_forward(len);
        let inv = planner.plan_fft_inverse(len);
        let mut buf = vec![0.0; len];
        let mut spec_in = fwd.make_output_vec();
        let mut spec_out = fwd.make_output_vec();

        let inner = &input[trim..input.len() - trim];
        let mean_in = inner.iter().sum::<f64>() / inner.len().max(1) as f64;
        let m = inner.len();
        // Hann taper by a rotation recurrence (restarted exactly every 4096 samples) rather than a cosine per
        // sample.
        let step = if m > 1 { TAU / (m - 1) as f64 } else { 0.0 };
        let (ds, dc) = step.sin_cos();
        let (mut s, mut c) = (0.0f64, 1.0f64);
        for (i, v) in inner.iter().enumerate() {
            if i % 4096 == 0 {
                (s, c) = (step * i as f64).sin_cos();
            }
            let w = if trim > 0 && m > 1 {
                0.5 - 0.5 * c
            } else {
                1.0
            };
            buf[trim + i] = (v - mean_in) * w;
            (s, c) = (s * dc + c * ds, c * dc - s * ds);
        }
        fwd.process(&mut buf, &mut spec_in)
            .expect("length matches the plan");

        let mean_out = output.iter().sum::<f64>() / output.len().max(1) as f64;
        buf.fill(0.0);
        for (p, v) in buf.iter_mut().zip(output) {
            *p = v - mean_out;
        }
        fwd.process(&mut buf, &mut spec_out)
            .expect("length matches the plan");
        let spectrum: Vec<Complex64> = spec_in
            .iter()
            .zip(&spec_out)
            .map(|(a, b)| a.conj() * b)
            .collect();
        let mut tmp = spectrum.clone();
        tmp[0].im = 0.0;
        let last = tmp.len() - 1;
        tmp[last].im = 0.0;
        inv.process(&mut tmp, &mut buf)
            .expect("length matches the plan");
        let scale = 1.0 / len as f64;
        for v in &mut buf {
            *v *= scale;
        }
        CrossCorrelation {
            len,
            spectrum,
            lags: buf,
        }
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
    let usable =
        input.len() >= 2 && output.len() >= 2 && sample_rate_hz > 0.0 && max_delay_s >= 0.0;
    if !usable {
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
pub fn phase_delay_s(
    input: &[f64],
    output: &[f64],
    sample_rate_hz: f64,
    f_hz: f64,
    coarse_delay_s: f64,
) -> f64 {
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
pub fn group_delay_s(
    input: &[f64],
    output: &[f64],
    sample_rate_hz: f64,
    tones_hz: &[f64],
) -> Vec<(f64, f64)> {
    let mut tones = tones_hz.to_vec();
    tones.sort_by(f64::total_cmp);
    let fi = fit_multitone(input, sample_rate_hz, &tones, 0.0);
    let fo = fit_multitone(output, sample_rate_hz, &tones, 0.0);
    let dphi: Vec<f64> = fi
        .tones
        .iter()
        .zip(&fo.tones)
        .map(|(i, o)| o.phase_rad - i.phase_rad)
        .collect();
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

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};

    /// White Gaussian noise with its Nyquist bin removed, and the same record delayed by `delay` samples
    /// exactly (circularly, in the frequency domain: X_k e^{-i 2 pi k delay / n}).
    fn noise_and_delayed(n: usize, delay: f64, seed: u64) -> (Vec<f64>, Vec<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let normal = Normal::new(0.0, 1.0).unwrap();
        let mut x: Vec<f64> = (0..n).map(|_| normal.sample(&mut rng)).collect();
        let mut planner = RealFftPlanner::<f64>::new();
        let fwd = planner.plan_fft_forward(n);
        let inv = planner.plan_fft_inverse(n);
        let mut spec = fwd.make_output_vec();
        fwd.process(&mut x, &mut spec).unwrap();
        let last = spec.len() - 1;
        spec[0] = Complex64::new(0.0, 0.0);
        spec[last] = Complex64::new(0.0, 0.0);
        let mut delayed_spec: Vec<Complex64> = spec
            .iter()
            .enumerate()
            .map(|(k, v)| v * Complex64::from_polar(1.0, -TAU * k as f64 * delay / n as f64))
            .collect();
        let mut input = vec![0.0; n];
        let mut output = vec![0.0; n];
        inv.process(&mut spec, &mut input).unwrap();
        inv.process(&mut delayed_spec, &mut output).unwrap();
        (input, output)
    }

    #[test]
    fn fractional_delay_of_broadband_noise_is_recovered_to_a_hundredth_of_a_sample() {
        let fs = 48_000.0;
        for (delay, seed) in [(3.37, 1), (-12.81, 2), (0.5, 3), (0.0, 4)] {
            let (x, y) = noise_and_delayed(8192, delay, seed);
            let d = xcorr_delay_s(&x, &y, fs, 0.001) * fs;
            assert!((d - delay).abs() < 0.01, "{d} vs {delay}");
        }
    }

    #[test]
    fn a_parabola_alone_would_miss_by_more_than_the_tolerance() {
        // Shows the band-limited refinement matters: on white noise the correlation is sinc-shaped and the
        // three-point parabola is biased by a tenth of a sample near a 0.3-sample offset.
        let (x, y) = noise_and_delayed(8192, 0.3, 5);
        let cc = CrossCorrelation::new(&x, &y, 10);
        let l0 = cc.peak_lag(10);
        let (ym, y0, yp) = (cc.at_lag(l0 - 1), cc.at_lag(l0), cc.at_lag(l0 + 1));
        let parabola = l0 as f64 + 0.5 * (ym - yp) / (ym - 2.0 * y0 + yp);
        assert!((parabola - 0.3).abs() > 0.03, "parabola {parabola}");
        assert!((cc.refine(l0) - 0.3).abs() < 0.01);
    }

    #[test]
    fn a_polarity_flip_is_still_found() {
        let fs = 1.0;
        let (x, y) = noise_and_delayed(4096, 7.25, 9);
        let flipped: Vec<f64> = y.iter().map(|v| -0.7 * v + 0.3).collect();
        let d = xcorr_delay_s(&x, &flipped, fs, 50.0);
        assert!((d - 7.25).abs() < 0.01, "{d}");
    }

    #[test]
    fn records_of_different_lengths_and_an_offset_still_line_up() {
        // A pulse-like broadband burst at sample 100 in the input and 100 + 40.6 in a longer output with DC.
        let burst = |t: f64| (-0.5 * (t / 3.0).powi(2)).exp() * (1.3 * t).cos();
        let x: Vec<f64> = (0..500).map(|i| burst(i as f64 - 100.0)).collect();
        let y: Vec<f64> = (0..900)
            .map(|i| 2.0 + 0.5 * burst(i as f64 - 140.6))
            .collect();
        let d = xcorr_delay_s(&x, &y, 1.0, 100.0);
        assert!((d - 40.6).abs() < 0.01, "{d}");
    }

    #[test]
    fn phase_delay_of_several_periods_is_resolved_by_a_coarse_estimate() {
        let (fs, f, n) = (10_000.0, 123.4, 20_000);
        let delay = 2.3 / f;
        let x: Vec<f64> = (0..n)
            .map(|i| (TAU * f * i as f64 / fs + 0.4).cos())
            .collect();
        let y: Vec<f64> = (0..n)
            .map(|i| 0.8 * (TAU * f * (i as f64 / fs - delay) + 0.4).cos())
            .collect();
        for coarse in [delay, delay + 0.4 / f, delay - 0.4 / f] {
            let d = phase_delay_s(&x, &y, fs, f, coarse);
            assert!((d - delay).abs() < 1e-12, "{d} vs {delay}");
        }
        // A coarse estimate a whole period off lands a period off: the ambiguity is real.
        let d = phase_delay_s(&x, &y, fs, f, delay + 1.0 / f);
        assert!((d - delay - 1.0 / f).abs() < 1e-12);
    }

    #[test]
    fn group_delay_of_a_pure_delay_is_flat_and_equals_it() {
        let (fs, n) = (48_000.0, 48_000);
        let tones = [500.0, 1_100.0, 2_300.0, 3_700.0, 5_100.0]; // spacing <= 1.4 kHz: unambiguous below 357 us
        let delay = 1.234e-4;
        let make = |d: f64| -> Vec<f64> {
            (0..n)
                .map(|i| {
                    let t = i as f64 / fs - d;
                    tones
                        .iter()
                        .enumerate()
                        .map(|(k, f)| (TAU * f * t + k as f64).cos())
                        .sum()
                })
                .collect()
        };
        let gd = group_delay_s(&make(0.0), &make(delay), fs, &tones);
        assert_eq!(gd.len(), tones.len() - 1);
        for (k, (f, d)) in gd.iter().enumerate() {
            assert!((f - 0.5 * (tones[k] + tones[k + 1])).abs() < 1e-9);
            assert!((d - delay).abs() < 1e-12, "{gd:?}");
        }
    }

    #[test]
    fn group_delay_of_a_symmetric_fir_is_half_its_length_minus_one() {
        // A linear-phase FIR of L taps delays every frequency by (L - 1)/2 samples (A. V. Oppenheim and
        // R. W. Schafer, "Discrete-Time Signal Processing", section on generalized linear phase). Hann-shaped taps,
        // L = 9, tones well inside the main lobe (the amplitude response stays positive, so no phase jumps).
        let h: Vec<f64> = (0..9)
            .map(|m| 0.5 - 0.5 * (TAU * (m + 1) as f64 / 10.0).cos())
            .collect();
        let (fs, n) = (1.0, 20_000);
        let tones = [0.011, 0.023, 0.047, 0.071, 0.093];
        let x: Vec<f64> = (0..n)
            .map(|i| {
                tones
                    .iter()
                    .enumerate()
                    .map(|(k, f)| (TAU * f * i as f64 + 0.5 * k as f64).cos())
                    .sum()
            })
            .collect();
        let y: Vec<f64> = (0..n)
            .map(|i| (0..9).filter(|&m| m <= i).map(|m| h[m] * x[i - m]).sum())
            .collect();
        // Drop the start-up transient from both records, keeping the same time origin.
        let gd = group_delay_s(&x[8..], &y[8..], fs, &tones);
        for (_, d) in gd {
            assert!((d - 4.0).abs() < 1e-9, "{d}");
        }
    }

    #[test]
    fn budget_lines_add_up() {
        let lines = vec![
            BudgetLine {
                stage: "adc".into(),
                seconds: 0.5e-3,
            },
            BudgetLine {
                stage: "block".into(),
                seconds: 128.0 / 48_000.0,
            },
        ];
        assert!((budget_total_s(&lines) - (0.5e-3 + 128.0 / 48_000.0)).abs() < 1e-15);
    }

    #[test]
    fn fft_length_is_even_smooth_and_large_enough() {
        for n in [1usize, 2, 3, 7, 100, 1000, 4097, 1_000_003] {
            let l = fft_len(n);
            let mut m = l;
            while m.is_multiple_of(2) {
                m /= 2;
            }
            while m.is_multiple_of(3) {
                m /= 3;
            }
            assert!(l >= n && l.is_multiple_of(2) && m == 1, "{n} -> {l}");
        }
    }
}
