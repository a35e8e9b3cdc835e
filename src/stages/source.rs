//! The signal source: closed-form waveforms of time, Gaussian noise on the analog grid, and WAV files
//! resampled to the analog rate.
//!
//! Closed-form kinds (sine, square, triangle, sawtooth, multitone, chirp, step, dc) are exact functions of
//! time: [`SourceGen::value_at`] gives the value at any instant and [`SourceGen::fill`] evaluates it at the
//! grid instants `n / rate` (computed from `n`, never accumulated). Noise and WAV sources only exist on the
//! grid and are produced by [`SourceGen::fill`] in order.
//!
//! Band-limited noise is white Gaussian noise through a 6th-order Butterworth low-pass (three biquads, bilinear
//! transform prewarped at the bandwidth), scaled by the filter's exact white-noise power gain so the rms
//! after band-limiting is the one asked for. A bandwidth at or above 0.49 x the analog rate gives white noise.
//! WAV files are read whole (the chosen channel, at the file's rate) and resampled to the analog rate in
//! chunks as the run asks for samples.

use std::f64::consts::PI;
use std::path::Path;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rubato::audioadapter_buffers::direct::SequentialSlice;
use rubato::{
    Async, Fft, FixedAsync, FixedSync, Resampler, SincInterpolationParameters, WindowFunction,
};

use crate::signal::rotation::Quad;
use crate::signal::stream::Timebase;
use crate::signal::waveform::{Source, Waveform, chirp_cycles};

/// Order of the Butterworth low-pass that band-limits noise (three biquads).
const NOISE_FILTER_ORDER: usize = 6;
/// Largest internal FFT block (output side, frames) accepted for the synchronous resampler; beyond it the
/// asynchronous sinc resampler is used.
const MAX_FFT_BLOCK_OUT: usize = 1 << 20;
/// Target FFT block on the input (file) side of the synchronous resampler, frames. Larger blocks move the
/// anti-aliasing cutoff closer to the file's Nyquist frequency (about 0.987 of it at 1024).
const FFT_BLOCK_IN_TARGET: usize = 1024;
/// Output chunk of the asynchronous resampler, frames.
const ASYNC_CHUNK_OUT: usize = 4096;
/// Scratch size used when skipping forward over grid samples.
const SKIP_CHUNK: usize = 4096;

/// Generates the source signal (volts) on the analog grid.
pub struct SourceGen {
    offset_v: f64,
    timebase: Timebase,
    kind: Kind,
}

enum Kind {
    /// A closed-form function of time (never `Noise` or `Wav`).
    Exact(Waveform),
    Noise(Box<NoiseGen>),
    Wav(Box<WavStream>),
}

impl SourceGen {
    /// Build the generator for `src` on the grid `timebase`.
    ///
    /// `seed` drives the noise source (a `ChaCha8Rng` seeded from it); `base_dir` resolves relative WAV
    /// paths. A WAV file that cannot be opened gives [`crate::Error::Read`]; one that is malformed, empty,
    /// in an unsupported sample format, or lacks the requested channel gives [`crate::Error::BadInput`].
    pub fn new(
        src: &Source,
        timebase: Timebase,
        seed: u64,
        base_dir: &Path,
    ) -> Result<SourceGen, crate::Error> {
        let kind = match &src.waveform {
            Waveform::Noise {
                rms_v,
                bandwidth_hz,
            } => Kind::Noise(Box::new(NoiseGen::new(
                *rms_v,
                *bandwidth_hz,
                timebase.rate_hz,
                seed,
            ))),
            Waveform::Wav {
                path,
                channel,
                full_scale_v,
                repeat,
            } => {
                let full = if path.is_relative() {
                    base_dir.join(path)
                } else {
                    path.clone()
                };
                Kind::Wav(Box::new(WavStream::open(
                    &full,
                    *channel,
                    *full_scale_v,
                    *repeat,
                    timebase.rate_hz,
                )?))
            }
            w => Kind::Exact(w.clone()),
        };
        Ok(SourceGen {
            offset_v: src.offset_v,
            timebase,
            kind,
        })
    }

    /// True when the value is a closed-form function of time (every kind but noise and WAV); then
    /// [`value_at`](Self::value_at) is exact at any instant.
    pub fn is_exact(&self) -> bool {
        matches!(self.kind, Kind::Exact(_))
    }

    /// The source value (V) at `t_s`. Exact for [`is_exact`](Self::is_exact) sources; for noise and WAV
    /// sources (which only exist on the grid) it returns the offset.
    pub fn value_at(&self, t_s: f64) -> f64 {
        match &self.kind {
            Kind::Exact(w) => self.offset_v + exact_excursion(w, t_s),
            _ => self.offset_v,
        }
    }

    /// For closed-form sources, fill `out[j]` with the value at `t0_s + j dt_s` (any instants, e.g. a grid
    /// shifted by a fraction of a step) and return true; noise and WAV sources leave `out` alone and return
    /// false. A sine uses a rotation recurrence restarted exactly every 1024 samples.
    pub fn fill_at(&self, t0_s: f64, dt_s: f64, out: &mut [f64]) -> bool {
        self.fill_at_from(t0_s, dt_s, 0, out)
    }

    /// As [`fill_at`](Self::fill_at) for the instants `t0_s + (j0 + j) dt_s`: the tail, from index `j0`, of
    /// what `fill_at` would write. With `j0` a multiple of [`FILL_AT_ALIGN`] the values are the same bits.
    pub fn fill_at_from(&self, t0_s: f64, dt_s: f64, j0: usize, out: &mut [f64]) -> bool {
        let offset = self.offset_v;
        match &self.kind {
            Kind::Exact(Waveform::Sine {
                frequency_hz,
                amplitude_v,
                phase_rad,
            }) => {
                fill_sine(
                    out,
                    offset,
                    *amplitude_v,
                    2.0 * PI * *frequency_hz * dt_s,
                    |j| {
                        2.0 * PI * cycles_frac(*frequency_hz, t0_s + (j0 + j) as f64 * dt_s)
                            + *phase_rad
                    },
                );
                true
            }
            Kind::Exact(w) => {
                for (j, y) in out.iter_mut().enumerate() {
                    *y = offset + exact_excursion(w, t0_s + (j0 + j) as f64 * dt_s);
                }
                true
            }
            Kind::Noise(_) | Kind::Wav(_) => false,
        }
    }

