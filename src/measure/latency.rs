//! Latency: delay between two records on the same grid by cross-correlation, phase delay and group delay from
//! sine fits, and the line type of a latency budget.
//!
//! Sign convention everywhere: a positive delay means the output is later than the input.

use std::f64::consts::{PI, TAU};

use super::spectrum::{plan_forward, plan_inverse};
use num_complex::Complex64;

use super::sinefit::{fit_multitone, fit3};
use crate::scenario::{ChirpLaw, Waveform};
use crate::signal::rotation::Quad;
use crate::signal::waveform::chirp_cycles;

pub use crate::stages::roles::BudgetLine;

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
        let fwd = plan_forward(len);
        let inv = plan_inverse(len);
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
    ///
    /// The phase factors `e^{i 2 pi k tau / len}` come from four interleaved rotations (bins k, k+1, k+2, k+3,
    /// each advancing four bins per step), recomputed exactly every 1024 bins, so the recurrences overlap.
    pub(crate) fn eval(&self, tau: f64) -> (f64, f64, f64) {
        let len = self.len as f64;
        let half = self.len / 2;
        let step = TAU * tau / len;
        let w1 = TAU / len;
        let (mut r, mut r1, mut r2) = ([0.0f64; 4], [0.0f64; 4], [0.0f64; 4]);
        let mut add = |l: usize, k: usize, rot: &Quad| {
            let w = w1 * k as f64;
            let z = self.spectrum[k] * Complex64::new(rot.cos[l], rot.sin[l]);
            r[l] += z.re;
            r1[l] -= w * z.im;
            r2[l] -= w * w * z.re;
        };
        // Bins 1 .. half (exclusive), in runs of 1024 restarted exactly.
        let mut k0 = 1;
        while k0 < half {
            let k_end = (k0 + 1024).min(half);
            let mut rot = Quad::new(step * k0 as f64, step);
            let mut k = k0;
            while k + 4 <= k_end {
                for l in 0..4 {
                    add(l, k + l, &rot);
                }
                rot.advance();
                k += 4;
            }
            for (l, kk) in (k..k_end).enumerate() {
                add(l, kk, &rot);
            }
            k0 = k_end;
        }
        let total = |v: [f64; 4]| 2.0 * ((v[0] + v[1]) + (v[2] + v[3]));
        let (mut r, mut r1, mut r2) = (self.spectrum[0].re + total(r), total(r1), total(r2));
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

/// The measured delay of one block of the record.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct BlockDelay {
    /// Centre of the block's output stretch (s, run time).
    pub time_s: f64,
    pub delay_s: f64,
}

/// The measured delay tracked over the run (`latency.over_time`).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct LatencyOverTime {
    pub min_s: f64,
    pub max_s: f64,
    /// The last block's delay.
    pub final_s: f64,
    /// max - min.
    pub spread_s: f64,
    /// Block length (s).
    pub block_s: f64,
    /// Each block's delay, in time order.
    pub blocks: Vec<BlockDelay>,
}

/// Fewest samples in a tracking block.
const MIN_BLOCK_SAMPLES: usize = 64;

