//! [`resample`] evaluates a Kaiser-windowed sinc kernel centred on each output instant. Because the kernel is
//! symmetric and centred on the exact output instant, the output is time-aligned with the input by
//! construction (zero delay, nothing to compensate), and the same routine applies a band-limited fractional
//! delay for free (see [`super::listening_set`]). The resampler in the `rubato` crate was considered: its sinc
//! resampler works in fixed chunks and reports its delay in whole output frames, so sub-sample time alignment
//! would need extra work on top of it, and its cut-off is chosen for it.
//!
//! The kernel's weights come from a phase bank (polyphase rows; e.g. R. E. Crochiere and L. R. Rabiner,
//! "Multirate Digital Signal Processing", 1983, chapter 4, from memory), each output sample one contiguous dot
//! product that the compiler vectorises (eight running sums in a fixed order: the same bits on every
//! processor and at any thread count):
//! - when the two rates are whole numbers of hertz whose ratio p/q has a small denominator (10 MHz or 400 kHz
//!   -> 48 kHz: q = 3), the output instants take exactly q sub-sample phases: one exact row each;
//! - otherwise (333333.33 Hz -> 48 kHz) 2048 phases per input sample (fewer for the longest kernels, at least
//!   1023), the two rows around the instant's phase blended linearly;
//! - above a ratio of 16 a first stage decimates by a whole factor (a zero-delay Kaiser-windowed sinc,
//!   115 dB, that keeps 0 to 0.5 r and removes everything that would fold into it), leaving the bank a
//!   ratio of 4 to 16, so the cost per output sample stays about 128 x 16 taps whatever the input rate.
//!
//! Quality (measured by the tests with tones, 400 kHz, 10 MHz, 333333.33 Hz and 66.7 MHz -> 48 kHz): the pass
//! band is flat within +-0.0002 dB up to 0.45 r (measured within 6e-5 dB) and the stop band rejects by at
//! least 100 dB from 0.5 r on (measured 107 dB at worst, just above 0.5 r).
//!
//! Kernel design (Kaiser's window formulas, e.g. Oppenheim and Schafer, "Discrete-Time Signal Processing",
//! section 7.5): with r the lower of the two rates, the cut-off (-6 dB) is at 0.475 r, the pass band
//! reaches 0.45 r and the stop band starts at 0.5 r (the output Nyquist frequency when decimating, the
//! input Nyquist frequency when interpolating), attenuation about 100 dB, half-length 64 samples at rate r.
//! When the two rates are equal nothing has to be removed, so the cut-off is placed at exactly half the rate:
//! the kernel then has its zeros on the sample grid and whole-sample shifts are exact.
//!
//! Samples outside the record are taken as zero, so the first and last ~64 output samples (at rate r) of
//! [`resample`] show the record's edges; [`super::listening_set`] trims them.

use rayon::prelude::*;

use crate::Error;
use crate::measure::window::bessel_i0;

/// Kernel half-length in samples of the lower of the two rates.
pub(super) const HALF_LENGTH_LOW_RATE_SAMPLES: f64 = 64.0;
/// Kaiser window shape parameter: about 100 dB stop-band attenuation (Kaiser's formula beta = 0.1102 (A - 8.7)).
const KAISER_BETA: f64 = 10.0;
/// Cut-off (-6 dB point) as a fraction of the lower rate when the rates differ. With the Kaiser transition
/// width (A - 8) / (2.285 x 2 pi x length) ~= 0.05 r, the stop band starts at 0.5 r.
const CUTOFF_FRACTION_OF_LOW_RATE: f64 = 0.475;
/// Kernel table resolution: points per zero crossing of the sinc (linear interpolation between them;
/// error about (pi / 2048)^2 / 8, i.e. below -115 dB of the kernel's peak).
const TABLE_POINTS_PER_ZERO: f64 = 2048.0;

/// A tabulated windowed-sinc low-pass kernel for one pair of rates, in units of input samples.
struct Kernel {
    /// K(z) = sinc(z) * kaiser(z / z_half) for z = i / TABLE_POINTS_PER_ZERO, with trailing zeros.
    table: Vec<f64>,
    /// Cut-off as a fraction of the input rate, times two: the sinc's zero crossings are 1/rho input samples apart.
    rho: f64,
    /// Half-length in input samples.
    half_length_in_samples: f64,
}