    /// Fill `out` with grid samples `n0 .. n0 + out.len()` (sample n at `n / rate` s).
    ///
    /// Closed-form kinds may be asked for any `n0`. Noise and WAV sources keep state: call them with
    /// consecutive blocks (`n0` = the previous `n0 + len`, starting at 0) for an efficient run. A jump
    /// forward is served by generating and discarding the samples in between, and a jump back by
    /// restarting from sample 0, so the samples for a given `n` never depend on the block split.
    pub fn fill(&mut self, n0: u64, out: &mut [f64]) {
        let offset = self.offset_v;
        match &mut self.kind {
            Kind::Exact(Waveform::Sine {
                frequency_hz,
                amplitude_v,
                phase_rad,
            }) => {
                // Rotation recurrences restarted exactly every RESTART samples (so rounding cannot build up,
                // about 1e-13 relative), instead of a sine per sample.
                let tb = self.timebase;
                fill_sine(
                    out,
                    offset,
                    *amplitude_v,
                    2.0 * PI * *frequency_hz * tb.dt_s(),
                    |j| {
                        2.0 * PI * cycles_frac(*frequency_hz, tb.time_s(n0 + j as u64)) + *phase_rad
                    },
                );
            }
            Kind::Exact(w) => {
                for (i, y) in out.iter_mut().enumerate() {
                    let t = self.timebase.time_s(n0 + i as u64);
                    *y = offset + exact_excursion(w, t);
                }
            }
            Kind::Noise(g) => {
                g.seek(n0);
                g.generate(out);
                for y in out.iter_mut() {
                    *y += offset;
                }
            }
            Kind::Wav(s) => {
                s.seek(n0);
                s.generate(out);
                for y in out.iter_mut() {
                    *y += offset;
                }
            }
        }
    }
}

/// Samples between exact restarts of [`fill_sine`]'s recurrences.
const RESTART: usize = 1024;

/// [`SourceGen::fill_at_from`] gives the same bits as [`SourceGen::fill_at`] when it starts at a multiple of
/// this.
pub const FILL_AT_ALIGN: usize = RESTART;

/// `out[j] = offset + amp sin(phase_at(j))` for a phase advancing by `w_rad` per sample, by four interleaved
/// rotations ([`Quad`]) restarted exactly from `phase_at` every [`RESTART`] samples.
fn fill_sine(out: &mut [f64], offset: f64, amp: f64, w_rad: f64, phase_at: impl Fn(usize) -> f64) {
    for (b, chunk) in out.chunks_mut(RESTART).enumerate() {
        let mut rot = Quad::new(phase_at(b * RESTART), w_rad);
        let mut quads = chunk.chunks_exact_mut(4);
        for q in &mut quads {
            for (y, s) in q.iter_mut().zip(rot.sin) {
                *y = offset + amp * s;
            }
            rot.advance();
        }
        for (k, y) in quads.into_remainder().iter_mut().enumerate() {
            *y = offset + amp * rot.sin[k];
        }
    }
}

/// Fraction of cycles `f * t` in [0, 1), computed with an error-free product so the phase stays accurate
/// when `f * t` is large (long simulated times).
fn cycles_frac(f_hz: f64, t_s: f64) -> f64 {
    let hi = f_hz * t_s;
    let lo = f_hz.mul_add(t_s, -hi); // exact rounding error of the product
    let p = (hi - hi.floor()) + lo;
    p - p.floor()
}

/// Waveform value minus the source offset, at `t_s`, for the closed-form kinds.
fn exact_excursion(w: &Waveform, t_s: f64) -> f64 {
    match w {
        Waveform::Sine {
            frequency_hz,
            amplitude_v,
            phase_rad,
        } => amplitude_v * (2.0 * PI * cycles_frac(*frequency_hz, t_s) + phase_rad).sin(),
        Waveform::Square {
            frequency_hz,
            amplitude_v,
            duty,
        } => {
            if cycles_frac(*frequency_hz, t_s) < *duty {
                *amplitude_v
            } else {
                -amplitude_v
            }
        }
        Waveform::Triangle {
            frequency_hz,
            amplitude_v,
        } => {
            // In phase with a sine: 0 at p = 0, +A at 1/4, -A at 3/4.
            let p = cycles_frac(*frequency_hz, t_s);
            let u = if p < 0.25 {
                4.0 * p
            } else if p < 0.75 {
                2.0 - 4.0 * p
            } else {
                4.0 * p - 4.0
            };
            amplitude_v * u
        }
        Waveform::Sawtooth {
            frequency_hz,
            amplitude_v,
        } => amplitude_v * (2.0 * cycles_frac(*frequency_hz, t_s) - 1.0),
        Waveform::Multitone { tones } => tones
            .iter()
            .map(|tone| {
                tone.amplitude_v
                    * (2.0 * PI * cycles_frac(tone.frequency_hz, t_s) + tone.phase_rad).sin()
            })
            .sum(),
        Waveform::Chirp {
            start_hz,
            stop_hz,
            sweep_s,
            law,
            amplitude_v,
        } => {
            let c = chirp_cycles(*start_hz, *stop_hz, *sweep_s, *law, t_s);
            amplitude_v * (2.0 * PI * (c - c.floor())).sin()
        }
        Waveform::Step { at_s, amplitude_v } => {
            if t_s >= *at_s {
                *amplitude_v
            } else {
                0.0
            }
        }
        Waveform::Chord {
            amplitude_v,
            beat_s,
        } => crate::signal::waveform::chord_excursion(*amplitude_v, *beat_s, t_s),
        Waveform::Dc | Waveform::Noise { .. } | Waveform::Wav { .. } => 0.0,
    }
}

// ---------------------------------------------------------------------------------------------------------
// Noise

/// One biquad section in transposed direct form II.
#[derive(Debug, Clone, Copy)]
struct Biquad {
    b0: f64,
    b1: f64,
    b2: f64,
    a1: f64,
    a2: f64,
    s1: f64,
    s2: f64,
}

impl Biquad {
    /// Low-pass section with quality `q`, designed with the bilinear transform prewarped at `fc_hz`.
    fn lowpass(fc_hz: f64, q: f64, rate_hz: f64) -> Biquad {
        let k = (PI * fc_hz / rate_hz).tan();
        let norm = 1.0 / (1.0 + k / q + k * k);
        let b0 = k * k * norm;
        Biquad {
            b0,
            b1: 2.0 * b0,
            b2: b0,
            a1: 2.0 * (k * k - 1.0) * norm,
            a2: (1.0 - k / q + k * k) * norm,
            s1: 0.0,
            s2: 0.0,
        }
    }