/// The delay of `output` behind `input` (same instants, `rate_hz`, first sample at `t0_s`) tracked over
/// `blocks` equal blocks, each cross-correlated on its own ([`xcorr_delay_s`], refined between samples).
///
/// The output is taken `centre_s` (rounded to whole samples) after the input, so every block compares the
/// output with the input it came from: the blocks cover the output record from `centre_s` on, each paired
/// with the input stretch `centre_s` earlier. The search spans a quarter period either side of `centre_s`
/// for a periodic source of `period_s` (the correlation of a sine repeats every period, and peaks in
/// magnitude every half period), otherwise an eighth of a block; at least two samples either way.
///
/// Fewer blocks are used when the record cannot hold `blocks` of at least 64 samples (and, for a periodic
/// source, at least four periods); `None` with fewer than two, or without a finite `centre_s`.
pub fn latency_over_time(
    input: &[f64],
    output: &[f64],
    rate_hz: f64,
    t0_s: f64,
    centre_s: f64,
    period_s: Option<f64>,
    blocks: usize,
) -> Option<LatencyOverTime> {
    if !(centre_s.is_finite() && rate_hz > 0.0) || blocks < 2 {
        return None;
    }
    let len = input.len().min(output.len());
    let shift = (centre_s * rate_hz).round().max(0.0) as usize;
    let usable = len.checked_sub(shift)?;
    let min_block = match period_s {
        Some(p) if p.is_finite() && p > 0.0 => {
            MIN_BLOCK_SAMPLES.max((4.0 * p * rate_hz).ceil() as usize)
        }
        _ => MIN_BLOCK_SAMPLES,
    };
    let count = blocks.min(usable / min_block);
    if count < 2 {
        return None;
    }
    let b = usable / count;
    let half_window_s = match period_s {
        Some(p) if p.is_finite() && p > 0.0 => 0.25 * p,
        _ => b as f64 / 8.0 / rate_hz,
    }
    .max(2.0 / rate_hz)
    .min(b as f64 / 4.0 / rate_hz);
    let mut points = Vec::with_capacity(count);
    for k in 0..count {
        let a = k * b;
        let d = xcorr_delay_s(
            &input[a..a + b],
            &output[shift + a..shift + a + b],
            rate_hz,
            half_window_s,
        );
        points.push(BlockDelay {
            time_s: t0_s + (shift + a) as f64 / rate_hz + 0.5 * (b - 1) as f64 / rate_hz,
            delay_s: shift as f64 / rate_hz + d,
        });
    }
    let finite: Vec<f64> = points
        .iter()
        .map(|p| p.delay_s)
        .filter(|d| d.is_finite())
        .collect();
    let min_s = finite.iter().copied().fold(f64::INFINITY, f64::min);
    let max_s = finite.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if finite.is_empty() {
        return None;
    }
    Some(LatencyOverTime {
        min_s,
        max_s,
        final_s: points.last().map_or(f64::NAN, |p| p.delay_s),
        spread_s: max_s - min_s,
        block_s: b as f64 / rate_hz,
        blocks: points,
    })
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

/// The sweep of a chirp source, as the source generates it: the frequency moves from `start_hz` to `stop_hz`
/// over `sweep_s` by `law`, and the sweep restarts (phase 0) at every multiple of `sweep_s` in absolute time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ChirpSweep {
    pub start_hz: f64,
    pub stop_hz: f64,
    pub sweep_s: f64,
    pub law: ChirpLaw,
}

impl ChirpSweep {
    /// The sweep of a chirp waveform; `None` for other waveforms.
    pub fn from_waveform(w: &Waveform) -> Option<Self> {
        match w {
            Waveform::Chirp {
                start_hz,
                stop_hz,
                sweep_s,
                law,
                ..
            } => Some(ChirpSweep {
                start_hz: *start_hz,
                stop_hz: *stop_hz,
                sweep_s: *sweep_s,
                law: *law,
            }),
            _ => None,
        }
    }

    /// True when the source uses the logarithmic law (it falls back to the linear one when it cannot).
    fn is_log(&self) -> bool {
        self.law == ChirpLaw::Logarithmic
            && self.start_hz > 0.0
            && self.stop_hz > 0.0
            && self.start_hz != self.stop_hz
    }

    /// Phase (cycles) at absolute time `t_s`.
    fn cycles(&self, t_s: f64) -> f64 {
        chirp_cycles(self.start_hz, self.stop_hz, self.sweep_s, self.law, t_s)
    }

    /// Instantaneous frequency (Hz) at `tau_s` into a sweep.
    fn frequency_hz(&self, tau_s: f64) -> f64 {
        let (f0, f1, t) = (self.start_hz, self.stop_hz, self.sweep_s);
        if self.is_log() {
            f0 * (f1 / f0).powf(tau_s / t)
        } else {
            f0 + (f1 - f0) * tau_s / t
        }
    }

    /// The delay `tau` (s) that makes the sweep advance by `extra_cycles` more over `[u1 - tau, u2 - tau]` than
    /// over `[u1, u2]` (times into the sweep, the law extended past the ends): a record delayed by `tau` against
    /// the chirp gains `-extra_cycles` over that span. Closed form for both laws; NaN when there is none.
    fn delay_for_extra_cycles_s(&self, u1: f64, u2: f64, extra_cycles: f64) -> f64 {
        let (f0, f1, t) = (self.start_hz, self.stop_hz, self.sweep_s);
        if self.is_log() {
            // cycles(u) = f0 / a (e^{a u} - 1): the span's advance scales by e^{-a tau} when shifted by tau.
            let a = (f1 / f0).ln() / t;
            let span = f0 / a * ((a * u2).exp() - (a * u1).exp());
            -(1.0 + extra_cycles / span).ln() / a
        } else {
            // cycles(u) = f0 u + k u^2 / 2: the span's advance drops by k tau (u2 - u1) when shifted by tau.
            let k = (f1 - f0) / t;
            -extra_cycles / (k * (u2 - u1))
        }
    }
}