impl Kernel {
    fn new(in_rate_hz: f64, out_rate_hz: f64) -> Kernel {
        let low_rate_hz = in_rate_hz.min(out_rate_hz);
        let cutoff_hz = if in_rate_hz == out_rate_hz {
            0.5 * in_rate_hz
        } else {
            CUTOFF_FRACTION_OF_LOW_RATE * low_rate_hz
        };
        let rho = 2.0 * cutoff_hz / in_rate_hz;
        let half_length_in_samples = HALF_LENGTH_LOW_RATE_SAMPLES * in_rate_hz / low_rate_hz;
        Kernel::with(rho, half_length_in_samples, KAISER_BETA)
    }

    /// A kernel with its cut-off at rho / 2 cycles per input sample, reaching `half_length_in_samples` each
    /// side, Kaiser window shape `beta`.
    fn with(rho: f64, half_length_in_samples: f64, beta: f64) -> Kernel {
        let z_half = rho * half_length_in_samples;
        let n = (z_half * TABLE_POINTS_PER_ZERO).ceil() as usize;
        let i0_beta = bessel_i0(beta);
        let mut table = Vec::with_capacity(n + 3);
        for i in 0..=n + 2 {
            let z = i as f64 / TABLE_POINTS_PER_ZERO;
            let v = z / z_half;
            table.push(if v > 1.0 {
                0.0
            } else {
                sinc(z) * bessel_i0(beta * (1.0 - v * v).sqrt()) / i0_beta
            });
        }
        Kernel {
            table,
            rho,
            half_length_in_samples,
        }
    }

    /// The kernel's weight for a tap `z` input samples from the output instant (0 beyond the half-length),
    /// the table read with linear interpolation, scaled so the pass band has unit gain.
    fn weight(&self, z: f64) -> f64 {
        let pos = z.abs() * self.rho * TABLE_POINTS_PER_ZERO;
        let i = pos as usize;
        if i + 1 >= self.table.len() {
            return 0.0;
        }
        let frac = pos - i as f64;
        let a = self.table[i];
        let b = self.table[i + 1];
        (a + frac * (b - a)) * self.rho
    }

    /// One phase row: the weights of taps k = base - l + 1 + j (j in 0..2 l) for an output instant
    /// `base + frac` (frac in [0, 1]).
    fn fill_row(&self, frac: f64, l: usize, row: &mut [f64]) {
        for (j, w) in row.iter_mut().enumerate() {
            *w = self.weight(frac + (l as f64 - 1.0) - j as f64);
        }
    }
}

/// Most weights a phase bank holds (8 bytes each).
const MAX_BANK_WEIGHTS: usize = 1 << 21;
/// Phases per input sample of a bank for a ratio that is not a ratio of small whole numbers (rows blended
/// linearly between neighbouring phases), when [`MAX_BANK_WEIGHTS`] allows.
const BLENDED_PHASES: usize = 2048;
/// Largest denominator of the rate ratio served by an exact polyphase bank.
const MAX_EXACT_DENOMINATOR: u64 = 4096;
/// Decimation ratios above this run a first, integer decimation stage.
const SINGLE_STAGE_MAX_RATIO: f64 = 16.0;
/// The ratio the second stage aims for after the first.
const SECOND_STAGE_RATIO: f64 = 6.0;
/// Attenuation of the first stage's stop band (dB), above the second stage's.
const FIRST_STAGE_ATTENUATION_DB: f64 = 115.0;

/// The first stage of a large decimation: a zero-delay Kaiser-windowed sinc low-pass from `in_rate_hz` to
/// `in_rate_hz / step` that passes what lies below `keep_hz` (the final rate's Nyquist frequency) with ripple of
/// about 10^(-115/20) and removes by about 115 dB from `in_rate_hz / step - keep_hz` on, so nothing folds into
/// 0..keep_hz (Kaiser's design formulas, Oppenheim and Schafer, section 7.5).
fn first_stage_kernel(in_rate_hz: f64, step: f64, keep_hz: f64) -> Kernel {
    let mid_rate_hz = in_rate_hz / step;
    let transition = 2.0 * std::f64::consts::PI * (mid_rate_hz - 2.0 * keep_hz) / in_rate_hz;
    let a = FIRST_STAGE_ATTENUATION_DB;
    let half = ((a - 8.0) / (2.285 * transition) / 2.0).ceil().max(1.0);
    Kernel::with(1.0 / step, half, 0.1102 * (a - 8.7))
}

