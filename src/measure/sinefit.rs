//! Sine fitting in the time domain (IEEE Std 1241 three- and four-parameter fits), the fit-residual ENOB,
//! a joint multitone three-parameter fit, and an FFT-peak frequency estimate to start the four-parameter fit.
//!
//! Model and conventions, used by every function here: the record `x[n]` is taken at `t_n = t0_s + n /
//! sample_rate_hz` and fitted as `x ~ a cos(w t) + b sin(w t) + c` with `w = 2 pi f`. Equivalently
//! `x ~ A cos(w t + phi) + c` with `A = hypot(a, b)` and `phi = atan2(-b, a)`, so `phi` is the phase of the
//! cosine at `t = 0` (not at the first sample unless `t0_s = 0`).
//!
//! Performance: sines and cosines come from a rotation recurrence recomputed exactly every 1024 samples, so a
//! three-parameter fit is two passes over the record (projections, then residual) and each four-parameter
//! iteration one pass. Degenerate input (fewer samples than parameters, non-finite rates) gives NaN fields
//! rather than a panic.

use std::f64::consts::TAU;

use crate::signal::rotation::Quad;

/// Samples between exact recomputations of the rotation recurrence (bounds its rounding drift to ~1e-13).
const RESET_EVERY: usize = 1024;

/// Result of a single-tone sine fit.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct SineFit {
    /// Frequency of the fitted sine (Hz): the given one for [`fit3`], the fitted one for [`fit4`].
    pub frequency_hz: f64,
    /// Cosine coefficient (V) in `x ~ a cos(w t) + b sin(w t) + c`.
    pub a: f64,
    /// Sine coefficient (V).
    pub b: f64,
    /// Offset (V).
    pub c: f64,
    /// Amplitude `hypot(a, b)` (V, peak).
    pub amplitude_v: f64,
    /// Phase `atan2(-b, a)` (rad) of `A cos(w t + phi)` at `t = 0`.
    pub phase_rad: f64,
    /// Root-mean-square of the residual `x - fit` over all samples (divided by N, not N - p) (V). This is the
    /// noise-and-distortion (NAD) rms of the IEEE Std 1241 ENOB.
    pub residual_rms_v: f64,
    /// Gauss-Newton passes used ([`fit4`]); 0 for the direct [`fit3`].
    pub iterations: u32,
}

impl SineFit {
    fn nan(frequency_hz: f64) -> Self {
        SineFit {
            frequency_hz,
            a: f64::NAN,
            b: f64::NAN,
            c: f64::NAN,
            amplitude_v: f64::NAN,
            phase_rad: f64::NAN,
            residual_rms_v: f64::NAN,
            iterations: 0,
        }
    }
}

/// One tone of a [`MultiToneFit`].
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ToneFit {
    /// Frequency (Hz), as given.
    pub frequency_hz: f64,
    /// Cosine coefficient (V).
    pub a: f64,
    /// Sine coefficient (V).
    pub b: f64,
    /// Amplitude `hypot(a, b)` (V, peak).
    pub amplitude_v: f64,
    /// Phase `atan2(-b, a)` (rad) at `t = 0`.
    pub phase_rad: f64,
}

/// Joint three-parameter fit of several tones of known frequencies plus one offset.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct MultiToneFit {
    /// One entry per requested tone, in the order given.
    pub tones: Vec<ToneFit>,
    /// Common offset (V).
    pub offset_v: f64,
    /// Rms of the residual over all samples (V).
    pub residual_rms_v: f64,
}

/// cos/sin of `phi0 + n * dtheta` by rotation, recomputed exactly every [`RESET_EVERY`] steps.
#[derive(Clone, Copy)]
struct Rotator {
    c: f64,
    s: f64,
    cd: f64,
    sd: f64,
    phi0: f64,
    dtheta: f64,
    n: usize,
    countdown: usize,
}

impl Rotator {
    fn new(phi0: f64, dtheta: f64) -> Self {
        let (s, c) = phi0.sin_cos();
        let (sd, cd) = dtheta.sin_cos();
        Rotator {
            c,
            s,
            cd,
            sd,
            phi0,
            dtheta,
            n: 0,
            countdown: RESET_EVERY,
        }
    }

