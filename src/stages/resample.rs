//! The `resample` stage: a sample-rate converter between the ADC's codes and the DAC, to `rate`.
//!
//! The codes are taken as numbers and interpolated by a band-limited kernel: a windowed sinc (Kaiser window) of
//! cutoff 0.45 x the lower of the two rates, spanning [`HALF_PERIODS`] periods of the lower rate either side of
//! the output instant, tabulated at [`PHASES`] fractional positions and linearly interpolated between them (the
//! polyphase realisation: J. O. Smith and P. Gossett, "A flexible sampling-rate conversion method", Proc. IEEE
//! ICASSP 1984). Each table row is scaled to a DC gain of exactly 1. The result is rounded to the width arriving
//! and clamped to its codes.
//!
//! `mode = "sync"`: the output clock is derived from the input's (a fixed ratio `rate / input rate`, both on the
//! ADC's clock). Output m stands for input position m x (input rate / rate) and leaves L input periods after
//! that position arrived, L the kernel's half-length in input samples: the stage's delay.
//!
//! `mode = "async"`: the output runs on the DAC's own clock (`rate` on the DAC's `clock_ppm`), whatever the
//! ADC's. The converter does not know the ratio: it estimates the input's position against time from the codes'
//! arrival instants with a slow second-order loop (a proportional-integral tracker of the input index, 2 Hz
//! natural frequency, damping 0.707; a type-2 loop follows a constant frequency offset without a steady phase
//! error: F. M. Gardner, "Phaselock Techniques", 3rd ed., 2005, chapter 2), and reads the input
//! [`ASYNC_MARGIN`] samples further back than the sync converter so a small tracking error never reaches past
//! the last code in. No code is ever repeated or dropped; the delay is (L + margin) input periods.

use serde::Serialize;

use crate::engine::clock::clock_scale;
use crate::error::{Error, Result};
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::measure::window::bessel_i0;
use crate::signal::stream::CodeEvent;
use crate::stages::kind::{
    BuildContext, KindSpec, Param, ParamKind, ReadContext, Role, Runtime, Upstream,
};
use crate::stages::roles::{BudgetLine, CodeStage};

/// Kernel half-length in periods of the lower of the two rates.
pub const HALF_PERIODS: f64 = 32.0;
/// Fractional positions tabulated per input period.
pub const PHASES: usize = 512;
/// Cutoff as a fraction of the lower rate.
pub const CUTOFF: f64 = 0.45;
/// Kaiser window shape: about 90 dB of stop-band attenuation (Kaiser's beta for 90 dB is 0.1102 x 81.3).
pub const KAISER_BETA: f64 = 8.96;
/// Extra input samples the asynchronous converter keeps in hand.
pub const ASYNC_MARGIN: f64 = 2.0;
/// Natural frequency (Hz) and damping of the asynchronous converter's tracking loop.
pub const LOOP_HZ: f64 = 2.0;
pub const LOOP_DAMPING: f64 = 0.707;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ResampleMode {
    Sync,
    Async,
}

/// `kind = "resample"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ResampleCfg {
    /// Output rate (Hz, nominal).
    pub rate_hz: f64,
    pub mode: ResampleMode,
    /// Resolved: the nominal rate of the codes arriving (Hz; 0 before resolving).
    #[serde(skip)]
    pub input_rate_hz: f64,
}

impl ResampleCfg {
    /// The kernel's half-length in input samples.
    pub fn half_length(&self, input_rate_hz: f64) -> usize {
        let low = input_rate_hz.min(self.rate_hz);
        (HALF_PERIODS * input_rate_hz / low).ceil() as usize
    }
    /// The delay in input samples: the half-length, and the margin in async mode.
    pub fn delay_samples(&self, input_rate_hz: f64) -> f64 {
        let l = self.half_length(input_rate_hz) as f64;
        match self.mode {
            ResampleMode::Sync => l,
            ResampleMode::Async => l + ASYNC_MARGIN,
        }
    }
}

