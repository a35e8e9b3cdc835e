//! Band-limited decimation by an integer factor, streaming.
//!
//! A linear-phase windowed-sinc FIR (Kaiser window, about 100 dB stopband) runs on the input grid and one output
//! is computed every `factor` inputs. The passband is flat (ripple below 5e-4 dB) up to 0.4 x the output rate; the
//! stopband starts at 0.6 x the output rate, so only the top fifth of the output band can carry aliases and the
//! meters keep below 0.4 x the output rate. The filter's delay is compensated: output sample m stands for the
//! instant of input sample m x factor.
//!
//! Computation (per pushed block, no per-sample work): the inputs the due outputs read are split into `factor`
//! phase rows, so that the inputs one tap sees for consecutive outputs are consecutive; the symmetric taps are
//! folded (`t[i] (x[i] + x[L - 1 - i])`, half the multiplies); and many outputs are computed at once, one per
//! vector lane, with each tap broadcast over the lanes (16 outputs at a time on the baseline x86-64 build, 32 in
//! an AVX2 build of the same code chosen at run time). Every output is summed in one fixed order (centre tap, then
//! the folded pairs phase by phase), whatever block or lane group it falls in and whichever build runs it (no fused
//! multiply-add), so the result does not depend on how the stream is split into blocks nor on the processor. That
//! order differs from a plain left-to-right dot product: outputs agree with one to rounding (below 1e-15 of the
//! signal's peak through both stages of a factor of 25), not bit for bit.

use crate::measure::window::bessel_i0;

/// One FIR decimation stage.
///
/// Block computation: `buf` holds a contiguous run of inputs (the tail the next outputs still need, then each
/// new block appended). For every push, the inputs the due outputs need are split into `factor` phase rows
/// (`poly`, row p holds the inputs `s + n factor + p` for the first due output's window start `s`), so that the
/// inputs one tap sees for consecutive outputs are consecutive in memory. The linear-phase taps are folded
/// (`taps[i] == taps[L - 1 - i]`): each output is `taps[c] x[c] + sum_i taps[i] (x[i] + x[L - 1 - i])` over its
/// window, with `c = (L - 1)/2`, and [`Single::group`] computes [`LANES`] outputs at once, one lane per output,
/// with the taps broadcast: no shuffles, about `(L + 1) / (2 factor)` multiplies and `L / factor` adds per input.
struct Single {
    factor: usize,
    /// The full (symmetric) impulse response, `L` taps, `L` odd.
    taps: Vec<f64>,
    /// The folded taps by phase: for each entry of `phases`, its taps `taps[q factor + p]`, q = 0, 1, ...
    folded: Vec<f64>,
    phases: Vec<Phase>,
    /// Centre tap `taps[c]` and where its input sits: row `center_row`, offset `center_offset` from the output.
    center_tap: f64,
    center_row: usize,
    center_offset: usize,
    /// Inputs with global indices `base .. base + buf.len()` (indices below 0 are the start-up copies of the
    /// first input).
    buf: Vec<f64>,
    /// Global input index of `buf[0]`.
    base: i64,
    /// Input samples seen.
    seen: u64,
    /// Index of the next output; output m is due once input `m factor + c` has been seen.
    next: u64,
    /// The last input seen (what `flush` holds).
    last: f64,
    /// Phase rows of the current push (scratch, `factor` rows of `row_len`).
    poly: Vec<f64>,
    /// The running processor has AVX2 (256-bit vectors): use [`Single::outputs_avx2`].
    #[cfg(target_arch = "x86_64")]
    avx2: bool,
}

/// The taps `i = q factor + p < c` of one phase `p` and where their mirror images `L - 1 - i` sit: in row
/// `partner` at offset `reach - q` from the output (the row of phase `p` is read at offset `q`).
struct Phase {
    row: usize,
    partner: usize,
    reach: usize,
    /// Range of this phase's taps in `folded`.
    start: usize,
    len: usize,
}

/// Outputs computed together by [`Single::group`]: each lane is one output, so the inputs of one tap for the
/// lanes are consecutive in a phase row (plain vector loads) and the tap is one broadcast.
const LANES: usize = 16;

