//! Band-limited decimation by an integer factor, streaming.
//!
//! A linear-phase windowed-sinc FIR (Kaiser window, about 100 dB stopband) runs on the input grid and one output
//! is computed every `factor` inputs. The passband is flat (ripple below 5e-4 dB) up to 0.4 x the output rate; the
//! stopband starts at 0.6 x the output rate, so only the top fifth of the output band can carry aliases and the
//! meters keep below 0.4 x the output rate. The filter's delay is compensated: output sample m stands for the
//! instant of input sample m x factor.

use crate::measure::window::bessel_i0;

/// One FIR decimation stage.
///
/// Block computation: `buf` holds a contiguous run of inputs (the tail the next outputs still need, then each
/// new block appended), and every due output is one contiguous dot product of `taps.len()` inputs with the
/// taps, so the cost per input is `taps.len() / factor` multiply-adds plus an amortised copy of the tail.
struct Single {
    factor: usize,
    taps: Vec<f64>,
    /// Inputs with global indices `base .. base + buf.len()` (indices below 0 are the start-up copies of the
    /// first input).
    buf: Vec<f64>,
    /// Global input index of `buf[0]`.
    base: i64,
    /// Input samples seen.
    seen: u64,
    /// Index of the input sample at which the next output is due (outputs are centred on multiples of `factor`).
    due: u64,
}

/// Fraction of the output rate up to which the passband is flat.
pub const PASSBAND_FRACTION: f64 = 0.4;

impl Single {
    /// `pass` and `stop`: band edges as fractions of this stage's output rate.
    fn new(factor: usize, pass: f64, stop: f64) -> Self {
        assert!(factor >= 1);
        let taps = if factor == 1 {
            vec![1.0]
        } else {
            design(factor, pass, stop)
        };
        let len = taps.len();
        Single {
            factor,
            taps,
            buf: Vec::new(),
            base: 0,
            seen: 0,
            due: ((len - 1) / 2) as u64,
        }
    }

    /// Delay of the filter in input samples ((L - 1)/2 for L taps).
    fn delay_samples(&self) -> usize {
        (self.taps.len() - 1) / 2
    }

    /// Feed input samples; decimated outputs are appended to `out`. Output m (counting from the first output) is
    /// the band-limited value at input index `m * factor`, including the filter's start-up (inputs before the
    /// first are taken as equal to the first).
    fn push(&mut self, input: &[f64], out: &mut Vec<f64>) {
        let Some(&first) = input.first() else {
            return;
        };
        let len = self.taps.len();
        if self.seen == 0 {
            // Start-up: the `len - 1` inputs before the first are copies of it.
            self.buf.clear();
            self.buf.resize(len - 1, first);
            self.base = -(len as i64 - 1);
        }
        self.buf.extend_from_slice(input);
        self.seen += input.len() as u64;
        // The output due at input index `due` is the dot product over inputs `due - len + 1 ..= due`.
        let f = self.factor as u64;
        while self.due < self.seen {
            let start = (self.due as i64 - (len as i64 - 1) - self.base) as usize;
            if self.due + 3 * f < self.seen {
                // Four due outputs at once: the taps are loaded once for all four windows.
                let fu = self.factor;
                let w = |k: usize| &self.buf[start + k * fu..start + k * fu + len];
                out.extend_from_slice(&dot4([w(0), w(1), w(2), w(3)], &self.taps));
                self.due += 4 * f;
            } else {
                out.push(dot(&self.buf[start..start + len], &self.taps));
                self.due += f;
            }
        }
        // Keep only what the next output needs.
        let keep_from = (self.due as i64 - (len as i64 - 1) - self.base).max(0) as usize;
        let keep_from = keep_from.min(self.buf.len());
        if keep_from > 0 {
            self.buf.drain(..keep_from);
            self.base += keep_from as i64;
        }
    }

    /// Feed `delay_samples()` copies of the last input so the outputs up to the last input's instant come out.
    fn flush(&mut self, out: &mut Vec<f64>) {
        // Nothing seen yet: the stream is taken as zeros (as a history that starts cleared).
        let last = self.buf.last().copied().unwrap_or(0.0);
        let pad = [last; 64];
        let mut left = self.delay_samples();
        while left > 0 {
            let n = left.min(pad.len());
            self.push(&pad[..n], out);
            left -= n;
        }
    }
}