    #[inline]
    fn tick(&mut self, x: f64) -> f64 {
        let y = self.b0 * x + self.s1;
        self.s1 = self.b1 * x - self.a1 * y + self.s2;
        self.s2 = self.b2 * x - self.a2 * y;
        y
    }
}

/// A grid-based source that produces its samples in order: noise and WAV streams. Seeking is shared: back
/// means restart, forward means generate and discard, so output never depends on how calls are split.
trait GridStream {
    /// Grid index of the next sample `generate` will produce.
    fn next_n(&self) -> u64;
    fn restart(&mut self);
    fn generate(&mut self, out: &mut [f64]);
    /// Scratch buffer kept between seeks (taken and put back, so seeking does not allocate each time).
    fn scratch(&mut self) -> &mut Vec<f64>;

    fn seek(&mut self, n0: u64) {
        if n0 < self.next_n() {
            self.restart();
        }
        if n0 > self.next_n() {
            let mut scratch = std::mem::take(self.scratch());
            scratch.resize(SKIP_CHUNK, 0.0);
            while self.next_n() < n0 {
                let m = ((n0 - self.next_n()) as usize).min(SKIP_CHUNK);
                self.generate(&mut scratch[..m]);
            }
            *self.scratch() = scratch;
        }
    }
}

/// Gaussian noise on the grid, optionally band-limited by a Butterworth low-pass and rescaled so the
/// rms after band-limiting is the requested one.
struct NoiseGen {
    seed: u64,
    rng: ChaCha8Rng,
    /// Multiplies each unit-variance Gaussian draw before filtering.
    gain: f64,
    sections: Vec<Biquad>,
    next_n: u64,
    scratch: Vec<f64>,
}

impl GridStream for NoiseGen {
    fn next_n(&self) -> u64 {
        self.next_n
    }
    fn restart(&mut self) {
        NoiseGen::restart(self)
    }
    fn generate(&mut self, out: &mut [f64]) {
        NoiseGen::generate(self, out)
    }
    fn scratch(&mut self) -> &mut Vec<f64> {
        &mut self.scratch
    }
}

impl NoiseGen {
    fn new(rms_v: f64, bandwidth_hz: Option<f64>, rate_hz: f64, seed: u64) -> NoiseGen {
        let mut sections = Vec::new();
        let mut gain = rms_v;
        if let Some(bw) = bandwidth_hz
            && bw > 0.0
            && bw < 0.49 * rate_hz
        {
            // Butterworth pole pairs: Q_k = 1 / (2 sin((2k + 1) pi / (2n))).
            for k in 0..NOISE_FILTER_ORDER / 2 {
                let theta = (2 * k + 1) as f64 * PI / (2 * NOISE_FILTER_ORDER) as f64;
                sections.push(Biquad::lowpass(bw, 1.0 / (2.0 * theta.sin()), rate_hz));
            }
            // White unit-variance input gives output variance sum(h^2) = the filter's noise bandwidth
            // relative to the grid's Nyquist band; divide it out so the rms after filtering is rms_v.
            gain = rms_v / cascade_power_gain(&sections).sqrt();
        }
        NoiseGen {
            seed,
            rng: ChaCha8Rng::seed_from_u64(seed),
            gain,
            sections,
            next_n: 0,
            scratch: Vec::new(),
        }
    }

    fn restart(&mut self) {
        self.rng = ChaCha8Rng::seed_from_u64(self.seed);
        for s in &mut self.sections {
            s.s1 = 0.0;
            s.s2 = 0.0;
        }
        self.next_n = 0;
    }

    fn generate(&mut self, out: &mut [f64]) {
        for y in out.iter_mut() {
            let z: f64 = self.rng.sample(StandardNormal);
            let mut v = z * self.gain;
            for s in &mut self.sections {
                v = s.tick(v);
            }
            *y = v;
        }
        self.next_n += out.len() as u64;
    }
}

/// sum over n of h[n]^2 for the cascade (its white-noise power gain), from the state-space model by the
/// doubling form of the discrete Lyapunov sum P = sum_k A^k B B' (A')^k, so it costs the same for any
/// bandwidth.
fn cascade_power_gain(sections: &[Biquad]) -> f64 {
    let n = 2 * sections.len();
    // Evaluate one step of the cascade from state `state` and input `x`: returns (next state, output).
    let step = |state: &[f64], x: f64| -> (Vec<f64>, f64) {
        let mut secs: Vec<Biquad> = sections.to_vec();
        for (i, s) in secs.iter_mut().enumerate() {
            s.s1 = state[2 * i];
            s.s2 = state[2 * i + 1];
        }
        let mut v = x;
        for s in &mut secs {
            v = s.tick(v);
        }
        let next: Vec<f64> = secs.iter().flat_map(|s| [s.s1, s.s2]).collect();
        (next, v)
    };
    let zero = vec![0.0; n];
    let (b, d) = step(&zero, 1.0);
    let mut a = vec![0.0; n * n]; // row-major
    let mut c = vec![0.0; n];
    for j in 0..n {
        let mut e = vec![0.0; n];
        e[j] = 1.0;
        let (col, y) = step(&e, 0.0);
        for i in 0..n {
            a[i * n + j] = col[i];
        }
        c[j] = y;
    }
    let matmul = |x: &[f64], y: &[f64]| -> Vec<f64> {
        let mut r = vec![0.0; n * n];
        for i in 0..n {
            for k in 0..n {
                let xik = x[i * n + k];
                for j in 0..n {
                    r[i * n + j] += xik * y[k * n + j];
                }
            }
        }
        r
    };
    let transpose = |x: &[f64]| -> Vec<f64> {
        let mut r = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                r[j * n + i] = x[i * n + j];
            }
        }
        r
    };
    let mut p = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..n {
            p[i * n + j] = b[i] * b[j];
        }
    }
    // After m doublings P holds sum_{k < 2^m}; 64 doublings cover any impulse response we can run.
    for _ in 0..64 {
        let apat = matmul(&matmul(&a, &p), &transpose(&a));
        let mut change = 0.0f64;
        let mut size = 0.0f64;
        for (pi, d) in p.iter_mut().zip(&apat) {
            *pi += d;
            change = change.max(d.abs());
            size = size.max(pi.abs());
        }
        a = matmul(&a, &a);
        if change <= 1e-17 * size {
            break;
        }
    }
    let mut cpc = 0.0;
    for i in 0..n {
        for j in 0..n {
            cpc += c[i] * p[i * n + j] * c[j];
        }
    }
    d * d + cpc
}

// ---------------------------------------------------------------------------------------------------------
// WAV