/// One period `x` with `before` samples of the previous period in front and `after` of the next behind.
fn pad_circular(x: &[f64], before: usize, after: usize) -> Vec<f64> {
    let n = x.len() as i64;
    (0..x.len() + before + after)
        .map(|i| x[(i as i64 - before as i64).rem_euclid(n) as usize])
        .collect()
}

/// Dot product with eight running sums (a fixed order, so the same bits on every processor) that the
/// compiler vectorises.
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let ca = a.chunks_exact(8);
    let cb = b.chunks_exact(8);
    let tail: f64 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    let mut acc = [0.0f64; 8];
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + tail
}

/// How the phase rows of a stage are found.
enum Bank {
    /// The step is p / q input samples (whole numbers, q small): output instants take q phases, one exact row
    /// each, built for the grid's offset at each call.
    Exact { p: u64, q: u64 },
    /// `phases` + 1 rows for the phases i / phases (i in 0..=phases), blended linearly between neighbours.
    Blended { rows: Vec<f64>, phases: usize },
}

/// One phase-bank stage: a kernel evaluated at input positions u0 + m step.
struct Stage {
    kernel: Kernel,
    /// Taps per output sample (2 l), for taps base - l + 1 ..= base + l.
    l: usize,
    bank: Bank,
    /// Input samples per output sample.
    step: f64,
}

/// A band-limited resampler from one rate to another: an optional first decimation stage, then the
/// windowed-sinc [`Kernel`] of the module documentation, both through phase banks.
pub(super) struct Resampler {
    /// The first stage and, for periodic records, the length of one period after it.
    first: Option<(Stage, Option<usize>)>,
    last: Stage,
    /// Reach of the whole resampler on each side of an output instant, in input samples.
    pub(super) half_length_in_samples: f64,
}

/// p / q = a / b in lowest terms when a and b are whole numbers of at most 2^53, else None.
fn whole_ratio(a: f64, b: f64) -> Option<(u64, u64)> {
    let whole = |v: f64| v.fract() == 0.0 && v > 0.0 && v <= 9_007_199_254_740_992.0;
    if !(whole(a) && whole(b)) {
        return None;
    }
    let (a, b) = (a as u64, b as u64);
    let (mut x, mut y) = (a, b);
    while y != 0 {
        (x, y) = (y, x % y);
    }
    Some((a / x, b / x))
}

impl Stage {
    /// `ratio`: the step as p / q in whole numbers, when known.
    fn new(kernel: Kernel, step: f64, ratio: Option<(u64, u64)>) -> Stage {
        let l = kernel.half_length_in_samples.ceil() as usize + 1;
        let exact = ratio
            .filter(|&(_, q)| q <= MAX_EXACT_DENOMINATOR && q as usize * 2 * l <= MAX_BANK_WEIGHTS);
        let bank = match exact {
            Some((p, q)) => Bank::Exact { p, q },
            None => {
                let phases = BLENDED_PHASES
                    .min((MAX_BANK_WEIGHTS / (2 * l)).saturating_sub(1))
                    .max(64);
                let mut rows = vec![0.0; (phases + 1) * 2 * l];
                rows.par_chunks_mut(2 * l).enumerate().for_each(|(i, row)| {
                    kernel.fill_row(i as f64 / phases as f64, l, row);
                });
                Bank::Blended { rows, phases }
            }
        };
        Stage {
            kernel,
            l,
            bank,
            step,
        }
    }

