//! Waveform fidelity: how closely an output follows a reference once delay, gain and offset are taken out.
//!
//! Definition used here: with `y(t) = reference(t - D)` and `g`, `c` the least-squares gain and offset of
//! `output ~ g y + c` over the samples where both exist, `fidelity_db = 10 log10(g^2 var(y) / mean(e^2))` with
//! `e = output - g y - c`. That is the aligned reference's power over the error's power, both as they appear at
//! the output (the same as the error referred back to the reference's scale). The delayed reference is either
//! evaluated exactly ([`fidelity_exact_at`], for a reference known at any instant such as a closed-form source)
//! or interpolated between its samples by a 64-tap Kaiser-windowed sinc (accurate to about -100 dB up to 0.44
//! of the sample rate). `D` is the cross-correlation delay ([`super::latency::xcorr_delay_s`], or one given by
//! the caller); on records under 4096 samples a three-point parabola on the error itself refines it.

use super::latency::xcorr_delay_s;
use super::window::bessel_i0;

/// Half-length of the interpolation kernel (taps each side).
const HALF_TAPS: usize = 32;
/// Kaiser window shape parameter of the interpolation kernel.
const KAISER_BETA: f64 = 11.0;
/// How far (samples) the refinement may move from the correlation's estimate.
const SEARCH_SAMPLES: f64 = 2.0;

/// Result of [`fidelity`].
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Fidelity {
    /// Aligned reference power over error power (dB); +inf when the error is exactly zero, NaN when the records
    /// do not overlap enough (fewer than 16 usable samples) or the reference is constant.
    pub fidelity_db: f64,
    /// Delay of the output relative to the reference (s; positive = output later).
    pub delay_s: f64,
    /// Least-squares gain of the output against the aligned reference.
    pub gain: f64,
    /// Least-squares offset (V).
    pub offset_v: f64,
}

/// Fractional-delay kernel: weights for `ref[i + m]`, m = -HALF_TAPS+1 ..= HALF_TAPS, to evaluate the reference
/// at `i + mu`, `0 <= mu < 1`. Normalised to unit sum (exact at DC).
fn kernel(mu: f64, out: &mut [f64; 2 * HALF_TAPS]) {
    let h = HALF_TAPS as f64;
    let i0b = bessel_i0(KAISER_BETA);
    let mut sum = 0.0;
    for (j, w) in out.iter_mut().enumerate() {
        let m = j as f64 - (HALF_TAPS as f64 - 1.0);
        let x = mu - m; // distance from the tap, in (-h, h)
        let sinc = if x == 0.0 {
            1.0
        } else {
            (std::f64::consts::PI * x).sin() / (std::f64::consts::PI * x)
        };
        let r = x / h;
        let win = if r.abs() >= 1.0 {
            0.0
        } else {
            bessel_i0(KAISER_BETA * (1.0 - r * r).sqrt()) / i0b
        };
        *w = sinc * win;
        sum += *w;
    }
    for w in out.iter_mut() {
        *w /= sum;
    }
}

/// Least-squares fit of `output ~ g y + c` over `output[n_lo..n_hi]` with `y` the reference delayed by `d`
/// samples, written into `y` (scratch of the window's length). Returns `(mse, g, c, var_y)`.
struct Aligner<'a> {
    reference: &'a [f64],
    output: &'a [f64],
    n_lo: usize,
    n_hi: usize,
    y: Vec<f64>,
}

impl Aligner<'_> {
    fn fit(&mut self, d: f64) -> (f64, f64, f64, f64) {
        // Reference position of output sample n is p = n - d = n + shift + mu.
        let shift = (-d).floor();
        let mu = -d - shift;
        let shift = shift as i64;
        let mut k = [0.0; 2 * HALF_TAPS];
        kernel(mu, &mut k);
        let first = HALF_TAPS as i64 - 1;
        for (j, n) in (self.n_lo..self.n_hi).enumerate() {
            let start = (n as i64 + shift - first) as usize;
            let taps = &self.reference[start..start + 2 * HALF_TAPS];
            self.y[j] = taps.iter().zip(&k).map(|(r, w)| r * w).sum();
        }
        least_squares(&self.y, &self.output[self.n_lo..self.n_hi])
    }
}