    #[inline]
    fn advance(&mut self) {
        self.n += 1;
        self.countdown -= 1;
        if self.countdown == 0 {
            self.countdown = RESET_EVERY;
            let (s, c) = (self.phi0 + self.dtheta * self.n as f64).sin_cos();
            self.s = s;
            self.c = c;
        } else {
            let c = self.c * self.cd - self.s * self.sd;
            self.s = self.s * self.cd + self.c * self.sd;
            self.c = c;
        }
    }
}

/// `(sum cos(theta n + phi), sum sin(theta n + phi))` for n = 0..len, in closed form (Dirichlet kernel).
fn dirichlet(theta: f64, phi: f64, len: usize) -> (f64, f64) {
    let th = theta - TAU * (theta / TAU).round();
    let half = 0.5 * th;
    let sh = half.sin();
    let nf = len as f64;
    let d = if sh == 0.0 {
        nf
    } else {
        (nf * half).sin() / sh
    };
    let (s, c) = (phi + (nf - 1.0) * half).sin_cos();
    (d * c, d * s)
}

/// Solves the symmetric positive semi-definite system `g p = r` (row-major `n x n`, overwritten) by a
/// diagonally scaled Cholesky factorisation. A column that is (numerically) a combination of earlier ones gets
/// coefficient 0, so a rank-deficient fit (a tone at DC or exactly at Nyquist, two equal tones) still returns
/// a least-squares solution.
pub(crate) fn solve_sym_psd(g: &mut [f64], r: &[f64], n: usize) -> Vec<f64> {
    debug_assert_eq!(g.len(), n * n);
    let scale: Vec<f64> = (0..n)
        .map(|i| {
            let d = g[i * n + i];
            if d > 0.0 { 1.0 / d.sqrt() } else { 0.0 }
        })
        .collect();
    for i in 0..n {
        for j in 0..n {
            g[i * n + j] *= scale[i] * scale[j];
        }
    }
    // In-place Cholesky on the lower triangle; dead columns are zeroed.
    let mut live = vec![true; n];
    for j in 0..n {
        let mut d = g[j * n + j];
        for k in 0..j {
            d -= g[j * n + k] * g[j * n + k];
        }
        if scale[j] == 0.0 || d <= 1e-11 {
            live[j] = false;
            for i in j..n {
                g[i * n + j] = 0.0;
            }
            continue;
        }
        let l = d.sqrt();
        g[j * n + j] = l;
        for i in j + 1..n {
            let mut v = g[i * n + j];
            for k in 0..j {
                v -= g[i * n + k] * g[j * n + k];
            }
            g[i * n + j] = v / l;
        }
    }
    let mut y: Vec<f64> = (0..n).map(|i| r[i] * scale[i]).collect();
    for i in 0..n {
        if !live[i] {
            y[i] = 0.0;
            continue;
        }
        let mut v = y[i];
        for k in 0..i {
            v -= g[i * n + k] * y[k];
        }
        y[i] = v / g[i * n + i];
    }
    for i in (0..n).rev() {
        if !live[i] {
            y[i] = 0.0;
            continue;
        }
        let mut v = y[i];
        for k in i + 1..n {
            v -= g[k * n + i] * y[k];
        }
        y[i] = v / g[i * n + i];
    }
    for i in 0..n {
        y[i] *= scale[i];
    }
    y
}

/// Calls `f(block, used, cos, sin)` for consecutive blocks of four samples of `x` with the cosines and sines
/// of `phi + theta n` of their samples ([`Quad`], recomputed exactly every [`RESET_EVERY`] samples). The last
/// block is zero-padded; `used` says how many of its samples are real.
fn for_each_quad(
    x: &[f64],
    phi: f64,
    theta: f64,
    mut f: impl FnMut(&[f64; 4], usize, &[f64; 4], &[f64; 4]),
) {
    for (b, chunk) in x.chunks(RESET_EVERY).enumerate() {
        let mut rot = Quad::new(phi + theta * (b * RESET_EVERY) as f64, theta);
        for q in chunk.chunks(4) {
            let mut xv = [0.0f64; 4];
            xv[..q.len()].copy_from_slice(q);
            f(&xv, q.len(), &rot.cos, &rot.sin);
            rot.advance();
        }
    }
}

/// One tone: the projections `(sum x cos, sum x sin)` of `x` on `phi + theta n`.
fn project_one(x: &[f64], phi: f64, theta: f64) -> (f64, f64) {
    let (mut pc, mut ps) = ([0.0f64; 4], [0.0f64; 4]);
    for_each_quad(x, phi, theta, |xv, _, c, s| {
        for k in 0..4 {
            pc[k] += xv[k] * c[k];
            ps[k] += xv[k] * s[k];
        }
    });
    (
        (pc[0] + pc[1]) + (pc[2] + pc[3]),
        (ps[0] + ps[1]) + (ps[2] + ps[3]),
    )
}