    /// y[m] = the stage's output at input position u0 + m step. `circular`: `x` is one period of length n
    /// with `pad` samples of wrap-around on each side; otherwise samples outside `x` count as zero.
    fn run(&self, x: &[f64], u0: f64, y: &mut [f64], circular: Option<(usize, usize)>) {
        const CHUNK: usize = 512;
        let l = self.l;
        let taps = 2 * l;
        let n = x.len();
        // The record's slice and the row's range for taps from `base - l + 1`.
        let window = |base: i64| -> (usize, usize, usize) {
            let k0 = match circular {
                Some((period, pad)) => base.rem_euclid(period as i64) + pad as i64 - l as i64 + 1,
                None => base - l as i64 + 1,
            };
            let j0 = (-k0).clamp(0, taps as i64) as usize;
            let j1 = (n as i64 - k0).clamp(j0 as i64, taps as i64) as usize;
            (j0, j1, (k0 + j0 as i64).max(0) as usize)
        };
        match &self.bank {
            Bank::Exact { p, q } => {
                let (p, q) = (*p, *q);
                let a = u0.floor();
                let b = u0 - a;
                let a = a as i64;
                // Row r: the phase b + r / q past base a + floor(m p / q).
                let mut rows = vec![0.0; q as usize * taps];
                let mut offsets = vec![0i64; q as usize];
                rows.par_chunks_mut(taps)
                    .zip(offsets.par_iter_mut())
                    .enumerate()
                    .for_each(|(r, (row, off))| {
                        let phase = b + r as f64 / q as f64;
                        *off = phase.floor() as i64;
                        self.kernel.fill_row(phase - phase.floor(), l, row);
                    });
                y.par_chunks_mut(CHUNK).enumerate().for_each(|(c, chunk)| {
                    let t = (c * CHUNK) as u128 * u128::from(p);
                    let mut whole = (t / u128::from(q)) as i64;
                    let mut r = (t % u128::from(q)) as u64;
                    let (p_div, p_mod) = ((p / q) as i64, p % q);
                    for out in chunk.iter_mut() {
                        let row = &rows[r as usize * taps..(r as usize + 1) * taps];
                        let (j0, j1, x0) = window(a + whole + offsets[r as usize]);
                        *out = dot(&row[j0..j1], &x[x0..x0 + (j1 - j0)]);
                        whole += p_div;
                        r += p_mod;
                        if r >= q {
                            r -= q;
                            whole += 1;
                        }
                    }
                });
            }
            Bank::Blended { rows, phases } => {
                let step = self.step;
                y.par_chunks_mut(CHUNK).enumerate().for_each(|(c, chunk)| {
                    for (j, out) in chunk.iter_mut().enumerate() {
                        let m = c * CHUNK + j;
                        let mut u = u0 + m as f64 * step;
                        if let Some((period, _)) = circular {
                            // Reduce the position to one period first, so a long file keeps the precision of
                            // a short one.
                            u = u.rem_euclid(period as f64);
                        }
                        let base = u.floor();
                        let pos = (u - base) * *phases as f64;
                        let i = (pos as usize).min(phases - 1);
                        let t = pos - i as f64;
                        let (j0, j1, x0) = window(base as i64);
                        let xs = &x[x0..x0 + (j1 - j0)];
                        let r0 = &rows[i * taps..(i + 1) * taps];
                        let r1 = &rows[(i + 1) * taps..(i + 2) * taps];
                        *out = (1.0 - t) * dot(&r0[j0..j1], xs) + t * dot(&r1[j0..j1], xs);
                    }
                });
            }
        }
    }

    /// As [`Stage::run`] for the periodic signal whose one period is `x`.
    fn run_circular(&self, x: &[f64], u0: f64, y: &mut [f64]) {
        if x.is_empty() {
            y.fill(0.0);
            return;
        }
        let padded = pad_circular(x, self.l, self.l);
        self.run(&padded, u0, y, Some((x.len(), self.l)));
    }
}

impl Resampler {
    /// The rate after the first decimation stage, for an input at `in_rate_hz` (None: a single stage).
    #[cfg(test)]
    pub(super) fn first_stage_rate_hz(&self, in_rate_hz: f64) -> Option<f64> {
        self.first.as_ref().map(|(s, _)| in_rate_hz / s.step)
    }

    /// `circular_len`: the length of the periodic records [`Resampler::eval_grid_circular`] will see.
    pub(super) fn new(in_rate_hz: f64, out_rate_hz: f64, circular_len: Option<usize>) -> Resampler {
        let ratio = in_rate_hz / out_rate_hz;
        let keep_hz = 0.5 * out_rate_hz;
        // Above a ratio of 16, a first stage leaves the last one a ratio near 6: a whole factor for records
        // read as they are; for a periodic record of n samples a step n / m with m whole, so one period is m
        // samples after it.
        let first = (ratio > SINGLE_STAGE_MAX_RATIO).then(|| match circular_len {
            None => {
                let d = (ratio / SECOND_STAGE_RATIO).floor().max(2.0);
                let stage = Stage::new(
                    first_stage_kernel(in_rate_hz, d, keep_hz),
                    d,
                    Some((d as u64, 1)),
                );
                (stage, None)
            }
            Some(n) => {
                let m = ((n as f64 * SECOND_STAGE_RATIO / ratio).round() as usize).max(1);
                let step = n as f64 / m as f64;
                let stage = Stage::new(
                    first_stage_kernel(in_rate_hz, step, keep_hz),
                    step,
                    whole_ratio(n as f64, m as f64),
                );
                (stage, Some(m))
            }
        });
        let first_step = first.as_ref().map_or(1.0, |(s, _)| s.step);
        let mid_rate_hz = in_rate_hz / first_step;
        let last_ratio = match (&first, circular_len) {
            (None, _) => whole_ratio(in_rate_hz, out_rate_hz),
            (Some((_, Some(m))), Some(n)) => {
                whole_ratio(in_rate_hz * *m as f64, out_rate_hz * n as f64)
            }
            (Some(_), _) => whole_ratio(in_rate_hz, out_rate_hz * first_step),
        };
        let last = Stage::new(
            Kernel::new(mid_rate_hz, out_rate_hz),
            ratio / first_step,
            last_ratio,
        );
        let half_length_in_samples = last.kernel.half_length_in_samples * first_step
            + first
                .as_ref()
                .map_or(0.0, |(s, _)| s.kernel.half_length_in_samples);
        Resampler {
            first,
            last,
            half_length_in_samples,
        }
    }