/// Least-squares fit of `out ~ g y + c`: `(mean squared error, g, c, variance of y)`.
///
/// Two passes: [`LineSums`] (sums about the first samples, which keeps a large common offset from cancelling
/// digits), then the error itself ([`error_power`]), which keeps its precision however small the error is.
fn least_squares(y: &[f64], out: &[f64]) -> (f64, f64, f64, f64) {
    let n = y.len().min(out.len());
    let (y, out) = (&y[..n], &out[..n]);
    let mut sums = LineSums::default();
    sums.add(y, out);
    let (g, c, var_y, ..) = sums.solve();
    (error_power(y, out, g, c) / n as f64, g, c, var_y)
}

/// `sum (out - g y - c)^2`, four partial sums.
fn error_power(y: &[f64], out: &[f64], g: f64, c: f64) -> f64 {
    let mut see = [0.0f64; 4];
    let (yq, oq) = (y.chunks_exact(4), out.chunks_exact(4));
    let (yr, or) = (yq.remainder(), oq.remainder());
    for (a, b) in yq.zip(oq) {
        for k in 0..4 {
            let e = b[k] - g * a[k] - c;
            see[k] += e * e;
        }
    }
    for (k, (a, b)) in yr.iter().zip(or).enumerate() {
        let e = b - g * a - c;
        see[k] += e * e;
    }
    (see[0] + see[1]) + (see[2] + see[3])
}

/// The delay search and the result shared by the sampled and the closed-form references: `fit(d)` aligns the
/// reference delayed by `d` samples and returns [`least_squares`] of the output on it.
fn align(
    d0: f64,
    n_used: usize,
    sample_rate_hz: f64,
    mut fit: impl FnMut(f64) -> (f64, f64, f64, f64),
) -> Fidelity {
    // The least-squares delay (with the gain free) is the lag that maximises the correlation with the
    // (nearly constant-energy) shifted reference, which xcorr_delay_s already finds between samples; one
    // alignment pass then gives gain, offset and the error. A parabola through three neighbouring fits checks
    // it only when the correlation's lag and the error's minimum could disagree (a short record).
    let mut d = d0;
    if n_used < 4096 {
        let h = 0.05;
        let (em, ..) = fit(d - h);
        let (e0, ..) = fit(d);
        let (ep, ..) = fit(d + h);
        let den = em - 2.0 * e0 + ep;
        if den > 0.0 {
            d += (0.5 * h * (em - ep) / den).clamp(-10.0 * h, 10.0 * h);
        }
        d = d.clamp(d0 - SEARCH_SAMPLES, d0 + SEARCH_SAMPLES);
    }
    let (mse, g, c, var_y) = fit(d);
    let fidelity_db = if var_y <= 0.0 {
        f64::NAN
    } else if mse == 0.0 {
        f64::INFINITY
    } else {
        10.0 * (g * g * var_y / mse).log10()
    };
    Fidelity {
        fidelity_db,
        delay_s: d / sample_rate_hz,
        gain: g,
        offset_v: c,
    }
}

const NAN_FIDELITY: Fidelity = Fidelity {
    fidelity_db: f64::NAN,
    delay_s: f64::NAN,
    gain: f64::NAN,
    offset_v: f64::NAN,
};

/// Samples of the closed-form reference generated at a time (kept in the first-level cache).
const CHUNK: usize = 2048;

/// Running sums of a least-squares line fit `o ~ g y + c` about a shift `(y0, o0)`, four partial sums each.
#[derive(Default)]
struct LineSums {
    shift: Option<(f64, f64)>,
    n: usize,
    sy: [f64; 4],
    so: [f64; 4],
    syy: [f64; 4],
    soy: [f64; 4],
    soo: [f64; 4],
}