/// One tone: the sum of squared residuals of `x ~ a cos + b sin + c`.
fn residual_one(x: &[f64], phi: f64, theta: f64, a: f64, b: f64, off: f64) -> f64 {
    let mut acc = [0.0f64; 4];
    for_each_quad(x, phi, theta, |xv, used, c, s| {
        for k in 0..4 {
            let e = xv[k] - (a * c[k] + b * s[k] + off);
            acc[k] += if k < used { e * e } else { 0.0 };
        }
    });
    (acc[0] + acc[1]) + (acc[2] + acc[3])
}

/// Joint three-parameter fit of tones at known frequencies (Hz) plus a common offset:
/// `x ~ sum_i (a_i cos(w_i t) + b_i sin(w_i t)) + c` at `t_n = t0_s + n / sample_rate_hz`.
/// The normal matrix is built in closed form (no accumulation error); the projections and the residual take
/// one pass each. With one tone this is exactly [`fit3`]. Tones need not be coherent with the record: their
/// mutual leakage is part of the model, which is why a joint fit beats separate fits on a multitone.
pub fn fit_multitone(x: &[f64], sample_rate_hz: f64, tones_hz: &[f64], t0_s: f64) -> MultiToneFit {
    let k = tones_hz.len();
    let p = 2 * k + 1;
    let n = x.len();
    let bad = n < p || !sample_rate_hz.is_finite() || sample_rate_hz <= 0.0 || !t0_s.is_finite();
    if bad || tones_hz.iter().any(|f| !f.is_finite()) {
        return MultiToneFit {
            tones: tones_hz
                .iter()
                .map(|&f| ToneFit {
                    frequency_hz: f,
                    a: f64::NAN,
                    b: f64::NAN,
                    amplitude_v: f64::NAN,
                    phase_rad: f64::NAN,
                })
                .collect(),
            offset_v: f64::NAN,
            residual_rms_v: f64::NAN,
        };
    }
    // Angles theta_i n + phi_i, with phi_i reduced modulo 2 pi.
    let theta: Vec<f64> = tones_hz.iter().map(|f| TAU * f / sample_rate_hz).collect();
    let phi: Vec<f64> = tones_hz
        .iter()
        .map(|f| TAU * (f * t0_s).rem_euclid(1.0))
        .collect();

    // Normal matrix in closed form. Column order: c_0, s_0, c_1, s_1, ..., 1.
    let mut g = vec![0.0; p * p];
    for i in 0..k {
        for j in i..k {
            let (cd, sdiff) = dirichlet(theta[i] - theta[j], phi[i] - phi[j], n);
            let (cs, ss) = dirichlet(theta[i] + theta[j], phi[i] + phi[j], n);
            let cc = 0.5 * (cd + cs);
            let sisj = 0.5 * (cd - cs);
            let cisj = 0.5 * (ss - sdiff);
            let sicj = 0.5 * (ss + sdiff);
            let (ci, si, cj, sj) = (2 * i, 2 * i + 1, 2 * j, 2 * j + 1);
            g[ci * p + cj] = cc;
            g[si * p + sj] = sisj;
            g[ci * p + sj] = cisj;
            g[si * p + cj] = sicj;
            g[cj * p + ci] = cc;
            g[sj * p + si] = sisj;
            g[sj * p + ci] = cisj;
            g[cj * p + si] = sicj;
        }
        let (c1, s1) = dirichlet(theta[i], phi[i], n);
        g[2 * i * p + p - 1] = c1;
        g[(p - 1) * p + 2 * i] = c1;
        g[(2 * i + 1) * p + p - 1] = s1;
        g[(p - 1) * p + 2 * i + 1] = s1;
    }
    g[p * p - 1] = n as f64;

    // Projections: one pass (a single tone, the common case, by four interleaved rotations).
    let mut rhs = vec![0.0; p];
    if k == 1 {
        (rhs[0], rhs[1]) = project_one(x, phi[0], theta[0]);
        rhs[2] = x.iter().sum();
    } else {
        let mut rot: Vec<Rotator> = (0..k).map(|i| Rotator::new(phi[i], theta[i])).collect();
        let mut sum_x = 0.0;
        for &xv in x {
            for (i, r) in rot.iter_mut().enumerate() {
                rhs[2 * i] += xv * r.c;
                rhs[2 * i + 1] += xv * r.s;
                r.advance();
            }
            sum_x += xv;
        }
        rhs[p - 1] = sum_x;
    }
    let sol = solve_sym_psd(&mut g, &rhs, p);

    // Residual: second pass.
    let offset = sol[p - 1];
    let ssr = if k == 1 {
        residual_one(x, phi[0], theta[0], sol[0], sol[1], offset)
    } else {
        let mut rot: Vec<Rotator> = (0..k).map(|i| Rotator::new(phi[i], theta[i])).collect();
        let mut ssr = 0.0;
        for &xv in x {
            let mut m = offset;
            for (i, r) in rot.iter_mut().enumerate() {
                m += sol[2 * i] * r.c + sol[2 * i + 1] * r.s;
                r.advance();
            }
            let e = xv - m;
            ssr += e * e;
        }
        ssr
    };
    MultiToneFit {
        tones: (0..k)
            .map(|i| {
                let (a, b) = (sol[2 * i], sol[2 * i + 1]);
                ToneFit {
                    frequency_hz: tones_hz[i],
                    a,
                    b,
                    amplitude_v: a.hypot(b),
                    phase_rad: (-b).atan2(a),
                }
            })
            .collect(),
        offset_v: offset,
        residual_rms_v: (ssr / n as f64).sqrt(),
    }
}