#[inline]
fn dot(a: &[f64], b: &[f64]) -> f64 {
    // Four independent accumulators over exact chunks: no bounds checks in the loop, so it vectorises.
    let mut acc = [0.0f64; 4];
    let ca = a.chunks_exact(4);
    let cb = b.chunks_exact(4);
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        acc[0] += x[0] * y[0];
        acc[1] += x[1] * y[1];
        acc[2] += x[2] * y[2];
        acc[3] += x[3] * y[3];
    }
    let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    for (x, y) in ra.iter().zip(rb) {
        s += x * y;
    }
    s
}

/// Four dot products of windows `a[k]` with the same `b`, each summed exactly as [`dot`] sums it (four
/// accumulators over chunks of four, then the remainder), so each result is bit-identical to `dot(a[k], b)`.
/// Sixteen independent accumulators and one load of `b` per four products keep the loop busy.
#[inline]
fn dot4(a: [&[f64]; 4], b: &[f64]) -> [f64; 4] {
    let n = b.len();
    let (a0, a1, a2, a3) = (&a[0][..n], &a[1][..n], &a[2][..n], &a[3][..n]);
    let mut acc = [[0.0f64; 4]; 4];
    let chunks = a0
        .chunks_exact(4)
        .zip(a1.chunks_exact(4))
        .zip(a2.chunks_exact(4))
        .zip(a3.chunks_exact(4))
        .zip(b.chunks_exact(4));
    for ((((x0, x1), x2), x3), t) in chunks {
        for l in 0..4 {
            acc[0][l] += x0[l] * t[l];
        }
        for l in 0..4 {
            acc[1][l] += x1[l] * t[l];
        }
        for l in 0..4 {
            acc[2][l] += x2[l] * t[l];
        }
        for l in 0..4 {
            acc[3][l] += x3[l] * t[l];
        }
    }
    let full = n - n % 4;
    let rows = [a0, a1, a2, a3];
    let mut out = [0.0; 4];
    for k in 0..4 {
        let c = &acc[k];
        let mut s = (c[0] + c[1]) + (c[2] + c[3]);
        for j in full..n {
            s += rows[k][j] * b[j];
        }
        out[k] = s;
    }
    out
}

/// Streaming decimator: one stage, or for large factors two (a short filter that only keeps aliases out of the
/// final band, then the sharp one at a few times the output rate), which costs about half as much per input.
pub struct Decimator {
    factor: usize,
    first: Option<Single>,
    last: Single,
    scratch: Vec<f64>,
}

impl Decimator {
    /// # Panics
    /// If `factor` is 0.
    pub fn new(factor: usize) -> Self {
        assert!(factor >= 1);
        let stop = 1.0 - PASSBAND_FRACTION;
        // Split factor = d1 x d2 with d2 in 2..=5 and d1 >= 2 when possible.
        let split = (2..=5usize)
            .rev()
            .find(|d2| factor.is_multiple_of(*d2) && factor / d2 >= 2);
        match split {
            Some(d2) if factor >= 8 => {
                let d1 = factor / d2;
                let d2f = d2 as f64;
                // Relative to the first stage's output rate (d2 x the final rate): keep 0.4 of the final rate
                // flat; reject what would alias into the final 0..0.6 band.
                let first = Single::new(d1, PASSBAND_FRACTION / d2f, (d2f - stop) / d2f);
                Decimator {
                    factor,
                    first: Some(first),
                    last: Single::new(d2, PASSBAND_FRACTION, stop),
                    scratch: Vec::new(),
                }
            }
            _ => Decimator {
                factor,
                first: None,
                last: Single::new(factor, PASSBAND_FRACTION, stop),
                scratch: Vec::new(),
            },
        }
    }

    pub fn factor(&self) -> usize {
        self.factor
    }

    /// Feed input samples; decimated outputs are appended to `out`. Output m (counting from the first output) is
    /// the band-limited value at input index `m * factor`, including the filters' start-up (inputs before the
    /// first are taken as equal to the first).
    pub fn push(&mut self, input: &[f64], out: &mut Vec<f64>) {
        match self.first.as_mut() {
            Some(first) => {
                self.scratch.clear();
                first.push(input, &mut self.scratch);
                self.last.push(&self.scratch, out);
            }
            None => self.last.push(input, out),
        }
    }

    /// Let the outputs up to the last input's instant come out.
    pub fn flush(&mut self, out: &mut Vec<f64>) {
        if let Some(first) = self.first.as_mut() {
            self.scratch.clear();
            first.flush(&mut self.scratch);
            self.last.push(&self.scratch, out);
        }
        self.last.flush(out);
    }
}