/// A WAV channel, streamed out at the analog rate.
struct WavStream {
    /// The chosen channel at the file's rate, +-1.0 full scale.
    data: Vec<f64>,
    full_scale_v: f64,
    repeat: bool,
    /// Without repeat: the first grid sample at or after the end of the file (output is 0 from there).
    end_n: Option<u64>,
    /// None when the file's rate equals the analog rate (samples are copied through).
    resampler: Option<Box<dyn Resampler<f64>>>,
    /// Next file frame to feed the resampler (or to copy through); grows past the file length.
    in_pos: u64,
    in_buf: Vec<f64>,
    out_buf: Vec<f64>,
    out_pos: usize,
    out_len: usize,
    /// Output frames still to drop for the resampler's delay.
    discard: usize,
    next_n: u64,
    scratch: Vec<f64>,
}

impl GridStream for WavStream {
    fn next_n(&self) -> u64 {
        self.next_n
    }
    fn restart(&mut self) {
        WavStream::restart(self)
    }
    fn generate(&mut self, out: &mut [f64]) {
        WavStream::generate(self, out)
    }
    fn scratch(&mut self) -> &mut Vec<f64> {
        &mut self.scratch
    }
}

impl WavStream {
    fn open(
        path: &Path,
        channel: usize,
        full_scale_v: f64,
        repeat: bool,
        rate_hz: f64,
    ) -> Result<WavStream, crate::Error> {
        let wav = super::wav_file::read_channel(path, channel)?;
        let data = wav.data;
        let file_rate = f64::from(wav.rate_hz);
        let end_n = if repeat {
            None
        } else {
            Some((data.len() as f64 * rate_hz / file_rate).ceil() as u64)
        };
        let resampler = make_resampler(wav.rate_hz, rate_hz)
            .map_err(|e| crate::Error::BadInput(format!("{}: {e}", path.display())))?;
        let (in_cap, out_cap, discard) = match &resampler {
            Some(r) => (
                r.input_frames_max(),
                r.output_frames_max(),
                r.output_delay(),
            ),
            None => (0, 0, 0),
        };
        Ok(WavStream {
            data,
            full_scale_v,
            repeat,
            end_n,
            resampler,
            in_pos: 0,
            in_buf: vec![0.0; in_cap],
            out_buf: vec![0.0; out_cap],
            out_pos: 0,
            out_len: 0,
            discard,
            next_n: 0,
            scratch: Vec::new(),
        })
    }

    /// File sample `i` (looping with repeat, silence past the end without).
    #[inline]
    fn file_sample(&self, i: u64) -> f64 {
        let len = self.data.len() as u64;
        if self.repeat {
            self.data[(i % len) as usize]
        } else if i < len {
            self.data[i as usize]
        } else {
            0.0
        }
    }

    fn restart(&mut self) {
        if let Some(r) = &mut self.resampler {
            r.reset();
            self.discard = r.output_delay();
        }
        self.in_pos = 0;
        self.out_pos = 0;
        self.out_len = 0;
        self.next_n = 0;
    }

    /// Run the resampler until it has output frames ready.
    fn refill(&mut self) {
        let Some(r) = self.resampler.as_mut() else {
            return;
        };
        loop {
            let nin = r.input_frames_next();
            for i in 0..nin {
                let pos = self.in_pos + i as u64;
                let len = self.data.len() as u64;
                self.in_buf[i] = if self.repeat {
                    self.data[(pos % len) as usize]
                } else if pos < len {
                    self.data[pos as usize]
                } else {
                    0.0
                };
            }
            self.in_pos += nin as u64;
            let out_cap = self.out_buf.len();
            let input = SequentialSlice::new(&self.in_buf[..nin], 1, nin)
                .expect("input buffer sized from input_frames_max");
            let mut output = SequentialSlice::new_mut(&mut self.out_buf[..], 1, out_cap)
                .expect("output buffer sized from output_frames_max");
            let (_, nout) = r
                .process_into_buffer(&input, &mut output, None)
                .expect("resampler buffers are sized from its own limits");
            let skip = self.discard.min(nout);
            self.discard -= skip;
            if nout > skip {
                self.out_pos = skip;
                self.out_len = nout;
                return;
            }
        }
    }

    fn generate(&mut self, out: &mut [f64]) {
        for y in out.iter_mut() {
            let n = self.next_n;
            self.next_n += 1;
            if let Some(end) = self.end_n
                && n >= end
            {
                *y = 0.0;
                continue;
            }
            let v = if self.resampler.is_none() {
                let v = self.file_sample(self.in_pos);
                self.in_pos += 1;
                v
            } else {
                if self.out_pos == self.out_len {
                    self.refill();
                }
                let v = self.out_buf[self.out_pos];
                self.out_pos += 1;
                v
            };
            *y = v * self.full_scale_v;
        }
    }
}

/// The resampler from the file's rate to the analog rate: none when they are equal; the synchronous FFT
/// resampler when both rates are whole numbers whose ratio gives a manageable block; otherwise the
/// asynchronous sinc resampler (its delay is trimmed to the nearest output frame, so it may be off by a
/// fraction of a grid step).
fn make_resampler(
    file_rate: u32,
    rate_hz: f64,
) -> Result<Option<Box<dyn Resampler<f64>>>, rubato::ResamplerConstructionError> {
    if rate_hz == file_rate as f64 {
        return Ok(None);
    }
    if rate_hz.fract() == 0.0 && rate_hz < 1e15 {
        let fin = file_rate as usize;
        let fout = rate_hz as usize;
        let g = gcd(fin, fout);
        let (min_in, min_out) = (fin / g, fout / g);
        let blocks = FFT_BLOCK_IN_TARGET.div_ceil(min_in).max(1);
        if blocks.saturating_mul(min_out) <= MAX_FFT_BLOCK_OUT {
            let r = Fft::<f64>::new_custom(
                fin,
                fout,
                blocks * min_in,
                1,
                1,
                WindowFunction::BlackmanHarris2,
                FixedSync::Both,
            )?;
            return Ok(Some(Box::new(r)));
        }
    }
    let params = SincInterpolationParameters::new(256, WindowFunction::BlackmanHarris2);
    let r = Async::<f64>::new_sinc(
        rate_hz / file_rate as f64,
        1.0,
        &params,
        ASYNC_CHUNK_OUT,
        1,
        FixedAsync::Output,
    )?;
    Ok(Some(Box::new(r)))
}

