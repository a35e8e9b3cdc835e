//! Band-limited decimation by an integer factor, streaming.
//!
//! A linear-phase windowed-sinc FIR (Kaiser window, about 100 dB stopband) runs on the input grid and one output
//! is computed every `factor` inputs. The passband is flat (ripple below 5e-4 dB) up to 0.4 x the output rate; the
//! stopband starts at 0.6 x the output rate, so only the top fifth of the output band can carry aliases and the
//! meters keep below 0.4 x the output rate. The filter's delay is compensated: output sample m stands for the
//! instant of input sample m x factor.

use crate::measure::window::bessel_i0;

/// One FIR decimation stage.
struct Single {
    factor: usize,
    taps: Vec<f64>,
    /// History, written twice so that the last `taps.len()` samples are always one contiguous slice.
    hist: Vec<f64>,
    pos: usize,
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
            hist: vec![0.0; 2 * len],
            pos: 0,
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
            // The newest sample has index `seen`; the output centred on seen - delay is due when that is a
            // multiple of the factor.
            if self.seen == self.due {
                let window = &self.hist[self.pos..self.pos + len];
                out.push(dot(window, &self.taps));
                self.due += self.factor as u64;
            }
            self.seen += 1;
        }
    }

    /// Feed `delay_samples()` copies of the last input so the outputs up to the last input's instant come out.
    fn flush(&mut self, out: &mut Vec<f64>) {
        let len = self.taps.len();
        let last = self.hist[(self.pos + len - 1) % len];
        for _ in 0..self.delay_samples() {
            self.push(&[last], out);
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
}