/// Kaiser-windowed sinc (about 100 dB stopband) for decimation by `factor`, with its passband edge at `pass` and
/// its stopband edge at `stop`, both fractions of the output rate.
fn design(factor: usize, pass: f64, stop: f64) -> Vec<f64> {
    let atten_db = 100.0;
    let beta = 0.1102 * (atten_db - 8.7);
    // Transition width in radians per input sample.
    let dw = 2.0 * std::f64::consts::PI * (stop - pass) / factor as f64;
    let mut n = ((atten_db - 8.0) / (2.285 * dw)).ceil() as usize + 1;
    if n.is_multiple_of(2) {
        n += 1;
    }
    let fc = 0.5 * (pass + stop) / factor as f64; // cycles per input sample
    let m = (n - 1) as f64 / 2.0;
    let i0b = bessel_i0(beta);
    let mut taps: Vec<f64> = (0..n)
        .map(|i| {
            let x = i as f64 - m;
            let sinc = if x == 0.0 {
                2.0 * fc
            } else {
                (2.0 * std::f64::consts::PI * fc * x).sin() / (std::f64::consts::PI * x)
            };
            let r = x / m;
            let w = bessel_i0(beta * (1.0 - r * r).max(0.0).sqrt()) / i0b;
            sinc * w
        })
        .collect();
    let sum: f64 = taps.iter().sum();
    taps.iter_mut().for_each(|t| *t /= sum);
    taps
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    fn run(factor: usize, x: &[f64]) -> Vec<f64> {
        let mut d = Decimator::new(factor);
        let mut out = Vec::new();
        for chunk in x.chunks(777) {
            d.push(chunk, &mut out);
        }
        d.flush(&mut out);
        out
    }

    #[test]
    fn passband_sine_keeps_amplitude_and_timing() {
        let factor = 10;
        let fs = 1.0e6;
        let f = 0.35 * fs / factor as f64; // inside the flat passband
        let x: Vec<f64> = (0..200_000)
            .map(|n| (2.0 * PI * f * n as f64 / fs).sin())
            .collect();
        let y = run(factor, &x);
        assert_eq!(y.len(), x.len() / factor);
        let skip = 200;
        for (m, &v) in y.iter().enumerate().skip(skip).take(y.len() - 2 * skip) {
            let expect = (2.0 * PI * f * (m * factor) as f64 / fs).sin();
            assert!((v - expect).abs() < 5e-5, "m {m}: {v} vs {expect}");
        }
    }

    #[test]
    fn stopband_tone_is_rejected_by_100_db() {
        let factor = 8;
        let fs = 1.0e6;
        let f = 0.62 * fs / factor as f64 + 0.5 * fs / factor as f64; // well past the stopband edge
        let x: Vec<f64> = (0..100_000)
            .map(|n| (2.0 * PI * f * n as f64 / fs).sin())
            .collect();
        let y = run(factor, &x);
        let skip = 200;
        let peak = y[skip..y.len() - skip]
            .iter()
            .fold(0.0f64, |a, v| a.max(v.abs()));
        assert!(peak < 1e-4, "peak {peak}");
    }

    #[test]
    fn factor_one_is_identity() {
        let x: Vec<f64> = (0..100).map(|n| n as f64).collect();
        assert_eq!(run(1, &x), x);
    }

    /// The previous per-sample implementation (history written twice, one branch per sample), kept as the
    /// reference for the block computation.
    struct PerSample {
        factor: usize,
        taps: Vec<f64>,
        hist: Vec<f64>,
        pos: usize,
        seen: u64,
        due: u64,
    }

    impl PerSample {
        fn new(taps: Vec<f64>, factor: usize) -> Self {
            let len = taps.len();
            PerSample {
                factor,
                hist: vec![0.0; 2 * len],
                pos: 0,
                seen: 0,
                due: ((len - 1) / 2) as u64,
                taps,
            }
        }

        fn push(&mut self, input: &[f64], out: &mut Vec<f64>) {
            let len = self.taps.len();
            for &x in input {
                if self.seen == 0 {
                    self.hist.iter_mut().for_each(|h| *h = x);
                }
                self.hist[self.pos] = x;
                self.hist[self.pos + len] = x;
                self.pos += 1;
                if self.pos == len {
                    self.pos = 0;
                }
                if self.seen == self.due {
                    let window = &self.hist[self.pos..self.pos + len];
                    out.push(dot(window, &self.taps));
                    self.due += self.factor as u64;
                }
                self.seen += 1;
            }
        }

        fn flush(&mut self, out: &mut Vec<f64>) {
            let len = self.taps.len();
            let last = self.hist[(self.pos + len - 1) % len];
            for _ in 0..(len - 1) / 2 {
                self.push(&[last], out);
            }
        }
    }

    /// Direct convolution: output m = sum_j taps[j] x[m factor + delay - (len - 1) + j], indices clamped into
    /// the input (before the first: the first; after the last: the last), one output per multiple of `factor`
    /// up to the last input. Plain left-to-right sum.
    fn direct(taps: &[f64], factor: usize, x: &[f64]) -> Vec<f64> {
        let len = taps.len() as i64;
        let delay = (len - 1) / 2;
        let last = x.len() as i64 - 1;
        (0..x.len().div_ceil(factor))
            .map(|m| {
                let end = (m * factor) as i64 + delay;
                taps.iter()
                    .enumerate()
                    .map(|(j, t)| t * x[(end - (len - 1) + j as i64).clamp(0, last) as usize])
                    .sum()
            })
            .collect()
    }

    fn test_signal(n: usize) -> Vec<f64> {
        (0..n)
            .map(|i| {
                let t = i as f64;
                0.7 * (0.0123 * t).sin()
                    + 0.2 * (0.91 * t + 0.3).cos()
                    + 1e-3 * ((i * 7919) % 101) as f64
            })
            .collect()
    }

    #[test]
    fn block_stage_matches_the_per_sample_stage_bit_for_bit_in_any_block_split() {
        let x = test_signal(20_000);
        for (factor, pass, stop) in [(5, 0.08, 0.88), (5, 0.4, 0.6), (3, 0.4, 0.6), (1, 0.4, 0.6)] {
            let mut reference = {
                let s = Single::new(factor, pass, stop);
                PerSample::new(s.taps.clone(), factor)
            };
            let mut want = Vec::new();
            reference.push(&x, &mut want);
            reference.flush(&mut want);
            for split in [1usize, 2, 7, 333, 4096, 20_000] {
                let mut s = Single::new(factor, pass, stop);
                let mut got = Vec::new();
                for chunk in x.chunks(split) {
                    s.push(chunk, &mut got);
                    s.push(&[], &mut got);
                }
                s.flush(&mut got);
                assert_eq!(got.len(), want.len(), "factor {factor} split {split}");
                for (m, (g, w)) in got.iter().zip(&want).enumerate() {
                    assert_eq!(
                        g.to_bits(),
                        w.to_bits(),
                        "factor {factor} split {split} m {m}"
                    );
                }
            }
        }
    }

    #[test]
    fn block_stage_matches_a_direct_convolution_with_held_ends() {
        let x = test_signal(3001);
        for (factor, pass, stop) in [(5, 0.08, 0.88), (5, 0.4, 0.6), (4, 0.4, 0.6)] {
            let mut s = Single::new(factor, pass, stop);
            let want = direct(&s.taps, factor, &x);
            let mut got = Vec::new();
            for chunk in x.chunks(100) {
                s.push(chunk, &mut got);
            }
            s.flush(&mut got);
            assert_eq!(got.len(), want.len());
            for (m, (g, w)) in got.iter().zip(&want).enumerate() {
                assert!(
                    (g - w).abs() <= 1e-12 * (1.0 + w.abs()),
                    "m {m}: {g} vs {w}"
                );
            }
        }
    }

    #[test]
    fn two_stage_decimator_matches_the_per_sample_stages_bit_for_bit() {
        let x = test_signal(50_000);
        let got = run(25, &x);
        let d = Decimator::new(25);
        let first = d.first.as_ref().expect("two stages for 25");
        let mut a = PerSample::new(first.taps.clone(), first.factor);
        let mut b = PerSample::new(d.last.taps.clone(), d.last.factor);
        let (mut mid, mut want) = (Vec::new(), Vec::new());
        for chunk in x.chunks(777) {
            mid.clear();
            a.push(chunk, &mut mid);
            b.push(&mid, &mut want);
        }
        mid.clear();
        a.flush(&mut mid);
        b.push(&mid, &mut want);
        b.flush(&mut want);
        assert_eq!(got.len(), want.len());
        assert_eq!(got.len(), x.len() / 25);
        for (g, w) in got.iter().zip(&want) {
            assert_eq!(g.to_bits(), w.to_bits());
        }
    }
}