    /// y[m] = band-limited x at input position u0 + m in/out (samples outside the record count as zero),
    /// spread over threads.
    pub(super) fn eval_grid(&self, x: &[f64], u0: f64, y: &mut [f64]) {
        match &self.first {
            Some((stage, _)) => {
                let d = stage.step;
                let mut mid = vec![0.0; ((x.len().max(1) - 1) as f64 / d).floor() as usize + 1];
                stage.run(x, 0.0, &mut mid, None);
                self.last.run(&mid, u0 / d, y, None);
            }
            None => self.last.run(x, u0, y, None),
        }
    }

    /// As [`Resampler::eval_grid`] for the periodic signal whose one period is `x` (sample k + j x.len() is
    /// sample k); `x.len()` is the `circular_len` the resampler was made for.
    pub(super) fn eval_grid_circular(&self, x: &[f64], u0: f64, y: &mut [f64]) {
        match &self.first {
            Some((stage, Some(m))) if !x.is_empty() => {
                let mut mid = vec![0.0; *m];
                stage.run_circular(x, 0.0, &mut mid);
                self.last.run_circular(&mid, u0 / stage.step, y);
            }
            _ => self.last.run_circular(x, u0, y),
        }
    }
}

pub(super) fn sinc(z: f64) -> f64 {
    if z == 0.0 {
        1.0
    } else {
        let a = std::f64::consts::PI * z;
        a.sin() / a
    }
}

pub(super) fn check_rate(name: &str, rate_hz: f64) -> Result<(), Error> {
    if rate_hz.is_finite() && rate_hz > 0.0 {
        Ok(())
    } else {
        Err(Error::BadInput(format!(
            "{name} must be a positive, finite sample rate in Hz, got {rate_hz}"
        )))
    }
}

/// Band-limited resampling of a uniformly sampled record from `in_rate_hz` (any positive real, e.g.
/// 192000.0 or 333333.33) to `out_rate_hz`, with an anti-alias filter when decimating (pass band to 0.45 of
/// the lower rate, at least ~100 dB rejection from 0.5 of it; see the module documentation).
///
/// Output sample m is the instant m / out_rate_hz, input sample k the instant k / in_rate_hz: sample 0 of
/// both is the same instant and there is no delay. The output covers the instants inside the input record,
/// `floor((x.len() - 1) * out_rate_hz / in_rate_hz) + 1` samples. Equal rates return a copy.
///
/// # Panics
/// If a rate is not positive and finite.
pub fn resample(x: &[f64], in_rate_hz: f64, out_rate_hz: f64) -> Vec<f64> {
    assert!(
        in_rate_hz.is_finite() && in_rate_hz > 0.0 && out_rate_hz.is_finite() && out_rate_hz > 0.0,
        "resample: rates must be positive and finite ({in_rate_hz} Hz -> {out_rate_hz} Hz)"
    );
    if x.is_empty() {
        return Vec::new();
    }
    if in_rate_hz == out_rate_hz {
        return x.to_vec();
    }
    // The tiny tolerance keeps an output instant that falls on the last input sample despite rounding.
    let n_out = ((x.len() - 1) as f64 * out_rate_hz / in_rate_hz + 1e-9).floor() as usize + 1;
    let resampler = Resampler::new(in_rate_hz, out_rate_hz, None);
    let mut y = vec![0.0; n_out];
    resampler.eval_grid(x, 0.0, &mut y);
    y
}