/// [`LANES`] for the 256-bit build.
#[cfg(target_arch = "x86_64")]
const WIDE_LANES: usize = 32;

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
        assert!(len % 2 == 1, "odd length");
        debug_assert!((0..len).all(|i| taps[i].to_bits() == taps[len - 1 - i].to_bits()));
        let c = (len - 1) / 2;
        let mut folded = Vec::with_capacity(c);
        let mut phases = Vec::new();
        for p in 0..factor.min(c) {
            let start = folded.len();
            folded.extend((p..c).step_by(factor).map(|i| taps[i]));
            phases.push(Phase {
                row: p,
                partner: (len - 1 - p) % factor,
                reach: (len - 1 - p) / factor,
                start,
                len: folded.len() - start,
            });
        }
        Single {
            factor,
            center_tap: taps[c],
            center_row: c % factor,
            center_offset: c / factor,
            taps,
            folded,
            phases,
            buf: Vec::new(),
            base: 0,
            seen: 0,
            next: 0,
            last: 0.0,
            poly: Vec::new(),
            #[cfg(target_arch = "x86_64")]
            avx2: std::arch::is_x86_feature_detected!("avx2"),
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
        let c = self.delay_samples();
        let f = self.factor;
        if self.seen == 0 {
            // Start-up: the `c` inputs before the first (all the first output's window reaches) are copies of it.
            self.buf.clear();
            self.buf.resize(c, first);
            self.base = -(c as i64);
        }
        self.seen += input.len() as u64;
        self.last = input[input.len() - 1];
        // The inputs from `buf[start]` on (then `rest`) are what the due outputs read.
        let start = (self.next as i64 * f as i64 - c as i64 - self.base) as usize;
        debug_assert!(start <= self.buf.len(), "windows overlap (L > factor)");
        // Top `buf` up to a whole number of `f`-chunks from `start`, so the phase rows continue in `rest`.
        let top_up = ((f - (self.buf.len() - start) % f) % f).min(input.len());
        self.buf.extend_from_slice(&input[..top_up]);
        let rest = &input[top_up..];
        // Outputs next .. end are due (output m once input m f + c is in).
        let end = if self.seen > c as u64 {
            (self.seen - 1 - c as u64) / f as u64 + 1
        } else {
            0
        };
        if end > self.next {
            let count = (end - self.next) as usize;
            // Window of output m: inputs m f - c ..= m f + c; row p holds the inputs `start + n f + p`.
            let row_len = count - 1 + (2 * c) / f + 1;
            self.poly.resize(f * row_len, 0.0);
            let head = &self.buf[start..];
            spread(head, f, &mut self.poly, row_len, 0);
            if head.len().is_multiple_of(f) {
                spread(rest, f, &mut self.poly, row_len, head.len() / f);
            }
            out.reserve(count);
            #[cfg(target_arch = "x86_64")]
            if self.avx2 {
                // SAFETY: `avx2` is set only where the running processor reports AVX2 (see `new`).
                unsafe { self.outputs_avx2(row_len, count, out) };
            } else {
                self.outputs::<LANES>(row_len, count, out);
            }
            #[cfg(not(target_arch = "x86_64"))]
            self.outputs::<LANES>(row_len, count, out);
            self.next = end;
        }
        // Keep only what the next output needs, out of `buf` then `rest`.
        let keep_from = (self.next as i64 * f as i64 - c as i64 - self.base).max(0) as usize;
        let keep_from = keep_from.min(self.buf.len() + rest.len());
        if keep_from >= self.buf.len() {
            let skip = keep_from - self.buf.len();
            self.buf.clear();
            self.buf.extend_from_slice(&rest[skip..]);
        } else {
            self.buf.drain(..keep_from);
            self.buf.extend_from_slice(rest);
        }
        self.base += keep_from as i64;
    }

    /// The `count` outputs due in the current push, `N` at a time (the rest four, then one at a time), appended to
    /// `out`.
    #[inline(always)]
    fn outputs<const N: usize>(&self, row_len: usize, count: usize, out: &mut Vec<f64>) {
        let mut j = 0;
        while j + N <= count {
            out.extend_from_slice(&self.group::<N>(row_len, j));
            j += N;
        }
        while j + 4 <= count {
            out.extend_from_slice(&self.group::<4>(row_len, j));
            j += 4;
        }
        while j < count {
            out.push(self.group::<1>(row_len, j)[0]);
            j += 1;
        }
    }

    /// [`Single::outputs`] compiled for 256-bit vectors (four lanes per instruction instead of two). Same
    /// arithmetic in the same order (no fused multiply-add), so the results are bit-identical to the baseline
    /// build's.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn outputs_avx2(&self, row_len: usize, count: usize, out: &mut Vec<f64>) {
        self.outputs::<WIDE_LANES>(row_len, count, out);
    }

    /// Outputs `j .. j + N` of the current push (local numbering), from the phase rows of length `row_len`.
    /// Every lane is summed in the same order (centre tap, then the folded pairs phase by phase, tap by tap),
    /// whatever `N`, so an output does not depend on how the stream was split into blocks.
    #[inline(always)]
    fn group<const N: usize>(&self, row_len: usize, j: usize) -> [f64; N] {
        let row = |r: usize| &self.poly[r * row_len..(r + 1) * row_len];
        let xc = &row(self.center_row)[j + self.center_offset..][..N];
        let mut acc = [0.0f64; N];
        for l in 0..N {
            acc[l] = self.center_tap * xc[l];
        }
        for ph in &self.phases {
            let n = ph.len;
            let h = &self.folded[ph.start..ph.start + n];
            let a = &row(ph.row)[j..j + n + N - 1];
            let b = &row(ph.partner)[j + ph.reach + 1 - n..j + ph.reach + N];
            for ((t, wa), wb) in h.iter().zip(a.windows(N)).zip(b.windows(N).rev()) {
                let wa: &[f64; N] = wa.try_into().expect("window of N");
                let wb: &[f64; N] = wb.try_into().expect("window of N");
                for l in 0..N {
                    acc[l] += t * (wa[l] + wb[l]);
                }
            }
        }
        acc
    }

    /// Feed `delay_samples()` copies of the last input so the outputs up to the last input's instant come out.
    fn flush(&mut self, out: &mut Vec<f64>) {
        // Nothing seen yet: the stream is taken as zeros (as a history that starts cleared).
        let last = self.last;
        let pad = [last; 64];
        let mut left = self.delay_samples();
        while left > 0 {
            let n = left.min(pad.len());
            self.push(&pad[..n], out);
            left -= n;
        }
    }
}