impl KindSpec for ResampleCfg {
    const NAME: &'static str = "resample";
    const ROLE: Role = Role::Code;
    const EXAMPLE: &'static str = r#"rate = "44.1 kHz"
mode = "async""#;
    const PARAMS: &'static [Param] = &[
        Param::fixed("rate", ParamKind::Quantity(Dimension::Frequency)),
        Param::fixed("mode", ParamKind::Choice(&["sync", "async"])),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        let rate = r
            .positive("rate", Dimension::Frequency)?
            .ok_or_else(|| r.missing("rate", "\"48 kHz\""))?;
        let mode = r
            .choice(
                "mode",
                &[("sync", ResampleMode::Sync), ("async", ResampleMode::Async)],
            )?
            .map_or(ResampleMode::Sync, |q| q.value);
        Ok(ResampleCfg {
            rate_hz: rate.value,
            mode,
            input_rate_hz: 0.0,
        })
    }

    /// The codes leave at `rate`; in async mode, on the DAC's clock.
    fn resolve(&mut self, up: &mut Upstream) {
        self.input_rate_hz = up.sample_rate_hz.unwrap_or(0.0);
        up.sample_rate_hz = Some(self.rate_hz);
        if self.mode == ResampleMode::Async {
            up.clock_follows_dac = true;
        }
    }

    fn transport_s(&self, sample_rate_hz: f64) -> f64 {
        self.delay_samples(sample_rate_hz) / sample_rate_hz
    }

    fn echo(&self) -> serde_json::Value {
        let mut v = serde_json::to_value(self).unwrap_or(serde_json::Value::Null);
        if self.input_rate_hz > 0.0 {
            v["input_rate_hz"] = serde_json::json!(self.input_rate_hz);
            v["half_length_samples"] = serde_json::json!(self.half_length(self.input_rate_hz));
            v["delay_s"] =
                serde_json::json!(self.delay_samples(self.input_rate_hz) / self.input_rate_hz);
        }
        v
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let fin = ctx.upstream.sample_rate_hz.ok_or_else(|| {
            Error::BadInput(format!(
                "{}: a resample stage needs an ADC before it",
                ctx.label
            ))
        })?;
        Ok(Runtime::Code(Box::new(Resampler::new(
            *self,
            fin,
            ctx.upstream.clock_ppm,
            ctx.upstream.width_bits,
            ctx.label.clone(),
        ))))
    }
}

/// The converter at run time.
pub struct Resampler {
    cfg: ResampleCfg,
    label: String,
    /// Nominal input rate, and the input's actual rate on the ADC's clock (Hz).
    fin_nominal_hz: f64,
    fin_hz: f64,
    /// Output clock (Hz): the input's clock scaled (sync), or the DAC's (async, once locked).
    fout_hz: f64,
    max_code: f64,
    /// Kernel half-length L (input samples); rows of 2L taps for offsets -L+1 ..= L, PHASES + 1 rows.
    half: usize,
    table: Vec<f64>,
    /// Ring of the last input codes (as numbers), indexed by absolute input index.
    ring: Vec<f64>,
    mask: usize,
    /// Input codes arrived so far.
    n_in: u64,
    /// First input: its sampling and arrival instants.
    first: Option<(f64, f64)>,
    /// Output samples emitted.
    m_out: u64,
    /// Async tracking loop: estimated input index at `t_ref_s`, and the estimated input rate (samples/s).
    est_index: f64,
    t_ref_s: f64,
    est_rate_hz: f64,
}