impl LineSums {
    fn add(&mut self, y: &[f64], o: &[f64]) {
        let (y0, o0) = *self.shift.get_or_insert((y[0], o[0]));
        self.n += y.len();
        // Locals rather than fields in the loop, so the partial sums stay in registers.
        let (mut sy, mut so, mut syy, mut soy, mut soo) =
            (self.sy, self.so, self.syy, self.soy, self.soo);
        let (yq, oq) = (y.chunks_exact(4), o.chunks_exact(4));
        let (yr, or) = (yq.remainder(), oq.remainder());
        for (a, b) in yq.zip(oq) {
            for k in 0..4 {
                let (yc, oc) = (a[k] - y0, b[k] - o0);
                sy[k] += yc;
                so[k] += oc;
                syy[k] += yc * yc;
                soy[k] += yc * oc;
                soo[k] += oc * oc;
            }
        }
        for (k, (a, b)) in yr.iter().zip(or).enumerate() {
            let (yc, oc) = (a - y0, b - o0);
            sy[k] += yc;
            so[k] += oc;
            syy[k] += yc * yc;
            soy[k] += yc * oc;
            soo[k] += oc * oc;
        }
        (self.sy, self.so, self.syy, self.soy, self.soo) = (sy, so, syy, soy, soo);
    }

    /// `(g, c, variance of y, mean squared error from the sums, variance of o)`.
    fn solve(&self) -> (f64, f64, f64, f64, f64) {
        let total = |v: [f64; 4]| (v[0] + v[1]) + (v[2] + v[3]);
        let count = self.n as f64;
        let (y0, o0) = self.shift.unwrap_or((0.0, 0.0));
        let (my, mo) = (total(self.sy) / count, total(self.so) / count);
        let var_y = (total(self.syy) / count - my * my).max(0.0);
        let var_o = (total(self.soo) / count - mo * mo).max(0.0);
        let cov = total(self.soy) / count - my * mo;
        let g = cov / var_y;
        let c = (mo + o0) - g * (my + y0);
        (g, c, var_y, (var_o - g * cov).max(0.0), var_o)
    }
}

/// Below this error-to-output power ratio (about 70 dB of fidelity) the error is summed in a second pass
/// rather than taken from the sums: the difference of sums loses digits in proportion to the output's power
/// over the error's (relative error up to about 5e-12 times that ratio for a million samples).
const ONE_PASS_FLOOR: f64 = 1e-7;

/// [`fidelity_at`] against a reference known at any instant (a closed-form source): `reference(t0, dt, y)`
/// fills `y[j]` with the reference at `t0 + j dt`. `output[n]` is at `output_t0_s + n / sample_rate_hz`. The
/// delayed reference is evaluated exactly instead of interpolated, so every output sample takes part; it is
/// generated in short chunks and never stored whole. One pass per delay tried gives the fit and the error
/// (a second pass sums the error directly when it is so small that the one-pass difference would lose digits).
pub fn fidelity_exact_at(
    reference: impl Fn(f64, f64, &mut [f64]),
    output: &[f64],
    output_t0_s: f64,
    sample_rate_hz: f64,
    d0_s: f64,
) -> Fidelity {
    if !d0_s.is_finite() || output.len() < 16 || sample_rate_hz <= 0.0 {
        return NAN_FIDELITY;
    }
    let dt = 1.0 / sample_rate_hz;
    let mut y = vec![0.0; CHUNK.min(output.len())];
    align(d0_s * sample_rate_hz, output.len(), sample_rate_hz, |d| {
        let t0 = output_t0_s - d * dt;
        let mut sums = LineSums::default();
        for (i, o) in output.chunks(CHUNK).enumerate() {
            let yc = &mut y[..o.len()];
            reference(t0 + (i * CHUNK) as f64 * dt, dt, yc);
            sums.add(yc, o);
        }
        let (g, c, var_y, mse, var_o) = sums.solve();
        if mse > ONE_PASS_FLOOR * var_o {
            return (mse, g, c, var_y);
        }
        let mut see = 0.0;
        for (i, o) in output.chunks(CHUNK).enumerate() {
            let yc = &mut y[..o.len()];
            reference(t0 + (i * CHUNK) as f64 * dt, dt, yc);
            see += error_power(yc, o, g, c);
        }
        (see / output.len() as f64, g, c, var_y)
    })
}