/// Split `src` into `f` phase rows of `row_len`, from column `n0` on: `rows[p * row_len + n0 + n] = src[n f + p]`
/// for as many `n` as `src` and the row hold (the rest of each row is left as it was).
fn spread(src: &[f64], f: usize, rows: &mut [f64], row_len: usize, n0: usize) {
    match f {
        2 => spread_by::<2>(src, rows, row_len, n0),
        3 => spread_by::<3>(src, rows, row_len, n0),
        4 => spread_by::<4>(src, rows, row_len, n0),
        5 => spread_by::<5>(src, rows, row_len, n0),
        _ => {
            for (p, row) in rows.chunks_exact_mut(row_len).enumerate() {
                let from = src.get(p..).unwrap_or(&[]);
                for (d, s) in row[n0..].iter_mut().zip(from.iter().step_by(f)) {
                    *d = *s;
                }
            }
        }
    }
}

/// [`spread`] for a factor known at compile time: one pass over the whole chunks per row, then the partial one.
fn spread_by<const F: usize>(src: &[f64], rows: &mut [f64], row_len: usize, n0: usize) {
    let chunks = src.chunks_exact(F);
    let partial = chunks.remainder();
    let room = row_len.saturating_sub(n0);
    let whole = chunks.len().min(room);
    for (p, row) in rows.chunks_exact_mut(row_len).enumerate().take(F) {
        let row = &mut row[n0.min(row_len)..];
        for (d, ch) in row[..whole].iter_mut().zip(src.chunks_exact(F)) {
            *d = ch[p];
        }
        if whole < room
            && let Some(&v) = partial.get(p)
        {
            row[whole] = v;
        }
    }
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

    /// Largest |v| of a signal: the scale for the rounding-level tolerances below.
    fn peak(x: &[f64]) -> f64 {
        x.iter().fold(0.0f64, |a, v| a.max(v.abs()))
    }

    #[test]
    fn block_stage_matches_the_per_sample_stage_to_rounding_in_any_block_split() {
        // The folded, by-phase sum adds in another order than the per-sample stage's dot product: the outputs
        // agree to rounding (1e-13 of the signal's peak), not bit for bit.
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
                let tol = 1e-13 * peak(&x);
                for (m, (g, w)) in got.iter().zip(&want).enumerate() {
                    assert!(
                        (g - w).abs() <= tol,
                        "factor {factor} split {split} m {m}: {g} vs {w}"
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
    fn two_stage_decimator_matches_the_per_sample_stages_to_rounding() {
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
        let tol = 1e-13 * peak(&x);
        for (m, (g, w)) in got.iter().zip(&want).enumerate() {
            assert!((g - w).abs() <= tol, "m {m}: {g} vs {w}");
        }
    }

    /// The decimator fed `x` in blocks of the sizes `sizes` yields, in turn, then flushed.
    fn run_split(factor: usize, x: &[f64], sizes: &mut dyn FnMut() -> usize) -> Vec<f64> {
        let mut d = Decimator::new(factor);
        let mut out = Vec::new();
        let mut rest = x;
        while !rest.is_empty() {
            let n = sizes().clamp(1, rest.len());
            d.push(&rest[..n], &mut out);
            d.push(&[], &mut out);
            rest = &rest[n..];
        }
        d.flush(&mut out);
        out
    }

    #[test]
    fn output_does_not_depend_on_the_block_split() {
        use rand::{RngExt, SeedableRng};
        // Every output is summed in the same order whichever group it falls in: equal bit for bit.
        let x = test_signal(30_000);
        for factor in [25, 5, 1] {
            let whole = run_split(factor, &x, &mut || usize::MAX);
            assert_eq!(whole.len(), x.len().div_ceil(factor));
            for size in [1usize, 2, 7, 25, 4096] {
                let got = run_split(factor, &x, &mut || size);
                assert_eq!(got.len(), whole.len(), "factor {factor} size {size}");
                for (m, (g, w)) in got.iter().zip(&whole).enumerate() {
                    assert_eq!(
                        g.to_bits(),
                        w.to_bits(),
                        "factor {factor} size {size} m {m}"
                    );
                }
            }
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
            let got = run_split(factor, &x, &mut || match rng.random_range(0..4u32) {
                0 => rng.random_range(1..4usize),
                1 => rng.random_range(1..60usize),
                2 => rng.random_range(1..1000usize),
                _ => rng.random_range(1000..5000usize),
            });
            assert_eq!(got.len(), whole.len(), "factor {factor} random split");
            for (m, (g, w)) in got.iter().zip(&whole).enumerate() {
                assert_eq!(
                    g.to_bits(),
                    w.to_bits(),
                    "factor {factor} random split m {m}"
                );
            }
        }
    }

    #[test]
    fn designed_taps_are_exactly_symmetric_so_folding_them_is_exact() {
        for (factor, pass, stop) in [(5, 0.08, 0.88), (5, 0.4, 0.6), (3, 0.4, 0.6), (7, 0.4, 0.6)] {
            let s = Single::new(factor, pass, stop);
            let n = s.taps.len();
            assert!(n % 2 == 1 && n > factor);
            for i in 0..n {
                assert_eq!(
                    s.taps[i].to_bits(),
                    s.taps[n - 1 - i].to_bits(),
                    "factor {factor} i {i}"
                );
            }
            // Folded taps plus the centre: every tap of the first half once.
            assert_eq!(s.folded.len(), (n - 1) / 2);
        }
    }

    #[cfg(target_arch = "x86_64")]
    #[test]
    fn wide_build_gives_the_same_bits_as_the_baseline_build() {
        if !std::arch::is_x86_feature_detected!("avx2") {
            return; // nothing to compare on this processor
        }
        let x = test_signal(20_000);
        for (factor, pass, stop) in [(5, 0.08, 0.88), (5, 0.4, 0.6), (3, 0.4, 0.6)] {
            let mut wide = Single::new(factor, pass, stop);
            let mut base = Single::new(factor, pass, stop);
            assert!(wide.avx2);
            base.avx2 = false;
            let (mut a, mut b) = (Vec::new(), Vec::new());
            for chunk in x.chunks(1000) {
                wide.push(chunk, &mut a);
                base.push(chunk, &mut b);
            }
            wide.flush(&mut a);
            base.flush(&mut b);
            assert_eq!(a.len(), b.len());
            for (m, (g, w)) in a.iter().zip(&b).enumerate() {
                assert_eq!(g.to_bits(), w.to_bits(), "factor {factor} m {m}");
            }
        }
    }
}