fn gcd(mut a: usize, mut b: usize) -> usize {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::Tone;
    use crate::signal::waveform::ChirpLaw;

    fn gen_for(w: Waveform, offset_v: f64, rate_hz: f64, seed: u64) -> SourceGen {
        SourceGen::new(
            &Source {
                waveform: w,
                offset_v,
            },
            Timebase::new(rate_hz),
            seed,
            Path::new("."),
        )
        .unwrap()
    }

    /// Least-squares fit of a sin(2 pi f t) + b cos(2 pi f t) + c; returns (amplitude, phase of a sine, c).
    #[allow(clippy::needless_range_loop)] // index form reads like the algebra
    fn fit_sine(y: &[f64], t0_s: f64, rate_hz: f64, f_hz: f64) -> (f64, f64, f64) {
        let mut m = [[0.0f64; 3]; 3];
        let mut r = [0.0f64; 3];
        for (i, v) in y.iter().enumerate() {
            let t = t0_s + i as f64 / rate_hz;
            let row = [
                (2.0 * PI * f_hz * t).sin(),
                (2.0 * PI * f_hz * t).cos(),
                1.0,
            ];
            for a in 0..3 {
                for b in 0..3 {
                    m[a][b] += row[a] * row[b];
                }
                r[a] += row[a] * v;
            }
        }
        // Gaussian elimination on the 3x3 normal equations.
        for col in 0..3 {
            for row in col + 1..3 {
                let f = m[row][col] / m[col][col];
                for k in col..3 {
                    m[row][k] -= f * m[col][k];
                }
                r[row] -= f * r[col];
            }
        }
        let mut x = [0.0f64; 3];
        for i in (0..3).rev() {
            let mut s = r[i];
            for k in i + 1..3 {
                s -= m[i][k] * x[k];
            }
            x[i] = s / m[i][i];
        }
        (x[0].hypot(x[1]), x[1].atan2(x[0]), x[2])
    }

    #[test]
    fn sine_value_and_phase_are_exact_after_long_times() {
        // f = 1000 + 2^-10 Hz is exact in binary, so at t = 1000 s + tau the phase in cycles is exactly
        // 1_000_000.9765625 + f tau; the oracle drops the whole cycles (common practice, no source).
        let f = 1000.0 + 1.0 / 1024.0;
        let phase = 0.3;
        let g = gen_for(
            Waveform::Sine {
                frequency_hz: f,
                amplitude_v: 1.0,
                phase_rad: phase,
            },
            0.0,
            1e6,
            1,
        );
        // At 1e6 s: f * 1e6 = 1e9 + 976.5625 cycles, fraction 0.5625.
        for (t_whole, frac) in [(1000.0, 0.9765625), (1.0e6, 0.5625)] {
            for k in 0..50 {
                let tau = k as f64 * 1.37e-5;
                let t = t_whole + tau;
                // The offset actually represented in t (t - t_whole is exact here).
                let tau_exact = t - t_whole;
                let want = (2.0 * PI * (frac + f * tau_exact) + phase).sin();
                let got = g.value_at(t);
                assert!(
                    (got - want).abs() <= 1e-9,
                    "t = {t}: got {got}, want {want}"
                );
            }
        }
    }

    #[test]
    fn sine_fill_matches_value_at_over_many_restarts() {
        let mut g = gen_for(
            Waveform::Sine {
                frequency_hz: 19_076.75,
                amplitude_v: 2.0,
                phase_rad: -0.7,
            },
            2.5,
            10.0e6,
            0,
        );
        // An odd length and a late start: every rotator, the remainder and many restarts take part.
        let mut buf = vec![0.0; 100_003];
        let n0 = 12_345_679u64; // 1.23 s: the instants n / rate are exact to about 2e-16 s
        g.fill(n0, &mut buf);
        for (i, v) in buf.iter().enumerate() {
            // value_at's own instant n / rate is rounded to about 1e-16 s: 2 pi f A x 1e-16 s = 2.4e-11 V.
            let want = g.value_at((n0 + i as u64) as f64 / 10.0e6);
            assert!((v - want).abs() < 1e-10, "i {i}: {v} vs {want}");
        }
    }

    #[test]
    fn fill_at_from_an_aligned_index_gives_the_tail_of_fill_at_bit_for_bit() {
        let sine = Waveform::Sine {
            frequency_hz: 1234.5,
            amplitude_v: 2.0,
            phase_rad: 0.3,
        };
        let tri = Waveform::Triangle {
            frequency_hz: 321.0,
            amplitude_v: 1.0,
        };
        for w in [sine, tri] {
            let g = gen_for(w, 0.25, 1.0e6, 0);
            let (t0, dt) = (0.012_345_678_9, 0.37e-6);
            let mut whole = vec![0.0; 9000];
            assert!(g.fill_at(t0, dt, &mut whole));
            for j0 in [0, FILL_AT_ALIGN, 5 * FILL_AT_ALIGN] {
                let mut tail = vec![0.0; 9000 - j0];
                assert!(g.fill_at_from(t0, dt, j0, &mut tail));
                assert!(tail == whole[j0..], "j0 {j0}");
            }
        }
    }

    #[test]
    fn fill_at_matches_value_at_off_the_grid() {
        let sine = Waveform::Sine {
            frequency_hz: 1234.5,
            amplitude_v: 2.0,
            phase_rad: 0.3,
        };
        let square = Waveform::Square {
            frequency_hz: 700.0,
            amplitude_v: 1.0,
            duty: 0.5,
        };
        for w in [sine, square] {
            let g = gen_for(w, 0.25, 1.0e6, 0);
            let mut buf = vec![0.0; 5000];
            let (t0, dt) = (0.012_345_678_9, 0.37e-6);
            assert!(g.fill_at(t0, dt, &mut buf));
            for (j, v) in buf.iter().enumerate() {
                let want = g.value_at(t0 + j as f64 * dt);
                assert!((v - want).abs() < 1e-11, "j {j}: {v} vs {want}");
            }
        }
        let noise = gen_for(
            Waveform::Noise {
                rms_v: 1.0,
                bandwidth_hz: Some(1.0e3),
            },
            0.0,
            1.0e6,
            0,
        );
        let mut buf = vec![7.0; 4];
        assert!(!noise.fill_at(0.0, 1e-6, &mut buf));
        assert_eq!(buf, vec![7.0; 4]);
    }

    #[test]
    fn fill_matches_value_at_on_the_grid() {
        let mut g = gen_for(
            Waveform::Multitone {
                tones: vec![
                    Tone {
                        frequency_hz: 1000.0,
                        amplitude_v: 0.5,
                        phase_rad: 0.0,
                    },
                    Tone {
                        frequency_hz: 3100.0,
                        amplitude_v: 0.25,
                        phase_rad: 1.0,
                    },
                ],
            },
            0.1,
            48000.0,
            0,
        );
        let mut buf = vec![0.0; 1000];
        g.fill(123_456, &mut buf);
        for (i, v) in buf.iter().enumerate() {
            let t = (123_456 + i as u64) as f64 / 48000.0;
            assert_eq!(*v, g.value_at(t));
            let want = 0.1
                + 0.5 * (2.0 * PI * 1000.0 * t).sin()
                + 0.25 * (2.0 * PI * 3100.0 * t + 1.0).sin();
            assert!((v - want).abs() < 1e-9);
        }
    }

    #[test]
    fn square_triangle_sawtooth_step_and_dc_follow_their_definitions() {
        let sq = gen_for(
            Waveform::Square {
                frequency_hz: 10.0,
                amplitude_v: 2.0,
                duty: 0.25,
            },
            1.0,
            1e3,
            0,
        );
        assert_eq!(sq.value_at(0.01), 3.0); // 10 % of the period: high
        assert_eq!(sq.value_at(0.03), -1.0); // 30 %: low
        assert_eq!(sq.value_at(100.01), 3.0);
        let tri = gen_for(
            Waveform::Triangle {
                frequency_hz: 1.0,
                amplitude_v: 1.0,
            },
            0.0,
            1e3,
            0,
        );
        for (t, want) in [
            (0.0, 0.0),
            (0.125, 0.5),
            (0.25, 1.0),
            (0.5, 0.0),
            (0.75, -1.0),
        ] {
            assert!((tri.value_at(t) - want).abs() < 1e-12, "triangle at {t}");
        }
        let saw = gen_for(
            Waveform::Sawtooth {
                frequency_hz: 2.0,
                amplitude_v: 1.0,
            },
            0.0,
            1e3,
            0,
        );
        for (t, want) in [
            (0.0, -1.0),
            (0.125, -0.5),
            (0.25, 0.0),
            (0.2, -0.2),
            (10.375, 0.5),
        ] {
            assert!((saw.value_at(t) - want).abs() < 1e-9, "sawtooth at {t}");
        }
        let step = gen_for(
            Waveform::Step {
                at_s: 0.5,
                amplitude_v: 2.0,
            },
            -1.0,
            1e3,
            0,
        );
        assert_eq!(step.value_at(0.4999), -1.0);
        assert_eq!(step.value_at(0.5), 1.0);
        let dc = gen_for(Waveform::Dc, 0.7, 1e3, 0);
        assert!(dc.is_exact());
        assert_eq!(dc.value_at(12.0), 0.7);
    }

    #[test]
    fn chirp_instantaneous_frequency_follows_the_law() {
        // Linear: f(tau) = f0 + (f1 - f0) tau / T; logarithmic: f(tau) = f0 (f1/f0)^(tau/T)
        // (definitions of the two sweeps, common practice, no source). The phase derivative is taken by a
        // central difference.
        let (f0, f1, sweep) = (100.0, 10_000.0, 0.5);
        for law in [ChirpLaw::Linear, ChirpLaw::Logarithmic] {
            for k in 1..20 {
                let tau = k as f64 * sweep / 20.0;
                let h = 1e-7;
                let d = (chirp_cycles(f0, f1, sweep, law, tau + h)
                    - chirp_cycles(f0, f1, sweep, law, tau - h))
                    / (2.0 * h);
                let want = match law {
                    ChirpLaw::Linear => f0 + (f1 - f0) * tau / sweep,
                    ChirpLaw::Logarithmic => f0 * (f1 / f0).powf(tau / sweep),
                };
                assert!(
                    (d - want).abs() < 1e-5 * want,
                    "{law:?} at {tau}: {d} vs {want}"
                );
                // Sweeps repeat every sweep_s.
                let a = chirp_cycles(f0, f1, sweep, law, tau);
                let b = chirp_cycles(f0, f1, sweep, law, tau + 3.0 * sweep);
                assert!((a - b).abs() < 1e-6);
            }
        }
        let g = gen_for(
            Waveform::Chirp {
                start_hz: f0,
                stop_hz: f1,
                sweep_s: sweep,
                law: ChirpLaw::Linear,
                amplitude_v: 2.0,
            },
            0.5,
            1e5,
            0,
        );
        let t = 0.123;
        let want = 0.5 + 2.0 * (2.0 * PI * (f0 * t + (f1 - f0) * t * t / (2.0 * sweep))).sin();
        assert!((g.value_at(t) - want).abs() < 1e-9);
    }

    fn noise_gen(rms: f64, bw: Option<f64>, seed: u64) -> SourceGen {
        gen_for(
            Waveform::Noise {
                rms_v: rms,
                bandwidth_hz: bw,
            },
            0.0,
            1e6,
            seed,
        )
    }

    #[test]
    fn white_and_band_limited_noise_have_the_requested_rms() {
        for bw in [None, Some(10_000.0), Some(200_000.0)] {
            let mut g = noise_gen(0.2, bw, 7);
            assert!(!g.is_exact());
            let mut buf = vec![0.0; 1_000_000];
            g.fill(0, &mut buf);
            let mean = buf.iter().sum::<f64>() / buf.len() as f64;
            let rms = (buf.iter().map(|v| v * v).sum::<f64>() / buf.len() as f64).sqrt();
            // Gaussian sampling: the rms over 1e6 samples (about 20 independent samples per bandwidth
            // period for the 10 kHz case still gives > 5e4 degrees of freedom) within 3 %.
            assert!((rms / 0.2 - 1.0).abs() < 0.03, "bw {bw:?}: rms {rms}");
            assert!(mean.abs() < 0.02, "bw {bw:?}: mean {mean}");
        }
    }

    #[test]
    fn lyapunov_power_gain_matches_the_impulse_response_energy() {
        // Oracle: sum of h[n]^2 by running the impulse response directly.
        let rate = 1e6;
        for bw in [1e3, 2e4, 3e5] {
            let mut secs: Vec<Biquad> = (0..3)
                .map(|k| {
                    let theta = (2 * k + 1) as f64 * PI / 12.0;
                    Biquad::lowpass(bw, 1.0 / (2.0 * theta.sin()), rate)
                })
                .collect();
            let fast = cascade_power_gain(&secs);
            let mut e = 0.0;
            // 300_000 samples hold all but e^-400 of the energy for these bandwidths.
            for n in 0..300_000 {
                let mut v = if n == 0 { 1.0 } else { 0.0 };
                for s in &mut secs {
                    v = s.tick(v);
                }
                e += v * v;
            }
            assert!((fast / e - 1.0).abs() < 1e-9, "bw {bw}: {fast} vs {e}");
            // And it is close to the analog noise bandwidth ratio: ENBW of an n-th order Butterworth is
            // fc (pi / 2n) / sin(pi / 2n) (from memory), relative to the grid's Nyquist band rate / 2.
            if bw < 3e4 {
                let enbw = bw * (PI / 12.0) / (PI / 12.0).sin();
                assert!((e / (enbw / (rate / 2.0)) - 1.0).abs() < 0.01);
            }
        }
    }

    #[test]
    fn band_limited_noise_spectrum_falls_beyond_the_bandwidth() {
        use realfft::RealFftPlanner;
        let rate = 1e6;
        let bw = 20_000.0;
        let mut g = noise_gen(1.0, Some(bw), 3);
        let n = 4096;
        let mut planner = RealFftPlanner::<f64>::new();
        let fft = planner.plan_fft_forward(n);
        let mut psd = vec![0.0; n / 2 + 1];
        let mut block = vec![0.0; n];
        let mut spec = fft.make_output_vec();
        for _ in 0..128 {
            g.fill_next(&mut block);
            for (i, v) in block.iter_mut().enumerate() {
                // Hann window
                *v *= 0.5 - 0.5 * (2.0 * PI * i as f64 / n as f64).cos();
            }
            fft.process(&mut block, &mut spec).unwrap();
            for (p, c) in psd.iter_mut().zip(&spec) {
                *p += c.norm_sqr();
            }
        }
        let band_mean = |f_lo: f64, f_hi: f64| {
            let lo = (f_lo / rate * n as f64) as usize;
            let hi = (f_hi / rate * n as f64) as usize;
            psd[lo..hi].iter().sum::<f64>() / (hi - lo) as f64
        };
        let pass = band_mean(2_000.0, 10_000.0);
        let stop = band_mean(80_000.0, 160_000.0);
        // A 6th-order Butterworth is down 20 log10(sqrt(1 + 4^12)) = 72 dB at 4 fc (Butterworth magnitude
        // law, common practice, no source); require at least 60 dB of fall.
        let drop_db = 10.0 * (pass / stop).log10();
        assert!(drop_db > 60.0, "drop {drop_db} dB");
        // The passband is flat: 2-6 kHz vs 6-10 kHz within 1 dB.
        let a = band_mean(2_000.0, 6_000.0);
        let b = band_mean(6_000.0, 10_000.0);
        assert!((10.0 * (a / b).log10()).abs() < 1.0);
    }

    impl SourceGen {
        /// Test helper: the next consecutive block.
        fn fill_next(&mut self, out: &mut [f64]) {
            let n0 = match &self.kind {
                Kind::Noise(g) => g.next_n,
                Kind::Wav(s) => s.next_n,
                Kind::Exact(_) => 0,
            };
            self.fill(n0, out);
        }
    }

    #[test]
    fn noise_is_deterministic_and_independent_of_the_block_split() {
        let mut a = noise_gen(1.0, Some(5e3), 42);
        let mut whole = vec![0.0; 10_000];
        a.fill(0, &mut whole);
        let mut b = noise_gen(1.0, Some(5e3), 42);
        let mut pieces = vec![0.0; 10_000];
        let mut n0 = 0;
        for len in [1usize, 7, 500, 3333, 2, 6157] {
            b.fill(n0 as u64, &mut pieces[n0..n0 + len]);
            n0 += len;
        }
        assert_eq!(whole, pieces);
        // Jumps forward and back give the same samples.
        let mut c = noise_gen(1.0, Some(5e3), 42);
        let mut part = vec![0.0; 100];
        c.fill(9_000, &mut part);
        assert_eq!(&part[..], &whole[9_000..9_100]);
        c.fill(1_000, &mut part);
        assert_eq!(&part[..], &whole[1_000..1_100]);
        // Another seed gives other samples.
        let mut d = noise_gen(1.0, Some(5e3), 43);
        d.fill(0, &mut part);
        assert_ne!(&part[..], &whole[..100]);
    }

    #[derive(Clone, Copy, Debug)]
    enum Fmt {
        Int8,
        Int16,
        Int24,
        Float32,
    }

    /// Write `frames` frames of a tone (peak `amp` full scale, `f_hz`) into `ch_tone` of a `channels`-channel
    /// WAV; the other channel carries a tone at 3 x f of amplitude 0.3.
    #[allow(clippy::too_many_arguments)]
    fn write_wav(
        path: &Path,
        fmt: Fmt,
        channels: u16,
        ch_tone: usize,
        rate: u32,
        f_hz: f64,
        amp: f64,
        frames: usize,
    ) {
        let (bits, sample_format) = match fmt {
            Fmt::Int8 => (8, hound::SampleFormat::Int),
            Fmt::Int16 => (16, hound::SampleFormat::Int),
            Fmt::Int24 => (24, hound::SampleFormat::Int),
            Fmt::Float32 => (32, hound::SampleFormat::Float),
        };
        let spec = hound::WavSpec {
            channels,
            sample_rate: rate,
            bits_per_sample: bits,
            sample_format,
        };
        let mut w = hound::WavWriter::create(path, spec).unwrap();
        for i in 0..frames {
            let t = i as f64 / rate as f64;
            for ch in 0..channels as usize {
                let v = if ch == ch_tone {
                    amp * (2.0 * PI * f_hz * t).sin()
                } else {
                    0.3 * (2.0 * PI * 3.0 * f_hz * t).sin()
                };
                match fmt {
                    Fmt::Int8 => w.write_sample((v * 128.0).round() as i8).unwrap(),
                    Fmt::Int16 => w.write_sample((v * 32768.0).round() as i16).unwrap(),
                    Fmt::Int24 => w.write_sample((v * 8_388_608.0).round() as i32).unwrap(),
                    Fmt::Float32 => w.write_sample(v as f32).unwrap(),
                }
            }
        }
        w.finalize().unwrap();
    }

    fn wav_source(path: &Path, channel: usize, fs_v: f64, repeat: bool, rate: f64) -> SourceGen {
        SourceGen::new(
            &Source {
                waveform: Waveform::Wav {
                    path: path.to_path_buf(),
                    channel,
                    full_scale_v: fs_v,
                    repeat,
                },
                offset_v: 0.25,
            },
            Timebase::new(rate),
            0,
            Path::new("/nonexistent-base"),
        )
        .unwrap()
    }

    #[test]
    fn wav_round_trip_keeps_tone_amplitude_frequency_and_timing() {
        let dir = tempfile::tempdir().unwrap();
        let file_rate = 48_000;
        let f = 1000.0;
        let amp = 0.5;
        let cases = [
            (Fmt::Int16, 1u16, 0usize, 1e-4),
            (Fmt::Int16, 2, 1, 1e-4),
            (Fmt::Int24, 1, 0, 1e-5),
            (Fmt::Int24, 2, 0, 1e-5),
            (Fmt::Float32, 1, 0, 1e-5),
            (Fmt::Float32, 2, 1, 1e-5),
            (Fmt::Int8, 1, 0, 1e-2),
        ];
        // 1 MHz: FFT resampler (48 k : 1 M = 6 : 125); 1_000_003 Hz: the asynchronous fallback.
        for rate in [1e6, 1_000_003.0] {
            for (i, (fmt, channels, ch, tol)) in cases.iter().enumerate() {
                if rate != 1e6 && i % 3 != 1 {
                    continue; // the slower asynchronous path: a subset of the formats
                }
                let path = dir.path().join(format!("tone{i}.wav"));
                write_wav(&path, *fmt, *channels, *ch, file_rate, f, amp, 4800);
                let mut g = wav_source(&path, *ch, 2.0, false, rate);
                assert!(!g.is_exact());
                let n = (0.1 * rate) as usize;
                let mut y = vec![0.0; n];
                // Odd block sizes, consecutive.
                let mut n0 = 0;
                while n0 < n {
                    let len = (n - n0).min(7919);
                    g.fill(n0 as u64, &mut y[n0..n0 + len]);
                    n0 += len;
                }
                // Fit away from the ends (the resampler's filter rings at the file's edges).
                let a = n / 10;
                let b = 9 * n / 10;
                let (amp_got, ph, dc) = fit_sine(&y[a..b], a as f64 / rate, rate, f);
                // Full scale 2 V, tone 0.5 FS: 1 V peak, around the 0.25 V offset.
                assert!(
                    (amp_got - 1.0).abs() < tol + 1e-4,
                    "{fmt:?} ch{ch}/{channels} at {rate}: amplitude {amp_got}"
                );
                assert!((dc - 0.25).abs() < 1e-3, "dc {dc}");
                // The file's sample 0 lands at t = 0: phase within a grid step (2 pi f / rate rad).
                assert!(
                    ph.abs() < 2.0 * PI * f / rate + 1e-3,
                    "{fmt:?} at {rate}: phase {ph}"
                );
                // Frequency: the phase drift between the two halves of the window.
                let mid = (a + b) / 2;
                let (_, p1, _) = fit_sine(&y[a..mid], a as f64 / rate, rate, f);
                let (_, p2, _) = fit_sine(&y[mid..b], mid as f64 / rate, rate, f);
                let dt = (b - a) as f64 / 2.0 / rate;
                let df = (p2 - p1) / (2.0 * PI * dt);
                assert!(
                    df.abs() < 0.01,
                    "{fmt:?} at {rate}: frequency off by {df} Hz"
                );
                // After the end of the file (0.1 s), only the offset.
                let mut tail = vec![1.0; 100];
                g.fill((0.1 * rate).ceil() as u64, &mut tail);
                assert!(tail.iter().all(|v| *v == 0.25));
            }
        }
    }

    #[test]
    fn wav_repeat_loops_the_file_and_block_split_does_not_matter() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("loop.wav");
        // 48 whole cycles of 1 kHz at 48 kHz: the looped file is a continuous tone.
        write_wav(&path, Fmt::Float32, 1, 0, 48_000, 1000.0, 0.5, 2304);
        let rate = 200_000.0;
        let mut g = wav_source(&path, 0, 1.0, true, rate);
        let n = 100_000; // 0.5 s, about ten loops
        let mut y = vec![0.0; n];
        g.fill(0, &mut y);
        let (amp, ph, _) = fit_sine(&y[80_000..n], 0.4, rate, 1000.0);
        assert!((amp - 0.5).abs() < 1e-4, "amplitude {amp}");
        assert!(ph.abs() < 0.05, "phase {ph}");
        let mut h = wav_source(&path, 0, 1.0, true, rate);
        let mut z = vec![0.0; n];
        let mut n0 = 0;
        for len in [1usize, 999, 4096, 33_333, 61_571] {
            h.fill(n0 as u64, &mut z[n0..n0 + len]);
            n0 += len;
        }
        assert_eq!(y, z);
        // Equal rates copy the samples through.
        let mut p = wav_source(&path, 0, 1.0, false, 48_000.0);
        let mut q = vec![0.0; 2400];
        p.fill(0, &mut q);
        for (i, v) in q.iter().enumerate().take(2304) {
            let t = i as f64 / 48_000.0;
            let want = 0.25 + (0.5 * (2.0 * PI * 1000.0 * t).sin()) as f32 as f64;
            assert_eq!(*v, want);
        }
        assert!(q[2304..].iter().all(|v| *v == 0.25));
    }

    #[test]
    fn wav_errors_are_reported_as_read_or_bad_input() {
        let dir = tempfile::tempdir().unwrap();
        let src = |path: &Path, channel| Source {
            waveform: Waveform::Wav {
                path: path.to_path_buf(),
                channel,
                full_scale_v: 1.0,
                repeat: false,
            },
            offset_v: 0.0,
        };
        let tb = Timebase::new(1e5);
        let missing = SourceGen::new(&src(Path::new("nope.wav"), 0), tb, 0, dir.path());
        assert!(matches!(missing, Err(crate::Error::Read { .. })));
        let garbage = dir.path().join("garbage.wav");
        std::fs::write(&garbage, b"this is not a wav file at all").unwrap();
        let bad = SourceGen::new(&src(&garbage, 0), tb, 0, dir.path());
        assert!(matches!(bad, Err(crate::Error::BadInput(_))));
        let good = dir.path().join("mono.wav");
        write_wav(&good, Fmt::Int16, 1, 0, 48_000, 1000.0, 0.5, 100);
        // Relative path resolved against base_dir.
        assert!(SourceGen::new(&src(Path::new("mono.wav"), 0), tb, 0, dir.path()).is_ok());
        let no_channel = SourceGen::new(&src(Path::new("mono.wav"), 1), tb, 0, dir.path());
        assert!(matches!(no_channel, Err(crate::Error::BadInput(_))));
    }
}