impl Resampler {
    pub fn new(
        cfg: ResampleCfg,
        fin_nominal_hz: f64,
        clock_ppm: f64,
        bits: u32,
        label: String,
    ) -> Resampler {
        let fin_hz = fin_nominal_hz * clock_scale(clock_ppm);
        let half = cfg.half_length(fin_nominal_hz);
        let fc = CUTOFF * fin_nominal_hz.min(cfg.rate_hz) / fin_nominal_hz; // cycles per input sample
        let taps = 2 * half;
        let i0b = bessel_i0(KAISER_BETA);
        let mut table = vec![0.0; (PHASES + 1) * taps];
        for p in 0..=PHASES {
            let mu = p as f64 / PHASES as f64;
            let row = &mut table[p * taps..(p + 1) * taps];
            for (j, h) in row.iter_mut().enumerate() {
                // Tap j weighs input i + k, k = j - L + 1, at distance x = mu - k from the output position.
                let k = j as f64 - half as f64 + 1.0;
                let x = mu - k;
                let r = x / half as f64;
                let w = if r.abs() < 1.0 {
                    bessel_i0(KAISER_BETA * (1.0 - r * r).sqrt()) / i0b
                } else {
                    0.0
                };
                let arg = std::f64::consts::PI * 2.0 * fc * x;
                let sinc = if arg.abs() < 1e-12 { 1.0 } else { arg.sin() / arg };
                *h = 2.0 * fc * sinc * w;
            }
            let sum: f64 = row.iter().sum();
            row.iter_mut().for_each(|h| *h /= sum);
        }
        let size = (4 * half + 64).next_power_of_two();
        Resampler {
            fout_hz: cfg.rate_hz * clock_scale(clock_ppm),
            cfg,
            label,
            fin_nominal_hz,
            fin_hz,
            max_code: if bits >= 32 {
                u32::MAX as f64
            } else {
                ((1u64 << bits) - 1) as f64
            },
            half,
            table,
            ring: vec![0.0; size],
            mask: size - 1,
            n_in: 0,
            first: None,
            m_out: 0,
            est_index: 0.0,
            t_ref_s: 0.0,
            est_rate_hz: fin_nominal_hz,
        }
    }

    /// Delay (s) from an input position's arrival to the output that stands for it.
    fn delay_s(&self) -> f64 {
        self.cfg.delay_samples(self.fin_nominal_hz) / self.fin_hz
    }

    /// Instant of output `m` (s).
    fn output_time_s(&self, m: u64) -> f64 {
        let (_, a0) = self.first.unwrap_or((0.0, 0.0));
        a0 + self.delay_s() + m as f64 / self.fout_hz
    }

    /// The input position (input samples from the first) that output `m` stands for, at its instant `t_s`.
    fn position(&self, m: u64, t_s: f64) -> f64 {
        match self.cfg.mode {
            ResampleMode::Sync => m as f64 * self.fin_nominal_hz / self.cfg.rate_hz,
            ResampleMode::Async => {
                self.est_index + (t_s - self.t_ref_s) * self.est_rate_hz
                    - self.cfg.delay_samples(self.fin_nominal_hz)
            }
        }
    }

    /// The interpolated value at input position `tau` (codes as numbers); inputs not yet in (or before the
    /// first) count as the nearest one held.
    fn value_at(&self, tau: f64) -> f64 {
        let i = tau.floor();
        let mu = tau - i;
        let pf = mu * PHASES as f64;
        let p = (pf.floor() as usize).min(PHASES - 1);
        let frac = pf - p as f64;
        let taps = 2 * self.half;
        let row_a = &self.table[p * taps..(p + 1) * taps];
        let row_b = &self.table[(p + 1) * taps..(p + 2) * taps];
        let last = self.n_in as i64 - 1;
        let oldest = (self.n_in as i64 - self.ring.len() as i64).max(0);
        let mut ya = 0.0;
        let mut yb = 0.0;
        for j in 0..taps {
            let n = (i as i64 + j as i64 - self.half as i64 + 1).clamp(oldest, last.max(0));
            let x = self.ring[n as usize & self.mask];
            ya += row_a[j] * x;
            yb += row_b[j] * x;
        }
        ya + frac * (yb - ya)
    }

    fn emit(&mut self, out: &mut Vec<CodeEvent>) {
        let m = self.m_out;
        let t = self.output_time_s(m);
        let tau = self.position(m, t);
        let y = self.value_at(tau);
        let (t0_sample, _) = self.first.unwrap_or((0.0, 0.0));
        out.push(CodeEvent {
            t_sample_s: t0_sample + tau / self.fin_hz,
            t_avail_s: t,
            code: y.round().clamp(0.0, self.max_code) as u32,
        });
        self.m_out += 1;
    }