/// Hann-weighted least-squares fit of `a cos(2 pi c(t)) + b sin(2 pi c(t)) + d` to `x[n_a..n_b]` (sample n at
/// `t0_s + n / fs`), with `c` the chirp's phase: the input's own phase law is the basis, so the fit is exact for
/// any window length when the record is the chirp with a constant phase offset. Returns the complex amplitude
/// `a - i b` (the record is `Re[(a - i b) e^{i 2 pi c(t)}] + d`).
fn chirp_phasor(
    x: &[f64],
    fs: f64,
    t0_s: f64,
    chirp: &ChirpSweep,
    n_a: usize,
    n_b: usize,
) -> Complex64 {
    let m = (n_b - n_a) as f64;
    // Normal equations of the weighted fit: sums of w u_i u_j and w u_i x for u = (cos, sin, 1).
    let mut g = [[0.0f64; 3]; 3];
    let mut r = [0.0f64; 3];
    for (i, &v) in x[n_a..n_b].iter().enumerate() {
        let w = 0.5 - 0.5 * (TAU * (i as f64 + 0.5) / m).cos();
        let c = chirp.cycles(t0_s + (n_a + i) as f64 / fs);
        let (s, co) = (TAU * (c - c.floor())).sin_cos();
        let u = [co, s, 1.0];
        for (gj, (rj, uj)) in g.iter_mut().zip(r.iter_mut().zip(u)) {
            *rj += w * uj * v;
            for (gjk, uk) in gj.iter_mut().zip(u) {
                *gjk += w * uj * uk;
            }
        }
    }
    // Cramer's rule on the symmetric 3x3 system (well conditioned once the window holds a cycle or so).
    let det3 = |m: &[[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
            - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let det = det3(&g);
    let solve = |col: usize| {
        let mut mm = g;
        for (row, rv) in mm.iter_mut().zip(r) {
            row[col] = rv;
        }
        det3(&mm) / det
    };
    Complex64::new(solve(0), -solve(1))
}

/// Most sweeps [`chirp_group_delay_s`] averages per point.
const MAX_SWEEPS_AVERAGED: u64 = 4096;

/// Group delay (s) as a function of frequency, from a chirp `input` (the source as generated, on the same grid
/// as `output`, first sample at `t0_s`, rate `sample_rate_hz`) and the chain's `output`. Returns up to `points`
/// pairs `(f_hz, delay_s)` in sweep order.
///
/// Method (stationary phase): through a filter of phase `theta(f)`, a slow chirp comes out with the frequency `f`
/// at the time `t_in(f) + tau(f)`, where `t_in(f)` is when the input had it and `tau = -d theta / d omega` the
/// group delay: locally the output is the input delayed by `tau`. Both records are demodulated by the chirp's
/// known phase law: Hann-weighted three-parameter fits (cosine and sine of the chirp phase, constant) over two
/// adjacent windows of length `W` give the output-to-input phase at the window centres `t_c -+ W/2`. Its change
/// across them is how many cycles more (or fewer) the output advanced than the input; `tau` is the shift of the
/// input's phase law that gives the same change (for a linear law `-dphi / (2 pi k W)`, `k` the sweep rate in
/// Hz/s; closed form for the logarithmic law too), and it is assigned to the frequency the output carries at
/// `t_c`, the input's at `t_c - tau`. For a pure delay this is exact (up to the fits' small leakage of the
/// negative-frequency image). Short-time cross-correlation is not used: a window of a slow chirp is nearly a
/// sine, whose correlation peaks near the *phase* delay, not the group delay. Windows follow the chirp, so they
/// need not hold many cycles, but each fit needs about one cycle.
///
/// Placement: the first and last tenth of every sweep are left out (the restart's jump and the chain's transient
/// after it); the `points` centres are evenly spaced over the rest, each using `t_c +- W` with
/// `W = 0.8 sweep_s / (points + 1)`, and every complete sweep in the records contributes (the estimates are
/// averaged). A point no sweep covers is left out.
///
/// Limits: the chirp must be slow compared with the chain, i.e. the group delay and its change must be small
/// over the frequency the chirp moves in a delay (`k tau' << 1`), or the stationary-phase picture fails; the
/// output's phase must move less than half a cycle between the two window centres (`|k| tau W < 1/2` for a
/// linear law); and with the sweep's phase as the time reference, the frequency assigned is the output's
/// averaged over `W`, so the group delay must be smooth on the scale of the frequency swept in `W`. Empty when
/// the chirp does not move (`start_hz == stop_hz`), the sweep or rate is not positive, or `points` is 0.
pub fn chirp_group_delay_s(
    input: &[f64],
    output: &[f64],
    sample_rate_hz: f64,
    t0_s: f64,
    chirp: &ChirpSweep,
    points: usize,
) -> Vec<(f64, f64)> {
    let usable = sample_rate_hz > 0.0
        && chirp.sweep_s > 0.0
        && chirp.start_hz != chirp.stop_hz
        && points > 0
        && chirp.start_hz.is_finite()
        && chirp.stop_hz.is_finite();
    if !usable {
        return Vec::new();
    }
    let fs = sample_rate_hz;
    let n = input.len().min(output.len());
    let t_sweep = chirp.sweep_s;
    let w_s = 0.8 * t_sweep / (points + 1) as f64;
    let half = ((0.5 * w_s * fs).round() as usize).max(2); // samples either side of a window centre
    let w_eff_s = (2 * half) as f64 / fs; // distance between the two window centres, on the grid
    // Sweeps overlapping the record (index m starts at m * sweep_s).
    let t_end_s = t0_s + n as f64 / fs;
    let m_first = (t0_s / t_sweep).floor() as i64;
    let m_last = (t_end_s / t_sweep).floor() as i64;
    // Average over at most MAX_SWEEPS_AVERAGED sweeps, evenly spread, so the cost does not grow with the number of
    // sweeps in the record (a fast chirp over a long record).
    let stride = ((m_last - m_first + 1) as u64)
        .div_ceil(MAX_SWEEPS_AVERAGED)
        .max(1) as usize;
    let mut result = Vec::with_capacity(points);
    for j in 0..points {
        let tau_c = 0.1 * t_sweep + w_s * (j + 1) as f64;
        let (mut sum_f, mut sum_d, mut count) = (0.0, 0.0, 0usize);
        for m in (m_first..=m_last).step_by(stride) {
            // Centre sample, and the two windows [c - 2 half, c) and [c, c + 2 half).
            let t_c = m as f64 * t_sweep + tau_c;
            let c = ((t_c - t0_s) * fs).round();
            if c < (2 * half) as f64 || c + (2 * half) as f64 > n as f64 {
                continue;
            }
            let c = c as usize;
            let t_c = t0_s + (c as f64 - 0.5) / fs; // midway between the two window centres
            let ratio = |a: usize, b: usize| {
                chirp_phasor(output, fs, t0_s, chirp, a, b)
                    / chirp_phasor(input, fs, t0_s, chirp, a, b)
            };
            let early = ratio(c - 2 * half, c);
            let late = ratio(c, c + 2 * half);
            let dphi = (late / early).arg(); // in (-pi, pi]
            if !dphi.is_finite() {
                continue;
            }
            let u_c = t_c - m as f64 * t_sweep;
            let tau = chirp.delay_for_extra_cycles_s(
                u_c - 0.5 * w_eff_s,
                u_c + 0.5 * w_eff_s,
                dphi / TAU,
            );
            if !tau.is_finite() {
                continue;
            }
            let f = chirp.frequency_hz(u_c - tau);
            sum_d += tau;
            sum_f += f;
            count += 1;
        }
        if count > 0 {
            result.push((sum_f / count as f64, sum_d / count as f64));
        }
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};
    use realfft::RealFftPlanner;

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
    fn a_fixed_delay_tracks_flat_within_a_hundredth_of_a_sample() {
        // By construction: the output is the input delayed by 37.3 samples exactly (frequency-domain shift),
        // so every block must find 37.3 samples.
        let fs = 48_000.0;
        let (x, y) = noise_and_delayed(48_000, 37.3, 7);
        let t = latency_over_time(&x, &y, fs, 0.0, 37.0 / fs, None, 12).unwrap();
        assert_eq!(t.blocks.len(), 12);
        for p in &t.blocks {
            assert!((p.delay_s * fs - 37.3).abs() < 0.01, "{p:?}");
        }
        assert!(t.spread_s * fs < 0.02, "{t:?}");
        assert!(t.blocks.windows(2).all(|w| w[1].time_s > w[0].time_s));
    }

    #[test]
    fn a_delay_that_steps_half_way_shows_in_the_later_blocks() {
        // By construction: the second half of the output is delayed by one more sample (a slip), and the
        // blocks wholly after it must say so.
        let fs = 48_000.0;
        let n = 48_000;
        let (x, y10) = noise_and_delayed(n, 10.0, 8);
        let (_, y11) = noise_and_delayed(n, 11.0, 8);
        let y: Vec<f64> = (0..n)
            .map(|i| if i < n / 2 { y10[i] } else { y11[i] })
            .collect();
        let t = latency_over_time(&x, &y, fs, 0.0, 10.0 / fs, None, 8).unwrap();
        let first = t.blocks.first().unwrap().delay_s * fs;
        let last = t.final_s * fs;
        assert!(
            (first - 10.0).abs() < 0.05 && (last - 11.0).abs() < 0.05,
            "{first} {last}"
        );
        assert!((t.spread_s * fs - 1.0).abs() < 0.1, "{t:?}");
    }

    #[test]
    fn a_record_too_short_for_two_blocks_is_not_tracked() {
        let (x, y) = noise_and_delayed(100, 3.0, 9);
        assert!(latency_over_time(&x, &y, 1.0, 0.0, 3.0, None, 12).is_none());
        assert!(latency_over_time(&x, &y, 1.0, 0.0, f64::NAN, None, 12).is_none());
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
    fn chirp_group_delay_of_a_pure_delay_is_flat_and_equals_it() {
        // A record and its exact copy delayed by D (the chirp's phase law evaluated at t - D, restarts included),
        // with gain and an offset on the output. For a pure delay, both laws: the output at t carries the input's
        // frequency at t - D. Three sweeps in the record, starting mid-sweep.
        let (fs, d) = (200_000.0, 1.234e-4);
        let t0 = 0.0371;
        let n = 60_000; // 0.3 s: three 0.1 s sweeps, partly
        for law in [ChirpLaw::Linear, ChirpLaw::Logarithmic] {
            let chirp = ChirpSweep {
                start_hz: 300.0,
                stop_hz: 6_000.0,
                sweep_s: 0.1,
                law,
            };
            let x = |t: f64| (TAU * chirp.cycles(t)).sin();
            let input: Vec<f64> = (0..n).map(|i| x(t0 + i as f64 / fs)).collect();
            let output: Vec<f64> = (0..n)
                .map(|i| 0.2 - 0.7 * x(t0 + i as f64 / fs - d))
                .collect();
            let gd = chirp_group_delay_s(&input, &output, fs, t0, &chirp, 12);
            assert_eq!(gd.len(), 12, "{law:?}");
            let mut last_f = 0.0;
            for &(f, delay) in &gd {
                assert!(f > last_f && f > 300.0 && f < 6_000.0, "{law:?}: {gd:?}");
                last_f = f;
                // Exact but for the fits' leakage of the image at twice the chirp frequency: measured up to
                // 3e-5 (linear) and 1.1e-3 (logarithmic, whose slow low end moves the phase little per window).
                let tol = 3e-3;
                assert!((delay / d - 1.0).abs() < tol, "{law:?} {f} Hz: {delay:e}");
            }
        }
    }

    #[test]
    fn chirp_group_delay_gives_nothing_for_a_still_chirp_or_no_points() {
        let chirp = ChirpSweep {
            start_hz: 1_000.0,
            stop_hz: 1_000.0,
            sweep_s: 0.1,
            law: ChirpLaw::Linear,
        };
        let x = vec![0.0; 1000];
        assert!(chirp_group_delay_s(&x, &x, 10_000.0, 0.0, &chirp, 4).is_empty());
        let moving = ChirpSweep {
            stop_hz: 2_000.0,
            ..chirp
        };
        assert!(chirp_group_delay_s(&x, &x, 10_000.0, 0.0, &moving, 0).is_empty());
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