/// Full-bandwidth signal-to-error ratio of `output` against `reference` (same uniform grid at
/// `sample_rate_hz`) after the best sub-sample delay (searched up to `max_delay_s` either way), gain and offset.
/// See the module notes for the exact definition. Cost: one FFT cross-correlation plus seven passes of a 64-tap
/// interpolator over the overlap.
pub fn fidelity(
    reference: &[f64],
    output: &[f64],
    sample_rate_hz: f64,
    max_delay_s: f64,
) -> Fidelity {
    let d0_s = xcorr_delay_s(reference, output, sample_rate_hz, max_delay_s);
    if !d0_s.is_finite() {
        return NAN_FIDELITY;
    }
    fidelity_at(reference, output, sample_rate_hz, d0_s)
}

/// [`fidelity`] with the delay already known (e.g. from [`xcorr_delay_s`] run by the caller), so the
/// cross-correlation is not computed twice.
pub fn fidelity_at(reference: &[f64], output: &[f64], sample_rate_hz: f64, d0_s: f64) -> Fidelity {
    if !d0_s.is_finite() || reference.len() < 2 || output.len() < 2 || sample_rate_hz <= 0.0 {
        return NAN_FIDELITY;
    }
    let d0 = d0_s * sample_rate_hz;
    // Output samples whose interpolation stencil lies inside the reference for every delay in the search range.
    let first = HALF_TAPS as f64 - 1.0;
    let shift_min = (-(d0 + SEARCH_SAMPLES + 1.0)).floor();
    let shift_max = (-(d0 - SEARCH_SAMPLES - 1.0)).floor();
    let lo = (first - shift_min).max(0.0);
    let hi = (reference.len() as f64 - HALF_TAPS as f64 - shift_max).min(output.len() as f64);
    if hi - lo < 16.0 {
        return NAN_FIDELITY;
    }
    let (n_lo, n_hi) = (lo as usize, hi as usize);
    let mut al = Aligner {
        reference,
        output,
        n_lo,
        n_hi,
        y: vec![0.0; n_hi - n_lo],
    };
    align(d0, n_hi - n_lo, sample_rate_hz, |d| al.fit(d))
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};
    use std::f64::consts::{PI, TAU};

    const TONES: [(f64, f64, f64); 6] = [
        (0.013, 1.0, 0.3),
        (0.071, 0.7, -1.1),
        (0.137, 0.5, 2.0),
        (0.211, 0.4, 0.7),
        (0.29, 0.3, -2.5),
        (0.37, 0.2, 1.4),
    ];

    /// A broadband multitone (cycles per sample, up to 0.37 fs) evaluated exactly at sample times minus `delay`.
    fn multitone(n: usize, delay: f64) -> Vec<f64> {
        (0..n)
            .map(|i| {
                TONES
                    .iter()
                    .map(|(f, a, p)| a * (TAU * f * (i as f64 - delay) + p).cos())
                    .sum()
            })
            .collect()
    }

    fn var(x: &[f64]) -> f64 {
        let m = x.iter().sum::<f64>() / x.len() as f64;
        x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / x.len() as f64
    }

    /// The multitone of [`multitone`] as a closed-form reference: `y[j]` at sample time `t0 + j dt` (fs = 1).
    fn multitone_at(t0: f64, dt: f64, y: &mut [f64]) {
        for (j, v) in y.iter_mut().enumerate() {
            let t = t0 + j as f64 * dt;
            *v = TONES
                .iter()
                .map(|(f, a, p)| a * (TAU * f * t + p).cos())
                .sum();
        }
    }

    #[test]
    fn closed_form_reference_takes_out_delay_gain_and_offset_and_scores_the_noise() {
        // output = 0.5 x reference(t - 3.7) + 0.1 + noise of rms e; expected ratio = 0.25 var(x) / mean(noise^2)
        // (the definition, common practice, no source), with the noise's own power, so only the three fitted
        // parameters' share (3 / n) separates the two. e = 1e-2 runs the one-pass sums, e = 1e-5 (about 100 dB)
        // the second error pass; e = 0 must give a ratio far above both (exact alignment, no interpolator).
        let n = 30_001;
        let d = 3.7;
        let x = multitone(n, 0.0);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        for e in [1e-2, 1e-5, 0.0] {
            let noise: Vec<f64> = (0..n)
                .map(|_| {
                    if e > 0.0 {
                        Normal::new(0.0, e).unwrap().sample(&mut rng)
                    } else {
                        0.0
                    }
                })
                .collect();
            let y: Vec<f64> = multitone(n, d)
                .iter()
                .zip(&noise)
                .map(|(v, w)| 0.5 * v + 0.1 + w)
                .collect();
            // Output sample 0 at t = 100 s, a start the reference must honour.
            let shifted = |t0: f64, dt: f64, out: &mut [f64]| multitone_at(t0 - 100.0, dt, out);
            // Long records align at the delay given (the correlation's, in use).
            let r = fidelity_exact_at(shifted, &y, 100.0, 1.0, d);
            if e > 0.0 {
                let p_noise = noise.iter().map(|w| w * w).sum::<f64>() / n as f64;
                let want = 10.0 * (0.25 * var(&x) / p_noise).log10();
                assert!(
                    (r.fidelity_db - want).abs() < 0.02,
                    "e {e}: {r:?} vs {want}"
                );
                assert!(
                    (r.gain - 0.5).abs() < 1e-3 && (r.offset_v - 0.1).abs() < 1e-3,
                    "{r:?}"
                );
            } else {
                assert!(r.fidelity_db > 200.0, "{r:?}");
            }
        }
    }

    #[test]
    fn closed_form_reference_refines_the_delay_of_a_short_record() {
        // Under 4096 samples a parabola through three fits moves the delay to the error's minimum.
        let n = 3000;
        let y: Vec<f64> = multitone(n, 7.3).iter().map(|v| 1.5 * v).collect();
        let r = fidelity_exact_at(multitone_at, &y, 0.0, 1.0, 7.3 + 0.04);
        assert!((r.delay_s - 7.3).abs() < 1e-3, "{r:?}");
        assert!(r.fidelity_db > 80.0, "{r:?}");
    }

    #[test]
    fn closed_form_and_sampled_references_agree() {
        // The same band-limited reference given as samples (64-tap interpolation) and as a function: the
        // alignment differs only by the interpolator's error (about -100 dB), far below a 40 dB error.
        let n = 20_000;
        let x = multitone(n, 0.0);
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let normal = Normal::new(0.0, 0.01).unwrap();
        let y: Vec<f64> = multitone(n, 5.25)
            .iter()
            .map(|v| 2.0 * v - 0.3 + normal.sample(&mut rng))
            .collect();
        let sampled = fidelity_at(&x, &y, 1.0, 5.25);
        let exact = fidelity_exact_at(multitone_at, &y, 0.0, 1.0, 5.25);
        assert!(
            (sampled.fidelity_db - exact.fidelity_db).abs() < 0.02,
            "{sampled:?} {exact:?}"
        );
        assert!(
            (sampled.gain - exact.gain).abs() < 1e-4,
            "{sampled:?} {exact:?}"
        );
    }

    #[test]
    fn identical_signals_score_very_high() {
        let x = multitone(20_000, 0.0);
        let r = fidelity(&x, &x, 1.0, 50.0);
        assert!(r.fidelity_db > 150.0, "{r:?}");
        assert!(
            r.delay_s.abs() < 1e-6 && (r.gain - 1.0).abs() < 1e-9 && r.offset_v.abs() < 1e-9,
            "{r:?}"
        );
    }

    #[test]
    fn delay_gain_and_offset_are_taken_out() {
        let fs = 48_000.0;
        let d = 3.7;
        let x = multitone(20_000, 0.0);
        let y: Vec<f64> = multitone(20_000, d).iter().map(|v| 0.5 * v + 0.1).collect();
        let r = fidelity(&x, &y, fs, 1e-3);
        // The limit is the 64-tap interpolator (about -100 dB at 0.37 fs, by its design).
        assert!(r.fidelity_db > 95.0, "{r:?}");
        assert!((r.delay_s * fs - d).abs() < 1e-5, "{r:?}");
        assert!(
            (r.gain - 0.5).abs() < 1e-6 && (r.offset_v - 0.1).abs() < 1e-6,
            "{r:?}"
        );
        // Negative delay (output earlier) and an inverted output work too.
        let z: Vec<f64> = multitone(20_000, -11.25).iter().map(|v| -2.0 * v).collect();
        let r = fidelity(&x, &z, fs, 1e-3);
        assert!(
            r.fidelity_db > 95.0
                && (r.delay_s * fs + 11.25).abs() < 1e-5
                && (r.gain + 2.0).abs() < 1e-5,
            "{r:?}"
        );
    }

    #[test]
    fn independent_noise_gives_the_signal_to_noise_ratio() {
        // Definition check: with output = reference + independent noise of rms e, the ratio is var / e^2
        // (common practice, no source). The noise power of 20000 samples scatters by sqrt(2/20000) = 1 %
        // (0.04 dB), the three fitted parameters remove a negligible 3/20000 of it: allow 0.2 dB.
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let n = 20_000;
        let x = multitone(n, 0.0);
        for e in [0.01, 0.1] {
            let normal = Normal::new(0.0, e).unwrap();
            let y: Vec<f64> = x.iter().map(|v| v + normal.sample(&mut rng)).collect();
            let r = fidelity(&x, &y, 1.0, 20.0);
            let expect = 10.0 * (var(&x) / (e * e)).log10();
            assert!(
                (r.fidelity_db - expect).abs() < 0.2,
                "e {e}: {r:?} expected {expect}"
            );
        }
    }

    #[test]
    fn a_zero_order_hold_staircase_at_two_and_a_half_samples_per_cycle_scores_about_one_db() {
        // A sine held by a zero-order hold at 2.5 samples per cycle, seen on a grid 16 times finer. On that grid
        // the hold is a 16-sample box filter applied to the impulses of the coarse samples. Its response at the
        // tone (ZOH frequency response; on the fine grid the discrete box, Dirichlet kernel, common practice) is
        // H = sin(16 pi f/fs) / (16 sin(pi f/fs)) = sin(0.4 pi) / (16 sin(pi/40)) = 0.7576, with a pure delay
        // of 7.5 fine samples. The staircase holds the power of the samples, A^2/2 (5 distinct phases per
        // period), so after the best alignment the fundamental carries H^2 of it and the images the rest:
        // fidelity = 10 log10(H^2 / (1 - H^2)) = 1.29 dB. Low indeed, though not negative: the staircase still
        // follows the sine. Allow 0.1 dB for the record's edges.
        let up = 16usize;
        let n = 40_000usize; // fine samples, 1000 periods of 40 fine samples
        let fs = 1.0;
        let f = 1.0 / 40.0;
        let reference: Vec<f64> = (0..n).map(|i| (TAU * f * i as f64 + 0.2).cos()).collect();
        let staircase: Vec<f64> = (0..n).map(|i| reference[i - i % up]).collect();
        let h = (16.0 * PI * f).sin() / (16.0 * (PI * f).sin());
        let expect = 10.0 * (h * h / (1.0 - h * h)).log10();
        let r = fidelity(&reference, &staircase, fs, 20.0);
        assert!(
            (r.fidelity_db - expect).abs() < 0.1,
            "{r:?}, theory {expect}"
        );
        assert!(r.fidelity_db < 6.0);
        // The fitted gain is the hold's response at the tone; the delay is its 7.5 samples. A pure sine cannot tell
        // a delay from one a whole period away, nor a polarity flip from half a period: the delay is checked
        // modulo half a period (20 samples), with the gain's sign telling which half.
        assert!((r.gain.abs() - h).abs() < 2e-3, "{r:?}");
        let m = (r.delay_s - 7.5).rem_euclid(40.0);
        let off = if r.gain > 0.0 {
            m.min(40.0 - m)
        } else {
            (m - 20.0).abs()
        };
        assert!(off < 0.05, "{r:?}");
    }

    #[test]
    fn too_short_records_give_nan() {
        let x = multitone(40, 0.0);
        assert!(fidelity(&x, &x, 1.0, 2.0).fidelity_db.is_nan());
    }

    #[test]
    fn the_interpolation_kernel_is_exact_at_whole_samples_and_sums_to_one() {
        let mut k = [0.0; 2 * HALF_TAPS];
        kernel(0.0, &mut k);
        for (j, w) in k.iter().enumerate() {
            let want = if j == HALF_TAPS - 1 { 1.0 } else { 0.0 };
            assert!((w - want).abs() < 1e-15, "{j}: {w}");
        }
        kernel(0.37, &mut k);
        assert!((k.iter().sum::<f64>() - 1.0).abs() < 1e-14);
    }
}