    /// Update the tracking loop with input `n` arriving at `t_s`.
    fn track(&mut self, n: u64, t_s: f64) {
        if n == 0 {
            self.est_index = 0.0;
            self.t_ref_s = t_s;
            return;
        }
        let predicted = self.est_index + (t_s - self.t_ref_s) * self.est_rate_hz;
        let e = n as f64 - predicted;
        let w = 2.0 * std::f64::consts::PI * LOOP_HZ;
        let period = 1.0 / self.fin_nominal_hz;
        self.est_index = predicted + 2.0 * LOOP_DAMPING * w * period * e;
        self.t_ref_s = t_s;
        self.est_rate_hz += w * w * period * e;
    }
}

impl CodeStage for Resampler {
    fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        if self.first.is_some() {
            while self.output_time_s(self.m_out) < ev.t_avail_s {
                self.emit(out);
            }
        } else {
            self.first = Some((ev.t_sample_s, ev.t_avail_s));
        }
        let n = self.n_in;
        self.ring[n as usize & self.mask] = f64::from(ev.code);
        self.n_in += 1;
        if self.cfg.mode == ResampleMode::Async {
            self.track(n, ev.t_avail_s);
        }
    }

    fn budget(&self, sample_rate_hz: f64) -> Vec<BudgetLine> {
        let what = match self.cfg.mode {
            ResampleMode::Sync => format!("half its {}-tap kernel", 2 * self.half),
            ResampleMode::Async => format!(
                "half its {}-tap kernel and {ASYNC_MARGIN} samples in hand",
                2 * self.half
            ),
        };
        vec![BudgetLine {
            stage: format!("{}: rate converter ({what})", self.label),
            seconds: self.cfg.delay_samples(self.fin_nominal_hz) / sample_rate_hz,
        }]
    }

    fn output_rate_hz(&self, _input_rate_hz: f64) -> f64 {
        self.fout_hz
    }

    fn lock_output_clock(&mut self, dac_clock_ppm: f64) {
        if self.cfg.mode == ResampleMode::Async {
            self.fout_hz = self.cfg.rate_hz * clock_scale(dac_clock_ppm);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sine_codes(n: usize, fs: f64, f: f64, bits: u32, latency_s: f64) -> Vec<CodeEvent> {
        let mid = f64::powi(2.0, bits as i32 - 1);
        (0..n)
            .map(|k| {
                let t = k as f64 / fs;
                CodeEvent {
                    t_sample_s: t,
                    t_avail_s: t + latency_s,
                    code: (mid + 0.8 * mid * (2.0 * std::f64::consts::PI * f * t).sin()).round()
                        as u32,
                }
            })
            .collect()
    }

    /// Amplitude and phase (rad) of a sine of `f` fitted (IEEE Std 1241's three-parameter fit) to samples `y`
    /// taken uniformly at the instants `t`.
    fn fit(t: &[f64], y: &[f64], f: f64) -> (f64, f64) {
        let rate = (t.len() - 1) as f64 / (t[t.len() - 1] - t[0]);
        let fit = crate::measure::sinefit::fit3(y, rate, f, t[0]);
        (fit.amplitude_v, fit.phase_rad)
    }

    fn run(r: &mut Resampler, evs: &[CodeEvent]) -> Vec<CodeEvent> {
        let mut out = Vec::new();
        for e in evs {
            r.push(*e, &mut out);
        }
        out
    }

    fn cfg(rate: f64, mode: ResampleMode) -> ResampleCfg {
        ResampleCfg {
            rate_hz: rate,
            mode,
            input_rate_hz: 44_100.0,
        }
    }

    #[test]
    fn sync_44k1_to_48k_passes_an_in_band_sine_at_its_level_and_stated_delay() {
        let (fin, fout, f) = (44_100.0, 48_000.0, 1_000.0);
        let evs = sine_codes(44_100, fin, f, 16, 0.0);
        let mut r = Resampler::new(cfg(fout, ResampleMode::Sync), fin, 0.0, 16, "r".into());
        let out = run(&mut r, &evs);
        assert!((out.len() as f64 - 48_000.0).abs() < 100.0, "{}", out.len());
        // Output instants step at exactly 1/48 kHz.
        let dt = out[1001].t_avail_s - out[1000].t_avail_s;
        assert!((dt * fout - 1.0).abs() < 1e-9);
        let tail = &out[2000..out.len() - 100];
        let mid = 32_768.0;
        let t_in: Vec<f64> = evs.iter().map(|e| e.t_avail_s).collect();
        let y_in: Vec<f64> = evs.iter().map(|e| e.code as f64 - mid).collect();
        let t_out: Vec<f64> = tail.iter().map(|e| e.t_avail_s).collect();
        let y_out: Vec<f64> = tail.iter().map(|e| e.code as f64 - mid).collect();
        let (a_in, p_in) = fit(&t_in, &y_in, f);
        let (a_out, p_out) = fit(&t_out, &y_out, f);
        // Common practice, no source: a converter's passband within 0.1 dB.
        let gain_db = 20.0 * (a_out / a_in).log10();
        assert!(gain_db.abs() < 0.1, "{gain_db} dB");
        let delay = (p_in - p_out).rem_euclid(2.0 * std::f64::consts::PI) / (2.0 * std::f64::consts::PI * f);
        let stated = r.budget(fin)[0].seconds;
        // By construction the delay is the stated one; the fit resolves it to well under an output period.
        assert!((delay - stated).abs() < 0.05 / fout, "{delay} vs {stated}");
    }

    #[test]
    fn async_tracks_an_input_clock_100_ppm_off_without_losing_the_delay() {
        let (fin, fout, f) = (48_000.0, 48_000.0, 1_000.0);
        let ppm = 100.0;
        let fin_act = fin * clock_scale(ppm);
        let n = 5 * 48_000;
        let mid = 32_768.0;
        let evs: Vec<CodeEvent> = (0..n)
            .map(|k| {
                let t = k as f64 / fin_act;
                CodeEvent {
                    t_sample_s: t,
                    t_avail_s: t,
                    code: (mid + 0.8 * mid * (2.0 * std::f64::consts::PI * f * t).sin()).round()
                        as u32,
                }
            })
            .collect();
        let mut c = cfg(fout, ResampleMode::Async);
        c.input_rate_hz = fin;
        // The resampler is not told the input's offset: it is built for the nominal rate.
        let mut r = Resampler::new(c, fin, 0.0, 16, "r".into());
        r.lock_output_clock(0.0);
        let out = run(&mut r, &evs);
        // Output ticks on the DAC's clock: the count follows the output clock, not the input's.
        let span = out.last().unwrap().t_avail_s - out[0].t_avail_s;
        assert!(((out.len() - 1) as f64 - span * fout).abs() < 1.0);
        // Delay per second after the loop settles: a sine fit over each second.
        let stated = r.budget(fin)[0].seconds;
        for s in 1..4 {
            let sel: Vec<&CodeEvent> = out
                .iter()
                .filter(|e| e.t_avail_s >= s as f64 && e.t_avail_s < s as f64 + 1.0)
                .collect();
            let t: Vec<f64> = sel.iter().map(|e| e.t_avail_s).collect();
            let y: Vec<f64> = sel.iter().map(|e| e.code as f64 - mid).collect();
            let (_, p) = fit(&t, &y, f);
            // The input's phase, by the same fit over its own samples of that second.
            let sel_in: Vec<&CodeEvent> = evs
                .iter()
                .filter(|e| e.t_avail_s >= s as f64 && e.t_avail_s < s as f64 + 1.0)
                .collect();
            let t_in: Vec<f64> = sel_in.iter().map(|e| e.t_avail_s).collect();
            let y_in: Vec<f64> = sel_in.iter().map(|e| e.code as f64 - mid).collect();
            let (_, p_in) = fit(&t_in, &y_in, f);
            let delay = (p_in - p).rem_euclid(2.0 * std::f64::consts::PI) / (2.0 * std::f64::consts::PI * f);
            assert!(
                (delay - stated).abs() < 0.1 / fin,
                "second {s}: {delay} vs {stated}"
            );
        }
    }
}