/// Three-parameter sine fit at a known frequency (IEEE Std 1241, three-parameter least-squares fit): linear
/// least squares for `a`, `b`, `c`. Two passes over the record.
pub fn fit3(x: &[f64], sample_rate_hz: f64, frequency_hz: f64, t0_s: f64) -> SineFit {
    let m = fit_multitone(x, sample_rate_hz, &[frequency_hz], t0_s);
    let t = m.tones[0];
    SineFit {
        frequency_hz,
        a: t.a,
        b: t.b,
        c: m.offset_v,
        amplitude_v: t.amplitude_v,
        phase_rad: t.phase_rad,
        residual_rms_v: m.residual_rms_v,
        iterations: 0,
    }
}

/// Four-parameter sine fit (IEEE Std 1241, four-parameter fit): Gauss-Newton on the frequency, starting at
/// `initial_frequency_hz`. Each iteration is one pass that accumulates the normal matrix of the columns
/// `cos, sin, 1, u cos, u sin` (u = sample index from the record's centre, for conditioning); the
/// three-parameter solution at the current frequency and the Gauss-Newton frequency step both come from it.
/// A step that raises the three-parameter residual is halved (up to 30 times). Stops when the relative
/// frequency step falls under 1e-12 or after 50 iterations; the final parameters are a [`fit3`] at the
/// fitted frequency. The start must lie strictly inside (0, fs/2), else the fields are NaN. Converges from a start within about half a bin of an isolated tone; start from
/// [`estimate_frequency_hz`] when unsure.
#[allow(clippy::needless_range_loop)] // small dense matrices read best with indices
pub fn fit4(x: &[f64], sample_rate_hz: f64, initial_frequency_hz: f64, t0_s: f64) -> SineFit {
    let n = x.len();
    let in_band = initial_frequency_hz > 0.0 && initial_frequency_hz < 0.5 * sample_rate_hz;
    if n < 5 || !sample_rate_hz.is_finite() || !in_band {
        return SineFit::nan(initial_frequency_hz);
    }
    let mid = (n - 1) as f64 / 2.0;
    let sum_x2: f64 = x.iter().map(|v| v * v).sum();
    let mut w = TAU * initial_frequency_hz / sample_rate_hz; // rad per sample
    let mut accepted: Option<(f64, f64)> = None; // (w, ssr3)
    let mut step = 0.0;
    let mut halvings = 0;
    let mut iterations = 0u32;
    while iterations < 50 {
        iterations += 1;
        // One pass: 5x5 normal matrix (upper triangle) and projections.
        let mut gm = [[0.0f64; 5]; 5];
        let mut r = [0.0f64; 5];
        let mut rot = Rotator::new(-w * mid, w);
        for (i, &xv) in x.iter().enumerate() {
            let u = i as f64 - mid;
            let v = [rot.c, rot.s, 1.0, u * rot.c, u * rot.s];
            for a in 0..5 {
                r[a] += xv * v[a];
                for b in a..5 {
                    gm[a][b] += v[a] * v[b];
                }
            }
            rot.advance();
        }
        for a in 0..5 {
            for b in 0..a {
                gm[a][b] = gm[b][a];
            }
        }
        // Three-parameter solution at w and its residual sum of squares.
        let mut g3 = vec![0.0; 9];
        for a in 0..3 {
            for b in 0..3 {
                g3[a * 3 + b] = gm[a][b];
            }
        }
        let p3 = solve_sym_psd(&mut g3, &r[..3], 3);
        let ssr3 = sum_x2 - (p3[0] * r[0] + p3[1] * r[1] + p3[2] * r[2]);
        if let Some((w_prev, ssr_prev)) = accepted
            && ssr3 > ssr_prev + 1e-12 * sum_x2 + 1e-9 * ssr_prev.abs()
        {
            // Worse: halve the step from the last accepted frequency.
            halvings += 1;
            if halvings > 30 {
                w = w_prev;
                break;
            }
            step *= 0.5;
            w = w_prev + step;
            continue;
        }
        halvings = 0;
        accepted = Some((w, ssr3));
        // Gauss-Newton column d = dm/dw = b (u cos) - a (u sin), as a combination of columns 3 and 4.
        let (a3, b3) = (p3[0], p3[1]);
        let coef = [b3, -a3];
        let mut g4 = vec![0.0; 16];
        for a in 0..3 {
            for b in 0..3 {
                g4[a * 4 + b] = gm[a][b];
            }
            let v = coef[0] * gm[a][3] + coef[1] * gm[a][4];
            g4[a * 4 + 3] = v;
            g4[3 * 4 + a] = v;
        }
        g4[15] = coef[0] * coef[0] * gm[3][3]
            + 2.0 * coef[0] * coef[1] * gm[3][4]
            + coef[1] * coef[1] * gm[4][4];
        let r4 = [r[0], r[1], r[2], coef[0] * r[3] + coef[1] * r[4]];
        let p4 = solve_sym_psd(&mut g4, &r4, 4);
        step = p4[3];
        if !step.is_finite() {
            break;
        }
        // Keep the frequency inside (0, pi): a step past the band edges is cut back.
        while w + step <= 0.0 || w + step >= std::f64::consts::PI {
            step *= 0.5;
        }
        w += step;
        if step.abs() <= 1e-12 * w.abs() {
            break;
        }
    }
    let f = w * sample_rate_hz / TAU;
    let mut fit = fit3(x, sample_rate_hz, f, t0_s);
    fit.iterations = iterations;
    fit
}

/// IEEE Std 1241 effective number of bits from the fit residual: `N - log2(residual_rms / (q / sqrt(12)))`,
/// with `q = lsb_v` the ideal code width (V) and `residual_rms_v` the noise-and-distortion rms (V).
pub fn enob_from_residual(bits: u32, lsb_v: f64, residual_rms_v: f64) -> f64 {
    bits as f64 - (residual_rms_v / (lsb_v / 12f64.sqrt())).log2()
}

/// Frequency (Hz) of the strongest tone: the largest bin (DC excluded) of the periodic-Hann-windowed, mean-removed
/// record, refined by the exact Hann two-bin ratio `delta = (2 r - 1) / (r + 1)` (r = larger neighbour / peak).
/// Accurate to a small fraction of a bin for a tone away from DC and Nyquist; meant as the start of [`fit4`].
/// NaN for fewer than 8 samples.
pub fn estimate_frequency_hz(x: &[f64], sample_rate_hz: f64) -> f64 {
    let n = x.len();
    if n < 8 {
        return f64::NAN;
    }
    let mean = x.iter().sum::<f64>() / n as f64;
    let mut buf: Vec<f64> = x
        .iter()
        .enumerate()
        .map(|(i, v)| (v - mean) * (0.5 - 0.5 * (TAU * i as f64 / n as f64).cos()))
        .collect();
    let fft = super::spectrum::plan_forward(n);
    let mut spec = fft.make_output_vec();
    if fft.process(&mut buf, &mut spec).is_err() {
        return f64::NAN;
    }
    let mags: Vec<f64> = spec.iter().map(|c| c.norm()).collect();
    let last = mags.len() - 1; // n/2 (or (n-1)/2)
    let mut k = 1;
    for i in 1..last {
        if mags[i] > mags[k] {
            k = i;
        }
    }
    let (lo, hi) = (mags[k - 1], mags[k + 1]);
    let delta = if mags[k] <= 0.0 {
        0.0
    } else if hi >= lo {
        let r = hi / mags[k];
        (2.0 * r - 1.0) / (r + 1.0)
    } else {
        let r = lo / mags[k];
        -(2.0 * r - 1.0) / (r + 1.0)
    };
    (k as f64 + delta.clamp(-0.5, 0.5)) * sample_rate_hz / n as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::RngExt;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::Normal;

    fn sine(n: usize, fs: f64, f: f64, amp: f64, phase: f64, offset: f64, t0: f64) -> Vec<f64> {
        (0..n)
            .map(|i| amp * (TAU * f * (t0 + i as f64 / fs) + phase).cos() + offset)
            .collect()
    }

    /// Slow oracle: normal equations summed naively with sin/cos evaluated at every sample.
    fn fit3_oracle(x: &[f64], fs: f64, f: f64, t0: f64) -> [f64; 3] {
        let mut g = vec![0.0; 9];
        let mut r = [0.0; 3];
        for (i, &xv) in x.iter().enumerate() {
            let wt = TAU * f * (t0 + i as f64 / fs);
            let v = [wt.cos(), wt.sin(), 1.0];
            for a in 0..3 {
                r[a] += xv * v[a];
                for b in 0..3 {
                    g[a * 3 + b] += v[a] * v[b];
                }
            }
        }
        let p = solve_sym_psd(&mut g, &r, 3);
        [p[0], p[1], p[2]]
    }

    #[test]
    fn fit3_recovers_a_noiseless_sine_exactly() {
        let (fs, f, amp, ph, off, t0) = (48_000.0, 1234.567, 0.8, 0.7, -0.13, 0.0123);
        let x = sine(10_000, fs, f, amp, ph, off, t0);
        let fit = fit3(&x, fs, f, t0);
        assert!((fit.amplitude_v - amp).abs() < 1e-9, "{fit:?}");
        assert!((fit.phase_rad - ph).abs() < 1e-9, "{fit:?}");
        assert!((fit.c - off).abs() < 1e-9, "{fit:?}");
        assert!((fit.a - amp * ph.cos()).abs() < 1e-9 && (fit.b + amp * ph.sin()).abs() < 1e-9);
        assert!(fit.residual_rms_v < 1e-9, "{fit:?}");
    }

    #[test]
    fn fit3_agrees_with_a_naive_least_squares_oracle_on_random_data() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let x: Vec<f64> = (0..3001).map(|_| rng.random::<f64>() - 0.3).collect();
        let (fs, f, t0) = (1000.0, 37.3, -0.25);
        let fit = fit3(&x, fs, f, t0);
        let o = fit3_oracle(&x, fs, f, t0);
        assert!(
            (fit.a - o[0]).abs() < 1e-10
                && (fit.b - o[1]).abs() < 1e-10
                && (fit.c - o[2]).abs() < 1e-10
        );
        // The residual is the rms of x minus the model, evaluated directly.
        let rms = (x
            .iter()
            .enumerate()
            .map(|(i, v)| {
                let wt = TAU * f * (t0 + i as f64 / fs);
                (v - o[0] * wt.cos() - o[1] * wt.sin() - o[2]).powi(2)
            })
            .sum::<f64>()
            / x.len() as f64)
            .sqrt();
        assert!((fit.residual_rms_v - rms).abs() < 1e-12);
    }

    #[test]
    fn fit3_keeps_exact_over_a_million_samples() {
        // Guards the rotation recurrence and its periodic reset.
        let (fs, f) = (1.0e6, 12_345.678_9);
        let x = sine(1 << 20, fs, f, 1.0, -2.0, 0.25, 0.0);
        let fit = fit3(&x, fs, f, 0.0);
        assert!((fit.amplitude_v - 1.0).abs() < 1e-9 && (fit.phase_rad + 2.0).abs() < 1e-9);
        assert!(
            (fit.c - 0.25).abs() < 1e-9 && fit.residual_rms_v < 1e-9,
            "{fit:?}"
        );
    }

    #[test]
    fn fit4_converges_from_half_a_bin_off_and_recovers_everything() {
        let (fs, n) = (100_000.0, 4096);
        let bin = fs / n as f64;
        let f = 97.37 * bin;
        let x = sine(n, fs, f, 1.3, 2.5, 0.05, 0.0);
        for start in [f + 0.5 * bin, f - 0.5 * bin] {
            let fit = fit4(&x, fs, start, 0.0);
            assert!(((fit.frequency_hz - f) / f).abs() < 1e-11, "{fit:?}");
            assert!((fit.amplitude_v - 1.3).abs() < 1e-9, "{fit:?}");
            assert!((fit.phase_rad - 2.5).abs() < 1e-9, "{fit:?}");
            assert!(
                (fit.c - 0.05).abs() < 1e-9 && fit.residual_rms_v < 1e-9,
                "{fit:?}"
            );
            assert!(fit.iterations < 50, "{fit:?}");
        }
    }

    #[test]
    fn fit4_from_the_fft_estimate_handles_a_low_and_a_high_tone() {
        let (fs, n) = (1.0, 2000);
        for f in [0.0123, 0.4567] {
            let x = sine(n, fs, f, 0.5, -1.0, 0.0, 0.0);
            let est = estimate_frequency_hz(&x, fs);
            // The Hann two-bin ratio is exact up to leakage from the negative frequency: well under 0.1 bin.
            assert!((est - f).abs() < 0.1 / n as f64, "{est} vs {f}");
            let fit = fit4(&x, fs, est, 0.0);
            assert!((fit.frequency_hz - f).abs() < 1e-12, "{fit:?}");
        }
    }

    /// Runs `trials` noisy records and returns the mean squared errors of (frequency, amplitude, phase at the
    /// record centre, offset) for fit4 (frequency free) and fit3 (frequency known).
    fn noisy_errors(trials: usize, n: usize, sigma: f64, seed: u64) -> ([f64; 4], [f64; 3]) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let noise = Normal::new(0.0, sigma).unwrap();
        let (fs, f, amp, off) = (1.0, 0.1234567, 1.0, 0.2);
        // Time origin at the record centre, where the phase estimate is uncorrelated with the frequency's.
        let t0 = -((n - 1) as f64) / 2.0;
        let mut e4 = [0.0; 4];
        let mut e3 = [0.0; 3];
        for _ in 0..trials {
            let ph = rng.random::<f64>() * TAU - std::f64::consts::PI;
            let x: Vec<f64> = sine(n, fs, f, amp, ph, off, t0)
                .into_iter()
                .map(|v| v + rng.sample(noise))
                .collect();
            let wrap = |d: f64| (d + std::f64::consts::PI).rem_euclid(TAU) - std::f64::consts::PI;
            let g = fit4(&x, fs, f + 0.3 / n as f64, t0);
            e4[0] += (g.frequency_hz - f).powi(2);
            e4[1] += (g.amplitude_v - amp).powi(2);
            e4[2] += wrap(g.phase_rad - ph).powi(2);
            e4[3] += (g.c - off).powi(2);
            let h = fit3(&x, fs, f, t0);
            e3[0] += (h.amplitude_v - amp).powi(2);
            e3[1] += wrap(h.phase_rad - ph).powi(2);
            e3[2] += (h.c - off).powi(2);
        }
        (e4.map(|v| v / trials as f64), e3.map(|v| v / trials as f64))
    }

    #[test]
    fn noisy_fits_reach_the_cramer_rao_bounds() {
        // Cramer-Rao bounds for a real sine A cos(w n + phi) + c in white Gaussian noise of variance s^2, phase
        // referred to the record centre (S. M. Kay, "Fundamentals of Statistical Signal Processing: Estimation
        // Theory", 1993, Example 3.14; D. C. Rife and R. R. Boorstyn, IEEE Trans. IT 1974; from memory):
        // var(f) = 12 s^2 / (2 pi)^2 * 2 / (A^2 N (N^2 - 1)) [cycles/sample], var(A) = 2 s^2 / N,
        // var(phi) = 2 s^2 / (A^2 N), var(c) = s^2 / N. Both fits are least squares, hence efficient here; with
        // 400 trials the mean squared error of each should lie within about +-25 % of its bound
        // (chi-square spread sqrt(2/400) = 7 %, plus the small phase-frequency coupling).
        let (n, sigma, trials) = (1024, 0.05, 400);
        let (e4, e3) = noisy_errors(trials, n, sigma, 11);
        let nf = n as f64;
        let s2 = sigma * sigma;
        let crb_f = 24.0 * s2 / (TAU * TAU * nf * (nf * nf - 1.0));
        let crb_a = 2.0 * s2 / nf;
        let crb_p = 2.0 * s2 / nf;
        let crb_c = s2 / nf;
        let ratio4 = [e4[0] / crb_f, e4[1] / crb_a, e4[2] / crb_p, e4[3] / crb_c];
        let ratio3 = [e3[0] / crb_a, e3[1] / crb_p, e3[2] / crb_c];
        for r in ratio4.iter().chain(&ratio3) {
            assert!((0.75..1.3).contains(r), "fit4 {ratio4:?} fit3 {ratio3:?}");
        }
    }

    /// Naive N-bit floor quantizer over [low, low + 2^N q), returning the reconstructed level (code centre).
    fn quantize(v: f64, bits: u32, low: f64, q: f64) -> f64 {
        let m = (1u64 << bits) as f64;
        let code = ((v - low) / q).floor().clamp(0.0, m - 1.0);
        low + (code + 0.5) * q
    }

    #[test]
    fn sine_fit_enob_of_an_ideal_quantizer_is_its_bit_count() {
        // IEEE Std 1241 ENOB = N - log2(NAD_rms / (q / sqrt 12)); an ideal quantizer's error has rms q/sqrt(12)
        // (W. R. Bennett, "Spectra of quantized signals", BSTJ 1948), so ENOB = N. Within 0.1 bit (tolerance
        // common practice, no source). Coherent sine: 1021 cycles in 2^16 samples, amplitude just under full scale.
        for bits in [8u32, 12] {
            let (n, cycles) = (1usize << 16, 1021.0);
            let fs = 1.0;
            let f = cycles / n as f64;
            let q = 2.0 / (1u64 << bits) as f64; // range [-1, 1)
            let amp = 1.0 - 0.6 * q;
            let x: Vec<f64> = sine(n, fs, f, amp, 0.3, 0.0, 0.0)
                .iter()
                .map(|&v| quantize(v, bits, -1.0, q))
                .collect();
            let est = estimate_frequency_hz(&x, fs);
            let fit = fit4(&x, fs, est, 0.0);
            let enob = enob_from_residual(bits, q, fit.residual_rms_v);
            assert!(
                (enob - bits as f64).abs() < 0.1,
                "{bits} bits: ENOB {enob}, fit {fit:?}"
            );
        }
    }

    #[test]
    fn enob_formula_reads_a_known_residual() {
        // N - log2(rms / (q / sqrt 12)) (IEEE Std 1241): residual twice the ideal gives one bit less.
        let q = 1e-3;
        assert!((enob_from_residual(10, q, 2.0 * q / 12f64.sqrt()) - 9.0).abs() < 1e-12);
    }

    #[test]
    fn multitone_fit_recovers_non_coherent_tones_jointly() {
        let (fs, n) = (1.0, 3000);
        let tones = [0.0101, 0.0113, 0.2501];
        let amps = [1.0, 0.3, 0.05];
        let phases = [0.1, -2.0, 3.0];
        let x: Vec<f64> = (0..n)
            .map(|i| {
                let t = 0.5 + i as f64 / fs;
                0.07 + (0..3)
                    .map(|k| amps[k] * (TAU * tones[k] * t + phases[k]).cos())
                    .sum::<f64>()
            })
            .collect();
        let fit = fit_multitone(&x, fs, &tones, 0.5);
        for k in 0..3 {
            assert!((fit.tones[k].amplitude_v - amps[k]).abs() < 1e-9, "{fit:?}");
            assert!((fit.tones[k].phase_rad - phases[k]).abs() < 1e-8, "{fit:?}");
        }
        assert!((fit.offset_v - 0.07).abs() < 1e-9 && fit.residual_rms_v < 1e-9);
    }

    #[test]
    fn a_tone_at_nyquist_does_not_break_the_fit() {
        // At exactly fs/2 with t0 = 0 the sine column vanishes: the solver drops it instead of returning NaN.
        let x: Vec<f64> = (0..64)
            .map(|i| if i % 2 == 0 { 1.5 } else { -0.5 })
            .collect();
        let fit = fit3(&x, 2.0, 1.0, 0.0);
        assert!(
            (fit.a - 1.0).abs() < 1e-12 && fit.b == 0.0 && (fit.c - 0.5).abs() < 1e-12,
            "{fit:?}"
        );
    }

    #[test]
    fn degenerate_input_gives_nan_not_a_panic() {
        assert!(fit3(&[1.0, 2.0], 1.0, 0.1, 0.0).a.is_nan());
        assert!(fit4(&[1.0; 100], 1.0, 0.7, 0.0).a.is_nan());
        assert!(estimate_frequency_hz(&[1.0; 3], 1.0).is_nan());
    }
}
